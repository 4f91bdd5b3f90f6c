//! How a watch decides: the false-alarm budget, the horizon its detectors
//! are calibrated over, and the tolerances of the overlap, misfit and drift
//! checks, with the defaults a dataset starts with.

/// How a watch decides.
#[derive(Debug, Clone, PartialEq)]
pub struct WatchSettings {
    /// Each family of alerts (front-runner, heterogeneity, overlap, misfit)
    /// keeps its false-alarm probability at most this.
    pub alpha: f64,
    /// Looks over which a detector's false-alarm probability is at most
    /// its share of alpha (its average run length to a false alarm is at
    /// least `horizon` / that share).
    pub horizon: u64,
    pub overlap_eps: f64,
    pub max_extreme_share: f64,
    /// Calibration the fitted propensity may lose before it is stale: the
    /// treated share minus the mean propensity, and their covariance with
    /// a standardized feature.
    pub propensity_tolerance: f64,
    /// Shift of an arm's mean outcome residual, in outcome standard
    /// deviations, the outcome models may show before they are stale.
    pub outcome_tolerance: f64,
    /// Standardized mean difference of a feature or the propensity, between
    /// arriving units and the reference, that counts as drift.
    pub drift_tolerance: f64,
}

pub const DEFAULT_HORIZON: u64 = 1000;
pub const DEFAULT_PROPENSITY_TOLERANCE: f64 = 0.02;
pub const DEFAULT_OUTCOME_TOLERANCE: f64 = 0.1;
/// 0.1 standard deviations: the usual line for a meaningful imbalance
/// between two groups (Austin 2009; common practice).
pub const DEFAULT_DRIFT_TOLERANCE: f64 = 0.1;

impl Default for WatchSettings {
    fn default() -> Self {
        Self {
            alpha: 0.05,
            horizon: DEFAULT_HORIZON,
            overlap_eps: 0.05,
            max_extreme_share: 0.10,
            propensity_tolerance: DEFAULT_PROPENSITY_TOLERANCE,
            outcome_tolerance: DEFAULT_OUTCOME_TOLERANCE,
            drift_tolerance: DEFAULT_DRIFT_TOLERANCE,
        }
    }
}
