//! Three arms, effects that depend on the features, confounded assignment:
//! do the per-contrast intervals cover, does the ranking agree with the
//! truth at least as well as the binary pipeline on each contrast's two
//! arms alone (and as well as the first-order variance of each pipeline's
//! influence function predicts), and does the policy value's interval
//! cover?
//!
//! Design (our own): x ~ N(0, I_3); P(W = k | x) = softmax(0,
//! 0.3 + 0.6 x1 - 0.4 x2, -0.2 - 0.5 x1 + 0.5 x3), so x1, x2, x3 drive both
//! the arm and the outcome; Y = x1 + 0.5 x2 - 0.5 x3 + tau_W(x) + N(0, 1)
//! with tau_0 = 0, tau_1 = 0.5 + 0.8 x1, tau_2 = 0.3 - 0.6 x2 + 0.4 x3.
//! Eight candidate models per contrast: the truth distorted by noise,
//! shrinkage, a shift, a wrong feature, a sign flip, or flat, each with a
//! population PEHE and a population policy value computed once by Monte
//! Carlo over 2,000,000 draws (standard error about 0.0005, against
//! interval half-widths near 0.1).
//!
//! Replications: 600. A coverage of 0.95 over 200 replications has a
//! binomial standard error of about 1.5 points (sqrt(.95 .05 / 200)),
//! enough to tell 0.93 from 0.95 only at about 1.3 standard errors; the
//! eight intervals of a replication are strongly correlated (the policy
//! values share every unit's baseline outcome), so the replication, not the
//! interval, is the unit that counts. At 600 the standard error is about
//! 0.9 points and a true 0.95 falls under 0.93 with chance near 1%. The
//! whole run takes about 40 seconds in release on two cores (the fitted
//! pipelines, then both again with the true nuisance values).

use plumbline::estimate::arms::{
    evaluate_arms, score_arms, ArmModelPredictions, ArmSettings, ArmTable,
};
use plumbline::estimate::blend::{blend_report, BlendReport};
use plumbline::estimate::crossfit::{
    assign_arm_folds, assign_folds, fit_nuisance, ArmNuisance, Nuisance, NuisanceSettings,
};
use plumbline::estimate::learner::{Linear, MultinomialLogistic};
use plumbline::estimate::scoreboard::{score, Scoreboard, Silent};
use plumbline::estimate::stats::{kendall_tau, normal_cdf, standard_normal};
use plumbline::estimate::{
    ModelPredictions, OutcomeKind, Settings, UnitTable, CONSTANT_EFFECT, ZERO_EFFECT,
};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

const UNITS: usize = 3000;
const REPLICATIONS: u64 = 600;
const ARMS: usize = 3;
const COVERAGE_FLOOR: f64 = 0.93;
/// How far a mean Kendall tau may sit from its first-order prediction
/// beyond three standard errors of the mean over the replications: the
/// prediction leaves out the nuisance fit's error and every term of order
/// 1/n. Measured at 600 replications, the four figures sit 0.001 to 0.003
/// from it (about one standard error); at three standard errors plus this
/// the check still tells the arms pipeline's predicted 0.916 on mail from
/// the binary pipeline's 0.934.
const PREDICTION_SLACK: f64 = 0.005;

fn tau(k: usize, x: &[f64]) -> f64 {
    match k {
        1 => 0.5 + 0.8 * x[0],
        2 => 0.3 - 0.6 * x[1] + 0.4 * x[2],
        _ => 0.0,
    }
}

fn baseline(x: &[f64]) -> f64 {
    x[0] + 0.5 * x[1] - 0.5 * x[2]
}

fn propensity(x: &[f64]) -> [f64; ARMS] {
    let eta = [
        0.0,
        0.3 + 0.6 * x[0] - 0.4 * x[1],
        -0.2 - 0.5 * x[0] + 0.5 * x[2],
    ];
    let top = eta.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let e: Vec<f64> = eta.iter().map(|v| (v - top).exp()).collect();
    let total: f64 = e.iter().sum();
    [e[0] / total, e[1] / total, e[2] / total]
}

/// Candidate `m`'s prediction of contrast `k` at `x`, with its own noise
/// draw `z` (standard normal).
fn candidate(m: usize, k: usize, x: &[f64], z: f64) -> f64 {
    let t = tau(k, x);
    let mean = if k == 1 { 0.5 } else { 0.3 };
    match m {
        0 => t,
        1 => 0.5 * t + 0.5 * mean,
        2 => t + 0.3 * z,
        3 => t + 0.8 * z,
        4 => t + 0.4,
        5 => mean + 0.5 * x[2] - 0.3 * x[0],
        6 => 0.4,
        _ => 2.0 * mean - t,
    }
}

