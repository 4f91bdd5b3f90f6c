//! End-to-end service figures on generated data, with the real
//! `plumbline serve` binary as a child process, over loopback gRPC into
//! SQLite (durability full: every batch is fsynced before it is
//! acknowledged). For each history size n:
//!
//! - ingest: n units with 20 features in batches of 1,000 on one client
//!   stream, then 10 models' predictions and the outcomes;
//! - a full cross-fitted refit and scoring of every window;
//! - a new cohort of 10,000 units (predictions, outcomes) and the
//!   incremental recompute that scores it with the current nuisance fit;
//! - the server's peak resident memory (VmHWM) against the raw columns it
//!   holds: per unit 20 features and one outcome as f64, the treatment as a
//!   byte and 10 predictions as f64 (249 bytes), once before the refit
//!   (what the cache and the store hold) and once at the end (the refit's
//!   and the recomputes' working sets on top);
//! - a restart on the same data directory: the seconds until the cumulative
//!   scoreboard is served again (the cache rebuilt from SQLite and the fit
//!   reproduced) and the restarted server's peak memory.
//!
//! `cargo bench --bench service` runs n = 10,000 and 100,000 (about two
//! minutes). `PLUMBLINE_BENCH_MODELS=1000` registers a sweep of that many
//! models (`synth::sweep`) instead of the ten of graded quality. `PLUMBLINE_BENCH_SIZES=10000,100000,1000000` adds the 1M run
//! (several minutes); `PLUMBLINE_BENCH_SIZES=50000,100000,200000,400000`
//! shows how the incremental recompute grows with the history, and
//! `PLUMBLINE_BENCH_COHORT=5000` (or 20000, 40000) at one history size how it
//! grows with the size of the arriving block (default 10,000).
//! `PLUMBLINE_BENCH_MAX_FIT_UNITS=250000` starts the server with that
//! `limits.max_fit_units`, so a refit fits its nuisance models on a sample
//! of that many units (the server's default cap, 2,000,000, is above every
//! default size).
//!
//! The store: SQLite by default, its WAL's size sampled every 20 ms (the
//! largest is reported); `PLUMBLINE_BENCH_WAL_LIMIT_MIB=0` turns the WAL's
//! bound off (default 64). `PLUMBLINE_BENCH_STORE_URL=postgres://...` runs
//! the same on PostgreSQL instead: each size gets a new database on that
//! server (the URL names one to connect to for creating it).
//! `PLUMBLINE_BENCH_REPLICAS=3` (PostgreSQL only) starts that many servers
//! on the database and spreads every ingest over them, one client stream
//! per server, batches dealt in turn; refits and recomputes are asked of
//! the first server (its owner runs them if it does not own the dataset),
//! memory is the largest server's, and the restart is the first server's.

use std::net::TcpListener;
use std::path::PathBuf;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use plumbline::api::pb;
use plumbline::synth::{candidates, draw, effect_moments, sweep, Candidate, Design, Draw};
use tonic::transport::Channel;

const FEATURES: usize = 20;
const BATCH: usize = 1000;
/// Models registered and scored: 10 of graded quality, or with
/// `PLUMBLINE_BENCH_MODELS` (above 10) a sweep of that many (`synth::sweep`).
fn models_count() -> usize {
    std::env::var("PLUMBLINE_BENCH_MODELS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(10)
}
/// Units per cohort label, and the default size of the block of new units
/// scored by the incremental recompute.
const COHORT: usize = 10_000;

/// Units added after the refit: `PLUMBLINE_BENCH_COHORT` (default
/// [`COHORT`]); varying it at a fixed history shows the incremental cost
/// against the size of what arrived.
fn arriving() -> usize {
    std::env::var("PLUMBLINE_BENCH_COHORT")
        .ok()
        .and_then(|v| v.parse().ok())
        .filter(|&n| n > 0)
        .unwrap_or(COHORT)
}
/// The server's `limits.max_fit_units`, from `PLUMBLINE_BENCH_MAX_FIT_UNITS`
/// (None: the server's default).
fn max_fit_units() -> Option<usize> {
    std::env::var("PLUMBLINE_BENCH_MAX_FIT_UNITS")
        .ok()
        .and_then(|v| v.replace('_', "").parse().ok())
}

/// Raw bytes per unit: features and outcome as f64, treatment as a byte,
/// one f64 per model's prediction.
fn raw_bytes_per_unit() -> usize {
    8 * FEATURES + 8 + 1 + 8 * models_count()
}
const NAME: &str = "bench";

struct Row {
    units: usize,
    /// The largest size the SQLite WAL reached (0 on PostgreSQL).
    wal_max_mib: f64,
    ingest_units_per_s: f64,
    ingest_predictions_per_s: f64,
    refit_s: f64,
    incremental_s: f64,
    incremental_server_ms: f64,
    /// Whether the incremental recompute refreshed the cumulative window's
    /// rank metrics (it does when the block is at least
    /// `rank_refresh_growth`, 5%, of the history, or the history is under
    /// 50,000 units).
    incremental_refreshed: bool,
    refresh_server_ms: f64,
    intake_peak_mib: f64,
    peak_mib: f64,
    raw_mib: f64,
    restart_s: f64,
    restart_peak_mib: f64,
    /// Batches refused because another server numbered rows first, summed
    /// over the servers (0 with one server).
    conflicts: f64,
}

fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .map(|a| a.port())
        .expect("a free port")
}

