//! Client commands for people reading a running server: `scoreboard`,
//! `history`, `events`, `overlap`, and what every client command shares
//! (the connection, requests, failures and their exit statuses). Each
//! prints a readable table, or JSON with `--format json`. The commands
//! that create and change things are in `admin.rs`.

use std::process::ExitCode;

use clap::{Args, ValueEnum};
use serde_json::json;
use tonic::metadata::MetadataValue;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Identity};
use tonic::{Request, Status};

pub(super) use super::clock::ms_to_text;
use super::clock::{now_ms, parse_time};
use crate::api::pb;
use crate::estimate::estimators;

use super::board_table::{self, Row};

#[derive(Debug, Clone, Copy, ValueEnum, PartialEq, Eq)]
pub enum Output {
    Table,
    Json,
}

/// Where the server is and how to talk to it.
#[derive(Debug, Args, Clone)]
pub struct Connection {
    /// Server address.
    #[arg(
        long,
        default_value = "http://127.0.0.1:7070",
        global = true,
        help_heading = "Connection"
    )]
    pub server: String,
    /// Bearer token, when the server requires one.
    #[arg(
        long,
        env = "PLUMBLINE_TOKEN",
        global = true,
        help_heading = "Connection",
        hide_env_values = true
    )]
    pub token: Option<String>,
    /// A table for people, or JSON for programs.
    #[arg(long, value_enum, default_value_t = Output::Table, global = true)]
    pub format: Output,
    /// PEM authority that signed the server's certificate (https:// servers).
    #[arg(
        long,
        env = "PLUMBLINE_CA_CERT",
        value_name = "FILE",
        global = true,
        help_heading = "Connection"
    )]
    pub ca_cert: Option<std::path::PathBuf>,
    /// PEM client certificate, for servers that verify clients.
    #[arg(
        long,
        env = "PLUMBLINE_CLIENT_CERT",
        value_name = "FILE",
        global = true,
        help_heading = "Connection",
        requires = "client_key"
    )]
    pub client_cert: Option<std::path::PathBuf>,
    /// PEM private key of --client-cert.
    #[arg(
        long,
        env = "PLUMBLINE_CLIENT_KEY",
        value_name = "FILE",
        global = true,
        help_heading = "Connection",
        requires = "client_cert"
    )]
    pub client_key: Option<std::path::PathBuf>,
}

fn pem(flag: &str, path: &std::path::Path) -> Result<Vec<u8>, String> {
    std::fs::read(path).map_err(|e| format!("--{flag} {}: {e}", path.display()))
}

fn tls(c: &Connection) -> Result<ClientTlsConfig, String> {
    let mut t = ClientTlsConfig::new();
    t = match &c.ca_cert {
        Some(ca) => t.ca_certificate(Certificate::from_pem(pem("ca-cert", ca)?)),
        None => t.with_enabled_roots(),
    };
    if let (Some(cert), Some(key)) = (&c.client_cert, &c.client_key) {
        t = t.identity(Identity::from_pem(
            pem("client-cert", cert)?,
            pem("client-key", key)?,
        ));
    }
    Ok(t)
}

pub async fn connect(c: &Connection) -> Result<Channel, String> {
    let uri = if c.server.contains("://") {
        c.server.clone()
    } else {
        format!("http://{}", c.server)
    };
    let mut endpoint = Channel::from_shared(uri.clone()).map_err(|e| format!("{uri}: {e}"))?;
    if uri.starts_with("https://") {
        endpoint = endpoint
            .tls_config(tls(c)?)
            .map_err(|e| format!("{uri}: tls: {e}"))?;
    }
    endpoint
        .connect()
        .await
        .map_err(|e| nothing_answers(&uri, &e))
}

/// What to say when nothing answers: the address, the cause underneath
/// tonic's "transport error", and what to try.
fn nothing_answers(uri: &str, e: &dyn std::error::Error) -> String {
    let mut cause = e.to_string();
    let mut source = e.source();
    while let Some(s) = source {
        cause = s.to_string();
        source = s.source();
    }
    format!(
        "nothing answers at {uri} ({cause}); is `plumbline serve` running there? \
         Point --server at it"
    )
}

