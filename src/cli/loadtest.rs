//! `plumbline loadtest`: drives a running server on this machine with
//! concurrent streaming clients while recomputes and a full refit run, and
//! reports ingest throughput and scoreboard read latency.
//!
//! It creates its own dataset (`loadtest-<time>`), so it needs an `admin`
//! token when the server requires tokens. It is bounded twice: by rows
//! (`--units`) and by wall time (`--seconds`), and refuses servers that are
//! not on a loopback address, so it cannot be pointed at production by
//! accident.
//!
//! Phases: (1) the first quarter of the units, their predictions and
//! outcomes, then a recompute, so that a scoreboard exists; (2) the rest,
//! streamed by `--clients` concurrent clients, while one task requests a
//! full refit and then incremental recomputes, and another reads the
//! cumulative scoreboard in a loop, on a connection of its own, and records
//! each read's latency.

use std::net::ToSocketAddrs;
use std::process::ExitCode;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use clap::Args;
use serde::Serialize;
use tonic::transport::Channel;

use super::client::{block_on_command, connect, request, status, Connection, Output};
use super::EXIT_BAD_INPUT;
use crate::api::pb;
use crate::synth::{candidates, draw, effect_moments, Design};

#[derive(Debug, Args)]
pub struct LoadtestArgs {
    #[command(flatten)]
    pub connection: Connection,
    /// Concurrent streaming clients.
    #[arg(long, default_value_t = 4)]
    pub clients: usize,
    /// Units in all (each also gets one outcome and one prediction per model).
    #[arg(long, default_value_t = 100_000)]
    pub units: usize,
    /// Stop sending after this many seconds, whatever is left.
    #[arg(long, default_value_t = 120)]
    pub seconds: u64,
    /// Features per unit.
    #[arg(long, default_value_t = 20)]
    pub features: usize,
    /// Models streaming predictions.
    #[arg(long, default_value_t = 5)]
    pub models: usize,
    /// Rows per batch.
    #[arg(long, default_value_t = 1000)]
    pub batch: usize,
    /// Seed of the generated data.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
}

/// Latency summary in milliseconds.
#[derive(Debug, Serialize, Default)]
pub struct Latency {
    pub reads: usize,
    pub p50_ms: f64,
    pub p99_ms: f64,
    pub max_ms: f64,
}

fn summarize(mut ms: Vec<f64>) -> Latency {
    if ms.is_empty() {
        return Latency::default();
    }
    ms.sort_by(f64::total_cmp);
    // Nearest-rank percentiles.
    let rank = |q: f64| ms[((q * ms.len() as f64).ceil() as usize).clamp(1, ms.len()) - 1];
    Latency {
        reads: ms.len(),
        p50_ms: rank(0.50),
        p99_ms: rank(0.99),
        max_ms: ms[ms.len() - 1],
    }
}

#[derive(Debug, Serialize)]
pub struct Report {
    pub dataset: String,
    pub clients: usize,
    pub units_sent: u64,
    pub rows_sent: u64,
    pub rows_accepted: u64,
    pub ingest_seconds: f64,
    pub rows_per_second: f64,
    pub units_per_second: f64,
    pub recomputes: u64,
    pub refit_seconds: f64,
    pub reads_during_refit: Latency,
    pub reads_overall: Latency,
    pub errors: Vec<String>,
    pub stopped_by_time: bool,
}

/// Refuses anything that does not resolve to loopback addresses only.
fn loopback_only(server: &str) -> Result<(), String> {
    let rest = server.split_once("://").map(|(_, r)| r).unwrap_or(server);
    let authority = rest.split('/').next().unwrap_or(rest);
    let addrs: Vec<_> = authority
        .to_socket_addrs()
        .map_err(|e| format!("--server {server}: {e}"))?
        .collect();
    if addrs.is_empty() || addrs.iter().any(|a| !a.ip().is_loopback()) {
        return Err(format!(
            "--server {server}: loadtest runs only against a server on this machine (a loopback address)"
        ));
    }
    Ok(())
}

struct Plan {
    name: String,
    units: Vec<pb::UnitRow>,
    outcomes: Vec<pb::OutcomeRow>,
    /// Per model, per unit.
    effects: Vec<(String, Vec<f64>)>,
}

