//! Crash recovery: the real `plumbline serve` binary on a temporary data
//! directory with `durability = full`, several concurrent clients streaming
//! units, predictions and outcomes, and a SIGKILL at a seeded random moment.
//! After a restart on the same directory every batch that was not
//! acknowledged is retried, and so is every batch that was. Each trial
//! checks that acknowledged rows are all there exactly once, that every
//! batch is all-or-nothing (a retry is wholly new or wholly duplicate), that
//! retries of acknowledged batches are duplicates, and that a recompute
//! gives the same scoreboard as a clean server fed the same accepted data.

mod common;

use std::collections::BTreeSet;
use std::net::SocketAddr;
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use common::service::*;
use plumbline::api::pb;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use sqlx::sqlite::SqliteConnectOptions;
use sqlx::{ConnectOptions, Connection};
use tonic::transport::Channel;

const TRIALS: u64 = 20;
const BATCHES: usize = 12;
const PER_BATCH: usize = 20;
const CLIENTS: usize = 3;
const DS: &str = "crash";
const MODELS: [&str; 2] = ["m-linear", "m-flat"];

/// One batch of the workload: its units, both models' predictions for
/// them, and their outcomes, each sent as its own single-batch call.
#[derive(Clone)]
struct Batch {
    units: Vec<pb::UnitRow>,
    predictions: Vec<pb::PredictionRow>,
    outcomes: Vec<pb::OutcomeRow>,
}

fn workload(seed: u64) -> Vec<Batch> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..BATCHES)
        .map(|b| {
            let mut batch = Batch {
                units: Vec::new(),
                predictions: Vec::new(),
                outcomes: Vec::new(),
            };
            for i in 0..PER_BATCH {
                let key = format!("b{b}-u{i}");
                let x = [rng.gen_range(-1.0..1.0), rng.gen_range(-1.0..1.0)];
                let w = f64::from(rng.gen_range(0..2u8));
                let tau = 1.0 + x[1];
                let y = x[0] + w * tau + rng.gen_range(-0.5..0.5);
                batch
                    .units
                    .push(unit_row(&key, &x, w, Some(0.5), &format!("c{}", b % 3)));
                for (m, effect) in MODELS.iter().zip([tau, 1.0]) {
                    batch.predictions.push(pb::PredictionRow {
                        model: (*m).into(),
                        unit_key: key.clone(),
                        effect,
                        predicted_at_ms: 0,
                        arm: String::new(),
                    });
                }
                batch.outcomes.push(pb::OutcomeRow {
                    unit_key: key,
                    value: y,
                    observed_at_ms: 0,
                });
            }
            batch
        })
        .collect()
}

/// Which calls were acknowledged: [batch][units, predictions, outcomes].
type Acks = Arc<Mutex<Vec<[bool; 3]>>>;

fn free_addr() -> SocketAddr {
    std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .expect("free port")
}

/// A `plumbline serve` child process, killed if the test fails.
struct ServerProcess {
    child: Child,
    grpc: SocketAddr,
}

impl ServerProcess {
    fn kill(&mut self) {
        self.child.kill().expect("SIGKILL");
        self.child.wait().expect("reap");
    }
}

