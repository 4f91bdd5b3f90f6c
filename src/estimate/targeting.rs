//! Targeting quality: the targeting operator characteristic (TOC), its area
//! (AUTOC) and the Qini-weighted area, with standard errors (Yadlowsky et
//! al., "Evaluating treatment prioritization rules via rank-weighted average
//! treatment effects").
//!
//! TOC(q) = mean phi over the top-q share of units by tau_hat, minus mean phi.
//! On n units the integrals are Riemann sums over q = j/n:
//! AUTOC = (1/n) sum_j TOC(j/n), Qini = (1/n) sum_j (j/n) TOC(j/n).
//! Units with tied predictions cannot be ordered by the model, so within a
//! tie block each position gets the block's mean phi: a model that predicts
//! one value for everyone has TOC = 0 everywhere.
//!
//! Standard errors. Both areas are rank-weighted means of phi,
//! theta = sum over tie blocks B of [A(e_B) - A(s_B)] mean_B(phi), where
//! [s_B, e_B] is the block's share interval from the top and A is the
//! antiderivative of the rank weight alpha: alpha(v) = -ln v - 1,
//! A(v) = -v ln v for AUTOC; alpha(v) = 1/2 - v, A(v) = v/2 - v^2/2 for Qini.
//! The default standard error is the infinitesimal jackknife (Jaeckel 1972;
//! Efron 1982): with g_i the derivative of theta with respect to unit i's
//! weight at equal weights, se = sqrt(sum_i g_i^2). This is the delta-method
//! linearization of the nonparametric bootstrap of the units (multinomial
//! weights have covariance I - 11'/n and the g_i sum to zero), so it
//! estimates the same sampling variance as that bootstrap, in one O(n) pass
//! over the sorted units instead of O(replicates * n). g_i has two parts:
//! unit i's own weight times its deviation from its block mean, and the
//! shift of every block below i when i's mass moves their share intervals
//! down (the ranks are estimated from the same sample). As with the
//! bootstrap, the cross-fitted pseudo-outcomes are held fixed. The
//! bootstrap remains available (`replicates > 0`); tests check that the
//! two agree, and that the jackknife se matches the spread of the areas over
//! repeated samples.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use super::stats::Estimate;

#[derive(Debug, Clone, Serialize)]
pub struct Targeting {
    pub autoc: Estimate,
    pub qini: Estimate,
    pub bootstrap_replicates: usize,
}

/// Units sorted by decreasing prediction, ties by increasing index.
pub fn descending_order(tau_hat: &[f64]) -> Vec<u32> {
    let mut order: Vec<u32> = (0..tau_hat.len() as u32).collect();
    order.sort_by(|&a, &b| {
        tau_hat[b as usize]
            .total_cmp(&tau_hat[a as usize])
            .then(a.cmp(&b))
    });
    order
}

/// Merges a descending order of the units before `first_new` with a
/// descending order of the units from `first_new` on into the order
/// [`descending_order`] gives for all of them (every earlier index is lower,
/// so preferring the earlier units on ties keeps the index tie-break). O(n)
/// instead of a sort: this is what lets a recompute extend a window's orders
/// by a cohort.
pub fn merge_orders(tau_hat: &[f64], earlier: &[u32], later: &[u32]) -> Vec<u32> {
    let mut out = Vec::with_capacity(earlier.len() + later.len());
    let (mut i, mut j) = (0, 0);
    while i < earlier.len() && j < later.len() {
        let (a, b) = (earlier[i], later[j]);
        if tau_hat[b as usize].total_cmp(&tau_hat[a as usize]) == std::cmp::Ordering::Greater {
            out.push(b);
            j += 1;
        } else {
            out.push(a);
            i += 1;
        }
    }
    out.extend_from_slice(&earlier[i..]);
    out.extend_from_slice(&later[j..]);
    out
}

/// A window's pseudo-outcomes and one model's predictions, both in that
/// model's descending order of prediction, with the tie blocks of that
/// order. Gathered once per model and pass: every rank-based metric
/// (targeting areas, their jackknife, calibration groups) then reads them
/// front to back instead of jumping through the order, which at a million
/// units is the difference between cache hits and misses.
pub struct Ranked {
    /// `phi[order[k]]`.
    pub phi: Vec<f64>,
    /// `tau_hat[order[k]]`.
    pub tau: Vec<f64>,
    /// (start, end) positions of runs of equal predictions, as u32: there
    /// can be as many runs as units.
    blocks: Vec<(u32, u32)>,
}

