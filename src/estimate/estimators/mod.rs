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

use serde::Serialize;

use super::stats::Estimate;

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
/// re-weighted (see `estimate::incremental::ConstantBasis`); a test checks
/// the property for every entry of [`ALL`].
pub trait Estimator: Sync + Send {
    /// Stable key used in JSON, the API and metric labels.
    fn key(&self) -> &'static str;
    /// Short name for tables and pages ("DR loss").
    fn label(&self) -> &'static str;
    /// Contribution of one unit for predicted effect `tau_hat`.
    fn contribution(&self, unit: &UnitView, tau_hat: f64) -> f64;
    /// True when the contribution reads the treatment and propensity as a
    /// binary assignment (R-loss, IPW loss). With several arms such an
    /// estimator runs, per contrast, on the units of that contrast's two
    /// arms only, with the conditional propensity e_k / (e_k + e_0); the
    /// others read only the pseudo-outcome and the outcome models and run
    /// on every unit.
    fn needs_binary_treatment(&self) -> bool {
        false
    }
    /// Contributions of a block of units, `out[i]` for `units[i]` and
    /// `tau_hat[i]`. One dynamic call per block: the loop below is compiled
    /// for each estimator, with `contribution` inlined.
    fn contributions(&self, units: &[UnitView], tau_hat: &[f64], out: &mut [f64]) {
        for ((o, u), &t) in out.iter_mut().zip(units).zip(tau_hat) {
            *o = self.contribution(u, t);
        }
    }
}

/// Every estimator, in the order reports list them. The board, the
/// metrics, the history's accepted keys, the tables and the Python client's
/// frame all follow this list; the first entry ranks the models.
pub const ALL: [&dyn Estimator; 5] = [&CorrectedPehe, &PluginPehe, &DrLoss, &RLoss, &IpwLoss];

/// Position in [`ALL`] of the estimator that ranks models: corrected PEHE,
/// whose pairwise differences are the doubly robust comparisons.
pub const RANKED_BY: usize = 0;

/// Looks an estimator up by its key.
pub fn by_key(key: &str) -> Option<&'static dyn Estimator> {
    ALL.iter().copied().find(|e| e.key() == key)
}

/// One model's score under every estimator of [`ALL`], in its order.
/// Serialized as a map from key to estimate, so that each estimator is a
/// field of the model's JSON object (`"dr_loss": {"estimate": .., "se": ..}`).
#[derive(Debug, Clone, PartialEq)]
pub struct Scores(Vec<Estimate>);

impl Scores {
    /// The score of each estimator of [`ALL`], by its position there.
    pub fn from_fn(score: impl FnMut(usize) -> Estimate) -> Self {
        Self((0..ALL.len()).map(score).collect())
    }

    /// The score of the estimator that ranks models.
    pub fn ranked(&self) -> Estimate {
        self.0[RANKED_BY]
    }

    pub fn get(&self, key: &str) -> Option<Estimate> {
        ALL.iter().position(|e| e.key() == key).map(|i| self.0[i])
    }

    /// (key, score) pairs in [`ALL`]'s order.
    pub fn iter(&self) -> impl Iterator<Item = (&'static str, Estimate)> + '_ {
        ALL.iter().map(|e| e.key()).zip(self.0.iter().copied())
    }
}

impl Serialize for Scores {
    fn serialize<S: serde::Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let mut map = serializer.serialize_map(Some(self.0.len()))?;
        for (key, e) in self.iter() {
            map.serialize_entry(key, &e)?;
        }
        map.end()
    }
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

    #[test]
    fn keys_are_unique_and_corrected_pehe_ranks() {
        let mut keys: Vec<&str> = ALL.iter().map(|e| e.key()).collect();
        assert_eq!(ALL[RANKED_BY].key(), "corrected_pehe");
        keys.sort_unstable();
        keys.dedup();
        assert_eq!(keys.len(), ALL.len());
        assert!(by_key("no_such_estimator").is_none());
    }

    #[test]
    fn scores_serialize_as_one_field_per_estimator() {
        let scores = Scores::from_fn(|i| Estimate::new(i as f64, 0.5));
        let v = serde_json::to_value(&scores).expect("serializes");
        for (i, e) in ALL.iter().enumerate() {
            assert_eq!(v[e.key()]["estimate"], serde_json::json!(i as f64));
        }
        assert_eq!(scores.get("dr_loss"), Some(Estimate::new(2.0, 0.5)));
        assert_eq!(scores.get("no_such_estimator"), None);
    }
}
