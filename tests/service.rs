//! The service end to end: a real server on ephemeral loopback ports, a
//! temporary SQLite file, real tonic clients.

mod common;

use common::service::*;
use plumbline::api::pb;
use plumbline::api::status::receipt_of;
use plumbline::synth::{candidates, draw, effect_moments, Design};
use tonic::Code;

const COHORTS: usize = 5;
const PER_COHORT: usize = 1000;

/// Creates a dataset, registers three models, streams 5,000 units with
/// predictions and outcomes in five cohorts (recomputing after each), then
/// refits. The cumulative scoreboard must equal `plumbline score` on the same
/// data exported to CSV with the same seed, to 1e-9. Then the server is
/// restarted on the same data directory: everything is still there and a
/// recompute gives the same numbers.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn lifecycle_matches_the_offline_score_and_survives_a_restart() {
    let dir = TempDir::new("lifecycle");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let name = "reminders";
    let d = 6;
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(continuous_spec(name, d)),
        })
        .await
        .expect("create");
    let n = COHORTS * PER_COHORT;
    let data = draw(Design::NieWagerB, n, d, 1.0, 21);
    let (_, var_tau) = effect_moments(Design::NieWagerB, 100_000, 5);
    let models = candidates(&data.tau, var_tau, 3, 8);
    for m in &models {
        register(&mut c, name, &m.predictions.name).await;
    }
    let mut first_changed = 0;
    for k in 0..COHORTS {
        let range = k * PER_COHORT..(k + 1) * PER_COHORT;
        let cohort = format!("2026-{:02}", k + 1);
        let units: Vec<pb::UnitRow> = range
            .clone()
            .map(|i| {
                let x: Vec<f64> = data.features.row(i).to_vec();
                unit_row(&format!("u{i}"), &x, data.treatment[i], None, &cohort)
            })
            .collect();
        let r = send_units(&mut c, name, units).await;
        assert_eq!(r.accepted, PER_COHORT as u64);
        let preds: Vec<pb::PredictionRow> = models
            .iter()
            .flat_map(|m| {
                range.clone().map(move |i| pb::PredictionRow {
                    model: m.predictions.name.clone(),
                    unit_key: format!("u{i}"),
                    effect: m.predictions.effects[i],
                    predicted_at_ms: 0,
                    arm: String::new(),
                })
            })
            .collect();
        send_predictions(&mut c, name, preds).await;
        let outcomes: Vec<pb::OutcomeRow> = range
            .map(|i| pb::OutcomeRow {
                unit_key: format!("u{i}"),
                value: data.outcome[i],
                observed_at_ms: 0,
            })
            .collect();
        send_outcomes(&mut c, name, outcomes).await;
        let r = recompute(&mut c, name, false).await;
        // A cohort that gained nothing keeps its board from the recompute
        // that last changed it (a refit rescores every window); the new
        // one is this recompute's.
        if r.refitted || k == 0 {
            first_changed = r.snapshot_id;
        }
        assert_eq!(
            cohort_board(&mut c, name, "2026-01").await.snapshot_id,
            first_changed
        );
        assert_eq!(
            cohort_board(&mut c, name, &cohort).await.snapshot_id,
            r.snapshot_id
        );
    }
    let refit = recompute(&mut c, name, true).await;
    assert!(refit.refitted);
    assert_eq!(refit.units, n as u64);
    let served = board(&mut c, name, pb::window::Kind::Cumulative).await;
    assert_eq!(served.units, n as u64);
    assert!(served.degenerate.is_empty(), "{}", served.degenerate);

    // Export the same data, in the service's unit order, and score offline.
    let csv = TempDir::new("lifecycle-csv");
    let mut units = String::from("unit_id,treatment,outcome");
    for j in 1..=d {
        units.push_str(&format!(",x{j}"));
    }
    units.push('\n');
    let mut preds = String::from("unit_id");
    for m in &models {
        preds.push_str(&format!(",{}", m.predictions.name));
    }
    preds.push('\n');
    for i in 0..n {
        units.push_str(&format!("u{i},{},{}", data.treatment[i], data.outcome[i]));
        for v in data.features.row(i) {
            units.push_str(&format!(",{v}"));
        }
        units.push('\n');
        preds.push_str(&format!("u{i}"));
        for m in &models {
            preds.push_str(&format!(",{}", m.predictions.effects[i]));
        }
        preds.push('\n');
    }
    std::fs::write(csv.0.join("units.csv"), units).expect("units csv");
    std::fs::write(csv.0.join("predictions.csv"), preds).expect("predictions csv");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .args(["score", "--format", "json", "--seed", "3", "--folds", "5"])
        .arg("--units")
        .arg(csv.0.join("units.csv"))
        .arg("--predictions")
        .arg(csv.0.join("predictions.csv"))
        .output()
        .expect("score");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let offline: serde_json::Value = serde_json::from_slice(&out.stdout).expect("json");
    let online: serde_json::Value = serde_json::from_str(&served.json).expect("json");
    // Every number agrees, the RMSE bounds and the blend among them: the
    // service keeps each unit's cross-fit fold, which after a refit on
    // every unit is the fold `plumbline score` draws from the same seed,
    // and its blend is fitted from per-fold sums of the same products
    // (summed in another order: rounding near 1e-15, which the weight fits
    // do not amplify past 1e-9 at an optimum where the active set is clear).
    for both in ["levels", "blend"] {
        assert!(online.get(both).is_some(), "the board lacks {both}");
        assert!(offline.get(both).is_some(), "plumbline score lacks {both}");
    }
    assert_json_close(&online, &offline, 1e-9, "scoreboard");
    // The wire fields carry the same bounds: 1e-9 relative, the rounding
    // of sums taken in another order (both are one pass over 5,000 units).
    let close = |a: f64, b: f64| (a - b).abs() <= 1e-9 * b.abs().max(1.0);
    for m in &served.models {
        let level = offline["levels"]["models"]
            .as_array()
            .and_then(|l| l.iter().find(|l| l["name"] == m.name.as_str()))
            .unwrap_or_else(|| panic!("no offline bound for {}", m.name));
        let bound = m.rmse_lower_bound.expect("a bound on the wire");
        let expected = level["rmse_lower_bound"].as_f64().expect("number");
        println!("{}: RMSE at least {bound} (offline {expected})", m.name);
        assert!(close(bound, expected), "{}: {bound} vs {expected}", m.name);
    }
    // The blend on the wire: the nonzero weights of the offline report,
    // largest first, and its difference from the best single model.
    let blend = served.blend.as_ref().expect("blend on the wire");
    let mut expected: Vec<(String, f64)> = offline["blend"]["weights"]
        .as_array()
        .expect("weights")
        .iter()
        .map(|w| {
            (
                w["model"].as_str().expect("model").to_string(),
                w["weight"].as_f64().expect("weight"),
            )
        })
        .filter(|(_, w)| *w > 0.0)
        .collect();
    expected.sort_by(|a, b| b.1.total_cmp(&a.1));
    assert_eq!(blend.weights.len(), expected.len(), "{blend:?}");
    for (w, (model, weight)) in blend.weights.iter().zip(&expected) {
        assert_eq!(&w.model, model);
        assert!(
            close(w.weight, *weight),
            "{}: {} vs {weight}",
            w.model,
            w.weight
        );
    }
    let vs_best = blend.vs_best.expect("vs_best");
    let offline_vs_best = &offline["blend"]["vs_best"];
    println!(
        "blend: {:?}; minus {} {} [{}, {}]",
        blend.weights, blend.best_model, vs_best.estimate, vs_best.ci_low, vs_best.ci_high
    );
    assert_eq!(
        blend.best_model,
        offline["blend"]["best_model"].as_str().expect("best")
    );
    for (got, key) in [
        (vs_best.estimate, "estimate"),
        (vs_best.ci_low, "ci_low"),
        (vs_best.ci_high, "ci_high"),
    ] {
        assert!(
            close(got, offline_vs_best[key].as_f64().expect("number")),
            "{key}"
        );
    }
    assert_eq!(blend.models_offered, 3);
    let projection = served
        .plugin_error_projection
        .expect("projection on the wire");
    let offline_projection = &offline["levels"]["plugin_error_projection"];
    assert!(close(
        projection.estimate,
        offline_projection["estimate"].as_f64().expect("number")
    ));
    assert!(close(
        projection.se,
        offline_projection["se"].as_f64().expect("number")
    ));

    // History: one point per recompute.
    let history = c
        .scoring
        .get_history(pb::GetHistoryRequest {
            dataset: name.into(),
            model: models[0].predictions.name.clone(),
            estimator: "vs_constant".into(),
            ..Default::default()
        })
        .await
        .expect("history")
        .into_inner();
    assert_eq!(history.points.len(), COHORTS + 1);

    // A recompute with nothing new stores the windows it recomputes; the
    // cohorts keep the refit's boards, and a restart serves each window's
    // latest.
    let idle = recompute(&mut c, name, false).await;
    let cohorts_before: Vec<pb::Scoreboard> = cohort_boards(&mut c, name).await;
    assert!(cohorts_before
        .iter()
        .all(|b| b.snapshot_id == refit.snapshot_id));
    let served = board(&mut c, name, pb::window::Kind::Cumulative).await;
    assert_eq!(served.snapshot_id, idle.snapshot_id);

    // Restart on the same directory.
    srv.stop().await.expect("stop");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let ds = c
        .datasets
        .get_dataset(pb::GetDatasetRequest { name: name.into() })
        .await
        .expect("dataset survives")
        .into_inner();
    assert_eq!(
        (ds.units, ds.outcomes, ds.predictions),
        (n as u64, n as u64, 3 * n as u64)
    );
    assert_eq!(ds.active_models, 3);
    let listed = c
        .models
        .list_models(pb::ListModelsRequest {
            dataset: name.into(),
            include_retired: true,
        })
        .await
        .expect("models")
        .into_inner();
    assert_eq!(listed.models.len(), 3);
    let restored = board(&mut c, name, pb::window::Kind::Cumulative).await;
    assert_eq!(restored.json, served.json, "latest scoreboard restored");
    assert_eq!(restored.snapshot_id, idle.snapshot_id);
    assert_eq!(cohort_boards(&mut c, name).await, cohorts_before);
    let history_after = c
        .scoring
        .get_history(pb::GetHistoryRequest {
            dataset: name.into(),
            model: models[0].predictions.name.clone(),
            estimator: "vs_constant".into(),
            ..Default::default()
        })
        .await
        .expect("history")
        .into_inner();
    assert_eq!(history_after.points.len(), COHORTS + 2);
    let again = recompute(&mut c, name, false).await;
    assert!(!again.refitted, "the reproduced fit is current");
    let recomputed = board(&mut c, name, pb::window::Kind::Cumulative).await;
    let a: serde_json::Value = serde_json::from_str(&recomputed.json).expect("json");
    assert_json_close(&a, &online, 1e-12, "after restart");
    srv.stop().await.expect("stop");
}

