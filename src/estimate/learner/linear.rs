//! Ridge regression and L2-regularized logistic regression.
//!
//! Ridge is solved in closed form through a Cholesky factorization of the
//! penalized normal equations (linfa's linear algebra); logistic regression
//! by Newton's method on the same normal-equation machinery, to full
//! convergence. As a nuisance learner both standardize the
//! features first, so one penalty works whatever the features' units; the
//! raw-scale functions [`ridge_fit`] and [`logistic_fit`] are exposed for
//! parametric specifications and reference checks.

use linfa_linalg::cholesky::SolveC;
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

/// Rows per block of the Gram accumulation: a block is copied column-major
/// so that each entry of the Gram matrix is a contiguous dot product.
const GRAM_BLOCK: usize = 64;

/// Column means of `x`.
fn column_means(x: ArrayView2<'_, f64>) -> Vec<f64> {
    let n = x.nrows().max(1) as f64;
    let mut mean = vec![0.0; x.ncols()];
    for row in x.outer_iter() {
        for (m, v) in mean.iter_mut().zip(row) {
            *m += v;
        }
    }
    mean.iter_mut().for_each(|m| *m /= n);
    mean
}

/// The weighted Gram matrix and moment vector of the design
/// z_i = [1, x_i - center] (the intercept column first):
/// G = sum_i w_i z_i z_i^T (p x p, row-major, p = d + 1) and
/// r = sum_i w_i z_i t_i. `weights` None means all ones.
fn gram(
    x: ArrayView2<'_, f64>,
    center: &[f64],
    weights: Option<&[f64]>,
    t: &[f64],
) -> (Vec<f64>, Vec<f64>) {
    let (n, d) = x.dim();
    let p = d + 1;
    let mut g = vec![0.0; p * p];
    let mut r = vec![0.0; p];
    // cols[j * GRAM_BLOCK + m] = sqrt(w) z_mj for the block's row m.
    let mut cols = vec![0.0; p * GRAM_BLOCK];
    let mut tv = [0.0; GRAM_BLOCK];
    let mut start = 0;
    while start < n {
        let len = GRAM_BLOCK.min(n - start);
        for m in 0..len {
            let i = start + m;
            let sw = weights.map_or(1.0, |w| w[i].sqrt());
            cols[m] = sw;
            let row = x.row(i);
            for j in 0..d {
                cols[(j + 1) * GRAM_BLOCK + m] = sw * (row[j] - center[j]);
            }
            tv[m] = sw * t[i];
        }
        for j in 0..p {
            let cj = &cols[j * GRAM_BLOCK..j * GRAM_BLOCK + len];
            for k in 0..=j {
                let ck = &cols[k * GRAM_BLOCK..k * GRAM_BLOCK + len];
                g[j * p + k] += cj.iter().zip(ck).map(|(a, b)| a * b).sum::<f64>();
            }
            r[j] += cj.iter().zip(&tv[..len]).map(|(a, b)| a * b).sum::<f64>();
        }
        start += len;
    }
    for j in 0..p {
        for k in 0..j {
            g[k * p + j] = g[j * p + k];
        }
    }
    (g, r)
}

/// Solves the symmetric positive definite system `a` (p x p, row-major) x = `b`.
fn solve_spd(a: Vec<f64>, b: &[f64], learner: &str) -> Result<Vec<f64>, EstimateError> {
    let p = b.len();
    let mut a =
        Array2::from_shape_vec((p, p), a).map_err(|e| EstimateError::invalid(e.to_string()))?;
    let rhs = Array1::from_vec(b.to_vec()).insert_axis(Axis(1));
    let sol = a.solvec(&rhs).map_err(|e| EstimateError::Learner {
        learner: learner.into(),
        reason: format!("normal equations are singular ({e}); features may be collinear"),
    })?;
    Ok(sol.column(0).to_vec())
}

/// Ridge regression with an unpenalized intercept:
/// minimizes sum (y - b0 - x b)^2 + alpha |b|^2 (scikit-learn's `Ridge`
/// objective; alpha = 0 is ordinary least squares). Solved through the
/// normal equations of the centered features.
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
    let x_mean = column_means(x);
    let y_mean = y.iter().sum::<f64>() / n as f64;
    let yc: Vec<f64> = y.iter().map(|v| v - y_mean).collect();
    let (g, r) = gram(x, &x_mean, None, &yc);
    // Drop the intercept row and column: centered features are orthogonal to it.
    let p = d + 1;
    let mut a = Vec::with_capacity(d * d);
    for j in 1..p {
        for k in 1..p {
            a.push(g[j * p + k] + if j == k { alpha } else { 0.0 });
        }
    }
    let coef = solve_spd(a, &r[1..], "ridge")?;
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

