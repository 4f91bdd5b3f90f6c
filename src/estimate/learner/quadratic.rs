//! Ridge / L2 logistic regression on a second-degree expansion of the
//! features: the features, their squares and their pairwise products.
//!
//! Smooth effects and assignment rules (products of features, curvature)
//! are common in practice and a linear fit misses them, while trees need
//! many rows to approximate a smooth surface. The expansion grows as d^2/2
//! (and the fit as d^4 n), so the default library only offers it up to
//! [`MAX_FEATURES`] inputs; above that it fits the plain features.

use ndarray::{Array2, ArrayView2};

use super::linear::{Linear, LinearFit};
use super::{constant_if_degenerate, Fitted, Learner, Task};
use crate::estimate::error::EstimateError;

/// Above this many input features the expansion is skipped.
pub const MAX_FEATURES: usize = 10;

#[derive(Debug, Clone, Copy)]
pub struct Quadratic {
    /// Penalty on the standardized coefficients of the expanded features.
    pub alpha: f64,
}

impl Default for Quadratic {
    fn default() -> Self {
        Self { alpha: 1.0 }
    }
}

fn expand(x: ArrayView2<'_, f64>) -> Array2<f64> {
    let (n, d) = x.dim();
    if d > MAX_FEATURES {
        return x.to_owned();
    }
    let width = d + d * (d + 1) / 2;
    let mut out = Array2::zeros((n, width));
    for (i, row) in x.outer_iter().enumerate() {
        let mut col = 0;
        for j in 0..d {
            out[[i, col]] = row[j];
            col += 1;
        }
        for j in 0..d {
            for k in j..d {
                out[[i, col]] = row[j] * row[k];
                col += 1;
            }
        }
    }
    out
}

struct QuadraticFit {
    inner: LinearFit,
}

impl Fitted for QuadraticFit {
    fn predict(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        self.inner.predict(expand(x).view())
    }
}

impl Learner for Quadratic {
    fn name(&self) -> &'static str {
        "quadratic"
    }

    fn boxed_clone(&self) -> Box<dyn Learner> {
        Box::new(*self)
    }

    fn check(&self) -> Result<(), EstimateError> {
        Linear { alpha: self.alpha }.check()
    }

    fn fit(
        &self,
        x: ArrayView2<'_, f64>,
        y: &[f64],
        task: Task,
        _seed: u64,
    ) -> Result<Box<dyn Fitted>, EstimateError> {
        if let Some(c) = constant_if_degenerate(y, task) {
            return Ok(c);
        }
        let inner = Linear { alpha: self.alpha }.fit_coefficients(expand(x).view(), y, task)?;
        Ok(Box::new(QuadraticFit { inner }))
    }
}