/// Each integrity rule answers with its status code and writes nothing.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn integrity_rules_answer_with_their_codes_and_write_nothing() {
    let dir = TempDir::new("integrity");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let name = "integrity";
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(continuous_spec(name, 2)),
        })
        .await
        .expect("create");
    register(&mut c, name, "m1").await;
    let base: Vec<pb::UnitRow> = (0..10)
        .map(|i| {
            unit_row(
                &format!("k{i}"),
                &[i as f64, 1.0],
                (i % 2) as f64,
                None,
                "c1",
            )
        })
        .collect();
    send_units(&mut c, name, base.clone()).await;
    send_outcomes(
        &mut c,
        name,
        vec![pb::OutcomeRow {
            unit_key: "k0".into(),
            value: 1.5,
            observed_at_ms: 0,
        }],
    )
    .await;
    let id = srv.monitor.dataset_id(name).expect("id");
    let counts = || async { srv.monitor.store().counts(id).await.expect("counts") };
    let before = counts().await;
    assert_eq!(before, (10, 1, 0));

    // Identical re-send: a no-op, counted as duplicate.
    let r = send_units(&mut c, name, base.clone()).await;
    assert_eq!((r.accepted, r.duplicate), (0, 10));
    assert_eq!(counts().await, before);

    let intake = c.intake.clone();
    let units_call = |rows: Vec<pb::UnitRow>| {
        let mut intake = intake.clone();
        async move {
            intake
                .send_units(tokio_stream::iter(vec![pb::UnitBatch {
                    dataset: "integrity".into(),
                    rows,
                }]))
                .await
        }
    };
    // Conflicting row (same key, other features) beside a new valid row.
    let err = units_call(vec![
        unit_row("new-1", &[0.0, 0.0], 1.0, None, "c1"),
        unit_row("k3", &[99.0, 1.0], 1.0, None, "c1"),
    ])
    .await
    .expect_err("conflict");
    assert_eq!(err.code(), Code::AlreadyExists, "{}", err.message());
    assert!(
        err.message().contains("row 1") && err.message().contains("key"),
        "{}",
        err.message()
    );
    let receipt = receipt_of(&err).expect("receipt in details");
    assert_eq!(receipt.rejections[0].row, 1);
    assert_eq!(counts().await, before, "nothing of the batch written");

    // Malformed row: NaN feature, named by field and row index.
    let err = units_call(vec![
        unit_row("new-2", &[0.0, 0.0], 1.0, None, "c1"),
        unit_row("new-3", &[0.0, f64::NAN], 0.0, None, "c1"),
    ])
    .await
    .expect_err("malformed");
    assert_eq!(err.code(), Code::InvalidArgument);
    assert!(
        err.message().contains("features[1]") && err.message().contains("row 1"),
        "{}",
        err.message()
    );
    assert_eq!(counts().await, before);

    // Outcome for an unknown unit.
    let err = c
        .intake
        .send_outcomes(tokio_stream::iter(vec![pb::OutcomeBatch {
            dataset: name.into(),
            rows: vec![
                pb::OutcomeRow {
                    unit_key: "k1".into(),
                    value: 2.0,
                    observed_at_ms: 0,
                },
                pb::OutcomeRow {
                    unit_key: "nobody".into(),
                    value: 2.0,
                    observed_at_ms: 0,
                },
            ],
        }]))
        .await
        .expect_err("unknown unit");
    assert_eq!(err.code(), Code::NotFound);
    assert!(err.message().contains("unit_key"), "{}", err.message());
    assert_eq!(counts().await, before);

    // Prediction after the unit's outcome.
    let err = c
        .intake
        .send_predictions(tokio_stream::iter(vec![pb::PredictionBatch {
            dataset: name.into(),
            rows: vec![
                pb::PredictionRow {
                    model: "m1".into(),
                    unit_key: "k2".into(),
                    effect: 0.3,
                    predicted_at_ms: 0,
                    arm: String::new(),
                },
                pb::PredictionRow {
                    model: "m1".into(),
                    unit_key: "k0".into(),
                    effect: 0.3,
                    predicted_at_ms: 0,
                    arm: String::new(),
                },
            ],
        }]))
        .await
        .expect_err("after outcome");
    assert_eq!(err.code(), Code::FailedPrecondition);
    assert_eq!(counts().await, before);

    // A stamped backfill made before the outcome is accepted.
    send_units(
        &mut c,
        name,
        vec![unit_row("late", &[1.0, 2.0], 1.0, None, "c1")],
    )
    .await;
    send_outcomes(
        &mut c,
        name,
        vec![pb::OutcomeRow {
            unit_key: "late".into(),
            value: 0.5,
            observed_at_ms: 2_000,
        }],
    )
    .await;
    let ok = send_predictions(
        &mut c,
        name,
        vec![pb::PredictionRow {
            model: "m1".into(),
            unit_key: "late".into(),
            effect: 0.1,
            predicted_at_ms: 1_000,
            arm: String::new(),
        }],
    )
    .await;
    assert_eq!(ok.accepted, 1);

    // Unknown dataset.
    let err = c
        .intake
        .send_units(tokio_stream::iter(vec![pb::UnitBatch {
            dataset: "no-such-dataset".into(),
            rows: vec![unit_row("x", &[0.0, 0.0], 1.0, None, "")],
        }]))
        .await
        .expect_err("unknown dataset");
    assert_eq!(err.code(), Code::NotFound);
    srv.stop().await.expect("stop");
}

