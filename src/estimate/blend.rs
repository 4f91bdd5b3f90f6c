//! Blends: convex combinations of the registered models that minimise the
//! corrected PEHE, fitted by cross-fitting so that their error is estimated
//! on units their weights never saw.
//!
//! The corrected PEHE contribution of a prediction t for unit i is
//! c_i(t) = (phi_i - t)^2 - (phi_i - tau_tilde_i)^2 (see
//! [`estimators::CorrectedPehe`](super::estimators::CorrectedPehe)). For a
//! blend t_w = sum_k w_k tau_hat_k its mean over units is
//!
//!   w' A w - 2 w' b + const,  A = mean(tau_hat tau_hat'),  b = mean(tau_hat phi),
//!
//! a quadratic in w, minimised over the simplex (w >= 0, sum w = 1) by
//! [`solve_simplex`]. Weights on the simplex keep the blend an average of
//! the models' predictions, on their scale, and are what stacking with
//! nonnegative weights fits (Breiman 1996, "Stacked regressions"; the
//! convex-weight form is the one of van der Laan, Polley & Hubbard 2007,
//! "Super learner"; both from memory). Differences between two blends'
//! mean contributions inherit the doubly robust property of differences
//! between models.
//!
//! Why the weights are cross-fitted. Weights fitted on all units and scored
//! on the same units fit those units' pseudo-outcome noise, and their mean
//! contribution would be optimistic, as a training error is. So, for each
//! fold f of the nuisance fit's own folds, weights are fitted on the other
//! K - 1 folds and the blend's prediction for fold f's units is formed with
//! those weights ([`cross_fit_blend`]). The held-out blend is then scored
//! like any model whose predictions were fixed before fold f's outcomes were
//! looked at: conditional on the other folds, fold f's contributions are
//! independent draws and their mean estimates the PEHE of that fold's
//! weights, so its difference from the best single model has an honest
//! standard error. Two things remain. (1) Fold g's pseudo-outcomes come from
//! nuisance models fitted on fold f among others, so fold f's weights depend
//! on fold f's data through them, at second order, as cross-fitted nuisance
//! values already do. (2) Fold f's units are scored with fold f's weights
//! and also move the other folds' weights; the weights sit at a minimum,
//! where the error changes only to second order with the weights, so the
//! dependence between folds that widens cross-validation intervals in
//! general is small here.
//!
//! What the blend-minus-best interval does not account for: the best single
//! model is chosen on the same data (it is the first registered model of the
//! full-data ranking). When several models are close, the chosen one's mean
//! contribution is the lowest of several noisy means and so is low, which
//! moves the estimate towards "the blend is no better" (the interval is not
//! widened for that choice). It also describes the held-out blend, K weight
//! vectors each fitted on (K - 1)/K of the units, not the weights fitted on
//! every unit that a user would deploy; those usually do slightly better.
//! The interval is for the blend with the weights it got; how much the
//! weights would vary over new data is shown by their spread over the folds.
//! The pick matters most when the best models tie: with two equally good
//! models and 4,000 units, `tests/blend_simulation.rs` measures the 95%
//! interval covering the true blend-minus-best difference 93.8% of the time
//! (5,000 replications; the plain pairwise interval covers 95.0% there),
//! every miss on the side of "the blend is no better".

use linfa_linalg::cholesky::SolveC;
use ndarray::linalg::general_mat_mul;
use ndarray::Array2;
use rayon::prelude::*;
use serde::Serialize;

use super::compare::Difference;
use super::crossfit::{assign_folds, Nuisance};
use super::data::{ModelPredictions, UnitTable};
use super::estimators::{ALL, RANKED_BY};
use super::pseudo::aipw_pseudo_outcome;
use super::scoreboard::{Column, Scoreboard, Settings, UnitColumns, CI_LEVEL};
use super::stats::mean_se;

/// The ridge added to A's diagonal, as a share of A's mean diagonal. A is
/// singular whenever models are collinear (two identical models, or one a
/// combination of others); the ridge makes the problem strictly convex, so
/// the solution is unique (collinear models share weight instead of one
/// taking it arbitrarily) and the solver's Cholesky factorizations exist.
/// It changes the objective by at most this share of A's scale times
/// |w|^2 <= 1, far below any standard error.
pub const RIDGE_SHARE: f64 = 1e-9;

/// Projected-gradient steps that find the solution's support before the
/// active-set method finishes exactly; only the finish's start depends on
/// them, not its result.
const WARM_START_STEPS: usize = 500;

/// Units per block of the Gram matrices' products.
const GRAM_BLOCK: usize = 512;

/// A fold's units are split into at most this many parallel parts, each of
/// at least [`MIN_PART_UNITS`] units; the split depends on the data alone,
/// and the parts are summed in order, so results do not depend on the
/// number of threads.
const MAX_PARTS_PER_FOLD: usize = 4;
const MIN_PART_UNITS: usize = 4096;

/// Units per parallel part of [`FoldGrams::of_columns`].
const COLUMN_PART: usize = 1 << 15;

/// Weights shown as nonzero in reports are above this (also used by the
/// text report).
pub const SHOWN_WEIGHT: f64 = 0.01;

/// How to read a blend; carried in every blend report.
pub const BLEND_CAVEAT: &str = "each fold's units are scored with weights fitted on the other \
folds, so the blend's error is estimated on units its weights never saw; the best single model \
is chosen on the same data, which favours it, and the interval does not allow for that choice.";

/// The minimiser of w' A w - 2 w' b over the simplex.
#[derive(Debug, Clone, PartialEq)]
pub struct SimplexSolution {
    pub weights: Vec<f64>,
    /// The ridge that was added to A's diagonal ([`RIDGE_SHARE`]).
    pub ridge: f64,
    /// False when the active-set method stopped at its iteration cap
    /// before meeting the optimality conditions; the weights are then
    /// still on the simplex and no worse than the projected-gradient start.
    pub converged: bool,
}

