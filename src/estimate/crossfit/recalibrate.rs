//! The propensity's last stage, cross-fitted fold by fold: a boosted
//! classifier stopped early on a noisy log-loss predicts shrunk towards
//! the treated share, and the inverse weights carry that shrinkage into
//! every pseudo-outcome. Each fold's propensities are mapped through a
//! monotone map fitted on the other folds' out-of-fold propensities and
//! treatments, so a unit's map is fitted without its own treatment.
//!
//! Three last stages compete: the raw score; Platt scaling,
//! logit(p') = a + b logit(p), which stretches a score shrunk evenly on
//! the logit scale; and isotonic regression (pool adjacent violators),
//! any monotone step map, which recovers a step-shaped propensity from a
//! score that ranks its steps but shrinks them unevenly, where a sigmoid
//! cannot. By default the one with the lowest out-of-fold log loss is
//! kept (each unit's loss under a map that never saw its treatment), so
//! a map is used where it helps and the raw score where none does.

use rayon::prelude::*;
use serde::Serialize;

use crate::estimate::learner::{mean_loss, Task};

/// Propensities are kept this far from 0 and 1 before taking logits.
const EDGE: f64 = 1e-6;

/// An isotonic map's values are kept this far from 0 and 1: its end
/// blocks can hold one arm only, and a propensity of exactly 0 or 1 would
/// give an infinite log loss (the weights are clipped further anyway, by
/// `NuisanceSettings::clip`).
const ISOTONIC_EDGE: f64 = 1e-3;

/// The fewest units an isotonic map's end block may hold (see
/// [`isotonic`]).
const END_BLOCK_UNITS: f64 = 50.0;

/// Newton steps of the two-parameter logistic fit; it converges in a
/// handful from the identity map, and stops early once a step is tiny.
const NEWTON_STEPS: usize = 50;

/// A last stage of the fitted propensity.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Recalibration {
    /// The chosen learner's out-of-fold propensity as it is.
    Raw,
    /// A logistic curve in the propensity's logit.
    Platt,
    /// A monotone step map (pool adjacent violators).
    Isotonic,
}

impl Recalibration {
    pub const ALL: [Recalibration; 3] = [
        Recalibration::Raw,
        Recalibration::Platt,
        Recalibration::Isotonic,
    ];

    pub fn name(self) -> &'static str {
        match self {
            Recalibration::Raw => "raw",
            Recalibration::Platt => "platt",
            Recalibration::Isotonic => "isotonic",
        }
    }
}

/// How the propensity's last stage is picked.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RecalibrationChoice {
    /// The candidate of [`Recalibration::ALL`] with the lowest out-of-fold
    /// log loss.
    ByLoss,
    /// This one, whatever the losses.
    Fixed(Recalibration),
}

/// One fold's map from a fitted propensity to a recalibrated one.
#[derive(Debug, Clone)]
pub enum PropensityMap {
    Identity,
    /// logit(p') = a + b logit(p).
    Platt {
        a: f64,
        b: f64,
    },
    /// Blocks of the pooled fit, increasing in the score: the lowest and
    /// highest score of the block and its value. Between blocks the value
    /// is interpolated linearly; beyond the ends it is the end block's.
    Isotonic(Vec<(f64, f64, f64)>),
}

impl PropensityMap {
    pub fn apply(&self, p: f64) -> f64 {
        match self {
            PropensityMap::Identity => p,
            PropensityMap::Platt { a, b } => sigmoid(a + b * logit(p)),
            PropensityMap::Isotonic(blocks) => isotonic_value(blocks, p),
        }
    }
}

fn logit(p: f64) -> f64 {
    let p = p.clamp(EDGE, 1.0 - EDGE);
    (p / (1.0 - p)).ln()
}

fn sigmoid(z: f64) -> f64 {
    1.0 / (1.0 + (-z).exp())
}

