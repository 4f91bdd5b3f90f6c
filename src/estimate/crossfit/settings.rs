//! How the nuisance components are fitted: folds, seed, clipping, the
//! learner libraries and the first-fold screening, checked once before any
//! fitting starts.

use crate::estimate::error::EstimateError;
use crate::estimate::learner::Learner;

use super::recalibrate::RecalibrationChoice;

/// How the nuisance components are fitted.
///
/// Empty learner lists mean "the default library for this data"
/// ([`default_library`](crate::estimate::learner::default_library)), chosen once the number of features is known.
#[derive(Debug)]
pub struct NuisanceSettings {
    pub folds: usize,
    pub seed: u64,
    /// Propensities are clipped to [clip, 1 - clip] for weighting.
    pub clip: f64,
    pub propensity_learners: Vec<Box<dyn Learner>>,
    pub outcome_learners: Vec<Box<dyn Learner>>,
    /// Each fold must hold at least this many units of each arm.
    pub min_units_per_fold: usize,
    /// A propensity AUC at or above this means the arms are separated.
    pub separation_auc: f64,
    /// First-fold screening: a learner whose held-out loss on the first
    /// fold is above the best learner's by more than this many standard
    /// errors (paired over that fold's units) is not fitted on the other
    /// folds. None fits every learner on every fold.
    pub screening_z: Option<f64>,
    /// The most units the fold models are fitted on: above it they are
    /// fitted on a seeded sample stratified by arm, and every unit still
    /// gets its values from the models of its own fold, which never saw it
    /// ([`assign_fit`](super::assign_fit)). Bounds a fit's time and memory
    /// whatever the history. None fits every unit.
    pub max_fit_units: Option<usize>,
    /// How many fold splits the cross-fit is run on (repeated cross-fitting,
    /// as in Chernozhukov et al. 2018's repeated sample splitting): each
    /// unit's values are the mean of its out-of-fold values over the
    /// splits, every one from models that never saw it, so the scores
    /// depend less on which units happened to share a fold. Each split
    /// costs a whole cross-fit. One by default: on the hard designs of
    /// tests/nuisance_simulation.rs three splits did not raise coverage or
    /// the front-runner's share (the error they leave is the fits', not
    /// the split's).
    pub fold_repeats: usize,
    /// The fitted propensity's last stage (`recalibrate.rs`): each fold's
    /// propensities mapped through a monotone map (a logistic curve in
    /// their logit, or an isotonic step map) fitted on the other folds'
    /// out-of-fold propensities, or left raw. By default the stage with
    /// the lowest out-of-fold log loss is kept, so a map is used only
    /// where it helps. The fold models kept for later units carry their
    /// fold's map.
    pub propensity_recalibration: RecalibrationChoice,
}

impl Default for NuisanceSettings {
    fn default() -> Self {
        Self {
            folds: 5,
            seed: 0,
            clip: 0.01,
            propensity_learners: Vec::new(),
            outcome_learners: Vec::new(),
            min_units_per_fold: 3,
            separation_auc: 0.995,
            // Four standard errors on a fifth of the data: a learner this far
            // behind on one fold is all but certain to lose on all five.
            screening_z: Some(4.0),
            max_fit_units: None,
            fold_repeats: 1,
            propensity_recalibration: RecalibrationChoice::ByLoss,
        }
    }
}

/// The most fold splits a setting may ask for: each costs a whole cross-fit.
pub const MAX_FOLD_REPEATS: usize = 20;

impl NuisanceSettings {
    pub fn check(&self) -> Result<(), EstimateError> {
        if self.folds < 2 {
            return Err(EstimateError::invalid(format!(
                "folds must be at least 2 (got {})",
                self.folds
            )));
        }
        if let Some(z) = self.screening_z {
            if !(z.is_finite() && z > 0.0) {
                return Err(EstimateError::invalid(format!(
                    "screening z must be a positive number (got {z})"
                )));
            }
        }
        if self.max_fit_units == Some(0) {
            return Err(EstimateError::invalid(
                "max_fit_units must be at least 1 (or none, to fit every unit)",
            ));
        }
        if !(1..=MAX_FOLD_REPEATS).contains(&self.fold_repeats) {
            return Err(EstimateError::invalid(format!(
                "fold repeats must lie in 1..={MAX_FOLD_REPEATS} (got {})",
                self.fold_repeats
            )));
        }
        if !(self.clip >= 0.0 && self.clip < 0.5) {
            return Err(EstimateError::invalid(format!(
                "propensity clip must lie in [0, 0.5) (got {})",
                self.clip
            )));
        }
        for l in self
            .propensity_learners
            .iter()
            .chain(&self.outcome_learners)
        {
            l.check()?;
        }
        Ok(())
    }
}
