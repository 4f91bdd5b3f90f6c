//! The nuisance learner library.
//!
//! A learner is a value implementing [`Learner`]; the cross-fitting code holds
//! a list of them per component and keeps the one with the lowest
//! out-of-fold loss, so adding a learner is one file plus one line in
//! [`default_library`]. Hyperparameters are plain fields checked once by
//! [`Learner::check`] before any fitting starts, so a fit never fails on a bad
//! parameter halfway through a cross-fit.

mod boosted;
mod constant;
mod linear;
mod multinomial;
mod quadratic;
mod shared;

pub use boosted::Boosted;
pub use constant::Constant;
pub use linear::{logistic_fit, ridge_fit, Linear, LinearFit};
pub use multinomial::{
    default_arm_library, multinomial_fit, ArmFitted, ArmLearner, MultinomialFit,
    MultinomialLogistic, SoftmaxBoosted,
};
pub use quadratic::Quadratic;
pub use shared::SharedFeatures;

use ndarray::ArrayView2;

use super::error::EstimateError;

/// What a learner is asked to predict.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Task {
    /// E[Y | x] under squared error.
    Regression,
    /// P(Y = 1 | x) under log-loss; labels are 0.0 / 1.0.
    Classification,
}

/// A fitting procedure for one nuisance component.
pub trait Learner: Send + Sync + std::fmt::Debug {
    /// Short stable name shown in reports ("linear", "boosted").
    fn name(&self) -> &'static str;

    /// Rejects hyperparameters that cannot work, before any data is touched.
    fn check(&self) -> Result<(), EstimateError>;

    /// A boxed copy, so settings can hand learners to several fits.
    fn boxed_clone(&self) -> Box<dyn Learner>;

    /// Fits on rows `x` (n x d) and targets `y`; `seed` drives any internal
    /// randomness (inner validation splits), so fits are reproducible.
    fn fit(
        &self,
        x: ArrayView2<'_, f64>,
        y: &[f64],
        task: Task,
        seed: u64,
    ) -> Result<Box<dyn Fitted>, EstimateError>;

    /// Builds, before any fit of a cross-fit starts, what this learner's
    /// fits will share through `data` (the boosted learner's binned
    /// features), so no fit waits on another to build it.
    fn prepare(&self, _data: &SharedFeatures<'_>) {}

    /// Fits on the rows `rows` of a matrix shared by every fit of a
    /// cross-fit; `y[i]` is the target of row `rows[i]`. The default copies
    /// the rows out and calls [`Learner::fit`]; a learner that can reuse work
    /// across fits (the boosted learner's binning) overrides it.
    fn fit_rows(
        &self,
        data: &SharedFeatures<'_>,
        rows: &[usize],
        y: &[f64],
        task: Task,
        seed: u64,
    ) -> Result<Box<dyn Fitted>, EstimateError> {
        let x = data.x().select(rows);
        self.fit(x.view(), y, task, seed)
    }
}

/// A fitted nuisance model.
pub trait Fitted: Send + Sync {
    /// Regression: the conditional mean. Classification: P(Y = 1 | x).
    fn predict(&self, x: ArrayView2<'_, f64>) -> Vec<f64>;

    /// Predictions for rows `rows` of a shared matrix; the same values as
    /// [`Fitted::predict`] on those rows.
    fn predict_rows(&self, data: &SharedFeatures<'_>, rows: &[usize]) -> Vec<f64> {
        self.predict(data.x().select(rows).view())
    }
}

/// The learners every component chooses from by default for data with
/// `features` columns: linear, the second-degree expansion while it stays
/// small (at most [`quadratic::MAX_FEATURES`] inputs), and boosted trees.
pub fn default_library(features: usize) -> Vec<Box<dyn Learner>> {
    let mut library: Vec<Box<dyn Learner>> = vec![Box::new(Linear::default())];
    if features <= quadratic::MAX_FEATURES {
        library.push(Box::new(Quadratic::default()));
    }
    library.push(Box::new(Boosted::default()));
    library
}

/// Probabilities are kept this far from 0 and 1 when scoring log-loss.
const LOG_LOSS_EPS: f64 = 1e-15;

/// Mean loss of `pred` for `y`: squared error for regression, log-loss for
/// classification.
pub fn mean_loss(task: Task, y: &[f64], pred: &[f64]) -> f64 {
    let n = y.len().max(1) as f64;
    match task {
        Task::Regression => {
            y.iter()
                .zip(pred)
                .map(|(a, b)| (a - b).powi(2))
                .sum::<f64>()
                / n
        }
        Task::Classification => {
            y.iter()
                .zip(pred)
                .map(|(&a, &p)| {
                    let p = p.clamp(LOG_LOSS_EPS, 1.0 - LOG_LOSS_EPS);
                    -(a * p.ln() + (1.0 - a) * (1.0 - p).ln())
                })
                .sum::<f64>()
                / n
        }
    }
}

/// The common start of a [`Learner::fit_rows`]: the rows and targets must
/// pair up and not be empty, and constant targets get the constant fit
/// (returned as `Some`).
pub(crate) fn fit_rows_start(
    learner: &str,
    rows: &[usize],
    y: &[f64],
    task: Task,
) -> Result<Option<Box<dyn Fitted>>, EstimateError> {
    if rows.len() != y.len() || rows.is_empty() {
        return Err(EstimateError::invalid(format!(
            "{learner} learner: {} rows for {} targets",
            rows.len(),
            y.len()
        )));
    }
    Ok(constant_if_degenerate(y, task))
}

/// If `y` is constant the only sensible fit is a constant; every learner
/// routes through this so that a fold whose arm has, say, no events does not
/// crash a logistic solver.
pub(crate) fn constant_if_degenerate(y: &[f64], task: Task) -> Option<Box<dyn Fitted>> {
    let first = *y.first()?;
    if y.iter().all(|&v| v == first) {
        Some(Box::new(constant::ConstantFit::for_targets(y, task)))
    } else {
        None
    }
}