const CANDIDATES: usize = 8;
const NAMES: [&str; CANDIDATES] = [
    "exact",
    "shrunk",
    "noisy",
    "very-noisy",
    "shifted",
    "wrong-x",
    "flat",
    "reversed",
];

fn features(rng: &mut impl Rng) -> [f64; 3] {
    [
        standard_normal(rng),
        standard_normal(rng),
        standard_normal(rng),
    ]
}

/// The arm a model's predictions choose at zero cost: the largest positive
/// predicted effect, the reference when none is positive.
fn choice(pred: [f64; 2]) -> usize {
    let mut best = (0, 0.0);
    for (c, &p) in pred.iter().enumerate() {
        if p > best.1 {
            best = (c + 1, p);
        }
    }
    best.0
}

/// Population truths by Monte Carlo: per contrast, the effect's mean and
/// variance and every candidate's PEHE; per candidate, its policy value.
struct Truth {
    mean: [f64; 2],
    var: [f64; 2],
    pehe: [[f64; CANDIDATES]; 2],
    value: [f64; CANDIDATES],
    /// Per contrast: the registered models' Kendall tau each pipeline is
    /// expected to reach on `UNITS` units, to first order (arms, binary);
    /// see [`Pairs`].
    predicted: [(f64, f64); 2],
}

/// Population moments, per contrast and pair of candidates (a, b), behind
/// a first-order prediction of how often each pipeline orders the pair
/// as the population does. With h = (p_a - tau)^2 - (p_b - tau)^2 and
/// d = p_a - p_b, the influence function of the PEHE difference is
/// h - 2 d (phi - tau), phi the pseudo-outcome; with unit outcome noise,
/// Var(phi | x) is s = 1/e_k + 1/e_0 for the arms pipeline on every unit.
/// The binary pipeline scores the units of arms 0 and k, whose features
/// have density w = e_0 + e_k relative to the population's, with
/// propensity e_k / w and so Var(phi | x) = w s. Its estimate centres on
/// E[w h] / E[w] (its own population's difference) with variance
/// (Var_w(h) / E[w] + 4 E[w^2 d^2 s] / E[w]^2) / n, against the arms
/// pipeline's E[h] and (Var(h) + 4 E[d^2 s]) / n. A pair is ordered as
/// the population orders it with chance Phi(sign(E[h]) mean / se), and
/// Kendall's tau (no ties) is the mean over pairs of 2 chance - 1.
#[derive(Clone, Copy, Default)]
struct Pairs {
    h: f64,
    h2: f64,
    d2s: f64,
    w: f64,
    wh: f64,
    wh2: f64,
    w2d2s: f64,
}

impl Pairs {
    fn add(&mut self, h: f64, d: f64, s: f64, w: f64) {
        self.h += h;
        self.h2 += h * h;
        self.d2s += d * d * s;
        self.w += w;
        self.wh += w * h;
        self.wh2 += w * h * h;
        self.w2d2s += w * w * d * d * s;
    }

    /// The chance that each pipeline orders the pair as the population
    /// does, on `units` units, from sums over `n` draws.
    fn chances(&self, n: f64, units: f64) -> (f64, f64) {
        let mean = self.h / n;
        let arms_var = self.h2 / n - mean * mean + 4.0 * self.d2s / n;
        let ew = self.w / n;
        let own = self.wh / self.w;
        let within = self.wh2 / self.w - own * own;
        let binary_var = within / ew + 4.0 * (self.w2d2s / n) / (ew * ew);
        let sign = mean.signum();
        (
            normal_cdf(sign * mean * (units / arms_var).sqrt()),
            normal_cdf(sign * own * (units / binary_var).sqrt()),
        )
    }
}

