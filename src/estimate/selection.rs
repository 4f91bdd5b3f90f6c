//! Inference that survives choosing among many models on the same data.
//!
//! A board ranks m models by their corrected PEHE and names the top one.
//! Read naively, each model's interval and the top model's estimate ignore
//! that choice: with many models of equal error the top one is simply the
//! luckiest draw, its estimate sits several standard errors too low, and a
//! "share of draws in which it is lowest", taken around the estimates
//! themselves, credits it with a lead it does not have. Three corrections,
//! all from the covariance of the models' mean contributions that the
//! ranking estimator already keeps:
//!
//! - max-t critical values (in [`super::compare`], from
//!   [`correlated_draws`]): the max-t critical value (the (1 - alpha)
//!   quantile of max_k |Z_k| / sd_k for Z ~ N(0, Sigma)), so that intervals
//!   estimate +- c sd_k cover every model's difference at once (Hothorn,
//!   Bretz & Westfall 2008, "Simultaneous inference in general parametric
//!   models").
//! - [`hybrid_interval`]: an interval for the top model's own difference
//!   that accounts for its having been picked as the minimum: the hybrid of
//!   conditional and projection inference of Andrews, Kitagawa & McCloskey
//!   (2024), "Inference on winners", Quarterly Journal of Economics.
//! - [`chance_lowest`]: the probability that each model has the lowest true
//!   error under an empirical-Bayes normal prior on the models' errors
//!   (fitted by the method of moments), which, unlike the share of draws
//!   around the estimates, is near 1/m when the models tie.
//!
//! Everything works on "errors" x (lower is better) with covariance Sigma
//! (row-major m x m); a column with zero variance (the constant-effect
//! baseline in the vs-constant frame) is a fixed competitor.

use ndarray::linalg::general_mat_mul;
use ndarray::{ArrayView2, ArrayViewMut2};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::stats::{normal_cdf, standard_normal};
use super::sums::dot;

/// Rows of draws formed per matrix product: bounds the memory of the draws
/// at 2 x `BATCH` x m values however many are asked for.
const BATCH: usize = 256;

/// Lower-triangular L with L L' = a for a symmetric positive semidefinite
/// m x m matrix; directions with (numerically) zero variance get a zero
/// column instead of failing.
pub fn semidefinite_cholesky(a: &[f64], m: usize) -> Vec<f64> {
    let mut l = vec![0.0; m * m];
    let scale = (0..m).map(|k| a[k * m + k].abs()).fold(0.0, f64::max);
    let tol = scale * 1e-12;
    for j in 0..m {
        let row_j: Vec<f64> = l[j * m..j * m + j].to_vec();
        let d = a[j * m + j] - dot(&row_j, &row_j);
        if d <= tol {
            continue;
        }
        let ljj = d.sqrt();
        l[j * m + j] = ljj;
        for i in (j + 1)..m {
            let s = a[i * m + j] - dot(&l[i * m..i * m + j], &row_j);
            l[i * m + j] = s / ljj;
        }
    }
    l
}