impl Ranked {
    pub fn new(phi: &[f64], tau_hat: &[f64], order: &[u32]) -> Self {
        let phi: Vec<f64> = order.iter().map(|&i| phi[i as usize]).collect();
        let tau: Vec<f64> = order.iter().map(|&i| tau_hat[i as usize]).collect();
        let mut blocks = Vec::new();
        let mut start = 0;
        while start < tau.len() {
            let first = tau[start];
            let mut end = start + 1;
            while end < tau.len() && tau[end] == first {
                end += 1;
            }
            blocks.push((start as u32, end as u32));
            start = end;
        }
        blocks.shrink_to_fit();
        Self { phi, tau, blocks }
    }

    /// The tie blocks in order, as (start, end) positions.
    pub fn blocks(
        &self,
    ) -> impl DoubleEndedIterator<Item = (usize, usize)> + ExactSizeIterator + '_ {
        self.blocks.iter().map(|&(s, e)| (s as usize, e as usize))
    }

    pub fn len(&self) -> usize {
        self.phi.len()
    }

    pub fn is_empty(&self) -> bool {
        self.phi.is_empty()
    }
}

/// AUTOC and Qini for multiplicities `counts` of the ranked units, by
/// position (all ones for the sample itself, multinomial counts for a
/// bootstrap resample).
fn areas(r: &Ranked, counts: &[u32]) -> (f64, f64) {
    let total: f64 = counts.iter().map(|&c| c as f64).sum();
    if total == 0.0 {
        return (0.0, 0.0);
    }
    let overall: f64 = counts
        .iter()
        .zip(&r.phi)
        .map(|(&c, &p)| c as f64 * p)
        .sum::<f64>()
        / total;
    let (mut autoc, mut qini) = (0.0, 0.0);
    let (mut pos, mut cum) = (0.0f64, 0.0f64);
    for (s, e) in r.blocks() {
        let (mut w, mut sum) = (0.0, 0.0);
        for (&c, &p) in counts[s..e].iter().zip(&r.phi[s..e]) {
            w += c as f64;
            sum += c as f64 * p;
        }
        if w == 0.0 {
            continue;
        }
        let block_mean = sum / w;
        for _ in 0..(w as usize) {
            pos += 1.0;
            cum += block_mean;
            let toc = cum / pos - overall;
            autoc += toc;
            qini += (pos / total) * toc;
        }
    }
    (autoc / total, qini / total)
}

/// A rank weight alpha(v) over the top share v, with its antiderivative A
/// (A(0) = 0, A(1) = 0: the weights integrate to zero).
struct RankWeight {
    alpha: fn(f64) -> f64,
    antiderivative: fn(f64) -> f64,
}

const AUTOC_WEIGHT: RankWeight = RankWeight {
    alpha: |v| -v.ln() - 1.0,
    antiderivative: |v| if v > 0.0 { -v * v.ln() } else { 0.0 },
};

const QINI_WEIGHT: RankWeight = RankWeight {
    alpha: |v| 0.5 - v,
    antiderivative: |v| 0.5 * v - 0.5 * v * v,
};

