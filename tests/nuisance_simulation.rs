//! Nuisance models on designs where the data are hard: do the
//! model-vs-constant intervals cover, and does the front-runner err within
//! 10% of the best candidate?
//!
//! Three designs of our own, each with one difficulty (d = 6 features,
//! X ~ U(-1, 1)^6, Y = b(X) + (W - 1/2) tau(X) + noise):
//! - `sharp-propensity`, n = 3,000: a sharply nonlinear propensity, bounded
//!   away from 0 and 1 but not smooth in the features:
//!   e = 0.2 + 0.6 * 1{x1 x2 > 0} (a checkerboard, which greedy trees find
//!   late and a logistic fit on smooth terms only approximates), with the
//!   same checkerboard in the outcome, b = 1{x1 x2 > 0} + x3,
//!   tau = 1 + 2 x1, noise N(0, 1);
//! - `confounded-step`, n = 6,000: a confounded assignment and a
//!   step-shaped effect: e = 0.1 + 0.8 / (1 + exp(-2 (x1 + x2))),
//!   b = 2 x1 + x2, tau = 2 * 1{x1 > 0}, noise N(0, 1) (the units that
//!   decide the step are the ones the assignment makes rare in one arm);
//! - `heavy-tails`, n = 12,000: heavy-tailed outcome noise, Student t with
//!   3 degrees of freedom (variance 3), with a smooth propensity
//!   e = 1 / (1 + exp(-(x1 - x2))) and b = x1 + x2^2, tau = 1 + 2 x3.
//!
//! Why these n. At n = 3,000 even the true nuisance values (ORACLE) put
//! the best candidate first in only 0.96 of the confounded-step draws and
//! 0.89 of the heavy-tailed ones (measured): there the shortfall is the
//! scores' own sampling noise, which no nuisance model can remove, so
//! those designs are drawn at the n where the oracle clears 0.95. The
//! sharp propensity stays at n = 3,000, where the oracle clears it
//! (0.98) and the fitted nuisances do not.
//!
//! What was measured at `sharp-propensity` with the raw propensity (RAW
//! below, the default until the propensity's last stage was chosen by
//! loss): coverage 0.882 and front-runner within 1.10 in 0.84 of the
//! draws, against 0.949 and 0.98 for the oracle. The standardised errors
//! have mean +0.10 (the oracle's +0.09) but standard deviation 1.26: the
//! intervals are too narrow, not off centre. Swapping in the true
//! propensity alone (TRUE-E: 0.952, 0.97) or the true outcome
//! regressions alone (0.937, 0.99) restores both, as double robustness
//! says: what is left is the product of the two components' errors.
//! Learners tried in the propensity's place, each added to the library
//! and chosen by out-of-fold loss (coverage, within 1.10): boosted trees
//! of depth 6 at learning rate 0.05 on leaves of 10 (0.894, 0.85); depth
//! 3 with patience 50 (0.884, 0.86); the default with patience 50 (0.890,
//! 0.87); depth 8 on leaves of 5 (0.885, 0.86); stacked learners on an
//! earlier branch (0.874, 0.87); three fold splits (0.863, 0.81). None
//! closes the gap. The report's propensity calibration error was 0.078
//! against a noise level of 0.020 (the true propensity's: 0.018): the
//! fitted propensity is shrunk towards the treated share. Recalibrated
//! fold by fold with Platt's logistic curve (PLATT), coverage is 0.941
//! but the front-runner is the best in 0.93 of the draws, and the
//! calibration error is still 0.067: one sigmoid in the score cannot
//! turn a score that ranks the checkerboard's two cells but spreads each
//! over a range into two steps. An isotonic step map (ISOTONIC) can:
//! calibration error 0.024, coverage 0.954, within 1.10 in 0.96. Its
//! first version, with the end blocks as pool adjacent violators leaves
//! them, reached 0.961 but only 0.82: a few units of one arm at the
//! lowest or highest scores made a block near 0 or 1 and weighted the
//! other arm's units in that fold by up to 100; with end blocks of at
//! least 50 units (or 1% of the units) the share rose to 0.96.
//!
//! DEFAULT picks the last stage by out-of-fold log loss among raw, Platt
//! and isotonic, each unit's value from a map fitted on the other folds.
//! Measured: `sharp-propensity` isotonic in 100 of 100 draws (0.954,
//! 0.96: both targets met); `confounded-step` raw in 86 and isotonic in
//! 14 (0.959, 0.99, against RAW's 0.961, 0.98); `heavy-tails` raw in all
//! 100 (identical to RAW: 0.932, 0.98). So the map switches on where the
//! score is miscalibrated and stays off where it is not.
//!
//! Columns, all on the same draws: DEFAULT, `NuisanceSettings::default()`
//! (one fold split; per component the one learner of linear, quadratic and
//! boosted trees with the lowest out-of-fold loss, and the propensity's
//! last stage chosen by loss); RAW, the same with the raw propensity (the
//! before); PLATT and ISOTONIC, RAW's propensity through that last stage
//! alone, on RAW's folds (what the choice picks from); TRUE-E and
//! TRUE-MU, DEFAULT with the true propensity alone or the true outcome
//! regressions alone swapped in (which component's error costs what);
//! ORACLE, the true propensity and outcome regressions: the figures no
//! nuisance fit can beat. Beside the coverage the test prints the mean
//! and standard deviation of the standardised errors of the
//! model-vs-constant differences, (estimate - truth) / se: a mean away
//! from 0 is bias, a standard deviation above 1 an under-estimated
//! variance. The propensity's rows also print its mean binned
//! calibration error (for ORACLE the true propensity's on the same units)
//! beside its noise level, and the last line of each design how often
//! DEFAULT chose each last stage.
//!
//! Ten candidates per draw (`synth::candidates`: the true effect with
//! noise of several sizes, shrunk towards its mean, or shifted), whose
//! population PEHEs are exact. The best has PEHE 0.0625 Var(tau) and the
//! next 0.1225 Var(tau), so "within 1.10 of the best" means the
//! front-runner is the best candidate. 100 replications per design. Why
//! 100 is enough: the coverage is a share of replications (its ten
//! intervals per replication move together, so count it as 100 draws), and
//! the standard error of a share near 0.9 over 100 draws is
//! sqrt(0.9 * 0.1 / 100) = 0.03, so a coverage of 0.80 sits more than three
//! of them below 0.90; a share near 0.97 of front-runners within 1.10 has
//! standard error 0.017.

