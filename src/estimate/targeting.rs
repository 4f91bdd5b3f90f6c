//! Targeting quality: the targeting operator characteristic (TOC), its area
//! (AUTOC) and the Qini-weighted area, with bootstrap standard errors
//! (Yadlowsky et al., "Evaluating treatment prioritization rules via
//! rank-weighted average treatment effects").
//!
//! TOC(q) = mean phi over the top-q share of units by tau_hat, minus mean phi.
//! On n units the integrals are Riemann sums over q = j/n:
//! AUTOC = (1/n) sum_j TOC(j/n), Qini = (1/n) sum_j (j/n) TOC(j/n).
//! Units with tied predictions cannot be ordered by the model, so within a
//! tie block each position gets the block's mean phi: a model that predicts
//! one value for everyone has TOC = 0 everywhere.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::Serialize;

use super::stats::Estimate;

#[derive(Debug, Clone, Serialize)]
pub struct Targeting {
    pub autoc: Estimate,
    pub qini: Estimate,
    pub bootstrap_replicates: usize,
}

/// Tie blocks of the units sorted by decreasing prediction: (start, end) into
/// `order`.
fn tie_blocks(order: &[usize], tau_hat: &[f64]) -> Vec<(usize, usize)> {
    let mut blocks = Vec::new();
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && tau_hat[order[end]] == tau_hat[order[start]] {
            end += 1;
        }
        blocks.push((start, end));
        start = end;
    }
    blocks
}