/// The problem with its ridge: Q = A + ridge I.
struct Problem<'a> {
    a: &'a [f64],
    b: &'a [f64],
    m: usize,
    ridge: f64,
}

impl Problem<'_> {
    fn q(&self, i: usize, j: usize) -> f64 {
        let v = self.a[i * self.m + j];
        if i == j {
            v + self.ridge
        } else {
            v
        }
    }

    /// 2 (Q w - b), reading only w's nonzero entries.
    fn gradient(&self, w: &[f64], out: &mut [f64]) {
        let support: Vec<(usize, f64)> = w
            .iter()
            .copied()
            .enumerate()
            .filter(|&(_, v)| v != 0.0)
            .collect();
        for (i, o) in out.iter_mut().enumerate() {
            let row = &self.a[i * self.m..(i + 1) * self.m];
            let qw: f64 = support.iter().map(|&(j, v)| row[j] * v).sum();
            *o = 2.0 * (qw + self.ridge * w[i] - self.b[i]);
        }
    }

    fn objective(&self, w: &[f64]) -> f64 {
        let mut g = vec![0.0; self.m];
        self.gradient(w, &mut g);
        // w'Qw - 2 b'w = w'(Qw - b) - b'w = w'g/2 - b'w.
        w.iter()
            .zip(&g)
            .zip(self.b)
            .map(|((wi, gi), bi)| wi * (0.5 * gi - bi))
            .sum()
    }

    /// The minimiser of the objective over {w : sum w = 1, w_j = 0 outside
    /// `support`}: with Q_S the support's block, w_S = Q_S^-1 (b_S - nu 1)
    /// with nu chosen so that the weights sum to one. None when Q_S cannot
    /// be factorized (not with the ridge, short of overflow).
    fn on_support(&self, support: &[usize]) -> Option<Vec<f64>> {
        let s = support.len();
        let mut q = Array2::from_shape_fn((s, s), |(r, c)| self.q(support[r], support[c]));
        let mut rhs = Array2::zeros((s, 2));
        for (r, &i) in support.iter().enumerate() {
            rhs[[r, 0]] = self.b[i];
            rhs[[r, 1]] = 1.0;
        }
        let sol = q.solvec(&rhs).ok()?;
        let (x, y) = (sol.column(0), sol.column(1));
        let nu = (x.sum() - 1.0) / y.sum();
        let w: Vec<f64> = x.iter().zip(y).map(|(xi, yi)| xi - nu * yi).collect();
        w.iter().all(|v| v.is_finite()).then_some(w)
    }
}

/// Euclidean projection of `v` onto the simplex (sort, then shift and clip;
/// Duchi, Shalev-Shwartz, Singer & Chandra 2008, "Efficient projections
/// onto the l1-ball for learning in high dimensions", from memory).
fn project_to_simplex(v: &[f64]) -> Vec<f64> {
    let mut sorted = v.to_vec();
    sorted.sort_by(|a, b| b.total_cmp(a));
    let (mut cumulative, mut shift) = (0.0, 0.0);
    for (j, &u) in sorted.iter().enumerate() {
        cumulative += u;
        let candidate = (cumulative - 1.0) / (j + 1) as f64;
        if u - candidate > 0.0 {
            shift = candidate;
        }
    }
    v.iter().map(|x| (x - shift).max(0.0)).collect()
}

/// Minimises w' A w - 2 w' b over the simplex {w >= 0, sum w = 1}, where A
/// (m x m, row-major) is symmetric positive semidefinite, exactly up to
/// rounding.
///
/// A ridge of [`RIDGE_SHARE`] times A's mean diagonal makes the problem
/// strictly convex (A is singular when models are collinear). Accelerated
/// projected gradient (FISTA with restarts, at most [`WARM_START_STEPS`]
/// steps, each O(m^2)) finds the solution's support; then the primal
/// active-set method for convex quadratic programs (Nocedal & Wright,
/// "Numerical optimization", algorithm 16.3) finishes from there: it solves
/// the problem restricted to the current support exactly (a Cholesky
/// factorization), steps towards that solution until a weight reaches zero
/// (that model leaves the support), and once the restricted solution is
/// feasible adds the model whose gradient most undercuts the support's
/// common gradient, stopping when none does (the KKT conditions). Each
/// finishing step costs O(s^3 + m s) for a support of s models.
pub fn solve_simplex(a: &[f64], b: &[f64]) -> SimplexSolution {
    let m = b.len();
    debug_assert_eq!(a.len(), m * m);
    if m == 1 {
        return SimplexSolution {
            weights: vec![1.0],
            ridge: 0.0,
            converged: true,
        };
    }
    let mean_diagonal = (0..m).map(|k| a[k * m + k]).sum::<f64>() / m as f64;
    let ridge = if mean_diagonal > 0.0 && mean_diagonal.is_finite() {
        RIDGE_SHARE * mean_diagonal
    } else {
        // A = 0: every weight vector is as good; the ridge picks equal ones.
        1.0
    };
    let problem = Problem { a, b, m, ridge };
    let start = warm_start(&problem);
    let (weights, converged) = active_set(&problem, start);
    SimplexSolution {
        weights,
        ridge,
        converged,
    }
}