/// Peak resident memory of a process, from /proc/PID/status.
fn peak_mib(pid: u32) -> f64 {
    std::fs::read_to_string(format!("/proc/{pid}/status"))
        .ok()
        .and_then(|s| {
            s.lines().find(|l| l.starts_with("VmHWM:")).and_then(|l| {
                l.split_whitespace()
                    .nth(1)
                    .and_then(|v| v.parse::<f64>().ok())
            })
        })
        .map(|kb| kb / 1024.0)
        .unwrap_or(0.0)
}

fn wal_limit_mib() -> Option<u64> {
    std::env::var("PLUMBLINE_BENCH_WAL_LIMIT_MIB")
        .ok()
        .and_then(|v| v.parse().ok())
}

fn store_url() -> Option<String> {
    std::env::var("PLUMBLINE_BENCH_STORE_URL").ok()
}

/// How many servers share the store (`PLUMBLINE_BENCH_REPLICAS`, default 1).
fn replicas() -> usize {
    let n = std::env::var("PLUMBLINE_BENCH_REPLICAS")
        .ok()
        .and_then(|v| v.parse().ok())
        .filter(|&n| n > 0)
        .unwrap_or(1);
    assert!(
        n == 1 || store_url().is_some(),
        "PLUMBLINE_BENCH_REPLICAS above 1 needs PLUMBLINE_BENCH_STORE_URL (servers share a PostgreSQL store)"
    );
    n
}

/// A new database for one size on the PostgreSQL server the URL names; its
/// URL.
async fn new_database(url: &str, tag: usize) -> String {
    use sqlx::Connection;
    let name = format!("plumbline_bench_{}_{tag}", std::process::id());
    let mut db = sqlx::PgConnection::connect(url)
        .await
        .expect("connect to PLUMBLINE_BENCH_STORE_URL");
    sqlx::raw_sql(sqlx::AssertSqlSafe(format!("CREATE DATABASE {name}")))
        .execute(&mut db)
        .await
        .expect("create the bench database");
    let base = url.split('?').next().unwrap_or(url);
    let server = base.rsplit_once('/').map_or(base, |(s, _)| s);
    format!("{server}/{name}")
}

/// The largest size the WAL file reaches while the bench runs, sampled
/// every 20 ms on a thread of its own.
struct WalWatch {
    largest: std::sync::Arc<std::sync::atomic::AtomicU64>,
    stop: std::sync::Arc<std::sync::atomic::AtomicBool>,
}

impl WalWatch {
    fn start(wal: PathBuf) -> WalWatch {
        use std::sync::atomic::Ordering;
        let largest = std::sync::Arc::new(std::sync::atomic::AtomicU64::new(0));
        let stop = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
        let (l, st) = (largest.clone(), stop.clone());
        std::thread::spawn(move || {
            while !st.load(Ordering::Relaxed) {
                let size = std::fs::metadata(&wal).map(|m| m.len()).unwrap_or(0);
                l.fetch_max(size, Ordering::Relaxed);
                std::thread::sleep(Duration::from_millis(20));
            }
        });
        WalWatch { largest, stop }
    }

