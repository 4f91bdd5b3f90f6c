//! `plumbline demo`: the service in-process on loopback with a temporary
//! SQLite store, driven through the real gRPC API as an outside client
//! would, on an invented scenario.
//!
//! The scenario: a city bike-share scheme offers ride credits to members and
//! wants to know which of its four effect models best predicts how many
//! extra rides a credit brings in the next 30 days. Each week a cohort of
//! members is scored by every model and then offered a credit by the
//! scheme's assignment policy; the ride counts arrive a week later. In weeks
//! 4 to 6 the scheme targets credits almost deterministically at low-usage
//! members, so overlap degrades for that segment; from week 7 a wave of new,
//! weekday-commuting members changes who responds, and a different model
//! becomes best.

use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

use clap::Args;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::transport::Channel;

use crate::api::pb;
use crate::config::{Config, LogFormat};
use crate::store::Durability;
use crate::synth::standard_normal;

use super::board_table::{self, Row};

#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Seed of the invented scenario.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
    /// Weeks (cohorts) to run, at least 9; the policy change and the
    /// population shift happen at weeks 4 and 7.
    #[arg(long, default_value_t = 10)]
    pub weeks: usize,
    /// Members per weekly cohort, at least 200.
    #[arg(long, default_value_t = 1500)]
    pub members: usize,
    /// table: the run as it happens; json: the run on stderr and the final
    /// summary as JSON on stdout.
    #[arg(long, value_enum, default_value_t = super::client::Output::Table)]
    pub format: super::client::Output,
    /// Leave the server running after the summary, for exploring with the
    /// client commands; stop it with Ctrl-C.
    #[arg(long)]
    pub keep_serving: bool,
}

const DATASET: &str = "ride-credits";
const FEATURES: [&str; 5] = [
    "tenure_months",
    "rides_90d",
    "dock_km",
    "weekday_share",
    "app_opens_30d",
];
const MODELS: [(&str, &str); 4] = [
    (
        "credit-gbm-v3",
        "gradient-boosted T-learner retrained last month",
    ),
    ("credit-linear", "linear interaction model"),
    ("last-season", "last season's model, never retrained"),
    ("commuter-rules", "challenger built for weekday commuters"),
];
const SHIFT_WEEK: usize = 7;
/// The smallest run that still shows the shift's consequences.
const MIN_WEEKS: usize = SHIFT_WEEK + 2;
const MIN_MEMBERS: usize = 200;
const TARGETED: std::ops::RangeInclusive<usize> = 4..=6;

struct Member {
    key: String,
    x: [f64; 5],
    propensity: f64,
    treated: bool,
    rides: f64,
    predictions: [f64; 4],
}

/// Effect of a credit on rides in the next 30 days, before the shift.
fn effect_before(x: &[f64; 5]) -> f64 {
    let low_usage = if x[1] < 10.0 { 1.0 } else { 0.0 };
    1.5 + 2.0 * low_usage - 0.8 * x[2] + 0.5 * x[3]
}

/// After the shift, weekday commuting and short tenure drive the response.
fn effect_after(x: &[f64; 5]) -> f64 {
    let newcomer = if x[0] < 6.0 { 1.0 } else { 0.0 };
    1.0 + 2.5 * x[3] - 0.3 * x[2] + 1.5 * newcomer
}

fn cohort(week: usize, n: usize, rng: &mut ChaCha8Rng) -> Vec<Member> {
    let shifted = week >= SHIFT_WEEK;
    (0..n)
        .map(|i| {
            let tenure = if shifted && rng.gen::<f64>() < 0.6 {
                rng.gen_range(0.5..6.0)
            } else {
                rng.gen_range(1.0..60.0)
            };
            let rides = (2.0 + 0.8 * standard_normal(rng)).exp().min(120.0).round();
            let dock = (-0.4 + 0.6 * standard_normal(rng)).exp();
            let weekday: f64 = if shifted {
                rng.gen_range(0.5..1.0)
            } else {
                rng.gen_range(0.0..1.0)
            };
            let opens = (1.5 + 0.7 * standard_normal(rng)).exp().round();
            let x = [tenure, rides, dock, weekday, opens];
            let tau = if shifted {
                effect_after(&x)
            } else {
                effect_before(&x)
            };
            let propensity = if TARGETED.contains(&week) {
                if rides < 10.0 {
                    0.97
                } else {
                    0.35
                }
            } else {
                0.5
            };
            let treated = rng.gen::<f64>() < propensity;
            let base = 2.0 + 0.15 * rides + 0.05 * tenure - 0.5 * dock + 0.02 * opens;
            let noisy = base + if treated { tau } else { 0.0 } + 2.0 * standard_normal(rng);
            let before = effect_before(&x);
            let after = effect_after(&x);
            let predictions = [
                before + 0.3 * standard_normal(rng),
                1.2 + 1.2 * if rides < 10.0 { 1.0 } else { 0.0 } - 0.4 * dock
                    + 0.8 * standard_normal(rng),
                0.4 * before + 1.0 + 0.5 * standard_normal(rng),
                after + 0.3 * standard_normal(rng),
            ];
            Member {
                key: format!("w{week:02}-m{i:04}"),
                x,
                propensity,
                treated,
                rides: noisy.max(0.0).round(),
                predictions,
            }
        })
        .collect()
}

