//! The watch on simulated streams: a drift is found and named, and a
//! missing batch of predictions is not taken for a retirement.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::*;
use crate::estimate::stats::standard_normal;

/// A look of `n` units with three N(shift_j, 1) features, a coin-flip
/// assignment with a correct propensity, a correct outcome model and
/// one model predicting the true effect.
fn look(
    rng: &mut ChaCha8Rng,
    n: usize,
    shift: [f64; 3],
) -> (Vec<f64>, Vec<f64>, Vec<f64>, Nuisance) {
    let normal = |rng: &mut ChaCha8Rng| standard_normal(rng);
    let mut x = Vec::with_capacity(3 * n);
    let (mut w, mut y) = (Vec::new(), Vec::new());
    let mut nu = Nuisance {
        propensity: Vec::new(),
        mu0: Vec::new(),
        mu1: Vec::new(),
    };
    for _ in 0..n {
        let row: Vec<f64> = shift.iter().map(|s| s + normal(rng)).collect();
        let t = f64::from(u8::from(rng.gen::<bool>()));
        y.push(row[0] + t * (1.0 + row[1]) + normal(rng));
        nu.propensity.push(0.5);
        nu.mu0.push(row[0]);
        nu.mu1.push(row[0] + 1.0 + row[1]);
        w.push(t);
        x.extend(row);
    }
    (x, w, y, nu)
}

/// Folds one look into `watch`.
fn fold(
    watch: &mut Watch,
    (x, w, y, nu): &(Vec<f64>, Vec<f64>, Vec<f64>, Nuisance),
    names: &[String],
    models: &[(String, Vec<f64>)],
) -> Vec<Signal> {
    watch.observe(
        &Arrivals {
            treatment: w,
            outcome: y,
            nuisance: nu,
            propensity_fitted: true,
            features: x,
            feature_names: names,
            models,
        },
        &WatchSettings::default(),
    )
}

/// 100 streams of 60 looks of 500 units; from look 30 the second
/// feature's mean moves by 0.3 standard deviations. Nothing is raised
/// before (the threshold allows a false alarm in at most 5% of streams
/// over 1000 looks, far fewer over 30), and the drift is found, naming
/// that feature, within four looks in at least 95 of 100 streams.
#[test]
fn a_feature_drift_is_found_and_named() {
    let names: Vec<String> = ["age", "tenure", "visits"].map(String::from).to_vec();
    let (mut early, mut found, mut delays) = (0, 0, Vec::new());
    for stream in 0..100 {
        let mut rng = ChaCha8Rng::seed_from_u64(stream);
        let mut watch = Watch::default();
        for k in 0..60 {
            let shift = if k >= 30 { [0.0, 0.3, 0.0] } else { [0.0; 3] };
            let units = look(&mut rng, 500, shift);
            let models = vec![(
                "m".to_string(),
                (0..500).map(|i| 1.0 + units.0[3 * i + 1]).collect(),
            )];
            let signals = fold(&mut watch, &units, &names, &models);
            let drift: Vec<&String> = signals
                .iter()
                .filter_map(|s| match s {
                    Signal::PopulationDrift { quantity, .. } => Some(quantity),
                    _ => None,
                })
                .collect();
            if drift.is_empty() {
                continue;
            }
            if k < 30 {
                early += 1;
            } else {
                assert_eq!(drift, vec!["tenure"]);
                found += 1;
                delays.push(k - 30 + 1);
            }
            break;
        }
    }
    delays.sort_unstable();
    let within = delays.iter().filter(|&&d| d <= 4).count();
    println!(
        "drift: {early} early alarms, {found} found, {within} within 4 looks, delays {delays:?}"
    );
    assert_eq!(early, 0);
    assert!(within >= 95, "{within}");
}

/// A front-runner with no predictions for one look keeps its place; a retired
/// one (no longer among the active models) hands it to a challenger,
/// and the event says why.
#[test]
fn a_missing_batch_is_not_a_retirement() {
    let names: Vec<String> = ["a", "b", "c"].map(String::from).to_vec();
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let mut watch = Watch::default();
    let mut observe = |watch: &mut Watch, models: &[&str], missing: Option<&str>| {
        let units = look(&mut rng, 300, [0.0; 3]);
        let x = &units.0;
        let models: Vec<(String, Vec<f64>)> = models
            .iter()
            .map(|&m| {
                let e = (0..300)
                    .map(|i| {
                        if Some(m) == missing {
                            f64::NAN
                        } else {
                            1.0 + x[3 * i + 1]
                        }
                    })
                    .collect();
                (m.to_string(), e)
            })
            .collect();
        fold(watch, &units, &names, &models)
    };
    // One model alone has no one to be separated from.
    let mut alone = Watch::default();
    observe(&mut alone, &["m1"], None);
    assert!(alone.state().front_runner_settled);
    observe(&mut watch, &["m1", "m2"], None);
    assert!(!watch.state().front_runner_settled);
    let front_runner = watch.state().front_runner.expect("appointed");
    let other = if front_runner == "m1" { "m2" } else { "m1" };
    let signals = observe(&mut watch, &["m1", "m2"], Some(front_runner.as_str()));
    assert!(
        !signals
            .iter()
            .any(|s| matches!(s, Signal::FrontRunnerChanged { .. })),
        "{signals:?}"
    );
    assert_eq!(
        watch.state().front_runner.as_deref(),
        Some(front_runner.as_str())
    );
    let signals = observe(&mut watch, &[other], None);
    let changed = signals.iter().find_map(|s| match s {
        Signal::FrontRunnerChanged { new, evidence, .. } => Some((new.clone(), evidence.route)),
        _ => None,
    });
    assert_eq!(changed, Some((other.to_string(), Route::Gone)));
}
