//! The RMSE lower bound of `estimate::level` on published designs with
//! known effects: does it stay below each model's true RMSE at least 95%
//! of the time, and how close does it come?
//!
//! Designs: the four setups A to D of Nie & Wager (2021), "Quasi-oracle
//! estimation of heterogeneous treatment effects" (definitions in
//! `src/synth.rs`, recalled from memory of the paper), 2,000 units, six
//! features, unit outcome noise, through the real `evaluate()` with the
//! default nuisance library (ridge / logistic, their second-degree
//! expansion, boosted trees; first-fold screening on). The 800 cross-fits
//! take 70 to 90 s on two cores in the test profile.
//!
//! Candidate models per replication, each with its true RMSE known:
//! the true effect (RMSE 0); the true effect plus independent normal noise
//! of sd 0.5, 1 and 2 times sd(tau) (1 where tau is constant): RMSE that
//! sd exactly; the constant population ATE (RMSE sd(tau)); and the best
//! linear fit of tau on the features, fitted once per design on 20,000
//! independent units, its RMSE by Monte Carlo over 400,000 more.
//!
//! Replications: 200 per design, six models each, 1,200 model-replications
//! per design and 4,800 pooled. The six models of one replication share
//! its data and nuisance fit, so they are not independent: the binomial sd
//! of a 95% coverage rate lies between sqrt(0.95 * 0.05 / 1200) = 0.0063
//! (independent) and sqrt(0.95 * 0.05 / 200) = 0.0154 (the six moving
//! together) per design, and between 0.0031 and 0.0077 pooled. The bound
//! is conservative by construction (the sieve sees only part of the
//! plug-in model's error, and the standard error errs on the wide side),
//! so its coverage should sit above 95%: we assert at least 0.95 pooled,
//! where a bound whose true coverage were 90% would fall 6 to 16 sd
//! short, and at least 0.93 per design, 1.3 to 3.2 sd below nominal,
//! which leaves room for one design near nominal while still failing a
//! bound that covers 90% of the time in that design by 2 to 5 sd. The
//! coverage of each model is printed too: where a model's own error
//! dwarfs the plug-in model's (the largest noise), the part of the
//! plug-in error the sieve misses matters little and the bound's coverage
//! is close to its nominal 95%; where it does not, the bound is wider.

use std::time::Instant;

use ndarray::Array2;
use plumbline::estimate::crossfit::NuisanceSettings;
use plumbline::estimate::learner::ridge_fit;
use plumbline::estimate::scoreboard::{Settings, Silent};
use plumbline::estimate::{evaluate, ModelPredictions, UnitTable};
use plumbline::synth::{draw, effect_moments, standard_normal, Design};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

const UNITS: usize = 2000;
const FEATURES: usize = 6;
const REPLICATIONS: u64 = 200;
const NOISE: [f64; 3] = [0.5, 1.0, 2.0];

/// What a design's candidate models need besides the draw.
struct Truth {
    design: Design,
    mean_tau: f64,
    sd_tau: f64,
    /// Best linear fit of tau: intercept, then one coefficient per feature.
    linear: Vec<f64>,
    linear_rmse: f64,
}

fn linear_prediction(coef: &[f64], x: &Array2<f64>) -> Vec<f64> {
    x.outer_iter()
        .map(|row| coef[0] + row.iter().zip(&coef[1..]).map(|(a, b)| a * b).sum::<f64>())
        .collect()
}

fn truth(design: Design) -> Truth {
    let (mean_tau, var_tau) = effect_moments(design, 400_000, 99);
    let fit_on = draw(design, 20_000, FEATURES, 0.0, 7);
    let fit = ridge_fit(fit_on.features.view(), &fit_on.tau, 0.0).expect("linear fit");
    let mut linear = vec![fit.intercept];
    linear.extend(fit.coef);
    let check = draw(design, 400_000, FEATURES, 0.0, 8);
    let predicted = linear_prediction(&linear, &check.features);
    let pehe = predicted
        .iter()
        .zip(&check.tau)
        .map(|(a, b)| (a - b).powi(2))
        .sum::<f64>()
        / check.tau.len() as f64;
    Truth {
        design,
        mean_tau,
        sd_tau: var_tau.sqrt(),
        linear,
        linear_rmse: pehe.sqrt(),
    }
}

/// One model-replication: its bound, its true RMSE.
struct Outcome {
    model: String,
    bound: f64,
    rmse: f64,
}

