//! Overlap (positivity) diagnostics of the propensity and the weights it
//! implies.
//!
//! - quantiles and a histogram of the propensity per arm;
//! - share of units outside [eps, 1 - eps] (eps = 0.05 by default), and
//!   outside [0.1, 0.9], the trimming rule of thumb of Crump, Hotz, Imbens &
//!   Mitnik (2009), common practice rather than a law;
//! - Kish effective sample size per arm, (sum w)^2 / sum w^2, as a share of
//!   the arm, with w = 1/pi for treated and 1/(1 - pi) for controls;
//! - the largest normalized weight per arm;
//! - weighted standardized mean difference per feature, flagged above 0.1
//!   (Austin 2009, a rule of thumb): weighted means per arm over the pooled
//!   standard deviation sqrt((s1^2 + s0^2) / 2) of the unweighted arms.

use super::data::FeatureRows;
use serde::Serialize;

use super::stats::sorted_quantile;

pub const CRUMP_LOW: f64 = 0.1;
pub const SMD_FLAG: f64 = 0.1;
const HISTOGRAM_BINS: usize = 20;
const QUANTILES: [f64; 9] = [0.0, 0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99, 1.0];

#[derive(Debug, Clone, Serialize)]
pub struct ArmOverlap {
    pub units: usize,
    /// (probability, quantile of the propensity) pairs.
    pub quantiles: Vec<(f64, f64)>,
    /// Counts of propensities in 20 equal bins over [0, 1].
    pub histogram: Vec<usize>,
    pub effective_sample_size: f64,
    pub effective_share: f64,
    pub max_normalized_weight: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct FeatureBalance {
    pub feature: String,
    pub smd_unweighted: f64,
    pub smd_weighted: f64,
    pub flagged: bool,
}

#[derive(Debug, Clone, Serialize)]
pub struct OverlapReport {
    pub eps: f64,
    pub share_outside_eps: f64,
    pub share_outside_crump: f64,
    pub treated: ArmOverlap,
    pub control: ArmOverlap,
    pub balance: Vec<FeatureBalance>,
    pub flagged_features: usize,
}

/// One arm's part of [`OverlapSums`].
#[derive(Debug, Clone)]
struct ArmSums {
    /// The arm's propensities, sorted (for the quantiles).
    sorted: Vec<f64>,
    histogram: Vec<usize>,
    sum_w: f64,
    sum_w2: f64,
    max_w: f64,
    /// Per feature: unweighted mean and centered sum of squares.
    mean: Vec<f64>,
    m2: Vec<f64>,
    /// Per feature: sum of w x.
    weighted: Vec<f64>,
}

impl ArmSums {
    fn new(features: usize) -> Self {
        Self {
            sorted: Vec::new(),
            histogram: vec![0; HISTOGRAM_BINS],
            sum_w: 0.0,
            sum_w2: 0.0,
            max_w: 0.0,
            mean: vec![0.0; features],
            m2: vec![0.0; features],
            weighted: vec![0.0; features],
        }
    }

    /// Adds the units `rows` of `features` with weights `w` from
    /// propensities `p`: the batch's moments first, then a merge (Chan,
    /// Golub & LeVeque), so that batches combine exactly up to rounding.
    fn add(&mut self, features: FeatureRows<'_>, rows: &[usize], p: &[f64], w: &[f64]) {
        if rows.is_empty() {
            return;
        }
        let mut batch = p.to_vec();
        batch.sort_by(f64::total_cmp);
        self.sorted = merge_sorted(&self.sorted, &batch);
        for &v in p {
            let b = ((v * HISTOGRAM_BINS as f64) as usize).min(HISTOGRAM_BINS - 1);
            self.histogram[b] += 1;
        }
        self.sum_w += w.iter().sum::<f64>();
        self.sum_w2 += w.iter().map(|w| w * w).sum::<f64>();
        self.max_w = w.iter().copied().fold(self.max_w, f64::max);
        let d = self.mean.len();
        let nb = rows.len() as f64;
        let (mut sum, mut wsum, mut ss) = (vec![0.0; d], vec![0.0; d], vec![0.0; d]);
        for (&i, &wi) in rows.iter().zip(w) {
            for (j, &x) in features.row(i).iter().enumerate() {
                sum[j] += x;
                wsum[j] += wi * x;
            }
        }
        let batch_mean: Vec<f64> = sum.iter().map(|s| s / nb).collect();
        for &i in rows {
            for (j, &x) in features.row(i).iter().enumerate() {
                ss[j] += (x - batch_mean[j]).powi(2);
            }
        }
        let na = (self.sorted.len() - rows.len()) as f64;
        let n = na + nb;
        for j in 0..d {
            let delta = batch_mean[j] - self.mean[j];
            self.m2[j] += ss[j] + delta * delta * na * nb / n;
            self.mean[j] += delta * nb / n;
            self.weighted[j] += wsum[j];
        }
    }

