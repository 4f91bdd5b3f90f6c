//! A real server on ephemeral loopback ports with a temporary SQLite file,
//! and real tonic clients.
#![allow(dead_code)]

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::PathBuf;

use plumbline::api::pb;
use plumbline::config::Config;
use plumbline::server::{start, Running};
use plumbline::store::Durability;
use tonic::transport::Channel;

pub struct TempDir(pub PathBuf);

impl TempDir {
    pub fn new(tag: &str) -> Self {
        let p = std::env::temp_dir().join(format!(
            "plumbline-{tag}-{}-{}",
            std::process::id(),
            std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map(|d| d.as_nanos())
                .unwrap_or(0)
        ));
        std::fs::create_dir_all(&p).expect("temp dir");
        TempDir(p)
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

pub fn config(dir: &TempDir) -> Config {
    Config {
        listen: "127.0.0.1:0".parse().expect("addr"),
        metrics_listen: "127.0.0.1:0".parse().expect("addr"),
        durability: Durability::Normal,
        log_level: "warn".into(),
        ..Config::in_dir(dir.0.clone())
    }
}

pub async fn server(dir: &TempDir) -> Running {
    start(&config(dir)).await.expect("server starts")
}

pub struct Clients {
    pub datasets: pb::dataset_registry_client::DatasetRegistryClient<Channel>,
    pub models: pb::model_registry_client::ModelRegistryClient<Channel>,
    pub intake: pb::intake_client::IntakeClient<Channel>,
    pub scoring: pb::scoring_client::ScoringClient<Channel>,
    pub events: pb::event_feed_client::EventFeedClient<Channel>,
}

pub async fn clients(addr: SocketAddr) -> Clients {
    let channel = Channel::from_shared(format!("http://{addr}"))
        .expect("uri")
        .connect()
        .await
        .expect("connect");
    Clients {
        datasets: pb::dataset_registry_client::DatasetRegistryClient::new(channel.clone()),
        models: pb::model_registry_client::ModelRegistryClient::new(channel.clone()),
        intake: pb::intake_client::IntakeClient::new(channel.clone())
            .max_decoding_message_size(64 << 20),
        scoring: pb::scoring_client::ScoringClient::new(channel.clone())
            .max_decoding_message_size(64 << 20),
        events: pb::event_feed_client::EventFeedClient::new(channel),
    }
}

/// A plain HTTP/1.1 GET (enough for /metrics and the probes).
pub fn http_get(addr: SocketAddr, path: &str) -> (u16, String) {
    let mut s = TcpStream::connect(addr).expect("connect");
    write!(
        s,
        "GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\r\n"
    )
    .expect("write");
    let mut raw = String::new();
    s.read_to_string(&mut raw).expect("read");
    let status = raw
        .split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or(0);
    let body = raw
        .split_once("\r\n\r\n")
        .map(|(_, b)| b.to_string())
        .unwrap_or_default();
    // Undo chunked transfer encoding if present.
    if raw
        .to_ascii_lowercase()
        .contains("transfer-encoding: chunked")
    {
        let mut out = String::new();
        let mut rest = body.as_str();
        while let Some((size, tail)) = rest.split_once("\r\n") {
            let n = usize::from_str_radix(size.trim(), 16).unwrap_or(0);
            if n == 0 || tail.len() < n {
                break;
            }
            out.push_str(&tail[..n]);
            rest = &tail[n..];
            rest = rest.strip_prefix("\r\n").unwrap_or(rest);
        }
        return (status, out);
    }
    (status, body)
}

/// One sample: metric name, labels, value.
pub type Sample = (String, Vec<(String, String)>, f64);

/// Parses Prometheus / OpenMetrics text into samples.
pub fn parse_metrics(text: &str) -> Vec<Sample> {
    let mut out = Vec::new();
    for line in text.lines() {
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        let (series, value) = match line.rsplit_once(' ') {
            Some(p) => p,
            None => panic!("malformed sample line: {line:?}"),
        };
        let value: f64 = match value {
            "+Inf" => f64::INFINITY,
            "-Inf" => f64::NEG_INFINITY,
            v => v
                .parse()
                .unwrap_or_else(|_| panic!("bad value in {line:?}")),
        };
        let (name, labels) = match series.split_once('{') {
            Some((n, rest)) => {
                let inner = rest
                    .strip_suffix('}')
                    .unwrap_or_else(|| panic!("unclosed labels: {line:?}"));
                let labels = inner
                    .split("\",")
                    .filter(|p| !p.is_empty())
                    .map(|p| {
                        let (k, v) = p
                            .split_once("=\"")
                            .unwrap_or_else(|| panic!("bad label in {line:?}"));
                        (k.to_string(), v.trim_end_matches('"').to_string())
                    })
                    .collect();
                (n.to_string(), labels)
            }
            None => (series.to_string(), Vec::new()),
        };
        assert!(
            name.chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == ':'),
            "bad metric name {name:?}"
        );
        out.push((name, labels, value));
    }
    out
}

pub fn continuous_spec(name: &str, features: usize) -> pb::DatasetSpec {
    pb::DatasetSpec {
        name: name.into(),
        feature_names: (1..=features).map(|j| format!("x{j}")).collect(),
        outcome_kind: pb::OutcomeKind::Continuous as i32,
        seed: 3,
        recompute: Some(pb::RecomputePolicy {
            // Tests drive recomputes explicitly.
            every_outcomes: 1_000_000,
            every_seconds: 3600,
            ..Default::default()
        }),
        ..Default::default()
    }
}

pub fn unit_row(key: &str, x: &[f64], w: f64, p: Option<f64>, cohort: &str) -> pb::UnitRow {
    pb::UnitRow {
        key: key.into(),
        features: x.to_vec(),
        treatment: w as u32,
        propensity: p,
        cohort: cohort.into(),
        assigned_at_ms: 0,
        arm: String::new(),
    }
}

pub async fn send_units(
    c: &mut Clients,
    dataset: &str,
    rows: Vec<pb::UnitRow>,
) -> pb::IntakeReceipt {
    let batches: Vec<pb::UnitBatch> = rows
        .chunks(1000)
        .map(|r| pb::UnitBatch {
            dataset: dataset.into(),
            rows: r.to_vec(),
        })
        .collect();
    c.intake
        .send_units(tokio_stream::iter(batches))
        .await
        .expect("units accepted")
        .into_inner()
}

pub async fn send_outcomes(
    c: &mut Clients,
    dataset: &str,
    rows: Vec<pb::OutcomeRow>,
) -> pb::IntakeReceipt {
    let batches: Vec<pb::OutcomeBatch> = rows
        .chunks(1000)
        .map(|r| pb::OutcomeBatch {
            dataset: dataset.into(),
            rows: r.to_vec(),
        })
        .collect();
    c.intake
        .send_outcomes(tokio_stream::iter(batches))
        .await
        .expect("outcomes accepted")
        .into_inner()
}

pub async fn send_predictions(
    c: &mut Clients,
    dataset: &str,
    rows: Vec<pb::PredictionRow>,
) -> pb::IntakeReceipt {
    let batches: Vec<pb::PredictionBatch> = rows
        .chunks(1000)
        .map(|r| pb::PredictionBatch {
            dataset: dataset.into(),
            rows: r.to_vec(),
        })
        .collect();
    c.intake
        .send_predictions(tokio_stream::iter(batches))
        .await
        .expect("predictions accepted")
        .into_inner()
}

/// Creates a dataset of two continuous features and three folds over
/// `ch`, and registers `models` on it.
pub async fn create_with_models(ch: &Channel, dataset: &str, models: &[&str]) {
    let mut datasets = pb::dataset_registry_client::DatasetRegistryClient::new(ch.clone());
    let mut spec = continuous_spec(dataset, 2);
    spec.folds = 3;
    datasets
        .create_dataset(pb::CreateDatasetRequest { spec: Some(spec) })
        .await
        .expect("create");
    let mut registry = pb::model_registry_client::ModelRegistryClient::new(ch.clone());
    for m in models {
        registry
            .register_model(pb::RegisterModelRequest {
                dataset: dataset.into(),
                name: (*m).into(),
                version: "1".into(),
                description: String::new(),
            })
            .await
            .expect("register");
    }
}

pub async fn register(c: &mut Clients, dataset: &str, name: &str) {
    c.models
        .register_model(pb::RegisterModelRequest {
            dataset: dataset.into(),
            name: name.into(),
            version: "1".into(),
            description: String::new(),
        })
        .await
        .expect("register");
}

pub async fn recompute(c: &mut Clients, dataset: &str, refit: bool) -> pb::RecomputeResponse {
    c.scoring
        .recompute(pb::RecomputeRequest {
            dataset: dataset.into(),
            refit,
            ..Default::default()
        })
        .await
        .expect("recompute")
        .into_inner()
}

pub async fn board(c: &mut Clients, dataset: &str, kind: pb::window::Kind) -> pb::Scoreboard {
    c.scoring
        .get_scoreboard(pb::GetScoreboardRequest {
            dataset: dataset.into(),
            window: Some(pb::Window {
                kind: kind as i32,
                cohort: String::new(),
            }),
        })
        .await
        .expect("scoreboard")
        .into_inner()
}

pub async fn cohort_board(c: &mut Clients, dataset: &str, cohort: &str) -> pb::Scoreboard {
    c.scoring
        .get_scoreboard(pb::GetScoreboardRequest {
            dataset: dataset.into(),
            window: Some(pb::Window {
                kind: pb::window::Kind::Cohort as i32,
                cohort: cohort.into(),
            }),
        })
        .await
        .expect("cohort scoreboard")
        .into_inner()
}

/// Every numeric leaf of two JSON documents agrees to `tol` (relative to
/// max(1, |value|)); every key of one is in the other.
pub fn assert_json_close(a: &serde_json::Value, b: &serde_json::Value, tol: f64, path: &str) {
    use serde_json::Value::*;
    match (a, b) {
        (Number(x), Number(y)) => {
            let (x, y) = (
                x.as_f64().unwrap_or(f64::NAN),
                y.as_f64().unwrap_or(f64::NAN),
            );
            assert!(
                (x - y).abs() <= tol * x.abs().max(1.0),
                "{path}: {x} vs {y}"
            );
        }
        (Object(x), Object(y)) => {
            assert_eq!(
                x.keys().collect::<Vec<_>>(),
                y.keys().collect::<Vec<_>>(),
                "{path}: keys differ"
            );
            for (k, v) in x {
                assert_json_close(v, &y[k], tol, &format!("{path}.{k}"));
            }
        }
        (Array(x), Array(y)) => {
            assert_eq!(x.len(), y.len(), "{path}: lengths differ");
            for (i, (u, v)) in x.iter().zip(y).enumerate() {
                assert_json_close(u, v, tol, &format!("{path}[{i}]"));
            }
        }
        (x, y) => assert_eq!(x, y, "{path}"),
    }
}

/// The `plumbline serve` binary as a child process on free loopback ports.
pub struct ServeBinary {
    pub child: std::process::Child,
    pub grpc: SocketAddr,
    pub http: SocketAddr,
}

/// Starts `plumbline serve --data-dir dir` with `extra` arguments and the
/// given log level (stderr piped when `capture_logs`), and waits until
/// the gRPC port accepts connections.
pub fn serve_binary(dir: &TempDir, extra: &[&str], log: &str, capture_logs: bool) -> ServeBinary {
    let free = || {
        std::net::TcpListener::bind("127.0.0.1:0")
            .and_then(|l| l.local_addr())
            .expect("free port")
    };
    let (grpc, http) = (free(), free());
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"));
    command
        .arg("serve")
        .arg("--data-dir")
        .arg(&dir.0)
        .arg("--listen")
        .arg(grpc.to_string())
        .arg("--metrics-listen")
        .arg(http.to_string())
        .args(extra)
        .env("PLUMBLINE_LOG", log);
    if capture_logs {
        command.stderr(std::process::Stdio::piped());
    }
    let mut child = command.spawn().expect("spawn plumbline serve");
    for _ in 0..200 {
        if TcpStream::connect(grpc).is_ok() {
            return ServeBinary { child, grpc, http };
        }
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
    let _ = child.kill();
    let _ = child.wait();
    panic!("plumbline serve did not open {grpc} within 10 s");
}

impl ServeBinary {
    pub async fn channel(&self) -> Channel {
        Channel::from_shared(format!("http://{}", self.grpc))
            .expect("uri")
            .connect()
            .await
            .expect("connect to plumbline serve")
    }

    /// Sends SIGTERM and waits for the exit; the output holds the piped
    /// stderr when the server was started with `capture_logs`.
    pub fn terminate(mut self) -> std::process::Output {
        use std::io::Read;
        let pid = self.child.id().to_string();
        let killed = std::process::Command::new("kill")
            .args(["-TERM", &pid])
            .status()
            .expect("kill");
        assert!(killed.success());
        let mut stderr = Vec::new();
        if let Some(mut pipe) = self.child.stderr.take() {
            pipe.read_to_end(&mut stderr)
                .expect("read the server's stderr");
        }
        let status = self.child.wait().expect("wait");
        std::process::Output {
            status,
            stdout: Vec::new(),
            stderr,
        }
    }
}

/// A test that fails (panics) part-way must not leave its server running
/// until the whole test binary exits: dropping the handle kills a child
/// that is still alive and reaps it.
impl Drop for ServeBinary {
    fn drop(&mut self) {
        if let Ok(None) = self.child.try_wait() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

/// Every event of `dataset`, oldest first, paged through ListEvents.
pub async fn all_events(c: &mut Clients, dataset: &str) -> Vec<pb::Event> {
    let mut out: Vec<pb::Event> = Vec::new();
    loop {
        let after_id = out.last().map(|e| e.id).unwrap_or(0);
        let page = c
            .events
            .list_events(pb::ListEventsRequest {
                dataset: dataset.into(),
                after_id,
                limit: 1000,
            })
            .await
            .expect("list events")
            .into_inner()
            .events;
        if page.is_empty() {
            return out;
        }
        out.extend(page);
    }
}

/// What a policy switch at cohort `switch_at` must leave, one recompute per
/// cohort: growth refits after cohorts 0 to 2 and none at 3; a
/// `nuisance_misfit` event after the switch and none before, naming a
/// propensity check with its evidence; a refit within two cohorts of the
/// switch, whose `nuisance_refit` event has the misfit as its reason.
pub async fn assert_switch_found(
    c: &mut Clients,
    dataset: &str,
    refitted: &[bool],
    switch_at: usize,
) {
    let events = all_events(c, dataset).await;
    let misfits: Vec<&pb::Event> = events
        .iter()
        .filter(|e| e.kind == "nuisance_misfit")
        .collect();
    println!("refitted by recompute: {refitted:?}; misfit events: {misfits:#?}");
    // Growth refits (50%) come after cohorts 0 to 2; none is due at 3.
    assert_eq!(&refitted[..switch_at], &[true, true, true, false]);
    // A refit on the whole history blends the two policies, so misfits may
    // recur until the new policy's units dominate; none comes before the
    // switch (snapshots are numbered from 1, one per recompute).
    assert!(!misfits.is_empty());
    assert!(
        misfits.iter().all(|m| m.snapshot_id > switch_at as u64),
        "{misfits:?}"
    );
    let details: serde_json::Value = serde_json::from_str(&misfits[0].details_json).expect("json");
    assert!(
        details["component"]
            .as_str()
            .is_some_and(|c| c.starts_with("propensity")),
        "{details}"
    );
    let evidence = &details["evidence"];
    assert!(evidence["log_statistic"].as_f64() >= evidence["log_threshold"].as_f64());
    let found = refitted
        .iter()
        .enumerate()
        .skip(switch_at)
        .find(|(_, r)| **r)
        .map(|(k, _)| k)
        .expect("a refit after the switch");
    assert!(found <= switch_at + 1, "refit only after cohort {found}");
    let reasons: Vec<serde_json::Value> = events
        .iter()
        .filter(|e| e.kind == "nuisance_refit" && e.snapshot_id == misfits[0].snapshot_id)
        .map(|e| {
            serde_json::from_str::<serde_json::Value>(&e.details_json).expect("json")["reason"]
                .clone()
        })
        .collect();
    assert_eq!(reasons, ["misfit"]);
}
