//! Published simulation designs with known effects: do the intervals cover
//! and does the ranking agree with the truth?
//!
//! Designs: Nie & Wager (2021) setups A, B and D and the heterogeneous design
//! of Wager & Athey (2018) (definitions in `src/synth.rs`, recalled from
//! memory of the papers). Candidate models are the true effect distorted by
//! independent noise, shrinkage or a shift, so their population PEHE is known
//! exactly (see `synth::candidates`).

use plumbline::estimate::crossfit::{fit_nuisance, NuisanceSettings};
use plumbline::estimate::scoreboard::{score, Settings};
use plumbline::estimate::stats::kendall_tau;
use plumbline::estimate::{ModelPredictions, UnitTable, CONSTANT_EFFECT, ZERO_EFFECT};
use plumbline::synth::{candidates, draw, effect_moments, Design};
use rayon::prelude::*;

const UNITS: usize = 2000;
const FEATURES: usize = 6;
const REPETITIONS: u64 = 50;
const CANDIDATES: usize = 7;

struct Rep {
    covered: usize,
    intervals: usize,
    tau: f64,
    no_heterogeneity: bool,
}

fn settings(seed: u64) -> Settings {
    Settings {
        nuisance: NuisanceSettings {
            seed,
            ..NuisanceSettings::default()
        },
        // Targeting bootstraps are not checked here.
        bootstrap_replicates: 0,
        draw_share_draws: 200,
        ..Settings::default()
    }
}

fn one_rep(design: Design, mean_tau: f64, var_tau: f64, seed: u64, models: usize) -> Rep {
    let data = draw(design, UNITS, FEATURES, 1.0, seed);
    let cands = candidates(&data.tau, var_tau, CANDIDATES, seed ^ 0xabc);
    let cands: Vec<_> = cands.into_iter().take(models).collect();
    let table = UnitTable::new(
        data.features.clone(),
        data.treatment.clone(),
        data.outcome.clone(),
        None,
        Default::default(),
    )
    .expect("table");
    let s = settings(seed);
    let (nuisance, report) = fit_nuisance(&table, &s.nuisance).expect("nuisance");
    let preds: Vec<ModelPredictions> = cands.iter().map(|c| c.predictions.clone()).collect();
    let names: Vec<String> = (1..=FEATURES).map(|j| format!("x{j}")).collect();
    let board = score(&table, &names, &nuisance, Some(report), &preds, &s);

    // Population PEHE of the baselines: constant-effect predicts the
    // estimated ATE psi for everyone, so its PEHE is Var(tau) + (psi - ATE)^2.
    let psi = board.ate.estimate;
    let constant_pehe = var_tau + (psi - mean_tau).powi(2);
    let truth = |name: &str| -> f64 {
        match name {
            ZERO_EFFECT => var_tau + mean_tau * mean_tau,
            CONSTANT_EFFECT => constant_pehe,
            other => cands
                .iter()
                .find(|c| c.predictions.name == other)
                .map(|c| c.true_pehe)
                .unwrap_or(f64::NAN),
        }
    };
    let (mut covered, mut intervals) = (0, 0);
    for m in board.models.iter().filter(|m| !m.baseline) {
        let true_difference = truth(&m.name) - constant_pehe;
        intervals += 1;
        if m.vs_constant.ci_low <= true_difference && true_difference <= m.vs_constant.ci_high {
            covered += 1;
        }
    }
    let estimated: Vec<f64> = board
        .models
        .iter()
        .map(|m| m.scores.ranked().estimate)
        .collect();
    let true_values: Vec<f64> = board.models.iter().map(|m| truth(&m.name)).collect();
    Rep {
        covered,
        intervals,
        tau: kendall_tau(&estimated, &true_values),
        no_heterogeneity: board.no_detectable_heterogeneity,
    }
}

