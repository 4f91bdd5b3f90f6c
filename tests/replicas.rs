//! Several servers on one PostgreSQL database: three `plumbline serve`
//! processes (the real binary, on loopback ports) share a throwaway
//! cluster (`common/pg.rs`); clients spread their calls over all three and
//! move to the next server when one fails. At 20 seeded points the test
//! SIGKILLs the server that owns the dataset (some kills land mid-call),
//! times how long the dataset goes without an owner, and starts a new
//! server in its place. Then it checks:
//!
//! - every acknowledged row is stored, once; nothing stored was not sent;
//! - every call is all-or-nothing: its retry is wholly new or wholly a
//!   duplicate of what the failed attempt committed;
//! - another server took the lease within the lease period in every trial
//!   (the largest takeover is printed);
//! - a refit asked at a server that does not own the dataset (its owner
//!   runs it) gives the same scoreboard as a single SQLite server fed the
//!   same rows in the same order (to 1e-9).
//!
//! Skips, saying so, where PostgreSQL's server is not installed (fails
//! under CI=true).

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, RwLock};
use std::time::{Duration, Instant};

use common::pg::PgCluster;
use common::service::*;
use plumbline::api::pb;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use sqlx::Connection;
use tonic::transport::Channel;

const KILLS: usize = 20;
/// Short, so 20 takeovers fit in CI; the rule checked is the same for any
/// period.
const LEASE_SECONDS: u64 = 3;
const REPLICAS: usize = 3;
const CLIENTS: usize = 3;
const PER_BATCH: usize = 25;
const DS: &str = "fleet";
const MODELS: [&str; 2] = ["m-linear", "m-flat"];

/// A server process, killed when dropped.
struct Replica {
    serve: Option<ServeBinary>,
    name: String,
}

impl Replica {
    fn start(dir: &TempDir, url: &str, name: &str) -> Replica {
        let config = dir.0.join(format!("{name}.toml"));
        std::fs::write(
            &config,
            format!(
                "store_url = \"{url}\"\nlease_seconds = {LEASE_SECONDS}\nreplica_name = \"{name}\"\n"
            ),
        )
        .expect("config");
        let config = config.display().to_string();
        Replica {
            serve: Some(serve_binary(dir, &["--config", &config], "warn", false)),
            name: name.into(),
        }
    }

    fn grpc(&self) -> std::net::SocketAddr {
        self.serve.as_ref().map(|s| s.grpc).expect("running")
    }

    /// This server's samples of `metric` for the dataset.
    fn samples(&self, metric: &str) -> Vec<f64> {
        let http = self.serve.as_ref().map(|s| s.http).expect("running");
        let (status, text) = http_get(http, "/metrics");
        assert_eq!(status, 200, "/metrics");
        parse_metrics(&text)
            .into_iter()
            .filter(|(name, labels, _)| {
                name == metric && labels.iter().any(|(k, v)| k == "dataset" && v == DS)
            })
            .map(|(_, _, v)| v)
            .collect()
    }

    /// Whether `/readyz` says this server owns the dataset.
    fn owns(&self) -> bool {
        let Some(s) = &self.serve else { return false };
        let Ok((status, body)) = std::panic::catch_unwind(|| http_get(s.http, "/readyz")) else {
            return false;
        };
        status == 200
            && body
                .lines()
                .find_map(|l| l.strip_prefix("owns: "))
                .is_some_and(|names| names.split(", ").any(|n| n == DS))
    }

    fn kill(&mut self) {
        if let Some(mut s) = self.serve.take() {
            s.child.kill().expect("SIGKILL");
            s.child.wait().expect("reap");
        }
    }
}

impl Drop for Replica {
    fn drop(&mut self) {
        self.kill();
    }
}

/// One call of the workload: a batch of units, their predictions or their
/// outcomes.
#[derive(Clone)]
enum Call {
    Units(Vec<pb::UnitRow>),
    Predictions(Vec<pb::PredictionRow>),
    Outcomes(Vec<pb::OutcomeRow>),
}

impl Call {
    fn rows(&self) -> u64 {
        match self {
            Call::Units(r) => r.len() as u64,
            Call::Predictions(r) => r.len() as u64,
            Call::Outcomes(r) => r.len() as u64,
        }
    }