    fn units(&self) -> usize {
        self.sorted.len()
    }

    /// Unweighted mean and (population) variance, and the weighted mean, of
    /// feature j; NaN for an empty arm.
    fn moments(&self, j: usize) -> (f64, f64, f64) {
        let n = self.units() as f64;
        if self.units() == 0 {
            return (f64::NAN, f64::NAN, f64::NAN);
        }
        (self.mean[j], self.m2[j] / n, self.weighted[j] / self.sum_w)
    }

    fn report(&self) -> ArmOverlap {
        let units = self.units();
        let ess = if self.sum_w2 > 0.0 {
            self.sum_w * self.sum_w / self.sum_w2
        } else {
            0.0
        };
        ArmOverlap {
            units,
            quantiles: QUANTILES
                .iter()
                .map(|&q| (q, sorted_quantile(&self.sorted, q)))
                .collect(),
            histogram: self.histogram.clone(),
            effective_sample_size: ess,
            effective_share: if units > 0 { ess / units as f64 } else { 0.0 },
            max_normalized_weight: if self.sum_w > 0.0 {
                self.max_w / self.sum_w
            } else {
                0.0
            },
        }
    }
}

fn merge_sorted(a: &[f64], b: &[f64]) -> Vec<f64> {
    let mut out = Vec::with_capacity(a.len() + b.len());
    let (mut i, mut j) = (0, 0);
    while i < a.len() && j < b.len() {
        if b[j].total_cmp(&a[i]).is_lt() {
            out.push(b[j]);
            j += 1;
        } else {
            out.push(a[i]);
            i += 1;
        }
    }
    out.extend_from_slice(&a[i..]);
    out.extend_from_slice(&b[j..]);
    out
}

/// The sums behind an [`OverlapReport`], mergeable over batches of units:
/// counts, histograms, weight sums, per-feature moments per arm, and each
/// arm's sorted propensities (the quantiles need them; merging sorted runs
/// is linear). A window that grows by a cohort adds the cohort only.
#[derive(Debug, Clone)]
pub struct OverlapSums {
    eps: f64,
    units: usize,
    outside_eps: usize,
    outside_crump: usize,
    treated: ArmSums,
    control: ArmSums,
}

impl OverlapSums {
    pub fn new(features: usize, eps: f64) -> Self {
        Self {
            eps,
            units: 0,
            outside_eps: 0,
            outside_crump: 0,
            treated: ArmSums::new(features),
            control: ArmSums::new(features),
        }
    }

    /// Adds a batch of units (rows of `features`, with their treatment and
    /// clipped propensity).
    pub fn add(&mut self, features: FeatureRows<'_>, treatment: &[f64], propensity: &[f64]) {
        let n = treatment.len();
        let treated: Vec<usize> = (0..n).filter(|&i| treatment[i] == 1.0).collect();
        let control: Vec<usize> = (0..n).filter(|&i| treatment[i] == 0.0).collect();
        let p_t: Vec<f64> = treated.iter().map(|&i| propensity[i]).collect();
        let p_c: Vec<f64> = control.iter().map(|&i| propensity[i]).collect();
        let w_t: Vec<f64> = p_t.iter().map(|p| 1.0 / p).collect();
        let w_c: Vec<f64> = p_c.iter().map(|p| 1.0 / (1.0 - p)).collect();
        let outside = |lo: f64| {
            propensity
                .iter()
                .filter(|&&p| p < lo || p > 1.0 - lo)
                .count()
        };
        self.units += n;
        self.outside_eps += outside(self.eps);
        self.outside_crump += outside(CRUMP_LOW);
        self.treated.add(features, &treated, &p_t, &w_t);
        self.control.add(features, &control, &p_c, &w_c);
    }

