//! The whole job through the command line alone: the real `plumbline
//! serve` binary on a loopback socket, and nothing but `plumbline`
//! subprocesses to simulate data, create the dataset, register models,
//! ingest, recompute, read, compare, look back and retire. The service's
//! board must equal `plumbline score` on the same CSV files.

mod common;

use std::path::Path;
use std::process::{Command, Output};

use common::service::{assert_json_close, serve_binary, ServeBinary, TempDir};
use serde_json::Value;

/// The served binary, stopped when the test ends however it ends, so a
/// failed assertion leaves no server behind.
struct Served(ServeBinary);

impl Served {
    fn start(dir: &TempDir) -> Self {
        Served(serve_binary(dir, &[], "warn", false))
    }
    fn url(&self) -> String {
        format!("http://{}", self.0.grpc)
    }
}

impl Drop for Served {
    fn drop(&mut self) {
        let _ = self.0.child.kill();
        let _ = self.0.child.wait();
    }
}

fn plumbline() -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_plumbline"));
    // The commands must not pick up a developer's own settings.
    for v in [
        "PLUMBLINE_TOKEN",
        "PLUMBLINE_CA_CERT",
        "PLUMBLINE_CLIENT_CERT",
        "PLUMBLINE_CLIENT_KEY",
        "PLUMBLINE_DATA_DIR",
        "PLUMBLINE_STORE_URL",
    ] {
        c.env_remove(v);
    }
    c
}

struct Ran {
    code: Option<i32>,
    stdout: String,
    stderr: String,
}

