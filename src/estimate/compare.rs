//! Ranking models on one estimator: pairwise differences, the best set,
//! p_best and the leader.
//!
//! Everything here is built on differences between models' contributions,
//! because for the corrected PEHE only differences are unbiased (see
//! `estimators::corrected_pehe`).

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use super::stats::{holm_reject, p_greater, p_two_sided, standard_normal, Estimate};
use super::sums::ScoreSums;

/// A difference in mean error between two models (first minus second).
#[derive(Debug, Clone, Serialize)]
pub struct Difference {
    pub estimate: f64,
    pub se: f64,
    pub z: f64,
    /// Two-sided p-value for "no difference".
    pub p_value: f64,
    pub ci_low: f64,
    pub ci_high: f64,
}

impl Difference {
    pub fn from_estimate(e: Estimate, level: f64) -> Self {
        let (ci_low, ci_high) = e.interval(level);
        Self {
            estimate: e.estimate,
            se: e.se,
            z: if e.se > 0.0 { e.estimate / e.se } else { 0.0 },
            p_value: p_two_sided(e),
            ci_low,
            ci_high,
        }
    }
}

/// The outcome of ranking m models on one aggregate.
#[derive(Debug, Clone)]
pub struct Ranking {
    /// 1-based rank per model (1 = lowest mean error).
    pub rank: Vec<usize>,
    /// Index of the model with the lowest mean error.
    pub leader: usize,
    /// Whether each model is in the best set.
    pub in_best_set: Vec<bool>,
    /// Share of draws in which each model had the lowest error.
    pub p_best: Vec<f64>,
}

/// Ranks the models of `sums` and forms the best set at level `alpha`.
///
/// Best set: the leader, plus every model whose excess mean error over the
/// leader is not significant in a one-sided test at family-wise level alpha,
/// Holm-corrected over the m - 1 comparisons (in the spirit of the model
/// confidence set of Hansen, Lunde & Nason 2011; the leader is chosen from
/// the same data, so the set errs towards including models).
///
/// p_best: share of `draws` draws from N(means, Cov(means)) in which the
/// model has the lowest mean; ties split equally.
pub fn rank(sums: &ScoreSums, alpha: f64, draws: usize, seed: u64) -> Ranking {
    let m = sums.models();
    let means = sums.means();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| means[a].total_cmp(&means[b]).then(a.cmp(&b)));
    let mut rank = vec![0; m];
    for (pos, &k) in order.iter().enumerate() {
        rank[k] = pos + 1;
    }
    let leader = order.first().copied().unwrap_or(0);

    let others: Vec<usize> = (0..m).filter(|&k| k != leader).collect();
    let p: Vec<f64> = others
        .iter()
        .map(|&k| p_greater(sums.difference(k, leader)))
        .collect();
    let rejected = holm_reject(&p, alpha);
    let mut in_best_set = vec![true; m];
    for (&k, &out) in others.iter().zip(&rejected) {
        in_best_set[k] = !out;
    }

    Ranking {
        rank,
        leader,
        in_best_set,
        p_best: p_best(sums, draws, seed),
    }
}

/// Lower-triangular L with L L' = a for a symmetric positive semidefinite
/// m x m matrix; directions with (numerically) zero variance get a zero
/// column instead of failing.
fn semidefinite_cholesky(a: &[f64], m: usize) -> Vec<f64> {
    let mut l = vec![0.0; m * m];
    let scale = (0..m).map(|k| a[k * m + k].abs()).fold(0.0, f64::max);
    let tol = scale * 1e-12;
    for j in 0..m {
        let mut d = a[j * m + j];
        for k in 0..j {
            d -= l[j * m + k] * l[j * m + k];
        }
        if d <= tol {
            continue;
        }
        let ljj = d.sqrt();
        l[j * m + j] = ljj;
        for i in (j + 1)..m {
            let mut s = a[i * m + j];
            for k in 0..j {
                s -= l[i * m + k] * l[j * m + k];
            }
            l[i * m + j] = s / ljj;
        }
    }
    l
}