fn truth() -> Truth {
    let draws = 2_000_000;
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    let (mut s, mut s2) = ([0.0; 2], [0.0; 2]);
    let mut pehe = [[0.0; CANDIDATES]; 2];
    let mut value = [0.0; CANDIDATES];
    let mut pairs = [[[Pairs::default(); CANDIDATES]; CANDIDATES]; 2];
    for _ in 0..draws {
        let x = features(&mut rng);
        let e = propensity(&x);
        let mut pred = [[0.0; 2]; CANDIDATES];
        for k in 1..ARMS {
            let t = tau(k, &x);
            s[k - 1] += t;
            s2[k - 1] += t * t;
            for m in 0..CANDIDATES {
                let p = candidate(m, k, &x, standard_normal(&mut rng));
                pred[m][k - 1] = p;
                pehe[k - 1][m] += (p - t).powi(2);
            }
            let (noise, w) = (1.0 / e[k] + 1.0 / e[0], e[0] + e[k]);
            for a in 0..CANDIDATES {
                for b in a + 1..CANDIDATES {
                    let (pa, pb) = (pred[a][k - 1], pred[b][k - 1]);
                    let h = (pa - t).powi(2) - (pb - t).powi(2);
                    pairs[k - 1][a][b].add(h, pa - pb, noise, w);
                }
            }
        }
        for m in 0..CANDIDATES {
            // E[baseline(X)] = 0 exactly, so only the effect part is
            // drawn: a smaller Monte Carlo error.
            value[m] += tau(choice(pred[m]), &x);
        }
    }
    let n = draws as f64;
    let mean = [s[0] / n, s[1] / n];
    let predicted = pairs.map(|rows| {
        let (mut arms, mut binary, mut count) = (0.0, 0.0, 0.0);
        for (a, row) in rows.iter().enumerate() {
            for p in &row[a + 1..] {
                let (ca, cb) = p.chances(n, UNITS as f64);
                arms += 2.0 * ca - 1.0;
                binary += 2.0 * cb - 1.0;
                count += 1.0;
            }
        }
        (arms / count, binary / count)
    });
    Truth {
        predicted,
        mean,
        var: [s2[0] / n - mean[0] * mean[0], s2[1] / n - mean[1] * mean[1]],
        pehe: pehe.map(|row| row.map(|v| v / n)),
        value: value.map(|v| v / n),
    }
}

struct Data {
    x: Vec<[f64; 3]>,
    arm: Vec<usize>,
    y: Vec<f64>,
    /// `pred[m][c][i]`.
    pred: Vec<Vec<Vec<f64>>>,
}

fn draw(seed: u64) -> Data {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut d = Data {
        x: Vec::with_capacity(UNITS),
        arm: Vec::with_capacity(UNITS),
        y: Vec::with_capacity(UNITS),
        pred: vec![vec![Vec::new(); 2]; CANDIDATES],
    };
    for _ in 0..UNITS {
        let x = features(&mut rng);
        let e = propensity(&x);
        let u: f64 = rng.gen();
        let w = if u < e[0] {
            0
        } else if u < e[0] + e[1] {
            1
        } else {
            2
        };
        d.y.push(baseline(&x) + tau(w, &x) + standard_normal(&mut rng));
        for k in 1..ARMS {
            for m in 0..CANDIDATES {
                let z = standard_normal(&mut rng);
                d.pred[m][k - 1].push(candidate(m, k, &x, z));
            }
        }
        d.x.push(x);
        d.arm.push(w);
    }
    d
}

fn linear_settings(seed: u64) -> Settings {
    Settings {
        nuisance: NuisanceSettings {
            seed,
            propensity_learners: vec![Box::new(Linear::default())],
            outcome_learners: vec![Box::new(Linear::default())],
            ..NuisanceSettings::default()
        },
        draw_share_draws: 200,
        ..Settings::default()
    }
}

struct Rep {
    /// Per contrast: intervals covering, intervals.
    covered: [usize; 2],
    intervals: [usize; 2],
    tau_arms: [f64; 2],
    tau_binary: [f64; 2],
    tau_registered: [(f64, f64); 2],
    /// Against the true PEHE on the units each pipeline scores.
    tau_own: [(f64, f64); 2],
    /// Both pipelines with the true propensities and outcome models in
    /// place of the fitted ones.
    tau_oracle: [(f64, f64); 2],
    value_covered: usize,
    values: usize,
    /// Per candidate: covered (0/1) and (estimate - truth) / se.
    value_z: [(usize, f64); CANDIDATES],
    /// Per candidate: the value in this sample's units (the mean of the
    /// true conditional outcome of the arm chosen) minus the population's.
    sample_gap: [f64; CANDIDATES],
    /// Per contrast: the blend's weight on the exact candidate, whether
    /// the blend-minus-best interval covers its truth on this sample's
    /// units, and that truth.
    blend_exact: [f64; 2],
    blend_covered: [bool; 2],
    blend_gap: [f64; 2],
    /// The same for the binary pipeline's blend on the two arms' units.
    binary_blend_covered: [bool; 2],
    /// Per contrast: registered models whose RMSE lower bound holds, of
    /// how many, and each bound's ratio to the true RMSE.
    bounds_held: [(usize, usize); 2],
    bound_ratios: [Vec<f64>; 2],
}