fn plan(args: &LoadtestArgs, name: String) -> Plan {
    let design = Design::NieWagerB;
    let data = draw(design, args.units, args.features, 1.0, args.seed);
    let (_, var_tau) = effect_moments(design, 50_000, args.seed ^ 0x5eed);
    let cands = candidates(&data.tau, var_tau, args.models.clamp(1, 10), args.seed + 1);
    let units = (0..args.units)
        .map(|i| pb::UnitRow {
            key: format!("u{i}"),
            features: data.features.row(i).to_vec(),
            treatment: data.treatment[i] as u32,
            propensity: None,
            cohort: format!("c{}", i / 10_000),
            assigned_at_ms: 0,
            arm: String::new(),
        })
        .collect();
    let outcomes = (0..args.units)
        .map(|i| pb::OutcomeRow {
            unit_key: format!("u{i}"),
            value: data.outcome[i],
            observed_at_ms: 0,
        })
        .collect();
    let effects = cands
        .into_iter()
        .map(|c| (c.predictions.name, c.predictions.effects))
        .collect();
    Plan {
        name,
        units,
        outcomes,
        effects,
    }
}

struct Shared {
    plan: Plan,
    connection: Connection,
    batch: usize,
    deadline: Instant,
    rows_sent: AtomicU64,
    units_sent: AtomicU64,
    rows_accepted: AtomicU64,
    stopped_by_time: AtomicBool,
}

impl Shared {
    fn out_of_time(&self) -> bool {
        let late = Instant::now() >= self.deadline;
        if late {
            self.stopped_by_time.store(true, Ordering::Relaxed);
        }
        late
    }

    /// Streams units, then predictions, then outcomes for `range`, in
    /// batches; a prediction always reaches the server before its outcome.
    async fn send(&self, channel: Channel, range: std::ops::Range<usize>) -> Result<(), String> {
        let mut intake = pb::intake_client::IntakeClient::new(channel);
        let p = &self.plan;
        let chunks: Vec<std::ops::Range<usize>> = range
            .clone()
            .step_by(self.batch.max(1))
            .map(|s| s..(s + self.batch).min(range.end))
            .collect();
        for c in chunks {
            if self.out_of_time() {
                return Ok(());
            }
            let units = vec![pb::UnitBatch {
                dataset: p.name.clone(),
                rows: p.units[c.clone()].to_vec(),
            }];
            let r = intake
                .send_units(request(&self.connection, tokio_stream::iter(units))?)
                .await
                .map_err(status)?
                .into_inner();
            self.rows_accepted.fetch_add(r.accepted, Ordering::Relaxed);
            let preds: Vec<pb::PredictionBatch> = p
                .effects
                .iter()
                .map(|(model, effects)| pb::PredictionBatch {
                    dataset: p.name.clone(),
                    rows: c
                        .clone()
                        .map(|i| pb::PredictionRow {
                            model: model.clone(),
                            unit_key: p.units[i].key.clone(),
                            effect: effects[i],
                            predicted_at_ms: 0,
                            arm: String::new(),
                        })
                        .collect(),
                })
                .collect();
            let r = intake
                .send_predictions(request(&self.connection, tokio_stream::iter(preds))?)
                .await
                .map_err(status)?
                .into_inner();
            self.rows_accepted.fetch_add(r.accepted, Ordering::Relaxed);
            let outcomes = vec![pb::OutcomeBatch {
                dataset: p.name.clone(),
                rows: p.outcomes[c.clone()].to_vec(),
            }];
            let r = intake
                .send_outcomes(request(&self.connection, tokio_stream::iter(outcomes))?)
                .await
                .map_err(status)?
                .into_inner();
            self.rows_accepted.fetch_add(r.accepted, Ordering::Relaxed);
            let n = c.len() as u64;
            self.units_sent.fetch_add(n, Ordering::Relaxed);
            self.rows_sent
                .fetch_add(n * (2 + p.effects.len() as u64), Ordering::Relaxed);
        }
        Ok(())
    }
}

async fn recompute(
    connection: &Connection,
    channel: Channel,
    dataset: &str,
    refit: bool,
) -> Result<(), String> {
    pb::scoring_client::ScoringClient::new(channel)
        .recompute(request(
            connection,
            pb::RecomputeRequest {
                dataset: dataset.into(),
                refit,
                ..Default::default()
            },
        )?)
        .await
        .map_err(status)?;
    Ok(())
}

