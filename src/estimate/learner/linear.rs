//! Ridge regression and L2-regularized logistic regression.
//!
//! Ridge is solved in closed form through a Cholesky factorization of the
//! penalized normal equations (linfa's linear algebra); logistic regression
//! uses linfa's L-BFGS solver. As a nuisance learner both standardize the
//! features first, so one penalty works whatever the features' units; the
//! raw-scale functions [`ridge_fit`] and [`logistic_fit`] are exposed for
//! parametric specifications and reference checks.

use linfa::prelude::*;
use linfa_linalg::cholesky::SolveC;
use linfa_logistic::LogisticRegression;
use ndarray::{Array1, Array2, ArrayView2, Axis};

use super::{constant_if_degenerate, Fitted, Learner, Task};
use crate::estimate::error::EstimateError;

/// Linear model coefficients on the raw feature scale.
#[derive(Debug, Clone, PartialEq)]
pub struct LinearFit {
    pub intercept: f64,
    pub coef: Vec<f64>,
    /// Regression predicts the linear index; classification its logistic.
    pub task: Task,
}

impl LinearFit {
    pub fn index(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let coef = Array1::from_vec(self.coef.clone());
        (x.dot(&coef) + self.intercept).to_vec()
    }
}

impl Fitted for LinearFit {
    fn predict(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let mut out = self.index(x);
        if self.task == Task::Classification {
            for v in &mut out {
                *v = sigmoid(*v);
            }
        }
        out
    }
}

pub(crate) fn sigmoid(z: f64) -> f64 {
    if z >= 0.0 {
        1.0 / (1.0 + (-z).exp())
    } else {
        let e = z.exp();
        e / (1.0 + e)
    }
}

/// Ridge regression with an unpenalized intercept:
/// minimizes sum (y - b0 - x b)^2 + alpha |b|^2 (scikit-learn's `Ridge`
/// objective; alpha = 0 is ordinary least squares).
pub fn ridge_fit(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    alpha: f64,
) -> Result<LinearFit, EstimateError> {
    let n = x.nrows();
    let d = x.ncols();
    if n == 0 || y.len() != n {
        return Err(EstimateError::invalid(format!(
            "ridge: {n} rows for {} targets",
            y.len()
        )));
    }
    let x_mean = x.mean_axis(Axis(0)).unwrap_or_else(|| Array1::zeros(d));
    let y_mean = y.iter().sum::<f64>() / n as f64;
    let xc = &x - &x_mean;
    let yc = Array1::from_iter(y.iter().map(|v| v - y_mean));
    let mut gram = xc.t().dot(&xc);
    for j in 0..d {
        gram[[j, j]] += alpha;
    }
    let rhs = xc.t().dot(&yc).insert_axis(Axis(1));
    let beta = gram.solvec(&rhs).map_err(|e| EstimateError::Learner {
        learner: "ridge".into(),
        reason: format!("normal equations are singular ({e}); features may be collinear"),
    })?;
    let coef: Vec<f64> = beta.column(0).to_vec();
    let intercept = y_mean
        - coef
            .iter()
            .zip(x_mean.iter())
            .map(|(b, m)| b * m)
            .sum::<f64>();
    Ok(LinearFit {
        intercept,
        coef,
        task: Task::Regression,
    })
}

/// L2-regularized logistic regression with an unpenalized intercept:
/// minimizes sum of log-losses + alpha/2 |b|^2 (scikit-learn's objective with
/// C = 1/alpha; alpha = 0 is maximum likelihood).
pub fn logistic_fit(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    alpha: f64,
) -> Result<LinearFit, EstimateError> {
    let n = x.nrows();
    if n == 0 || y.len() != n {
        return Err(EstimateError::invalid(format!(
            "logistic: {n} rows for {} labels",
            y.len()
        )));
    }
    let labels = Array1::from_iter(y.iter().map(|&v| v == 1.0));
    let dataset = Dataset::new(x.to_owned(), labels);
    // The objective is a sum over rows, so its gradient grows with n; the
    // tolerance scales with it to stop at the same relative accuracy.
    let fitted = LogisticRegression::default()
        .alpha(alpha)
        .max_iterations(1_000)
        .gradient_tolerance(1e-9 * (n as f64).max(1.0))
        .fit(&dataset)
        .map_err(|e| EstimateError::Learner {
            learner: "logistic".into(),
            reason: e.to_string(),
        })?;
    // linfa models the probability of its "positive" class, which is the
    // more frequent label, not the label `true`. Flip the signs when the
    // events are the minority so the fit always models P(Y = 1).
    let sign = if fitted.labels().pos.class { 1.0 } else { -1.0 };
    Ok(LinearFit {
        intercept: sign * fitted.intercept(),
        coef: fitted.params().iter().map(|b| sign * b).collect(),
        task: Task::Classification,
    })
}

/// Column means and standard deviations; constant columns keep sd 1 so they
/// standardize to zero instead of dividing by zero.
fn column_scales(x: ArrayView2<'_, f64>) -> (Array1<f64>, Array1<f64>) {
    let d = x.ncols();
    let mean = x.mean_axis(Axis(0)).unwrap_or_else(|| Array1::zeros(d));
    let mut sd = x.var_axis(Axis(0), 0.0).mapv(f64::sqrt);
    sd.mapv_inplace(|s| if s > 1e-12 { s } else { 1.0 });
    (mean, sd)
}

/// Ridge (regression) or L2 logistic (classification) on standardized
/// features, with coefficients mapped back to the raw scale.
#[derive(Debug, Clone, Copy)]
pub struct Linear {
    /// Penalty on the standardized coefficients. The default 1.0 is mild:
    /// it only matters when n is within a small multiple of d.
    pub alpha: f64,
}

impl Default for Linear {
    fn default() -> Self {
        Self { alpha: 1.0 }
    }
}

impl Linear {
    /// Fits on standardized features and returns raw-scale coefficients.
    /// With alpha = 0 this is plain least squares / maximum likelihood, and
    /// standardizing only improves the solver's conditioning.
    pub fn fit_coefficients(
        &self,
        x: ArrayView2<'_, f64>,
        y: &[f64],
        task: Task,
    ) -> Result<LinearFit, EstimateError> {
        let (mean, sd) = column_scales(x);
        let xs: Array2<f64> = (&x - &mean) / &sd;
        let fit = match task {
            Task::Regression => ridge_fit(xs.view(), y, self.alpha)?,
            Task::Classification => logistic_fit(xs.view(), y, self.alpha)?,
        };
        let coef: Vec<f64> = fit.coef.iter().zip(sd.iter()).map(|(b, s)| b / s).collect();
        let intercept = fit.intercept
            - coef
                .iter()
                .zip(mean.iter())
                .map(|(b, m)| b * m)
                .sum::<f64>();
        Ok(LinearFit {
            intercept,
            coef,
            task,
        })
    }
}

impl Learner for Linear {
    fn name(&self) -> &'static str {
        "linear"
    }

    fn boxed_clone(&self) -> Box<dyn Learner> {
        Box::new(*self)
    }

    fn check(&self) -> Result<(), EstimateError> {
        if self.alpha.is_finite() && self.alpha >= 0.0 {
            Ok(())
        } else {
            Err(EstimateError::invalid(format!(
                "linear learner: alpha {} must be finite and >= 0",
                self.alpha
            )))
        }
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
        Ok(Box::new(self.fit_coefficients(x, y, task)?))
    }
}
