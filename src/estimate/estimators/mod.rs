//! Per-unit error estimators for one model's predicted effects.
//!
//! An estimator turns a unit's nuisance values, factual data and one model's
//! prediction into that unit's contribution; the score is the mean
//! contribution. Means, standard errors, pairwise differences, windows and
//! the mergeable sums of [`crate::estimate::sums`] are generic over this
//! trait, so adding an estimator is one file here plus one entry in
//! [`ALL`].

mod corrected_pehe;
mod dr_loss;
mod ipw_loss;
mod plugin_pehe;
mod r_loss;

pub use corrected_pehe::CorrectedPehe;
pub use dr_loss::DrLoss;
pub use ipw_loss::IpwLoss;
pub use plugin_pehe::PluginPehe;
pub use r_loss::RLoss;

/// What an estimator may read about unit i.
#[derive(Debug, Clone, Copy)]
pub struct UnitView {
    pub outcome: f64,
    pub treatment: f64,
    /// Clipped propensity.
    pub propensity: f64,
    pub mu0: f64,
    pub mu1: f64,
    /// AIPW pseudo-outcome.
    pub phi: f64,
}

impl UnitView {
    pub fn tau_tilde(&self) -> f64 {
        self.mu1 - self.mu0
    }

    pub fn m_tilde(&self) -> f64 {
        self.propensity * self.mu1 + (1.0 - self.propensity) * self.mu0
    }
}

/// A per-unit contribution whose mean scores a model (lower is better).
///
/// The contribution must be a polynomial of degree at most two in
/// `tau_hat` (every estimator here is the square of an affine function of
/// it, or a difference of such squares). That lets a window's aggregates for
/// the constant-effect baseline, whose prediction (the window's ATE) moves
/// as units arrive, be kept as aggregates of three fixed predictions and
/// re-weighted (see `estimate::scoreboard::ConstantBasis`); a test checks
/// the property for every entry of [`ALL`].
pub trait Estimator: Sync + Send {
    /// Stable key used in JSON, the API and metric labels.
    fn key(&self) -> &'static str;
    /// Contribution of one unit for predicted effect `tau_hat`.
    fn contribution(&self, unit: &UnitView, tau_hat: f64) -> f64;
    /// Contributions of a block of units, `out[i]` for `units[i]` and
    /// `tau_hat[i]`. One dynamic call per block: the loop below is compiled
    /// for each estimator, with `contribution` inlined.
    fn contributions(&self, units: &[UnitView], tau_hat: &[f64], out: &mut [f64]) {
        for ((o, u), &t) in out.iter_mut().zip(units).zip(tau_hat) {
            *o = self.contribution(u, t);
        }
    }
}

/// Every estimator, in the order reports list them.
pub const ALL: [&dyn Estimator; 5] = [&CorrectedPehe, &PluginPehe, &DrLoss, &RLoss, &IpwLoss];

/// Looks an estimator up by its key.
pub fn by_key(key: &str) -> Option<&'static dyn Estimator> {
    ALL.iter().copied().find(|e| e.key() == key)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_estimator_is_quadratic_in_the_prediction() {
        // Interpolating through tau = 0, 1, -1 must reproduce the
        // contribution anywhere; values here are O(1e3), so 1e-9 relative
        // leaves room for rounding only.
        let units = [
            UnitView {
                outcome: 1.3,
                treatment: 1.0,
                propensity: 0.3,
                mu0: 0.2,
                mu1: 0.9,
                phi: 2.4,
            },
            UnitView {
                outcome: -4.0,
                treatment: 0.0,
                propensity: 0.02,
                mu0: 1.5,
                mu1: -0.5,
                phi: -7.1,
            },
        ];
        for e in ALL {
            for u in &units {
                let (c0, c1, cm) = (
                    e.contribution(u, 0.0),
                    e.contribution(u, 1.0),
                    e.contribution(u, -1.0),
                );
                for t in [-13.5, -0.3, 0.25, 2.0, 40.0] {
                    let interpolated =
                        c0 * (1.0 - t * t) + c1 * t * (t + 1.0) / 2.0 + cm * t * (t - 1.0) / 2.0;
                    let direct = e.contribution(u, t);
                    assert!(
                        (interpolated - direct).abs() < 1e-9 * direct.abs().max(1.0),
                        "{}: {interpolated} vs {direct}",
                        e.key()
                    );
                }
            }
        }
    }
}
