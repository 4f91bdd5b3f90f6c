//! What a cross-fit reports: the learner each component chose, every
//! candidate's out-of-fold loss, and where the propensities came from.

use serde::Serialize;

use super::recalibrate::RecalibrationReport;

/// One learner's out-of-fold loss for a component.
#[derive(Debug, Clone, Serialize)]
pub struct CandidateLoss {
    pub learner: String,
    /// Mean held-out loss: over every scored unit for a learner fitted on
    /// all folds; over the first fold's scored units for one screened out.
    pub oof_loss: f64,
    /// Present when the learner was screened out after the first fold: how
    /// many standard errors its first-fold loss lay above the best
    /// learner's.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub screened_out_z: Option<f64>,
}

/// Which learner a component chose and how well it did out of fold.
#[derive(Debug, Clone, Serialize)]
pub struct ComponentReport {
    pub learner: String,
    /// "log_loss" or "squared_error".
    pub loss: &'static str,
    pub oof_loss: f64,
    pub candidates: Vec<CandidateLoss>,
    /// Units whose outcome the loss was computed on: the component's units
    /// among those the models were fitted on (out of fold, as always).
    pub units: usize,
}

/// Where the propensities came from and how they behave.
#[derive(Debug, Clone, Serialize)]
pub struct PropensityReport {
    /// "fitted" or "logged".
    pub source: &'static str,
    /// Present when the propensity was fitted.
    pub fit: Option<ComponentReport>,
    /// Present when the propensity was fitted: the last stage it got
    /// (raw, Platt or isotonic) and each candidate stage's out-of-fold
    /// log loss. The AUC below is the raw score's; the calibration error
    /// is that of the values after this stage.
    pub recalibration: Option<RecalibrationReport>,
    /// AUC of the (unclipped) propensity for the treatment.
    pub auc: f64,
    /// How far the propensities are from the treated shares they claim:
    /// the units are cut into [`CALIBRATION_BINS`] equal-count bins by the
    /// propensity they are weighted with, and this is the unit-weighted
    /// mean over bins of |treated share - mean propensity| (the binned
    /// expected calibration error). The inverse weights carry a
    /// propensity's conditional bias into every pseudo-outcome, and a
    /// ranking's remaining bias is that error times the outcome models'
    /// error, so this is the propensity half of it that can be checked
    /// from the data. Never 0 in a finite sample: read it against
    /// `calibration_noise`.
    pub calibration_error: f64,
    /// What `calibration_error` would be, on average, for a perfectly
    /// calibrated propensity on these units: the binomial noise of the
    /// bins' treated shares (sqrt(2 / pi) times each bin's standard error,
    /// the mean absolute value of a normal), averaged like the error. An
    /// error near it is all noise; several times it is a miscalibrated
    /// propensity.
    pub calibration_noise: f64,
    pub clip: f64,
    pub clipped: usize,
}

#[derive(Debug, Clone, Serialize)]
pub struct NuisanceReport {
    pub folds: usize,
    pub seed: u64,
    /// Fold splits the values were averaged over (repeated cross-fitting);
    /// the report's losses and the fold models are the first split's.
    pub fold_repeats: usize,
    /// The cap on the units the models are fitted on under which this fit
    /// drew its sample; None when they were fitted on every unit (no cap,
    /// or one at or above the number of units: the same fit either way).
    /// Kept with a stored fit so that the fit is drawn again with its own
    /// cap whatever the setting is later; a record without it was fitted
    /// on every unit.
    pub max_fit_units: Option<usize>,
    /// Units the fold models were fitted on: every unit, or the sample.
    pub fitted_units: usize,
    /// Units given nuisance values, each by models that never saw it.
    pub units: usize,
    pub propensity: PropensityReport,
    pub outcome_control: ComponentReport,
    pub outcome_treated: ComponentReport,
}

/// Equal-count bins of the propensity's calibration error: ten, the usual
/// choice, which keeps hundreds of units per bin at the sizes plumbline
/// fits (so a bin's share is not mostly noise) while still resolving a
/// propensity that is off in one tail.
pub const CALIBRATION_BINS: usize = 10;

/// The binned calibration error of propensities `p` for treatments `w` and
/// its noise level under perfect calibration (see
/// [`PropensityReport::calibration_error`]): units sorted by propensity
/// and cut into `bins` bins of (nearly) equal count.
pub fn binned_calibration(p: &[f64], w: &[f64], bins: usize) -> (f64, f64) {
    let n = p.len().min(w.len());
    if n == 0 {
        return (0.0, 0.0);
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let bins = bins.clamp(1, n);
    let (mut error, mut noise) = (0.0, 0.0);
    for b in 0..bins {
        let part = &order[b * n / bins..(b + 1) * n / bins];
        if part.is_empty() {
            continue;
        }
        let m = part.len() as f64;
        let mean_p = part.iter().map(|&i| p[i]).sum::<f64>() / m;
        let share = part.iter().map(|&i| w[i]).sum::<f64>() / m;
        let variance = part.iter().map(|&i| p[i] * (1.0 - p[i])).sum::<f64>() / m;
        error += m * (share - mean_p).abs();
        noise += m * (2.0 / std::f64::consts::PI).sqrt() * (variance / m).sqrt();
    }
    (error / n as f64, noise / n as f64)
}
