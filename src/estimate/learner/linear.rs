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
use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2, Axis, CowArray, Ix2};

use super::{constant_if_degenerate, fit_rows_start, Fitted, Learner, SharedFeatures, Task};
use crate::estimate::data::FeatureRows;
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
            .map(|&r| self.link(ArrayView1::from(x.row(r)).dot(&coef) + self.intercept))
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

/// Rows per block of the Gram accumulation: a block of [1, z, t] rows
/// (scaled by the square root of their weights) is multiplied by its own
/// transpose with a blocked matrix product, which keeps the Gram matrix in
/// registers and cache instead of summing one dot product at a time.
const GRAM_BLOCK: usize = 256;

/// The rows a linear fit reads, each standardized as it is read:
/// z_i = (x_i - center) / scale, of the chosen rows (`pick`, or all) of a
/// feature matrix that is never copied.
struct Design<'a> {
    rows: FeatureRows<'a>,
    pick: Option<&'a [usize]>,
    center: Vec<f64>,
    /// 1 / scale: rows are multiplied, never divided.
    inverse_scale: Vec<f64>,
}

impl<'a> Design<'a> {
    /// Centered on the chosen rows' means; scaled by their standard
    /// deviations (population, numpy's default) when `standardize`, else
    /// left on the raw scale. A constant column keeps scale 1 so it
    /// standardizes to zero instead of dividing by zero.
    fn new(rows: FeatureRows<'a>, pick: Option<&'a [usize]>, standardize: bool) -> Self {
        let d = rows.width();
        let mut design = Self {
            rows,
            pick,
            center: vec![0.0; d],
            inverse_scale: vec![1.0; d],
        };
        let n = design.n();
        let count = n.max(1) as f64;
        let mut mean = vec![0.0; d];
        for i in 0..n {
            for (m, v) in mean.iter_mut().zip(design.raw(i)) {
                *m += v;
            }
        }
        mean.iter_mut().for_each(|m| *m /= count);
        if standardize {
            let mut ss = vec![0.0; d];
            for i in 0..n {
                for ((s, v), m) in ss.iter_mut().zip(design.raw(i)).zip(&mean) {
                    *s += (v - m) * (v - m);
                }
            }
            for (inv, s) in design.inverse_scale.iter_mut().zip(ss) {
                let sd = (s / count).sqrt();
                *inv = if sd > 1e-12 { 1.0 / sd } else { 1.0 };
            }
        }
        design.center = mean;
        design
    }

    fn n(&self) -> usize {
        self.pick.map_or(self.rows.len(), <[usize]>::len)
    }

    fn d(&self) -> usize {
        self.rows.width()
    }

    /// Row `i` as stored.
    #[inline]
    fn raw(&self, i: usize) -> &'a [f64] {
        self.rows.row(self.pick.map_or(i, |p| p[i]))
    }

    /// Raw-scale coefficients and intercept of a fit on z:
    /// theta_0 + z . theta_1.. = intercept + x . coef.
    fn raw_coefficients(&self, theta: &[f64]) -> (f64, Vec<f64>) {
        let coef: Vec<f64> = theta[1..]
            .iter()
            .zip(&self.inverse_scale)
            .map(|(b, s)| b * s)
            .collect();
        let intercept = theta[0]
            - coef
                .iter()
                .zip(&self.center)
                .map(|(b, c)| b * c)
                .sum::<f64>();
        (intercept, coef)
    }

    /// The linear index theta_0 + z_i . theta_1.. of every row, read as
    /// x_i . coef + intercept on the raw rows.
    fn linear_index(&self, theta: &[f64]) -> Vec<f64> {
        let (intercept, coef) = self.raw_coefficients(theta);
        let coef = ArrayView1::from(&coef[..]);
        (0..self.n())
            .map(|i| ArrayView1::from(self.raw(i)).dot(&coef) + intercept)
            .collect()
    }

    /// The weighted Gram matrix and moment vector of [1, z_i] (the intercept
    /// column first): G = sum_i w_i [1, z_i][1, z_i]^T (p x p, row-major,
    /// p = d + 1) and r = sum_i w_i [1, z_i] t_i. `weights` None means all
    /// ones.
    fn gram(&self, weights: Option<&[f64]>, t: &[f64]) -> (Vec<f64>, Vec<f64>) {
        let (n, d) = (self.n(), self.d());
        let p = d + 1;
        // Each block row is sqrt(w) [1, z, t]; the product of the block's
        // transpose with itself holds G in its first p rows and columns and
        // r in column p.
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
                for (((o, v), c), s) in out
                    .iter_mut()
                    .skip(1)
                    .zip(self.raw(i))
                    .zip(&self.center)
                    .zip(&self.inverse_scale)
                {
                    *o = sw * ((v - c) * s);
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
                // triangle so the matrix handed to Cholesky is exactly
                // symmetric.
                g[j * p + k] = if k <= j { acc[[j, k]] } else { acc[[k, j]] };
            }
            r[j] = acc[[j, p]];
        }
        (g, r)
    }
}