/// Wraps a message with the bearer token, if any.
pub fn request<T>(c: &Connection, message: T) -> Result<Request<T>, String> {
    let mut r = Request::new(message);
    if let Some(t) = &c.token {
        let v: MetadataValue<_> = format!("Bearer {t}")
            .parse()
            .map_err(|_| "the token contains characters not allowed in a header".to_string())?;
        r.metadata_mut().insert("authorization", v);
    }
    Ok(r)
}

pub fn status(s: Status) -> String {
    match s.code() {
        tonic::Code::Unauthenticated => format!(
            "{} ({:?}); pass a token with --token or set PLUMBLINE_TOKEN",
            s.message(),
            s.code()
        ),
        tonic::Code::Unavailable => format!(
            "{} ({:?}); is `plumbline serve` running at the --server address?",
            s.message(),
            s.code()
        ),
        _ => format!("{} ({:?})", s.message(), s.code()),
    }
}

/// A client command's failure and its exit status: 2 when what was asked
/// for does not exist (or the arguments are wrong), 1 otherwise.
#[derive(Debug)]
pub struct Failure {
    code: u8,
    message: String,
}

impl Failure {
    pub fn new(code: u8, message: String) -> Self {
        Failure { code, message }
    }
    #[cfg(test)]
    pub fn code(&self) -> u8 {
        self.code
    }
    #[cfg(test)]
    pub fn message(&self) -> &str {
        &self.message
    }
}

impl From<String> for Failure {
    fn from(message: String) -> Self {
        Failure { code: 1, message }
    }
}

/// [`status`], keeping "not found" and "invalid argument" apart (status 2).
pub fn failed(s: Status) -> Failure {
    let code = match s.code() {
        tonic::Code::NotFound | tonic::Code::InvalidArgument => 2,
        _ => 1,
    };
    Failure {
        code,
        message: status(s),
    }
}

#[derive(Debug, Args)]
pub struct DatasetArg {
    /// Dataset name.
    #[arg(long)]
    pub dataset: String,
}

#[derive(Debug, Args)]
pub struct WindowArg {
    /// cumulative, recent, or cohort:NAME.
    #[arg(long, default_value = "cumulative")]
    pub window: String,
}

pub(super) fn window(w: &str) -> Result<pb::Window, String> {
    use pb::window::Kind;
    let (kind, cohort) = match w {
        "cumulative" => (Kind::Cumulative, String::new()),
        "recent" => (Kind::Recent, String::new()),
        other => match other.strip_prefix("cohort:") {
            Some(c) if !c.is_empty() => (Kind::Cohort, c.to_string()),
            _ => {
                return Err(format!(
                    "--window {other:?}: use cumulative, recent or cohort:NAME"
                ))
            }
        },
    };
    Ok(pb::Window {
        kind: kind as i32,
        cohort,
    })
}

/// Runs a command's future on a two-worker runtime; `Err((status, message))`
/// prints `<prefix>: message` (prefix such as "plumbline ingest") and exits
/// with that status.
pub(super) fn block_on_command<T>(
    prefix: &str,
    f: impl std::future::Future<Output = Result<T, (u8, String)>>,
) -> Result<T, ExitCode> {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .map_err(|e| {
            eprintln!("{prefix}: {e}");
            ExitCode::FAILURE
        })?;
    runtime.block_on(f).map_err(|(code, message)| {
        eprintln!("{prefix}: {message}");
        ExitCode::from(code)
    })
}

pub(super) fn run_async(f: impl std::future::Future<Output = Result<(), Failure>>) -> ExitCode {
    match block_on_command("plumbline", async {
        f.await.map_err(|e| (e.code, e.message))
    }) {
        Ok(()) => ExitCode::SUCCESS,
        Err(code) => code,
    }
}

pub(super) fn print_json(v: serde_json::Value) {
    println!("{}", serde_json::to_string_pretty(&v).unwrap_or_default());
}