fn matrix(rows: &[[f64; 3]]) -> ndarray::Array2<f64> {
    ndarray::Array2::from_shape_vec(
        (rows.len(), 3),
        rows.iter().flat_map(|r| r.iter().copied()).collect(),
    )
    .expect("shape")
}

/// The true PEHE of a board's model on the units `units` of this sample:
/// the mean of (prediction - tau)^2, constant-effect predicting `psi`.
fn sample_pehe(d: &Data, c: usize, units: &[usize], name: &str, psi: f64) -> f64 {
    let k = c + 1;
    let m = NAMES.iter().position(|n| *n == name);
    units
        .iter()
        .map(|&i| {
            let t = tau(k, &d.x[i]);
            let p = match (name, m) {
                (ZERO_EFFECT, _) => 0.0,
                (CONSTANT_EFFECT, _) => psi,
                (_, Some(m)) => d.pred[m][c][i],
                _ => f64::NAN,
            };
            (p - t).powi(2)
        })
        .sum::<f64>()
        / units.len() as f64
}

/// The held-out blend's true error on the units `units` (each predicted
/// with the weights fitted without its fold, `folds[j]` for `units[j]`)
/// minus the best single model's: the conditional truth, given the units'
/// features, that the blend-minus-best interval is for.
fn blend_gap(d: &Data, c: usize, units: &[usize], folds: &[usize], blend: &BlendReport) -> f64 {
    let best = NAMES
        .iter()
        .position(|n| *n == blend.best_model)
        .expect("a registered best model");
    units
        .iter()
        .zip(folds)
        .map(|(&i, &fold)| {
            let t = tau(c + 1, &d.x[i]);
            let held_out: f64 = blend
                .weights
                .iter()
                .map(|w| {
                    let m = NAMES.iter().position(|n| *n == w.model).expect("known");
                    w.fold_weights[fold] * d.pred[m][c][i]
                })
                .sum();
            (held_out - t).powi(2) - (d.pred[best][c][i] - t).powi(2)
        })
        .sum::<f64>()
        / units.len() as f64
}

/// Kendall's tau over a board's registered models only (the baselines
/// left out).
fn registered_tau(board: &Scoreboard, estimated: &[f64], truth: &[f64]) -> f64 {
    let registered: Vec<usize> = (0..board.models.len())
        .filter(|&j| !board.models[j].baseline)
        .collect();
    kendall_tau(
        &registered.iter().map(|&j| estimated[j]).collect::<Vec<_>>(),
        &registered.iter().map(|&j| truth[j]).collect::<Vec<_>>(),
    )
}

/// The population's true PEHE of a board's model, constant-effect
/// predicting the board's ATE `psi`.
fn population_pehe(truth: &Truth, c: usize, name: &str, psi: f64) -> f64 {
    let (mean, var) = (truth.mean[c], truth.var[c]);
    match name {
        ZERO_EFFECT => var + mean * mean,
        CONSTANT_EFFECT => var + (psi - mean).powi(2),
        other => NAMES
            .iter()
            .position(|n| *n == other)
            .map_or(f64::NAN, |m| truth.pehe[c][m]),
    }
}

/// Units of contrast `c`'s two arms (the reference and arm c + 1), as the
/// binary pipeline sees them: their indices, their table (treated: arm
/// c + 1) and every candidate's predictions of the contrast.
fn two_arms(d: &Data, c: usize) -> (Vec<usize>, UnitTable, Vec<ModelPredictions>) {
    let k = c + 1;
    let pair: Vec<usize> = (0..UNITS)
        .filter(|&i| d.arm[i] == 0 || d.arm[i] == k)
        .collect();
    let rows: Vec<[f64; 3]> = pair.iter().map(|&i| d.x[i]).collect();
    let binary = UnitTable::new(
        matrix(&rows),
        pair.iter()
            .map(|&i| f64::from(u8::from(d.arm[i] == k)))
            .collect(),
        pair.iter().map(|&i| d.y[i]).collect(),
        None,
        OutcomeKind::Continuous,
    )
    .expect("binary table");
    let preds = (0..CANDIDATES)
        .map(|m| ModelPredictions::new(NAMES[m], pair.iter().map(|&i| d.pred[m][c][i]).collect()))
        .collect();
    (pair, binary, preds)
}

/// A board's ranked estimates and its models' population PEHE (contrast
/// `c`), in the board's order.
fn ranked_and_true(b: &Scoreboard, truth: &Truth, c: usize) -> (Vec<f64>, Vec<f64>) {
    let estimated = b
        .models
        .iter()
        .map(|m| m.scores.ranked().estimate)
        .collect();
    let truths = b
        .models
        .iter()
        .map(|m| population_pehe(truth, c, &m.name, b.ate.estimate))
        .collect();
    (estimated, truths)
}

