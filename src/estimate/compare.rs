//! Ranking models on one estimator: pairwise differences, the best set,
//! draw_share and the front-runner, with the joint (max-t) critical values and the
//! selection-adjusted interval of [`super::selection`].
//!
//! Everything here is built on differences between models' contributions,
//! because for the corrected PEHE only differences are unbiased (see
//! `estimators::corrected_pehe`).

use serde::Serialize;

use super::selection::{
    chance_lowest, correlated_draws, count_lowest, hybrid_interval, semidefinite_cholesky,
};
use super::stats::{holm_reject, p_greater, p_two_sided, sorted_quantile, Estimate};
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
    /// The interval at the same level that holds jointly for every
    /// difference of its family (the pairs on a board): max-t.
    pub joint_low: f64,
    pub joint_high: f64,
}

impl Difference {
    /// `e` with its interval at `level`; alone, its joint interval is the
    /// same (see [`Difference::with_joint`]).
    pub fn from_estimate(e: Estimate, level: f64) -> Self {
        let (ci_low, ci_high) = e.interval(level);
        Self {
            estimate: e.estimate,
            se: e.se,
            z: if e.se > 0.0 { e.estimate / e.se } else { 0.0 },
            p_value: p_two_sided(e),
            ci_low,
            ci_high,
            joint_low: ci_low,
            joint_high: ci_high,
        }
    }

    /// The joint interval estimate +- `critical` se of a difference that
    /// is one of a family (a max-t critical value).
    pub fn with_joint(self, critical: f64) -> Self {
        Self {
            joint_low: self.estimate - critical * self.se,
            joint_high: self.estimate + critical * self.se,
            ..self
        }
    }
}

/// What shapes a ranking besides the aggregates.
#[derive(Debug, Clone, Copy)]
pub struct RankSettings {
    /// Family-wise level of the best set.
    pub alpha: f64,
    /// Level of the intervals, pointwise and joint.
    pub level: f64,
    /// Normal draws behind the joint critical values and the chances.
    pub draws: usize,
    pub seed: u64,
    /// Pairs are kept among this many top-ranked models, plus the front-runner
    /// against every other model.
    pub pairwise_top: usize,
    /// Columns from this one on are the candidates whose errors share the
    /// chances' pooled prior; those before it (the baselines) are not
    /// pooled with them.
    pub first_candidate: usize,
}

/// The outcome of ranking m models on one aggregate.
#[derive(Debug, Clone)]
pub struct Ranking {
    /// 1-based rank per model (1 = lowest mean error).
    pub rank: Vec<usize>,
    /// Index of the model with the lowest mean error.
    pub front_runner: usize,
    /// Whether each model is in the best set.
    pub in_best_set: Vec<bool>,
    /// Share of draws from N(estimates, Cov) in which each model had the
    /// lowest error (ties split). Centered on the estimates, it overstates
    /// the front-runner when models tie; see `chance_lowest`.
    pub draw_share: Vec<f64>,
    /// Chance that each model has the lowest true error: the candidates'
    /// from their pooled empirical-Bayes prior ([`chance_lowest`]), near
    /// 1/m when they tie; see [`pooled_chances`].
    pub chance_lowest: Vec<f64>,
    /// Max-t critical value for the differences from the reference column
    /// at `level`, jointly over every column.
    pub joint_critical: f64,
    /// The front-runner's difference from the reference, adjusted for its having
    /// been picked as the minimum ([`hybrid_interval`]) at `level`.
    pub front_runner_interval: (f64, f64),
    /// The pairs kept, (a, b) with a ranked above b: every pair among the
    /// top `pairwise_top`, then the front-runner against each model below them.
    pub pairs: Vec<(usize, usize)>,
    /// Max-t critical value jointly over `pairs` at `level`.
    pub pair_critical: f64,
}