/// Infinitesimal-jackknife standard error of the rank-weighted mean
/// theta = sum_B [A(e_B) - A(s_B)] mean_B (see the module doc).
///
/// With unit weights w (total W), s_B = (mass above B) / W and
/// e_B = s_B + mass(B) / W, the derivative with respect to w_i at w = 1 is
///
///   g_i = (1/n) [ sum_{B below B_i} mean_B (alpha(e_B) - alpha(s_B))
///                 + mean_{B_i} alpha(e_{B_i}) - K ]
///         + [A(e_{B_i}) - A(s_{B_i})] (phi_i - mean_{B_i}) / |B_i|,
///
/// K = sum_B mean_B (alpha(e_B) e_B - alpha(s_B) s_B) (the renormalization
/// of W); alpha(s) s is taken as 0 at s = 0 and alpha(s_B) is never needed
/// for the top block (nothing lies above it).
fn jackknife_se(r: &Ranked, weight: &RankWeight) -> f64 {
    let phi = &r.phi;
    let n = phi.len();
    if n < 2 {
        return 0.0;
    }
    let nf = n as f64;
    let blocks = r.blocks().len();
    // One forward pass: each block's mean, alpha at its end, its share of
    // A, and K. A block starts where the one above it ends, so alpha and A
    // are evaluated once per boundary (the AUTOC weight takes a log, and at
    // a million units with distinct predictions there are a million blocks).
    let mut means = Vec::with_capacity(blocks);
    let mut alpha_end = Vec::with_capacity(blocks);
    let mut own = Vec::with_capacity(blocks);
    let mut k = 0.0;
    let (mut alpha_start, mut a_start) = (0.0, (weight.antiderivative)(0.0));
    for (s, e) in r.blocks() {
        let mean = phi[s..e].iter().sum::<f64>() / (e - s) as f64;
        let (sv, ev) = (s as f64 / nf, e as f64 / nf);
        let (alpha_e, a_e) = ((weight.alpha)(ev), (weight.antiderivative)(ev));
        let low = if s > 0 { alpha_start * sv } else { 0.0 };
        k += mean * (alpha_e * ev - low);
        means.push(mean);
        alpha_end.push(alpha_e);
        own.push((a_e - a_start) / (e - s) as f64);
        (alpha_start, a_start) = (alpha_e, a_e);
    }
    // Backwards, alpha_end[b] becomes block b's shift:
    // (sum over the blocks after b of mean (alpha(e) - alpha(s))
    //  + mean_b alpha(e_b) - K) / n. alpha(s_b) is alpha_end[b - 1], not yet
    // overwritten; the top block (s = 0) adds nothing below it.
    let mut below = 0.0;
    for b in (0..blocks).rev() {
        let alpha_e = alpha_end[b];
        alpha_end[b] = (below + means[b] * alpha_e - k) / nf;
        if b > 0 {
            below += means[b] * (alpha_e - alpha_end[b - 1]);
        }
    }
    let shifts = alpha_end;
    let mut sum_sq = 0.0;
    for (b, (s, e)) in r.blocks().enumerate() {
        let (shift, own, mean) = (shifts[b], own[b], means[b]);
        for &p in &phi[s..e] {
            let g = shift + own * (p - mean);
            sum_sq += g * g;
        }
    }
    sum_sq.sqrt()
}

/// AUTOC and Qini of the prioritization by `tau_hat`. With `replicates` = 0
/// the standard errors are the infinitesimal jackknife (see the module doc);
/// otherwise they come from that many nonparametric bootstrap resamples of
/// the units. Either way the pseudo-outcomes are held fixed, as is usual for
/// cross-fitted scores.
pub fn targeting(phi: &[f64], tau_hat: &[f64], replicates: usize, seed: u64) -> Targeting {
    targeting_ordered(phi, tau_hat, &descending_order(tau_hat), replicates, seed)
}

/// [`targeting`] given the units' [`descending_order`] by `tau_hat`.
pub fn targeting_ordered(
    phi: &[f64],
    tau_hat: &[f64],
    order: &[u32],
    replicates: usize,
    seed: u64,
) -> Targeting {
    debug_assert_eq!(order.len(), phi.len());
    targeting_ranked(&Ranked::new(phi, tau_hat, order), order, replicates, seed)
}

