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
use ndarray::linalg::general_mat_mul;
use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2, Axis};

use super::{constant_if_degenerate, fit_rows_start, Fitted, Learner, SharedFeatures, Task};
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

impl LinearFit {
    fn link(&self, v: f64) -> f64 {
        match self.task {
            Task::Regression => v,
            Task::Classification => sigmoid(v),
        }
    }
}

impl Fitted for LinearFit {
    fn predict(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let mut out = self.index(x);
        for v in &mut out {
            *v = self.link(*v);
        }
        out
    }

    fn predict_rows(&self, data: &SharedFeatures<'_>, rows: &[usize]) -> Vec<f64> {
        let x = data.x();
        let coef = ArrayView1::from(&self.coef[..]);
        rows.iter()
            .map(|&r| self.link(x.row(r).dot(&coef) + self.intercept))
            .collect()
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

/// Rows per block of the Gram accumulation: a block of [1, x - center, t]
/// rows (scaled by the square root of their weights) is multiplied by its
/// own transpose with a blocked matrix product, which keeps the Gram matrix
/// in registers and cache instead of summing one dot product at a time.
const GRAM_BLOCK: usize = 256;

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
    // Each block row is sqrt(w) [1, x - center, t]; the product of the
    // block's transpose with itself holds G in its first p rows and columns
    // and r in column p.
    let q = p + 1;
    let mut acc = Array2::<f64>::zeros((q, q));
    let mut block = Array2::<f64>::zeros((GRAM_BLOCK, q));
    let mut start = 0;
    while start < n {
        let len = GRAM_BLOCK.min(n - start);
        for (m, mut out) in block.outer_iter_mut().take(len).enumerate() {
            let i = start + m;
            let sw = weights.map_or(1.0, |w| w[i].sqrt());
            out[0] = sw;
            for ((o, v), c) in out.iter_mut().skip(1).zip(x.row(i)).zip(center) {
                *o = sw * (v - c);
            }
            out[p] = sw * t[i];
        }
        let b = block.slice(s![..len, ..]);
        general_mat_mul(1.0, &b.t(), &b, 1.0, &mut acc);
        start += len;
    }
    let mut g = vec![0.0; p * p];
    let mut r = vec![0.0; p];
    for j in 0..p {
        for k in 0..p {
            // The product is symmetric up to rounding; take the lower
            // triangle so the matrix handed to Cholesky is exactly symmetric.
            g[j * p + k] = if k <= j { acc[[j, k]] } else { acc[[k, j]] };
        }
        r[j] = acc[[j, p]];
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

/// The linear index theta_0 + (x_i - center) . theta_1.. of every row, as
/// x_i . b plus one shift, so the rows are read once, by a matrix-vector
/// product.
fn linear_index(x: ArrayView2<'_, f64>, center: &[f64], theta: &[f64]) -> Vec<f64> {
    let b = ArrayView1::from(&theta[1..]);
    let shift = theta[0] - b.iter().zip(center).map(|(b, c)| b * c).sum::<f64>();
    x.dot(&b).iter().map(|v| v + shift).collect()
}

/// Penalized logistic negative log-likelihood from the linear index `eta`
/// of every row and the penalized coefficients `b`.
fn logistic_objective(eta: &[f64], y: &[f64], b: &[f64], alpha: f64) -> f64 {
    let mut total = 0.0;
    for (&e, &yi) in eta.iter().zip(y) {
        // log(1 + e^eta) - y eta, computed stably.
        total += e.max(0.0) + (-e.abs()).exp().ln_1p() - yi * e;
    }
    total + 0.5 * alpha * b.iter().map(|b| b * b).sum::<f64>()
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
    let mut eta = linear_index(x, &center, &theta);
    let mut objective = logistic_objective(&eta, y, &theta[1..], alpha);
    let mut weights = vec![0.0; n];
    let mut residual = vec![0.0; n];
    let mut trial_eta = vec![0.0; n];
    let p = d + 1;
    let mut converged = false;
    for _ in 0..NEWTON_MAX_ITERATIONS {
        for (i, &e) in eta.iter().enumerate() {
            let prob = sigmoid(e);
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
        // The index is linear in theta: a trial point's index is the
        // current one minus t times the step's, one pass per trial.
        let step_eta = linear_index(x, &center, &step);
        let mut t = 1.0;
        let mut accepted = false;
        for _ in 0..40 {
            let trial: Vec<f64> = theta.iter().zip(&step).map(|(a, s)| a - t * s).collect();
            for ((te, e), se) in trial_eta.iter_mut().zip(&eta).zip(&step_eta) {
                *te = e - t * se;
            }
            let value = logistic_objective(&trial_eta, y, &trial[1..], alpha);
            if value <= objective - 1e-4 * t * decrement {
                theta = trial;
                objective = value;
                std::mem::swap(&mut eta, &mut trial_eta);
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

/// The rows `rows` of `x` (all rows when None), standardized: each column
/// centered on its mean over those rows and divided by its standard
/// deviation (population, as numpy's default); a constant column keeps sd 1
/// so it standardizes to zero instead of dividing by zero. Returns the
/// standardized copy, the means and the standard deviations.
fn standardized(
    x: ArrayView2<'_, f64>,
    rows: Option<&[usize]>,
) -> (Array2<f64>, Vec<f64>, Vec<f64>) {
    let d = x.ncols();
    let n = rows.map_or(x.nrows(), <[usize]>::len);
    // Rows as slices: the shared matrix is row-major, so this borrows it;
    // any other layout is copied once.
    let x = x.as_standard_layout();
    let data = x.as_slice().unwrap_or(&[]);
    let row = |i: usize| {
        let r = rows.map_or(i, |r| r[i]);
        &data[r * d..(r + 1) * d]
    };
    let mut mean = vec![0.0; d];
    for i in 0..n {
        for (m, v) in mean.iter_mut().zip(row(i)) {
            *m += v;
        }
    }
    let count = n.max(1) as f64;
    mean.iter_mut().for_each(|m| *m /= count);
    let mut sd = vec![0.0; d];
    for i in 0..n {
        for ((s, v), m) in sd.iter_mut().zip(row(i)).zip(&mean) {
            *s += (v - m) * (v - m);
        }
    }
    sd.iter_mut().for_each(|s| {
        let v = (*s / count).sqrt();
        *s = if v > 1e-12 { v } else { 1.0 };
    });
    let mut out = vec![0.0; n * d];
    if d > 0 {
        for (i, o) in out.chunks_exact_mut(d).enumerate() {
            for (((o, v), m), s) in o.iter_mut().zip(row(i)).zip(&mean).zip(&sd) {
                *o = (v - m) / s;
            }
        }
    }
    // `out` holds n x d values by construction, so the shape always fits.
    let out = Array2::from_shape_vec((n, d), out).unwrap_or_else(|_| Array2::zeros((n, d)));
    (out, mean, sd)
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
        self.fit_standardized(standardized(x, None), y, task)
    }

    /// Fits on standardized features, given with their means and standard
    /// deviations, and maps the coefficients back to the raw scale.
    fn fit_standardized(
        &self,
        (xs, mean, sd): (Array2<f64>, Vec<f64>, Vec<f64>),
        y: &[f64],
        task: Task,
    ) -> Result<LinearFit, EstimateError> {
        let fit = match task {
            Task::Regression => ridge_fit(xs.view(), y, self.alpha)?,
            Task::Classification => logistic_fit(xs.view(), y, self.alpha)?,
        };
        let coef: Vec<f64> = fit.coef.iter().zip(&sd).map(|(b, s)| b / s).collect();
        let intercept = fit.intercept - coef.iter().zip(&mean).map(|(b, m)| b * m).sum::<f64>();
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

    /// Standardizes the chosen rows straight from the shared matrix: one
    /// copy of the training rows instead of a selection and then a
    /// standardized copy of it.
    fn fit_rows(
        &self,
        data: &SharedFeatures<'_>,
        rows: &[usize],
        y: &[f64],
        task: Task,
        _seed: u64,
    ) -> Result<Box<dyn Fitted>, EstimateError> {
        if let Some(c) = fit_rows_start("linear", rows, y, task)? {
            return Ok(c);
        }
        let fit = self.fit_standardized(standardized(data.x(), Some(rows)), y, task)?;
        Ok(Box::new(fit))
    }
}
