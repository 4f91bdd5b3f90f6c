//! Blends through the real `evaluate()`, on a design whose models' errors
//! are known functions of the features, so every blend's true PEHE is known
//! exactly.
//!
//! Design (per replication, 4,000 units): X ~ U(-1, 1)^3, propensity
//! logistic(0.5 X2 + 0.25 X3) (0.35 to 0.65), mu0 = 0.5 + X1 + 0.5 X3,
//! tau = 1 + X2, Y = mu0 + W tau + N(0, 1). Model k predicts tau + a_k
//! g_k(X) with g_1 = sqrt(2) sin(pi X1), g_2 = sqrt(2) cos(pi X1),
//! g_3 = sqrt(3) X2: each has mean 0 and mean square 1, and any two are
//! orthogonal (E[g_j g_k] = 0). A blend with weights w (summing to one) has
//! error sum_k w_k a_k g_k, so its true PEHE is sum_k w_k^2 a_k^2, exactly.
//!
//! The nuisance library is the linear learner alone (ridge for the outcomes,
//! L2 logistic for the propensity): the design is linear in X, so it is
//! correctly specified, and the boosted learner of the default library would
//! multiply the run time several times over without changing what is
//! checked here (the blend, not the nuisance fit).

use plumbline::estimate::crossfit::NuisanceSettings;
use plumbline::estimate::learner::{Learner, Linear};
use plumbline::estimate::scoreboard::Silent;
use plumbline::estimate::stats::standard_normal;
use plumbline::estimate::{evaluate, ModelPredictions, Scoreboard, Settings, UnitTable};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

const UNITS: usize = 4000;

/// Replications of the two-model scenario, which checks coverage. Its
/// coverage was measured beforehand at 93.7% with 4,000 units (11,000
/// replications on other seeds; 93.2%, 94.0% and 93.9% in three runs) and
/// at 92.6% with 2,000 units (6,000 replications): under nominal, from
/// choosing the best model on the same data (the plain pairwise interval
/// covered 95.0% in the same runs), by a shortfall that shrinks as the
/// units grow (the weights' lean is of order 1/sqrt(n) in standard errors).
/// At 5,000 replications the binomial sd of a 93.7% coverage is 0.34
/// points, so the 93% floor sits 2 sd below it (a run on fresh seeds fails
/// about 2% of the time), while an interval that covered 91% (sd 0.40
/// points) would reach 93% with probability below 0.01%. With 1,000
/// replications (sd 0.77 points) the floor would sit under one sd below
/// the measured rate.
const COVERAGE_REPLICATIONS: u64 = 5000;

/// Replications of the exact-model scenario: at 1,000 the binomial sd of a
/// rate near 94% is 0.75 points, so the 90% floor is five sd below the
/// measured rate, and a rate of 85% would reach it with probability below
/// 0.01%.
const EXACT_REPLICATIONS: u64 = 1000;

fn error_function(k: usize, x: &[f64]) -> f64 {
    match k {
        1 => 2f64.sqrt() * (std::f64::consts::PI * x[0]).sin(),
        2 => 2f64.sqrt() * (std::f64::consts::PI * x[0]).cos(),
        3 => 3f64.sqrt() * x[1],
        _ => 0.0,
    }
}

/// One replication: the data, models with error sizes `sizes[k]` on
/// functions `functions[k]` (0 = exact), scored by `evaluate()`.
fn replicate(seed: u64, functions: &[usize], sizes: &[f64]) -> Scoreboard {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut features = ndarray::Array2::zeros((UNITS, 3));
    let (mut treatment, mut outcome) = (Vec::new(), Vec::new());
    let mut effects: Vec<Vec<f64>> = vec![Vec::with_capacity(UNITS); sizes.len()];
    for i in 0..UNITS {
        let x: Vec<f64> = (0..3).map(|_| rng.gen_range(-1.0..1.0)).collect();
        for (j, v) in x.iter().enumerate() {
            features[[i, j]] = *v;
        }
        let propensity = 1.0 / (1.0 + (-(0.5 * x[1] + 0.25 * x[2])).exp());
        let w = if rng.gen::<f64>() < propensity {
            1.0
        } else {
            0.0
        };
        let tau = 1.0 + x[1];
        outcome.push(0.5 + x[0] + 0.5 * x[2] + w * tau + standard_normal(&mut rng));
        treatment.push(w);
        for ((column, &k), a) in effects.iter_mut().zip(functions).zip(sizes) {
            column.push(tau + a * error_function(k, &x));
        }
    }
    let table = UnitTable::new(features, treatment, outcome, None, Default::default())
        .expect("a valid table");
    let models: Vec<ModelPredictions> = effects
        .into_iter()
        .enumerate()
        .map(|(k, e)| ModelPredictions::new(format!("model-{k}"), e))
        .collect();
    let linear: Vec<Box<dyn Learner>> = vec![Box::new(Linear::default())];
    let settings = Settings {
        nuisance: NuisanceSettings {
            seed,
            propensity_learners: linear.iter().map(|l| l.boxed_clone()).collect(),
            outcome_learners: linear,
            ..NuisanceSettings::default()
        },
        // draw_share is not checked here.
        draw_share_draws: 100,
        ..Settings::default()
    };
    let names: Vec<String> = (1..=3).map(|j| format!("x{j}")).collect();
    evaluate(&table, &names, &models, &settings, &Silent).expect("a scoreboard")
}