    fn largest_mib(&self) -> f64 {
        self.largest.load(std::sync::atomic::Ordering::Relaxed) as f64 / (1024.0 * 1024.0)
    }
}

impl Drop for WalWatch {
    fn drop(&mut self) {
        self.stop.store(true, std::sync::atomic::Ordering::Relaxed);
    }
}

struct Server {
    child: Child,
    dir: PathBuf,
    addr: String,
    metrics_addr: String,
    store_url: Option<String>,
}

impl Server {
    /// The servers of one size: the first on a new store, the others on
    /// the same store.
    async fn start_all(tag: usize) -> Vec<Server> {
        let store_url = match store_url() {
            Some(url) => Some(new_database(&url, tag).await),
            None => None,
        };
        (0..replicas())
            .map(|i| Server::start(&format!("{tag}-{i}"), store_url.clone()))
            .collect()
    }

    fn start(tag: &str, store_url: Option<String>) -> Server {
        let dir =
            std::env::temp_dir().join(format!("plumbline-bench-{}-{tag}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        let addr = format!("127.0.0.1:{}", free_port());
        let metrics_addr = format!("127.0.0.1:{}", free_port());
        let child = Self::spawn(&dir, &addr, &metrics_addr, store_url.as_deref());
        Server {
            child,
            dir,
            addr,
            metrics_addr,
            store_url,
        }
    }

    /// The sum of this server's samples of a counter.
    fn counter(&self, name: &str) -> f64 {
        use std::io::{Read, Write};
        let mut text = String::new();
        if let Ok(mut s) = std::net::TcpStream::connect(&self.metrics_addr) {
            let _ = write!(
                s,
                "GET /metrics HTTP/1.0\r\nHost: {}\r\n\r\n",
                self.metrics_addr
            );
            let _ = s.read_to_string(&mut text);
        }
        text.lines()
            .filter(|l| l.starts_with(name))
            .filter_map(|l| l.rsplit(' ').next().and_then(|v| v.parse::<f64>().ok()))
            .sum()
    }

    /// Stops the server (SIGTERM, as an orchestrator does) and starts a new
    /// one on the same data directory and address.
    fn restart(&mut self) {
        let _ = Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status();
        let _ = self.child.wait();
        self.child = Self::spawn(
            &self.dir,
            &self.addr,
            &self.metrics_addr,
            self.store_url.as_deref(),
        );
    }

    fn spawn(
        dir: &std::path::Path,
        addr: &str,
        metrics_addr: &str,
        store_url: Option<&str>,
    ) -> Child {
        let mut command = Command::new(env!("CARGO_BIN_EXE_plumbline"));
        command.arg("serve");
        let mut config = String::new();
        if let Some(url) = store_url {
            config.push_str(&format!("store_url = \"{url}\"\n"));
        }
        if let Some(mib) = wal_limit_mib() {
            config.push_str(&format!("sqlite_wal_limit_mib = {mib}\n"));
        }
        config.push_str(&format!(
            "[limits]\nmax_models_per_dataset = {}\n",
            models_count().max(100)
        ));
        if let Some(cap) = max_fit_units() {
            config.push_str(&format!("max_fit_units = {cap}\n"));
        }
        if !config.is_empty() {
            let path = dir.with_extension("toml");
            std::fs::write(&path, config).expect("write the bench's configuration");
            command.arg("--config").arg(path);
        }
        command
            .args(["--listen", addr])
            .args(["--metrics-listen", metrics_addr])
            .arg("--data-dir")
            .arg(dir)
            .env("PLUMBLINE_LOG", "warn")
            .env("PLUMBLINE_DURABILITY", "full")
            .stdout(Stdio::null())
            .spawn()
            .expect("start plumbline serve")
    }

    async fn connect(&self) -> Channel {
        let deadline = Instant::now() + Duration::from_secs(60);
        loop {
            match Channel::from_shared(format!("http://{}", self.addr))
                .expect("uri")
                .connect()
                .await
            {
                Ok(c) => return c,
                Err(e) if Instant::now() > deadline => panic!("server did not start: {e}"),
                Err(_) => tokio::time::sleep(Duration::from_millis(100)).await,
            }
        }
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
        let _ = std::fs::remove_dir_all(&self.dir);
        let _ = std::fs::remove_file(self.dir.with_extension("toml"));
    }
}

fn unit_batches(data: &Draw, range: std::ops::Range<usize>) -> Vec<pb::UnitBatch> {
    range
        .collect::<Vec<_>>()
        .chunks(BATCH)
        .map(|idx| pb::UnitBatch {
            dataset: NAME.into(),
            rows: idx
                .iter()
                .map(|&i| pb::UnitRow {
                    key: format!("u{i}"),
                    features: data.features.row(i).to_vec(),
                    treatment: data.treatment[i] as u32,
                    propensity: None,
                    cohort: format!("c{}", i / COHORT),
                    assigned_at_ms: 0,
                    arm: String::new(),
                })
                .collect(),
        })
        .collect()
}

fn prediction_batches(
    cands: &[Candidate],
    range: std::ops::Range<usize>,
) -> Vec<pb::PredictionBatch> {
    let idx: Vec<usize> = range.collect();
    cands
        .iter()
        .flat_map(|c| {
            idx.chunks(BATCH)
                .map(|chunk| pb::PredictionBatch {
                    dataset: NAME.into(),
                    rows: chunk
                        .iter()
                        .map(|&i| pb::PredictionRow {
                            model: c.predictions.name.clone(),
                            unit_key: format!("u{i}"),
                            effect: c.predictions.effects[i],
                            predicted_at_ms: 0,
                            arm: String::new(),
                        })
                        .collect(),
                })
                .collect::<Vec<_>>()
        })
        .collect()
}

fn outcome_batches(data: &Draw, range: std::ops::Range<usize>) -> Vec<pb::OutcomeBatch> {
    range
        .collect::<Vec<_>>()
        .chunks(BATCH)
        .map(|idx| pb::OutcomeBatch {
            dataset: NAME.into(),
            rows: idx
                .iter()
                .map(|&i| pb::OutcomeRow {
                    unit_key: format!("u{i}"),
                    value: data.outcome[i],
                    observed_at_ms: 0,
                })
                .collect(),
        })
        .collect()
}

/// Deals `batches` in turn over one client stream per server and sends
/// the streams at once.
async fn spread<B, F, Fut>(channels: &[Channel], batches: Vec<B>, send: F)
where
    B: Send + 'static,
    F: Fn(pb::intake_client::IntakeClient<Channel>, Vec<B>) -> Fut,
    Fut: std::future::Future<Output = ()> + Send + 'static,
{
    let n = channels.len();
    let mut parts: Vec<Vec<B>> = (0..n).map(|_| Vec::new()).collect();
    for (i, b) in batches.into_iter().enumerate() {
        parts[i % n].push(b);
    }
    let tasks: Vec<_> = channels
        .iter()
        .zip(parts)
        .map(|(ch, part)| {
            tokio::spawn(send(pb::intake_client::IntakeClient::new(ch.clone()), part))
        })
        .collect();
    for t in tasks {
        t.await.expect("a client stream");
    }
}

async fn units_stream(mut c: pb::intake_client::IntakeClient<Channel>, b: Vec<pb::UnitBatch>) {
    c.send_units(tokio_stream::iter(b)).await.expect("units");
}

async fn predictions_stream(
    mut c: pb::intake_client::IntakeClient<Channel>,
    b: Vec<pb::PredictionBatch>,
) {
    c.send_predictions(tokio_stream::iter(b))
        .await
        .expect("predictions");
}

async fn outcomes_stream(
    mut c: pb::intake_client::IntakeClient<Channel>,
    b: Vec<pb::OutcomeBatch>,
) {
    c.send_outcomes(tokio_stream::iter(b))
        .await
        .expect("outcomes");
}

async fn measure(history: usize) -> Row {
    let mut servers = Server::start_all(history).await;
    let wal = WalWatch::start(servers[0].dir.join("plumbline.sqlite-wal"));
    let mut channels = Vec::new();
    for s in &servers {
        channels.push(s.connect().await);
    }
    let channel = channels[0].clone();
    let mut datasets = pb::dataset_registry_client::DatasetRegistryClient::new(channel.clone());
    let mut models = pb::model_registry_client::ModelRegistryClient::new(channel.clone());
    let mut scoring = pb::scoring_client::ScoringClient::new(channel.clone())
        .max_decoding_message_size(256 << 20);
    datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(pb::DatasetSpec {
                name: NAME.into(),
                feature_names: (1..=FEATURES).map(|j| format!("x{j}")).collect(),
                outcome_kind: pb::OutcomeKind::Continuous as i32,
                recompute: Some(pb::RecomputePolicy {
                    every_outcomes: u32::MAX,
                    every_seconds: 86_400,
                    refit_growth: 10.0,
                    ..Default::default()
                }),
                ..Default::default()
            }),
        })
        .await
        .expect("create");
    let total = history + arriving();
    let data = draw(Design::NieWagerB, total, FEATURES, 1.0, 1);
    let (_, var_tau) = effect_moments(Design::NieWagerB, 100_000, 2);
    let cands = if models_count() > 10 {
        sweep(&data.tau, var_tau, models_count(), 3)
    } else {
        candidates(&data.tau, var_tau, models_count(), 3)
    };
    for c in &cands {
        models
            .register_model(pb::RegisterModelRequest {
                dataset: NAME.into(),
                name: c.predictions.name.clone(),
                version: "1".into(),
                description: String::new(),
            })
            .await
            .expect("register");
    }