fn run(args: &[&str]) -> Ran {
    let out: Output = plumbline().args(args).output().expect("run plumbline");
    Ran {
        code: out.status.code(),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

/// Runs a command that must succeed and print JSON; returns the JSON.
fn json(args: &[&str]) -> Value {
    let r = run(args);
    assert_eq!(r.code, Some(0), "{args:?}: {}", r.stderr);
    serde_json::from_str(&r.stdout).unwrap_or_else(|e| panic!("{args:?}: {e}: {}", r.stdout))
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

fn path(p: &Path) -> String {
    p.display().to_string()
}

/// Ranked model names of a scoreboard JSON (`plumbline scoreboard`), in
/// rank order, with each rank and corrected PEHE checked.
fn ranked(board: &Value) -> Vec<String> {
    let models = board["scoreboard"]["models"].as_array().expect("models");
    let mut names = Vec::new();
    for (i, m) in models.iter().enumerate() {
        assert_eq!(m["rank"], i + 1, "ranks run 1, 2, ... in order: {m}");
        let baseline = m["baseline"] == true;
        for key in ["corrected_pehe", "vs_constant"] {
            let v = num(&m[key]["estimate"]);
            let se = num(&m[key]["se"]);
            // constant-effect's difference from itself is exactly 0 (se 0).
            let reference = baseline && key == "vs_constant" && m["name"] == "constant-effect";
            assert!(v.is_finite() && se.is_finite(), "{key}: {m}");
            assert!(reference || se > 0.0, "{key}: {m}");
        }
        names.push(m["name"].as_str().expect("name").to_string());
    }
    names
}

#[test]
fn the_readme_job_runs_through_the_command_line_alone() {
    let dir = TempDir::new("cli-job");
    let srv = Served::start(&dir);
    let server = srv.url();
    let with_server = |args: &[&str]| -> Vec<String> {
        let mut v: Vec<String> = args.iter().map(|s| s.to_string()).collect();
        v.extend(["--server".to_string(), server.clone()]);
        v
    };
    let call = |args: &[&str]| {
        run(&with_server(args)
            .iter()
            .map(String::as_str)
            .collect::<Vec<_>>())
    };
    let call_json = |args: &[&str]| {
        let mut v = with_server(args);
        v.extend(["--format".to_string(), "json".to_string()]);
        json(&v.iter().map(String::as_str).collect::<Vec<_>>())
    };

    // Data with known effects, as a units / predictions CSV pair.
    let files = TempDir::new("cli-job-files");
    let sim = files.0.join("sim");
    let simulated = json(&[
        "simulate",
        "--design",
        "nie-wager-b",
        "--units",
        "2000",
        "--features",
        "5",
        "--models",
        "3",
        "--seed",
        "11",
        "--out",
        &path(&sim),
        "--format",
        "json",
    ]);
    let models: Vec<String> = simulated["models"]
        .as_array()
        .expect("models")
        .iter()
        .map(|m| m["name"].as_str().expect("name").to_string())
        .collect();
    assert_eq!(models.len(), 3);
    let units = path(&sim.join("units.csv"));
    let predictions = path(&sim.join("predictions.csv"));

    // The dataset: a settings file, one of its settings overridden by a
    // flag, and the rest left to the server, whose values come back.
    let spec = files.0.join("job.toml");
    std::fs::write(
        &spec,
        "features = [\"x1\", \"x2\", \"x3\", \"x4\", \"x5\"]\noutcome_kind = \"continuous\"\n\
         seed = 99\nrecompute_every_outcomes = 1000000\nrecompute_every_seconds = 3600\n",
    )
    .expect("spec file");
    let created = call_json(&[
        "dataset",
        "create",
        "job",
        "--spec",
        &path(&spec),
        "--seed",
        "3",
    ]);
    assert_eq!(created["name"], "job");
    assert_eq!(created["seed"], 3, "the flag wins over the file");
    assert_eq!(
        created["recompute_every_outcomes"], 1_000_000,
        "from the file"
    );
    // Left out, so the server's defaults are shown as it stored them.
    assert_eq!(created["folds"], 5);
    assert_eq!(created["alpha"], 0.05);
    assert_eq!(created["min_coverage"], 0.95);
    assert_eq!(created["recent_last_outcomes"], 5000);
    let table = call(&["dataset", "show", "job"]);
    assert_eq!(table.code, Some(0), "{}", table.stderr);
    assert!(
        table
            .stdout
            .lines()
            .any(|l| l.starts_with("folds") && l.ends_with(" 5")),
        "{}",
        table.stdout
    );

    let mut register = vec!["model", "register", "--dataset", "job", "--version", "1"];
    register.extend(models.iter().map(String::as_str));
    let registered = call_json(&register);
    assert_eq!(registered.as_array().map(Vec::len), Some(3));

    // Units, then predictions (made before the outcomes), then outcomes:
    // the units file carries the outcome column the outcomes read.
    for (kind, file, rows) in [
        ("units", &units, 2000),
        ("predictions", &predictions, 6000),
        ("outcomes", &units, 2000),
    ] {
        let receipt = call_json(&["ingest", kind, "--dataset", "job", file]);
        assert_eq!(receipt["accepted"], rows, "{kind}: {receipt}");
        assert_eq!(receipt["rows_read"], 2000, "{kind}: {receipt}");
        assert!(receipt["refused"].is_null(), "{kind}: {receipt}");
    }

    let r = call_json(&["recompute", "--dataset", "job", "--refit"]);
    assert_eq!(r["refitted"], true, "{r}");
    assert_eq!(r["units"], 2000, "{r}");
    let table = call(&["recompute", "--dataset", "job"]);
    assert_eq!(table.code, Some(0), "{}", table.stderr);
    assert!(table.stdout.contains("2000 units"), "{}", table.stdout);

    let board = call_json(&["scoreboard", "--dataset", "job"]);
    let names = ranked(&board);
    for m in &models {
        assert!(names.contains(m), "{m} is ranked: {names:?}");
    }
    assert_eq!(
        names.len(),
        models.len() + 2,
        "the models and two baselines"
    );

    // The same files scored offline give the same numbers.
    let offline = run(&[
        "score",
        "--units",
        &units,
        "--predictions",
        &predictions,
        "--format",
        "json",
        "--seed",
        "3",
        "--folds",
        "5",
    ]);
    assert_eq!(offline.code, Some(0), "{}", offline.stderr);
    let offline: Value = serde_json::from_str(&offline.stdout).expect("score json");
    // The RMSE bounds and the blend are on the service's board too.
    for key in ["blend", "levels"] {
        assert!(offline.get(key).is_some(), "offline {key}");
    }
    // Both passes run the same arithmetic on the same rows in the same
    // order; 1e-9 allows only for summation order inside the service's
    // block-wise sums (tests/service.rs holds the same bound).
    assert_json_close(&board["scoreboard"], &offline, 1e-9, "scoreboard");

    // The service's table and the offline report print the same rows with
    // the same labels and numbers (they once used three vocabularies).
    let served = call(&["scoreboard", "--dataset", "job"]);
    assert_eq!(served.code, Some(0), "{}", served.stderr);
    let report = run(&[
        "score",
        "--units",
        &units,
        "--predictions",
        &predictions,
        "--seed",
        "3",
        "--folds",
        "5",
    ]);
    assert_eq!(report.code, Some(0), "{}", report.stderr);
    let table_rows = |text: &str| -> Vec<String> {
        let lines: Vec<&str> = text.lines().collect();
        let start = lines
            .iter()
            .position(|l| l.trim_start().starts_with("rank  model"))
            .unwrap_or_else(|| panic!("no board table in:\n{text}"));
        lines[start..]
            .iter()
            .take(names.len() + 1)
            .map(|l| l.trim().to_string())
            .collect()
    };
    assert_eq!(table_rows(&served.stdout), table_rows(&report.stdout));
    for text in [&served.stdout, &report.stdout] {
        let widest = text.lines().map(|l| l.chars().count()).max().unwrap_or(0);
        assert!(widest <= 100, "{widest} columns:\n{text}");
    }

    // A comparison is the board's kept pair, read either way round.
    let (a, b) = (names[0].as_str(), names[1].as_str());
    let cmp = call_json(&["compare", "--dataset", "job", a, b]);
    let pair = offline["pairwise"]
        .as_array()
        .expect("pairwise")
        .iter()
        .find(|p| p["first"] == a && p["second"] == b)
        .cloned();
    let (sign, pair) = match pair {
        Some(p) => (1.0, p),
        None => (
            -1.0,
            offline["pairwise"]
                .as_array()
                .expect("pairwise")
                .iter()
                .find(|p| p["first"] == b && p["second"] == a)
                .cloned()
                .expect("the top two are a kept pair"),
        ),
    };
    assert!(
        (num(&cmp["estimate"]) - sign * num(&pair["estimate"])).abs() < 1e-9,
        "{cmp} {pair}"
    );
    assert!(
        (num(&cmp["se"]) - num(&pair["se"])).abs() < 1e-9,
        "{cmp} {pair}"
    );
    assert!(
        num(&cmp["ci_low"]) <= num(&cmp["estimate"])
            && num(&cmp["estimate"]) <= num(&cmp["ci_high"])
    );
    assert_eq!(cmp["units"], 2000);
    let table = call(&["compare", "--dataset", "job", a, b]);
    assert_eq!(table.code, Some(0), "{}", table.stderr);
    assert!(table.stdout.contains("95% CI"), "{}", table.stdout);
    let unknown = call(&["compare", "--dataset", "job", a, "no-such-model"]);
    assert_eq!(unknown.code, Some(2), "{}", unknown.stderr);
    assert!(
        unknown.stderr.contains("no-such-model") && unknown.stderr.contains("NotFound"),
        "{}",
        unknown.stderr
    );

    // Policy comparisons: every row but the front-runner's carries its
    // policy gain minus the front-runner's (checked against the offline
    // board above, to 1e-9, with the rest of the document). CompareModels
    // gives the board's number for a pair with the front-runner, joint
    // interval included, and for any other pair the difference of the two
    // (means are linear: (x - f) - (y - f) = x - y) with a pointwise
    // interval of its own.
    let front = offline["front_runner"].as_str().expect("front-runner");
    let policy_of = |name: &str| -> Value {
        offline["models"]
            .as_array()
            .expect("models")
            .iter()
            .find(|m| m["name"] == name)
            .map(|m| m["policy_vs_front_runner"].clone())
            .unwrap_or(Value::Null)
    };
    assert!(policy_of(front).is_null(), "none on the front-runner's row");
    let others: Vec<&str> = names
        .iter()
        .map(String::as_str)
        .filter(|n| *n != front)
        .collect();
    for n in &others {
        assert!(
            policy_of(n)["se"].as_f64().is_some(),
            "{n}: {}",
            policy_of(n)
        );
    }
    let with_front = call_json(&["compare", "--dataset", "job", others[0], front]);
    let kept = policy_of(others[0]);
    let served = &with_front["policy_difference"];
    for key in ["estimate", "se", "joint_low", "joint_high"] {
        assert!(
            (num(&served[key]) - num(&kept[key])).abs() < 1e-9,
            "{key}: {served} {kept}"
        );
    }
    let (x, y) = (others[others.len() - 1], others[others.len() - 2]);
    let pair = call_json(&["compare", "--dataset", "job", x, y]);
    let served = &pair["policy_difference"];
    let want = num(&policy_of(x)["estimate"]) - num(&policy_of(y)["estimate"]);
    assert!(
        (num(&served["estimate"]) - want).abs() < 1e-9,
        "{x} minus {y}: {served}, want {want}"
    );
    assert!(num(&served["se"]) > 0.0 || want == 0.0, "{served}");
    assert!(
        served["joint_low"].is_null(),
        "a pair taken alone: {served}"
    );
    let text = call(&["compare", "--dataset", "job", x, y]);
    assert!(
        text.stdout.contains("policy gain per unit"),
        "{}",
        text.stdout
    );

    // History: two recomputes in the last hour, none in the future; the
    // table has its header.
    let hist = call_json(&["history", "--dataset", "job", "--model", a, "--since", "1h"]);
    let points = hist.as_array().expect("points");
    assert_eq!(points.len(), 2, "{hist}");
    let now_ms = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0);
    for p in points {
        let at = p["computed_at_ms"].as_i64().expect("time");
        assert!(at > now_ms - 3_600_000 && at <= now_ms, "{p}");
    }
    let none = call_json(&[
        "history",
        "--dataset",
        "job",
        "--model",
        a,
        "--until",
        "2020-01-01T00:00:00Z",
    ]);
    assert_eq!(none.as_array().map(Vec::len), Some(0), "{none}");
    let bad = call(&[
        "history",
        "--dataset",
        "job",
        "--model",
        a,
        "--since",
        "yesterday",
    ]);
    assert_eq!(bad.code, Some(2), "{}", bad.stderr);
    assert!(
        bad.stderr.contains("--since") && bad.stderr.contains("yesterday"),
        "{}",
        bad.stderr
    );

    // Events by kind, with a limit, and a header on the table.
    let refits = call_json(&["events", "--dataset", "job", "--kind", "nuisance_refit"]);
    let refits = refits.as_array().expect("events");
    assert!(!refits.is_empty());
    assert!(
        refits.iter().all(|e| e["kind"] == "nuisance_refit"),
        "{refits:?}"
    );
    let two = call_json(&[
        "events",
        "--dataset",
        "job",
        "--kind",
        "model_registered",
        "--limit",
        "2",
    ]);
    assert_eq!(two.as_array().map(Vec::len), Some(2), "{two}");
    let table = call(&["events", "--dataset", "job"]);
    assert_eq!(table.code, Some(0), "{}", table.stderr);
    let header = table.stdout.lines().next().unwrap_or("");
    assert!(
        header.contains("id") && header.contains("kind") && header.contains("summary"),
        "{header}"
    );
    assert!(
        table.stdout.lines().all(|l| l.chars().count() <= 100),
        "{}",
        table.stdout
    );

    // Retire the front-runner: gone from the models and from the next board.
    let retired = call_json(&["model", "retire", "--dataset", "job", a]);
    assert_eq!(retired["retired"], true, "{retired}");
    let active = call_json(&["models", "--dataset", "job"]);
    let active: Vec<&str> = active
        .as_array()
        .expect("models")
        .iter()
        .filter_map(|m| m["name"].as_str())
        .collect();
    assert!(!active.contains(&a) && active.len() == 2, "{active:?}");
    let all = call_json(&["model", "list", "--dataset", "job", "--retired"]);
    assert_eq!(all.as_array().map(Vec::len), Some(3), "{all}");
    let r = call(&["recompute", "--dataset", "job"]);
    assert_eq!(r.code, Some(0), "{}", r.stderr);
    let after = ranked(&call_json(&["scoreboard", "--dataset", "job"]));
    assert!(!after.iter().any(|n| n == a), "{a} still ranked: {after:?}");
    assert_eq!(after.len(), models.len() + 1);

    let shown = call_json(&["dataset", "show", "job"]);
    assert_eq!(shown["units"], 2000);
    assert_eq!(shown["outcomes"], 2000);
    assert_eq!(shown["active_models"], 2);
    // The old list command and the new one are one code path.
    let listed = call_json(&["datasets"]);
    assert_eq!(listed, call_json(&["dataset", "list"]));
    assert_eq!(listed[0]["name"], "job");

    drop(srv);
}

/// Writes `units` simulated units with five features and one model's
/// predictions under `sim`.
fn simulate_one_model(sim: &Path, units: usize) {
    let units = units.to_string();
    let r = run(&[
        "simulate",
        "--units",
        &units,
        "--features",
        "5",
        "--models",
        "1",
        "--out",
        &path(sim),
    ]);
    assert_eq!(r.code, Some(0), "{}", r.stderr);
}

/// Predictions sent after their outcomes are all refused: the message
/// counts every refused row, numbers rows from 1 as `score` does, lists
/// the reasons the server sent (at most 100), and says once what is
/// committed. Exit status 2.
#[test]
fn refused_predictions_are_counted_and_numbered_as_the_file() {
    let dir = TempDir::new("cli-refused");
    let srv = Served::start(&dir);
    let server = srv.url();
    let files = TempDir::new("cli-refused-files");
    let sim = files.0.join("sim");
    simulate_one_model(&sim, 1000);
    let units = path(&sim.join("units.csv"));
    let predictions = path(&sim.join("predictions.csv"));
    let header = std::fs::read_to_string(&predictions).expect("predictions");
    let model = header
        .lines()
        .next()
        .and_then(|h| h.split(',').nth(1))
        .expect("a model")
        .to_string();
    for args in [
        vec![
            "dataset",
            "create",
            "late",
            "--features",
            "x1,x2,x3,x4,x5",
            "--outcome-kind",
            "continuous",
        ],
        vec!["model", "register", "--dataset", "late", &model],
        vec!["ingest", "units", "--dataset", "late", &units],
        vec!["ingest", "outcomes", "--dataset", "late", &units],
    ] {
        let r = run(&[args.as_slice(), &["--server", &server]].concat());
        assert_eq!(r.code, Some(0), "{args:?}: {}", r.stderr);
    }
    let r = run(&[
        "ingest",
        "predictions",
        "--dataset",
        "late",
        &predictions,
        "--server",
        &server,
    ]);
    assert_eq!(r.code, Some(2), "{}", r.stderr);
    let err = &r.stderr;
    let listed = err.lines().filter(|l| l.starts_with("  row ")).count();
    assert!((1..=100).contains(&listed), "{err}");
    assert!(err.contains("1000 rows refused"), "{err}");
    if listed < 1000 {
        assert!(err.contains(&format!("the first {listed} listed")), "{err}");
    }
    assert!(err.contains("  row 1 (line 2)"), "{err}");
    assert!(!err.contains("row 0"), "{err}");
    assert_eq!(err.matches("committed").count(), 1, "{err}");
    assert!(err.contains("nothing was committed"), "{err}");

    let r = run(&[
        "ingest",
        "predictions",
        "--dataset",
        "late",
        &predictions,
        "--server",
        &server,
        "--format",
        "json",
    ]);
    assert_eq!(r.code, Some(2));
    let receipt: Value = serde_json::from_str(&r.stdout).expect("a JSON receipt on refusal too");
    assert_eq!(receipt["refused"]["refused"], 1000, "{receipt}");
    assert_eq!(receipt["refused"]["reasons"][0]["row"], 1, "{receipt}");
    assert_eq!(receipt["batches"], 0);
    drop(srv);
}

/// On a terminal the backfill shows progress from the first pass over the
/// file (the check) on; anywhere else it writes only its summary.
#[test]
fn ingest_shows_progress_on_a_terminal_and_only_the_summary_elsewhere() {
    if Command::new("script").arg("--version").output().is_err() {
        eprintln!("skipped: no `script` to give the command a terminal");
        return;
    }
    let dir = TempDir::new("cli-progress");
    let srv = Served::start(&dir);
    let server = srv.url();
    let files = TempDir::new("cli-progress-files");
    let sim = files.0.join("sim");
    simulate_one_model(&sim, 20000);
    let units = path(&sim.join("units.csv"));
    let r = run(&[
        "dataset",
        "create",
        "bar",
        "--features",
        "x1,x2,x3,x4,x5",
        "--outcome-kind",
        "continuous",
        "--server",
        &server,
    ]);
    assert_eq!(r.code, Some(0), "{}", r.stderr);

    let plain = run(&[
        "ingest",
        "units",
        "--dataset",
        "bar",
        &units,
        "--server",
        &server,
    ]);
    assert_eq!(plain.code, Some(0), "{}", plain.stderr);
    assert_eq!(
        plain.stderr.lines().count(),
        1,
        "only the summary: {}",
        plain.stderr
    );
    assert!(
        plain.stderr.contains("20000 rows of units read"),
        "{}",
        plain.stderr
    );

    let command = format!(
        "{} ingest units --dataset bar {units} --server {server}",
        env!("CARGO_BIN_EXE_plumbline")
    );
    let out = Command::new("script")
        .args(["-q", "-e", "-c", &command, "/dev/null"])
        .output()
        .expect("script");
    let screen = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "{screen}");
    assert!(
        screen.contains("checking"),
        "no progress while reading: {screen}"
    );
    assert!(screen.contains("/s"), "no rate on the bar: {screen}");
    assert!(
        screen.contains("0 rows new, 20000 already stored"),
        "{screen}"
    );
    drop(srv);
}

fn help(args: &[&str], env: &[(&str, &str)]) -> String {
    let mut c = plumbline();
    c.args(args).arg("--help");
    for (k, v) in env {
        c.env(k, v);
    }
    let out = c.output().expect("help");
    assert!(out.status.success(), "{args:?}");
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// Help shows a variable's value only when it is set and not a secret, and
/// every option says what it is for.
#[test]
fn help_shows_set_variables_only_and_never_a_secret() {
    let unset = help(&["ingest"], &[]);
    assert!(unset.contains("[env: PLUMBLINE_CA_CERT]"), "{unset}");
    assert!(
        !unset.contains("=]"),
        "an unset variable shown as empty: {unset}"
    );
    let set = help(
        &["scoreboard"],
        &[
            ("PLUMBLINE_CA_CERT", "/etc/ca.pem"),
            ("PLUMBLINE_TOKEN", "plb_sekrit"),
        ],
    );
    assert!(
        set.contains("[env: PLUMBLINE_CA_CERT=/etc/ca.pem]"),
        "{set}"
    );
    assert!(!set.contains("sekrit"), "{set}");
    let store = help(
        &["token", "list"],
        &[("PLUMBLINE_STORE_URL", "postgres://u:pw-secret@db/plumbline")],
    );
    assert!(!store.contains("pw-secret"), "{store}");
    assert!(!store.contains("=]"), "{store}");

    // `--client-key` is followed by its help on the same entry.
    let key = unset
        .split("--client-key")
        .nth(1)
        .and_then(|rest| rest.split("\n      --").next())
        .unwrap_or("");
    assert!(
        key.contains("private key"),
        "--client-key without help: {key}"
    );
    assert!(help(&["token", "revoke"], &[]).contains("12 hex digits"));
    let demo = help(&["demo"], &[]);
    assert!(
        demo.contains("at least 9") && demo.contains("at least 200"),
        "{demo}"
    );
    let create = help(&["dataset", "create"], &[]);
    assert!(create.contains("[server default: 5]"), "{create}");
}

/// `simulate` and `demo` keep stdout for one JSON document under
/// `--format json`; the demo narrates its run on stderr meanwhile.
#[test]
fn simulate_and_the_demo_summary_print_json() {
    let files = TempDir::new("cli-json");
    let out = files.0.join("sim");
    let sim = json(&[
        "simulate",
        "--units",
        "300",
        "--features",
        "5",
        "--models",
        "2",
        "--out",
        &path(&out),
        "--format",
        "json",
    ]);
    assert_eq!(sim["units"], 300);
    let truth = std::fs::read_to_string(out.join("truth.csv")).expect("truth");
    for m in sim["models"].as_array().expect("models") {
        let line = format!(
            "{},{}",
            m["name"].as_str().expect("name"),
            num(&m["true_pehe"])
        );
        assert!(truth.lines().any(|l| l == line), "{line} not in {truth}");
    }

    let r = run(&[
        "demo",
        "--weeks",
        "9",
        "--members",
        "200",
        "--format",
        "json",
    ]);
    assert_eq!(r.code, Some(0), "{}", r.stderr);
    let summary: Value =
        serde_json::from_str(&r.stdout).unwrap_or_else(|e| panic!("{e}: {}", r.stdout));
    // Every week's ride counts arrive, the last at the end.
    assert_eq!(summary["units"], 9 * 200, "{summary}");
    let registered = summary["events"]
        .as_array()
        .expect("events")
        .iter()
        .find(|e| e["kind"] == "model_registered")
        .map(|e| e["count"].clone());
    assert_eq!(registered, Some(Value::from(4)), "{summary}");
    assert!(
        summary["front_runner"]
            .as_str()
            .is_some_and(|s| !s.is_empty()),
        "{summary}"
    );
    assert!(
        r.stderr.contains("week  9"),
        "the narration is on stderr: {}",
        r.stderr
    );
}

/// The demo's three-arm section (src/cli/demo_arms.rs): offer-forest
/// predicts both offers' true effects up to noise (sd 0.3 against effects
/// that vary by several rides), so the service must rank it first on each
/// contrast, and its arm choice must beat giving everyone no offer with a
/// 95% interval above 0 (its true gain, from the known effects, is +1.6
/// rides per member against a standard error near 0.07). The estimate
/// must also sit within 4 standard errors of that true gain (a 1-in-15,000
/// miss for a correct estimate; the bias the tolerance allows for is the
/// estimated nuisance models', small at 3,000 members).
#[test]
fn the_demo_three_arm_section_ranks_the_right_model_first_and_values_its_choice() {
    let r = run(&[
        "demo",
        "--weeks",
        "9",
        "--members",
        "200",
        "--format",
        "json",
    ]);
    assert_eq!(r.code, Some(0), "{}", r.stderr);
    let summary: Value =
        serde_json::from_str(&r.stdout).unwrap_or_else(|e| panic!("{e}: {}", r.stdout));
    let arms = &summary["three_arms"];
    assert_eq!(
        arms["arms"],
        serde_json::json!(["no-offer", "ride-credit", "week-pass"])
    );
    let contrasts = arms["contrasts"].as_array().expect("contrasts");
    assert_eq!(contrasts.len(), 2, "{arms}");
    for c in contrasts {
        let first = &c["models"][0];
        println!(
            "{}: {} first, {:+.4} vs constant-effect (true root PEHE {:.2})",
            c["arm"],
            first["name"],
            num(&first["vs_constant"]),
            num(&first["true_root_pehe"])
        );
        assert_eq!(c["front_runner"], "offer-forest", "{c}");
        assert_eq!(first["name"], "offer-forest", "{c}");
        assert_eq!(first["rank"], 1, "{c}");
        // The first month's 1,000 members fit the first nuisance models;
        // the alerts watch the other two months' on each contrast.
        println!(
            "{}: the alerts watched {} members, front-runner {}",
            c["arm"], c["watched"]["units"], c["watched"]["front_runner"]
        );
        assert_eq!(c["watched"]["units"], 2000, "{c}");
    }
    let policy = &arms["policy"];
    let forest = policy["models"]
        .as_array()
        .expect("policy models")
        .iter()
        .find(|m| m["model"] == "offer-forest")
        .expect("offer-forest's choice");
    let v = &forest["vs_reference"];
    let truth = num(&forest["true_vs_reference"]);
    println!(
        "offer-forest's choice vs everyone no-offer: {:+.4} [{:+.4}, {:+.4}] (se {:.4}); true {truth:+.4}",
        num(&v["estimate"]),
        num(&v["ci_low"]),
        num(&v["ci_high"]),
        num(&v["se"])
    );
    assert!(num(&v["ci_low"]) > 0.0, "{forest}");
    assert!(
        (num(&v["estimate"]) - truth).abs() <= 4.0 * num(&v["se"]),
        "{forest}"
    );
    // The narration shows the section, every line within 100 columns.
    let section = r
        .stderr
        .split("\nthree offers:")
        .nth(1)
        .expect("the three-arm section on stderr");
    assert!(
        section.contains("contrast week-pass against no-offer"),
        "{section}"
    );
    // The alerts' events name their contrast.
    assert!(
        section.contains("ride-offers (week-pass against no-offer): front-runner"),
        "{section}"
    );
    for line in section.lines() {
        assert!(line.chars().count() <= 100, "{line}");
    }
}

/// `token list` prints times as the other tables do and scopes as a list;
/// its JSON holds them as values.
#[test]
fn token_list_reads_like_the_other_tables() {
    let dir = TempDir::new("cli-tokens");
    let data = path(&dir.0);
    let created = json(&[
        "token",
        "create",
        "--scope",
        "read:*",
        "--scope",
        "write:rides",
        "--label",
        "pipeline",
        "--data-dir",
        &data,
        "--format",
        "json",
    ]);
    let id = created["id"].as_str().expect("id").to_string();
    assert!(created["token"]
        .as_str()
        .is_some_and(|t| t.starts_with(&format!("plb_{id}"))));
    let r = run(&["token", "revoke", &id, "--data-dir", &data]);
    assert_eq!(r.code, Some(0), "{}", r.stderr);

    let table = run(&["token", "list", "--data-dir", &data]);
    assert_eq!(table.code, Some(0), "{}", table.stderr);
    let row = table.stdout.lines().nth(1).expect("a token row");
    let created_ms = created["created_at_ms"].as_i64().expect("time");
    assert!(
        !row.contains(&created_ms.to_string()),
        "raw milliseconds: {row}"
    );
    // The tables' time form: 2026-12-04 16:59:23Z.
    let time = row.split_whitespace().nth(2).unwrap_or("");
    assert!(time.len() == 10 && time.as_bytes()[4] == b'-', "{row}");
    assert!(
        row.contains("revoked") && row.ends_with("read:*, write:rides"),
        "{row}"
    );

    let listed = json(&["token", "list", "--data-dir", &data, "--format", "json"]);
    let t = &listed[0];
    assert_eq!(t["scopes"], serde_json::json!(["read:*", "write:rides"]));
    assert_eq!(t["state"], "revoked");
    assert!(
        t["revoked_at_ms"]
            .as_i64()
            .is_some_and(|ms| ms >= created_ms),
        "{t}"
    );
}