use plumbline::estimate::crossfit::{
    assign_fit, binned_calibration, fit_nuisance, recalibrate_propensity, Nuisance,
    NuisanceSettings, Recalibration, RecalibrationChoice, CALIBRATION_BINS,
};
use plumbline::estimate::scoreboard::{score, Settings};
use plumbline::estimate::{ModelPredictions, UnitTable};
use plumbline::synth::{candidates, standard_normal};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

const FEATURES: usize = 6;
const REPLICATIONS: u64 = 100;
const CANDIDATES: usize = 10;

#[derive(Debug, Clone, Copy)]
enum Design {
    SharpPropensity,
    ConfoundedStep,
    HeavyTails,
}

impl Design {
    /// Units per draw (why these, in the module comment).
    fn units(self) -> usize {
        match self {
            Design::SharpPropensity => 3_000,
            Design::ConfoundedStep => 6_000,
            Design::HeavyTails => 12_000,
        }
    }

    fn name(self) -> &'static str {
        match self {
            Design::SharpPropensity => "sharp-propensity",
            Design::ConfoundedStep => "confounded-step",
            Design::HeavyTails => "heavy-tails",
        }
    }

    /// (b, e, tau) at x.
    fn functions(self, x: &[f64]) -> (f64, f64, f64) {
        match self {
            Design::SharpPropensity => {
                let cell = f64::from(u8::from(x[0] * x[1] > 0.0));
                (cell + x[2], 0.2 + 0.6 * cell, 1.0 + 2.0 * x[0])
            }
            Design::ConfoundedStep => {
                let e = 0.1 + 0.8 / (1.0 + (-2.0 * (x[0] + x[1])).exp());
                let step = 2.0 * f64::from(u8::from(x[0] > 0.0));
                (2.0 * x[0] + x[1], e, step)
            }
            Design::HeavyTails => {
                let e = 1.0 / (1.0 + (-(x[0] - x[1])).exp());
                (x[0] + x[1] * x[1], e, 1.0 + 2.0 * x[2])
            }
        }
    }

    fn noise(self, rng: &mut ChaCha8Rng) -> f64 {
        match self {
            Design::HeavyTails => {
                // t with 3 df: a normal over the root of a chi-square / 3.
                let chi: f64 = (0..3).map(|_| standard_normal(rng).powi(2)).sum();
                standard_normal(rng) / (chi / 3.0).sqrt()
            }
            _ => standard_normal(rng),
        }
    }
}