#[cfg(test)] // the direct sums that `areas_sorted` is checked against
/// AUTOC and Qini for unit multiplicities `counts` (all ones for the sample
/// itself, multinomial counts for a bootstrap resample).
fn areas(order: &[usize], blocks: &[(usize, usize)], phi: &[f64], counts: &[u32]) -> (f64, f64) {
    let total: f64 = order.iter().map(|&i| counts[i] as f64).sum();
    if total == 0.0 {
        return (0.0, 0.0);
    }
    let overall: f64 = order
        .iter()
        .map(|&i| counts[i] as f64 * phi[i])
        .sum::<f64>()
        / total;
    let (mut autoc, mut qini) = (0.0, 0.0);
    let (mut pos, mut cum) = (0.0f64, 0.0f64);
    for &(s, e) in blocks {
        let (mut w, mut sum) = (0.0, 0.0);
        for &i in &order[s..e] {
            w += counts[i] as f64;
            sum += counts[i] as f64 * phi[i];
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

/// Areas of one ordering whose units are already sorted: `phi[p]` is the
/// pseudo-outcome at position p, `counts[p]` its multiplicity and
/// `harmonic[j]` = 1 + 1/2 + ... + 1/j. The same Riemann sums as [`areas`],
/// in one pass and without a loop over multiplicities: over the T resampled
/// positions j with cumulative sums cum_j,
/// AUTOC = (1/T) sum_j cum_j / j - mean and
/// Qini = (1/T^2) sum_j cum_j - mean (T + 1) / (2T),
/// and a block of w positions after position p0, each adding v to cum
/// (starting from cum0), contributes
/// sum_j cum_j / j = (cum0 - v p0)(H(p0 + w) - H(p0)) + v w and
/// sum_j cum_j = w cum0 + v w (w + 1) / 2.
fn areas_sorted(
    blocks: &[(usize, usize)],
    phi: &[f64],
    counts: &[u32],
    harmonic: &[f64],
) -> (f64, f64) {
    let (mut pos, mut cum, mut ratio_sum, mut cum_sum) = (0usize, 0.0f64, 0.0f64, 0.0f64);
    let mut add = |w: u32, v: f64| {
        let wf = w as f64;
        let next = pos + w as usize;
        ratio_sum += (cum - v * pos as f64) * (harmonic[next] - harmonic[pos]) + v * wf;
        cum_sum += wf * cum + v * wf * (wf + 1.0) / 2.0;
        cum += v * wf;
        pos = next;
    };
    if blocks.len() == phi.len() {
        // No ties: every block is one unit.
        for (&c, &v) in counts.iter().zip(phi) {
            add(c, v);
        }
    } else {
        for &(s, e) in blocks {
            let (mut w, mut sum) = (0u32, 0.0);
            for (&c, &v) in counts[s..e].iter().zip(&phi[s..e]) {
                w += c;
                sum += c as f64 * v;
            }
            if w > 0 {
                add(w, sum / w as f64);
            }
        }
    }
    if pos == 0 {
        return (0.0, 0.0);
    }
    let total = pos as f64;
    let overall = cum / total;
    (
        ratio_sum / total - overall,
        cum_sum / (total * total) - overall * (total + 1.0) / (2.0 * total),
    )
}

/// [`areas_sorted`] for a whole chunk of replicates at once: the
/// replicates' running sums are independent, so interleaving them keeps the
/// processor busy instead of waiting on one chain of additions.
fn areas_chunk(
    blocks: &[(usize, usize)],
    phi: &[f64],
    chunk: &[Vec<u32>],
    harmonic: &[f64],
) -> Vec<(f64, f64)> {
    const R: usize = REPLICATE_CHUNK;
    let counts: [&[u32]; R] = std::array::from_fn(|r| chunk[r].as_slice());
    let mut pos = [0usize; R];
    let (mut cum, mut ratio_sum, mut cum_sum) = ([0.0f64; R], [0.0f64; R], [0.0f64; R]);
    let mut add = |r: usize, w: u32, v: f64| {
        let wf = w as f64;
        let next = pos[r] + w as usize;
        ratio_sum[r] += (cum[r] - v * pos[r] as f64) * (harmonic[next] - harmonic[pos[r]]) + v * wf;
        cum_sum[r] += wf * cum[r] + v * wf * (wf + 1.0) / 2.0;
        cum[r] += v * wf;
        pos[r] = next;
    };
    for &(s, e) in blocks {
        if e - s == 1 {
            let v = phi[s];
            for (r, c) in counts.iter().enumerate() {
                add(r, c[s], v);
            }
        } else {
            for (r, c) in counts.iter().enumerate() {
                let (mut w, mut sum) = (0u32, 0.0);
                for (&c, &v) in c[s..e].iter().zip(&phi[s..e]) {
                    w += c;
                    sum += c as f64 * v;
                }
                if w > 0 {
                    add(r, w, sum / w as f64);
                }
            }
        }
    }
    (0..R)
        .map(|r| {
            if pos[r] == 0 {
                return (0.0, 0.0);
            }
            let total = pos[r] as f64;
            let overall = cum[r] / total;
            (
                ratio_sum[r] / total - overall,
                cum_sum[r] / (total * total) - overall * (total + 1.0) / (2.0 * total),
            )
        })
        .collect()
}

/// H(j) = 1 + 1/2 + ... + 1/j for j = 0..=n.
fn harmonic_numbers(n: usize) -> Vec<f64> {
    let mut h = Vec::with_capacity(n + 1);
    let mut acc = 0.0;
    h.push(0.0);
    for j in 1..=n {
        acc += 1.0 / j as f64;
        h.push(acc);
    }
    h
}

/// One model's ordering, prepared once for all bootstrap replicates.
struct Sorted {
    blocks: Vec<(usize, usize)>,
    phi: Vec<f64>,
}

impl Sorted {
    fn new(phi: &[f64], tau_hat: &[f64]) -> Self {
        let mut order: Vec<usize> = (0..phi.len()).collect();
        order.sort_by(|&a, &b| tau_hat[b].total_cmp(&tau_hat[a]).then(a.cmp(&b)));
        let blocks = tie_blocks(&order, tau_hat);
        let phi = order.iter().map(|&i| phi[i]).collect();
        Self { blocks, phi }
    }
}

/// Replicates drawn at a time (each holds one multiplicity per unit).
const REPLICATE_CHUNK: usize = 8;

/// AUTOC and Qini of the prioritization by each of `predictions`, with
/// standard errors from `replicates` nonparametric bootstrap resamples of the
/// units (the pseudo-outcomes are held fixed, as is usual for cross-fitted
/// scores).
///
/// One set of multinomial draws serves every model: replicate r gives the
/// unit at position p of each model's own ordering multiplicity c_r[p]. The
/// multinomial resample treats units exchangeably, so for each model this is
/// an ordinary bootstrap of its units, at the cost of one set of draws
/// instead of one per model. (Only the marginal standard errors are
/// reported; the replicates are not used jointly across models.)
pub fn targeting_many(
    phi: &[f64],
    predictions: &[&[f64]],
    replicates: usize,
    seed: u64,
) -> Vec<Targeting> {
    let n = phi.len();
    let sorted: Vec<Sorted> = predictions
        .par_iter()
        .map(|tau_hat| Sorted::new(phi, tau_hat))
        .collect();
    let inv = harmonic_numbers(n);
    let ones = vec![1u32; n];
    let point: Vec<(f64, f64)> = sorted
        .iter()
        .map(|s| areas_sorted(&s.blocks, &s.phi, &ones, &inv))
        .collect();

    // Running sums of a, a^2, q, q^2 per model.
    let mut acc = vec![[0.0f64; 4]; sorted.len()];
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut counts: Vec<Vec<u32>> = (0..REPLICATE_CHUNK.min(replicates))
        .map(|_| vec![0u32; n])
        .collect();
    let mut done = 0;
    while done < replicates {
        let len = REPLICATE_CHUNK.min(replicates - done);
        for c in &mut counts[..len] {
            c.iter_mut().for_each(|v| *v = 0);
            for _ in 0..n {
                c[rng.gen_range(0..n)] += 1;
            }
        }
        let chunk = &counts[..len];
        let results: Vec<Vec<(f64, f64)>> = sorted
            .par_iter()
            .map(|s| {
                // One tie block: the model ranks nobody, every area is 0.
                if s.blocks.len() <= 1 {
                    vec![(0.0, 0.0); len]
                } else if len == REPLICATE_CHUNK {
                    areas_chunk(&s.blocks, &s.phi, chunk, &inv)
                } else {
                    chunk
                        .iter()
                        .map(|c| areas_sorted(&s.blocks, &s.phi, c, &inv))
                        .collect()
                }
            })
            .collect();
        for (a, r) in acc.iter_mut().zip(results) {
            for (x, q) in r {
                a[0] += x;
                a[1] += x * x;
                a[2] += q;
                a[3] += q * q;
            }
        }
        done += len;
    }
    let sd = |s: f64, ss: f64| {
        if replicates < 2 {
            0.0
        } else {
            let r = replicates as f64;
            ((ss - s * s / r) / (r - 1.0)).max(0.0).sqrt()
        }
    };
    point
        .into_iter()
        .zip(acc)
        .map(|((autoc, qini), a)| Targeting {
            autoc: Estimate::new(autoc, sd(a[0], a[1])),
            qini: Estimate::new(qini, sd(a[2], a[3])),
            bootstrap_replicates: replicates,
        })
        .collect()
}

/// AUTOC and Qini of the prioritization by `tau_hat`, with bootstrap
/// standard errors ([`targeting_many`] for one model).
pub fn targeting(phi: &[f64], tau_hat: &[f64], replicates: usize, seed: u64) -> Targeting {
    targeting_many(phi, &[tau_hat], replicates, seed)
        .pop()
        .unwrap_or(Targeting {
            autoc: Estimate::new(0.0, 0.0),
            qini: Estimate::new(0.0, 0.0),
            bootstrap_replicates: replicates,
        })
}

#[cfg(test)]
mod tests {
    use super::*;

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
    fn one_pass_areas_match_the_direct_sums() {
        let phi: Vec<f64> = (0..200).map(|i| ((i * 53) % 13) as f64 - 6.0).collect();
        let tau_hat: Vec<f64> = (0..200).map(|i| ((i * 7) % 23) as f64).collect();
        let mut order: Vec<usize> = (0..200).collect();
        order.sort_by(|&a, &b| tau_hat[b].total_cmp(&tau_hat[a]).then(a.cmp(&b)));
        let blocks = tie_blocks(&order, &tau_hat);
        let counts: Vec<u32> = (0..200).map(|i| ((i * 31) % 4) as u32).collect();
        let direct = areas(&order, &blocks, &phi, &counts);
        let sorted = Sorted::new(&phi, &tau_hat);
        let by_position: Vec<u32> = order.iter().map(|&i| counts[i]).collect();
        let inv = harmonic_numbers(400);
        let fast = areas_sorted(&sorted.blocks, &sorted.phi, &by_position, &inv);
        assert!((direct.0 - fast.0).abs() < 1e-12 && (direct.1 - fast.1).abs() < 1e-12);
        // Distinct predictions take the one-unit-per-block path.
        let distinct: Vec<f64> = (0..200).map(|i| ((i * 89) % 200) as f64).collect();
        order.sort_by(|&a, &b| distinct[b].total_cmp(&distinct[a]).then(a.cmp(&b)));
        let blocks = tie_blocks(&order, &distinct);
        let direct = areas(&order, &blocks, &phi, &counts);
        let sorted = Sorted::new(&phi, &distinct);
        assert_eq!(sorted.blocks.len(), 200);
        let by_position: Vec<u32> = order.iter().map(|&i| counts[i]).collect();
        let fast = areas_sorted(&sorted.blocks, &sorted.phi, &by_position, &inv);
        assert!((direct.0 - fast.0).abs() < 1e-12 && (direct.1 - fast.1).abs() < 1e-12);
    }

    #[test]
    fn interleaved_replicates_match_one_at_a_time() {
        let n = 300;
        let phi: Vec<f64> = (0..n).map(|i| ((i * 37) % 11) as f64 - 5.0).collect();
        let chunk: Vec<Vec<u32>> = (0..REPLICATE_CHUNK)
            .map(|r| (0..n).map(|i| ((i * (r + 3)) % 3) as u32).collect())
            .collect();
        let h = harmonic_numbers(2 * n);
        // Every unit its own block, and a mix of singletons and tie blocks.
        let untied: Vec<(usize, usize)> = (0..n).map(|i| (i, i + 1)).collect();
        let mut mixed: Vec<(usize, usize)> = (0..100).map(|i| (i, i + 1)).collect();
        mixed.extend((100..n).step_by(5).map(|i| (i, (i + 5).min(n))));
        for blocks in [untied, mixed] {
            let together = areas_chunk(&blocks, &phi, &chunk, &h);
            for (c, t) in chunk.iter().zip(together) {
                assert_eq!(areas_sorted(&blocks, &phi, c, &h), t);
            }
        }
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
}