pub fn scoreboard(c: &Connection, d: &DatasetArg, w: &WindowArg, wide: bool) -> ExitCode {
    run_async(async {
        let mut client = pb::scoring_client::ScoringClient::new(connect(c).await?)
            .max_decoding_message_size(256 << 20);
        let b = client
            .get_scoreboard(request(
                c,
                pb::GetScoreboardRequest {
                    dataset: d.dataset.clone(),
                    window: Some(window(&w.window)?),
                },
            )?)
            .await
            .map_err(failed)?
            .into_inner();
        if c.format == Output::Json {
            let full: serde_json::Value =
                serde_json::from_str(&b.json).unwrap_or(serde_json::Value::Null);
            print_json(json!({
                "dataset": b.dataset, "window": w.window, "snapshot_id": b.snapshot_id,
                "computed_at_ms": b.computed_at_ms, "degenerate": b.degenerate,
                "incomplete": b.incomplete.iter().map(|i| json!({"name": i.name, "coverage": i.coverage})).collect::<Vec<_>>(),
                "scoreboard": full,
            }));
            return Ok(());
        }
        println!(
            "{} / {} window, snapshot {} at {}",
            b.dataset,
            w.window,
            b.snapshot_id,
            ms_to_text(b.computed_at_ms)
        );
        if !b.degenerate.is_empty() {
            println!("no scores: {}", b.degenerate);
            return Ok(());
        }
        if !b.contrasts.is_empty() {
            print_arms(&b, wide);
            return Ok(());
        }
        print_board(&b, wide);
        Ok(())
    })
}

/// One board's table for a person: the ATE, the ranked models, the
/// blend, the incomplete models, the front-runner, the alerts and the
/// caveat.
fn print_board(b: &pb::Scoreboard, wide: bool) {
    let ate = b.ate.unwrap_or_default();
    println!(
        "{} units; ATE (AIPW) {} (se {})",
        b.units,
        board_table::num(ate.estimate),
        board_table::num(ate.se)
    );
    let rows: Vec<Row> = b
        .models
        .iter()
        .map(|m| Row::from_wire(m, &b.front_runner))
        .collect();
    print!("{}", board_table::render(&rows, wide, ""));
    print!("{}", board_table::legend(&rows, b.joint_critical_value, ""));
    if let Some(line) = board_table::verdict_line(&rows) {
        println!("{line}");
    }
    if let Some(blend) = &b.blend {
        // Wrapped to 100 columns, continuing under the first word after
        // "blend: ".
        for (i, line) in wrap(&board_table::blend_line(blend), 93).iter().enumerate() {
            println!("{}{line}", if i == 0 { "" } else { "       " });
        }
    }
    if wide {
        // One column per estimator the server sent, in its order (the
        // first ranks, with its se); a key this build does not know
        // shows as sent.
        let mut header = vec!["model".to_string()];
        if let Some(m) = b.models.first() {
            for (i, s) in m.scores.iter().enumerate() {
                let label = estimators::by_key(&s.estimator)
                    .map(|e| e.label())
                    .unwrap_or(&s.estimator);
                header.push(if i == 0 {
                    format!("{label} (lower)")
                } else {
                    label.to_string()
                });
            }
        }
        let lines: Vec<Vec<String>> = b
            .models
            .iter()
            .map(|m| {
                let mut line = vec![m.name.clone()];
                for (i, s) in m.scores.iter().enumerate() {
                    line.push(if i == 0 {
                        format!(
                            "{} ({})",
                            board_table::num(s.estimate),
                            board_table::num(s.se)
                        )
                    } else {
                        board_table::num(s.estimate)
                    });
                }
                line
            })
            .collect();
        println!();
        print!("{}", super::render::grid("", &header, &lines));
    }
    for i in &b.incomplete {
        println!(
            "      {:<24} not ranked: predicted {:.1}% of the window",
            i.name,
            100.0 * i.coverage
        );
    }
    println!(
        "front-runner {}; best set {}",
        b.front_runner,
        b.best_set.join(", ")
    );
    if let Some(a) = b.alerts.as_ref().filter(|a| a.looks > 0) {
        println!(
            "alerts (on {} units watched as they arrived, {} recomputes):\n  front-runner \
             {}{}; heterogeneity {}; overlap {}",
            a.units,
            a.looks,
            if a.front_runner.is_empty() {
                "none yet"
            } else {
                &a.front_runner
            },
            if a.front_runner_settled {
                ", settled"
            } else {
                ", not yet separated from every other model"
            },
            a.heterogeneity,
            if a.overlap_degraded {
                "degraded"
            } else {
                "fine"
            }
        );
    }
    for line in wrap(&b.caveat, TABLE_WIDTH) {
        println!("{line}");
    }
}