pub(super) struct Client {
    pub(super) datasets: pb::dataset_registry_client::DatasetRegistryClient<Channel>,
    pub(super) models: pb::model_registry_client::ModelRegistryClient<Channel>,
    pub(super) intake: pb::intake_client::IntakeClient<Channel>,
    pub(super) scoring: pb::scoring_client::ScoringClient<Channel>,
    pub(super) events: pb::event_feed_client::EventFeedClient<Channel>,
}

pub(super) type DemoResult<T> = Result<T, String>;

pub(super) fn status(what: &str) -> impl Fn(tonic::Status) -> String + '_ {
    move |s| format!("{what}: {} ({:?})", s.message(), s.code())
}

async fn send_week(c: &mut Client, week: usize, members: &[Member]) -> DemoResult<()> {
    let rows: Vec<pb::UnitRow> = members
        .iter()
        .map(|m| pb::UnitRow {
            key: m.key.clone(),
            features: m.x.to_vec(),
            treatment: u32::from(m.treated),
            propensity: Some(m.propensity),
            cohort: format!("week-{week:02}"),
            assigned_at_ms: 0,
            arm: String::new(),
        })
        .collect();
    let batches: Vec<pb::UnitBatch> = rows
        .chunks(1000)
        .map(|r| pb::UnitBatch {
            dataset: DATASET.into(),
            rows: r.to_vec(),
        })
        .collect();
    c.intake
        .send_units(tokio_stream::iter(batches))
        .await
        .map_err(status("units"))?;
    let preds: Vec<pb::PredictionBatch> = MODELS
        .iter()
        .enumerate()
        .flat_map(|(k, (name, _))| {
            members
                .chunks(1000)
                .map(|chunk| pb::PredictionBatch {
                    dataset: DATASET.into(),
                    rows: chunk
                        .iter()
                        .map(|m| pb::PredictionRow {
                            model: (*name).into(),
                            unit_key: m.key.clone(),
                            effect: m.predictions[k],
                            predicted_at_ms: 0,
                            arm: String::new(),
                        })
                        .collect(),
                })
                .collect::<Vec<_>>()
        })
        .collect();
    c.intake
        .send_predictions(tokio_stream::iter(preds))
        .await
        .map_err(status("predictions"))?;
    Ok(())
}

async fn send_outcomes(c: &mut Client, members: &[Member]) -> DemoResult<u64> {
    let rides = members.iter().map(|m| (m.key.clone(), m.rides));
    send_rides(c, DATASET, rides, "outcomes").await
}

/// Registers `models` (name, description) on `dataset`, each as version 1.
pub(super) async fn register_models(
    c: &mut Client,
    dataset: &str,
    models: &[(&str, &str)],
    what: &str,
) -> DemoResult<()> {
    for (name, description) in models {
        c.models
            .register_model(pb::RegisterModelRequest {
                dataset: dataset.into(),
                name: (*name).into(),
                version: "1".into(),
                description: (*description).into(),
            })
            .await
            .map_err(status(what))?;
    }
    Ok(())
}

/// Streams ride counts (member key, rides) to `dataset` in batches of
/// 1,000; returns how many were accepted.
pub(super) async fn send_rides(
    c: &mut Client,
    dataset: &str,
    rides: impl Iterator<Item = (String, f64)>,
    what: &str,
) -> DemoResult<u64> {
    let rows: Vec<pb::OutcomeRow> = rides
        .map(|(unit_key, value)| pb::OutcomeRow {
            unit_key,
            value,
            observed_at_ms: 0,
        })
        .collect();
    let batches: Vec<pb::OutcomeBatch> = rows
        .chunks(1000)
        .map(|chunk| pb::OutcomeBatch {
            dataset: dataset.into(),
            rows: chunk.to_vec(),
        })
        .collect();
    Ok(c.intake
        .send_outcomes(tokio_stream::iter(batches))
        .await
        .map_err(status(what))?
        .into_inner()
        .accepted)
}