/// Ranks the models of `sums` (which must keep every co-moment) and forms
/// the best set at level `alpha`; intervals and chances are taken in the
/// frame of differences from column `reference` (constant-effect), whose
/// ordering is the same.
///
/// Best set: the front-runner, plus every model whose excess mean error over the
/// front-runner is not significant in a one-sided test at family-wise level alpha,
/// Holm-corrected over the m - 1 comparisons (in the spirit of the model
/// confidence set of Hansen, Lunde & Nason 2011; the front-runner is chosen from
/// the same data, so the set errs towards including models).
///
/// One set of `draws` draws of the estimates' noise, Z ~ N(0, Cov), gives
/// the max-t critical values (the quantiles of the largest standardized
/// |Z_k| over the columns, and of |Z_a - Z_b| over the pairs) and
/// `draw_share`, the share of draws of estimates + Z in which each model is
/// lowest.
pub fn rank(sums: &ScoreSums, reference: usize, settings: &RankSettings) -> Ranking {
    let m = sums.models();
    let means = sums.means();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| means[a].total_cmp(&means[b]).then(a.cmp(&b)));
    let mut rank = vec![0; m];
    for (pos, &k) in order.iter().enumerate() {
        rank[k] = pos + 1;
    }
    let front_runner = order.first().copied().unwrap_or(0);

    let others: Vec<usize> = (0..m).filter(|&k| k != front_runner).collect();
    let p: Vec<f64> = others
        .iter()
        .map(|&k| p_greater(sums.difference(k, front_runner)))
        .collect();
    let rejected = holm_reject(&p, settings.alpha);
    let mut in_best_set = vec![true; m];
    for (&k, &out) in others.iter().zip(&rejected) {
        in_best_set[k] = !out;
    }

    let top = settings.pairwise_top.min(m);
    let mut pairs = Vec::new();
    for (i, &a) in order[..top].iter().enumerate() {
        pairs.extend(order[i + 1..top].iter().map(|&b| (a, b)));
    }
    if top > 0 {
        pairs.extend(order[top..].iter().map(|&b| (front_runner, b)));
    }

    // Differences from the reference: the same ordering, the reference a
    // fixed competitor at zero.
    let whole = sums.covariance_matrix();
    let r = reference.min(m.saturating_sub(1));
    let x: Vec<f64> = (0..m).map(|k| means[k] - means[r]).collect();
    let mut cov = vec![0.0; m * m];
    for k in 0..m {
        for l in 0..m {
            cov[k * m + l] =
                whole[k * m + l] - whole[k * m + r] - whole[r * m + l] + whole[r * m + r];
        }
    }
    let sd: Vec<f64> = (0..m).map(|k| cov[k * m + k].max(0.0).sqrt()).collect();
    let floor = sd.iter().copied().fold(0.0, f64::max) * 1e-9;
    let varying: Vec<usize> = (0..m).filter(|&k| sd[k] > floor).collect();
    let pair_sd: Vec<f64> = pairs
        .iter()
        .map(|&(a, b)| {
            (cov[a * m + a] + cov[b * m + b] - 2.0 * cov[a * m + b])
                .max(0.0)
                .sqrt()
        })
        .collect();
    let pair_floor = pair_sd.iter().copied().fold(0.0, f64::max) * 1e-9;

    let chol = semidefinite_cholesky(&cov, m);
    let mut column_max = Vec::with_capacity(settings.draws);
    let mut pair_max = Vec::with_capacity(settings.draws);
    let mut wins = vec![0.0; m];
    correlated_draws(&chol, m, settings.draws, settings.seed, |z, rows| {
        for row in z.chunks_exact(m).take(rows) {
            column_max.push(
                varying
                    .iter()
                    .map(|&k| (row[k] / sd[k]).abs())
                    .fold(0.0, f64::max),
            );
            pair_max.push(
                pairs
                    .iter()
                    .zip(&pair_sd)
                    .filter(|(_, &s)| s > pair_floor)
                    .map(|(&(a, b), s)| ((row[a] - row[b]) / s).abs())
                    .fold(0.0, f64::max),
            );
            count_lowest(&x, row, &mut wins);
        }
    });
    column_max.sort_by(f64::total_cmp);
    pair_max.sort_by(f64::total_cmp);
    let draws = settings.draws.max(1) as f64;
    let draw_share: Vec<f64> = wins.iter().map(|w| w / draws).collect();
    let joint_critical = sorted_quantile(&column_max, settings.level);
    let pair_critical = sorted_quantile(&pair_max, settings.level);
    // The projection step of the hybrid at beta = (1 - level) / 10.
    let beta = (1.0 - settings.level) / 10.0;
    let c_beta = sorted_quantile(&column_max, 1.0 - beta);
    let front_runner_interval = if m == 0 {
        (0.0, 0.0)
    } else {
        hybrid_interval(
            &x,
            &cov,
            m,
            front_runner,
            1.0 - settings.level,
            beta,
            c_beta,
        )
    };
    let chance_lowest = pooled_chances(&x, &cov, m, &draw_share, settings);
    Ranking {
        rank,
        front_runner,
        in_best_set,
        draw_share,
        chance_lowest,
        joint_critical,
        front_runner_interval,
        pairs,
        pair_critical,
    }
}