struct Draw {
    features: ndarray::Array2<f64>,
    treatment: Vec<f64>,
    outcome: Vec<f64>,
    tau: Vec<f64>,
    /// The true nuisance values: propensity, mu0 = b - tau/2, mu1 = b + tau/2.
    truth: [Vec<f64>; 3],
}

fn draw(design: Design, n: usize, seed: u64) -> Draw {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut features = ndarray::Array2::zeros((n, FEATURES));
    let (mut treatment, mut outcome, mut tau) = (Vec::new(), Vec::new(), Vec::new());
    let mut truth = [Vec::new(), Vec::new(), Vec::new()];
    let mut x = [0.0; FEATURES];
    for i in 0..n {
        for (j, v) in x.iter_mut().enumerate() {
            *v = rng.gen_range(-1.0..1.0);
            features[[i, j]] = *v;
        }
        let (b, e, t) = design.functions(&x);
        let w = f64::from(u8::from(rng.gen::<f64>() < e));
        outcome.push(b + (w - 0.5) * t + design.noise(&mut rng));
        treatment.push(w);
        tau.push(t);
        truth[0].push(e);
        truth[1].push(b - t / 2.0);
        truth[2].push(b + t / 2.0);
    }
    Draw {
        features,
        treatment,
        outcome,
        tau,
        truth,
    }
}

/// Population mean and variance of tau, by Monte Carlo over 400,000 draws
/// (their Monte Carlo error, below 0.003 of the variance, is far inside
/// every tolerance here).
fn effect_moments(design: Design) -> (f64, f64) {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let n = 400_000;
    let t: Vec<f64> = (0..n)
        .map(|_| {
            let x: Vec<f64> = (0..FEATURES).map(|_| rng.gen_range(-1.0..1.0)).collect();
            design.functions(&x).2
        })
        .collect();
    let mean = t.iter().sum::<f64>() / n as f64;
    let var = t.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n as f64;
    (mean, var)
}

/// One nuisance fit's outcome in one replication.
#[derive(Debug, Clone, Copy, Default)]
struct Outcome {
    covered: usize,
    intervals: usize,
    /// Sum and sum of squares of (estimate - truth) / se over the intervals.
    z_sum: f64,
    z_squares: f64,
    /// The front-runner's true PEHE over the best candidate's.
    ratio: f64,
    /// The propensity's binned calibration error and its noise level, as
    /// the report gives them (zero where not computed).
    calibration: (f64, f64),
    /// The propensity's last stage the fit chose (DEFAULT only).
    stage: Option<Recalibration>,
}

const COLUMNS: [&str; 7] = [
    "DEFAULT", "RAW", "PLATT", "ISOTONIC", "TRUE-E", "TRUE-MU", "ORACLE",
];
const DEFAULT: usize = 0;
const RAW: usize = 1;
const ORACLE: usize = 6;