    let batches = unit_batches(&data, 0..history);
    let t = Instant::now();
    spread(&channels, batches, units_stream).await;
    let ingest_units_per_s = history as f64 / t.elapsed().as_secs_f64();
    let preds = prediction_batches(&cands, 0..history);
    let t = Instant::now();
    spread(&channels, preds, predictions_stream).await;
    let ingest_predictions_per_s = (history * models_count()) as f64 / t.elapsed().as_secs_f64();
    spread(
        &channels,
        outcome_batches(&data, 0..history),
        outcomes_stream,
    )
    .await;
    let conflicts = servers
        .iter()
        .map(|s| s.counter("plumbline_ingest_conflicts_total"))
        .sum::<f64>();

    let largest_peak = |servers: &[Server]| {
        servers
            .iter()
            .map(|s| peak_mib(s.child.id()))
            .fold(0.0, f64::max)
    };
    let intake_peak_mib = largest_peak(&servers);
    let t = Instant::now();
    let r = scoring
        .recompute(pb::RecomputeRequest {
            dataset: NAME.into(),
            refit: true,
            ..Default::default()
        })
        .await
        .expect("refit")
        .into_inner();
    assert!(r.refitted);
    let refit_s = t.elapsed().as_secs_f64();

    spread(&channels, unit_batches(&data, history..total), units_stream).await;
    spread(
        &channels,
        prediction_batches(&cands, history..total),
        predictions_stream,
    )
    .await;
    spread(
        &channels,
        outcome_batches(&data, history..total),
        outcomes_stream,
    )
    .await;
    let t = Instant::now();
    let r = scoring
        .recompute(pb::RecomputeRequest {
            dataset: NAME.into(),
            refit: false,
            ..Default::default()
        })
        .await
        .expect("incremental")
        .into_inner();
    assert!(!r.refitted);
    assert_eq!(r.units, total as u64);
    let incremental_s = t.elapsed().as_secs_f64();
    let incremental_server_ms = r.millis;
    // The recompute's board (a server that does not own the dataset shows
    // it after its next follow round).
    let cumulative = loop {
        let b = scoring
            .get_scoreboard(pb::GetScoreboardRequest {
                dataset: NAME.into(),
                window: None,
            })
            .await
            .expect("board")
            .into_inner();
        if b.snapshot_id >= r.snapshot_id {
            break b;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    let (units, ranked) = (cumulative.units, cumulative.rank_metrics_units);
    let incremental_refreshed = units == ranked;
    // The rank refresh that the incremental recompute skipped (or did), on
    // request: what a recompute costs once the window has grown by the
    // refresh share.
    let r = scoring
        .recompute(pb::RecomputeRequest {
            dataset: NAME.into(),
            refresh_ranks: true,
            ..Default::default()
        })
        .await
        .expect("rank refresh")
        .into_inner();
    let refresh_server_ms = r.millis;
    let peak = largest_peak(&servers);

    let t = Instant::now();
    let server = &mut servers[0];
    server.restart();
    let mut scoring = pb::scoring_client::ScoringClient::new(server.connect().await)
        .max_decoding_message_size(256 << 20);
    loop {
        let board = scoring
            .get_scoreboard(pb::GetScoreboardRequest {
                dataset: NAME.into(),
                window: None,
            })
            .await;
        if board.is_ok() {
            break;
        }
        assert!(
            t.elapsed() < Duration::from_secs(1800),
            "no scoreboard after restart"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let restart_s = t.elapsed().as_secs_f64();
    Row {
        units: history,
        wal_max_mib: wal.largest_mib(),
        ingest_units_per_s,
        ingest_predictions_per_s,
        refit_s,
        incremental_s,
        incremental_server_ms,
        incremental_refreshed,
        refresh_server_ms,
        intake_peak_mib,
        peak_mib: peak,
        raw_mib: (total * raw_bytes_per_unit()) as f64 / (1024.0 * 1024.0),
        restart_s,
        restart_peak_mib: peak_mib(server.child.id()),
        conflicts,
    }
}

#[tokio::main(flavor = "multi_thread", worker_threads = 2)]
async fn main() {
    let sizes: Vec<usize> = std::env::var("PLUMBLINE_BENCH_SIZES")
        .unwrap_or_else(|_| "10000,100000".into())
        .split(',')
        .filter_map(|s| s.trim().replace('_', "").parse().ok())
        .collect();
    let mut rows = Vec::new();
    for &n in &sizes {
        let row = measure(n).await;
        eprintln!(
            "n = {n}: ingest {:.0} units/s, refit {:.2} s, incremental {:.3} s, WAL at most {:.1} MiB, \
             {} batches renumbered",
            row.ingest_units_per_s, row.refit_s, row.incremental_s, row.wal_max_mib, row.conflicts as u64
        );
        rows.push(row);
    }
    println!(
        "\n{:>9} | {:>13} | {:>13} | {:>9} | {:>19} | {:>10} | {:>10} | {:>8} | {:>8} | {:>8} | {:>9} | {:>11}",
        "history",
        "units/s",
        "predictions/s",
        "refit s",
        "incremental s (ms)",
        "refresh ms",
        "intake MiB",
        "peak MiB",
        "raw MiB",
        "peak/raw",
        "restart s",
        "restart MiB"
    );
    for r in &rows {
        println!(
            "{:>9} | {:>13.0} | {:>13.0} | {:>9.2} | {:>9.3} ({:>6.0}){} | {:>10.0} | {:>10.0} | {:>8.0} | {:>8.0} | {:>8.2} | {:>9.2} | {:>11.0}",
            r.units,
            r.ingest_units_per_s,
            r.ingest_predictions_per_s,
            r.refit_s,
            r.incremental_s,
            r.incremental_server_ms,
            if r.incremental_refreshed { " R" } else { "  " },
            r.refresh_server_ms,
            r.intake_peak_mib,
            r.peak_mib,
            r.raw_mib,
            r.peak_mib / r.raw_mib,
            r.restart_s,
            r.restart_peak_mib
        );
    }
    println!(
        "(refit: full cross-fitted refit and scoring of the history; incremental: recompute after a \
{}-unit block of new units with the current fit, R where it refreshed the cumulative \
window's rank metrics; refresh: a recompute asked to refresh them, server time; intake MiB: peak before the refit, \
the cache and the store; raw: {} bytes per unit; restart: \
SIGTERM, start on the same data, until the scoreboard is served, and that process's peak; \
models: {}; limits.max_fit_units: {}; store: {}; servers: {}; largest SQLite WAL {}; batches renumbered {})",
        arriving(),
        raw_bytes_per_unit(),
        models_count(),
        max_fit_units().map_or("the default".to_string(), |c| c.to_string()),
        if store_url().is_some() { "PostgreSQL" } else { "SQLite" },
        replicas(),
        rows.iter()
            .map(|r| format!("{:.1} MiB", r.wal_max_mib))
            .collect::<Vec<_>>()
            .join(", "),
        rows.iter()
            .map(|r| format!("{}", r.conflicts as u64))
            .collect::<Vec<_>>()
            .join(", ")
    );
}