/// The boards of a dataset with arms: one per contrast, then the value of
/// each model's arm choice.
fn print_arms(b: &pb::Scoreboard, wide: bool) {
    println!("{} units; reference arm {}", b.units, b.reference_arm);
    for c in &b.contrasts {
        println!();
        println!("=== Contrast {} against {} ===", c.arm, c.reference_arm);
        if c.degenerate.is_empty() {
            print_board(c, wide);
        } else {
            println!("no scores: {}", c.degenerate);
        }
    }
    if let Some(p) = &b.arm_policy {
        println!();
        for line in arm_policy_lines(p, &b.reference_arm) {
            println!("{line}");
        }
    }
}

fn interval(v: &Option<pb::IntervalValue>) -> String {
    let v = v.unwrap_or_default();
    format!(
        "{}  [{}, {}]",
        board_table::num(v.estimate),
        board_table::num(v.ci_low),
        board_table::num(v.ci_high)
    )
}

/// The arm-choice table: the two fixed policies, then each model's value
/// and its differences from them (95% intervals), then model pairs.
fn arm_policy_lines(p: &pb::ArmPolicyReport, reference: &str) -> Vec<String> {
    let mut out = wrap(
        "Arm choice: each unit gets the arm with the largest predicted effect net of its \
         cost, the reference when none is positive; value per unit net of cost (95% CI)",
        TABLE_WIDTH,
    );
    out.push(format!(
        "  everyone {reference}: {}",
        interval(&p.reference_value)
    ));
    out.push(format!(
        "  everyone {} (best single arm): {}",
        p.best_single_arm,
        interval(&p.best_single_arm_value)
    ));
    let heads = vec![
        "model".to_string(),
        "value".to_string(),
        format!("vs everyone {reference}"),
        format!("vs everyone {}", p.best_single_arm),
    ];
    let lines: Vec<Vec<String>> = p
        .models
        .iter()
        .map(|m| {
            vec![
                m.model.clone(),
                interval(&m.value),
                interval(&m.vs_reference),
                interval(&m.vs_best_single_arm),
            ]
        })
        .collect();
    out.extend(
        super::render::grid("  ", &heads, &lines)
            .lines()
            .map(str::to_string),
    );
    if !p.pairwise.is_empty() {
        out.push("  Pairwise (first's value minus second's):".into());
        for d in &p.pairwise {
            out.push(format!(
                "    {} - {}: {}",
                d.first,
                d.second,
                interval(&d.difference)
            ));
        }
    }
    out.extend(
        wrap(&format!("({})", p.note), TABLE_WIDTH - 2)
            .into_iter()
            .map(|l| format!("  {l}")),
    );
    out
}

#[derive(Debug, Args)]
pub struct HistoryArgs {
    #[command(flatten)]
    pub dataset: DatasetArg,
    /// Model name (or a baseline: zero-effect, constant-effect).
    #[arg(long)]
    pub model: String,
    /// An estimator's key (corrected_pehe, plugin_pehe, dr_loss, r_loss, ipw_loss) or
    /// vs_constant, policy_gain, autoc, qini.
    #[arg(long, default_value = "vs_constant")]
    pub estimator: String,
    #[command(flatten)]
    pub window: WindowArg,
    /// Only snapshots at or after this time: RFC 3339 (2026-12-04T16:00:00Z),
    /// a date (2026-12-04, midnight UTC) or an age before now (30m, 2h, 7d).
    #[arg(long, value_name = "TIME")]
    pub since: Option<String>,
    /// Only snapshots at or before this time (the same forms as --since).
    #[arg(long, value_name = "TIME")]
    pub until: Option<String>,
    /// On a dataset with arms, the contrast whose history to read: the arm
    /// whose board against the reference holds the values.
    #[arg(long, value_name = "ARM")]
    pub arm: Option<String>,
}