fn one_replication(design: Design, mean_tau: f64, var_tau: f64, seed: u64) -> [Outcome; 7] {
    let data = draw(design, design.units(), seed);
    let [e, mu0, mu1] = data.truth;
    let defaults = NuisanceSettings::default();
    let clip = defaults.clip;
    let cands = candidates(&data.tau, var_tau, CANDIDATES, seed ^ 0x5eed);
    let table = UnitTable::new(
        data.features,
        data.treatment,
        data.outcome,
        None,
        Default::default(),
    )
    .expect("table");
    let settings = Settings {
        // Only the model-vs-constant intervals and the ranking are read.
        bootstrap_replicates: 0,
        draw_share_draws: 200,
        ..Settings::default()
    };
    let fitted = |propensity_recalibration: RecalibrationChoice| {
        let nuisance = NuisanceSettings {
            seed,
            propensity_recalibration,
            ..NuisanceSettings::default()
        };
        fit_nuisance(&table, &nuisance).expect("nuisance")
    };
    let (after, report) = fitted(NuisanceSettings::default().propensity_recalibration);
    let (raw, raw_report) = fitted(RecalibrationChoice::Fixed(Recalibration::Raw));
    // Each last stage alone, on the raw fit's propensities and its folds
    // (the fit's own, drawn again from its seed): what the choice by loss
    // picks from.
    let folds = assign_fit(
        table.treatment(),
        defaults.folds,
        seed,
        None,
        defaults.folds * defaults.min_units_per_fold,
    )
    .fold_of_unit;
    let stage = |kind: Recalibration| -> (Nuisance, (f64, f64)) {
        let p = recalibrate_propensity(
            kind,
            &raw.propensity,
            table.treatment(),
            &folds,
            defaults.folds,
        );
        let calibration = binned_calibration(&p, table.treatment(), CALIBRATION_BINS);
        let parts = Nuisance::from_parts(p, raw.mu0.clone(), raw.mu1.clone(), clip).0;
        (parts, calibration)
    };
    let (platt, platt_calibration) = stage(Recalibration::Platt);
    let (isotonic, isotonic_calibration) = stage(Recalibration::Isotonic);
    let true_calibration = binned_calibration(&e, table.treatment(), CALIBRATION_BINS);
    let true_e = Nuisance::from_parts(e.clone(), after.mu0.clone(), after.mu1.clone(), clip).0;
    let true_mu = Nuisance::from_parts(after.propensity.clone(), mu0.clone(), mu1.clone(), clip).0;
    let oracle = Nuisance::from_parts(e, mu0, mu1, clip).0;
    let predictions: Vec<ModelPredictions> = cands.iter().map(|c| c.predictions.clone()).collect();
    let names: Vec<String> = (1..=FEATURES).map(|j| format!("x{j}")).collect();
    let best = cands
        .iter()
        .map(|c| c.true_pehe)
        .fold(f64::INFINITY, f64::min);
    let judge = |nuisance: &Nuisance| -> Outcome {
        let board = score(&table, &names, nuisance, None, &predictions, &settings);
        // Constant-effect predicts the estimated ATE psi for everyone: its
        // population PEHE is Var(tau) + (psi - ATE)^2.
        let constant_pehe = var_tau + (board.ate.estimate - mean_tau).powi(2);
        let truth = |name: &str| {
            cands
                .iter()
                .find(|c| c.predictions.name == name)
                .map_or(f64::NAN, |c| c.true_pehe)
        };
        let mut outcome = Outcome::default();
        let mut front = (f64::INFINITY, f64::NAN);
        for m in board.models.iter().filter(|m| !m.baseline) {
            let difference = truth(&m.name) - constant_pehe;
            outcome.intervals += 1;
            if m.vs_constant.ci_low <= difference && difference <= m.vs_constant.ci_high {
                outcome.covered += 1;
            }
            let z = (m.vs_constant.estimate - difference) / m.vs_constant.se;
            outcome.z_sum += z;
            outcome.z_squares += z * z;
            let estimate = m.scores.ranked().estimate;
            if estimate < front.0 {
                front = (estimate, truth(&m.name));
            }
        }
        outcome.ratio = front.1 / best;
        outcome
    };
    let mut outcomes = [
        judge(&after),
        judge(&raw),
        judge(&platt),
        judge(&isotonic),
        judge(&true_e),
        judge(&true_mu),
        judge(&oracle),
    ];
    let calibration = |r: &plumbline::estimate::crossfit::NuisanceReport| {
        (
            r.propensity.calibration_error,
            r.propensity.calibration_noise,
        )
    };
    outcomes[DEFAULT].calibration = calibration(&report);
    outcomes[RAW].calibration = calibration(&raw_report);
    outcomes[2].calibration = platt_calibration;
    outcomes[3].calibration = isotonic_calibration;
    outcomes[ORACLE].calibration = true_calibration;
    outcomes[DEFAULT].stage = report.propensity.recalibration.as_ref().map(|r| r.chosen);
    outcomes
}

/// Per column: coverage, the share of replications whose front-runner is
/// within 1.10 of the best candidate, and the mean and sd of the
/// standardised errors.
struct Figures {
    coverage: [f64; 7],
    within: [f64; 7],
}