/// FISTA (Beck & Teboulle 2009, "A fast iterative shrinkage-thresholding
/// algorithm for linear inverse problems") from the best single model, with
/// a restart whenever the objective rises (O'Donoghue & Candes 2015,
/// "Adaptive restart for accelerated gradient schemes"); both from memory.
fn warm_start(p: &Problem<'_>) -> Vec<f64> {
    let m = p.m;
    let best = (0..m)
        .min_by(|&i, &j| (p.q(i, i) - 2.0 * p.b[i]).total_cmp(&(p.q(j, j) - 2.0 * p.b[j])))
        .unwrap_or(0);
    let mut x = vec![0.0; m];
    x[best] = 1.0;
    // Step 1/L with L = 2 lambda_max(Q), bounded by Gershgorin's row sums.
    let lipschitz = 2.0
        * (0..m)
            .map(|i| (0..m).map(|j| p.q(i, j).abs()).sum::<f64>())
            .fold(0.0, f64::max);
    if !(lipschitz > 0.0 && lipschitz.is_finite()) {
        return x;
    }
    let mut y = x.clone();
    let mut g = vec![0.0; m];
    let mut momentum: f64 = 1.0;
    let mut value = p.objective(&x);
    let mut unchanged = 0;
    for _ in 0..WARM_START_STEPS {
        p.gradient(&y, &mut g);
        let step: Vec<f64> = y
            .iter()
            .zip(&g)
            .map(|(yi, gi)| yi - gi / lipschitz)
            .collect();
        let next = project_to_simplex(&step);
        let next_value = p.objective(&next);
        let same_support = next.iter().zip(&x).all(|(a, b)| (*a > 0.0) == (*b > 0.0));
        if next_value > value {
            // Restart: drop the momentum and step from the last iterate.
            momentum = 1.0;
            y.clone_from(&x);
            continue;
        }
        let next_momentum = (1.0 + (1.0 + 4.0 * momentum * momentum).sqrt()) / 2.0;
        let beta = (momentum - 1.0) / next_momentum;
        for ((yi, ni), xi) in y.iter_mut().zip(&next).zip(&x) {
            *yi = ni + beta * (ni - xi);
        }
        let gain = value - next_value;
        x = next;
        value = next_value;
        momentum = next_momentum;
        unchanged = if same_support { unchanged + 1 } else { 0 };
        // The support has settled (or nothing moves): the exact finish
        // takes it from here.
        if unchanged >= 30 || (same_support && gain <= 0.0) {
            break;
        }
    }
    x
}

/// The primal active-set finish from a feasible `x`; returns the weights
/// and whether the optimality conditions were met.
fn active_set(p: &Problem<'_>, mut x: Vec<f64>) -> (Vec<f64>, bool) {
    let m = p.m;
    let scale = (0..m)
        .map(|i| p.q(i, i).abs().max(p.b[i].abs()))
        .fold(f64::MIN_POSITIVE, f64::max);
    let tolerance = 1e-10 * scale;
    let mut support: Vec<usize> = (0..m).filter(|&i| x[i] > 0.0).collect();
    let mut g = vec![0.0; m];
    let mut converged = false;
    let mut entered = None;
    for _ in 0..(4 * m + 100) {
        let Some(v) = p.on_support(&support) else {
            break;
        };
        if v.iter().all(|&vi| vi >= 0.0) {
            for (&i, &vi) in support.iter().zip(&v) {
                x[i] = vi;
            }
            p.gradient(&x, &mut g);
            let common = support.iter().map(|&i| g[i]).sum::<f64>() / support.len() as f64;
            let entering = (0..m)
                .filter(|&j| x[j] == 0.0 && !support.contains(&j))
                .map(|j| (j, g[j] - common))
                .min_by(|a, b| a.1.total_cmp(&b.1));
            match entering {
                Some((j, undercut)) if undercut < -tolerance => {
                    support.push(j);
                    support.sort_unstable();
                    entered = Some(j);
                }
                _ => {
                    converged = true;
                    break;
                }
            }
        } else {
            // Step towards v until the first weight reaches zero.
            let (mut step, mut leaving) = (1.0, None);
            for (pos, (&i, &vi)) in support.iter().zip(&v).enumerate() {
                if vi < 0.0 {
                    let reach = x[i] / (x[i] - vi);
                    if reach < step {
                        step = reach;
                        leaving = Some(pos);
                    }
                }
            }
            for (&i, &vi) in support.iter().zip(&v) {
                x[i] += step * (vi - x[i]);
            }
            if let Some(pos) = leaving {
                if step <= 0.0 && entered == Some(support[pos]) {
                    // The model just added would leave at once: its
                    // undercut was rounding, and the point is optimal.
                    support.remove(pos);
                    converged = true;
                    break;
                }
                x[support[pos]] = 0.0;
                support.remove(pos);
            }
            entered = None;
            support.retain(|&i| {
                let keep = x[i] > 0.0;
                if !keep {
                    x[i] = 0.0;
                }
                keep
            });
        }
    }
    let total: f64 = x.iter().sum();
    if total > 0.0 {
        for v in &mut x {
            *v /= total;
        }
    }
    (x, converged)
}

/// Cross-fitted blend weights and the held-out blend they form.
#[derive(Debug, Clone)]
pub struct CrossFitBlend {
    /// Weights fitted on every unit: what a user would deploy.
    pub weights: SimplexSolution,
    /// Per fold, weights fitted on the units of the other folds.
    pub fold_weights: Vec<SimplexSolution>,
    /// Units per fold.
    pub fold_units: Vec<usize>,
    /// The held-out blend's prediction per unit: its fold's weights applied
    /// to the models' predictions.
    pub held_out: Vec<f64>,
}