/// Streams cohorts of units whose effects follow `tau(cohort, x)`, with
/// two models, and recomputes after each cohort.
struct Scenario<'a> {
    name: &'a str,
    cohorts: usize,
    per_cohort: usize,
}

fn normal_features(rng: &mut rand_chacha::ChaCha8Rng, d: usize) -> Vec<f64> {
    (0..d)
        .map(|_| plumbline::synth::standard_normal(rng))
        .collect()
}

/// Creates `name` with two features and one model "m" whose predictions are
/// the true effect, sends `n` units (twice when `resend`, to count
/// duplicates), their predictions and outcomes, and recomputes once.
async fn one_model_scored(c: &mut Clients, name: &str, n: usize, seed: u64, resend: bool) {
    use rand::{Rng, SeedableRng};
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(continuous_spec(name, 2)),
        })
        .await
        .expect("create");
    register(c, name, "m").await;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let (mut units, mut preds, mut outcomes) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..n {
        let key = format!("u{i}");
        let x = normal_features(&mut rng, 2);
        let w = if rng.gen::<f64>() < 0.5 { 1.0 } else { 0.0 };
        units.push(unit_row(&key, &x, w, None, "c"));
        preds.push(pb::PredictionRow {
            model: "m".into(),
            unit_key: key.clone(),
            effect: x[0],
            predicted_at_ms: 0,
            arm: String::new(),
        });
        outcomes.push(pb::OutcomeRow {
            unit_key: key,
            value: x[1] + w * x[0] + plumbline::synth::standard_normal(&mut rng),
            observed_at_ms: 0,
        });
    }
    if resend {
        send_units(c, name, units.clone()).await;
    }
    send_units(c, name, units).await;
    send_predictions(c, name, preds).await;
    send_outcomes(c, name, outcomes).await;
    recompute(c, name, false).await;
}

/// A challenger becomes best after cohort 3: exactly one significant
/// front-runner-changed event, visible through watch and list, and the
/// front-runner-change counter on /metrics moves.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn drift_raises_exactly_one_significant_front_runner_change() {
    use rand::{Rng, SeedableRng};
    let dir = TempDir::new("drift");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let s = Scenario {
        name: "drift",
        cohorts: 7,
        per_cohort: 1000,
    };
    let mut spec = continuous_spec(s.name, 3);
    spec.recent = Some(pb::RecentWindow {
        last_outcomes: s.per_cohort as u32,
        last_days: 0,
    });
    c.datasets
        .create_dataset(pb::CreateDatasetRequest { spec: Some(spec) })
        .await
        .expect("create");
    for m in ["incumbent", "challenger", "flat"] {
        register(&mut c, s.name, m).await;
    }
    let mut watch = c
        .events
        .watch_events(pb::WatchEventsRequest {
            dataset: s.name.into(),
            after_id: 0,
        })
        .await
        .expect("watch")
        .into_inner();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(77);
    for k in 0..s.cohorts {
        let drifted = k >= 3;
        let mut units = Vec::new();
        let mut preds = Vec::new();
        let mut outcomes = Vec::new();
        for i in 0..s.per_cohort {
            let key = format!("c{k}-{i}");
            let x = normal_features(&mut rng, 3);
            let old = 1.0 + x[0];
            let new = 1.0 - x[0];
            let tau = if drifted { new } else { old };
            let w = if rng.gen::<f64>() < 0.5 { 1.0 } else { 0.0 };
            let y = x[1] + w * tau + plumbline::synth::standard_normal(&mut rng);
            units.push(unit_row(&key, &x, w, Some(0.5), &format!("c{k}")));
            for (m, e) in [("incumbent", old), ("challenger", new), ("flat", 1.0)] {
                preds.push(pb::PredictionRow {
                    model: m.into(),
                    unit_key: key.clone(),
                    effect: e,
                    predicted_at_ms: 0,
                    arm: String::new(),
                });
            }
            outcomes.push(pb::OutcomeRow {
                unit_key: key,
                value: y,
                observed_at_ms: 0,
            });
        }
        send_units(&mut c, s.name, units).await;
        send_predictions(&mut c, s.name, preds).await;
        send_outcomes(&mut c, s.name, outcomes).await;
        recompute(&mut c, s.name, false).await;
        let recent = board(&mut c, s.name, pb::window::Kind::Recent).await;
        let expected = if drifted { "challenger" } else { "incumbent" };
        assert_eq!(recent.front_runner, expected, "cohort {k}");
    }
    let events = c
        .events
        .list_events(pb::ListEventsRequest {
            dataset: s.name.into(),
            after_id: 0,
            limit: 1000,
        })
        .await
        .expect("list")
        .into_inner()
        .events;
    let changes: Vec<&pb::Event> = events
        .iter()
        .filter(|e| e.kind == "front_runner_changed")
        .collect();
    assert_eq!(changes.len(), 1, "{changes:?}");
    let details: serde_json::Value = serde_json::from_str(&changes[0].details_json).expect("json");
    assert_eq!(details["old"], "incumbent");
    assert_eq!(details["new"], "challenger");
    assert_eq!(details["window"], "stream");
    assert!(details["margin"].as_f64().unwrap_or(0.0) > 0.0);
    // The evidence: a confidence sequence whose lower bound cleared zero, or
    // a detector at or above its threshold.
    let evidence = &details["evidence"];
    let by_sequence =
        evidence["route"] == "sequence" && evidence["lower"].as_f64().is_some_and(|l| l > 0.0);
    let by_detector = evidence["route"] == "detector"
        && evidence["log_statistic"].as_f64() >= evidence["log_threshold"].as_f64();
    assert!(by_sequence || by_detector, "{evidence}");
    assert!(evidence["alpha"]
        .as_f64()
        .is_some_and(|a| a > 0.0 && a <= 0.05));

    // The watcher saw the same event.
    let mut seen = Vec::new();
    while let Ok(Some(e)) = tokio::time::timeout(std::time::Duration::from_secs(2), watch.message())
        .await
        .unwrap_or(Ok(None))
    {
        seen.push(e);
        if seen.len() == events.len() {
            break;
        }
    }
    assert!(seen
        .iter()
        .any(|e| e.id == changes[0].id && e.kind == "front_runner_changed"));

    let (status, text) = http_get(srv.metrics_addr, "/metrics");
    assert_eq!(status, 200);
    let samples = parse_metrics(&text);
    let counter = samples
        .iter()
        .find(|(n, l, _)| {
            n == "plumbline_front_runner_changes_total"
                && l.contains(&("dataset".into(), "drift".into()))
                && l.contains(&("window".into(), "stream".into()))
        })
        .map(|(_, _, v)| *v);
    assert_eq!(counter, Some(1.0));
    srv.stop().await.expect("stop");
}