fn run_design(design: Design, reps: u64, models: usize) -> (f64, f64, f64) {
    let (mean_tau, var_tau) = effect_moments(design, 400_000, 99);
    let results: Vec<Rep> = (0..reps)
        .into_par_iter()
        .map(|r| one_rep(design, mean_tau, var_tau, 1000 + r, models))
        .collect();
    let covered: usize = results.iter().map(|r| r.covered).sum();
    let intervals: usize = results.iter().map(|r| r.intervals).sum();
    let tau = results.iter().map(|r| r.tau).sum::<f64>() / results.len() as f64;
    let flagged =
        results.iter().filter(|r| r.no_heterogeneity).count() as f64 / results.len() as f64;
    (covered as f64 / intervals as f64, tau, flagged)
}

/// 95% intervals of model-minus-constant-effect differences must cover the
/// true difference at least 90% of the time over 50 seeded repetitions of
/// each design (7 candidates each: 350 intervals per design). Nominal is
/// 95%; the 90% floor allows for the finite-sample nuisance error at
/// n = 2,000 and for Monte Carlo error (binomial sd about 1.2 points).
///
/// Setup A is the exception, with a floor of 0.85: there the propensity
/// sin(pi X1 X2) also drives the outcome, and at n = 2,000 the product of
/// the propensity and outcome-model errors is about as large as a standard
/// error. Measured with this pipeline: coverage 0.900 in setup A (0.871
/// before the quadratic learner joined the library), and with the
/// linear and boosted learners alone even the plain AIPW ATE interval
/// covered only about 83% there (mean z-bias about +1 at n = 2,000 and
/// 10,000 alike), recovering to nominal when either nuisance was replaced by
/// the truth. The floor sits about three binomial standard errors below the
/// measured value; the figures are printed.
///
/// Kendall's tau between the estimated and the true ranking of all nine
/// models (seven candidates and two baselines): the candidates' true PEHEs
/// are spread geometrically (noise sd 0.25 to 2 times sd(tau), shrink, shift),
/// so adjacent models differ by several standard errors in designs B, D and
/// Wager–Athey and a floor of 0.6 (at most about 7 of the 36 pairs out of
/// order) is a low bar there. Design A has weak heterogeneity (Var(tau) =
/// 1/24 against unit noise), so its pairs are closer and its floor is 0.3;
/// a random ranking would average 0.
#[test]
fn intervals_cover_and_rankings_agree_on_published_designs() {
    let mut failures = Vec::new();
    for (design, coverage_floor, tau_floor) in [
        (Design::NieWagerA, 0.85, 0.3),
        (Design::NieWagerB, 0.90, 0.6),
        (Design::NieWagerD, 0.90, 0.6),
        (Design::WagerAtheyHeterogeneous, 0.90, 0.6),
    ] {
        let (coverage, tau, _) = run_design(design, REPETITIONS, CANDIDATES);
        eprintln!(
            "{:<28} coverage {:.3} over {} intervals, mean Kendall tau {:.3}",
            design.key(),
            coverage,
            REPETITIONS as usize * CANDIDATES,
            tau
        );
        if coverage < coverage_floor {
            failures.push(format!(
                "{}: coverage {coverage:.3} < {coverage_floor}",
                design.key()
            ));
        }
        if tau < tau_floor {
            failures.push(format!(
                "{}: Kendall tau {tau:.3} < {tau_floor}",
                design.key()
            ));
        }
    }
    assert!(failures.is_empty(), "{failures:?}");
}

/// Where the effect is constant (Nie & Wager setup C, tau = 1) or zero
/// (Wager & Athey's confounded design), candidates that only add noise to it
/// never beat constant-effect, so the "no detectable heterogeneity" state
/// must be raised; the test behind it has family-wise level 0.05, so it may
/// fail to be raised in about 5% of repetitions; we require 85% over 30.
#[test]
fn constant_effects_raise_no_detectable_heterogeneity() {
    for design in [Design::NieWagerC, Design::WagerAtheyConfounded] {
        // The first candidate ("sharp") adds noise; so do "noisy" (third)
        // and "rough" (fifth); take the first one only to keep it pure noise.
        let (_, _, flagged) = run_design(design, 30, 1);
        eprintln!(
            "{:<28} no detectable heterogeneity in {:.2} of runs",
            design.key(),
            flagged
        );
        assert!(flagged >= 0.85, "{}: flagged {flagged}", design.key());
    }
}