/// Per fold, the sums over the fold's units of tau_hat tau_hat' and of
/// tau_hat phi, as one (m + 1) x (m + 1) matrix of [tau_hat, phi]
/// products, with the fold's unit count. Each part of a fold multiplies
/// blocks of [`GRAM_BLOCK`] units (models by units) by their transposes.
fn fold_grams(
    effects: &[&[f64]],
    phi: &[f64],
    fold_of_unit: &[usize],
    folds: usize,
) -> Vec<(usize, Array2<f64>)> {
    let p = effects.len() + 1;
    let mut members: Vec<Vec<usize>> = vec![Vec::new(); folds];
    for (i, &f) in fold_of_unit.iter().enumerate() {
        members[f].push(i);
    }
    let parts: Vec<(usize, &[usize])> = members
        .iter()
        .enumerate()
        .flat_map(|(f, units)| {
            let count = (units.len() / MIN_PART_UNITS).clamp(1, MAX_PARTS_PER_FOLD);
            let size = units.len().div_ceil(count).max(1);
            units.chunks(size).map(move |c| (f, c))
        })
        .collect();
    let products: Vec<(usize, Array2<f64>)> = parts
        .par_iter()
        .map(|&(f, units)| {
            let mut acc = Array2::zeros((p, p));
            let mut block = Array2::zeros((p, GRAM_BLOCK));
            for chunk in units.chunks(GRAM_BLOCK) {
                let len = chunk.len();
                for (mut row, column) in block
                    .outer_iter_mut()
                    .zip(effects.iter().copied().chain(std::iter::once(phi)))
                {
                    for (cell, &i) in row.iter_mut().zip(chunk) {
                        *cell = column[i];
                    }
                }
                let b = block.slice(ndarray::s![.., ..len]);
                general_mat_mul(1.0, &b, &b.t(), 1.0, &mut acc);
            }
            (f, acc)
        })
        .collect();
    let mut grams: Vec<(usize, Array2<f64>)> = members
        .iter()
        .map(|u| (u.len(), Array2::zeros((p, p))))
        .collect();
    for (f, product) in products {
        grams[f].1 += &product;
    }
    grams
}

/// A and b of the problem from a sum of [tau_hat, phi] products over
/// `units` units; A is made exactly symmetric (the products are symmetric
/// only up to rounding).
fn problem_of(gram: &Array2<f64>, units: usize) -> (Vec<f64>, Vec<f64>) {
    let m = gram.nrows() - 1;
    let n = units.max(1) as f64;
    let mut a = vec![0.0; m * m];
    for i in 0..m {
        for j in 0..m {
            a[i * m + j] = 0.5 * (gram[[i, j]] + gram[[j, i]]) / n;
        }
    }
    let b = (0..m).map(|i| gram[[i, m]] / n).collect();
    (a, b)
}

/// Fits blend weights on every unit and, for each fold in `0..folds`, on
/// the units of the other folds, and forms the held-out blend: each unit's
/// prediction with the weights of its own fold. `effects[k]` holds model
/// k's predictions per unit; `phi` the AIPW pseudo-outcomes.
///
/// `fold_of_unit` holds each unit's fold, in `0..folds`.
///
/// Cost: forming the Gram matrices is O(n m^2) (one matrix product per
/// block of units, in parallel); each of the K + 1 solves is O(m^2) per
/// warm-start step plus the exact finish. Measured with 1,000 models and
/// 100,000 units on two shared cores (test profile): the whole blend took
/// 12 s, against 144 s for the scoring pass before it, so `plumbline score`
/// has no switch to turn it off.
pub fn cross_fit_blend(
    effects: &[&[f64]],
    phi: &[f64],
    fold_of_unit: &[usize],
    folds: usize,
) -> CrossFitBlend {
    let grams = FoldGrams::of(effects, phi, fold_of_unit, folds);
    let (weights, fold_weights) = grams.solve();
    let held_out = held_out_blend(effects, fold_of_unit, &fold_weights);
    CrossFitBlend {
        weights,
        fold_weights,
        fold_units: grams.fold_units(),
        held_out,
    }
}

/// The per-fold sums of [tau_hat, phi] products the weights are fitted
/// from: a window that only grows merges its new units into them
/// ([`FoldGrams::add`]), at O(m^2) per unit, and solves again, at
/// O(K m^2) per warm-start step, without a pass over the units it holds.
#[derive(Debug, Clone)]
pub struct FoldGrams {
    grams: Vec<(usize, Array2<f64>)>,
}

impl FoldGrams {
    /// The sums over the units of `effects` (model k's predictions per
    /// unit) and `phi`, each in its fold of `fold_of_unit` (in `0..folds`).
    pub fn of(effects: &[&[f64]], phi: &[f64], fold_of_unit: &[usize], folds: usize) -> Self {
        Self {
            grams: fold_grams(effects, phi, fold_of_unit, folds),
        }
    }