/// The assignment policy switches from a coin flip to targeting on x1,
/// with no logged propensities: the fitted propensity goes stale. The
/// watch finds the misfit on the units scored with it, says so with its
/// evidence, and the same recompute refits; nothing is raised before.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_policy_switch_is_found_and_refits() {
    use rand::{Rng, SeedableRng};
    let dir = TempDir::new("switch");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let name = "switch";
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(continuous_spec(name, 3)),
        })
        .await
        .expect("create");
    register(&mut c, name, "m").await;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(21);
    let switch_at = 4;
    let mut refitted = Vec::new();
    for k in 0..7 {
        let (mut units, mut preds, mut outcomes) = (Vec::new(), Vec::new(), Vec::new());
        for i in 0..1000 {
            let key = format!("c{k}-{i}");
            let x = normal_features(&mut rng, 3);
            let p = if k >= switch_at {
                1.0 / (1.0 + (-1.5 * x[0]).exp())
            } else {
                0.5
            };
            let w = if rng.gen::<f64>() < p { 1.0 } else { 0.0 };
            units.push(unit_row(&key, &x, w, None, &format!("c{k}")));
            preds.push(pb::PredictionRow {
                model: "m".into(),
                unit_key: key.clone(),
                effect: 1.0 + x[1],
                predicted_at_ms: 0,
                arm: String::new(),
            });
            outcomes.push(pb::OutcomeRow {
                unit_key: key,
                value: x[0] + w * (1.0 + x[1]) + plumbline::synth::standard_normal(&mut rng),
                observed_at_ms: 0,
            });
        }
        send_units(&mut c, name, units).await;
        send_predictions(&mut c, name, preds).await;
        send_outcomes(&mut c, name, outcomes).await;
        refitted.push(recompute(&mut c, name, false).await.refitted);
    }
    assert_switch_found(&mut c, name, &refitted, switch_at).await;
    srv.stop().await.expect("stop");
}

/// One cohort of the restart test: two models, a policy that switches to
/// targeting on x1 from cohort 4.
async fn send_cohort(c: &mut Clients, name: &str, k: usize) {
    send_cohort_of(c, name, k, true).await
}

/// As [`send_cohort`], with or without the two models' predictions.
async fn send_cohort_of(c: &mut Clients, name: &str, k: usize, with_models: bool) {
    use rand::{Rng, SeedableRng};
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(1000 + k as u64);
    let (mut units, mut preds, mut outcomes) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..800 {
        let key = format!("c{k}-{i}");
        let x = normal_features(&mut rng, 3);
        let p = if k >= 4 {
            1.0 / (1.0 + (-1.5 * x[0]).exp())
        } else {
            0.5
        };
        let w = if rng.gen::<f64>() < p { 1.0 } else { 0.0 };
        let tau = 1.0 + x[1];
        units.push(unit_row(&key, &x, w, None, &format!("c{k}")));
        for (m, e) in [("sharp", tau), ("blunt", 1.0 + 0.5 * x[1])] {
            preds.push(pb::PredictionRow {
                model: m.into(),
                unit_key: key.clone(),
                effect: e + 0.3 * plumbline::synth::standard_normal(&mut rng),
                predicted_at_ms: 0,
                arm: String::new(),
            });
        }
        outcomes.push(pb::OutcomeRow {
            unit_key: key,
            value: x[0] + w * tau + plumbline::synth::standard_normal(&mut rng),
            observed_at_ms: 0,
        });
    }
    send_units(c, name, units).await;
    if with_models {
        send_predictions(c, name, preds).await;
    }
    send_outcomes(c, name, outcomes).await;
    recompute(c, name, false).await;
}

/// A dataset whose units and outcomes arrive before any model is
/// registered has only the two baselines on its boards: nothing to rank, so
/// no front-runner alerts and no heterogeneity verdict between
/// constant-effect and zero-effect (the second is a straw man, not a
/// candidate). Overlap and nuisance alerts still apply.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_dataset_without_models_raises_no_model_alerts() {
    let name = "no-models";
    let dir = TempDir::new("no-models");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(continuous_spec(name, 3)),
        })
        .await
        .expect("create");
    for k in 0..4 {
        send_cohort_of(&mut c, name, k, false).await;
    }
    let kinds: Vec<String> = all_events(&mut c, name)
        .await
        .into_iter()
        .map(|e| e.kind)
        .collect();
    println!("events: {kinds:?}");
    assert!(kinds.iter().any(|k| k == "nuisance_refit"), "{kinds:?}");
    for k in &kinds {
        assert!(
            !k.starts_with("front_runner") && !k.contains("heterogeneity"),
            "a dataset without models raised {k}: {kinds:?}"
        );
    }
    for kind in [pb::window::Kind::Cumulative, pb::window::Kind::Recent] {
        let b = board(&mut c, name, kind).await;
        assert!(
            !b.no_detectable_heterogeneity,
            "no heterogeneity verdict without a candidate ({kind:?})"
        );
        let view = b.alerts.expect("alert view");
        assert_eq!(view.front_runner, "", "{view:?}");
    }
    let (_, text) = http_get(srv.metrics_addr, "/metrics");
    for sample in parse_metrics(&text) {
        if sample.0 == "plumbline_front_runner_uncertain"
            || sample.0 == "plumbline_no_detectable_heterogeneity"
        {
            assert_eq!(sample.2, 0.0, "{sample:?}");
        }
    }
    srv.stop().await.expect("stop");
}

/// The stream watch is stored with every snapshot: a server restarted
/// halfway through a stream raises the same events, word for word, and
/// ends with the same alert view as one that ran straight through.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_watch_resumes_after_a_restart() {
    let name = "resumed";
    let mut runs = Vec::new();
    for restart in [false, true] {
        let dir = TempDir::new("resume");
        let mut srv = server(&dir).await;
        let mut c = clients(srv.grpc_addr).await;
        c.datasets
            .create_dataset(pb::CreateDatasetRequest {
                spec: Some(continuous_spec(name, 3)),
            })
            .await
            .expect("create");
        for m in ["sharp", "blunt"] {
            register(&mut c, name, m).await;
        }
        for k in 0..8 {
            if restart && k == 5 {
                srv.stop().await.expect("stop");
                srv = server(&dir).await;
                c = clients(srv.grpc_addr).await;
            }
            send_cohort(&mut c, name, k).await;
        }
        let events: Vec<(String, String)> = all_events(&mut c, name)
            .await
            .into_iter()
            .map(|e| (e.kind, e.summary))
            .collect();
        let view = board(&mut c, name, pb::window::Kind::Recent)
            .await
            .alerts
            .expect("alert view");
        srv.stop().await.expect("stop");
        runs.push((events, view));
    }
    println!("events: {:#?}\nview: {:?}", runs[0].0, runs[0].1);
    assert!(runs[0].1.looks >= 6, "{:?}", runs[0].1);
    assert_eq!(runs[0].1.front_runner, "sharp");
    assert!(runs[0].0.iter().any(|(k, _)| k == "nuisance_misfit"));
    assert_eq!(runs[0], runs[1]);
}

/// Assignment that becomes near-deterministic for a subgroup raises overlap
/// degraded; its recovery raises overlap recovered.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn overlap_degrades_and_recovers() {
    use rand::{Rng, SeedableRng};
    let dir = TempDir::new("overlap");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let name = "overlap";
    let mut spec = continuous_spec(name, 3);
    spec.recent = Some(pb::RecentWindow {
        last_outcomes: 1000,
        last_days: 0,
    });
    c.datasets
        .create_dataset(pb::CreateDatasetRequest { spec: Some(spec) })
        .await
        .expect("create");
    register(&mut c, name, "m").await;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
    let mut degraded_flags = Vec::new();
    for k in 0..5 {
        // Cohort 2: units with x1 > 0 are treated with probability 0.995.
        let narrow = k == 2;
        let (mut units, mut preds, mut outcomes) = (Vec::new(), Vec::new(), Vec::new());
        for i in 0..1000 {
            let key = format!("c{k}-{i}");
            let x = normal_features(&mut rng, 3);
            let p = if narrow && x[0] > 0.0 { 0.995 } else { 0.5 };
            let w = if rng.gen::<f64>() < p { 1.0 } else { 0.0 };
            let y = x[1] + w * (1.0 + x[2]) + plumbline::synth::standard_normal(&mut rng);
            units.push(unit_row(&key, &x, w, Some(p), &format!("c{k}")));
            preds.push(pb::PredictionRow {
                model: "m".into(),
                unit_key: key.clone(),
                effect: 1.0 + x[2],
                predicted_at_ms: 0,
                arm: String::new(),
            });
            outcomes.push(pb::OutcomeRow {
                unit_key: key,
                value: y,
                observed_at_ms: 0,
            });
        }
        send_units(&mut c, name, units).await;
        send_predictions(&mut c, name, preds).await;
        send_outcomes(&mut c, name, outcomes).await;
        recompute(&mut c, name, false).await;
        let recent = board(&mut c, name, pb::window::Kind::Recent).await;
        degraded_flags.push(recent.overlap.map(|o| o.degraded).unwrap_or(false));
    }
    assert_eq!(degraded_flags, vec![false, false, true, false, false]);
    let kinds: Vec<String> = c
        .events
        .list_events(pb::ListEventsRequest {
            dataset: name.into(),
            after_id: 0,
            limit: 100,
        })
        .await
        .expect("list")
        .into_inner()
        .events
        .into_iter()
        .map(|e| e.kind)
        .filter(|k| k.starts_with("overlap"))
        .collect();
    assert_eq!(kinds, vec!["overlap_degraded", "overlap_recovered"]);
    srv.stop().await.expect("stop");
}