/// Kendall's tau of both pipelines against the population's ranking, per
/// contrast, with the true nuisance values: the generalized propensity
/// and outcome models for the arms pipeline, P(W = k | x, W in {0, k})
/// and the two arms' outcome models for the binary one.
fn oracle_taus(
    d: &Data,
    truth: &Truth,
    table: &ArmTable,
    names: &[String],
    models: &[ArmModelPredictions],
    settings: &Settings,
) -> [(f64, f64); 2] {
    let nuisance = ArmNuisance {
        propensity: (0..ARMS)
            .map(|k| d.x.iter().map(|x| propensity(x)[k]).collect())
            .collect(),
        outcome: (0..ARMS)
            .map(|k| d.x.iter().map(|x| baseline(x) + tau(k, x)).collect())
            .collect(),
    };
    let board = score_arms(
        table,
        names,
        &nuisance,
        None,
        models,
        settings,
        &[0.0; ARMS],
    );
    let tau_of = |b: &Scoreboard, c: usize| {
        let (estimated, truths) = ranked_and_true(b, truth, c);
        kendall_tau(&estimated, &truths)
    };
    let mut out = [(0.0, 0.0); 2];
    for (c, slot) in out.iter_mut().enumerate() {
        let k = c + 1;
        let (pair, binary, preds) = two_arms(d, c);
        let (true_nuisance, _) = Nuisance::from_parts(
            pair.iter()
                .map(|&i| {
                    let e = propensity(&d.x[i]);
                    e[k] / (e[0] + e[k])
                })
                .collect(),
            pair.iter().map(|&i| baseline(&d.x[i])).collect(),
            pair.iter()
                .map(|&i| baseline(&d.x[i]) + tau(k, &d.x[i]))
                .collect(),
            settings.nuisance.clip,
        );
        let bb = score(&binary, names, &true_nuisance, None, &preds, settings);
        *slot = (tau_of(&board.contrasts[c].board, c), tau_of(&bb, c));
    }
    out
}