/// True PEHE of a blend with `weights` on models of error sizes `sizes`.
fn pehe(weights: &[f64], sizes: &[f64]) -> f64 {
    weights
        .iter()
        .zip(sizes)
        .map(|(w, a)| (w * a).powi(2))
        .sum()
}

/// What one replication's blend report says, against the truth.
struct Outcome {
    /// True PEHE of the held-out blend (each fold's weights on its units,
    /// weighted by fold size) over that of the best single model.
    held_out_ratio: f64,
    /// The same for the weights fitted on every unit.
    deployed_ratio: f64,
    covered: bool,
    /// Weight of model-0 fitted on every unit.
    first_weight: f64,
}

fn judge(board: &Scoreboard, sizes: &[f64]) -> Outcome {
    let blend = board.blend.as_ref().expect("a blend of two or more models");
    assert!(blend.converged);
    let n: usize = blend.fold_units.iter().sum();
    let held_out: f64 = blend
        .fold_units
        .iter()
        .enumerate()
        .map(|(f, &units)| {
            let w: Vec<f64> = blend.weights.iter().map(|m| m.fold_weights[f]).collect();
            units as f64 / n as f64 * pehe(&w, sizes)
        })
        .sum();
    let deployed: Vec<f64> = blend.weights.iter().map(|m| m.weight).collect();
    let best = blend
        .weights
        .iter()
        .position(|m| m.model == blend.best_model)
        .expect("the best model is registered");
    let best_pehe = sizes[best].powi(2);
    let truth = held_out - best_pehe;
    Outcome {
        held_out_ratio: held_out / best_pehe,
        deployed_ratio: pehe(&deployed, sizes) / best_pehe,
        covered: blend.vs_best.ci_low <= truth && truth <= blend.vs_best.ci_high,
        first_weight: deployed[0],
    }
}

fn share(outcomes: &[Outcome], keep: impl Fn(&Outcome) -> bool) -> f64 {
    outcomes.iter().filter(|o| keep(o)).count() as f64 / outcomes.len() as f64
}

fn mean(outcomes: &[Outcome], value: impl Fn(&Outcome) -> f64) -> f64 {
    outcomes.iter().map(value).sum::<f64>() / outcomes.len() as f64
}