/// (a, b) of the logistic regression of `w` on `z` over the units `keep`
/// says to use; the identity (0, 1) if the fit cannot move (a single
/// value of z, or one arm only).
fn platt(z: &[f64], w: &[f64], keep: impl Fn(usize) -> bool) -> (f64, f64) {
    let (mut a, mut b) = (0.0, 1.0);
    for _ in 0..NEWTON_STEPS {
        let (mut g0, mut g1, mut h00, mut h01, mut h11) = (0.0, 0.0, 0.0, 0.0, 0.0);
        for i in (0..z.len()).filter(|&i| keep(i)) {
            let p = sigmoid(a + b * z[i]);
            let r = w[i] - p;
            let v = p * (1.0 - p);
            g0 += r;
            g1 += r * z[i];
            h00 += v;
            h01 += v * z[i];
            h11 += v * z[i] * z[i];
        }
        let det = h00 * h11 - h01 * h01;
        if !(det.is_finite() && det > 1e-12 * (1.0 + h00 * h11)) {
            return (0.0, 1.0);
        }
        let step0 = (h11 * g0 - h01 * g1) / det;
        let step1 = (h00 * g1 - h01 * g0) / det;
        a += step0;
        b += step1;
        if !(a.is_finite() && b.is_finite()) {
            return (0.0, 1.0);
        }
        if step0.abs() + step1.abs() < 1e-10 {
            break;
        }
    }
    (a, b)
}

/// The isotonic (non-decreasing) least-squares fit of `w` on `p` over the
/// units `keep` says to use, by pool adjacent violators, as blocks (see
/// [`PropensityMap::Isotonic`]). Units with the same score share a block.
#[cfg(test)]
fn isotonic(p: &[f64], w: &[f64], keep: impl Fn(usize) -> bool) -> Vec<(f64, f64, f64)> {
    isotonic_sorted(p, w, &sorted_order(p), keep, END_BLOCK_UNITS)
}

/// Every unit's index, in increasing order of its score.
fn sorted_order(p: &[f64]) -> Vec<usize> {
    let mut order: Vec<usize> = (0..p.len()).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    order
}

/// [`isotonic`] given every unit's index in score order (sorted once for
/// all the folds' maps).
fn isotonic_sorted(
    p: &[f64],
    w: &[f64],
    all: &[usize],
    keep: impl Fn(usize) -> bool,
    end_block_units: f64,
) -> Vec<(f64, f64, f64)> {
    let order: Vec<usize> = all.iter().copied().filter(|&i| keep(i)).collect();
    // (lowest score, highest score, sum of w, count)
    let mut blocks: Vec<(f64, f64, f64, f64)> = Vec::new();
    for &i in &order {
        match blocks.last_mut() {
            Some(last) if last.1 == p[i] => {
                last.2 += w[i];
                last.3 += 1.0;
            }
            _ => blocks.push((p[i], p[i], w[i], 1.0)),
        }
        // Pool while the last block's mean is below the one before it.
        while blocks.len() > 1 {
            let n = blocks.len();
            let (prev, last) = (blocks[n - 2], blocks[n - 1]);
            if prev.2 / prev.3 <= last.2 / last.3 {
                break;
            }
            blocks[n - 2] = (prev.0, last.1, prev.2 + last.2, prev.3 + last.3);
            blocks.pop();
        }
    }
    // The end blocks hold at least END_BLOCK_UNITS (or a hundredth of the
    // units): pooled alone, the lowest or highest scores can form a block
    // of a few units of one arm, whose value near 0 or 1 would weight a
    // later unit of the other arm by hundreds. Pooling an end block with
    // its neighbour keeps the map monotone.
    let least = end_block_units.max(order.len() as f64 / 100.0);
    while blocks.len() > 1 && blocks[0].3 < least {
        let (first, next) = (blocks[0], blocks[1]);
        blocks[1] = (first.0, next.1, first.2 + next.2, first.3 + next.3);
        blocks.remove(0);
    }
    while blocks.len() > 1 && blocks[blocks.len() - 1].3 < least {
        let n = blocks.len();
        let (prev, last) = (blocks[n - 2], blocks[n - 1]);
        blocks[n - 2] = (prev.0, last.1, prev.2 + last.2, prev.3 + last.3);
        blocks.pop();
    }
    blocks
        .into_iter()
        .map(|(lo, hi, sum, count)| {
            (
                lo,
                hi,
                (sum / count).clamp(ISOTONIC_EDGE, 1.0 - ISOTONIC_EDGE),
            )
        })
        .collect()
}