    async fn send(&self, ch: Channel) -> Result<(u64, u64), tonic::Status> {
        let mut intake = pb::intake_client::IntakeClient::new(ch);
        let timeout = Duration::from_secs(10);
        let receipt = match self {
            Call::Units(rows) => {
                let mut r = tonic::Request::new(tokio_stream::iter(vec![pb::UnitBatch {
                    dataset: DS.into(),
                    rows: rows.clone(),
                }]));
                r.set_timeout(timeout);
                intake.send_units(r).await?
            }
            Call::Predictions(rows) => {
                let mut r = tonic::Request::new(tokio_stream::iter(vec![pb::PredictionBatch {
                    dataset: DS.into(),
                    rows: rows.clone(),
                }]));
                r.set_timeout(timeout);
                intake.send_predictions(r).await?
            }
            Call::Outcomes(rows) => {
                let mut r = tonic::Request::new(tokio_stream::iter(vec![pb::OutcomeBatch {
                    dataset: DS.into(),
                    rows: rows.clone(),
                }]));
                r.set_timeout(timeout);
                intake.send_outcomes(r).await?
            }
        }
        .into_inner();
        Ok((receipt.accepted, receipt.duplicate))
    }
}

/// Batch `b` of client `c`: units with a known effect, both models'
/// predictions, outcomes; seeded by (c, b).
fn batch(c: usize, b: usize) -> [Call; 3] {
    let mut rng = ChaCha8Rng::seed_from_u64((c as u64) << 32 | b as u64);
    let (mut units, mut predictions, mut outcomes) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..PER_BATCH {
        let key = format!("c{c}-b{b}-u{i}");
        let x = [rng.gen_range(-1.0..1.0), rng.gen_range(-1.0..1.0)];
        let w = f64::from(rng.gen_range(0..2u8));
        let tau = 1.0 + x[1];
        let y = x[0] + w * tau + rng.gen_range(-0.5..0.5);
        units.push(unit_row(&key, &x, w, Some(0.5), &format!("c{}", b % 4)));
        for (m, effect) in MODELS.iter().zip([tau, 1.0]) {
            predictions.push(pb::PredictionRow {
                model: (*m).into(),
                unit_key: key.clone(),
                effect,
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
    [
        Call::Units(units),
        Call::Predictions(predictions),
        Call::Outcomes(outcomes),
    ]
}

/// What the clients saw.
#[derive(Default)]
struct Seen {
    /// Acknowledged calls: (client, batch, phase) -> rows accepted as new.
    acked: BTreeMap<(usize, usize, usize), u64>,
    /// Failed attempts (the server died or was unreachable).
    failed_attempts: usize,
    /// Retries that found their rows already committed by a failed attempt.
    committed_before_ack: usize,
}

async fn channel(addr: std::net::SocketAddr) -> Option<Channel> {
    Channel::from_shared(format!("http://{addr}"))
        .ok()?
        .connect_timeout(Duration::from_millis(300))
        .connect()
        .await
        .ok()
}

/// A client: sends its batches in order, each call to the next server in
/// turn, until `stop`; a failed call is retried on the next server.
async fn client(
    c: usize,
    addrs: Arc<RwLock<Vec<std::net::SocketAddr>>>,
    stop: Arc<AtomicBool>,
    seen: Arc<Mutex<Seen>>,
    calls: Arc<AtomicUsize>,
) -> usize {
    let mut turn = c;
    let mut b = 0;
    while !stop.load(Ordering::Acquire) {
        for (phase, call) in batch(c, b).iter().enumerate() {
            let mut failed = false;
            loop {
                let addr = {
                    let a = addrs.read().expect("addrs");
                    a[turn % a.len()]
                };
                turn += 1;
                let result = match channel(addr).await {
                    Some(ch) => call.send(ch).await,
                    None => Err(tonic::Status::unavailable("connect")),
                };
                match result {
                    Ok((accepted, duplicate)) => {
                        let n = call.rows();
                        assert!(
                            (accepted, duplicate) == (n, 0)
                                || (failed && (accepted, duplicate) == (0, n)),
                            "client {c} batch {b} phase {phase}: {accepted} new and {duplicate} \
                             duplicate of {n} (failed before: {failed})"
                        );
                        let mut s = seen.lock().expect("seen");
                        s.acked.insert((c, b, phase), accepted);
                        if accepted == 0 {
                            s.committed_before_ack += 1;
                        }
                        calls.fetch_add(1, Ordering::AcqRel);
                        break;
                    }
                    Err(status) => {
                        // A dataset not yet known to a server that just
                        // started is as retryable as a dead server.
                        assert!(
                            matches!(
                                status.code(),
                                tonic::Code::Unavailable
                                    | tonic::Code::Unknown
                                    | tonic::Code::Cancelled
                                    | tonic::Code::DeadlineExceeded
                                    | tonic::Code::NotFound
                                    | tonic::Code::Internal
                            ),
                            "client {c} batch {b} phase {phase}: {status}"
                        );
                        failed = true;
                        seen.lock().expect("seen").failed_attempts += 1;
                        tokio::time::sleep(Duration::from_millis(20)).await;
                    }
                }
            }
        }
        b += 1;
        tokio::time::sleep(Duration::from_millis(15)).await;
    }
    b
}

/// The dataset's lease as the store has it: holder and epoch.
async fn lease(db: &mut sqlx::PgConnection) -> (String, i64) {
    sqlx::query_as(
        "SELECT l.holder, l.epoch FROM dataset_leases l JOIN datasets d ON d.id = l.dataset_id \
         WHERE d.name = $1",
    )
    .bind(DS)
    .fetch_one(db)
    .await
    .expect("lease row")
}

/// The holder-name prefix of a replica (the holder adds pid and suffix).
fn victim_name(replicas: &Arc<Mutex<Vec<Replica>>>, i: usize) -> String {
    format!("{}/", replicas.lock().expect("replicas")[i].name)
}

async fn owner(replicas: &Arc<Mutex<Vec<Replica>>>) -> Option<usize> {
    let r = replicas.lock().expect("replicas");
    r.iter().position(|r| r.owns())
}

/// The stored rows in storage order: unit keys by number, outcome keys by
/// number, (model, unit) prediction pairs.
async fn read_store(url: &str) -> (Vec<String>, Vec<String>, Vec<(String, String)>) {
    let mut db = sqlx::PgConnection::connect(url).await.expect("connect");
    let units: Vec<String> = sqlx::query_scalar("SELECT key FROM units ORDER BY seq")
        .fetch_all(&mut db)
        .await
        .expect("units");
    let outcomes: Vec<String> = sqlx::query_scalar(
        "SELECT u.key FROM outcomes o JOIN units u \
         ON u.dataset_id = o.dataset_id AND u.seq = o.unit_seq ORDER BY o.seq",
    )
    .fetch_all(&mut db)
    .await
    .expect("outcomes");
    let predictions: Vec<(String, String)> = sqlx::query_as(
        "SELECT m.name, u.key FROM predictions p JOIN models m ON m.id = p.model_id \
         JOIN units u ON u.dataset_id = p.dataset_id AND u.seq = p.unit_seq ORDER BY p.seq",
    )
    .fetch_all(&mut db)
    .await
    .expect("predictions");
    db.close().await.expect("close");
    (units, outcomes, predictions)
}

async fn setup(ch: &Channel) {
    create_with_models(ch, DS, &MODELS).await;
}

/// The cumulative scoreboard after a full refit asked at this server, as
/// JSON: once the server shows the refit's board (at once on the owner,
/// within a follow round elsewhere).
async fn refit_board(ch: &Channel) -> serde_json::Value {
    let mut scoring =
        pb::scoring_client::ScoringClient::new(ch.clone()).max_decoding_message_size(64 << 20);
    let done = scoring
        .recompute(pb::RecomputeRequest {
            dataset: DS.into(),
            refit: true,
            ..Default::default()
        })
        .await
        .expect("recompute")
        .into_inner();
    assert!(done.refitted, "a refit was asked for");
    let deadline = Instant::now() + Duration::from_secs(10);
    loop {
        let board = scoring
            .get_scoreboard(pb::GetScoreboardRequest {
                dataset: DS.into(),
                window: Some(pb::Window {
                    kind: pb::window::Kind::Cumulative as i32,
                    cohort: String::new(),
                }),
            })
            .await
            .expect("scoreboard")
            .into_inner();
        if board.snapshot_id >= done.snapshot_id {
            return serde_json::from_str(&board.json).expect("board json");
        }
        assert!(Instant::now() < deadline, "the refit's board never showed");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn three_servers_lose_no_acknowledged_row_when_owners_are_killed() {
    let Some(cluster) = PgCluster::start("replicas") else {
        return;
    };
    let url = cluster.database("fleet");
    let dir = TempDir::new("replicas");
    let started = Instant::now();
    let mut spawned = 0;
    let mut next_name = || {
        spawned += 1;
        format!("r{spawned}")
    };
    let first: Vec<Replica> = (0..REPLICAS)
        .map(|_| Replica::start(&dir, &url, &next_name()))
        .collect();
    let ch = channel(first[0].grpc()).await.expect("connect");
    setup(&ch).await;
    let addrs = Arc::new(RwLock::new(
        first.iter().map(Replica::grpc).collect::<Vec<_>>(),
    ));
    let replicas = Arc::new(Mutex::new(first));

    let stop = Arc::new(AtomicBool::new(false));
    let seen = Arc::new(Mutex::new(Seen::default()));
    let calls = Arc::new(AtomicUsize::new(0));
    let clients: Vec<_> = (0..CLIENTS)
        .map(|c| {
            tokio::spawn(client(
                c,
                Arc::clone(&addrs),
                Arc::clone(&stop),
                Arc::clone(&seen),
                Arc::clone(&calls),
            ))
        })
        .collect();

    let mut rng = ChaCha8Rng::seed_from_u64(16);
    let mut takeovers = Vec::new();
    let mut rebuilt = Vec::new();
    let mut db = sqlx::PgConnection::connect(&url).await.expect("connect");
    for trial in 0..KILLS {
        // A seeded moment: after a seeded number of further acknowledged
        // calls, plus a seeded delay of up to 5 ms, while calls are in
        // flight.
        let wait_calls = calls.load(Ordering::Acquire) + rng.gen_range(3..30);
        let extra = Duration::from_micros(rng.gen_range(0..5_000));
        let deadline = Instant::now() + Duration::from_secs(60);
        while calls.load(Ordering::Acquire) < wait_calls {
            assert!(
                Instant::now() < deadline,
                "trial {trial}: the clients stalled"
            );
            tokio::time::sleep(Duration::from_millis(2)).await;
        }
        let victim = loop {
            if let Some(i) = owner(&replicas).await {
                break i;
            }
            assert!(
                Instant::now() < deadline,
                "trial {trial}: no server owns the dataset"
            );
            tokio::time::sleep(Duration::from_millis(20)).await;
        };
        tokio::time::sleep(extra).await;
        let (_, epoch) = lease(&mut db).await;
        let killed_at = Instant::now();
        replicas.lock().expect("replicas")[victim].kill();
        // Until the store shows another holder's lease: the takeover. Then
        // until that server says it owns the dataset: rebuilt and serving.
        let took = loop {
            let (holder, now) = lease(&mut db).await;
            if now > epoch {
                let dead = victim_name(&replicas, victim);
                assert!(
                    !holder.starts_with(&dead),
                    "trial {trial}: {holder} after {dead}"
                );
                break killed_at.elapsed();
            }
            assert!(
                killed_at.elapsed() < Duration::from_secs(LEASE_SECONDS * 4),
                "trial {trial}: nobody took the dataset over"
            );
            tokio::time::sleep(Duration::from_millis(10)).await;
        };
        while owner(&replicas).await.is_none() {
            assert!(
                killed_at.elapsed() < Duration::from_secs(LEASE_SECONDS * 10),
                "trial {trial}: the new owner never became ready"
            );
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        let serving = killed_at.elapsed();
        takeovers.push(took);
        rebuilt.push(serving - took);
        // A new server in the dead one's place.
        let fresh = Replica::start(&dir, &url, &next_name());
        let addr = fresh.grpc();
        {
            let mut r = replicas.lock().expect("replicas");
            println!(
                "trial {trial:2}: killed {} (owner) after {} calls; lease taken in {:.2} s, \
                 the new owner serving {:.2} s later",
                r[victim].name,
                calls.load(Ordering::Acquire),
                took.as_secs_f64(),
                (serving - took).as_secs_f64()
            );
            r[victim] = fresh;
        }
        addrs.write().expect("addrs")[victim] = addr;
    }
    stop.store(true, Ordering::Release);
    let mut batches = Vec::new();
    for c in clients {
        batches.push(c.await.expect("client"));
    }

    // Every acknowledged row stored, once; nothing stored that was not sent.
    let (units, outcome_keys, predictions) = read_store(&url).await;
    let sent_units: BTreeSet<String> = batches
        .iter()
        .enumerate()
        .flat_map(|(c, &n)| {
            (0..n).flat_map(move |b| (0..PER_BATCH).map(move |i| format!("c{c}-b{b}-u{i}")))
        })
        .collect();
    let stored_units: BTreeSet<String> = units.iter().cloned().collect();
    assert_eq!(stored_units.len(), units.len(), "a unit stored twice");
    assert_eq!(
        stored_units, sent_units,
        "units stored are the units acknowledged"
    );
    let stored_outcomes: BTreeSet<String> = outcome_keys.iter().cloned().collect();
    assert_eq!(
        stored_outcomes.len(),
        outcome_keys.len(),
        "an outcome stored twice"
    );
    assert_eq!(stored_outcomes, sent_units, "one outcome per unit");
    let stored_predictions: BTreeSet<(String, String)> = predictions.iter().cloned().collect();
    assert_eq!(
        stored_predictions.len(),
        predictions.len(),
        "a prediction stored twice"
    );
    assert_eq!(stored_predictions.len(), sent_units.len() * MODELS.len());
    let seen = std::mem::take(&mut *seen.lock().expect("seen"));
    let acked_calls = seen.acked.len();
    assert_eq!(
        acked_calls,
        batches.iter().sum::<usize>() * 3,
        "every call acknowledged"
    );

    // A refit asked at a server that does not own the dataset (its owner
    // runs it), against a single server fed the same rows in order.
    let other_addr = loop {
        if let Some(i) = owner(&replicas).await {
            break replicas.lock().expect("replicas")[(i + 1) % REPLICAS].grpc();
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    };
    let fleet_board = refit_board(&channel(other_addr).await.expect("a non-owner")).await;
    let single_dir = TempDir::new("replicas-single");
    let single = server(&single_dir).await;
    let ch = channel(single.grpc_addr).await.expect("single");
    setup(&ch).await;
    let by_key: BTreeMap<String, (pb::UnitRow, pb::OutcomeRow, Vec<pb::PredictionRow>)> = batches
        .iter()
        .enumerate()
        .flat_map(|(c, &n)| (0..n).map(move |b| batch(c, b)))
        .flat_map(|[u, p, o]| {
            let (Call::Units(u), Call::Predictions(p), Call::Outcomes(o)) = (u, p, o) else {
                unreachable!("batch order")
            };
            u.into_iter()
                .zip(o)
                .map(|(u, o)| {
                    let ps = p.iter().filter(|p| p.unit_key == u.key).cloned().collect();
                    (u.key.clone(), (u, o, ps))
                })
                .collect::<Vec<_>>()
        })
        .collect();
    let in_order = [
        Call::Units(units.iter().map(|k| by_key[k].0.clone()).collect()),
        Call::Predictions(
            predictions
                .iter()
                .map(|(m, k)| {
                    by_key[k]
                        .2
                        .iter()
                        .find(|p| &p.model == m)
                        .cloned()
                        .expect("sent prediction")
                })
                .collect(),
        ),
        Call::Outcomes(outcome_keys.iter().map(|k| by_key[k].1.clone()).collect()),
    ];
    for call in &in_order {
        for chunk in call.chunks(5_000) {
            chunk.send(ch.clone()).await.expect("single server intake");
        }
    }
    let single_board = refit_board(&ch).await;
    single.stop().await.expect("stop");
    // Same rows, same order, same seed: only formatting may differ.
    assert_json_close(&fleet_board, &single_board, 1e-9, "fleet vs single");

    let largest = takeovers.iter().max().copied().unwrap_or_default();
    let slowest_rebuild = rebuilt.iter().max().copied().unwrap_or_default();
    println!(
        "{KILLS} owners killed; {} calls acknowledged ({} rows), {} attempts failed, {} retries \
         found their rows committed by the failed attempt; largest takeover {:.2} s (lease {} s), \
         slowest rebuild after it {:.2} s; {:.0} s in all",
        acked_calls,
        units.len() + outcome_keys.len() + predictions.len(),
        seen.failed_attempts,
        seen.committed_before_ack,
        largest.as_secs_f64(),
        LEASE_SECONDS,
        slowest_rebuild.as_secs_f64(),
        started.elapsed().as_secs_f64()
    );
    assert!(
        largest < Duration::from_secs(LEASE_SECONDS),
        "a takeover took {largest:?}, longer than the lease period"
    );
    assert!(
        seen.failed_attempts >= KILLS,
        "the kills never cut a call off"
    );
}

impl Call {
    /// The call split into calls of at most `n` rows.
    fn chunks(&self, n: usize) -> Vec<Call> {
        match self {
            Call::Units(r) => r.chunks(n).map(|c| Call::Units(c.to_vec())).collect(),
            Call::Predictions(r) => r.chunks(n).map(|c| Call::Predictions(c.to_vec())).collect(),
            Call::Outcomes(r) => r.chunks(n).map(|c| Call::Outcomes(c.to_vec())).collect(),
        }
    }
}

/// A server whose lease is taken from under it (rewritten in the store to
/// another holder and a later epoch, as a server paused past its lease
/// finds it) stops acting as the owner and takes down the series only an
/// owner keeps current, so that a dashboard never reads its stale scores
/// beside the new owner's; it still takes rows in.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_server_that_loses_its_lease_takes_down_its_scores() {
    let Some(cluster) = PgCluster::start("lease_lost") else {
        return;
    };
    let url = cluster.database("lost");
    let dir = TempDir::new("lease_lost");
    let server = Replica::start(&dir, &url, "r1");
    let ch = channel(server.grpc()).await.expect("connect");
    setup(&ch).await;
    for b in 0..8 {
        for call in batch(0, b) {
            call.send(ch.clone()).await.expect("accepted");
        }
    }
    refit_board(&ch).await;
    assert!(server.owns(), "the only server owns the dataset");
    let scores = server.samples("plumbline_model_score").len();
    // Two models, two board windows, every estimator and measure.
    assert!(scores >= 2 * 2 * 5, "{scores} score series before");
    assert_eq!(server.samples("plumbline_dataset_owned"), vec![1.0]);

    let mut db = sqlx::PgConnection::connect(&url).await.expect("connect");
    sqlx::query(
        "UPDATE dataset_leases SET holder = 'elsewhere/1', epoch = epoch + 1, \
         expires_at_ms = (EXTRACT(EPOCH FROM clock_timestamp()) * 1000)::BIGINT + 3600000 \
         WHERE dataset_id = (SELECT id FROM datasets WHERE name = $1)",
    )
    .bind(DS)
    .execute(&mut db)
    .await
    .expect("take the lease");
    let taken = Instant::now();
    let deadline = taken + Duration::from_secs(LEASE_SECONDS + 2);
    loop {
        let left = server.samples("plumbline_model_score").len();
        let owned = server.samples("plumbline_dataset_owned");
        if !server.owns() && left == 0 && owned == vec![0.0] {
            break;
        }
        assert!(
            Instant::now() < deadline,
            "{left} score series and owned = {owned:?} {:?} after the lease was taken",
            taken.elapsed()
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    println!(
        "lease taken from under the server: it let go and took its {scores} score series \
         down in {:.2} s (lease {LEASE_SECONDS} s)",
        taken.elapsed().as_secs_f64()
    );
    for s in [
        "plumbline_model_rank",
        "plumbline_nuisance_loss",
        "plumbline_front_runner_info",
    ] {
        assert_eq!(
            server.samples(s),
            Vec::<f64>::new(),
            "{s} after the lease was lost"
        );
    }
    // Rows still go in at a server that does not own the dataset.
    for call in batch(0, 8) {
        let (accepted, duplicate) = call.send(ch.clone()).await.expect("accepted");
        assert_eq!((accepted, duplicate), (call.rows(), 0));
    }
    db.close().await.expect("close");
}