/// `--since` / `--until` as the request's bounds (0 = open), checked so a
/// range that ends before it starts is refused instead of answered empty.
fn time_range(since: Option<&str>, until: Option<&str>) -> Result<(i64, i64), Failure> {
    let now = now_ms();
    let bad = |flag: &str, e: String| Failure::new(super::EXIT_BAD_INPUT, format!("--{flag} {e}"));
    let from = since
        .map(|t| parse_time(t, now).map_err(|e| bad("since", e)))
        .transpose()?
        .unwrap_or(0);
    let to = until
        .map(|t| parse_time(t, now).map_err(|e| bad("until", e)))
        .transpose()?
        .unwrap_or(0);
    if from > 0 && to > 0 && to < from {
        return Err(Failure::new(
            super::EXIT_BAD_INPUT,
            format!(
                "--until {} is before --since {}",
                ms_to_text(to),
                ms_to_text(from)
            ),
        ));
    }
    Ok((from.max(0), to.max(0)))
}

pub fn history(c: &Connection, a: &HistoryArgs) -> ExitCode {
    run_async(async {
        let (from_ms, to_ms) = time_range(a.since.as_deref(), a.until.as_deref())?;
        let mut client = pb::scoring_client::ScoringClient::new(connect(c).await?);
        let points = client
            .get_history(request(
                c,
                pb::GetHistoryRequest {
                    dataset: a.dataset.dataset.clone(),
                    model: a.model.clone(),
                    estimator: a.estimator.clone(),
                    window: Some(window(&a.window.window)?),
                    from_ms,
                    to_ms,
                    arm: a.arm.clone().unwrap_or_default(),
                },
            )?)
            .await
            .map_err(failed)?
            .into_inner()
            .points;
        if c.format == Output::Json {
            print_json(json!(points
                .iter()
                .map(|p| {
                    let v = p.value.unwrap_or_default();
                    json!({"snapshot_id": p.snapshot_id, "computed_at_ms": p.computed_at_ms,
                           "estimate": v.estimate, "se": v.se, "rank": p.rank, "units": p.units})
                })
                .collect::<Vec<_>>()));
            return Ok(());
        }
        let contrast = a
            .arm
            .as_deref()
            .map(|arm| format!(", contrast {arm}"))
            .unwrap_or_default();
        println!(
            "{} / {} / {} ({} window{contrast})",
            a.dataset.dataset, a.model, a.estimator, a.window.window
        );
        println!(
            "{:>8}  {:<20} {:>12} {:>10} {:>5} {:>9}",
            "snapshot", "time", "estimate", "se", "rank", "units"
        );
        for p in points {
            let v = p.value.unwrap_or_default();
            println!(
                "{:>8}  {:<20} {:>12.4} {:>10.4} {:>5} {:>9}",
                p.snapshot_id,
                ms_to_text(p.computed_at_ms),
                v.estimate,
                v.se,
                p.rank,
                p.units
            );
        }
        Ok(())
    })
}

#[derive(Debug, Args)]
pub struct EventsArgs {
    /// Dataset name; all datasets when omitted.
    #[arg(long)]
    pub dataset: Option<String>,
    /// Only events after this id.
    #[arg(long, default_value_t = 0)]
    pub after: u64,
    /// Only events of these kinds (repeatable or comma-separated), e.g.
    /// overlap_degraded, nuisance_refit, model_retired.
    #[arg(long = "kind", value_delimiter = ',', value_name = "KIND")]
    pub kinds: Vec<String>,
    /// At most this many events, oldest first (not with --follow).
    #[arg(long, default_value_t = 1000, conflicts_with = "follow")]
    pub limit: usize,
    /// Keep streaming new events as they happen.
    #[arg(long)]
    pub follow: bool,
}