fn run(design: Design) -> Figures {
    let (mean_tau, var_tau) = effect_moments(design);
    let results: Vec<[Outcome; 7]> = (0..REPLICATIONS)
        .into_par_iter()
        .map(|r| one_replication(design, mean_tau, var_tau, 5000 + r))
        .collect();
    let mut figures = Figures {
        coverage: [0.0; 7],
        within: [0.0; 7],
    };
    let mut lines = Vec::new();
    for k in 0..COLUMNS.len() {
        let covered: usize = results.iter().map(|r| r[k].covered).sum();
        let intervals: usize = results.iter().map(|r| r[k].intervals).sum();
        let count = intervals.max(1) as f64;
        let z_mean = results.iter().map(|r| r[k].z_sum).sum::<f64>() / count;
        let z_squares = results.iter().map(|r| r[k].z_squares).sum::<f64>() / count;
        figures.coverage[k] = covered as f64 / count;
        figures.within[k] =
            results.iter().filter(|r| r[k].ratio <= 1.10).count() as f64 / results.len() as f64;
        let reps = results.len().max(1) as f64;
        let calibration = (
            results.iter().map(|r| r[k].calibration.0).sum::<f64>() / reps,
            results.iter().map(|r| r[k].calibration.1).sum::<f64>() / reps,
        );
        let calibration = if calibration.1 > 0.0 {
            format!(
                "  propensity calibration error {:.4} (noise {:.4})",
                calibration.0, calibration.1
            )
        } else {
            String::new()
        };
        lines.push(format!(
            "  {:<8} coverage {:.3}  within 1.10 {:.2}  z mean {:+.2} sd {:.2}{calibration}",
            COLUMNS[k],
            figures.coverage[k],
            figures.within[k],
            z_mean,
            (z_squares - z_mean * z_mean).max(0.0).sqrt()
        ));
    }
    let stages: Vec<String> = Recalibration::ALL
        .iter()
        .map(|&k| {
            let count = results
                .iter()
                .filter(|r| r[DEFAULT].stage == Some(k))
                .count();
            format!("{} {count}", k.name())
        })
        .collect();
    eprintln!(
        "{} (n = {}, {REPLICATIONS} replications, {CANDIDATES} candidates; targets: \
         coverage 0.90, within 1.10 0.95)\n{}\n  DEFAULT's last stage of the propensity: {}",
        design.name(),
        design.units(),
        lines.join("\n"),
        stages.join(", ")
    );
    figures
}

/// The figures DEFAULT must reach in every design: the targets, coverage
/// 0.90 and a share of 0.95 within 1.10 of the best, less two standard
/// errors of a share over 100 replications: 2 x 0.03 for coverage near
/// 0.90, and 2 x 0.022 for a share near 0.95. A design whose true
/// coverage is 0.80, or whose front-runner is the best in only 0.85 of
/// the draws (RAW on `sharp-propensity`: 0.84), fails nearly always.
const FLOORS: (f64, f64) = (0.90 - 0.06, 0.95 - 0.044);

#[test]
fn nuisance_fits_keep_coverage_and_the_front_runner_on_hard_designs() {
    let started = std::time::Instant::now();
    let mut failures = Vec::new();
    for design in [
        Design::SharpPropensity,
        Design::ConfoundedStep,
        Design::HeavyTails,
    ] {
        let f = run(design);
        let (coverage, within) = FLOORS;
        if f.coverage[DEFAULT] < coverage {
            failures.push(format!(
                "{} DEFAULT: coverage {:.3} below {coverage:.3}",
                design.name(),
                f.coverage[DEFAULT]
            ));
        }
        if f.within[DEFAULT] < within {
            failures.push(format!(
                "{} DEFAULT: within 1.10 {:.2} below {within:.2}",
                design.name(),
                f.within[DEFAULT]
            ));
        }
        // The design is one the oracle meets: otherwise the figures above
        // would measure the scores' sampling noise, not the nuisance fits.
        if f.coverage[ORACLE] < FLOORS.0 || f.within[ORACLE] < FLOORS.1 {
            failures.push(format!(
                "{}: the oracle reaches only coverage {:.3}, within {:.2}",
                design.name(),
                f.coverage[ORACLE],
                f.within[ORACLE]
            ));
        }
    }
    eprintln!("took {:.0} s", started.elapsed().as_secs_f64());
    assert!(failures.is_empty(), "{failures:?}");
}
