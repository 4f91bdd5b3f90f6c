//! Criterion benchmarks of the estimation core on generated data:
//!
//! - `scoring_pass/{100000,1000000}`: the pass with frozen nuisance values,
//!   pseudo-outcomes plus every estimator's contribution for 20 models (and
//!   the two baselines) into the mergeable sums with co-moments; throughput
//!   is unit x model contributions for the 20 models;
//! - `learner/*`: fit and predict of each nuisance learner at 20,000 units;
//! - `targeting/*`: AUTOC and Qini of one model at 100,000 units, with the
//!   jackknife standard error (the default) and with a 200-replicate
//!   bootstrap for comparison;
//! - `overlap/100000`: the overlap report with 20 features;
//! - `scoreboard/100000`: the whole board for 10 models from frozen nuisance.
//!
//! `cargo bench --bench scoring` (about three minutes); pass a filter such as
//! `cargo bench --bench scoring -- scoring_pass` to run one group.

use std::time::Duration;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use ndarray::{s, Array2};
use plumbline::estimate::crossfit::Nuisance;
use plumbline::estimate::learner::{Boosted, Learner, Linear, Quadratic, Task};
use plumbline::estimate::overlap::overlap_report;
use plumbline::estimate::pseudo::aipw_pseudo_outcome;
use plumbline::estimate::scoreboard::{contribution_sums, score, Settings, UnitColumns};
use plumbline::estimate::targeting::targeting;
use plumbline::estimate::{FeatureRows, ModelPredictions, OutcomeKind, UnitTable};
use plumbline::synth::{candidates, draw, effect_moments, Design, Draw};

const MODELS: usize = 20;

/// Nuisance values near the truth: the design's propensity (clipped) and
/// outcome means offset by a smooth error, as a fitted model would give.
fn frozen_nuisance(data: &Draw) -> Nuisance {
    let n = data.outcome.len();
    let mean_y = data.outcome.iter().sum::<f64>() / n as f64;
    let mu0: Vec<f64> = (0..n)
        .map(|i| mean_y + 0.1 * (i as f64 * 0.37).sin())
        .collect();
    let mu1: Vec<f64> = (0..n).map(|i| mu0[i] + data.tau[i] * 0.9).collect();
    Nuisance::from_parts(data.propensity.clone(), mu0, mu1, 0.01).0
}

fn scoring_pass(c: &mut Criterion) {
    let mut group = c.benchmark_group("scoring_pass");
    let (_, var_tau) = effect_moments(Design::NieWagerB, 100_000, 2);
    for n in [100_000usize, 1_000_000] {
        let data = draw(Design::NieWagerB, n, 5, 1.0, 1);
        let nuisance = frozen_nuisance(&data);
        let models = candidates(&data.tau, var_tau, MODELS, 3);
        let zero = vec![0.0; n];
        let constant = vec![0.3; n];
        let mut effects: Vec<&[f64]> = vec![&zero, &constant];
        effects.extend(models.iter().map(|m| m.predictions.effects.as_slice()));
        group.throughput(Throughput::Elements((n * MODELS) as u64));
        if n >= 1_000_000 {
            group.sample_size(10);
            group.measurement_time(Duration::from_secs(10));
        } else {
            group.sample_size(20);
            group.measurement_time(Duration::from_secs(5));
        }
        group.bench_with_input(BenchmarkId::from_parameter(n), &n, |b, _| {
            b.iter(|| {
                let phi = aipw_pseudo_outcome(&data.outcome, &data.treatment, &nuisance);
                let units = UnitColumns {
                    outcome: &data.outcome,
                    treatment: &data.treatment,
                    propensity: &nuisance.propensity,
                    mu0: &nuisance.mu0,
                    mu1: &nuisance.mu1,
                    phi: &phi,
                };
                contribution_sums(&units, &effects)
            })
        });
    }
    group.finish();
}