async fn drive(args: &LoadtestArgs) -> Result<Report, String> {
    loopback_only(&args.connection.server)?;
    if args.units < 200 || args.clients == 0 || args.batch == 0 {
        return Err("--units must be at least 200, --clients and --batch at least 1".into());
    }
    let channel = connect(&args.connection).await?;
    let c = &args.connection;
    let stamp = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis())
        .unwrap_or(0);
    let name = format!("loadtest-{stamp}");
    let plan = plan(args, name.clone());
    pb::dataset_registry_client::DatasetRegistryClient::new(channel.clone())
        .create_dataset(request(
            c,
            pb::CreateDatasetRequest {
                spec: Some(pb::DatasetSpec {
                    name: name.clone(),
                    feature_names: (1..=args.features.max(5))
                        .map(|j| format!("x{j}"))
                        .collect(),
                    outcome_kind: pb::OutcomeKind::Continuous as i32,
                    ..Default::default()
                }),
            },
        )?)
        .await
        .map_err(status)?;
    let mut models = pb::model_registry_client::ModelRegistryClient::new(channel.clone());
    for (model, _) in &plan.effects {
        models
            .register_model(request(
                c,
                pb::RegisterModelRequest {
                    dataset: name.clone(),
                    name: model.clone(),
                    version: "1".into(),
                    description: "loadtest".into(),
                },
            )?)
            .await
            .map_err(status)?;
    }
    let shared = Arc::new(Shared {
        plan,
        connection: c.clone(),
        batch: args.batch,
        deadline: Instant::now() + Duration::from_secs(args.seconds),
        rows_sent: AtomicU64::new(0),
        units_sent: AtomicU64::new(0),
        rows_accepted: AtomicU64::new(0),
        stopped_by_time: AtomicBool::new(false),
    });
    let mut errors = Vec::new();

    // Phase 1: a first quarter, so that a scoreboard exists to read.
    let warm = args.units / 4;
    let started = Instant::now();
    shared.send(channel.clone(), 0..warm).await?;
    recompute(c, channel.clone(), &name, false).await?;

    // Phase 2: concurrent clients, a refit then recomputes, a reader.
    let done = Arc::new(AtomicBool::new(false));
    let refitting = Arc::new(AtomicBool::new(true));
    let rest = warm..args.units;
    let per = rest.len().div_ceil(args.clients);
    let mut senders = Vec::new();
    for k in 0..args.clients {
        let s = rest.start + k * per;
        let e = (s + per).min(rest.end);
        if s >= e {
            continue;
        }
        let (shared, channel) = (Arc::clone(&shared), channel.clone());
        senders.push(tokio::spawn(
            async move { shared.send(channel, s..e).await },
        ));
    }
    let worker = {
        let (c, channel, name) = (c.clone(), channel.clone(), name.clone());
        let (done, refitting) = (Arc::clone(&done), Arc::clone(&refitting));
        tokio::spawn(async move {
            let t = Instant::now();
            let first = recompute(&c, channel.clone(), &name, true).await;
            let refit_seconds = t.elapsed().as_secs_f64();
            refitting.store(false, Ordering::Release);
            let mut count = 1u64;
            let mut errors: Vec<String> = first.err().into_iter().collect();
            while !done.load(Ordering::Acquire) {
                if let Err(e) = recompute(&c, channel.clone(), &name, false).await {
                    errors.push(e);
                }
                count += 1;
            }
            (refit_seconds, count, errors)
        })
    };
    // The reader has a connection of its own, as a dashboard does: on the
    // senders' connection each read would queue behind megabytes of intake
    // frames in the same TCP stream, and measure that instead.
    let reader_channel = connect(c).await?;
    let reader = {
        let (c, channel, name) = (c.clone(), reader_channel, name.clone());
        let (done, refitting) = (Arc::clone(&done), Arc::clone(&refitting));
        tokio::spawn(async move {
            let mut scoring = pb::scoring_client::ScoringClient::new(channel)
                .max_decoding_message_size(256 << 20);
            let (mut during, mut all, mut errors) = (Vec::new(), Vec::new(), Vec::new());
            loop {
                let finished = done.load(Ordering::Acquire);
                let in_refit = refitting.load(Ordering::Acquire);
                let t = Instant::now();
                let r = match request(
                    &c,
                    pb::GetScoreboardRequest {
                        dataset: name.clone(),
                        window: None,
                    },
                ) {
                    Ok(r) => scoring.get_scoreboard(r).await.map_err(status),
                    Err(e) => Err(e),
                };
                let ms = t.elapsed().as_secs_f64() * 1e3;
                match r {
                    Ok(_) => {
                        all.push(ms);
                        if in_refit {
                            during.push(ms);
                        }
                    }
                    Err(e) => errors.push(e),
                }
                if (finished && !in_refit) || errors.len() > 10 {
                    break;
                }
                tokio::time::sleep(Duration::from_millis(5)).await;
            }
            (during, all, errors)
        })
    };
    for s in senders {
        match s.await {
            Ok(Ok(())) => {}
            Ok(Err(e)) => errors.push(format!("client: {e}")),
            Err(e) => errors.push(format!("client task: {e}")),
        }
    }
    let ingest_seconds = started.elapsed().as_secs_f64();
    done.store(true, Ordering::Release);
    let (refit_seconds, recomputes, worker_errors) =
        worker.await.map_err(|e| format!("recompute task: {e}"))?;
    let (during, all, read_errors) = reader.await.map_err(|e| format!("reader task: {e}"))?;
    errors.extend(worker_errors.into_iter().map(|e| format!("recompute: {e}")));
    errors.extend(
        read_errors
            .into_iter()
            .map(|e| format!("scoreboard read: {e}")),
    );
    let rows_sent = shared.rows_sent.load(Ordering::Relaxed);
    let units_sent = shared.units_sent.load(Ordering::Relaxed);
    Ok(Report {
        dataset: name,
        clients: args.clients,
        units_sent,
        rows_sent,
        rows_accepted: shared.rows_accepted.load(Ordering::Relaxed),
        ingest_seconds,
        rows_per_second: rows_sent as f64 / ingest_seconds,
        units_per_second: units_sent as f64 / ingest_seconds,
        recomputes: recomputes + 1,
        refit_seconds,
        reads_during_refit: summarize(during),
        reads_overall: summarize(all),
        errors,
        stopped_by_time: shared.stopped_by_time.load(Ordering::Relaxed),
    })
}