/// Newton iterations of the logistic fit stop after this many.
const NEWTON_MAX_ITERATIONS: usize = 100;

/// Penalized logistic negative log-likelihood at (b0, b) on centered x.
fn logistic_objective(
    x: ArrayView2<'_, f64>,
    center: &[f64],
    y: &[f64],
    theta: &[f64],
    alpha: f64,
) -> f64 {
    let mut total = 0.0;
    for (row, &yi) in x.outer_iter().zip(y) {
        let eta = linear_index(row.iter(), center, theta);
        // log(1 + e^eta) - y eta, computed stably.
        total += if eta > 0.0 {
            eta + (-eta).exp().ln_1p()
        } else {
            eta.exp().ln_1p()
        } - yi * eta;
    }
    total + 0.5 * alpha * theta[1..].iter().map(|b| b * b).sum::<f64>()
}

#[inline]
fn linear_index<'a>(row: impl Iterator<Item = &'a f64>, center: &[f64], theta: &[f64]) -> f64 {
    theta[0]
        + row
            .zip(center)
            .zip(&theta[1..])
            .map(|((v, c), b)| (v - c) * b)
            .sum::<f64>()
}

/// L2-regularized logistic regression with an unpenalized intercept:
/// minimizes sum of log-losses + alpha/2 |b|^2 (scikit-learn's objective with
/// C = 1/alpha; alpha = 0 is maximum likelihood). Newton's method with a
/// backtracking line search on the centered features (the intercept absorbs
/// the centering exactly), to full convergence.
pub fn logistic_fit(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    alpha: f64,
) -> Result<LinearFit, EstimateError> {
    let (n, d) = x.dim();
    if n == 0 || y.len() != n {
        return Err(EstimateError::invalid(format!(
            "logistic: {n} rows for {} labels",
            y.len()
        )));
    }
    let center = column_means(x);
    let share = (y.iter().sum::<f64>() / n as f64).clamp(1e-6, 1.0 - 1e-6);
    let mut theta = vec![0.0; d + 1];
    theta[0] = (share / (1.0 - share)).ln();
    let mut objective = logistic_objective(x, &center, y, &theta, alpha);
    let mut weights = vec![0.0; n];
    let mut residual = vec![0.0; n];
    let p = d + 1;
    let mut converged = false;
    for _ in 0..NEWTON_MAX_ITERATIONS {
        for (i, row) in x.outer_iter().enumerate() {
            let prob = sigmoid(linear_index(row.iter(), &center, &theta));
            weights[i] = (prob * (1.0 - prob)).max(1e-12);
            // Working response: the gradient is sum z_i (p_i - y_i) =
            // sum w_i z_i t_i with t_i = (p_i - y_i) / w_i.
            residual[i] = (prob - y[i]) / weights[i];
        }
        let (mut h, mut grad) = gram(x, &center, Some(&weights), &residual);
        for j in 1..p {
            h[j * p + j] += alpha;
            grad[j] += alpha * theta[j];
        }
        // A tiny ridge keeps an unpenalized, collinear design solvable.
        let jitter = 1e-12 * (0..p).map(|j| h[j * p + j]).fold(0.0, f64::max).max(1e-300);
        for j in 0..p {
            h[j * p + j] += jitter;
        }
        let step = solve_spd(h, &grad, "logistic")?;
        let decrement: f64 = grad.iter().zip(&step).map(|(g, s)| g * s).sum();
        if !decrement.is_finite() {
            break;
        }
        if decrement < 1e-20 * (n as f64) {
            converged = true;
            break;
        }
        let mut t = 1.0;
        let mut accepted = false;
        for _ in 0..40 {
            let trial: Vec<f64> = theta.iter().zip(&step).map(|(a, s)| a - t * s).collect();
            let value = logistic_objective(x, &center, y, &trial, alpha);
            if value <= objective - 1e-4 * t * decrement {
                theta = trial;
                objective = value;
                accepted = true;
                break;
            }
            t *= 0.5;
        }
        if !accepted {
            // No descent left at machine precision: this is the optimum.
            converged = true;
            break;
        }
        if decrement * t < 1e-14 * (n as f64) {
            converged = true;
            break;
        }
    }
    if !converged || theta.iter().any(|v| !v.is_finite()) {
        return Err(EstimateError::Learner {
            learner: "logistic".into(),
            reason: format!(
                "Newton's method did not converge in {NEWTON_MAX_ITERATIONS} iterations; \
                 the classes may be separated by the features"
            ),
        });
    }
    let coef: Vec<f64> = theta[1..].to_vec();
    let intercept = theta[0] - coef.iter().zip(&center).map(|(b, m)| b * m).sum::<f64>();
    Ok(LinearFit {
        intercept,
        coef,
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