/// The chances of [`Ranking::chance_lowest`]. The empirical-Bayes prior
/// pools the candidates (columns `first_candidate..`), which a sweep makes
/// alike; the baselines are of another kind (zero-effect is often far from
/// every candidate) and would inflate the prior's spread. So a baseline's
/// chance is its share of draws around the estimates (a flat prior, nothing
/// pooled with it), and the candidates divide what remains by their pooled
/// chances. An approximation: exact when no baseline is near the top.
pub fn pooled_chances(
    x: &[f64],
    cov: &[f64],
    m: usize,
    draw_share: &[f64],
    settings: &RankSettings,
) -> Vec<f64> {
    let first = settings.first_candidate.min(m);
    let c = m - first;
    let mut chances = draw_share.to_vec();
    if c == 0 {
        return chances;
    }
    let sub: Vec<f64> = (first..m)
        .flat_map(|k| (first..m).map(move |l| (k, l)))
        .map(|(k, l)| cov[k * m + l])
        .collect();
    let pooled = chance_lowest(
        &x[first..],
        &sub,
        c,
        settings.draws,
        settings.seed.wrapping_add(1),
    );
    let rest = (1.0 - draw_share[..first].iter().sum::<f64>()).max(0.0);
    for (out, p) in chances[first..].iter_mut().zip(pooled) {
        *out = rest * p;
    }
    chances
}

#[cfg(test)]
mod tests {
    use super::*;

    fn settings(draws: usize, seed: u64) -> RankSettings {
        RankSettings {
            alpha: 0.05,
            level: 0.95,
            draws,
            seed,
            pairwise_top: 20,
            first_candidate: 0,
        }
    }

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
        let r = rank(&sums_from(&[a, b, c]), 1, &settings(2000, 1));
        assert_eq!(r.front_runner, 0);
        assert_eq!(r.rank, vec![1, 3, 2]);
        assert!(r.in_best_set[0]);
        assert!(!r.in_best_set[1]);
        // c is worse by a constant 0.001: its difference has zero variance
        // and a positive mean, so it is significantly worse.
        assert!(!r.in_best_set[2]);
        assert!((r.draw_share.iter().sum::<f64>() - 1.0).abs() < 1e-9);
        assert!(r.draw_share[0] > 0.99);
    }

    #[test]
    fn indistinguishable_models_share_the_best_set_and_draw_share() {
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
        let r = rank(&sums_from(&[a, b]), 0, &settings(4000, 3));
        assert!(r.in_best_set.iter().all(|&x| x));
        // Means are equal, so draw_share is close to one half for each.
        assert!((r.draw_share[0] - 0.5).abs() < 0.05, "{:?}", r.draw_share);
    }

    #[test]
    fn cholesky_handles_singular_matrix() {
        // Rank-one: [[1, 2], [2, 4]].
        let l = semidefinite_cholesky(&[1.0, 2.0, 2.0, 4.0], 2);
        assert_eq!(l, vec![1.0, 0.0, 2.0, 0.0]);
    }
}