/// Prints `text` after `lead`, wrapped to 100 columns, continuing under its
/// first word.
pub(super) fn say(lead: &str, text: &str) {
    let hang = " ".repeat(lead.len());
    for (i, line) in super::client::wrap(text, 100 - lead.len())
        .iter()
        .enumerate()
    {
        println!("{}{line}", if i == 0 { lead } else { &hang });
    }
}

/// Set once the demo has printed what its table's columns mean.
static LEGEND_SHOWN: std::sync::atomic::AtomicBool = std::sync::atomic::AtomicBool::new(false);

fn print_board(b: &pb::Scoreboard) {
    if !b.degenerate.is_empty() {
        println!("    (no scores yet: {})", b.degenerate);
        return;
    }
    let ate = b.ate.unwrap_or_default();
    println!(
        "    recent window: {} members, average effect of a credit {:+.2} rides (se {:.2})",
        b.units, ate.estimate, ate.se
    );
    let rows: Vec<Row> = b
        .models
        .iter()
        .map(|m| Row::from_wire(m, &b.front_runner))
        .collect();
    print!("{}", board_table::render(&rows, false, "    "));
    // The columns are explained under the first table only.
    if !LEGEND_SHOWN.swap(true, std::sync::atomic::Ordering::Relaxed) {
        print!(
            "{}",
            board_table::legend(&rows, b.joint_critical_value, "    ")
        );
    }
    if let Some(o) = &b.overlap {
        println!(
            "    overlap{}: {:.1}% with propensity outside [{}, {}]; ESS {:.0}% treated, \
             {:.0}% control",
            if o.degraded { " DEGRADED" } else { "" },
            100.0 * o.extreme_share,
            o.eps,
            1.0 - o.eps,
            100.0 * o.treated_effective_share,
            100.0 * o.control_effective_share,
        );
    }
    // Said only when no model beats constant-effect, read off the intervals
    // above; the table shows the others.
    if let Some(line) = board_table::verdict_line(&rows).filter(|l| l.starts_with("no model")) {
        println!("    {line}");
    }
}

/// Recomputes `dataset` (`what` names the step in an error).
pub(super) async fn recompute(
    c: &mut Client,
    dataset: &str,
    what: &'static str,
) -> DemoResult<pb::RecomputeResponse> {
    Ok(c.scoring
        .recompute(pb::RecomputeRequest {
            dataset: dataset.into(),
            ..Default::default()
        })
        .await
        .map_err(status(what))?
        .into_inner())
}

/// What the alerts' watch says of the front-runner, for the narration.
pub(super) fn watched_line(view: &pb::AlertView) -> String {
    format!(
        "front-runner per the alerts: {} ({}; {} members watched as they arrived)",
        if view.front_runner.is_empty() {
            "none yet"
        } else {
            view.front_runner.as_str()
        },
        if view.front_runner_settled {
            "settled"
        } else {
            "not yet separated from every other model"
        },
        view.units
    )
}

/// Prints the dataset's events after `after` (registrations left out) and
/// keeps them in `all`.
pub(super) async fn new_events(
    c: &mut Client,
    dataset: &str,
    after: &mut u64,
    all: &mut Vec<pb::Event>,
) -> DemoResult<()> {
    let events = c
        .events
        .list_events(pb::ListEventsRequest {
            dataset: dataset.into(),
            after_id: *after,
            limit: 1000,
        })
        .await
        .map_err(status("events"))?
        .into_inner()
        .events;
    for e in events {
        *after = e.id;
        if !matches!(e.kind.as_str(), "model_registered") {
            say("  * ", &format!("event {}: {}", e.kind, e.summary));
        }
        all.push(e);
    }
    Ok(())
}

