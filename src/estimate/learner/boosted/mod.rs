//! Histogram gradient-boosted trees with early stopping on an inner
//! validation split: the [`Boosted`] learner, its settings and their checks.
//!
//! The algorithm is the usual second-order one (XGBoost / LightGBM /
//! scikit-learn's `HistGradientBoosting*`): features are cut into at most
//! `max_bins` quantile bins once per cross-fit ([`SharedFeatures`]), and
//! every round fits a depth-limited tree to the gradients and hessians of
//! the loss (squared error or log-loss).
//!
//! Each fit runs single threaded: cross-fitting already runs fits in
//! parallel, and a fixed summation order keeps fits bit-for-bit reproducible
//! for a seed. Bin edges are quantiles of the features of all units of the
//! cross-fit (never of treatments or outcomes), so the held-out fold's
//! outcomes cannot reach its predictions through them.
//!
//! The work is split by job: `boost.rs` runs the rounds and stops them
//! early, `grow.rs` grows one tree from histograms, `tree.rs` holds a grown
//! tree and the walks that take a row to its leaf, and `model.rs` is the
//! fitted model that predicts with the trees. `softmax.rs` runs the same
//! rounds on the multinomial loss, one tree per arm and round, for the
//! generalized propensity of several arms.

mod boost;
mod grow;
mod model;
mod softmax;
mod tree;

pub(crate) use softmax::SoftmaxFit;

#[cfg(test)]
mod tests;

use ndarray::ArrayView2;

use super::{fit_rows_start, Fitted, Learner, SharedFeatures, Task};
use crate::estimate::data::FeatureRows;
use crate::estimate::error::EstimateError;

#[derive(Debug, Clone, Copy)]
pub struct Boosted {
    /// Upper bound on boosting rounds; early stopping usually ends far sooner.
    pub max_rounds: usize,
    pub learning_rate: f64,
    pub max_depth: usize,
    /// Rounds without improvement on the inner validation split before stopping.
    pub patience: usize,
    /// Share of the training rows held out for early stopping.
    pub validation_share: f64,
    /// Minimum number of training rows in a leaf.
    pub min_leaf_rows: usize,
    /// L2 penalty on leaf values (the hessian-sum regularizer).
    pub l2: f64,
    /// Quantile bins per feature (at most 256).
    pub max_bins: usize,
    /// Share of the training rows each tree is grown on (a fresh seeded
    /// draw per round, Friedman's stochastic gradient boosting); 1 uses all.
    pub subsample: f64,
}

impl Default for Boosted {
    fn default() -> Self {
        Self {
            max_rounds: 500,
            learning_rate: 0.1,
            max_depth: 4,
            // Measured on Nie & Wager setup D (d = 20, 5k and 100k units):
            // with learning rate 0.1 the held-out loss falls smoothly to its
            // minimum, and patience 10 stopped at the same best round as 50
            // in every one of the 30 fits while building 40% fewer trees.
            patience: 10,
            validation_share: 0.2,
            min_leaf_rows: 20,
            l2: 1.0,
            max_bins: 256,
            // Half the rows per tree halves the histogram work; the
            // out-of-fold losses moved by at most 0.2% at 100k units.
            subsample: 0.5,
        }
    }
}

impl Learner for Boosted {
    fn name(&self) -> &'static str {
        "boosted"
    }

    fn boxed_clone(&self) -> Box<dyn Learner> {
        Box::new(*self)
    }

    fn check(&self) -> Result<(), EstimateError> {
        let bad = |what: &str| {
            Err(EstimateError::invalid(format!(
                "boosted learner: {what} is out of range"
            )))
        };
        if self.max_rounds == 0 {
            return bad("max_rounds");
        }
        if !(self.learning_rate > 0.0 && self.learning_rate <= 1.0) {
            return bad("learning_rate");
        }
        if self.max_depth == 0 || self.max_depth > 16 {
            return bad("max_depth");
        }
        if self.patience == 0 {
            return bad("patience");
        }
        if !(self.validation_share > 0.0 && self.validation_share < 0.5) {
            return bad("validation_share");
        }
        if !(self.min_leaf_rows >= 1 && self.l2 >= 0.0 && self.l2.is_finite()) {
            return bad("min_leaf_rows or l2");
        }
        if !(2..=256).contains(&self.max_bins) {
            return bad("max_bins");
        }
        if !(self.subsample > 0.0 && self.subsample <= 1.0) {
            return bad("subsample");
        }
        Ok(())
    }

    fn fit(
        &self,
        x: ArrayView2<'_, f64>,
        y: &[f64],
        task: Task,
        seed: u64,
    ) -> Result<Box<dyn Fitted>, EstimateError> {
        let x = x.as_standard_layout();
        let features = FeatureRows::of_matrix(x.view()).ok_or_else(|| {
            EstimateError::invalid("boosted learner: features are not in row-major layout")
        })?;
        let shared = SharedFeatures::new(features);
        let rows: Vec<usize> = (0..x.nrows()).collect();
        self.fit_rows(&shared, &rows, y, task, seed)
    }

    fn prepare(&self, data: &SharedFeatures<'_>) {
        data.binned(self.max_bins);
    }

    fn fit_rows(
        &self,
        data: &SharedFeatures<'_>,
        rows: &[usize],
        y: &[f64],
        task: Task,
        seed: u64,
    ) -> Result<Box<dyn Fitted>, EstimateError> {
        if let Some(c) = fit_rows_start("boosted", rows, y, task)? {
            return Ok(c);
        }
        let binned = data.binned(self.max_bins);
        Ok(Box::new(self.fit_binned(binned, rows, y, task, seed)))
    }
}