/// Two models with orthogonal errors of equal size (a = 0.5 on g_1 and
/// g_2, true PEHE 0.25 each): the best blend is (1/2, 1/2), with true PEHE
/// 0.125, half the best single model's.
///
/// Ratio check, per replication (a user gets one dataset, so the claim is
/// about each run, not an average over runs): the held-out blend's true
/// PEHE is at most 0.6 times the best single model's in at least 90% of
/// replications. The ratio is 0.5 + 2 (w_1 - 1/2)^2 for fold
/// weights w_1, so it passes 0.6 while |w_1 - 1/2| < 0.22; the weights' se
/// is about 2 / (sqrt(3,200) * 0.5 * sqrt 2) = 0.05 (pseudo-outcome sd
/// about 2, the models' difference sd 0.71), so a working blend passes in
/// nearly every replication, and one that stuck to a single model (ratio 1)
/// never does.
///
/// Coverage check: the 95% interval for blend-minus-best covers the true
/// difference (held-out blend's true PEHE minus the best single model's, the
/// best as the report picks it: first on the full-data ranking) in at least
/// 93% of replications. Here the two models are equally good, so the pick is
/// a coin toss whose winner's mean contribution is the lower of two noisy
/// means: that pushes the estimate towards "no gain" in every replication,
/// yet the interval still covers, because the estimate's error is then the
/// absolute value of a normal with the interval's own sd (for blend weights
/// near 1/2, blend minus best is half the pairwise difference, folded).
/// Measured: every miss is on that side, and coverage is about 93.7% rather
/// than 95%, because the held-out weights lean towards the model that looks best
/// on the other folds, the same noise that picks the best model; the
/// interval does not allow for that pick (see `estimate::blend`).
/// Choosing the best model fold by fold instead (each fold's pick made on
/// the others) was tried and is worse: 85.7% over the same 5,000
/// replications, because two folds that pick on each other's data make
/// correlated picks, which the plain se misses (its variance ran 1.9 times
/// the se^2 among ties); a blend's weights, at a minimum, feel that only at
/// second order (blend minus a fixed model covered 94.8%).
#[test]
fn orthogonal_errors_blend_to_half_the_error_and_the_interval_covers() {
    let functions = [1, 2];
    let sizes = [0.5, 0.5];
    let started = std::time::Instant::now();
    let outcomes: Vec<Outcome> = (0..COVERAGE_REPLICATIONS)
        .into_par_iter()
        .map(|r| judge(&replicate(10_000 + r, &functions, &sizes), &sizes))
        .collect();
    let ratio_ok = share(&outcomes, |o| o.held_out_ratio <= 0.6);
    let coverage = share(&outcomes, |o| o.covered);
    eprintln!(
        "orthogonal errors, {COVERAGE_REPLICATIONS} replications ({:.1} s): held-out blend / best true \
         PEHE <= 0.6 in {:.3} (mean ratio {:.3}; weights fitted on all units: mean ratio {:.3}); \
         95% CI for blend minus best covers the truth in {:.3}",
        started.elapsed().as_secs_f64(),
        ratio_ok,
        mean(&outcomes, |o| o.held_out_ratio),
        mean(&outcomes, |o| o.deployed_ratio),
        coverage
    );
    assert!(ratio_ok >= 0.90, "ratio <= 0.6 in only {ratio_ok}");
    assert!(coverage >= 0.93, "coverage {coverage}");
}

/// One exact model (tau_hat = tau) and three with errors of size 1 on
/// g_1, g_2 and g_3 (true PEHE 1 each): the exact model is the best blend
/// on its own, and its weight fitted on every unit is at least 0.9 in at
/// least 90% of replications. Each other model's weight is noise around 0
/// with se about 2 / (sqrt(4,000) * 1) = 0.03, kept only when positive, so
/// the three together take about 0.04 on average (measured: 0.039) and more
/// than 0.1 in about 6% of replications (measured); a solver that spread
/// weight evenly would give the exact model 0.25.
#[test]
fn an_exact_model_takes_the_weight() {
    let functions = [0, 1, 2, 3];
    let sizes = [0.0, 1.0, 1.0, 1.0];
    let started = std::time::Instant::now();
    let outcomes: Vec<Outcome> = (0..EXACT_REPLICATIONS)
        .into_par_iter()
        .map(|r| judge(&replicate(20_000 + r, &functions, &sizes), &sizes))
        .collect();
    let heavy = share(&outcomes, |o| o.first_weight >= 0.9);
    eprintln!(
        "exact model among three, {EXACT_REPLICATIONS} replications ({:.1} s): weight >= 0.9 in {:.3} \
         (mean weight {:.3})",
        started.elapsed().as_secs_f64(),
        heavy,
        mean(&outcomes, |o| o.first_weight)
    );
    assert!(heavy >= 0.90, "weight >= 0.9 in only {heavy}");
}

/// One registered model: there is nothing to blend, and the JSON has no
/// `blend` key; with two, the report names every model and the best one is
/// the scoreboard's first registered model.
#[test]
fn blend_only_with_two_models() {
    let one = replicate(7, &[1], &[0.5]);
    assert!(one.blend.is_none());
    let json = serde_json::to_value(&one).expect("json");
    assert!(json.get("blend").is_none());

    let two = replicate(7, &[1, 2], &[0.5, 0.5]);
    let blend = two.blend.as_ref().expect("a blend");
    assert_eq!(blend.weights.len(), 2);
    let first = two.models.iter().find(|m| !m.baseline).expect("a model");
    assert_eq!(blend.best_model, first.name);
    let total: f64 = blend.weights.iter().map(|w| w.weight).sum();
    assert!((total - 1.0).abs() < 1e-12);
    let json = serde_json::to_value(&two).expect("json");
    assert!(json["blend"]["vs_best"]["ci_low"].is_number());
}
