//! What a cross-fit reports: the learner each component chose, every
//! candidate's out-of-fold loss, and where the propensities came from.

use serde::Serialize;

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
    /// AUC of the (unclipped) propensity for the treatment.
    pub auc: f64,
    pub clip: f64,
    pub clipped: usize,
}

#[derive(Debug, Clone, Serialize)]
pub struct NuisanceReport {
    pub folds: usize,
    pub seed: u64,
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