async fn drive(
    args: &DemoArgs,
    grpc: std::net::SocketAddr,
    metrics: std::net::SocketAddr,
) -> DemoResult<serde_json::Value> {
    let started = Instant::now();
    let channel = Channel::from_shared(format!("http://{grpc}"))
        .map_err(|e| e.to_string())?
        .connect()
        .await
        .map_err(|e| e.to_string())?;
    let mut c = Client {
        datasets: pb::dataset_registry_client::DatasetRegistryClient::new(channel.clone()),
        models: pb::model_registry_client::ModelRegistryClient::new(channel.clone()),
        intake: pb::intake_client::IntakeClient::new(channel.clone()),
        scoring: pb::scoring_client::ScoringClient::new(channel.clone())
            .max_decoding_message_size(64 << 20),
        events: pb::event_feed_client::EventFeedClient::new(channel),
    };
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(pb::DatasetSpec {
                name: DATASET.into(),
                feature_names: FEATURES.iter().map(|f| f.to_string()).collect(),
                outcome_kind: pb::OutcomeKind::Continuous as i32,
                treatment_cost: 0.5,
                recent: Some(pb::RecentWindow {
                    last_outcomes: (2 * args.members) as u32,
                    last_days: 0,
                }),
                recompute: Some(pb::RecomputePolicy {
                    // The demo asks for a recompute after each delivery.
                    every_outcomes: u32::MAX,
                    every_seconds: 86_400,
                    ..Default::default()
                }),
                seed: args.seed,
                ..Default::default()
            }),
        })
        .await
        .map_err(status("create dataset"))?;
    register_models(&mut c, DATASET, &MODELS, "register model").await?;
    println!(
        "dataset {DATASET}: {} features, {} models; outcomes arrive one week after the offers\n",
        FEATURES.len(),
        MODELS.len()
    );
    let mut rng = ChaCha8Rng::seed_from_u64(args.seed);
    let mut waiting: Option<(usize, Vec<Member>)> = None;
    let (mut after, mut events) = (0u64, Vec::new());
    new_events(&mut c, DATASET, &mut after, &mut events).await?;
    for week in 1..=args.weeks + 1 {
        if week <= args.weeks {
            let members = cohort(week, args.members, &mut rng);
            let policy = if TARGETED.contains(&week) {
                "credits to 97% of low-usage members, 35% of others"
            } else {
                "credits by coin flip (50%)"
            };
            let shift = if week == SHIFT_WEEK {
                "; new weekday commuters join"
            } else {
                ""
            };
            send_week(&mut c, week, &members).await?;
            println!(
                "week {week:>2}: {} members scored by {} models, {policy}{shift}",
                members.len(),
                MODELS.len()
            );
            if let Some((w, m)) = waiting.replace((week, members)) {
                deliver(&mut c, w, &m, &mut after, &mut events).await?;
            }
        } else if let Some((w, m)) = waiting.take() {
            println!("end of week {}: last ride counts arrive", args.weeks);
            deliver(&mut c, w, &m, &mut after, &mut events).await?;
        }
    }

    let cumulative = c
        .scoring
        .get_scoreboard(pb::GetScoreboardRequest {
            dataset: DATASET.into(),
            window: Some(pb::Window {
                kind: pb::window::Kind::Cumulative as i32,
                cohort: String::new(),
            }),
        })
        .await
        .map_err(status("scoreboard"))?
        .into_inner();
    println!("\nsummary after {:.1} s", started.elapsed().as_secs_f64());
    let view = cumulative.alerts.clone().unwrap_or_default();
    println!(
        "  {} members with ride counts; lowest error over all weeks: {}",
        cumulative.units, cumulative.front_runner
    );
    println!("  {}", watched_line(&view));
    // The cross-fitted blend of the ranked models, as `scoreboard` shows it.
    if let Some(blend) = &cumulative.blend {
        say("  ", &board_table::blend_line(blend));
    }
    let mut kinds: Vec<(&str, usize)> = Vec::new();
    for e in &events {
        match kinds.iter_mut().find(|(k, _)| *k == e.kind) {
            Some((_, n)) => *n += 1,
            None => kinds.push((e.kind.as_str(), 1)),
        }
    }
    println!("  events:");
    for (k, n) in &kinds {
        println!("    {k:<28} {n}");
    }
    for e in events.iter().filter(|e| {
        matches!(
            e.kind.as_str(),
            "front_runner_changed" | "nuisance_misfit" | "population_drift"
        ) || e.kind.starts_with("overlap")
    }) {
        say("    - ", &e.summary);
    }
    println!("  metrics were served at http://{metrics}/metrics");
    let mut summary = super::summary::demo_json(
        started.elapsed().as_secs_f64(),
        &cumulative,
        &events,
        &format!("http://{metrics}/metrics"),
    );
    let arms = super::demo_arms::run(&mut c, args.seed).await?;
    if let Some(o) = summary.as_object_mut() {
        o.insert("three_arms".into(), arms);
    }
    Ok(summary)
}