fn event_json(e: &pb::Event) -> serde_json::Value {
    let details: serde_json::Value =
        serde_json::from_str(&e.details_json).unwrap_or(serde_json::Value::Null);
    json!({"id": e.id, "dataset": e.dataset, "kind": e.kind, "at_ms": e.at_ms,
           "snapshot_id": e.snapshot_id, "summary": e.summary, "details": details})
}

/// Columns of the events table before the summary, which wraps under its
/// own column so a line stays within 100 columns.
const EVENT_LEAD: usize = 6 + 2 + 20 + 2 + 27 + 2;
const TABLE_WIDTH: usize = 100;

pub(super) fn events_header() -> String {
    format!("{:>6}  {:<20}  {:<27}  summary", "id", "time", "kind")
}

/// `text` broken at spaces into lines of at most `width` characters (a
/// word longer than that keeps its own line).
pub(super) fn wrap(text: &str, width: usize) -> Vec<String> {
    let mut lines = vec![String::new()];
    for word in text.split_whitespace() {
        let last = lines.last_mut().map(|l| l.chars().count()).unwrap_or(0);
        if last > 0 && last + 1 + word.chars().count() > width {
            lines.push(String::new());
        }
        if let Some(l) = lines.last_mut() {
            if !l.is_empty() {
                l.push(' ');
            }
            l.push_str(word);
        }
    }
    lines
}

pub(super) fn event_text(e: &pb::Event) -> String {
    let summary = wrap(&e.summary, TABLE_WIDTH - EVENT_LEAD);
    let mut out = format!(
        "{:>6}  {:<20}  {:<27}  {}",
        e.id,
        ms_to_text(e.at_ms),
        e.kind,
        summary.first().map(String::as_str).unwrap_or("")
    );
    for line in summary.iter().skip(1) {
        out.push('\n');
        out.push_str(&" ".repeat(EVENT_LEAD));
        out.push_str(line);
    }
    out
}

fn wanted(a: &EventsArgs, e: &pb::Event) -> bool {
    a.kinds.is_empty() || a.kinds.iter().any(|k| k == &e.kind)
}

pub fn events(c: &Connection, a: &EventsArgs) -> ExitCode {
    run_async(async {
        let mut client = pb::event_feed_client::EventFeedClient::new(connect(c).await?);
        let dataset = a.dataset.clone().unwrap_or_default();
        if a.follow {
            let mut stream = client
                .watch_events(request(
                    c,
                    pb::WatchEventsRequest {
                        dataset,
                        after_id: a.after,
                    },
                )?)
                .await
                .map_err(failed)?
                .into_inner();
            if c.format == Output::Table {
                println!("{}", events_header());
            }
            while let Some(e) = stream.message().await.map_err(failed)? {
                if !wanted(a, &e) {
                    continue;
                }
                match c.format {
                    Output::Json => println!("{}", event_json(&e)),
                    Output::Table => println!("{}", event_text(&e)),
                }
            }
            return Ok(());
        }
        // The kind filter is applied here, so pages are read until enough
        // events of the kinds asked for are found or none are left.
        let mut list: Vec<pb::Event> = Vec::new();
        let mut after_id = a.after;
        while list.len() < a.limit {
            let page = client
                .list_events(request(
                    c,
                    pb::ListEventsRequest {
                        dataset: dataset.clone(),
                        after_id,
                        limit: 1000,
                    },
                )?)
                .await
                .map_err(failed)?
                .into_inner()
                .events;
            let Some(last) = page.last() else { break };
            after_id = last.id;
            list.extend(page.into_iter().filter(|e| wanted(a, e)));
        }
        list.truncate(a.limit);
        match c.format {
            Output::Json => print_json(json!(list.iter().map(event_json).collect::<Vec<_>>())),
            Output::Table => {
                println!("{}", events_header());
                for e in &list {
                    println!("{}", event_text(e));
                }
            }
        }
        Ok(())
    })
}