fn learners(c: &mut Criterion) {
    let n = 20_000;
    let mut group = c.benchmark_group("learner");
    group.sample_size(10);
    group.measurement_time(Duration::from_secs(4));
    let wide = draw(Design::NieWagerB, n, 20, 1.0, 5);
    // The second-degree expansion is only used up to 10 features.
    let narrow = wide.features.slice(s![.., 0..10]).to_owned();
    let cases: Vec<(&str, Box<dyn Learner>, &Array2<f64>)> = vec![
        ("linear", Box::new(Linear::default()), &wide.features),
        ("quadratic", Box::new(Quadratic::default()), &narrow),
        ("boosted", Box::new(Boosted::default()), &wide.features),
    ];
    for (name, learner, x) in &cases {
        let d = x.ncols();
        group.bench_function(format!("{name}/fit_regression/{n}x{d}"), |b| {
            b.iter(|| learner.fit(x.view(), &wide.outcome, Task::Regression, 1))
        });
        group.bench_function(format!("{name}/fit_classification/{n}x{d}"), |b| {
            b.iter(|| learner.fit(x.view(), &wide.treatment, Task::Classification, 1))
        });
        // Fitted inside the closure, which runs only when this benchmark is
        // selected by the filter.
        group.bench_function(format!("{name}/predict/{n}x{d}"), |b| {
            let fitted = learner
                .fit(x.view(), &wide.outcome, Task::Regression, 1)
                .expect("fit");
            b.iter(|| fitted.predict(x.view()))
        });
    }
    group.finish();
}

fn targeting_bench(c: &mut Criterion) {
    let n = 100_000;
    let data = draw(Design::NieWagerB, n, 5, 1.0, 7);
    let nuisance = frozen_nuisance(&data);
    let phi = aipw_pseudo_outcome(&data.outcome, &data.treatment, &nuisance);
    let (_, var_tau) = effect_moments(Design::NieWagerB, 100_000, 2);
    let model = &candidates(&data.tau, var_tau, 1, 3)[0].predictions.effects;
    let mut group = c.benchmark_group("targeting");
    group.sample_size(10);
    group.measurement_time(Duration::from_secs(5));
    group.bench_function(format!("jackknife/{n}"), |b| {
        b.iter(|| targeting(&phi, model, 0, 1))
    });
    group.bench_function(format!("bootstrap_200/{n}"), |b| {
        b.iter(|| targeting(&phi, model, 200, 1))
    });
    group.finish();
}

fn overlap_bench(c: &mut Criterion) {
    let n = 100_000;
    let data = draw(Design::NieWagerB, n, 20, 1.0, 9);
    let nuisance = frozen_nuisance(&data);
    let names: Vec<String> = (1..=20).map(|j| format!("x{j}")).collect();
    let mut group = c.benchmark_group("overlap");
    group.sample_size(20);
    group.bench_function(format!("{n}x20"), |b| {
        b.iter(|| {
            overlap_report(
                FeatureRows::of_matrix(data.features.view()).expect("row-major"),
                &names,
                &data.treatment,
                &nuisance.propensity,
                0.05,
            )
        })
    });
    group.finish();
}

fn scoreboard_bench(c: &mut Criterion) {
    let n = 100_000;
    let data = draw(Design::NieWagerB, n, 20, 1.0, 11);
    let nuisance = frozen_nuisance(&data);
    let (_, var_tau) = effect_moments(Design::NieWagerB, 100_000, 2);
    let models: Vec<ModelPredictions> = candidates(&data.tau, var_tau, 10, 3)
        .into_iter()
        .map(|c| c.predictions)
        .collect();
    let names: Vec<String> = (1..=20).map(|j| format!("x{j}")).collect();
    let table = UnitTable::new(
        data.features.clone(),
        data.treatment.clone(),
        data.outcome.clone(),
        None,
        OutcomeKind::Continuous,
    )
    .expect("table");
    let settings = Settings::default();
    let mut group = c.benchmark_group("scoreboard");
    group.sample_size(10);
    group.measurement_time(Duration::from_secs(5));
    group.bench_function(format!("{n}x10_models"), |b| {
        b.iter(|| score(&table, &names, &nuisance, None, &models, &settings))
    });
    group.finish();
}

criterion_group!(
    benches,
    scoring_pass,
    learners,
    targeting_bench,
    overlap_bench,
    scoreboard_bench
);
criterion_main!(benches);