/// /metrics parses as Prometheus text and carries every documented series
/// with its labels.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_carry_every_series_with_its_labels() {
    let dir = TempDir::new("metrics");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let name = "metered";
    one_model_scored(&mut c, name, 600, 9, true).await;

    let (status, text) = http_get(srv.metrics_addr, "/metrics");
    assert_eq!(status, 200);
    let samples = parse_metrics(&text);
    let has = |metric: &str, labels: &[(&str, &str)]| {
        samples.iter().any(|(n, l, v)| {
            n == metric
                && v.is_finite()
                && labels.iter().all(|(k, want)| {
                    l.iter()
                        .any(|(lk, lv)| lk == k && (want.is_empty() || lv == want))
                })
        })
    };
    let d = ("dataset", name);
    for (metric, labels) in [
        (
            "plumbline_model_score",
            vec![
                d,
                ("model", "m"),
                ("estimator", "corrected_pehe"),
                ("window", "cumulative"),
            ],
        ),
        (
            "plumbline_model_score",
            vec![
                d,
                ("model", "constant-effect"),
                ("estimator", "r_loss"),
                ("window", "recent"),
            ],
        ),
        (
            "plumbline_model_score_se",
            vec![
                d,
                ("model", "m"),
                ("estimator", "vs_constant"),
                ("window", "recent"),
            ],
        ),
        (
            "plumbline_model_rank",
            vec![d, ("model", "m"), ("window", "cumulative")],
        ),
        (
            "plumbline_model_draw_share",
            vec![d, ("model", "m"), ("window", "recent")],
        ),
        (
            "plumbline_model_rmse_lower_bound",
            vec![d, ("model", "m"), ("window", "cumulative")],
        ),
        (
            "plumbline_front_runner_info",
            vec![d, ("model", ""), ("window", "recent")],
        ),
        (
            "plumbline_front_runner_changes_total",
            vec![d, ("window", "stream")],
        ),
        (
            "plumbline_front_runner_uncertain",
            vec![d, ("window", "stream")],
        ),
        ("plumbline_overlap_degraded", vec![d, ("window", "stream")]),
        ("plumbline_watched_units", vec![d]),
        (
            "plumbline_front_runner_uncertain",
            vec![d, ("window", "recent")],
        ),
        (
            "plumbline_no_detectable_heterogeneity",
            vec![d, ("window", "recent")],
        ),
        ("plumbline_overlap_degraded", vec![d, ("window", "recent")]),
        (
            "plumbline_overlap_extreme_share",
            vec![d, ("window", "cumulative")],
        ),
        (
            "plumbline_overlap_effective_share",
            vec![d, ("window", "recent"), ("arm", "treated")],
        ),
        (
            "plumbline_overlap_effective_share",
            vec![d, ("window", "recent"), ("arm", "control")],
        ),
        (
            "plumbline_ingest_rows_total",
            vec![d, ("kind", "units"), ("result", "accepted")],
        ),
        (
            "plumbline_ingest_rows_total",
            vec![d, ("kind", "units"), ("result", "duplicate")],
        ),
        (
            "plumbline_ingest_rows_total",
            vec![d, ("kind", "outcomes"), ("result", "accepted")],
        ),
        (
            "plumbline_recompute_duration_seconds_bucket",
            vec![d, ("kind", "refit"), ("le", "")],
        ),
        (
            "plumbline_recompute_duration_seconds_count",
            vec![d, ("kind", "refit")],
        ),
        (
            "plumbline_nuisance_oof_loss",
            vec![d, ("component", "propensity")],
        ),
        (
            "plumbline_nuisance_oof_loss",
            vec![d, ("component", "outcome_treated")],
        ),
        ("plumbline_units", vec![d]),
        ("plumbline_outcomes", vec![d]),
        ("plumbline_last_outcome_timestamp_seconds", vec![d]),
        (
            "plumbline_events_total",
            vec![d, ("kind", "nuisance_refit")],
        ),
    ] {
        assert!(has(metric, &labels), "missing {metric} {labels:?}");
    }
    let front_runners: Vec<_> = samples
        .iter()
        .filter(|(n, l, v)| {
            n == "plumbline_front_runner_info"
                && *v == 1.0
                && l.contains(&("window".into(), "recent".into()))
        })
        .collect();
    assert_eq!(
        front_runners.len(),
        1,
        "exactly one front-runner per window"
    );
    let accepted = samples
        .iter()
        .find(|(n, l, _)| {
            n == "plumbline_ingest_rows_total"
                && l.contains(&("kind".into(), "units".into()))
                && l.contains(&("result".into(), "accepted".into()))
        })
        .map(|(_, _, v)| *v);
    assert_eq!(accepted, Some(600.0));
    let (status, _) = http_get(srv.metrics_addr, "/readyz");
    assert_eq!(status, 200);

    // A retired model's series go at once, in every window.
    let of_m = |text: &str| {
        parse_metrics(text)
            .into_iter()
            .filter(|(n, l, _)| {
                n.starts_with("plumbline_model_") && l.contains(&("model".into(), "m".into()))
            })
            .count()
    };
    assert!(of_m(&text) > 10, "m's series before it is retired");
    c.models
        .retire_model(pb::RetireModelRequest {
            dataset: name.into(),
            name: "m".into(),
        })
        .await
        .expect("retire");
    let (_, after) = http_get(srv.metrics_addr, "/metrics");
    assert_eq!(of_m(&after), 0, "m's series after it was retired:\n{after}");
    srv.stop().await.expect("stop");
}