fn one_rep(truth: &Truth, seed: u64) -> Rep {
    let d = draw(seed);
    let names: Vec<String> = ["x1", "x2", "x3"].iter().map(|s| s.to_string()).collect();
    let arms: Vec<String> = ["none", "text", "mail"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let table = ArmTable::new(
        matrix(&d.x),
        d.arm.clone(),
        d.y.clone(),
        Vec::new(),
        OutcomeKind::Continuous,
        arms,
    )
    .expect("table");
    let models: Vec<ArmModelPredictions> = (0..CANDIDATES)
        .map(|m| ArmModelPredictions {
            name: NAMES[m].to_string(),
            effects: d.pred[m].iter().cloned().map(Some).collect(),
        })
        .collect();
    let settings = linear_settings(seed);
    let arm_settings = ArmSettings {
        propensity_learners: vec![Box::new(MultinomialLogistic::default())],
        ..ArmSettings::default()
    };
    let board = evaluate_arms(&table, &names, &models, &settings, &arm_settings, &Silent)
        .expect("arms board");
    let mut rep = Rep {
        covered: [0; 2],
        intervals: [0; 2],
        tau_arms: [0.0; 2],
        tau_binary: [0.0; 2],
        tau_registered: [(0.0, 0.0); 2],
        tau_own: [(0.0, 0.0); 2],
        tau_oracle: oracle_taus(&d, truth, &table, &names, &models, &settings),
        value_covered: 0,
        values: 0,
        value_z: [(0, 0.0); CANDIDATES],
        sample_gap: [0.0; CANDIDATES],
        blend_exact: [f64::NAN; 2],
        blend_covered: [false; 2],
        blend_gap: [f64::NAN; 2],
        binary_blend_covered: [false; 2],
        bounds_held: [(0, 0); 2],
        bound_ratios: [Vec::new(), Vec::new()],
    };
    let fold_of_unit = assign_arm_folds(&d.arm, ARMS, settings.nuisance.folds, seed);
    for c in 0..2 {
        let b = &board.contrasts[c].board;
        let pehe_of = |name: &str, psi: f64| population_pehe(truth, c, name, psi);
        let constant = pehe_of(CONSTANT_EFFECT, b.ate.estimate);
        for m in b.models.iter().filter(|m| !m.baseline) {
            let want = pehe_of(&m.name, b.ate.estimate) - constant;
            rep.intervals[c] += 1;
            if m.vs_constant.ci_low <= want && want <= m.vs_constant.ci_high {
                rep.covered[c] += 1;
            }
        }
        let (estimated, true_values) = ranked_and_true(b, truth, c);
        rep.tau_arms[c] = kendall_tau(&estimated, &true_values);
        let everyone: Vec<usize> = (0..UNITS).collect();
        let own: Vec<f64> = b
            .models
            .iter()
            .map(|m| sample_pehe(&d, c, &everyone, &m.name, b.ate.estimate))
            .collect();
        rep.tau_own[c].0 = kendall_tau(&estimated, &own);
        rep.tau_registered[c].0 = registered_tau(b, &estimated, &true_values);
        let levels = b.levels.as_ref().expect("RMSE bounds");
        for level in levels.models.iter() {
            let Some(m) = NAMES.iter().position(|n| *n == level.name) else {
                continue;
            };
            let rmse = truth.pehe[c][m].sqrt();
            rep.bounds_held[c].0 += usize::from(level.rmse_lower_bound <= rmse);
            rep.bounds_held[c].1 += 1;
            if rmse > 0.0 {
                rep.bound_ratios[c].push(level.rmse_lower_bound / rmse);
            }
        }
        let blend = b.blend.as_ref().expect("a blend of eight models");
        rep.blend_exact[c] = blend
            .weights
            .iter()
            .find(|w| w.model == NAMES[0])
            .map_or(f64::NAN, |w| w.weight);
        // The held-out blend's true error on this sample's units (each unit
        // predicted with the weights fitted without its fold) minus the
        // best single model's: the conditional truth the interval is for,
        // given the units' features.
        let everyone: Vec<usize> = (0..UNITS).collect();
        let gap = blend_gap(&d, c, &everyone, &fold_of_unit, blend);
        rep.blend_gap[c] = gap;
        rep.blend_covered[c] = blend.vs_best.ci_low <= gap && gap <= blend.vs_best.ci_high;

        // The binary pipeline on this contrast's two arms alone.
        let (pair, binary, preds) = two_arms(&d, c);
        let (nuisance, report) = fit_nuisance(&binary, &settings.nuisance).expect("binary fit");
        let bb = score(&binary, &names, &nuisance, Some(report), &preds, &settings);
        let (estimated, true_values) = ranked_and_true(&bb, truth, c);
        rep.tau_binary[c] = kendall_tau(&estimated, &true_values);
        let own: Vec<f64> = bb
            .models
            .iter()
            .map(|m| sample_pehe(&d, c, &pair, &m.name, bb.ate.estimate))
            .collect();
        rep.tau_own[c].1 = kendall_tau(&estimated, &own);
        rep.tau_registered[c].1 = registered_tau(&bb, &estimated, &true_values);
        let blend = blend_report(&binary, &nuisance, &preds, &settings, &bb).expect("blend");
        let folds = assign_folds(binary.treatment(), settings.nuisance.folds, seed);
        let gap = blend_gap(&d, c, &pair, &folds, &blend);
        rep.binary_blend_covered[c] = blend.vs_best.ci_low <= gap && gap <= blend.vs_best.ci_high;
    }
    for p in &board.policy.models {
        let m = NAMES
            .iter()
            .position(|n| *n == p.model)
            .expect("known model");
        rep.values += 1;
        let hit = p.value.ci_low <= truth.value[m] && truth.value[m] <= p.value.ci_high;
        rep.value_covered += usize::from(hit);
        rep.value_z[m] = (
            usize::from(hit),
            (p.value.estimate - truth.value[m]) / p.value.se,
        );
        let in_sample = (0..UNITS)
            .map(|i| {
                let arm = choice([d.pred[m][0][i], d.pred[m][1][i]]);
                baseline(&d.x[i]) + tau(arm, &d.x[i])
            })
            .sum::<f64>()
            / UNITS as f64;
        rep.sample_gap[m] = in_sample - truth.value[m];
    }
    rep
}

#[test]
fn three_arms_cover_rank_and_value_policies() {
    let truth = truth();
    let reps: Vec<Rep> = (0..REPLICATIONS)
        .into_par_iter()
        .map(|r| one_rep(&truth, 1000 + r))
        .collect();
    let r = REPLICATIONS as f64;
    let mut failures = Vec::new();
    let mut mean_tau = (0.0, 0.0);
    for c in 0..2 {
        let covered: usize = reps.iter().map(|x| x.covered[c]).sum();
        let intervals: usize = reps.iter().map(|x| x.intervals[c]).sum();
        let coverage = covered as f64 / intervals as f64;
        let tau_arms = reps.iter().map(|x| x.tau_arms[c]).sum::<f64>() / r;
        let tau_binary = reps.iter().map(|x| x.tau_binary[c]).sum::<f64>() / r;
        println!(
            "contrast {}: vs-constant coverage {coverage:.3} over {intervals} intervals \
             ({REPLICATIONS} replications); mean Kendall tau {tau_arms:.3} (arms pipeline) vs \
             {tau_binary:.3} (binary pipeline on the two arms alone)",
            ["text", "mail"][c]
        );
        let ra = reps.iter().map(|x| x.tau_registered[c].0).sum::<f64>() / r;
        let rb = reps.iter().map(|x| x.tau_registered[c].1).sum::<f64>() / r;
        let (pa, pb) = truth.predicted[c];
        let se = |get: &dyn Fn(&Rep) -> f64, mean: f64| {
            (reps.iter().map(|x| (get(x) - mean).powi(2)).sum::<f64>() / (r - 1.0) / r).sqrt()
        };
        let (sa, sb) = (
            se(&|x| x.tau_registered[c].0, ra),
            se(&|x| x.tau_registered[c].1, rb),
        );
        println!(
            "  registered models only: {ra:.3} (se {sa:.4}) vs {rb:.3} (se {sb:.4}); first-order \
             prediction from the population: {pa:.3} vs {pb:.3}"
        );
        for (pipeline, seen, want, se) in [("arms", ra, pa, sa), ("binary", rb, pb, sb)] {
            if (seen - want).abs() > 3.0 * se + PREDICTION_SLACK {
                failures.push(format!(
                    "contrast {c}: the {pipeline} pipeline's registered-model tau {seen:.4} is \
                     not the {want:.4} its first-order variance predicts"
                ));
            }
        }
        let oa = reps.iter().map(|x| x.tau_own[c].0).sum::<f64>() / r;
        let ob = reps.iter().map(|x| x.tau_own[c].1).sum::<f64>() / r;
        println!("  against the true PEHE on the units each scores: {oa:.3} vs {ob:.3}");
        let xa = reps.iter().map(|x| x.tau_oracle[c].0).sum::<f64>() / r;
        let xb = reps.iter().map(|x| x.tau_oracle[c].1).sum::<f64>() / r;
        println!("  with the true nuisance values in both pipelines: {xa:.3} vs {xb:.3}");
        if coverage < COVERAGE_FLOOR {
            failures.push(format!(
                "contrast {c}: coverage {coverage:.3} < {COVERAGE_FLOOR}"
            ));
        }
        mean_tau.0 += tau_arms / 2.0;
        mean_tau.1 += tau_binary / 2.0;
    }
    // Over the two contrasts: the arms pipeline ranks the text contrast
    // better (0.923 against 0.878 at 600 replications) and the mail
    // contrast slightly worse (0.902 against 0.910, about two standard
    // errors of the paired difference); the mean is the claim this design
    // supports. Measured, and why: on the registered models alone the two
    // pipelines tie on text (0.919, 0.917) and the binary one is ahead on
    // mail (0.913, 0.932); the arms pipeline's gain on text is in the
    // baselines, whose truth is the population ATE that it estimates and
    // the binary pipeline (estimating its two arms' units' ATE) does not.
    // The two pipelines score different populations: the arms pipeline
    // every unit, with weights 1/e_k and 1/e_0, which are large where
    // the third arm is likely (mail's e_2 and e_0 are both small where
    // text is likely); the binary pipeline the units of its two arms, in
    // effect weighting x by e_0 + e_k, which downweights exactly those
    // units. Where, as here, both populations order the models alike, the
    // narrower population ranks with less noise; where they order them
    // differently only the arms pipeline targets the population's order.
    // The gap is the populations', not the fit's: with the true
    // propensities and outcome models in place of the fitted ones (both
    // pipelines, the line "with the true nuisance values" above), mail
    // gives 0.905 against 0.912 and text 0.922 against 0.877. And it is
    // the size the influence functions predict (`Pairs`): on the
    // registered models, first-order variances computed from the
    // population give 0.916 (arms) against 0.934 (binary) on mail and
    // 0.918 against 0.917 on text; measured, 0.913 against 0.932 and 0.919
    // against 0.916, each within about one standard error (checked above).
    // For the population's PEHE the generalized AIPW score is efficient, so
    // no estimator of it ranks with less noise than this in large samples;
    // the binary pipeline's lower noise on mail buys a different target.
    println!(
        "mean Kendall tau over the contrasts: {:.3} (arms) vs {:.3} (binary)",
        mean_tau.0, mean_tau.1
    );
    if mean_tau.0 < mean_tau.1 {
        failures.push(format!(
            "mean Kendall tau {:.3} below the binary pipeline's {:.3}",
            mean_tau.0, mean_tau.1
        ));
    }
    // Each contrast's blend of the eight candidates, and the binary
    // pipeline's blend on that contrast's two arms: how often does the
    // interval for blend minus the best single model cover its truth on the
    // units each scores? Measured at 600 replications: 0.867 (text) and
    // 0.848 (mail) for the arms pipeline, 0.858 and 0.853 for the binary
    // one. Both fall short of 0.95 in this design, where the best model is
    // exact and two candidates sit close to it: the true difference is then
    // of second order (the blend's weight errors squared) and the best
    // model is picked on the same data. That is a limit of the blend's
    // interval in this regime, shared by both pipelines, not of the arms
    // pipeline, so the check here is that the arms pipeline's blend covers
    // as often as the binary one's, to within 0.03 (about two standard
    // errors of a paired difference of two shares near 0.86 over 600
    // replications). The weight on the exact candidate is printed: the
    // shrunk and noisy candidates share it on 3,000 units (measured mean
    // weight 0.82 on text, 0.76 on mail).
    for c in 0..2 {
        let covered = reps.iter().filter(|x| x.blend_covered[c]).count() as f64 / r;
        let binary = reps.iter().filter(|x| x.binary_blend_covered[c]).count() as f64 / r;
        let weight = reps.iter().map(|x| x.blend_exact[c]).sum::<f64>() / r;
        let gap = reps.iter().map(|x| x.blend_gap[c]).sum::<f64>() / r;
        println!(
            "contrast {}: blend minus best single model covered in {covered:.3} of \
             replications (binary pipeline's blend {binary:.3}; mean true difference \
             {gap:+.4}); mean blend weight on the exact candidate {weight:.3}",
            ["text", "mail"][c]
        );
        if covered < binary - 0.03 {
            failures.push(format!(
                "contrast {c}: blend-minus-best coverage {covered:.3} below the binary \
                 pipeline's {binary:.3}"
            ));
        }
    }
    // Each contrast's one-sided 95% lower bounds on the registered
    // models' RMSE (the exact model's true RMSE is 0, so its bound holds
    // only at 0): the share that hold, over 7 x 600 bounds per contrast,
    // whose binomial standard error at 0.95 is about 0.3 points (the
    // bounds of a replication are correlated, so read it as about 0.9).
    for c in 0..2 {
        let held: usize = reps.iter().map(|x| x.bounds_held[c].0).sum();
        let bounds: usize = reps.iter().map(|x| x.bounds_held[c].1).sum();
        let share = held as f64 / bounds as f64;
        let mut ratios: Vec<f64> = reps
            .iter()
            .flat_map(|x| x.bound_ratios[c].clone())
            .collect();
        ratios.sort_by(f64::total_cmp);
        let median = ratios.get(ratios.len() / 2).copied().unwrap_or(f64::NAN);
        println!(
            "contrast {}: RMSE lower bound holds for {share:.3} of {bounds} (model, replication) \
             pairs; median ratio to the true RMSE {median:.3}",
            ["text", "mail"][c]
        );
        if share < 0.95 {
            failures.push(format!(
                "contrast {c}: RMSE lower bound held in {share:.3} < 0.95"
            ));
        }
    }
    let covered: usize = reps.iter().map(|x| x.value_covered).sum();
    let values: usize = reps.iter().map(|x| x.values).sum();
    let coverage = covered as f64 / values as f64;
    println!(
        "policy value coverage {coverage:.3} over {values} intervals ({REPLICATIONS} replications)"
    );
    for (m, name) in NAMES.iter().enumerate() {
        let hits: usize = reps.iter().map(|x| x.value_z[m].0).sum();
        let z = reps.iter().map(|x| x.value_z[m].1).sum::<f64>() / r;
        let gap = reps.iter().map(|x| x.sample_gap[m]).sum::<f64>() / r;
        println!(
            "  {name:<11} policy value coverage {:.3}, mean (estimate - truth) / se {z:+.3}, \
             true value {:.4}, mean in-sample value minus it {gap:+.4}",
            hits as f64 / r,
            truth.value[m]
        );
    }
    if coverage < COVERAGE_FLOOR {
        failures.push(format!(
            "policy value coverage {coverage:.3} < {COVERAGE_FLOOR}"
        ));
    }
    assert!(failures.is_empty(), "{}", failures.join("; "));
}
