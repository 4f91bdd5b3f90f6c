//! End-to-end service figures on generated data, over loopback gRPC into
//! SQLite: ingest throughput (batches of 1,000 units with 20 features,
//! acknowledged after commit), a full cross-fitted refit, and an
//! incremental recompute after a new cohort, next to a full refit on the
//! same data.
//!
//! `cargo bench --bench service` (PLUMBLINE_BENCH_UNITS sets the history,
//! default 200,000; the cohort is 10,000 units; 10 models).

use std::time::Instant;

use plumbline::api::pb;
use plumbline::config::{Config, LogFormat};
use plumbline::store::Durability;
use plumbline::synth::{candidates, draw, effect_moments, Design};
use tonic::transport::Channel;

const FEATURES: usize = 20;
const BATCH: usize = 1000;
const MODELS: usize = 10;
const COHORT: usize = 10_000;

fn resident_mib() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines().find(|l| l.starts_with("VmRSS:")).and_then(|l| {
                l.split_whitespace()
                    .nth(1)
                    .and_then(|v| v.parse::<f64>().ok())
            })
        })
        .map(|kb| kb / 1024.0)
        .unwrap_or(0.0)
}

#[tokio::main(flavor = "multi_thread", worker_threads = 2)]
async fn main() {
    let history: usize = std::env::var("PLUMBLINE_BENCH_UNITS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(200_000);
    let dir = std::env::temp_dir().join(format!("plumbline-bench-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    let config = Config {
        listen: "127.0.0.1:0".parse().expect("addr"),
        metrics_listen: "127.0.0.1:0".parse().expect("addr"),
        data_dir: dir.clone(),
        durability: Durability::Full,
        log_format: LogFormat::Human,
        log_level: "warn".into(),
        limits: Default::default(),
        require_token: None,
        metrics_require_token: false,
        tls: None,
    };
    let srv = plumbline::server::start(&config).await.expect("start");
    let channel = Channel::from_shared(format!("http://{}", srv.grpc_addr))
        .expect("uri")
        .connect()
        .await
        .expect("connect");
    let mut datasets = pb::dataset_registry_client::DatasetRegistryClient::new(channel.clone());
    let mut models = pb::model_registry_client::ModelRegistryClient::new(channel.clone());
    let mut intake = pb::intake_client::IntakeClient::new(channel.clone());
    let mut scoring = pb::scoring_client::ScoringClient::new(channel.clone())
        .max_decoding_message_size(256 << 20);
    let name = "bench";
    datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(pb::DatasetSpec {
                name: name.into(),
                feature_names: (1..=FEATURES).map(|j| format!("x{j}")).collect(),
                outcome_kind: pb::OutcomeKind::Continuous as i32,
                recompute: Some(pb::RecomputePolicy {
                    every_outcomes: u32::MAX,
                    every_seconds: 86_400,
                    refit_growth: 10.0,
                    refit_every_seconds: 0,
                }),
                ..Default::default()
            }),
        })
        .await
        .expect("create");
    let total = history + COHORT;
    let data = draw(Design::NieWagerB, total, FEATURES, 1.0, 1);
    let (_, var_tau) = effect_moments(Design::NieWagerB, 100_000, 2);
    let cands = candidates(&data.tau, var_tau, MODELS, 3);
    for c in &cands {
        models
            .register_model(pb::RegisterModelRequest {
                dataset: name.into(),
                name: c.predictions.name.clone(),
                version: "1".into(),
                description: String::new(),
            })
            .await
            .expect("register");
    }
    let unit_batches = |range: std::ops::Range<usize>| -> Vec<pb::UnitBatch> {
        range
            .collect::<Vec<_>>()
            .chunks(BATCH)
            .map(|idx| pb::UnitBatch {
                dataset: name.into(),
                rows: idx
                    .iter()
                    .map(|&i| pb::UnitRow {
                        key: format!("u{i}"),
                        features: data.features.row(i).to_vec(),
                        treatment: data.treatment[i] as u32,
                        propensity: None,
                        cohort: format!("c{}", i / COHORT),
                        assigned_at_ms: 0,
                    })
                    .collect(),
            })
            .collect()
    };
    let load = |range: std::ops::Range<usize>| {
        let preds: Vec<pb::PredictionBatch> = cands
            .iter()
            .flat_map(|c| {
                range
                    .clone()
                    .collect::<Vec<_>>()
                    .chunks(BATCH)
                    .map(|idx| pb::PredictionBatch {
                        dataset: name.into(),
                        rows: idx
                            .iter()
                            .map(|&i| pb::PredictionRow {
                                model: c.predictions.name.clone(),
                                unit_key: format!("u{i}"),
                                effect: c.predictions.effects[i],
                                predicted_at_ms: 0,
                            })
                            .collect(),
                    })
                    .collect::<Vec<_>>()
            })
            .collect();
        let outcomes: Vec<pb::OutcomeBatch> = range
            .collect::<Vec<_>>()
            .chunks(BATCH)
            .map(|idx| pb::OutcomeBatch {
                dataset: name.into(),
                rows: idx
                    .iter()
                    .map(|&i| pb::OutcomeRow {
                        unit_key: format!("u{i}"),
                        value: data.outcome[i],
                        observed_at_ms: 0,
                    })
                    .collect(),
            })
            .collect();
        (preds, outcomes)
    };

    // Ingest throughput: one client stream of 1,000-unit batches.
    let batches = unit_batches(0..history);
    let t = Instant::now();
    intake
        .send_units(tokio_stream::iter(batches))
        .await
        .expect("units");
    let secs = t.elapsed().as_secs_f64();
    println!(
        "ingest units: {history} units with {FEATURES} features in {secs:.2} s = {:.0} units/s (batches of {BATCH}, durability full)",
        history as f64 / secs
    );
    let (preds, outcomes) = load(0..history);
    let t = Instant::now();
    intake
        .send_predictions(tokio_stream::iter(preds))
        .await
        .expect("predictions");
    let secs = t.elapsed().as_secs_f64();
    println!(
        "ingest predictions: {} rows in {secs:.2} s = {:.0} rows/s",
        history * MODELS,
        (history * MODELS) as f64 / secs
    );
    intake
        .send_outcomes(tokio_stream::iter(outcomes))
        .await
        .expect("outcomes");

    let t = Instant::now();
    let r = scoring
        .recompute(pb::RecomputeRequest {
            dataset: name.into(),
            refit: true,
        })
        .await
        .expect("refit")
        .into_inner();
    println!(
        "full refit + scoring on {} units, {MODELS} models: {:.2} s (server-side {:.0} ms); resident {:.0} MiB",
        r.units,
        t.elapsed().as_secs_f64(),
        r.millis,
        resident_mib()
    );

    intake
        .send_units(tokio_stream::iter(unit_batches(history..total)))
        .await
        .expect("cohort units");
    let (preds, outcomes) = load(history..total);
    intake
        .send_predictions(tokio_stream::iter(preds))
        .await
        .expect("cohort predictions");
    intake
        .send_outcomes(tokio_stream::iter(outcomes))
        .await
        .expect("cohort outcomes");
    let t = Instant::now();
    let r = scoring
        .recompute(pb::RecomputeRequest {
            dataset: name.into(),
            refit: false,
        })
        .await
        .expect("incremental")
        .into_inner();
    assert!(!r.refitted);
    println!(
        "incremental recompute after a {COHORT}-unit cohort on {history}: {:.2} s (server-side {:.0} ms)",
        t.elapsed().as_secs_f64(),
        r.millis
    );
    let t = Instant::now();
    let r = scoring
        .recompute(pb::RecomputeRequest {
            dataset: name.into(),
            refit: true,
        })
        .await
        .expect("refit")
        .into_inner();
    println!(
        "full refit on the same {} units: {:.2} s (server-side {:.0} ms); resident {:.0} MiB",
        r.units,
        t.elapsed().as_secs_f64(),
        r.millis,
        resident_mib()
    );
    srv.stop().await.expect("stop");
    let _ = std::fs::remove_dir_all(&dir);
}