async fn deliver(
    c: &mut Client,
    week: usize,
    members: &[Member],
    after: &mut u64,
    events: &mut Vec<pb::Event>,
) -> DemoResult<()> {
    let n = send_outcomes(c, members).await?;
    let r = recompute(c, DATASET, "recompute").await?;
    println!(
        "  ride counts for week {week} arrived ({n}); recompute {} in {:.0} ms{}",
        r.snapshot_id,
        r.millis,
        if r.refitted {
            " with a nuisance refit"
        } else {
            ""
        }
    );
    let board = c
        .scoring
        .get_scoreboard(pb::GetScoreboardRequest {
            dataset: DATASET.into(),
            window: Some(pb::Window {
                kind: pb::window::Kind::Recent as i32,
                cohort: String::new(),
            }),
        })
        .await
        .map_err(status("scoreboard"))?
        .into_inner();
    print_board(&board);
    new_events(c, DATASET, after, events).await
}

pub fn run(args: &DemoArgs) -> ExitCode {
    if args.weeks < MIN_WEEKS || args.members < MIN_MEMBERS {
        eprintln!(
            "plumbline demo: needs at least {MIN_WEEKS} weeks and {MIN_MEMBERS} members per week \
             to show the shift"
        );
        return ExitCode::from(super::EXIT_BAD_INPUT);
    }
    super::serve::init_logging(LogFormat::Human, "warn");
    let dir: PathBuf = std::env::temp_dir().join(format!("plumbline-demo-{}", std::process::id()));
    let config = Config {
        listen: "127.0.0.1:0"
            .parse()
            .unwrap_or_else(|_| ([127, 0, 0, 1], 0).into()),
        metrics_listen: "127.0.0.1:0"
            .parse()
            .unwrap_or_else(|_| ([127, 0, 0, 1], 0).into()),
        durability: Durability::Normal,
        log_level: "warn".into(),
        ..Config::in_dir(dir.clone())
    };
    let runtime = match tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
    {
        Ok(r) => r,
        Err(e) => {
            eprintln!("plumbline demo: {e}");
            return ExitCode::FAILURE;
        }
    };
    let code = runtime.block_on(async {
        let running = match crate::server::start(&config).await {
            Ok(r) => r,
            Err(e) => {
                eprintln!("plumbline demo: {e}");
                return ExitCode::FAILURE;
            }
        };
        // With --format json the narration goes to stderr and stdout carries
        // only the summary's JSON document.
        let json = args.format == super::client::Output::Json;
        let mut narration = json.then(super::summary::NarrateOnStderr::start);
        println!("plumbline demo: ride-credit offers of an invented bike-share scheme (seed {})", args.seed);
        println!(
            "service on {} (gRPC), metrics and status page on http://{}/\nstore {}\n",
            running.grpc_addr,
            running.metrics_addr,
            config.store.display()
        );
        let result = drive(args, running.grpc_addr, running.metrics_addr).await;
        match &result {
            Err(e) => eprintln!("plumbline demo: {e}"),
            Ok(summary) if json => {
                drop(narration.take());
                super::client::print_json(summary.clone());
                narration = Some(super::summary::NarrateOnStderr::start());
            }
            Ok(_) => {}
        }
        if args.keep_serving && result.is_ok() {
            println!(
                "\nstill serving on {} (try: plumbline scoreboard --server http://{} --dataset {DATASET}); Ctrl-C stops",
                running.grpc_addr, running.grpc_addr
            );
            let _ = tokio::signal::ctrl_c().await;
        }
        let stopped = running.stop().await;
        drop(narration);
        match (result, stopped) {
            (Ok(_), Ok(())) => ExitCode::SUCCESS,
            _ => ExitCode::FAILURE,
        }
    });
    let _ = std::fs::remove_dir_all(&dir);
    code
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[derive(Debug, clap::Parser)]
    struct Probe {
        #[command(flatten)]
        demo: DemoArgs,
    }

    #[test]
    fn help_states_the_smallest_run_the_demo_accepts() {
        let help = Probe::command().render_help().to_string();
        assert!(help.contains(&format!("at least {MIN_WEEKS}")), "{help}");
        assert!(help.contains(&format!("at least {MIN_MEMBERS}")), "{help}");
    }
}