/// Draws of N(0, L L') for the lower-triangular factor `chol` (m x m),
/// `count` of them from `seed`, handed to `each` a batch at a time as
/// row-major (rows x m) values.
pub fn correlated_draws(
    chol: &[f64],
    m: usize,
    count: usize,
    seed: u64,
    mut each: impl FnMut(&[f64], usize),
) {
    if m == 0 || count == 0 {
        return;
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut z = vec![0.0; BATCH * m];
    let mut x = vec![0.0; BATCH * m];
    let Ok(factor) = ArrayView2::from_shape((m, m), chol) else {
        return;
    };
    let mut done = 0;
    while done < count {
        let rows = BATCH.min(count - done);
        for v in z[..rows * m].iter_mut() {
            *v = standard_normal(&mut rng);
        }
        let zs = ArrayView2::from_shape((rows, m), &z[..rows * m]);
        let xs = ArrayViewMut2::from_shape((rows, m), &mut x[..rows * m]);
        if let (Ok(zs), Ok(mut xs)) = (zs, xs) {
            general_mat_mul(1.0, &zs, &factor.t(), 0.0, &mut xs);
        }
        each(&x[..rows * m], rows);
        done += rows;
    }
}

/// An interval for the top model's own error after it was picked as the
/// minimum of `x` (covariance `cov`), at level 1 - `alpha`: the hybrid
/// interval of Andrews, Kitagawa & McCloskey (2024).
///
/// With w the top model and sigma^2 = Sigma_ww, write every other estimate
/// as x_j = Z_j + rho_j x_w with rho_j = Sigma_jw / sigma^2, so that Z is
/// independent of x_w. Given Z, "w is the minimum" is an interval
/// L <= x_w <= U (x_w (1 - rho_j) <= Z_j for every j), and x_w given the
/// choice and Z is normal, truncated to it. Conditional inference inverts
/// that truncated normal; alone it is valid but can be very wide when x_w
/// sits near an end. The hybrid also truncates to the level 1 - beta
/// simultaneous (projection) interval x_w +- c_beta sigma, tests at level
/// (alpha - beta) / (1 - beta) within it, and keeps the values of the
/// projection interval not rejected: coverage at least 1 - alpha, and the
/// interval never wider than the projection one. `c_beta` is the max-t
/// critical value at level 1 - beta over every column (beta = alpha / 10,
/// as those authors recommend).
///
/// Returns (low, high); a top model of zero variance gets its estimate.
pub fn hybrid_interval(
    x: &[f64],
    cov: &[f64],
    m: usize,
    top: usize,
    alpha: f64,
    beta: f64,
    c_beta: f64,
) -> (f64, f64) {
    let y = x[top];
    let var = cov[top * m + top];
    let scale = (0..m).map(|k| cov[k * m + k]).fold(0.0, f64::max);
    if var <= scale * 1e-18 || var <= 0.0 {
        return (y, y);
    }
    let sigma = var.sqrt();
    let (mut lower, mut upper) = (f64::NEG_INFINITY, f64::INFINITY);
    for j in (0..m).filter(|&j| j != top) {
        let rho = cov[j * m + top] / var;
        let z = x[j] - rho * y;
        let slope = 1.0 - rho;
        if slope.abs() < 1e-12 {
            continue;
        }
        let bound = z / slope;
        if slope > 0.0 {
            upper = upper.min(bound);
        } else {
            lower = lower.max(bound);
        }
    }
    // Rounding can leave y a hair outside its own event.
    lower = lower.min(y);
    upper = upper.max(y);
    let tail = (alpha - beta) / (2.0 * (1.0 - beta));
    let reach = c_beta * sigma;
    // The truncated-normal distribution function at y for mean mu, the
    // truncation also cut to mu +- reach.
    let cdf = |mu: f64| -> f64 {
        let a = (lower.max(mu - reach) - mu) / sigma;
        let b = (upper.min(mu + reach) - mu) / sigma;
        let t = (y - mu) / sigma;
        let whole = normal_mass(a, b);
        if whole <= 0.0 {
            return 0.5;
        }
        (normal_mass(a, t) / whole).clamp(0.0, 1.0)
    };
    let (left, right) = (y - reach, y + reach);
    // The distribution function falls as mu rises: the low end is where it
    // drops to 1 - tail, the high end where it drops to tail.
    let crossing = |target: f64| -> f64 {
        if cdf(left) <= target {
            return left;
        }
        if cdf(right) >= target {
            return right;
        }
        let (mut a, mut b) = (left, right);
        for _ in 0..100 {
            let mid = 0.5 * (a + b);
            if cdf(mid) > target {
                a = mid;
            } else {
                b = mid;
            }
        }
        0.5 * (a + b)
    };
    (crossing(1.0 - tail), crossing(tail))
}

/// P(a <= Z <= b) for a standard normal Z, accurate in either tail.
fn normal_mass(a: f64, b: f64) -> f64 {
    if b <= a {
        return 0.0;
    }
    if a > 0.0 {
        normal_cdf(-a) - normal_cdf(-b)
    } else {
        normal_cdf(b) - normal_cdf(a)
    }
}

/// How far (in standard deviations under equal true errors) the estimates'
/// spread must exceed their noise before the chances credit any model
/// with a lead: the one-sided 95% point.
const TIE_TEST_Z: f64 = 1.645;

/// The chance that each model has the lowest true error, under an
/// empirical-Bayes prior: the true errors theta_k drawn independently from
/// N(theta_bar, tau^2), the estimates x ~ N(theta, Sigma). The prior's
/// mean is the estimates' mean and its variance the spread of the
/// estimates beyond what their noise explains, less its own uncertainty:
/// tau^2 = max(0, S^2 - E_0 S^2 - 1.645 sd_0 S^2), S^2 the sample variance
/// of x and E_0, sd_0 its mean and standard deviation when the models tie
/// (exact for normal estimates). The plain method-of-moments value
/// (Efron & Morris 1973 in spirit) is positive half the time under a tie,
/// and when the models' noise is strongly correlated, as in a sweep, S^2
/// has few degrees of freedom and that positive part is large: the
/// front-runner's chance then averaged 0.1 over a thousand tied models, a
/// hundred times 1/m. Testing the spread first leaves the chances even in
/// 95% of ties and costs little when some model is truly ahead, where the
/// spread dwarfs its noise. The posterior of theta is normal with
/// mean theta_bar + tau^2 A^-1 (x - theta_bar) and covariance
/// tau^2 I - tau^4 A^-1, A = tau^2 I + Sigma; the chance is the share of
/// `draws` posterior draws in which the model is lowest (ties split).
///
/// When the estimates spread no more than their noise, tau^2 = 0: the data
/// cannot tell the models apart and each gets 1/m. This is what keeps the
/// figure honest across a sweep of equals, where the share of draws taken
/// around the estimates themselves credits the luckiest model with a lead.
pub fn chance_lowest(x: &[f64], cov: &[f64], m: usize, draws: usize, seed: u64) -> Vec<f64> {
    if m == 0 {
        return Vec::new();
    }
    if m == 1 {
        return vec![1.0];
    }
    let mf = m as f64;
    let mean = x.iter().sum::<f64>() / mf;
    let spread = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (mf - 1.0);
    // Under equal true errors S^2 = x' P x / (m - 1), P the centering, has
    // mean tr(B) / (m - 1) and variance 2 tr(B^2) / (m - 1)^2, B = P Sigma P.
    let row: Vec<f64> = (0..m)
        .map(|k| cov[k * m..(k + 1) * m].iter().sum::<f64>() / mf)
        .collect();
    let grand = row.iter().sum::<f64>() / mf;
    let (mut trace_b, mut square_b) = (0.0, 0.0);
    for k in 0..m {
        for l in 0..m {
            let b = cov[k * m + l] - row[k] - row[l] + grand;
            square_b += b * b;
            if k == l {
                trace_b += b;
            }
        }
    }
    let noise = trace_b / (mf - 1.0);
    let noise_sd = (2.0 * square_b).sqrt() / (mf - 1.0);
    let tau2 = spread - noise - TIE_TEST_Z * noise_sd;
    let scale = (0..m).map(|k| cov[k * m + k]).sum::<f64>() / mf;
    if tau2.is_nan() || tau2 <= scale * 1e-9 || draws == 0 {
        return vec![1.0 / mf; m];
    }
    // A = tau^2 I + Sigma is positive definite; its inverse from its
    // Cholesky factor.
    let mut a = cov.to_vec();
    for k in 0..m {
        a[k * m + k] += tau2;
    }
    let chol = semidefinite_cholesky(&a, m);
    let inverse = inverse_from_cholesky(&chol, m);
    let centered: Vec<f64> = x.iter().map(|v| v - mean).collect();
    let post_mean: Vec<f64> = (0..m)
        .map(|k| mean + tau2 * dot(&inverse[k * m..(k + 1) * m], &centered))
        .collect();
    let mut post_cov: Vec<f64> = inverse.iter().map(|v| -tau2 * tau2 * v).collect();
    for k in 0..m {
        post_cov[k * m + k] += tau2;
    }
    let post_chol = semidefinite_cholesky(&post_cov, m);
    let mut wins = vec![0.0; m];
    correlated_draws(&post_chol, m, draws, seed, |noise, rows| {
        for row in noise.chunks_exact(m).take(rows) {
            count_lowest(&post_mean, row, &mut wins);
        }
    });
    wins.iter().map(|w| w / draws as f64).collect()
}

/// Adds one to the model lowest in `mean + noise` (split among ties).
pub fn count_lowest(mean: &[f64], noise: &[f64], wins: &mut [f64]) {
    let mut best = f64::INFINITY;
    let mut tied = 0usize;
    for (mu, e) in mean.iter().zip(noise) {
        let v = mu + e;
        if v < best {
            best = v;
            tied = 1;
        } else if v == best {
            tied += 1;
        }
    }
    if tied == 0 {
        return;
    }
    let share = 1.0 / tied as f64;
    for ((w, mu), e) in wins.iter_mut().zip(mean).zip(noise) {
        if mu + e == best {
            *w += share;
        }
    }
}

/// A^-1 from the lower-triangular factor L of A = L L' (m x m), as
/// (L^-1)' L^-1: the triangular inverse by row operations on contiguous
/// rows, then one matrix product. A zero pivot (a direction of no
/// variance) leaves its row of L^-1 zero.
fn inverse_from_cholesky(l: &[f64], m: usize) -> Vec<f64> {
    let mut inv_l = vec![0.0; m * m];
    let mut row = vec![0.0; m];
    for i in 0..m {
        let lii = l[i * m + i];
        if lii == 0.0 {
            continue;
        }
        row[..=i].iter_mut().for_each(|v| *v = 0.0);
        row[i] = 1.0;
        for k in 0..i {
            let lik = l[i * m + k];
            if lik != 0.0 {
                for (r, v) in row[..=k].iter_mut().zip(&inv_l[k * m..k * m + k + 1]) {
                    *r -= lik * v;
                }
            }
        }
        for (out, r) in inv_l[i * m..i * m + i + 1].iter_mut().zip(&row[..=i]) {
            *out = r / lii;
        }
    }
    let mut inverse = vec![0.0; m * m];
    let factor = ArrayView2::from_shape((m, m), &inv_l[..]);
    let out = ArrayViewMut2::from_shape((m, m), &mut inverse[..]);
    if let (Ok(factor), Ok(mut out)) = (factor, out) {
        general_mat_mul(1.0, &factor.t(), &factor, 0.0, &mut out);
    }
    inverse
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::stats::normal_quantile;

    fn rng(seed: u64) -> ChaCha8Rng {
        ChaCha8Rng::seed_from_u64(seed)
    }

    fn identity(m: usize) -> Vec<f64> {
        let mut a = vec![0.0; m * m];
        for k in 0..m {
            a[k * m + k] = 1.0;
        }
        a
    }

    /// The max-t value for m independent unit normals, exactly:
    /// P(max |Z| <= c) = (2 Phi(c) - 1)^m.
    fn independent_critical(m: usize, level: f64) -> f64 {
        normal_quantile((1.0 + level.powf(1.0 / m as f64)) / 2.0)
    }

    #[test]
    fn an_inverse_from_the_factor_inverts() {
        let m = 40;
        let mut r = rng(5);
        let b: Vec<f64> = (0..m * m).map(|_| standard_normal(&mut r)).collect();
        // A = B B' / m + I, symmetric positive definite.
        let mut a = identity(m);
        for i in 0..m {
            for j in 0..m {
                a[i * m + j] += dot(&b[i * m..(i + 1) * m], &b[j * m..(j + 1) * m]) / m as f64;
            }
        }
        let inverse = inverse_from_cholesky(&semidefinite_cholesky(&a, m), m);
        for i in 0..m {
            for j in 0..m {
                let v: f64 = (0..m).map(|k| a[i * m + k] * inverse[k * m + j]).sum();
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((v - want).abs() < 1e-10, "{i},{j}: {v}");
            }
        }
    }

    #[test]
    fn draws_have_the_asked_covariance() {
        // [[4, 2], [2, 3]]: 20,000 draws give each entry to about
        // 4 * sqrt(2 / 20000) = 0.04 (one sd); 0.15 is over three.
        let cov = [4.0, 2.0, 2.0, 3.0];
        let chol = semidefinite_cholesky(&cov, 2);
        let mut sums = [0.0; 4];
        let count = 20_000;
        correlated_draws(&chol, 2, count, 9, |x, rows| {
            for row in x.chunks_exact(2).take(rows) {
                for a in 0..2 {
                    for b in 0..2 {
                        sums[a * 2 + b] += row[a] * row[b];
                    }
                }
            }
        });
        for (got, want) in sums.iter().map(|s| s / count as f64).zip(cov) {
            assert!((got - want).abs() < 0.15, "{got} vs {want}");
        }
    }

    /// Ten models of equal true error, independent unit-variance
    /// estimates: the lowest one's plain 95% interval covers its truth
    /// about 78% of the time (it is the luckiest of ten), the hybrid one
    /// at least 95%. 4,000 replications put the standard error of a 95%
    /// rate at 0.0034, so 0.94 is three below it, while the uncorrected
    /// interval sits fifty below.
    #[test]
    fn the_hybrid_interval_covers_the_winner_of_ties() {
        let m = 10;
        let cov = identity(m);
        let level = 0.95;
        let beta = (1.0 - level) / 10.0;
        let c_beta = independent_critical(m, 1.0 - beta);
        let z = normal_quantile(0.975);
        let mut r = rng(11);
        let (mut hybrid, mut plain, mut width) = (0, 0, 0.0);
        let reps = 4000;
        for _ in 0..reps {
            let x: Vec<f64> = (0..m).map(|_| standard_normal(&mut r)).collect();
            let top = (0..m).min_by(|&a, &b| x[a].total_cmp(&x[b])).unwrap_or(0);
            let (low, high) = hybrid_interval(&x, &cov, m, top, 1.0 - level, beta, c_beta);
            assert!(low <= x[top] + c_beta && high >= x[top] - c_beta && low <= high);
            hybrid += usize::from(low <= 0.0 && 0.0 <= high);
            plain += usize::from((x[top] - z..=x[top] + z).contains(&0.0));
            width += high - low;
        }
        let (hybrid, plain) = (hybrid as f64 / reps as f64, plain as f64 / reps as f64);
        println!(
            "ten tied models, {reps} replications: hybrid covers {hybrid:.4} (mean width {:.2}), plain {plain:.4}",
            width / reps as f64
        );
        assert!(hybrid >= 0.94, "{hybrid}");
        assert!(plain < 0.85, "{plain}");
    }

    /// With one model far ahead the choice is never in doubt, and the
    /// hybrid interval is the plain one but for its projection step: the
    /// normal truncated to mu +- c_beta, tested at level
    /// (alpha - beta) / (1 - beta). Its ends solve
    /// Phi(t) = Phi(-c) + (1 - a)(2 Phi(c) - 1), a = (alpha - beta) / (2 (1 - beta)),
    /// by symmetry; bisection finds them to far below 1e-6.
    #[test]
    fn a_clear_winner_keeps_about_the_plain_interval() {
        let m = 5;
        let cov = identity(m);
        let x = [-30.0, 0.0, 0.3, 0.5, 1.0];
        let c = independent_critical(m, 0.995);
        let (low, high) = hybrid_interval(&x, &cov, m, 0, 0.05, 0.005, c);
        let a = 0.045 / (2.0 * 0.995);
        let t = normal_quantile(normal_cdf(-c) + (1.0 - a) * (2.0 * normal_cdf(c) - 1.0));
        assert!((low - (-30.0 - t)).abs() < 1e-6, "{low} vs {}", -30.0 - t);
        assert!((high - (-30.0 + t)).abs() < 1e-6, "{high} vs {}", -30.0 + t);
        assert!(t > 1.96 && t < 2.1, "{t}");
    }

    /// Chances over 2,000 replications of twenty tied models. With twenty
    /// models the prior's spread is itself uncertain (the sample variance
    /// of twenty estimates has a standard deviation of a third of the
    /// noise's), so the lowest model's mean chance stays above 1/20: 0.11
    /// when last run, against 0.35 for the share of draws around the
    /// estimates. The bound 0.15 holds it to well under half the share;
    /// the sweep simulation (tests/selection_simulation.rs) holds a
    /// thousand ties to within 0.05 of 1/m. A model 10 sd ahead gets a
    /// chance near one.
    #[test]
    fn chances_are_even_among_ties_and_sure_of_a_clear_winner() {
        let m = 20;
        let cov = identity(m);
        let chol = semidefinite_cholesky(&cov, m);
        let mut r = rng(3);
        let reps = 2000;
        let (mut chance, mut share) = (0.0, 0.0);
        for rep in 0..reps {
            let x: Vec<f64> = (0..m).map(|_| standard_normal(&mut r)).collect();
            let top = (0..m).min_by(|&a, &b| x[a].total_cmp(&x[b])).unwrap_or(0);
            chance += chance_lowest(&x, &cov, m, 400, rep)[top];
            let mut wins = vec![0.0; m];
            correlated_draws(&chol, m, 400, rep, |z, rows| {
                for row in z.chunks_exact(m).take(rows) {
                    count_lowest(&x, row, &mut wins);
                }
            });
            share += wins[top] / 400.0;
        }
        let (chance, share) = (chance / reps as f64, share / reps as f64);
        println!("twenty tied models, {reps} replications: mean chance of the lowest {chance:.4}, share of draws {share:.4}, truth 0.05");
        assert!(chance < 0.15 && chance > 0.05, "{chance}");
        assert!(share > 0.15, "{share}");
        let mut x: Vec<f64> = (0..m).map(|k| k as f64 * 0.1).collect();
        x[7] = -10.0;
        let c = chance_lowest(&x, &cov, m, 2000, 1);
        assert!(c[7] > 0.99, "{c:?}");
        assert!((c.iter().sum::<f64>() - 1.0).abs() < 1e-9);
    }
}
