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
pub trait Estimator: Sync + Send {
    /// Stable key used in JSON, the API and metric labels.
    fn key(&self) -> &'static str;
    /// Contribution of one unit for predicted effect `tau_hat`.
    fn contribution(&self, unit: &UnitView, tau_hat: f64) -> f64;
}

/// Every estimator, in the order reports list them.
pub const ALL: [&dyn Estimator; 5] = [&CorrectedPehe, &PluginPehe, &DrLoss, &RLoss, &IpwLoss];

/// Looks an estimator up by its key.
pub fn by_key(key: &str) -> Option<&'static dyn Estimator> {
    ALL.iter().copied().find(|e| e.key() == key)
}