    /// As [`FoldGrams::of`], the predictions read from `columns` a block
    /// of units at a time, wherever they are stored (the service reads
    /// them from its cache and never holds every model's column). Units go
    /// in parts of [`COLUMN_PART`] in parallel, merged in order, so the
    /// sums do not depend on the number of threads.
    pub fn of_columns(
        columns: &[Column<'_>],
        phi: &[f64],
        fold_of_unit: &[usize],
        folds: usize,
    ) -> Self {
        let p = columns.len() + 1;
        let n = phi.len();
        let parts: Vec<Vec<(usize, Array2<f64>)>> = (0..n.div_ceil(COLUMN_PART))
            .into_par_iter()
            .map(|c| {
                let end = ((c + 1) * COLUMN_PART).min(n);
                let mut grams = vec![(0usize, Array2::zeros((p, p))); folds];
                let mut block = Array2::zeros((p, GRAM_BLOCK));
                let mut values = vec![0.0; GRAM_BLOCK];
                for start in (c * COLUMN_PART..end).step_by(GRAM_BLOCK) {
                    let len = GRAM_BLOCK.min(end - start);
                    for (mut row, column) in block.outer_iter_mut().zip(columns) {
                        column.fill(start, &mut values[..len]);
                        for (cell, &v) in row.iter_mut().zip(&values[..len]) {
                            *cell = v;
                        }
                    }
                    for (cell, &v) in block
                        .row_mut(p - 1)
                        .iter_mut()
                        .zip(&phi[start..start + len])
                    {
                        *cell = v;
                    }
                    for (f, (units, gram)) in grams.iter_mut().enumerate() {
                        let members: Vec<usize> =
                            (0..len).filter(|&j| fold_of_unit[start + j] == f).collect();
                        if members.is_empty() {
                            continue;
                        }
                        let part = block.select(ndarray::Axis(1), &members);
                        general_mat_mul(1.0, &part, &part.t(), 1.0, gram);
                        *units += members.len();
                    }
                }
                grams
            })
            .collect();
        let mut grams = vec![(0usize, Array2::zeros((p, p))); folds];
        for part in parts {
            for ((units, gram), (u, g)) in grams.iter_mut().zip(part) {
                *units += u;
                *gram += &g;
            }
        }
        Self { grams }
    }

    /// Merges more units (their predictions `columns`, for the same models
    /// in the same order, their `phi` and folds).
    pub fn add(&mut self, columns: &[Column<'_>], phi: &[f64], fold_of_unit: &[usize]) {
        let more = Self::of_columns(columns, phi, fold_of_unit, self.grams.len());
        for ((units, gram), (u, g)) in self.grams.iter_mut().zip(more.grams) {
            *units += u;
            *gram += &g;
        }
    }

    /// Models the sums are over.
    pub fn models(&self) -> usize {
        self.grams.first().map_or(0, |(_, g)| g.nrows() - 1)
    }

    /// Units per fold.
    pub fn fold_units(&self) -> Vec<usize> {
        self.grams.iter().map(|(u, _)| *u).collect()
    }

    /// The weights fitted on every unit, and per fold the weights fitted
    /// on the other folds' units.
    pub fn solve(&self) -> (SimplexSolution, Vec<SimplexSolution>) {
        let grams = &self.grams;
        let p = grams.first().map_or(1, |(_, g)| g.nrows());
        let n: usize = grams.iter().map(|(u, _)| u).sum();
        let mut total = Array2::zeros((p, p));
        for (_, g) in grams {
            total += g;
        }
        let (a, b) = problem_of(&total, n);
        let jobs: Vec<Option<usize>> = std::iter::once(None)
            .chain((0..grams.len()).map(Some))
            .collect();
        let mut solved: Vec<SimplexSolution> = jobs
            .par_iter()
            .map(|job| match job {
                None => solve_simplex(&a, &b),
                Some(f) => {
                    let (units, gram) = &grams[*f];
                    let (a, b) = problem_of(&(&total - gram), n - units);
                    solve_simplex(&a, &b)
                }
            })
            .collect();
        let weights = solved.remove(0);
        (weights, solved)
    }
}

/// The held-out blend's prediction per unit: its fold's weights applied to
/// the models' predictions (a model with no weight in any fold is not
/// read).
pub fn held_out_blend(
    effects: &[&[f64]],
    fold_of_unit: &[usize],
    fold_weights: &[SimplexSolution],
) -> Vec<f64> {
    let n = fold_of_unit.len();
    let mut held_out = vec![0.0; n];
    held_out
        .par_chunks_mut(1 << 14)
        .enumerate()
        .for_each(|(c, out)| {
            let start = c << 14;
            for (k, column) in effects.iter().enumerate() {
                if fold_weights.iter().all(|w| w.weights[k] == 0.0) {
                    continue;
                }
                for (j, o) in out.iter_mut().enumerate() {
                    let i = start + j;
                    *o += fold_weights[fold_of_unit[i]].weights[k] * column[i];
                }
            }
        });
    held_out
}

/// One registered model's place in the blend.
#[derive(Debug, Clone, Serialize)]
pub struct BlendWeight {
    pub model: String,
    /// Weight fitted on every unit: the blend a user would deploy.
    pub weight: f64,
    /// Weight fitted without each fold, in fold order: the weights the
    /// held-out blend used on that fold's units.
    pub fold_weights: Vec<f64>,
    /// Smallest and largest of `fold_weights`: how much the weight moves
    /// when a fifth (with five folds) of the units is left out.
    pub fold_min: f64,
    pub fold_max: f64,
}

/// The cross-fitted blend of the registered models, with its error
/// estimated on held-out units. Built only when at least two models are
/// registered; the built-in baselines never take part.
#[derive(Debug, Clone, Serialize)]
pub struct BlendReport {
    /// Every registered model, in the order given, with its weights.
    pub weights: Vec<BlendWeight>,
    /// Units per fold (the nuisance fit's folds), in fold order.
    pub fold_units: Vec<usize>,
    /// Mean corrected PEHE contribution of the held-out blend: a lower
    /// estimate of its PEHE, as for any model (see the scoreboard's caveat).
    pub corrected_pehe: f64,
    /// Corrected PEHE of the held-out blend minus that of constant-effect
    /// (below 0: lower error than treating everyone alike).
    pub vs_constant: Difference,
    /// The registered model ranked first on all units, which the blend is
    /// compared with.
    pub best_model: String,
    /// Corrected PEHE of the held-out blend minus that of `best_model`
    /// (below 0: the blend has lower error); see `caveat`.
    pub vs_best: Difference,
    /// False when a weight fit stopped at its iteration cap (the weights
    /// are then on the simplex but may not be the exact minimiser).
    pub converged: bool,
    pub caveat: &'static str,
}

/// The blend report of a scored pass: `board` gives the ranking (the best
/// registered model) and the constant-effect prediction (the AIPW ATE);
/// the folds are the nuisance fit's own, reproduced from its settings.
/// None with fewer than two registered models.
pub fn blend_report(
    table: &UnitTable,
    nuisance: &Nuisance,
    models: &[ModelPredictions],
    settings: &Settings,
    board: &Scoreboard,
) -> Option<BlendReport> {
    let registered: Vec<&ModelPredictions> = models.iter().filter(|m| !m.baseline).collect();
    if registered.len() < 2 {
        return None;
    }
    let best_model = board.models.iter().find(|m| !m.baseline)?.name.clone();
    let best = registered.iter().position(|m| m.name == best_model)?;
    let (y, w) = (table.outcome(), table.treatment());
    let phi = aipw_pseudo_outcome(y, w, nuisance);
    let folds = settings.nuisance.folds;
    let fold_of_unit = assign_folds(w, folds, settings.nuisance.seed);
    let effects: Vec<&[f64]> = registered.iter().map(|m| m.effects.as_slice()).collect();
    let blend = cross_fit_blend(&effects, &phi, &fold_of_unit, folds);
    let names: Vec<String> = registered.iter().map(|m| m.name.clone()).collect();
    Some(report_of_blend(
        &names,
        &blend,
        best_model,
        effects[best],
        &UnitColumns::new(table, nuisance, &phi),
        board.ate.estimate,
    ))
}

/// The report of a cross-fitted `blend` of the models `names` (in the
/// blend's order): its held-out error, and its difference from
/// constant-effect (predicting `constant`, the window's ATE) and from
/// `best_model`, whose predictions are `best_effects`; `units` are the
/// per-unit values every estimator reads. Shared by `plumbline score` and
/// the service's boards, so both say the same thing of the same blend.
pub fn report_of_blend(
    names: &[String],
    blend: &CrossFitBlend,
    best_model: String,
    best_effects: &[f64],
    units: &UnitColumns<'_>,
    constant: f64,
) -> BlendReport {
    let estimator = ALL[RANKED_BY];
    let n = blend.held_out.len();
    let (mut own, mut vs_constant, mut vs_best) = (
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
    );
    for (i, (&held_out, &single)) in blend.held_out.iter().zip(best_effects).enumerate() {
        let unit = units.view(i);
        let c = estimator.contribution(&unit, held_out);
        own.push(c);
        vs_constant.push(c - estimator.contribution(&unit, constant));
        vs_best.push(c - estimator.contribution(&unit, single));
    }
    let weights = names
        .iter()
        .enumerate()
        .map(|(k, name)| {
            let fold_weights: Vec<f64> = blend.fold_weights.iter().map(|s| s.weights[k]).collect();
            BlendWeight {
                model: name.clone(),
                weight: blend.weights.weights[k],
                fold_min: fold_weights.iter().copied().fold(f64::INFINITY, f64::min),
                fold_max: fold_weights
                    .iter()
                    .copied()
                    .fold(f64::NEG_INFINITY, f64::max),
                fold_weights,
            }
        })
        .collect();
    BlendReport {
        weights,
        fold_units: blend.fold_units.clone(),
        corrected_pehe: mean_se(&own).estimate,
        vs_constant: Difference::from_estimate(mean_se(&vs_constant), CI_LEVEL),
        best_model,
        vs_best: Difference::from_estimate(mean_se(&vs_best), CI_LEVEL),
        converged: blend.weights.converged && blend.fold_weights.iter().all(|s| s.converged),
        caveat: BLEND_CAVEAT,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::stats::standard_normal;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// w'Aw - 2 b'w without the ridge.
    fn objective(a: &[f64], b: &[f64], w: &[f64]) -> f64 {
        let m = b.len();
        let mut value = 0.0;
        for i in 0..m {
            for j in 0..m {
                value += w[i] * a[i * m + j] * w[j];
            }
            value -= 2.0 * b[i] * w[i];
        }
        value
    }

    /// The optimality conditions of the simplex problem, checked directly:
    /// with g = 2(Aw - b), every model in the support has the same g (= the
    /// smallest), and no model outside it has a smaller one. Sufficient for
    /// a convex problem, so this is a check independent of the solver.
    fn assert_optimal(a: &[f64], b: &[f64], w: &[f64], tolerance: f64) {
        let m = b.len();
        assert!((w.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!(w.iter().all(|&v| v >= 0.0));
        let g: Vec<f64> = (0..m)
            .map(|i| 2.0 * ((0..m).map(|j| a[i * m + j] * w[j]).sum::<f64>() - b[i]))
            .collect();
        let low = g.iter().copied().fold(f64::INFINITY, f64::min);
        for (i, &v) in w.iter().enumerate() {
            if v > 1e-9 {
                assert!(g[i] - low <= tolerance, "model {i}: {} above {low}", g[i]);
            }
        }
    }

    /// Solves the dense system `k` x = `r` by Gaussian elimination with
    /// partial pivoting; None when a pivot is (relatively) zero.
    fn solve_dense(mut k: Vec<Vec<f64>>, mut r: Vec<f64>) -> Option<Vec<f64>> {
        let p = r.len();
        let scale = k.iter().flatten().fold(0.0f64, |s, v| s.max(v.abs()));
        for col in 0..p {
            let pivot = (col..p).max_by(|&x, &y| k[x][col].abs().total_cmp(&k[y][col].abs()))?;
            if k[pivot][col].abs() <= 1e-10 * scale {
                return None;
            }
            k.swap(col, pivot);
            r.swap(col, pivot);
            let (upper, lower) = k.split_at_mut(col + 1);
            let pivot_row = &upper[col];
            for (offset, row) in lower.iter_mut().enumerate() {
                let f = row[col] / pivot_row[col];
                for (cell, above) in row[col..].iter_mut().zip(&pivot_row[col..]) {
                    *cell -= f * above;
                }
                r[col + 1 + offset] -= f * r[col];
            }
        }
        let mut x = vec![0.0; p];
        for row in (0..p).rev() {
            let s: f64 = ((row + 1)..p).map(|c| k[row][c] * x[c]).sum();
            x[row] = (r[row] - s) / k[row][row];
        }
        Some(x)
    }

    /// Brute force: for every nonempty support S, the minimiser over
    /// {sum w = 1, w = 0 off S} from its KKT system [2 A_S, 1; 1', 0], kept
    /// when its weights are nonnegative; the least objective of those. The
    /// simplex minimum is among them (it minimises the problem restricted
    /// to its own support, and a minimiser set always has a point whose
    /// system is nonsingular).
    fn brute_force(a: &[f64], b: &[f64]) -> f64 {
        let m = b.len();
        let mut best = f64::INFINITY;
        for mask in 1u32..(1 << m) {
            let support: Vec<usize> = (0..m).filter(|&i| mask & (1 << i) != 0).collect();
            let s = support.len();
            let mut k = vec![vec![0.0; s + 1]; s + 1];
            let mut r = vec![0.0; s + 1];
            for (x, &i) in support.iter().enumerate() {
                for (y, &j) in support.iter().enumerate() {
                    k[x][y] = 2.0 * a[i * m + j];
                }
                k[x][s] = 1.0;
                k[s][x] = 1.0;
                r[x] = 2.0 * b[i];
            }
            r[s] = 1.0;
            let Some(sol) = solve_dense(k, r) else {
                continue;
            };
            if sol[..s].iter().all(|&v| v >= -1e-12) {
                let mut w = vec![0.0; m];
                for (x, &i) in support.iter().enumerate() {
                    w[i] = sol[x].max(0.0);
                }
                best = best.min(objective(a, b, &w));
            }
        }
        best
    }

    /// A and b from predictions `t[k][i]` and pseudo-outcomes `phi`.
    fn moments(t: &[Vec<f64>], phi: &[f64]) -> (Vec<f64>, Vec<f64>) {
        let (m, n) = (t.len(), phi.len() as f64);
        let mut a = vec![0.0; m * m];
        for i in 0..m {
            for j in 0..m {
                a[i * m + j] = t[i].iter().zip(&t[j]).map(|(x, y)| x * y).sum::<f64>() / n;
            }
        }
        let b = t
            .iter()
            .map(|ti| ti.iter().zip(phi).map(|(x, y)| x * y).sum::<f64>() / n)
            .collect();
        (a, b)
    }

    /// 300 random problems of 2 to 6 models built as a blend sees them
    /// (predictions sharing a common effect plus model-specific parts,
    /// sometimes an exact copy or combination of another model): the
    /// solver's objective equals brute force's and meets the optimality
    /// conditions.
    #[test]
    fn matches_brute_force_on_small_problems() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        for case in 0..300 {
            let m = 2 + case % 5;
            let n = 40;
            let common: Vec<f64> = (0..n).map(|_| standard_normal(&mut rng)).collect();
            let mut t: Vec<Vec<f64>> = (0..m)
                .map(|_| {
                    let share: f64 = rng.gen_range(0.0..1.5);
                    let spread: f64 = rng.gen_range(0.1..2.0);
                    common
                        .iter()
                        .map(|c| share * c + spread * standard_normal(&mut rng))
                        .collect()
                })
                .collect();
            match case % 3 {
                1 => t[m - 1] = t[0].clone(),
                2 => {
                    t[m - 1] = t[0]
                        .iter()
                        .zip(&t[1])
                        .map(|(x, y)| 0.3 * x + 0.7 * y)
                        .collect()
                }
                _ => {}
            }
            let phi: Vec<f64> = common
                .iter()
                .map(|c| c + 2.0 * standard_normal(&mut rng))
                .collect();
            let (a, b) = moments(&t, &phi);
            let solution = solve_simplex(&a, &b);
            assert!(solution.converged, "case {case}");
            let found = objective(&a, &b, &solution.weights);
            let exact = brute_force(&a, &b);
            let scale = a.iter().fold(1.0f64, |s, v| s.max(v.abs()));
            assert!(
                (found - exact).abs() <= 1e-7 * scale,
                "case {case}: solver {found}, brute force {exact}"
            );
            assert_optimal(&a, &b, &solution.weights, 1e-6 * scale);
        }
    }

    /// Three models on a fine grid of the simplex (step 1/400): no grid point
    /// beats the solver, and the best grid point is within the grid's
    /// resolution of it.
    #[test]
    fn no_grid_point_beats_the_solution() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        for _ in 0..20 {
            let t: Vec<Vec<f64>> = (0..3)
                .map(|_| (0..30).map(|_| standard_normal(&mut rng)).collect())
                .collect();
            let phi: Vec<f64> = (0..30).map(|_| standard_normal(&mut rng)).collect();
            let (a, b) = moments(&t, &phi);
            let found = objective(&a, &b, &solve_simplex(&a, &b).weights);
            let steps = 400;
            let mut grid = f64::INFINITY;
            for i in 0..=steps {
                for j in 0..=(steps - i) {
                    let w = [
                        i as f64 / steps as f64,
                        j as f64 / steps as f64,
                        (steps - i - j) as f64 / steps as f64,
                    ];
                    grid = grid.min(objective(&a, &b, &w));
                }
            }
            assert!(found <= grid + 1e-9, "solver {found}, grid {grid}");
            assert!(grid - found < 1e-3, "solver {found}, grid {grid}");
        }
    }

    /// A dominant model: the solution is its vertex, exactly.
    #[test]
    fn vertex_solution() {
        let a = [1.0, 0.0, 0.0, 0.0, 2.0, 0.0, 0.0, 0.0, 3.0];
        let b = [2.0, 0.0, 0.0];
        let solution = solve_simplex(&a, &b);
        assert!(solution.converged);
        assert_eq!(solution.weights, vec![1.0, 0.0, 0.0]);
    }

    /// A = I: the problem is the projection of b onto the simplex, here the
    /// interior point b - 0.1 (b sums to 1.3).
    #[test]
    fn interior_solution() {
        let a = [1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 1.0];
        let b = [0.6, 0.4, 0.3];
        let solution = solve_simplex(&a, &b);
        assert!(solution.converged);
        for (w, want) in solution.weights.iter().zip([0.5, 0.3, 0.2]) {
            assert!((w - want).abs() < 1e-9, "{:?}", solution.weights);
        }
    }

    /// Two identical models and a third: A is singular; the identical pair
    /// shares its weight equally (the ridge makes the solution unique) and
    /// the objective is the brute-force minimum.
    #[test]
    fn collinear_models_share_weight() {
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        let n = 200;
        let tau: Vec<f64> = (0..n).map(|_| standard_normal(&mut rng)).collect();
        let e: Vec<f64> = (0..n).map(|_| standard_normal(&mut rng)).collect();
        let t1: Vec<f64> = tau.iter().zip(&e).map(|(t, e)| t + 0.5 * e).collect();
        let t3: Vec<f64> = tau.iter().zip(&e).map(|(t, e)| t - 0.5 * e).collect();
        let t = vec![t1.clone(), t1, t3];
        let (a, b) = moments(&t, &tau);
        let solution = solve_simplex(&a, &b);
        assert!(solution.converged);
        let w = &solution.weights;
        assert!((w[0] - w[1]).abs() < 1e-6, "{w:?}");
        assert!((w[0] + w[1] - 0.5).abs() < 0.05, "{w:?}");
        let found = objective(&a, &b, w);
        assert!((found - brute_force(&a, &b)).abs() < 1e-8);
        // Every prediction zero: A = 0, any weights do; the solver returns
        // weights on the simplex rather than failing.
        let zero = solve_simplex(&[0.0; 4], &[0.0; 2]);
        assert!((zero.weights.iter().sum::<f64>() - 1.0).abs() < 1e-12);
    }

    /// 1,000 models (the true effect plus noise of different sizes, some
    /// shared): the optimum keeps many models, since averaging noise pays.
    /// The solver meets the optimality conditions.
    #[test]
    fn a_thousand_models() {
        let mut rng = ChaCha8Rng::seed_from_u64(13);
        let (m, n) = (1000, 3000);
        let tau: Vec<f64> = (0..n).map(|_| standard_normal(&mut rng)).collect();
        let shared: Vec<f64> = (0..n).map(|_| standard_normal(&mut rng)).collect();
        let t: Vec<Vec<f64>> = (0..m)
            .map(|k| {
                let sd = 0.5 + (k % 7) as f64 * 0.3;
                let lean = if k % 3 == 0 { 0.4 } else { 0.0 };
                (0..n)
                    .map(|i| tau[i] + lean * shared[i] + sd * standard_normal(&mut rng))
                    .collect()
            })
            .collect();
        let phi: Vec<f64> = tau.iter().map(|t| t + standard_normal(&mut rng)).collect();
        let mut flat = Array2::zeros((m, n));
        for (k, column) in t.iter().enumerate() {
            for (i, v) in column.iter().enumerate() {
                flat[[k, i]] = *v;
            }
        }
        let gram = flat.dot(&flat.t()) / n as f64;
        let a: Vec<f64> = gram.iter().copied().collect();
        let b: Vec<f64> = t
            .iter()
            .map(|ti| ti.iter().zip(&phi).map(|(x, y)| x * y).sum::<f64>() / n as f64)
            .collect();
        let started = std::time::Instant::now();
        let solution = solve_simplex(&a, &b);
        let support = solution.weights.iter().filter(|&&w| w > 0.0).count();
        eprintln!(
            "1,000 models: support {support}, solved in {:.2} s",
            started.elapsed().as_secs_f64()
        );
        assert!(solution.converged);
        assert!(support > 10);
        assert_optimal(&a, &b, &solution.weights, 1e-6);
    }

    /// Draws X ~ U(-1, 1), tau = X, and phi = tau + N(0, 1) (a pseudo-outcome
    /// with exact nuisances), with folds as the nuisance fit assigns them.
    fn unit_draw(n: usize, seed: u64) -> (Vec<f64>, Vec<f64>, Vec<f64>, Vec<usize>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let x: Vec<f64> = (0..n).map(|_| rng.gen_range(-1.0..1.0)).collect();
        let tau = x.clone();
        let phi: Vec<f64> = tau.iter().map(|t| t + standard_normal(&mut rng)).collect();
        let treatment: Vec<f64> = (0..n).map(|i| (i % 2) as f64).collect();
        let folds = assign_folds(&treatment, 5, seed);
        (x, tau, phi, folds)
    }

    fn true_pehe(prediction: &[f64], tau: &[f64]) -> f64 {
        prediction
            .iter()
            .zip(tau)
            .map(|(p, t)| (p - t).powi(2))
            .sum::<f64>()
            / tau.len() as f64
    }

    /// Two models, each exactly right on one half of the units (x < 0, x >=
    /// 0) and off by 1 on the other. No constant weights are right on both
    /// halves; the best convex blend is (1/2, 1/2), with PEHE 1/4 against 1/2
    /// for either model, and that is what the cross-fitted blend recovers
    /// (20,000 units: the weights' se is about 0.01, so 0.05 is five se).
    #[test]
    fn models_right_on_disjoint_halves_blend_evenly() {
        let (x, tau, phi, folds) = unit_draw(20_000, 21);
        let t1: Vec<f64> = x
            .iter()
            .map(|&x| if x < 0.0 { x } else { x + 1.0 })
            .collect();
        let t2: Vec<f64> = x
            .iter()
            .map(|&x| if x < 0.0 { x + 1.0 } else { x })
            .collect();
        let blend = cross_fit_blend(&[&t1, &t2], &phi, &folds, 5);
        for w in std::iter::once(&blend.weights).chain(&blend.fold_weights) {
            assert!((w.weights[0] - 0.5).abs() < 0.05, "{:?}", w.weights);
        }
        let held_out = true_pehe(&blend.held_out, &tau);
        assert!(held_out < 0.26, "held-out blend PEHE {held_out}");
        assert!(true_pehe(&t1, &tau) > 0.45);
        assert_eq!(blend.fold_units.iter().sum::<usize>(), 20_000);
    }

    /// Two models whose errors are equal and opposite: the even blend is
    /// the truth itself, and the held-out blend's PEHE is near zero against
    /// 1/2 for either model.
    #[test]
    fn opposite_errors_blend_to_the_truth() {
        let (x, tau, phi, folds) = unit_draw(20_000, 34);
        let error = |x: f64| (std::f64::consts::PI * x).sin();
        let t1: Vec<f64> = x.iter().map(|&x| x + error(x)).collect();
        let t2: Vec<f64> = x.iter().map(|&x| x - error(x)).collect();
        let blend = cross_fit_blend(&[&t1, &t2], &phi, &folds, 5);
        let held_out = true_pehe(&blend.held_out, &tau);
        assert!(held_out < 0.01, "held-out blend PEHE {held_out}");
        assert!(true_pehe(&t1, &tau) > 0.45);
    }
}