fn p_best(sums: &ScoreSums, draws: usize, seed: u64) -> Vec<f64> {
    let m = sums.models();
    if m == 0 || draws == 0 {
        return vec![0.0; m];
    }
    let mut cov = vec![0.0; m * m];
    for k in 0..m {
        for l in 0..m {
            cov[k * m + l] = sums.mean_covariance(k, l);
        }
    }
    let chol = semidefinite_cholesky(&cov, m);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut wins = vec![0.0; m];
    let mut z = vec![0.0; m];
    let mut x = vec![0.0; m];
    for _ in 0..draws {
        for v in z.iter_mut() {
            *v = standard_normal(&mut rng);
        }
        for i in 0..m {
            x[i] = sums.mean(i) + (0..=i).map(|k| chol[i * m + k] * z[k]).sum::<f64>();
        }
        let best = x.iter().copied().fold(f64::INFINITY, f64::min);
        let tied: Vec<usize> = (0..m).filter(|&i| x[i] == best).collect();
        for &i in &tied {
            wins[i] += 1.0 / tied.len() as f64;
        }
    }
    wins.iter().map(|w| w / draws as f64).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sums_from(columns: &[Vec<f64>]) -> ScoreSums {
        let mut s = ScoreSums::new(columns.len());
        for i in 0..columns[0].len() {
            let row: Vec<f64> = columns.iter().map(|c| c[i]).collect();
            s.push(&row);
        }
        s
    }

    #[test]
    fn clear_winner_is_alone_in_best_set() {
        let n = 2000;
        let noise: Vec<f64> = (0..n)
            .map(|i| ((i * 7919) % 1000) as f64 / 1000.0)
            .collect();
        let a: Vec<f64> = noise.iter().map(|v| v + 0.0).collect();
        let b: Vec<f64> = noise
            .iter()
            .enumerate()
            .map(|(i, v)| v + 0.5 + 0.01 * (i % 3) as f64)
            .collect();
        let c: Vec<f64> = noise.iter().map(|v| v + 0.001).collect();
        let r = rank(&sums_from(&[a, b, c]), 0.05, 2000, 1);
        assert_eq!(r.leader, 0);
        assert_eq!(r.rank, vec![1, 3, 2]);
        assert!(r.in_best_set[0]);
        assert!(!r.in_best_set[1]);
        // c is worse by a constant 0.001: its difference has zero variance
        // and a positive mean, so it is significantly worse.
        assert!(!r.in_best_set[2]);
        assert!((r.p_best.iter().sum::<f64>() - 1.0).abs() < 1e-9);
        assert!(r.p_best[0] > 0.99);
    }

    #[test]
    fn indistinguishable_models_share_the_best_set_and_p_best() {
        let n = 4000;
        let base: Vec<f64> = (0..n)
            .map(|i| ((i * 104_729) % 997) as f64 / 997.0)
            .collect();
        let a: Vec<f64> = base
            .iter()
            .enumerate()
            .map(|(i, v)| v + 0.05 * ((i % 2) as f64 - 0.5))
            .collect();
        let b: Vec<f64> = base
            .iter()
            .enumerate()
            .map(|(i, v)| v - 0.05 * ((i % 2) as f64 - 0.5))
            .collect();
        let r = rank(&sums_from(&[a, b]), 0.05, 4000, 3);
        assert!(r.in_best_set.iter().all(|&x| x));
        // Means are equal, so p_best is close to one half for each.
        assert!((r.p_best[0] - 0.5).abs() < 0.05, "{:?}", r.p_best);
    }

    #[test]
    fn cholesky_handles_singular_matrix() {
        // Rank-one: [[1, 2], [2, 4]].
        let l = semidefinite_cholesky(&[1.0, 2.0, 2.0, 4.0], 2);
        assert_eq!(l, vec![1.0, 0.0, 2.0, 0.0]);
    }
}