    pub fn report(&self, feature_names: &[String]) -> OverlapReport {
        let d = self.treated.mean.len();
        let balance: Vec<FeatureBalance> = (0..d)
            .map(|j| {
                let (mt, vt, wmt) = self.treated.moments(j);
                let (mc, vc, wmc) = self.control.moments(j);
                let pooled = ((vt + vc) / 2.0).sqrt();
                let smd = |d: f64| if pooled > 0.0 { d / pooled } else { 0.0 };
                let smd_weighted = smd(wmt - wmc);
                FeatureBalance {
                    feature: feature_names
                        .get(j)
                        .cloned()
                        .unwrap_or_else(|| format!("x{j}")),
                    smd_unweighted: smd(mt - mc),
                    smd_weighted,
                    flagged: smd_weighted.abs() > SMD_FLAG,
                }
            })
            .collect();
        let flagged_features = balance.iter().filter(|b| b.flagged).count();
        let n = self.units.max(1) as f64;
        OverlapReport {
            eps: self.eps,
            share_outside_eps: self.outside_eps as f64 / n,
            share_outside_crump: self.outside_crump as f64 / n,
            treated: self.treated.report(),
            control: self.control.report(),
            balance,
            flagged_features,
        }
    }
}

/// `propensity` should be the clipped values used for weighting.
pub fn overlap_report(
    features: FeatureRows<'_>,
    feature_names: &[String],
    treatment: &[f64],
    propensity: &[f64],
    eps: f64,
) -> OverlapReport {
    let mut sums = OverlapSums::new(features.width(), eps);
    sums.add(features, treatment, propensity);
    sums.report(feature_names)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    fn rows(x: &Array2<f64>) -> FeatureRows<'_> {
        FeatureRows::of_matrix(x.view()).expect("row-major")
    }

    #[test]
    fn equal_weights_give_full_effective_size() {
        let x = Array2::from_shape_vec((4, 1), vec![1.0, 2.0, 1.0, 2.0]).expect("shape");
        let r = overlap_report(
            rows(&x),
            &["a".into()],
            &[1.0, 1.0, 0.0, 0.0],
            &[0.5; 4],
            0.05,
        );
        assert!((r.treated.effective_share - 1.0).abs() < 1e-12);
        assert!((r.treated.max_normalized_weight - 0.5).abs() < 1e-12);
        assert_eq!(r.share_outside_eps, 0.0);
        assert_eq!(r.balance[0].smd_weighted, 0.0);
    }

    #[test]
    fn kish_ess_of_unequal_weights() {
        // Treated propensities 0.5 and 0.25 -> weights 2 and 4: ESS = 36/20.
        let x = Array2::zeros((3, 1));
        let r = overlap_report(rows(&x), &[], &[1.0, 1.0, 0.0], &[0.5, 0.25, 0.5], 0.3);
        assert!((r.treated.effective_sample_size - 1.8).abs() < 1e-12);
        assert!((r.share_outside_eps - 1.0 / 3.0).abs() < 1e-12);
    }

    #[test]
    fn batches_merge_to_the_whole() {
        let n = 300;
        let x = Array2::from_shape_fn((n, 2), |(i, j)| ((i * (j + 3)) % 17) as f64 + 100.0);
        let w: Vec<f64> = (0..n).map(|i| ((i * 7) % 3 == 0) as u8 as f64).collect();
        let p: Vec<f64> = (0..n)
            .map(|i| 0.05 + 0.9 * ((i * 13) % 101) as f64 / 100.0)
            .collect();
        let names = ["a".to_string(), "b".to_string()];
        let whole = overlap_report(rows(&x), &names, &w, &p, 0.05);
        let mut sums = OverlapSums::new(2, 0.05);
        for (lo, hi) in [(0, 110), (110, 111), (111, n)] {
            sums.add(
                rows(&x.slice(ndarray::s![lo..hi, ..]).to_owned()),
                &w[lo..hi],
                &p[lo..hi],
            );
        }
        let merged = sums.report(&names);
        // Rounding only: values are O(1) and built from O(300) terms.
        for (a, b) in whole.balance.iter().zip(&merged.balance) {
            assert!((a.smd_weighted - b.smd_weighted).abs() < 1e-12);
            assert!((a.smd_unweighted - b.smd_unweighted).abs() < 1e-12);
        }
        assert_eq!(whole.treated.quantiles, merged.treated.quantiles);
        assert_eq!(whole.control.histogram, merged.control.histogram);
        assert!(
            (whole.treated.effective_sample_size - merged.treated.effective_sample_size).abs()
                < 1e-9
        );
        assert_eq!(whole.share_outside_eps, merged.share_outside_eps);
    }
}