fn isotonic_value(blocks: &[(f64, f64, f64)], p: f64) -> f64 {
    let (Some(first), Some(last)) = (blocks.first(), blocks.last()) else {
        return p;
    };
    if p <= first.1 {
        return first.2;
    }
    if p >= last.0 {
        return last.2;
    }
    // The first block whose highest score reaches p.
    let j = blocks.partition_point(|b| b.1 < p);
    let (here, before) = (blocks[j], blocks[j - 1]);
    if p >= here.0 {
        return here.2;
    }
    // Between the blocks' scores: the straight line joining them.
    let t = (p - before.1) / (here.0 - before.1);
    before.2 + t * (here.2 - before.2)
}

/// The position of the lowest of the candidates' losses; ties (and NaN
/// losses) keep the earlier, simpler stage. Binary and with arms.
pub(super) fn lowest_loss(losses: impl Iterator<Item = f64>) -> usize {
    let losses: Vec<f64> = losses.collect();
    (0..losses.len())
        .min_by(|&a, &b| losses[a].total_cmp(&losses[b]).then(a.cmp(&b)))
        .unwrap_or(0)
}

impl RecalibrationChoice {
    /// How a report says the stage was picked.
    pub(super) fn how(self) -> &'static str {
        match self {
            RecalibrationChoice::ByLoss => "chosen by loss",
            RecalibrationChoice::Fixed(_) => "fixed",
        }
    }
}

/// One map per fold, each fitted on the units of every other fold.
fn fit_maps(
    kind: Recalibration,
    p: &[f64],
    w: &[f64],
    fold_of_unit: &[usize],
    folds: usize,
) -> Vec<PropensityMap> {
    match kind {
        Recalibration::Raw => vec![PropensityMap::Identity; folds],
        Recalibration::Platt => {
            let z: Vec<f64> = p.iter().map(|&v| logit(v)).collect();
            (0..folds)
                .into_par_iter()
                .map(|f| {
                    let (a, b) = platt(&z, w, |i| fold_of_unit[i] != f);
                    PropensityMap::Platt { a, b }
                })
                .collect()
        }
        Recalibration::Isotonic => {
            let order = sorted_order(p);
            (0..folds)
                .into_par_iter()
                .map(|f| {
                    PropensityMap::Isotonic(isotonic_sorted(
                        p,
                        w,
                        &order,
                        |i| fold_of_unit[i] != f,
                        END_BLOCK_UNITS,
                    ))
                })
                .collect()
        }
    }
}

/// Each unit's propensity `p[i]` mapped through its fold's map.
fn apply_maps(p: &[f64], fold_of_unit: &[usize], maps: &[PropensityMap]) -> Vec<f64> {
    p.iter()
        .zip(fold_of_unit)
        .map(|(&v, &f)| maps[f].apply(v))
        .collect()
}

/// Each unit's propensity `p[i]` mapped by `kind`'s map fitted on the
/// units of every other fold (`fold_of_unit`, `folds` folds). Public so
/// that simulations can compare the last stages on one fit.
pub fn recalibrate_propensity(
    kind: Recalibration,
    p: &[f64],
    w: &[f64],
    fold_of_unit: &[usize],
    folds: usize,
) -> Vec<f64> {
    apply_maps(p, fold_of_unit, &fit_maps(kind, p, w, fold_of_unit, folds))
}

/// One last stage's out-of-fold log loss.
#[derive(Debug, Clone, Serialize)]
pub struct StageLoss {
    pub stage: Recalibration,
    pub oof_loss: f64,
}

/// Which last stage the propensity got, and every candidate's loss.
#[derive(Debug, Clone, Serialize)]
pub struct RecalibrationReport {
    pub chosen: Recalibration,
    /// "chosen by loss" or "fixed" (set by the settings).
    pub how: &'static str,
    pub candidates: Vec<StageLoss>,
}