/// [`targeting`] from the units already [`Ranked`] by `order`.
pub fn targeting_ranked(r: &Ranked, order: &[u32], replicates: usize, seed: u64) -> Targeting {
    let n = r.len();
    let (autoc, qini) = areas(r, &vec![1u32; n]);
    if replicates == 0 {
        return Targeting {
            autoc: Estimate::new(autoc, jackknife_se(r, &AUTOC_WEIGHT)),
            qini: Estimate::new(qini, jackknife_se(r, &QINI_WEIGHT)),
            bootstrap_replicates: 0,
        };
    }

    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut counts = vec![0u32; n];
    let mut ranked_counts = vec![0u32; n];
    let (mut sa, mut saa, mut sq, mut sqq) = (0.0, 0.0, 0.0, 0.0);
    for _ in 0..replicates {
        // Units are drawn by index, as a resample of the window is.
        counts.iter_mut().for_each(|c| *c = 0);
        for _ in 0..n {
            counts[rng.gen_range(0..n)] += 1;
        }
        for (rc, &i) in ranked_counts.iter_mut().zip(order) {
            *rc = counts[i as usize];
        }
        let (a, q) = areas(r, &ranked_counts);
        sa += a;
        saa += a * a;
        sq += q;
        sqq += q * q;
    }
    let sd = |s: f64, ss: f64| {
        if replicates < 2 {
            0.0
        } else {
            let r = replicates as f64;
            ((ss - s * s / r) / (r - 1.0)).max(0.0).sqrt()
        }
    };
    Targeting {
        autoc: Estimate::new(autoc, sd(sa, saa)),
        qini: Estimate::new(qini, sd(sq, sqq)),
        bootstrap_replicates: replicates,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The jackknife written straight from its formula, alpha and A
    /// evaluated at every use: the one-pass version must agree with it.
    fn jackknife_by_the_formula(r: &Ranked, weight: &RankWeight) -> f64 {
        let (phi, nf) = (&r.phi, r.len() as f64);
        let blocks: Vec<(usize, usize)> = r.blocks().collect();
        let mean = |&(s, e): &(usize, usize)| phi[s..e].iter().sum::<f64>() / (e - s) as f64;
        let at = |f: fn(f64) -> f64, p: usize| f(p as f64 / nf);
        let k: f64 = blocks
            .iter()
            .map(|b @ &(s, e)| {
                let low = if s > 0 {
                    at(weight.alpha, s) * s as f64 / nf
                } else {
                    0.0
                };
                mean(b) * (at(weight.alpha, e) * e as f64 / nf - low)
            })
            .sum();
        let mut sum_sq = 0.0;
        for (i, b @ &(s, e)) in blocks.iter().enumerate() {
            let below: f64 = blocks[i + 1..]
                .iter()
                .map(|c @ &(cs, ce)| mean(c) * (at(weight.alpha, ce) - at(weight.alpha, cs)))
                .sum();
            let shift = (below + mean(b) * at(weight.alpha, e) - k) / nf;
            let own =
                (at(weight.antiderivative, e) - at(weight.antiderivative, s)) / (e - s) as f64;
            for &p in &phi[s..e] {
                let g = shift + own * (p - mean(b));
                sum_sq += g * g;
            }
        }
        sum_sq.sqrt()
    }

    #[test]
    fn one_pass_jackknife_equals_the_formula() {
        // 300 units, predictions with ties (40 distinct values).
        let n = 300;
        let phi: Vec<f64> = (0..n)
            .map(|i| ((i * 37 % 101) as f64 - 50.0) / 10.0)
            .collect();
        let tau: Vec<f64> = (0..n).map(|i| ((i * 13) % 40) as f64 / 7.0).collect();
        let r = Ranked::new(&phi, &tau, &descending_order(&tau));
        for weight in [&AUTOC_WEIGHT, &QINI_WEIGHT] {
            let (fast, slow) = (
                jackknife_se(&r, weight),
                jackknife_by_the_formula(&r, weight),
            );
            assert!(slow > 0.0);
            assert!((fast - slow).abs() <= 1e-12 * slow, "{fast} vs {slow}");
        }
    }

    #[test]
    fn constant_predictions_have_zero_area() {
        let phi = [1.0, 5.0, -2.0, 0.5];
        let t = targeting(&phi, &[0.3; 4], 50, 1);
        assert!(t.autoc.estimate.abs() < 1e-12);
        assert!(t.qini.estimate.abs() < 1e-12);
        assert!(t.autoc.se < 1e-12);
    }

    #[test]
    fn hand_computed_autoc() {
        // Sorted by tau_hat: phi = 4, 2, 0, -2; mean 1.
        // TOC at j = 1..4: 3, 2, 1, 0 -> AUTOC = 6/4; Qini = (3/4 + 4/4 + 3/4 + 0)/4.
        let phi = [0.0, 4.0, -2.0, 2.0];
        let tau_hat = [0.2, 0.9, 0.1, 0.5];
        let t = targeting(&phi, &tau_hat, 0, 1);
        assert!((t.autoc.estimate - 1.5).abs() < 1e-12);
        assert!((t.qini.estimate - 2.5 / 4.0).abs() < 1e-12);
    }

    #[test]
    fn bootstrap_se_is_reproducible_and_positive() {
        let phi: Vec<f64> = (0..300).map(|i| ((i * 37) % 11) as f64 - 5.0).collect();
        let tau_hat: Vec<f64> = (0..300).map(|i| (i % 17) as f64).collect();
        let a = targeting(&phi, &tau_hat, 100, 9);
        let b = targeting(&phi, &tau_hat, 100, 9);
        assert_eq!(a.autoc.se, b.autoc.se);
        assert!(a.autoc.se > 0.0);
    }

    /// Draws (tau_hat, phi) pairs where phi carries the signal of tau_hat
    /// plus noise; `levels` > 0 rounds tau_hat to that many values (ties).
    fn sample(n: usize, levels: usize, rng: &mut ChaCha8Rng) -> (Vec<f64>, Vec<f64>) {
        let mut tau_hat = Vec::with_capacity(n);
        let mut phi = Vec::with_capacity(n);
        for _ in 0..n {
            let x: f64 = rng.gen_range(-1.0..1.0);
            let t = if levels > 0 {
                (x * levels as f64 / 2.0).round()
            } else {
                x
            };
            let noise: f64 = rng.gen_range(-3.0..3.0);
            tau_hat.push(t);
            phi.push(1.0 + 2.0 * x + noise);
        }
        (tau_hat, phi)
    }

    #[test]
    fn jackknife_se_of_constant_predictions_is_zero() {
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        let (_, phi) = sample(500, 0, &mut rng);
        let t = targeting(&phi, &[0.7; 500], 0, 0);
        assert!(t.autoc.estimate.abs() < 1e-12);
        // Every g_i is a rounding residue of sum(alpha) = 0 times phi.
        assert!(t.autoc.se < 1e-12 && t.qini.se < 1e-12, "{:?}", t);
    }

    #[test]
    fn jackknife_se_agrees_with_the_bootstrap() {
        // The jackknife is the bootstrap's linearization, so the two agree up
        // to the bootstrap's Monte Carlo error (relative sd of an se from B
        // replicates is about 1/sqrt(2B) = 1.6% at B = 2000) and an O(1/n)
        // discreteness term; 8% is five Monte Carlo sds.
        for (levels, seed) in [(0, 11), (4, 12)] {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let (tau_hat, phi) = sample(2000, levels, &mut rng);
            let jack = targeting(&phi, &tau_hat, 0, 0);
            let boot = targeting(&phi, &tau_hat, 2000, 5);
            assert_eq!(jack.autoc.estimate, boot.autoc.estimate);
            for (j, b) in [(jack.autoc.se, boot.autoc.se), (jack.qini.se, boot.qini.se)] {
                assert!((j / b - 1.0).abs() < 0.08, "levels {levels}: {j} vs {b}");
            }
        }
    }

    #[test]
    fn jackknife_se_matches_the_spread_over_repeated_samples() {
        // 600 independent samples of 400 units: the sd of the 600 areas is
        // known to about 1/sqrt(2 * 600) = 3% relative; the mean jackknife se
        // carries an O(1/n) bias. 10% is three of those sds.
        let mut rng = ChaCha8Rng::seed_from_u64(21);
        let (mut a, mut aa, mut q, mut qq, mut se_a, mut se_q) = (0.0, 0.0, 0.0, 0.0, 0.0, 0.0);
        let reps = 600;
        for _ in 0..reps {
            let (tau_hat, phi) = sample(400, 0, &mut rng);
            let t = targeting(&phi, &tau_hat, 0, 0);
            a += t.autoc.estimate;
            aa += t.autoc.estimate * t.autoc.estimate;
            q += t.qini.estimate;
            qq += t.qini.estimate * t.qini.estimate;
            se_a += t.autoc.se;
            se_q += t.qini.se;
        }
        let r = reps as f64;
        let sd = |s: f64, ss: f64| ((ss - s * s / r) / (r - 1.0)).sqrt();
        let (sd_a, sd_q) = (sd(a, aa), sd(q, qq));
        assert!(
            (se_a / r / sd_a - 1.0).abs() < 0.10,
            "{} vs {sd_a}",
            se_a / r
        );
        assert!(
            (se_q / r / sd_q - 1.0).abs() < 0.10,
            "{} vs {sd_q}",
            se_q / r
        );
    }

    #[test]
    fn merged_orders_equal_a_sort_of_the_union() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let (tau_hat, _) = sample(1000, 7, &mut rng);
        let earlier = descending_order(&tau_hat[..600]);
        let later: Vec<u32> = descending_order(&tau_hat[600..])
            .into_iter()
            .map(|i| i + 600)
            .collect();
        assert_eq!(
            merge_orders(&tau_hat, &earlier, &later),
            descending_order(&tau_hat)
        );
    }
}
