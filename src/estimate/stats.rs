//! Small statistical building blocks shared by the estimators, and the
//! standard normal draw the rest of the crate simulates with.

use rand::Rng;
use serde::{Deserialize, Serialize};
use statrs::distribution::{ContinuousCDF, Normal};

/// A point estimate with its standard error.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Estimate {
    pub estimate: f64,
    pub se: f64,
}

impl Estimate {
    pub fn new(estimate: f64, se: f64) -> Self {
        Self { estimate, se }
    }

    /// Two-sided normal confidence interval at `level` (e.g. 0.95).
    pub fn interval(&self, level: f64) -> (f64, f64) {
        let z = normal_quantile(0.5 + level / 2.0);
        (self.estimate - z * self.se, self.estimate + z * self.se)
    }
}

fn unit_normal() -> Normal {
    // Normal::new(0, 1) cannot fail; the fallback keeps this total anyway.
    Normal::new(0.0, 1.0).unwrap_or_else(|_| Normal::standard())
}

/// Standard normal quantile function.
pub fn normal_quantile(p: f64) -> f64 {
    unit_normal().inverse_cdf(p)
}

/// Standard normal distribution function.
pub fn normal_cdf(z: f64) -> f64 {
    unit_normal().cdf(z)
}

/// One standard normal draw by the Box-Muller transform (the cosine of the
/// pair). draw_share's draws, the simulations and the tests all take their
/// normals from here, so a seed gives the same values wherever it is used.
pub fn standard_normal(rng: &mut impl Rng) -> f64 {
    let u1: f64 = rng.gen_range(f64::EPSILON..1.0);
    let u2: f64 = rng.gen();
    (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
}

/// Mean and standard error of the mean (sample sd with n - 1, over sqrt n).
///
/// With one value the standard error is reported as 0 rather than NaN; callers
/// never see n = 1 because cross-fitting needs several units per fold.
pub fn mean_se(values: &[f64]) -> Estimate {
    Moments::of(values).estimate()
}

/// Count, mean and centered sum of squares of a set of values. Two sets'
/// moments merge into those of their union exactly up to rounding (Chan,
/// Golub & LeVeque 1979), so a growing window keeps a mean and its
/// standard error without revisiting its values.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct Moments {
    n: u64,
    mean: f64,
    m2: f64,
}

impl Moments {
    /// The moments of `values`, in two passes (mean, then squares).
    pub fn of(values: &[f64]) -> Self {
        let n = values.len();
        if n == 0 {
            return Self::default();
        }
        let mean = values.iter().sum::<f64>() / n as f64;
        let m2 = values.iter().map(|v| (v - mean).powi(2)).sum();
        Self {
            n: n as u64,
            mean,
            m2,
        }
    }

    pub fn merge(&mut self, other: &Moments) {
        if other.n == 0 {
            return;
        }
        if self.n == 0 {
            *self = *other;
            return;
        }
        let (na, nb) = (self.n as f64, other.n as f64);
        let n = na + nb;
        let delta = other.mean - self.mean;
        self.m2 += other.m2 + delta * delta * na * nb / n;
        self.mean += delta * nb / n;
        self.n += other.n;
    }

    pub fn count(&self) -> u64 {
        self.n
    }

    pub fn mean(&self) -> f64 {
        self.mean
    }

    /// The sample standard deviation (0 below two values).
    pub fn sd(&self) -> f64 {
        if self.n < 2 {
            0.0
        } else {
            (self.m2 / (self.n - 1) as f64).sqrt()
        }
    }

    /// The mean with its standard error (see [`mean_se`]).
    pub fn estimate(&self) -> Estimate {
        match self.n {
            0 => Estimate::new(0.0, 0.0),
            1 => Estimate::new(self.mean, 0.0),
            n => {
                let nf = n as f64;
                Estimate::new(self.mean, (self.m2 / (nf - 1.0) / nf).sqrt())
            }
        }
    }
}

/// One-sided p-value for H0: mean <= 0 against mean > 0, from a z statistic.
/// A zero standard error with a zero mean carries no evidence (p = 0.5).
pub fn p_greater(est: Estimate) -> f64 {
    if est.se > 0.0 {
        1.0 - normal_cdf(est.estimate / est.se)
    } else if est.estimate > 0.0 {
        0.0
    } else if est.estimate < 0.0 {
        1.0
    } else {
        0.5
    }
}

/// Two-sided p-value for H0: mean = 0.
pub fn p_two_sided(est: Estimate) -> f64 {
    if est.se > 0.0 {
        2.0 * (1.0 - normal_cdf((est.estimate / est.se).abs()))
    } else if est.estimate == 0.0 {
        1.0
    } else {
        0.0
    }
}

/// Holm's step-down procedure: which hypotheses are rejected at family-wise
/// level `alpha` (Holm 1979).
pub fn holm_reject(p_values: &[f64], alpha: f64) -> Vec<bool> {
    let m = p_values.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p_values[a].total_cmp(&p_values[b]));
    let mut reject = vec![false; m];
    for (step, &idx) in order.iter().enumerate() {
        if p_values[idx] <= alpha / (m - step) as f64 {
            reject[idx] = true;
        } else {
            break;
        }
    }
    reject
}