/// The propensity's last stage as `choice` says: the recalibrated values,
/// the per-fold maps, and the report. Each candidate's loss is the mean
/// log loss of its cross-fitted values, every unit's value coming from a
/// map fitted on the other folds, as a learner's is from models fitted on
/// the other folds.
pub(super) fn last_stage(
    choice: RecalibrationChoice,
    p: &[f64],
    w: &[f64],
    fold_of_unit: &[usize],
    folds: usize,
) -> (Vec<f64>, Vec<PropensityMap>, RecalibrationReport) {
    let kinds: Vec<Recalibration> = match choice {
        RecalibrationChoice::ByLoss => Recalibration::ALL.to_vec(),
        RecalibrationChoice::Fixed(kind) => vec![kind],
    };
    let mut fits: Vec<(Recalibration, Vec<f64>, Vec<PropensityMap>, f64)> = kinds
        .into_par_iter()
        .map(|kind| {
            let maps = fit_maps(kind, p, w, fold_of_unit, folds);
            let values = apply_maps(p, fold_of_unit, &maps);
            let loss = mean_loss(Task::Classification, w, &values);
            (kind, values, maps, loss)
        })
        .collect();
    let candidates = fits
        .iter()
        .map(|(stage, _, _, oof_loss)| StageLoss {
            stage: *stage,
            oof_loss: *oof_loss,
        })
        .collect();
    let best = lowest_loss(fits.iter().map(|f| f.3));
    let (chosen, values, maps, _) = fits.swap_remove(best);
    let report = RecalibrationReport {
        chosen,
        how: choice.how(),
        candidates,
    };
    (values, maps, report)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};

    fn shrunk_case(seed: u64, n: usize) -> (Vec<f64>, Vec<f64>, Vec<usize>) {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let truth: Vec<f64> = (0..n).map(|_| rng.gen_range(0.1..0.9)).collect();
        let w: Vec<f64> = truth
            .iter()
            .map(|&e| f64::from(u8::from(rng.gen::<f64>() < e)))
            .collect();
        let folds: Vec<usize> = (0..n).map(|i| i % 5).collect();
        (truth, w, folds)
    }

    fn mean_abs_error(v: &[f64], truth: &[f64]) -> f64 {
        v.iter().zip(truth).map(|(a, t)| (a - t).abs()).sum::<f64>() / v.len() as f64
    }

    /// A propensity shrunk halfway towards 1/2 on the logit scale is
    /// stretched back: the map's slope is near 2 and the recalibrated
    /// values near the truth.
    #[test]
    fn a_shrunk_propensity_is_stretched_back() {
        let n = 20_000;
        let (truth, w, folds) = shrunk_case(11, n);
        let shrunk: Vec<f64> = truth.iter().map(|&e| sigmoid(0.5 * logit(e))).collect();
        let z: Vec<f64> = shrunk.iter().map(|&v| logit(v)).collect();
        let (_, b) = platt(&z, &w, |i| folds[i] != 0);
        // The logistic fit's slope on 16,000 units has a standard error
        // near 0.05 here; 0.25 is five of them.
        assert!((b - 2.0).abs() < 0.25, "slope {b}");
        let fixed = recalibrate_propensity(Recalibration::Platt, &shrunk, &w, &folds, 5);
        // Shrunk: mean |error| about 0.08; recalibrated: a few thousandths.
        let (after, before) = (
            mean_abs_error(&fixed, &truth),
            mean_abs_error(&shrunk, &truth),
        );
        assert!(after < 0.02, "{after}");
        assert!(before > 0.05, "{before}");
    }

    /// A step propensity (0.2 or 0.8) behind a score that ranks the two
    /// steps but shrinks them unevenly (0.45..0.5 and 0.5..0.7): the
    /// isotonic map recovers both steps, Platt's one sigmoid cannot, and
    /// the choice by loss picks isotonic.
    #[test]
    fn a_step_propensity_is_recovered_by_the_isotonic_map() {
        let n = 20_000;
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let truth: Vec<f64> = (0..n)
            .map(|_| if rng.gen::<bool>() { 0.8 } else { 0.2 })
            .collect();
        let score: Vec<f64> = truth
            .iter()
            .map(|&e| {
                if e > 0.5 {
                    rng.gen_range(0.5..0.7)
                } else {
                    rng.gen_range(0.45..0.5)
                }
            })
            .collect();
        let w: Vec<f64> = truth
            .iter()
            .map(|&e| f64::from(u8::from(rng.gen::<f64>() < e)))
            .collect();
        let folds: Vec<usize> = (0..n).map(|i| i % 5).collect();
        let iso = recalibrate_propensity(Recalibration::Isotonic, &score, &w, &folds, 5);
        let platt = recalibrate_propensity(Recalibration::Platt, &score, &w, &folds, 5);
        let (iso_error, platt_error) =
            (mean_abs_error(&iso, &truth), mean_abs_error(&platt, &truth));
        // Isotonic: blocks of hundreds of units each, so its error is the
        // binomial noise of their shares (about 0.02); Platt's sigmoid in
        // a score spread unevenly over each step is off by several times
        // that (measured 0.08).
        assert!(iso_error < 0.035, "isotonic {iso_error}");
        assert!(platt_error > 2.0 * iso_error, "platt {platt_error}");
        let (_, _, report) = last_stage(RecalibrationChoice::ByLoss, &score, &w, &folds, 5);
        assert_eq!(report.chosen, Recalibration::Isotonic, "{report:?}");
        assert_eq!(report.candidates.len(), 3);
    }

    /// A propensity that is already calibrated keeps its raw values: no
    /// map lowers the out-of-fold loss by fitting noise.
    #[test]
    fn a_calibrated_propensity_stays_raw() {
        let (truth, w, folds) = shrunk_case(3, 20_000);
        let (values, _, report) = last_stage(RecalibrationChoice::ByLoss, &truth, &w, &folds, 5);
        let raw = report.candidates[0].oof_loss;
        for c in &report.candidates {
            // The maps can win by noise, but only by noise: a few
            // thousandths of a nat over 20,000 units.
            assert!(c.oof_loss > raw - 0.003, "{report:?}");
        }
        assert!(mean_abs_error(&values, &truth) < 0.03);
    }

    /// Pool adjacent violators: a decreasing run is pooled into one block,
    /// values between blocks are interpolated, and end blocks smaller than
    /// the least allowed are pooled inwards.
    #[test]
    fn isotonic_pools_violators() {
        let p = [0.1, 0.2, 0.3, 0.4];
        let w = [0.0, 1.0, 0.0, 1.0];
        let order = sorted_order(&p);
        let blocks = isotonic_sorted(&p, &w, &order, |_| true, 1.0);
        assert_eq!(blocks.len(), 3, "{blocks:?}");
        assert_eq!(blocks[1], (0.2, 0.3, 0.5));
        assert!((isotonic_value(&blocks, 0.15) - (0.001 + 0.5 * (0.5 - 0.001))).abs() < 1e-12);
        assert_eq!(isotonic_value(&blocks, 0.0), ISOTONIC_EDGE);
        assert_eq!(isotonic_value(&blocks, 0.9), 1.0 - ISOTONIC_EDGE);
        // End blocks of at least two units: the lone 0 and the lone 1 at
        // the ends are pooled with the middle block.
        let pooled = isotonic_sorted(&p, &w, &order, |_| true, 2.0);
        assert_eq!(pooled, vec![(0.1, 0.4, 0.5)]);
        // The default least (50 units) pools these four into one block.
        assert_eq!(isotonic(&p, &w, |_| true).len(), 1);
    }

    /// One arm only: no map can be fitted, and the values pass unchanged.
    #[test]
    fn one_arm_leaves_the_values_alone() {
        let p = vec![0.3, 0.4, 0.5, 0.6];
        let out = recalibrate_propensity(Recalibration::Platt, &p, &[1.0; 4], &[0, 1, 0, 1], 2);
        for (a, b) in out.iter().zip(&p) {
            assert!((a - b).abs() < 1e-12);
        }
    }
}
