//! Histogram gradient-boosted trees (the `forust-ml` crate) with early
//! stopping on an inner validation split.
//!
//! The crate is used only as a regressor / classifier. Each fit runs single
//! threaded: cross-fitting already runs folds in parallel, and a fixed
//! summation order keeps fits bit-for-bit reproducible for a seed.

use forust_ml::metric::Metric;
use forust_ml::objective::ObjectiveType;
use forust_ml::{GradientBooster, Matrix};
use ndarray::ArrayView2;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::linear::sigmoid;
use super::{constant_if_degenerate, Fitted, Learner, Task};
use crate::estimate::error::EstimateError;

#[derive(Debug, Clone, Copy)]
pub struct Boosted {
    /// Upper bound on boosting rounds; early stopping usually ends far sooner.
    pub max_rounds: usize,
    pub learning_rate: f32,
    pub max_depth: usize,
    /// Rounds without improvement on the inner validation split before stopping.
    pub patience: usize,
    /// Share of the training rows held out for early stopping.
    pub validation_share: f64,
    /// Minimum number of rows a leaf may hold (converted to hessian weight).
    pub min_leaf_rows: f32,
    pub l2: f32,
}

impl Default for Boosted {
    fn default() -> Self {
        Self {
            max_rounds: 500,
            learning_rate: 0.1,
            max_depth: 4,
            // 50 rounds: with 15-20 the regression fits stopped early on noisy
            // validation losses (crate evaluation, DEVELOPERS.md).
            patience: 50,
            validation_share: 0.2,
            min_leaf_rows: 20.0,
            l2: 1.0,
        }
    }
}

/// Below this many training rows the inner split is too small to stop on;
/// a short fixed number of rounds is used instead.
const MIN_ROWS_FOR_EARLY_STOPPING: usize = 100;
const ROUNDS_WITHOUT_EARLY_STOPPING: usize = 50;

struct BoostedFit {
    model: GradientBooster,
    task: Task,
}

fn column_major(x: ArrayView2<'_, f64>, rows: &[usize]) -> Vec<f64> {
    let mut out = Vec::with_capacity(rows.len() * x.ncols());
    for col in x.columns() {
        out.extend(rows.iter().map(|&r| col[r]));
    }
    out
}

impl Fitted for BoostedFit {
    fn predict(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let rows: Vec<usize> = (0..x.nrows()).collect();
        let data = column_major(x, &rows);
        let matrix = Matrix::new(&data, x.nrows(), x.ncols());
        let mut out = self.model.predict(&matrix, false);
        if self.task == Task::Classification {
            for v in &mut out {
                *v = sigmoid(*v);
            }
        }
        out
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
        if self.max_depth == 0 {
            return bad("max_depth");
        }
        if !(self.validation_share > 0.0 && self.validation_share < 0.5) {
            return bad("validation_share");
        }
        if !(self.min_leaf_rows >= 1.0 && self.l2 >= 0.0) {
            return bad("min_leaf_rows or l2");
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
        if let Some(c) = constant_if_degenerate(y, task) {
            return Ok(c);
        }
        let n = x.nrows();
        // The metric is set explicitly: the crate's default for squared loss
        // is a log-scale error that is NaN for negative targets, which would
        // silently stop every fit after one round.
        let (objective, metric, min_leaf_weight) = match task {
            Task::Regression => (
                ObjectiveType::SquaredLoss,
                Metric::RootMeanSquaredError,
                self.min_leaf_rows,
            ),
            // Log-loss hessians are p(1-p) <= 1/4 per row.
            Task::Classification => (
                ObjectiveType::LogLoss,
                Metric::LogLoss,
                self.min_leaf_rows * 0.1,
            ),
        };
        let early = n >= MIN_ROWS_FOR_EARLY_STOPPING;
        let mut model = GradientBooster::default()
            .set_objective_type(objective)
            .set_evaluation_metric(Some(metric))
            .set_learning_rate(self.learning_rate)
            .set_max_depth(self.max_depth)
            .set_l2(self.l2)
            .set_min_leaf_weight(min_leaf_weight)
            .set_parallel(false)
            .set_seed(seed)
            .set_iterations(if early {
                self.max_rounds
            } else {
                ROUNDS_WITHOUT_EARLY_STOPPING
            })
            .set_early_stopping_rounds(early.then_some(self.patience));

        let mut order: Vec<usize> = (0..n).collect();
        let fit_result = if early {
            order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
            let n_valid = ((n as f64) * self.validation_share).round() as usize;
            let (valid_rows, train_rows) = order.split_at(n_valid);
            let train = column_major(x, train_rows);
            let valid = column_major(x, valid_rows);
            let y_train: Vec<f64> = train_rows.iter().map(|&r| y[r]).collect();
            let y_valid: Vec<f64> = valid_rows.iter().map(|&r| y[r]).collect();
            let w_train = vec![1.0; train_rows.len()];
            let w_valid = vec![1.0; valid_rows.len()];
            let train_m = Matrix::new(&train, train_rows.len(), x.ncols());
            let valid_m = Matrix::new(&valid, valid_rows.len(), x.ncols());
            model.fit(
                &train_m,
                &y_train,
                &w_train,
                Some(vec![(valid_m, y_valid.as_slice(), w_valid.as_slice())]),
            )
        } else {
            let data = column_major(x, &order);
            let w = vec![1.0; n];
            model.fit(&Matrix::new(&data, n, x.ncols()), y, &w, None)
        };
        fit_result.map_err(|e| EstimateError::Learner {
            learner: "boosted".into(),
            reason: e.to_string(),
        })?;
        Ok(Box::new(BoostedFit { model, task }))
    }
}