impl Drop for ServerProcess {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn spawn(dir: &Path) -> ServerProcess {
    let (grpc, http) = (free_addr(), free_addr());
    let child = Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .arg("serve")
        .arg("--data-dir")
        .arg(dir)
        .arg("--listen")
        .arg(grpc.to_string())
        .arg("--metrics-listen")
        .arg(http.to_string())
        .env("PLUMBLINE_DURABILITY", "full")
        .env("PLUMBLINE_LOG", "error")
        .stdout(Stdio::null())
        .spawn()
        .expect("spawn");
    ServerProcess { child, grpc }
}

/// Waits until the child answers a health check.
async fn connect(addr: SocketAddr) -> Channel {
    for _ in 0..200 {
        if let Ok(ch) = Channel::from_shared(format!("http://{addr}"))
            .expect("uri")
            .connect_timeout(Duration::from_millis(200))
            .connect()
            .await
        {
            let mut health = tonic_health::pb::health_client::HealthClient::new(ch.clone());
            let mut req = tonic::Request::new(tonic_health::pb::HealthCheckRequest {
                service: String::new(),
            });
            req.set_timeout(Duration::from_secs(5));
            if health.check(req).await.is_ok() {
                return ch;
            }
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    panic!("server at {addr} did not come up");
}

async fn setup(ch: &Channel) {
    create_with_models(ch, DS, &MODELS).await;
}

/// Sends call `phase` of a batch; Ok((accepted, duplicate)) when acknowledged.
async fn send(
    intake: &mut pb::intake_client::IntakeClient<Channel>,
    b: &Batch,
    phase: usize,
) -> Result<(u64, u64), tonic::Status> {
    let receipt = match phase {
        0 => intake
            .send_units(tokio_stream::iter(vec![pb::UnitBatch {
                dataset: DS.into(),
                rows: b.units.clone(),
            }]))
            .await?
            .into_inner(),
        1 => intake
            .send_predictions(tokio_stream::iter(vec![pb::PredictionBatch {
                dataset: DS.into(),
                rows: b.predictions.clone(),
            }]))
            .await?
            .into_inner(),
        _ => intake
            .send_outcomes(tokio_stream::iter(vec![pb::OutcomeBatch {
                dataset: DS.into(),
                rows: b.outcomes.clone(),
            }]))
            .await?
            .into_inner(),
    };
    Ok((receipt.accepted, receipt.duplicate))
}

fn rows(b: &Batch, phase: usize) -> u64 {
    [b.units.len(), b.predictions.len(), b.outcomes.len()][phase] as u64
}

/// The cumulative scoreboard after a full refit, as JSON.
async fn scoreboard_json(ch: &Channel) -> serde_json::Value {
    let mut scoring =
        pb::scoring_client::ScoringClient::new(ch.clone()).max_decoding_message_size(64 << 20);
    scoring
        .recompute(pb::RecomputeRequest {
            dataset: DS.into(),
            refit: true,
            ..Default::default()
        })
        .await
        .expect("recompute");
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
    serde_json::from_str(&board.json).expect("board json")
}

/// The stored rows, in storage order: units by seq, outcomes by seq, and
/// the (model, unit) prediction pairs; checked for exact uniqueness.
struct Stored {
    units: Vec<String>,
    outcome_keys: Vec<String>,
    predictions: BTreeSet<(String, String)>,
}

async fn read_store(dir: &Path) -> Stored {
    let mut db = SqliteConnectOptions::new()
        .filename(dir.join(plumbline::config::DATABASE_FILE))
        .read_only(true)
        .connect()
        .await
        .expect("open read-only");
    let units: Vec<String> = sqlx::query_scalar("SELECT key FROM units ORDER BY seq")
        .fetch_all(&mut db)
        .await
        .expect("units");
    let outcome_keys: Vec<String> = sqlx::query_scalar(
        "SELECT u.key FROM outcomes o JOIN units u ON u.dataset_id = o.dataset_id AND u.seq = o.unit_seq \
         ORDER BY o.seq",
    )
    .fetch_all(&mut db)
    .await
    .expect("outcomes");
    let pairs: Vec<(String, String)> = sqlx::query_as(
        "SELECT m.name, u.key FROM predictions p JOIN models m ON m.id = p.model_id \
         JOIN units u ON u.dataset_id = p.dataset_id AND u.seq = p.unit_seq",
    )
    .fetch_all(&mut db)
    .await
    .expect("predictions");
    db.close().await.expect("close");
    let predictions: BTreeSet<_> = pairs.iter().cloned().collect();
    assert_eq!(predictions.len(), pairs.len(), "a prediction stored twice");
    Stored {
        units,
        outcome_keys,
        predictions,
    }
}

/// Runs the workload from `CLIENTS` concurrent clients until done or
/// killed; acknowledgements are recorded as they arrive.
fn run_clients(
    ch: &Channel,
    work: &Arc<Vec<Batch>>,
    acks: &Acks,
) -> Vec<tokio::task::JoinHandle<()>> {
    (0..CLIENTS)
        .map(|k| {
            let mut intake = pb::intake_client::IntakeClient::new(ch.clone());
            let (work, acks) = (Arc::clone(work), Arc::clone(acks));
            tokio::spawn(async move {
                for b in (k..BATCHES).step_by(CLIENTS) {
                    for phase in 0..3 {
                        match send(&mut intake, &work[b], phase).await {
                            Ok((accepted, duplicate)) => {
                                assert_eq!((accepted, duplicate), (rows(&work[b], phase), 0));
                                if let Ok(mut a) = acks.lock() {
                                    a[b][phase] = true;
                                }
                            }
                            // The server died: this batch and the rest are retried.
                            Err(_) => return,
                        }
                    }
                }
            })
        })
        .collect()
}

/// What one trial verified.
#[derive(Default)]
struct Outcome {
    rows: usize,
    /// Calls not acknowledged before the kill that turned out committed.
    committed_unacknowledged: usize,
    /// Calls not acknowledged and not committed.
    lost_unacknowledged: usize,
    /// Acknowledged calls, re-sent as duplicates.
    acknowledged: usize,
}

/// One trial; see the module comment.
async fn trial(seed: u64) -> Outcome {
    let dir = TempDir::new(&format!("crash-{seed}"));
    let work = Arc::new(workload(seed));
    let acks: Acks = Arc::new(Mutex::new(vec![[false; 3]; BATCHES]));
    let mut rng = ChaCha8Rng::seed_from_u64(1000 + seed);

    let mut first = spawn(&dir.0);
    let ch = connect(first.grpc).await;
    setup(&ch).await;
    // The kill point: after a seeded number of acknowledged calls, plus a
    // seeded delay of up to 3 ms, while the other clients are mid-call.
    let kill_at = rng.gen_range(0..BATCHES * 3 - CLIENTS);
    let extra = Duration::from_micros(rng.gen_range(0..3000));
    let tasks = run_clients(&ch, &work, &acks);
    let count = || {
        acks.lock()
            .map(|a| a.iter().flatten().filter(|&&x| x).count())
            .unwrap_or(0)
    };
    while count() < kill_at {
        tokio::time::sleep(Duration::from_micros(500)).await;
    }
    tokio::time::sleep(extra).await;
    first.kill();
    for t in tasks {
        t.await.expect("client task");
    }
    let acked = acks.lock().map(|a| a.clone()).unwrap_or_default();

    // Restart on the same directory; retry everything, in dependency order.
    let mut second = spawn(&dir.0);
    let ch = connect(second.grpc).await;
    let mut intake = pb::intake_client::IntakeClient::new(ch.clone());
    let mut out = Outcome::default();
    for (b, (batch, was_acked)) in work.iter().zip(&acked).enumerate() {
        for (phase, &was_acked) in was_acked.iter().enumerate() {
            let (accepted, duplicate) = send(&mut intake, batch, phase)
                .await
                .unwrap_or_else(|s| panic!("seed {seed} batch {b} phase {phase}: {s}"));
            let n = rows(batch, phase);
            if was_acked {
                assert_eq!(
                    (accepted, duplicate),
                    (0, n),
                    "seed {seed}: acknowledged batch {b}/{phase} re-sent"
                );
                out.acknowledged += 1;
            } else {
                // Never half-written: wholly new or wholly there already.
                assert!(
                    (accepted, duplicate) == (n, 0) || (accepted, duplicate) == (0, n),
                    "seed {seed}: batch {b}/{phase} half-written: {accepted} new, {duplicate} duplicate"
                );
                if accepted > 0 {
                    out.lost_unacknowledged += 1;
                } else {
                    out.committed_unacknowledged += 1;
                }
            }
        }
    }
    let crashed_board = scoreboard_json(&ch).await;
    second.kill();

    // Exactly the workload, each row once.
    let stored = read_store(&dir.0).await;
    let expected_units: BTreeSet<String> = work
        .iter()
        .flat_map(|b| b.units.iter().map(|u| u.key.clone()))
        .collect();
    assert_eq!(
        stored.units.len(),
        expected_units.len(),
        "seed {seed}: a unit stored twice"
    );
    assert_eq!(
        stored.units.iter().cloned().collect::<BTreeSet<_>>(),
        expected_units
    );
    assert_eq!(stored.outcome_keys.len(), expected_units.len());
    assert_eq!(
        stored.outcome_keys.iter().cloned().collect::<BTreeSet<_>>(),
        expected_units
    );
    let expected_predictions: BTreeSet<(String, String)> = work
        .iter()
        .flat_map(|b| {
            b.predictions
                .iter()
                .map(|p| (p.model.clone(), p.unit_key.clone()))
        })
        .collect();
    assert_eq!(stored.predictions, expected_predictions);

    // A clean server fed the same rows in the stored order scores the same.
    let clean_dir = TempDir::new(&format!("crash-clean-{seed}"));
    let srv = server(&clean_dir).await;
    let ch = Channel::from_shared(format!("http://{}", srv.grpc_addr))
        .expect("uri")
        .connect()
        .await
        .expect("connect");
    setup(&ch).await;
    let by_key = |key: &str| -> (&pb::UnitRow, &pb::OutcomeRow) {
        let (b, i) = key[1..]
            .split_once("-u")
            .map(|(b, i)| {
                (
                    b.parse::<usize>().expect("b"),
                    i.parse::<usize>().expect("i"),
                )
            })
            .expect("key shape");
        (&work[b].units[i], &work[b].outcomes[i])
    };
    let all = Batch {
        units: stored.units.iter().map(|k| by_key(k).0.clone()).collect(),
        predictions: work.iter().flat_map(|b| b.predictions.clone()).collect(),
        outcomes: stored
            .outcome_keys
            .iter()
            .map(|k| by_key(k).1.clone())
            .collect(),
    };
    let mut intake = pb::intake_client::IntakeClient::new(ch.clone());
    for phase in 0..3 {
        send(&mut intake, &all, phase).await.expect("clean run");
    }
    let clean_board = scoreboard_json(&ch).await;
    srv.stop().await.expect("stop");
    // Same rows in the same order and seed: the arithmetic is identical, so
    // 1e-9 (relative) only allows for nothing but formatting.
    assert_json_close(&crashed_board, &clean_board, 1e-9, &format!("seed {seed}"));
    out.rows = stored.units.len() + stored.outcome_keys.len() + stored.predictions.len();
    out
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigkill_at_random_points_loses_no_acknowledged_row_and_scores_the_same() {
    let started = Instant::now();
    let mut total = Outcome::default();
    for seed in 0..TRIALS {
        let o = trial(seed).await;
        total.rows += o.rows;
        total.acknowledged += o.acknowledged;
        total.committed_unacknowledged += o.committed_unacknowledged;
        total.lost_unacknowledged += o.lost_unacknowledged;
    }
    println!(
        "{TRIALS} trials, {} rows verified; calls acknowledged before the kill {}, \
         unacknowledged but committed {}, unacknowledged and retried into the store {}; {:.1} s",
        total.rows,
        total.acknowledged,
        total.committed_unacknowledged,
        total.lost_unacknowledged,
        started.elapsed().as_secs_f64()
    );
    // Each unit has two predictions and one outcome.
    assert_eq!(total.rows, TRIALS as usize * BATCHES * PER_BATCH * 4);
    // The kills landed mid-workload: some calls were cut off in every run.
    assert!(
        total.lost_unacknowledged >= TRIALS as usize,
        "kills came too late"
    );
}
