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

use ndarray::ArrayView2;
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

fn arm_overlap(propensity: &[f64], weights: &[f64]) -> ArmOverlap {
    let mut sorted = propensity.to_vec();
    sorted.sort_by(f64::total_cmp);
    let mut histogram = vec![0; HISTOGRAM_BINS];
    for &p in propensity {
        let b = ((p * HISTOGRAM_BINS as f64) as usize).min(HISTOGRAM_BINS - 1);
        histogram[b] += 1;
    }
    let sum: f64 = weights.iter().sum();
    let sum_sq: f64 = weights.iter().map(|w| w * w).sum();
    let max = weights.iter().copied().fold(0.0, f64::max);
    let units = propensity.len();
    let ess = if sum_sq > 0.0 {
        sum * sum / sum_sq
    } else {
        0.0
    };
    ArmOverlap {
        units,
        quantiles: QUANTILES
            .iter()
            .map(|&q| (q, sorted_quantile(&sorted, q)))
            .collect(),
        histogram,
        effective_sample_size: ess,
        effective_share: if units > 0 { ess / units as f64 } else { 0.0 },
        max_normalized_weight: if sum > 0.0 { max / sum } else { 0.0 },
    }
}

fn weighted_mean_var(values: &[f64], weights: &[f64]) -> (f64, f64) {
    let sw: f64 = weights.iter().sum();
    let mean = values.iter().zip(weights).map(|(v, w)| v * w).sum::<f64>() / sw;
    let var = values
        .iter()
        .zip(weights)
        .map(|(v, w)| w * (v - mean).powi(2))
        .sum::<f64>()
        / sw;
    (mean, var)
}

/// `propensity` should be the clipped values used for weighting.
pub fn overlap_report(
    features: ArrayView2<'_, f64>,
    feature_names: &[String],
    treatment: &[f64],
    propensity: &[f64],
    eps: f64,
) -> OverlapReport {
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

    let ones_t = vec![1.0; treated.len()];
    let ones_c = vec![1.0; control.len()];
    let balance: Vec<FeatureBalance> = (0..features.ncols())
        .map(|j| {
            let col = features.column(j);
            let xt: Vec<f64> = treated.iter().map(|&i| col[i]).collect();
            let xc: Vec<f64> = control.iter().map(|&i| col[i]).collect();
            let (mt, vt) = weighted_mean_var(&xt, &ones_t);
            let (mc, vc) = weighted_mean_var(&xc, &ones_c);
            let (wmt, _) = weighted_mean_var(&xt, &w_t);
            let (wmc, _) = weighted_mean_var(&xc, &w_c);
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
    OverlapReport {
        eps,
        share_outside_eps: outside(eps) as f64 / n.max(1) as f64,
        share_outside_crump: outside(CRUMP_LOW) as f64 / n.max(1) as f64,
        treated: arm_overlap(&p_t, &w_t),
        control: arm_overlap(&p_c, &w_c),
        balance,
        flagged_features,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    #[test]
    fn equal_weights_give_full_effective_size() {
        let x = Array2::from_shape_vec((4, 1), vec![1.0, 2.0, 1.0, 2.0]).expect("shape");
        let r = overlap_report(
            x.view(),
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
        let r = overlap_report(x.view(), &[], &[1.0, 1.0, 0.0], &[0.5, 0.25, 0.5], 0.3);
        assert!((r.treated.effective_sample_size - 1.8).abs() < 1e-12);
        assert!((r.share_outside_eps - 1.0 / 3.0).abs() < 1e-12);
    }
}