/// What any Prometheus and gRPC tooling expects of a fresh server: a
/// build-info series and the conventional process series before any
/// dataset exists, reflection in both protocol versions listing the
/// plumbline services, and plain logs (no colour codes) when stderr is not
/// a terminal.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_fresh_server_speaks_the_ecosystems_conventions() {
    let dir = TempDir::new("conventions");
    let server = serve_binary(&dir, &[], "info", true);
    let (_, text) = http_get(server.http, "/metrics");
    let samples = parse_metrics(&text);
    let value = |metric: &str| {
        samples
            .iter()
            .find(|(n, _, _)| n == metric)
            .map(|(_, l, v)| (l.clone(), *v))
    };
    let (labels, one) = value("plumbline_build_info").expect("plumbline_build_info");
    assert_eq!(one, 1.0);
    assert_eq!(
        labels,
        vec![("version".to_string(), env!("CARGO_PKG_VERSION").to_string())]
    );
    for metric in [
        "process_cpu_seconds_total",
        "process_resident_memory_bytes",
        "process_virtual_memory_bytes",
        "process_open_fds",
        "process_max_fds",
        "process_start_time_seconds",
    ] {
        let (_, v) = value(metric).unwrap_or_else(|| panic!("{metric} missing:\n{text}"));
        assert!(v.is_finite() && v >= 0.0, "{metric} = {v}");
    }
    // The server holds some MiB and has its sockets and database open.
    assert!(value("process_resident_memory_bytes").is_some_and(|(_, v)| v > 1e6));
    assert!(value("process_open_fds").is_some_and(|(_, v)| v >= 5.0));

    let channel = server.channel().await;
    let want = [
        "plumbline.v1.DatasetRegistry",
        "plumbline.v1.Intake",
        "plumbline.v1.Scoring",
    ];
    // The same exchange in each version's own types.
    macro_rules! services_listed {
        ($version:ident) => {{
            use tonic_reflection::pb::$version::{
                server_reflection_client::ServerReflectionClient,
                server_reflection_request::MessageRequest,
                server_reflection_response::MessageResponse, ServerReflectionRequest,
            };
            let mut client = ServerReflectionClient::new(channel.clone());
            let mut answers = client
                .server_reflection_info(tokio_stream::iter(vec![ServerReflectionRequest {
                    host: String::new(),
                    message_request: Some(MessageRequest::ListServices(String::new())),
                }]))
                .await
                .expect(stringify!($version))
                .into_inner();
            let answer = answers
                .message()
                .await
                .expect("answer")
                .expect("one answer");
            let Some(MessageResponse::ListServicesResponse(list)) = answer.message_response else {
                panic!("{}: not a service list", stringify!($version));
            };
            list.service
                .into_iter()
                .map(|s| s.name)
                .collect::<Vec<String>>()
        }};
    }
    for (version, names) in [
        ("v1", services_listed!(v1)),
        ("v1alpha", services_listed!(v1alpha)),
    ] {
        for w in want {
            assert!(names.iter().any(|n| n == w), "{version} lists {names:?}");
        }
    }
    let out = server.terminate();
    let logs = String::from_utf8_lossy(&out.stderr);
    assert!(logs.contains("INFO"), "info logs were asked for:\n{logs}");
    assert!(
        !logs.contains('\u{1b}'),
        "colour codes in logs written to a pipe:\n{logs}"
    );
}

/// The binary as an operator runs it: `plumbline serve --data-dir D --listen
/// A --metrics-listen B` answers the standard health check SERVING, serves
/// plumbline_ metrics, and exits 0 on SIGTERM.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn serve_binary_answers_health_and_metrics_and_drains_on_sigterm() {
    let dir = TempDir::new("binary");
    let server = serve_binary(&dir, &[], "warn", false);
    let (grpc, http) = (server.grpc, server.http);
    let channel = server.channel().await;
    let mut health = tonic_health::pb::health_client::HealthClient::new(channel.clone());
    let status = health
        .check(tonic_health::pb::HealthCheckRequest {
            service: String::new(),
        })
        .await
        .expect("health")
        .into_inner()
        .status;
    assert_eq!(
        status,
        tonic_health::pb::health_check_response::ServingStatus::Serving as i32
    );
    let mut datasets = pb::dataset_registry_client::DatasetRegistryClient::new(channel.clone());
    datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(continuous_spec("bin", 1)),
        })
        .await
        .expect("create");
    let mut intake = pb::intake_client::IntakeClient::new(channel);
    intake
        .send_units(tokio_stream::iter(vec![pb::UnitBatch {
            dataset: "bin".into(),
            rows: vec![unit_row("a", &[1.0], 1.0, None, "")],
        }]))
        .await
        .expect("units");
    let (code, text) = http_get(http, "/metrics");
    assert_eq!(code, 200);
    assert!(text.contains("plumbline_ingest_rows_total{"), "{text}");
    assert_eq!(http_get(http, "/healthz").0, 200);
    let _ = grpc;
    let exit = server.terminate();
    assert_eq!(exit.status.code(), Some(0), "clean exit after SIGTERM");
}

/// The client commands for people work against a live server, their JSON
/// parses, and a CSV backfill can be re-run without changing anything.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn client_commands_work_and_backfills_resume() {
    use rand::{Rng, SeedableRng};
    let dir = TempDir::new("client");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let name = "clientside";
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(continuous_spec(name, 2)),
        })
        .await
        .expect("create");
    register(&mut c, name, "m").await;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(4);
    let (mut units, mut preds, mut outcomes) = (
        String::from("unit_id,treatment,cohort,x1,x2,outcome\n"),
        String::from("unit_id,m\n"),
        String::from("unit_id,outcome\n"),
    );
    for i in 0..800 {
        let x = normal_features(&mut rng, 2);
        let w = u8::from(rng.gen::<f64>() < 0.5);
        let y = x[1] + f64::from(w) * x[0] + plumbline::synth::standard_normal(&mut rng);
        units.push_str(&format!("u{i},{w},c{},{},{},{y}\n", i / 400, x[0], x[1]));
        preds.push_str(&format!("u{i},{}\n", x[0]));
        outcomes.push_str(&format!("u{i},{y}\n"));
    }
    let files = TempDir::new("client-csv");
    for (f, text) in [
        ("units.csv", &units),
        ("preds.csv", &preds),
        ("outcomes.csv", &outcomes),
    ] {
        std::fs::write(files.0.join(f), text).expect("write");
    }
    let server = format!("http://{}", srv.grpc_addr);
    let run = |args: &[&str]| {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"))
            .args(args)
            .args(["--server", &server])
            .output()
            .expect("run");
        assert!(
            out.status.success(),
            "{args:?}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        (
            String::from_utf8_lossy(&out.stdout).into_owned(),
            String::from_utf8_lossy(&out.stderr).into_owned(),
        )
    };
    let path = |f: &str| files.0.join(f).display().to_string();
    let (_, first) = run(&["ingest", "units", "--dataset", name, &path("units.csv")]);
    assert!(first.contains("800 rows new"), "{first}");
    let (_, again) = run(&["ingest", "units", "--dataset", name, &path("units.csv")]);
    assert!(again.contains("0 rows new, 800 already stored"), "{again}");
    run(&[
        "ingest",
        "predictions",
        "--dataset",
        name,
        &path("preds.csv"),
    ]);
    run(&[
        "ingest",
        "outcomes",
        "--dataset",
        name,
        &path("outcomes.csv"),
    ]);
    recompute(&mut c, name, false).await;
    for args in [
        vec!["datasets"],
        vec!["models", "--dataset", name],
        vec!["scoreboard", "--dataset", name],
        vec!["scoreboard", "--dataset", name, "--window", "cohort:c1"],
        vec!["history", "--dataset", name, "--model", "m"],
        vec!["events", "--dataset", name],
        vec!["overlap", "--dataset", name, "--window", "recent"],
    ] {
        let (table, _) = run(&args);
        assert!(!table.trim().is_empty(), "{args:?}: empty table");
        let mut json_args = args.clone();
        json_args.extend(["--format", "json"]);
        let (text, _) = run(&json_args);
        let v: serde_json::Value =
            serde_json::from_str(&text).unwrap_or_else(|e| panic!("{args:?}: {e}: {text}"));
        assert!(!v.is_null(), "{args:?}");
    }
    let (board_json, _) = run(&["scoreboard", "--dataset", name, "--format", "json"]);
    let v: serde_json::Value = serde_json::from_str(&board_json).expect("json");
    assert_eq!(v["scoreboard"]["n_units"], 800);

    // Rough edges a new user hits, each as the shell sees it.
    let plumbline = |args: &[&str]| {
        std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"))
            .args(args)
            .stdout(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped())
            .output()
            .expect("run")
    };
    // A model that was never registered has no history: not found, 2.
    let out = plumbline(&[
        "history",
        "--dataset",
        name,
        "--model",
        "NO-SUCH",
        "--server",
        &server,
    ]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(
        out.status.code(),
        Some(2),
        "history of an unknown model: {err}"
    );
    assert!(
        err.contains("NO-SUCH") && err.contains("not registered"),
        "{err}"
    );
    // A reader that stops early (`| head -1`) ends the command quietly.
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .args(["events", "--dataset", name, "--server", &server])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .expect("spawn");
    drop(child.stdout.take());
    let out = child.wait_with_output().expect("wait");
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!err.contains("panicked"), "closed pipe: {err}");
    assert_ne!(out.status.code(), Some(101), "closed pipe: {err}");
    // Nothing listening: say so, and what to try.
    let closed = std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .expect("a port");
    let out = plumbline(&["datasets", "--server", &format!("http://{closed}")]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{err}");
    assert!(
        err.contains(&format!("nothing answers at http://{closed}"))
            && err.contains("plumbline serve")
            && !err.contains("transport error"),
        "{err}"
    );
    srv.stop().await.expect("stop");
}