fn print_table(r: &Report) {
    println!("load test on dataset {}", r.dataset);
    println!(
        "  ingest        {} units, {} rows in {:.1} s by {} clients: {:.0} rows/s, {:.0} units/s{}",
        r.units_sent,
        r.rows_sent,
        r.ingest_seconds,
        r.clients,
        r.rows_per_second,
        r.units_per_second,
        if r.stopped_by_time {
            " (stopped by --seconds)"
        } else {
            ""
        }
    );
    println!(
        "  recomputes    {} (the first a full refit of {:.1} s)",
        r.recomputes, r.refit_seconds
    );
    for (label, l) in [
        ("reads (refit)", &r.reads_during_refit),
        ("reads (all)", &r.reads_overall),
    ] {
        println!(
            "  {label:<13} {} scoreboard reads: p50 {:.2} ms, p99 {:.2} ms, max {:.2} ms",
            l.reads, l.p50_ms, l.p99_ms, l.max_ms
        );
    }
    if r.errors.is_empty() {
        println!("  errors        none");
    } else {
        println!("  errors        {}", r.errors.len());
        for e in &r.errors {
            println!("    {e}");
        }
    }
}

pub fn run(args: &LoadtestArgs) -> ExitCode {
    if let Err(e) = loopback_only(&args.connection.server) {
        eprintln!("plumbline loadtest: {e}");
        return ExitCode::from(EXIT_BAD_INPUT);
    }
    let work = async { drive(args).await.map_err(|e| (1, e)) };
    let report = match block_on_command("plumbline loadtest", work) {
        Ok(r) => r,
        Err(code) => return code,
    };
    match args.connection.format {
        Output::Json => match serde_json::to_string_pretty(&report) {
            Ok(s) => println!("{s}"),
            Err(e) => eprintln!("plumbline loadtest: {e}"),
        },
        Output::Table => print_table(&report),
    }
    if report.errors.is_empty() {
        ExitCode::SUCCESS
    } else {
        ExitCode::FAILURE
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn only_loopback_servers_are_accepted() {
        assert!(loopback_only("http://127.0.0.1:7070").is_ok());
        assert!(loopback_only("http://[::1]:7070").is_ok());
        assert!(loopback_only("127.0.0.1:7070").is_ok());
        let e = loopback_only("http://10.1.2.3:7070").expect_err("private address");
        assert!(e.contains("loopback"), "{e}");
    }

    #[test]
    fn nearest_rank_percentiles() {
        let l = summarize((1..=100).map(f64::from).collect());
        assert_eq!((l.p50_ms, l.p99_ms, l.max_ms), (50.0, 99.0, 100.0));
        assert_eq!(summarize(vec![]).reads, 0);
    }
}
