//! The one error type of the estimation core.
//!
//! Degenerate data never turns into NaN: it becomes a named [`Degenerate`]
//! state that callers can show, store and alert on. Everything else that can
//! go wrong (a learner that cannot be fitted, mismatched lengths) is an
//! [`EstimateError`].

use serde::Serialize;

/// Data that cannot support the estimates, named so a person can act on it.
#[derive(Debug, Clone, PartialEq, Serialize, thiserror::Error)]
#[serde(tag = "state", rename_all = "snake_case")]
pub enum Degenerate {
    /// Cross-fitting needs every fold to hold units of both arms.
    #[error(
        "too few units per fold: arm {arm} has {units} units, cross-fitting with {folds} folds \
         needs at least {needed} ({per_fold} per fold)"
    )]
    TooFewUnitsPerFold {
        arm: String,
        units: usize,
        folds: usize,
        per_fold: usize,
        needed: usize,
    },
    /// No treated or no control units at all.
    #[error("the {arm} arm is empty: effects cannot be estimated without both arms")]
    EmptyArm { arm: String },
    /// Every outcome has the same value: there is nothing to explain.
    #[error("every outcome equals {value}: the outcome is constant")]
    ConstantOutcome { value: f64 },
    /// The propensity separates the arms almost perfectly (no overlap).
    #[error(
        "the arms are separated: propensity AUC {auc:.4} (limit {limit}); units of one arm have \
         no comparable units in the other"
    )]
    SeparatedArms { auc: f64, limit: f64 },
}

/// Errors of the estimation core.
#[derive(Debug, thiserror::Error)]
pub enum EstimateError {
    #[error(transparent)]
    Degenerate(#[from] Degenerate),
    #[error("invalid input: {0}")]
    Invalid(String),
    #[error("learner {learner} failed: {reason}")]
    Learner { learner: String, reason: String },
}

impl EstimateError {
    pub fn invalid(msg: impl Into<String>) -> Self {
        Self::Invalid(msg.into())
    }
}