/// Every cohort window's board, in cohort order.
async fn cohort_boards(c: &mut Clients, name: &str) -> Vec<pb::Scoreboard> {
    let mut out = Vec::new();
    for k in 0..COHORTS {
        out.push(cohort_board(c, name, &format!("2026-{:02}", k + 1)).await);
    }
    out
}

/// Every estimator of `estimators::ALL` reaches every surface: the board on
/// the wire, `/metrics`, the history endpoint and the CLI's scoreboard
/// table; a key outside the list is refused by name.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_estimator_reaches_the_board_metrics_history_and_table() {
    use plumbline::estimate::estimators;
    let dir = TempDir::new("estimators");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let name = "listed";
    one_model_scored(&mut c, name, 400, 4, false).await;

    let b = board(&mut c, name, pb::window::Kind::Cumulative).await;
    let keys: Vec<&str> = estimators::ALL.iter().map(|e| e.key()).collect();
    for m in &b.models {
        let sent: Vec<&str> = m.scores.iter().map(|s| s.estimator.as_str()).collect();
        assert_eq!(sent, keys, "{}: the board's scores follow ALL", m.name);
        assert!(m
            .scores
            .iter()
            .all(|s| s.estimate.is_finite() && s.se >= 0.0));
    }

    let (_, text) = http_get(srv.metrics_addr, "/metrics");
    let samples = parse_metrics(&text);
    for key in &keys {
        let found = samples.iter().any(|(n, l, v)| {
            n == "plumbline_model_score"
                && v.is_finite()
                && l.iter().any(|(k, v)| k == "estimator" && v == key)
                && l.iter().any(|(k, v)| k == "model" && v == "m")
        });
        assert!(found, "/metrics has no plumbline_model_score for {key}");

        let points = c
            .scoring
            .get_history(pb::GetHistoryRequest {
                dataset: name.into(),
                model: "m".into(),
                estimator: key.to_string(),
                window: None,
                from_ms: 0,
                to_ms: 0,
                arm: String::new(),
            })
            .await
            .expect("history")
            .into_inner()
            .points;
        let on_board = b.models.iter().find(|m| m.name == "m").and_then(|m| {
            m.scores
                .iter()
                .find(|s| s.estimator == *key)
                .map(|s| s.estimate)
        });
        assert_eq!(points.len(), 1, "{key}: one recompute, one point");
        assert_eq!(points[0].value.map(|v| v.estimate), on_board, "{key}");
    }
    let refused = c
        .scoring
        .get_history(pb::GetHistoryRequest {
            dataset: name.into(),
            model: "m".into(),
            estimator: "pehe_typo".into(),
            window: None,
            from_ms: 0,
            to_ms: 0,
            arm: String::new(),
        })
        .await
        .expect_err("an unknown estimator is refused");
    assert_eq!(refused.code(), Code::InvalidArgument);
    assert!(
        refused.message().starts_with("estimator: \"pehe_typo\""),
        "{}",
        refused.message()
    );

    let addr = format!("http://{}", srv.grpc_addr);
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .args(["scoreboard", "--server", &addr, "--dataset", name, "--wide"])
        .output()
        .expect("run plumbline scoreboard");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // The wide view carries a column per estimator; the default view, the
    // board table, leads with the differences and the chance.
    let table = String::from_utf8_lossy(&out.stdout);
    assert!(
        table
            .lines()
            .any(|l| l.trim_start().starts_with("rank") && l.contains("chance")),
        "{table}"
    );
    let header = table
        .lines()
        .find(|l| l.trim_start().starts_with("model"))
        .unwrap_or_default();
    for e in estimators::ALL {
        assert!(
            header.contains(e.label()),
            "{:?} not in {header:?}",
            e.label()
        );
    }
    // The board table's wide view ends each row with the model's RMSE
    // bound, as the board gives it (four decimals, the tables' format).
    let served = board(&mut c, name, pb::window::Kind::Cumulative).await;
    assert!(
        table
            .lines()
            .any(|l| l.trim_start().starts_with("rank") && l.contains("RMSE at least")),
        "{table}"
    );
    for m in &served.models {
        let bound = m.rmse_lower_bound.expect("bound on the wire");
        let row = table
            .lines()
            .find(|l| l.split_whitespace().nth(1) == Some(m.name.as_str()))
            .unwrap_or_else(|| panic!("no row for {} in {table}", m.name));
        // The tables print four decimals between 0.001 and 1000, and an
        // exact 0 as 0.0000.
        if bound == 0.0 || (1e-3..1e3).contains(&bound) {
            let shown = format!("{bound:.4}");
            assert!(row.contains(&shown), "{row} lacks {shown}");
        }
    }

    // The selection-aware figures reach the wire: every model's chance of
    // the lowest error (they sum to one), the joint bounds around the
    // pointwise interval, and the front-runner's adjusted difference.
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .args(["scoreboard", "--server", &addr, "--dataset", name])
        .args(["--format", "json"])
        .output()
        .expect("run plumbline scoreboard --format json");
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).expect("json");
    let board = &v["scoreboard"];
    let models = board["models"].as_array().expect("models");
    let chances: Vec<f64> = models
        .iter()
        .map(|m| m["chance_lowest"].as_f64().expect("chance_lowest"))
        .collect();
    assert!(
        (chances.iter().sum::<f64>() - 1.0).abs() < 1e-9,
        "{chances:?}"
    );
    for m in models {
        let d = &m["vs_constant"];
        let (low, high) = (d["ci_low"].as_f64(), d["ci_high"].as_f64());
        let (joint_low, joint_high) = (d["joint_low"].as_f64(), d["joint_high"].as_f64());
        if m["baseline"].as_bool() != Some(true) {
            assert!(joint_low <= low && joint_high >= high, "{d}");
        }
    }
    // The JSON output carries the bounds of every column.
    let levels = board["levels"]["models"].as_array().expect("levels");
    assert_eq!(levels.len(), models.len());
    let critical = board["joint_critical_value"]
        .as_f64()
        .expect("joint_critical_value");
    assert!(critical > 1.9, "{critical}");
    let adjusted = &board["front_runner_vs_constant"];
    assert!(
        adjusted["ci_low"].as_f64() <= adjusted["ci_high"].as_f64(),
        "{adjusted}"
    );
    srv.stop().await.expect("stop");
}

/// One server per data directory: a second `plumbline serve` on the same
/// directory exits with status 2 and says which process holds it, and the
/// first keeps serving.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_second_server_on_one_data_directory_is_refused() {
    let dir = TempDir::new("claimed");
    let first = serve_binary(&dir, &[], "warn", false);
    let second = std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .arg("serve")
        .arg("--data-dir")
        .arg(&dir.0)
        .args(["--listen", "127.0.0.1:0", "--metrics-listen", "127.0.0.1:0"])
        .output()
        .expect("run a second server");
    let stderr = String::from_utf8_lossy(&second.stderr);
    assert_eq!(second.status.code(), Some(2), "{stderr}");
    let pid = first.child.id().to_string();
    assert!(
        stderr.contains("is in use by process") && stderr.contains(&pid),
        "{stderr}"
    );
    assert!(stderr.contains("--data-dir"), "{stderr}");
    let mut health = tonic_health::pb::health_client::HealthClient::new(first.channel().await);
    health
        .check(tonic_health::pb::HealthCheckRequest::default())
        .await
        .expect("the first server still answers");
    let out = first.terminate();
    assert!(out.status.success());
}