/// `arm`: on a dataset with arms, the contrast (that arm against the
/// reference) whose overlap to print, with the two arms' generalized
/// propensities.
pub fn overlap(c: &Connection, d: &DatasetArg, w: &WindowArg, arm: Option<&str>) -> ExitCode {
    run_async(async {
        let mut client = pb::scoring_client::ScoringClient::new(connect(c).await?);
        let r = client
            .get_overlap(request(
                c,
                pb::GetOverlapRequest {
                    dataset: d.dataset.clone(),
                    window: Some(window(&w.window)?),
                    arm: arm.unwrap_or_default().to_string(),
                },
            )?)
            .await
            .map_err(failed)?
            .into_inner();
        let full: serde_json::Value =
            serde_json::from_str(&r.json).unwrap_or(serde_json::Value::Null);
        if c.format == Output::Json {
            print_json(full);
            return Ok(());
        }
        let s = r.summary.unwrap_or_default();
        // A contrast's two arms: its arm is the report's treated arm, the
        // reference its control arm.
        let (treated, control, contrast) = match (arm, full["reference_arm"].as_str()) {
            (Some(arm), Some(reference)) => (
                arm.to_string(),
                reference.to_string(),
                format!(", contrast {arm} against {reference}"),
            ),
            _ => ("treated".into(), "control".into(), String::new()),
        };
        println!(
            "{} / {} window{contrast}{}",
            d.dataset,
            w.window,
            if s.degraded { ": DEGRADED" } else { "" }
        );
        println!(
            "  propensity outside [{}, {}]: {:.1}% (outside [0.1, 0.9], a rule of thumb: {:.1}%); AUC {:.3}; clipped {}",
            s.eps,
            1.0 - s.eps,
            100.0 * s.extreme_share,
            100.0 * s.outside_crump_share,
            s.propensity_auc,
            s.clipped
        );
        println!(
            "  effective sample share: {treated} {:.1}%, {control} {:.1}%; largest weight {:.2}% / {:.2}%",
            100.0 * s.treated_effective_share,
            100.0 * s.control_effective_share,
            100.0 * s.treated_max_weight,
            100.0 * s.control_max_weight
        );
        if let Some(balance) = full.get("balance").and_then(|b| b.as_array()) {
            println!(
                "  {:<24} {:>12} {:>12}",
                "feature", "SMD raw", "SMD weighted"
            );
            for f in balance {
                println!(
                    "  {:<24} {:>12.3} {:>12.3}{}",
                    f["feature"].as_str().unwrap_or(""),
                    f["smd_unweighted"].as_f64().unwrap_or(0.0),
                    f["smd_weighted"].as_f64().unwrap_or(0.0),
                    if f["flagged"].as_bool().unwrap_or(false) {
                        "  > 0.1"
                    } else {
                        ""
                    }
                );
            }
        }
        if let Some(arms) = full
            .get("generalized_propensity")
            .and_then(|g| g.as_array())
        {
            println!(
                "  generalized propensity (every unit's chance of the arm, all arms modelled):"
            );
            println!(
                "  {:<16} {:>8} {:>8} {:>8} {:>10} {:>10} {:>8}",
                "arm", "q05", "median", "q95", "eff.share", "< eps", "clipped"
            );
            for a in arms {
                let q = |p: f64| {
                    a["quantiles"]
                        .as_array()
                        .and_then(|qs| {
                            qs.iter()
                                .find(|pair| pair[0].as_f64().is_some_and(|x| (x - p).abs() < 1e-9))
                        })
                        .and_then(|pair| pair[1].as_f64())
                        .map(|v| format!("{v:.3}"))
                        .unwrap_or_else(|| "-".into())
                };
                println!(
                    "  {:<16} {:>8} {:>8} {:>8} {:>9.1}% {:>9.1}% {:>8}",
                    a["arm"].as_str().unwrap_or(""),
                    q(0.05),
                    q(0.5),
                    q(0.95),
                    100.0 * a["effective_share"].as_f64().unwrap_or(0.0),
                    100.0 * a["extreme_share"].as_f64().unwrap_or(0.0),
                    a["clipped"].as_u64().unwrap_or(0)
                );
            }
        }
        Ok(())
    })
}