/// Area under the ROC curve of `score` for the 0/1 `label`, ties counted as
/// one half (the Mann–Whitney statistic). Returns 0.5 when one class is empty.
pub fn auc(score: &[f64], label: &[f64]) -> f64 {
    let ranks = average_ranks(score);
    let n1 = label.iter().filter(|&&l| l == 1.0).count() as f64;
    let n0 = label.len() as f64 - n1;
    if n1 == 0.0 || n0 == 0.0 {
        return 0.5;
    }
    let rank_sum: f64 = ranks
        .iter()
        .zip(label)
        .filter(|(_, &l)| l == 1.0)
        .map(|(r, _)| r)
        .sum();
    (rank_sum - n1 * (n1 + 1.0) / 2.0) / (n1 * n0)
}

/// Ranks 1..n with ties given their average rank.
pub fn average_ranks(values: &[f64]) -> Vec<f64> {
    let n = values.len();
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| values[a].total_cmp(&values[b]));
    let mut ranks = vec![0.0; n];
    let mut start = 0;
    while start < n {
        let mut end = start + 1;
        while end < n && values[order[end]] == values[order[start]] {
            end += 1;
        }
        let rank = (start + end + 1) as f64 / 2.0;
        for &i in &order[start..end] {
            ranks[i] = rank;
        }
        start = end;
    }
    ranks
}

/// Kendall's tau-b between two orderings (handles ties in either).
pub fn kendall_tau(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len().min(b.len());
    let (mut concordant, mut discordant, mut ties_a, mut ties_b) = (0.0f64, 0.0f64, 0.0f64, 0.0f64);
    for i in 0..n {
        for j in (i + 1)..n {
            let da = (a[i] - a[j]).signum();
            let db = (b[i] - b[j]).signum();
            if a[i] == a[j] && b[i] == b[j] {
                continue;
            } else if a[i] == a[j] {
                ties_a += 1.0;
            } else if b[i] == b[j] {
                ties_b += 1.0;
            } else if da == db {
                concordant += 1.0;
            } else {
                discordant += 1.0;
            }
        }
    }
    let denom = ((concordant + discordant + ties_a) * (concordant + discordant + ties_b)).sqrt();
    if denom == 0.0 {
        0.0
    } else {
        (concordant - discordant) / denom
    }
}

/// Quantile of already sorted values by linear interpolation (type 7, the
/// default of R and numpy).
pub fn sorted_quantile(sorted: &[f64], q: f64) -> f64 {
    if sorted.is_empty() {
        return 0.0;
    }
    let h = (sorted.len() - 1) as f64 * q.clamp(0.0, 1.0);
    let lo = h.floor() as usize;
    let hi = h.ceil() as usize;
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Handbook values of the standard normal (Abramowitz & Stegun, table 26.5).
    #[test]
    fn normal_quantiles_match_handbook_table() {
        assert!((normal_quantile(0.975) - 1.959964).abs() < 1e-6);
        assert!((normal_quantile(0.95) - 1.644854).abs() < 1e-6);
        assert!((normal_quantile(0.995) - 2.575829).abs() < 1e-6);
        assert!((normal_cdf(1.0) - 0.841345).abs() < 1e-6);
    }

    #[test]
    fn holm_steps_down_and_stops() {
        // alpha 0.05, m = 3: thresholds 0.0167, 0.025, 0.05.
        assert_eq!(
            holm_reject(&[0.01, 0.04, 0.02], 0.05),
            vec![true, true, true]
        );
        assert_eq!(
            holm_reject(&[0.01, 0.04, 0.03], 0.05),
            vec![true, false, false]
        );
        assert_eq!(
            holm_reject(&[0.02, 0.01, 0.5], 0.05),
            vec![true, true, false]
        );
    }

    #[test]
    fn auc_counts_ties_as_half() {
        assert_eq!(auc(&[0.1, 0.4, 0.35, 0.8], &[0.0, 0.0, 1.0, 1.0]), 0.75);
        assert_eq!(auc(&[0.5, 0.5, 0.5, 0.5], &[0.0, 1.0, 0.0, 1.0]), 0.5);
    }

    #[test]
    fn kendall_tau_b_known_values() {
        assert_eq!(kendall_tau(&[1.0, 2.0, 3.0], &[1.0, 2.0, 3.0]), 1.0);
        assert_eq!(kendall_tau(&[1.0, 2.0, 3.0], &[3.0, 2.0, 1.0]), -1.0);
        // One swapped pair of four: (5 - 1) / 6.
        let t = kendall_tau(&[1.0, 2.0, 3.0, 4.0], &[1.0, 3.0, 2.0, 4.0]);
        assert!((t - 4.0 / 6.0).abs() < 1e-12);
    }

    #[test]
    fn mean_se_is_sd_over_root_n() {
        let e = mean_se(&[1.0, 2.0, 3.0, 4.0]);
        assert_eq!(e.estimate, 2.5);
        assert!((e.se - (1.666_666_666_666_666_7_f64 / 4.0).sqrt()).abs() < 1e-12);
    }
}