/// The rows of a matrix made row-major by `as_standard_layout` (a borrow
/// when it already is, as every matrix the crate builds).
fn rows_of<'b>(x: &'b CowArray<'_, f64, Ix2>) -> Result<FeatureRows<'b>, EstimateError> {
    FeatureRows::of_matrix(x.view())
        .ok_or_else(|| EstimateError::invalid("linear learner: features are not row-major"))
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
    let x = x.as_standard_layout();
    ridge(&Design::new(rows_of(&x)?, None, false), y, alpha)
}

/// Ridge on a design: the normal equations of z, which is centered, so the
/// intercept is the mean of y and drops out of them.
fn ridge(design: &Design<'_>, y: &[f64], alpha: f64) -> Result<LinearFit, EstimateError> {
    let (n, d) = (design.n(), design.d());
    if n == 0 || y.len() != n {
        return Err(EstimateError::invalid(format!(
            "ridge: {n} rows for {} targets",
            y.len()
        )));
    }
    let y_mean = y.iter().sum::<f64>() / n as f64;
    let yc: Vec<f64> = y.iter().map(|v| v - y_mean).collect();
    let (g, r) = design.gram(None, &yc);
    // Drop the intercept row and column: centered features are orthogonal to it.
    let p = d + 1;
    let mut a = Vec::with_capacity(d * d);
    for j in 1..p {
        for k in 1..p {
            a.push(g[j * p + k] + if j == k { alpha } else { 0.0 });
        }
    }
    let mut theta = vec![y_mean];
    theta.extend(solve_spd(a, &r[1..], "ridge")?);
    let (intercept, coef) = design.raw_coefficients(&theta);
    Ok(LinearFit {
        intercept,
        coef,
        task: Task::Regression,
    })
}

/// Newton iterations of the logistic fit stop after this many.
const NEWTON_MAX_ITERATIONS: usize = 100;

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
    let x = x.as_standard_layout();
    logistic(&Design::new(rows_of(&x)?, None, false), y, alpha)
}

/// Logistic regression on a design (see [`logistic_fit`]).
fn logistic(design: &Design<'_>, y: &[f64], alpha: f64) -> Result<LinearFit, EstimateError> {
    let (n, d) = (design.n(), design.d());
    if n == 0 || y.len() != n {
        return Err(EstimateError::invalid(format!(
            "logistic: {n} rows for {} labels",
            y.len()
        )));
    }
    let share = (y.iter().sum::<f64>() / n as f64).clamp(1e-6, 1.0 - 1e-6);
    let mut theta = vec![0.0; d + 1];
    theta[0] = (share / (1.0 - share)).ln();
    let mut eta = design.linear_index(&theta);
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
        let (mut h, mut grad) = design.gram(Some(&weights), &residual);
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
        let step_eta = design.linear_index(&step);
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
    let (intercept, coef) = design.raw_coefficients(&theta);
    Ok(LinearFit {
        intercept,
        coef,
        task: Task::Classification,
    })
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
        let x = x.as_standard_layout();
        self.fit_design(&Design::new(rows_of(&x)?, None, true), y, task)
    }

    fn fit_design(
        &self,
        design: &Design<'_>,
        y: &[f64],
        task: Task,
    ) -> Result<LinearFit, EstimateError> {
        match task {
            Task::Regression => ridge(design, y, self.alpha),
            Task::Classification => logistic(design, y, self.alpha),
        }
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

    /// Reads the chosen rows where they are in the shared matrix,
    /// standardizing each as it is read: no copy of the training rows.
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
        let fit = self.fit_design(&Design::new(data.x(), Some(rows), true), y, task)?;
        Ok(Box::new(fit))
    }
}