/// A store whose boards are gone (what `migrations/sqlite/0005` leaves of
/// boards an earlier version stored as protobuf) is scored again at start,
/// without a request: the restarted server serves the same numbers.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn boards_missing_at_start_are_recomputed_unasked() {
    use sqlx::{ConnectOptions, Connection};
    let dir = TempDir::new("boardless");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    one_model_scored(&mut c, "upgraded", 400, 6, false).await;
    let before = board(&mut c, "upgraded", pb::window::Kind::Cumulative).await;
    srv.stop().await.expect("stop");

    let mut db = sqlx::sqlite::SqliteConnectOptions::new()
        .filename(dir.0.join(plumbline::config::DATABASE_FILE))
        .connect()
        .await
        .expect("open");
    sqlx::query("DELETE FROM snapshot_boards")
        .execute(&mut db)
        .await
        .expect("drop the boards");
    db.close().await.expect("close");

    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let mut served = None;
    for _ in 0..100 {
        match c
            .scoring
            .get_scoreboard(pb::GetScoreboardRequest {
                dataset: "upgraded".into(),
                window: None,
            })
            .await
        {
            Ok(b) => {
                served = Some(b.into_inner());
                break;
            }
            Err(s) => assert_eq!(s.code(), Code::FailedPrecondition, "{s:?}"),
        }
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    let after = served.expect("a board within 10 s of the start, unasked");
    assert!(after.snapshot_id > before.snapshot_id);
    assert_eq!(after.units, before.units);
    // The fit is reproduced exactly and no unit arrived: the same numbers.
    assert_eq!(after.models, before.models);
    srv.stop().await.expect("stop");
}

/// CompareModels answers any pair of the cumulative window's ranked
/// models, not only the pairs a board keeps: with 23 models a board keeps
/// the pairs among its top 20 and the front-runner against the rest, so
/// the two lowest-ranked models' pair is not on it. Its difference is
/// the difference of the two models' corrected PEHE on the board (a mean
/// of differences is the difference of means; 1e-9 relative allows for
/// the rounding of merged sums), and its standard error lies between the
/// difference and the sum of theirs (a covariance bound that fails if the
/// co-moment read is the wrong one). The recent window, which keeps no
/// co-moments between recomputes, still answers only its kept pairs.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn compare_models_answers_any_ranked_pair_of_the_cumulative_window() {
    use rand::SeedableRng;
    let dir = TempDir::new("any-pair");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let name = "sweep";
    // Nie & Wager's setup B draws at least five features.
    let d = 6;
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(continuous_spec(name, d)),
        })
        .await
        .expect("create");
    let n = 2000;
    let data = draw(Design::NieWagerB, n, d, 1.0, 5);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
    let models: Vec<(String, Vec<f64>)> = (0..23)
        .map(|j| {
            let noise = 0.2 + 0.1 * j as f64;
            let effects = data
                .tau
                .iter()
                .map(|t| t + noise * plumbline::estimate::stats::standard_normal(&mut rng))
                .collect();
            (format!("m{j:02}"), effects)
        })
        .collect();
    for (m, _) in &models {
        register(&mut c, name, m).await;
    }
    let units: Vec<pb::UnitRow> = (0..n)
        .map(|i| {
            let x: Vec<f64> = data.features.row(i).to_vec();
            unit_row(&format!("u{i}"), &x, data.treatment[i], None, "c")
        })
        .collect();
    send_units(&mut c, name, units).await;
    let preds: Vec<pb::PredictionRow> = models
        .iter()
        .flat_map(|(m, e)| {
            (0..n).map(move |i| pb::PredictionRow {
                model: m.clone(),
                unit_key: format!("u{i}"),
                effect: e[i],
                predicted_at_ms: 0,
                arm: String::new(),
            })
        })
        .collect();
    for chunk in preds.chunks(10_000) {
        send_predictions(&mut c, name, chunk.to_vec()).await;
    }
    let outcomes: Vec<pb::OutcomeRow> = (0..n)
        .map(|i| pb::OutcomeRow {
            unit_key: format!("u{i}"),
            value: data.outcome[i],
            observed_at_ms: 0,
        })
        .collect();
    send_outcomes(&mut c, name, outcomes).await;
    recompute(&mut c, name, false).await;
    let b = board(&mut c, name, pb::window::Kind::Cumulative).await;
    let registered: Vec<&pb::ModelScore> = b.models.iter().filter(|m| !m.baseline).collect();
    assert_eq!(registered.len(), 23);
    let (first, second) = (registered[21], registered[22]);
    let document: serde_json::Value = serde_json::from_str(&b.json).expect("json");
    let kept = document["pairwise"]
        .as_array()
        .expect("pairwise")
        .iter()
        .any(|p| {
            let names = [p["first"].as_str(), p["second"].as_str()];
            names.contains(&Some(first.name.as_str()))
                && names.contains(&Some(second.name.as_str()))
        });
    assert!(!kept, "the board keeps the pair: pick another");
    let request = |window: pb::window::Kind| pb::CompareModelsRequest {
        dataset: name.into(),
        window: Some(pb::Window {
            kind: window as i32,
            ..Default::default()
        }),
        first: first.name.clone(),
        second: second.name.clone(),
        arm: String::new(),
    };
    let answer = c
        .scoring
        .compare_models(request(pb::window::Kind::Cumulative))
        .await
        .expect("any ranked pair")
        .into_inner();
    let diff = answer.difference.expect("difference");
    let (a, z) = (&first.scores[0], &second.scores[0]);
    assert_eq!(
        (a.estimator.as_str(), z.estimator.as_str()),
        ("corrected_pehe", "corrected_pehe")
    );
    let expected = a.estimate - z.estimate;
    println!(
        "{} minus {}: {} (se {}), board {} - {}",
        first.name, second.name, diff.estimate, diff.se, a.estimate, z.estimate
    );
    assert!(
        (diff.estimate - expected).abs() <= 1e-9 * expected.abs().max(1.0),
        "{} vs {expected}",
        diff.estimate
    );
    assert!(
        diff.se >= (a.se - z.se).abs() - 1e-12 && diff.se <= a.se + z.se + 1e-12,
        "se {} outside [{}, {}]",
        diff.se,
        (a.se - z.se).abs(),
        a.se + z.se
    );
    assert!(diff.ci_low < diff.estimate && diff.estimate < diff.ci_high);
    assert_eq!(answer.units, b.units);
    // Read backwards, the same pair flips its sign.
    let back = c
        .scoring
        .compare_models(pb::CompareModelsRequest {
            first: second.name.clone(),
            second: first.name.clone(),
            ..request(pb::window::Kind::Cumulative)
        })
        .await
        .expect("backwards")
        .into_inner()
        .difference
        .expect("difference");
    assert!((back.estimate + diff.estimate).abs() <= 1e-12 * diff.estimate.abs().max(1.0));
    assert!((back.se - diff.se).abs() <= 1e-12 * diff.se.max(1.0));
    // The recent window keeps only its board's pairs.
    let err = c
        .scoring
        .compare_models(request(pb::window::Kind::Recent))
        .await
        .expect_err("not kept in the recent window");
    assert_eq!(err.code(), Code::NotFound);
    // A model that is not ranked is not found in either.
    let err = c
        .scoring
        .compare_models(pb::CompareModelsRequest {
            second: "no-such-model".into(),
            ..request(pb::window::Kind::Cumulative)
        })
        .await
        .expect_err("unknown model");
    assert_eq!(err.code(), Code::NotFound);
    srv.stop().await.expect("stop");
}