/// One replication: every candidate's bound and true RMSE, and the
/// sieve's share of the plug-in model's own error on these units.
fn replicate(t: &Truth, seed: u64) -> (Vec<Outcome>, f64) {
    let data = draw(t.design, UNITS, FEATURES, 1.0, seed);
    let scale = if t.sd_tau > 1e-9 { t.sd_tau } else { 1.0 };
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5eed);
    let mut models = vec![(ModelPredictions::new("truth", data.tau.clone()), 0.0)];
    for c in NOISE {
        let effects = data
            .tau
            .iter()
            .map(|&v| v + c * scale * standard_normal(&mut rng))
            .collect();
        models.push((
            ModelPredictions::new(format!("noise-{c}"), effects),
            c * scale,
        ));
    }
    models.push((
        ModelPredictions::new("constant", vec![t.mean_tau; UNITS]),
        t.sd_tau,
    ));
    models.push((
        ModelPredictions::new("linear", linear_prediction(&t.linear, &data.features)),
        t.linear_rmse,
    ));
    let table = UnitTable::new(
        data.features,
        data.treatment,
        data.outcome,
        None,
        Default::default(),
    )
    .expect("table");
    let settings = Settings {
        nuisance: NuisanceSettings {
            seed,
            ..NuisanceSettings::default()
        },
        draw_share_draws: 200,
        ..Settings::default()
    };
    let names: Vec<String> = (1..=FEATURES).map(|j| format!("x{j}")).collect();
    let predictions: Vec<ModelPredictions> = models.iter().map(|(m, _)| m.clone()).collect();
    let board = evaluate(&table, &names, &predictions, &settings, &Silent).expect("evaluate");
    let levels = board.levels.as_ref().expect("evaluate fills the levels");
    let outcomes = models
        .iter()
        .map(|(m, rmse)| {
            let level = levels
                .models
                .iter()
                .find(|l| l.name == m.name)
                .expect("a level per model");
            Outcome {
                model: m.name.clone(),
                bound: level.rmse_lower_bound,
                rmse: *rmse,
            }
        })
        .collect();
    // The plug-in PEHE of the true effect is mean (tau - tau_tilde)^2 on
    // these units: the plug-in model's own error.
    let plugin_error = board
        .models
        .iter()
        .find(|m| m.name == "truth")
        .and_then(|m| m.scores.get("plugin_pehe"))
        .expect("truth is scored")
        .estimate;
    (
        outcomes,
        levels.plugin_error_projection.estimate / plugin_error,
    )
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    if v.is_empty() {
        f64::NAN
    } else {
        v[v.len() / 2]
    }
}

/// Coverage of the one-sided 95% RMSE bound, and how tight it is: see the
/// file's documentation for the replications and the coverage floors.
///
/// The median ratio bound / true RMSE over the models with a nonzero
/// RMSE must be at least 0.4 in setups B, C and D, where the models' errors
/// are large against the bound's standard error; a bound stuck at 0 (or a
/// sieve that saw none of the plug-in error) would fail it. Setup A's
/// effect varies little (sd(tau) = 0.20, against outcome noise 1 and
/// propensities down to 0.1), so at 2,000 units its candidates' PEHEs
/// (0.01 to 0.17) are within about two standard errors of 0 and the bound
/// is mostly 0 there: its ratio is printed, not asserted.
#[test]
fn rmse_bound_covers_on_published_designs() {
    let started = Instant::now();
    let (mut covered_all, mut total_all) = (0usize, 0usize);
    let mut failures = Vec::new();
    for (design, ratio_floor) in [
        (Design::NieWagerA, None),
        (Design::NieWagerB, Some(0.4)),
        (Design::NieWagerC, Some(0.4)),
        (Design::NieWagerD, Some(0.4)),
    ] {
        let t = truth(design);
        let reps: Vec<(Vec<Outcome>, f64)> = (0..REPLICATIONS)
            .into_par_iter()
            .map(|r| replicate(&t, 10_000 + r))
            .collect();
        let outcomes: Vec<&Outcome> = reps.iter().flat_map(|(o, _)| o).collect();
        let covered = outcomes.iter().filter(|o| o.bound <= o.rmse).count();
        let coverage = covered as f64 / outcomes.len() as f64;
        let ratios: Vec<f64> = outcomes
            .iter()
            .filter(|o| o.rmse > 1e-9)
            .map(|o| o.bound / o.rmse)
            .collect();
        let n_ratios = ratios.len();
        let ratio = median(ratios);
        let seen = median(reps.iter().map(|(_, s)| *s).collect());
        eprintln!(
            "{:<12} coverage {coverage:.3} ({covered} of {} model-replications, {REPLICATIONS} \
             replications), median bound / true RMSE {ratio:.3} (over {n_ratios}), median share \
             of the plug-in error seen by the sieve {seen:.3}, linear model RMSE {:.3}",
            design.key(),
            outcomes.len(),
            t.linear_rmse
        );
        let per_model: Vec<String> = reps[0]
            .0
            .iter()
            .map(|first| {
                let own: Vec<&&Outcome> =
                    outcomes.iter().filter(|o| o.model == first.model).collect();
                let hit = own.iter().filter(|o| o.bound <= o.rmse).count();
                format!("{} {:.3}", first.model, hit as f64 / own.len() as f64)
            })
            .collect();
        eprintln!("{:<12} coverage by model: {}", "", per_model.join(", "));
        covered_all += covered;
        total_all += outcomes.len();
        if coverage < 0.93 {
            failures.push(format!("{}: coverage {coverage:.3} < 0.93", design.key()));
        }
        if let Some(floor) = ratio_floor {
            if ratio.is_nan() || ratio < floor {
                failures.push(format!(
                    "{}: median ratio {ratio:.3} < {floor}",
                    design.key()
                ));
            }
        }
    }
    let pooled = covered_all as f64 / total_all as f64;
    eprintln!(
        "pooled coverage {pooled:.3} over {total_all} model-replications; {:.0} s",
        started.elapsed().as_secs_f64()
    );
    if pooled < 0.95 {
        failures.push(format!("pooled coverage {pooled:.3} < 0.95"));
    }
    assert!(failures.is_empty(), "{failures:?}");
}
