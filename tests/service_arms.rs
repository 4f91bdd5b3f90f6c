//! A dataset with three arms through the real `plumbline serve` on a
//! loopback socket and the `plumbline` command line: created with its
//! arms and costs, ingested from CSV files (arm labels in `treatment`,
//! `MODEL:ARM` prediction columns), recomputed, and read back. The
//! service's boards (one per contrast) and arm-choice values must equal
//! `plumbline score --arms` on the same files; each contrast's board
//! reaches /metrics (label `contrast`) and GetHistory (field `arm`) with
//! the board's numbers; bad rows are refused whole with their field and
//! row.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::service::{assert_json_close, serve_binary, ServeBinary, TempDir};
use plumbline::api::pb;
use plumbline::api::status::receipt_of;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::Value;

/// The served binary, stopped when the test ends however it ends.
struct Served(ServeBinary);

impl Drop for Served {
    fn drop(&mut self) {
        let _ = self.0.child.kill();
        let _ = self.0.child.wait();
    }
}

fn plumbline(args: &[&str]) -> (Option<i32>, String, String) {
    let mut c = Command::new(env!("CARGO_BIN_EXE_plumbline"));
    for v in [
        "PLUMBLINE_TOKEN",
        "PLUMBLINE_DATA_DIR",
        "PLUMBLINE_STORE_URL",
        "PLUMBLINE_CA_CERT",
    ] {
        c.env_remove(v);
    }
    let out = c.args(args).output().expect("run plumbline");
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn json(args: &[&str]) -> Value {
    let (code, out, err) = plumbline(args);
    assert_eq!(code, Some(0), "{args:?}: {err}");
    serde_json::from_str(&out).unwrap_or_else(|e| panic!("{args:?}: {e}: {out}"))
}

const ARMS: [&str; 3] = ["none", "text", "mail"];

/// Registers the three models the files predict for, on dataset `offers`.
fn register_models(server: &str) {
    let (code, _, err) = plumbline(&[
        "model",
        "register",
        "--dataset",
        "offers",
        "--version",
        "1",
        "good",
        "flat",
        "text-only",
        "--server",
        server,
    ]);
    assert_eq!(code, Some(0), "{err}");
}

/// Creates dataset `offers` on `server` (features x1 and x2, arms none,
/// text and mail, continuous outcomes, seed 7, and the `extra` flags) and
/// registers the three models the files predict for.
fn create_offers(server: &str, extra: &[&str]) {
    let args: Vec<&str> = [
        "dataset",
        "create",
        "offers",
        "--features",
        "x1,x2",
        "--arms",
        "none,text,mail",
        "--outcome-kind",
        "continuous",
        "--seed",
        "7",
    ]
    .into_iter()
    .chain(extra.iter().copied())
    .chain(["--server", server, "--format", "json"])
    .collect();
    json(&args);
    register_models(server);
}

/// 1,200 units in two cohorts, arms drawn by a softmax of x1 (so the
/// propensity must be modelled), effects of text 1 + x1 and of mail
/// 0.5 - x2; "good" predicts the true effects, "flat" 0.2 on both arms,
/// "text-only" only the text contrast (the design of tests/cli_arms.rs).
/// Returns the units file the service ingests (with a cohort column), the
/// same units without it for `plumbline score` (which reads every other
/// column as a feature), and the predictions.
fn files(dir: &Path) -> (PathBuf, PathBuf, PathBuf) {
    let mut rng = ChaCha8Rng::seed_from_u64(29);
    let mut units = String::from("unit_id,treatment,outcome,x1,x2,cohort\n");
    let mut plain = String::from("unit_id,treatment,outcome,x1,x2\n");
    let mut preds =
        String::from("unit_id,good:text,good:mail,flat:text,flat:mail,text-only:text\n");
    for i in 0..1200 {
        let (x1, x2, arm, y, tau) = common::three_arm_unit(&mut rng);
        let cohort = if i < 600 { "first" } else { "second" };
        let row = format!("u{i},{},{y:.6},{x1:.6},{x2:.6}", ARMS[arm]);
        units.push_str(&format!("{row},{cohort}\n"));
        plain.push_str(&format!("{row}\n"));
        preds.push_str(&format!(
            "u{i},{:.6},{:.6},0.2,0.2,{:.6}\n",
            tau[1],
            tau[2],
            tau[1] + 0.3
        ));
    }
    let (u, o, p) = (
        dir.join("units.csv"),
        dir.join("offline_units.csv"),
        dir.join("preds.csv"),
    );
    std::fs::write(&u, units).expect("units file");
    std::fs::write(&o, plain).expect("offline units file");
    std::fs::write(&p, preds).expect("predictions file");
    (u, o, p)
}

#[test]
fn a_three_arm_dataset_served_gives_the_offline_boards_and_policy_values() {
    let dir = TempDir::new("arms-serve");
    let srv = Served(serve_binary(&dir, &[], "warn", false));
    let server = format!("http://{}", srv.0.grpc);
    let files_dir = TempDir::new("arms-files");
    let (units, offline_units, preds) = files(&files_dir.0);
    let [units, offline_units, preds] =
        [units, offline_units, preds].map(|p| p.display().to_string());
    let with = |args: &[&str]| -> Vec<String> {
        args.iter()
            .map(|s| s.to_string())
            .chain(["--server".into(), server.clone()])
            .collect()
    };
    let call_json = |args: &[&str]| -> Value {
        let mut v = with(args);
        v.extend(["--format".into(), "json".into()]);
        json(&v.iter().map(String::as_str).collect::<Vec<_>>())
    };
    let call =
        |args: &[&str]| plumbline(&with(args).iter().map(String::as_str).collect::<Vec<_>>());

    // Arms in the --spec file, the cost by flag.
    let spec = files_dir.0.join("arms.toml");
    std::fs::write(
        &spec,
        "features = [\"x1\", \"x2\"]\noutcome_kind = \"continuous\"\narms = [\"none\", \"text\", \
         \"mail\"]\nseed = 7\nrecompute_every_outcomes = 1000000\nrecompute_every_seconds = 3600\n",
    )
    .expect("spec file");
    let spec = spec.display().to_string();
    let created = call_json(&[
        "dataset",
        "create",
        "offers",
        "--spec",
        &spec,
        "--arm-cost",
        "mail=0.1",
    ]);
    assert_eq!(created["arms"], serde_json::json!(["none", "text", "mail"]));
    assert_eq!(created["arm_cost"], "mail=0.1");
    register_models(&server);
    for (kind, file, rows) in [
        ("units", &units, 1200),
        ("predictions", &preds, 6000),
        ("outcomes", &units, 1200),
    ] {
        let receipt = call_json(&["ingest", kind, "--dataset", "offers", file]);
        assert_eq!(receipt["accepted"], rows, "{kind}: {receipt}");
    }
    let r = call_json(&["recompute", "--dataset", "offers"]);
    assert_eq!(r["units"], 1200, "{r}");

    let board = call_json(&["scoreboard", "--dataset", "offers"]);
    let (code, offline, err) = plumbline(&[
        "score",
        "--units",
        &offline_units,
        "--predictions",
        &preds,
        "--arms",
        "none,text,mail",
        "--arm-cost",
        "mail=0.1",
        "--seed",
        "7",
        "--folds",
        "5",
        "--format",
        "json",
    ]);
    assert_eq!(code, Some(0), "{err}");
    let offline: Value = serde_json::from_str(&offline).expect("score json");
    // The same fit (folds and seed) and the same passes on the same rows in
    // the same order: the documents agree but for rounding. 1e-9 (relative
    // above 1) is the bound tests/cli_job.rs holds the binary service to.
    assert_json_close(&board["scoreboard"], &offline, 1e-9, "arms");
    let contrasts = offline["contrasts"].as_array().expect("contrasts");
    assert_eq!(contrasts.len(), 2);
    let good = offline["policy"]["models"]
        .as_array()
        .expect("policies")
        .iter()
        .find(|m| m["model"] == "good")
        .cloned()
        .expect("good's policy");
    println!(
        "served = offline; good's arm choice vs everyone none: {}",
        good["vs_reference"]
    );

    // The wire message carries the same contrasts and policy values.
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    let wire = rt.block_on(async {
        let mut scoring = pb::scoring_client::ScoringClient::new(srv.0.channel().await)
            .max_decoding_message_size(64 << 20);
        scoring
            .get_scoreboard(pb::GetScoreboardRequest {
                dataset: "offers".into(),
                window: Some(pb::Window {
                    kind: pb::window::Kind::Cumulative as i32,
                    cohort: String::new(),
                }),
            })
            .await
            .expect("board")
            .into_inner()
    });
    assert_eq!(wire.reference_arm, "none");
    assert_eq!(
        wire.contrasts
            .iter()
            .map(|c| c.arm.as_str())
            .collect::<Vec<_>>(),
        vec!["text", "mail"]
    );
    for (c, off) in wire.contrasts.iter().zip(contrasts) {
        assert_eq!(c.front_runner, off["board"]["front_runner"], "{}", c.arm);
        for m in &c.models {
            let o = off["board"]["models"]
                .as_array()
                .expect("models")
                .iter()
                .find(|o| o["name"] == m.name.as_str())
                .expect("the same models");
            let pehe = m.scores[0].estimate;
            let want = o["corrected_pehe"]["estimate"].as_f64().expect("number");
            assert!(
                (pehe - want).abs() <= 1e-9 * want.abs().max(1.0),
                "{}",
                m.name
            );
        }
    }
    let p = wire.arm_policy.as_ref().expect("arm policy");
    let value = p
        .models
        .iter()
        .find(|m| m.model == "good")
        .and_then(|m| m.vs_reference)
        .expect("good");
    let want = good["vs_reference"]["estimate"].as_f64().expect("number");
    assert!((value.estimate - want).abs() <= 1e-9 * want.abs().max(1.0));
    assert_eq!(p.pairwise.len(), 3, "three models, three pairs");

    // A comparison names its contrast, and reads that contrast's board.
    let mail = &contrasts[1]["board"]["pairwise"];
    let pair = mail
        .as_array()
        .expect("pairs")
        .iter()
        .find(|p| p["first"] == "good" && p["second"] == "flat")
        .cloned()
        .expect("good and flat are a kept pair on the mail board");
    let cmp = call_json(&[
        "compare",
        "--dataset",
        "offers",
        "--arm",
        "mail",
        "good",
        "flat",
    ]);
    let (got, want) = (
        cmp["estimate"].as_f64().expect("number"),
        pair["estimate"].as_f64().expect("number"),
    );
    assert!(
        (got - want).abs() <= 1e-9 * want.abs().max(1.0),
        "{cmp} {pair}"
    );
    let (code, _, err) = call(&["compare", "--dataset", "offers", "good", "flat"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("arm") && err.contains("text, mail"), "{err}");
    let (code, _, err) = call(&[
        "compare",
        "--dataset",
        "offers",
        "--arm",
        "none",
        "good",
        "flat",
    ]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("\"none\""), "{err}");

    // The overlap of one contrast, by the command line: its document has
    // the contrast's arms and both arms' generalized propensity, equal to
    // the offline document's; the table names the two arms.
    let overlap = call_json(&["overlap", "--dataset", "offers", "--arm", "mail"]);
    assert_eq!(overlap["arm"], "mail");
    assert_json_close(
        &overlap["generalized_propensity"],
        &serde_json::json!([offline["propensity"][0], offline["propensity"][2]]),
        1e-9,
        "overlap --arm mail",
    );
    let (code, table, err) = call(&["overlap", "--dataset", "offers", "--arm", "mail"]);
    assert_eq!(code, Some(0), "{err}");
    assert!(
        table.contains("contrast mail against none") && table.contains("generalized propensity"),
        "{table}"
    );
    println!("{table}");
    let (code, _, err) = call(&["overlap", "--dataset", "offers"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("arm") && err.contains("text, mail"), "{err}");

    // The recent window holds every unit here (1,200 < 5,000), so its
    // boards are the cumulative ones, scored from the same values.
    let recent = call_json(&["scoreboard", "--dataset", "offers", "--window", "recent"]);
    assert_json_close(&recent["scoreboard"], &offline, 1e-9, "recent");
    let cohort = call_json(&[
        "scoreboard",
        "--dataset",
        "offers",
        "--window",
        "cohort:first",
    ]);
    assert_eq!(cohort["scoreboard"]["n_units"], 600, "{cohort}");

    // Every contrast's board reaches /metrics, labelled by its arm, with
    // the board's numbers; and its models' history, read per contrast.
    rt.block_on(contrast_series_and_history(&srv.0, &offline));

    // The table for a person: a board per contrast and the choice table.
    let (code, table, err) = call(&["scoreboard", "--dataset", "offers"]);
    assert_eq!(code, Some(0), "{err}");
    for needle in [
        "=== Contrast text against none ===",
        "=== Contrast mail against none ===",
        "best single arm",
        "vs everyone none",
    ] {
        assert!(table.contains(needle), "{needle}:\n{table}");
    }
    let widest = table.lines().map(|l| l.chars().count()).max().unwrap_or(0);
    assert!(widest <= 100, "{widest} columns:\n{table}");

    // A restart reads the stored boards back, and a recompute on the
    // stored rows gives the same numbers again.
    drop(rt);
    drop(srv);
    let srv = Served(serve_binary(&dir, &[], "warn", false));
    let server = format!("http://{}", srv.0.grpc);
    let read = |args: &[&str]| -> Value {
        let mut v: Vec<&str> = args.to_vec();
        v.extend(["--server", &server, "--format", "json"]);
        json(&v)
    };
    let again = read(&["scoreboard", "--dataset", "offers"]);
    assert_json_close(&again["scoreboard"], &offline, 1e-9, "after restart");
    let r = read(&["recompute", "--dataset", "offers"]);
    assert_eq!(r["units"], 1200, "{r}");
    let again = read(&["scoreboard", "--dataset", "offers"]);
    assert_json_close(
        &again["scoreboard"],
        &offline,
        1e-9,
        "recomputed after restart",
    );
    // History kept both recomputes of each contrast, across the restart.
    let history = read(&[
        "history",
        "--dataset",
        "offers",
        "--model",
        "good",
        "--estimator",
        "corrected_pehe",
        "--arm",
        "mail",
    ]);
    let points = history.as_array().expect("points");
    assert_eq!(points.len(), 2, "{history}");
    let want = contrasts[1]["board"]["models"]
        .as_array()
        .expect("models")
        .iter()
        .find(|m| m["name"] == "good")
        .map(|m| m["corrected_pehe"]["estimate"].as_f64().expect("number"))
        .expect("good on the mail board");
    for p in points {
        let got = p["estimate"].as_f64().expect("number");
        // Both recomputes give the offline board to 1e-9 (checked above).
        assert!(
            (got - want).abs() <= 1e-9 * want.abs().max(1.0),
            "{got} {want}"
        );
    }
    let got: Vec<f64> = points
        .iter()
        .filter_map(|p| p["estimate"].as_f64())
        .collect();
    println!("good's corrected PEHE on mail, both recomputes: {got:?} (offline {want})");

    // A retired model's series go at once, every contrast's too.
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    let of_model = |model: &str| -> usize {
        let (status, text) = common::service::http_get(srv.0.http, "/metrics");
        assert_eq!(status, 200);
        common::service::parse_metrics(&text)
            .iter()
            .filter(|(_, l, _)| l.contains(&("model".into(), model.into())))
            .count()
    };
    let before = of_model("flat");
    assert!(before > 0, "flat has series before it is retired");
    rt.block_on(async {
        let mut c = common::service::clients(srv.0.grpc).await;
        c.models
            .retire_model(pb::RetireModelRequest {
                dataset: "offers".into(),
                name: "flat".into(),
            })
            .await
            .expect("retire")
    });
    assert_eq!(of_model("flat"), 0, "{before} series before");
    println!("retiring flat took down its {before} series");
}

/// What history keeps of a wire model, keyed as `GetHistory` asks for it:
/// every estimator's score, then vs_constant, policy_gain, autoc, qini.
fn history_values(m: &pb::ModelScore) -> Vec<(String, f64, f64)> {
    let mut out: Vec<(String, f64, f64)> = m
        .scores
        .iter()
        .map(|s| (s.estimator.clone(), s.estimate, s.se))
        .collect();
    let v = m.vs_constant.unwrap_or_default();
    out.push(("vs_constant".into(), v.estimate, v.se));
    for (key, e) in [
        ("policy_gain", m.policy_gain),
        ("autoc", m.autoc),
        ("qini", m.qini),
    ] {
        let e = e.unwrap_or_default();
        out.push((key.into(), e.estimate, e.se));
    }
    out
}

/// The value of the one sample of `name` whose labels are exactly
/// `labels`, in that order.
fn sample(samples: &[common::service::Sample], name: &str, labels: &[(&str, &str)]) -> f64 {
    let found: Vec<f64> = samples
        .iter()
        .filter(|(n, l, _)| {
            n == name
                && l.len() == labels.len()
                && l.iter()
                    .zip(labels)
                    .all(|((k, v), (wk, wv))| k == wk && v == wv)
        })
        .map(|s| s.2)
        .collect();
    assert_eq!(found.len(), 1, "{name} {labels:?}: {found:?}");
    found[0]
}

/// The metrics text carries a float's shortest round-trip form, and the
/// wire an exact f64: a series equals its board's number to within the
/// last bit (1e-12 relative leaves room for no more than that).
fn assert_same(got: f64, want: f64, what: &str) {
    assert!(
        (got - want).abs() <= 1e-12 * want.abs().max(1.0),
        "{what}: {got} on /metrics, {want} on the board"
    );
}

/// After a recompute of the three-arm dataset: /metrics has each
/// contrast's series in both exported windows, equal to the served
/// boards' numbers, and each arm's effective share under the generalized
/// propensity equal to `plumbline score --arms`'s; `GetHistory` answers
/// per contrast with the board's values, and refuses a request without an
/// arm (INVALID_ARGUMENT) or with an arm that has no contrast (NOT_FOUND).
/// A binary dataset on the same server exports its series without a
/// `contrast` label, and refuses an arm in a history request.
async fn contrast_series_and_history(srv: &ServeBinary, offline: &Value) {
    let mut c = common::service::clients(srv.grpc).await;
    let mut boards = Vec::new();
    for (window, kind) in [
        ("cumulative", pb::window::Kind::Cumulative),
        ("recent", pb::window::Kind::Recent),
    ] {
        boards.push((window, common::service::board(&mut c, "offers", kind).await));
    }
    let (status, text) = common::service::http_get(srv.http, "/metrics");
    assert_eq!(status, 200, "{text}");
    let samples = common::service::parse_metrics(&text);
    let mut checked = 0;
    for (window, board) in &boards {
        assert_eq!(board.contrasts.len(), 2, "{window}");
        for b in &board.contrasts {
            let arm = b.arm.as_str();
            let wl = [
                ("dataset", "offers"),
                ("window", *window),
                ("contrast", arm),
            ];
            let front_runner = [
                ("dataset", "offers"),
                ("model", b.front_runner.as_str()),
                ("window", *window),
                ("contrast", arm),
            ];
            assert_eq!(
                sample(&samples, "plumbline_front_runner_info", &front_runner),
                1.0
            );
            let front_runners = samples
                .iter()
                .filter(|(n, l, _)| {
                    n == "plumbline_front_runner_info"
                        && l.contains(&("dataset".into(), "offers".into()))
                        && l.contains(&("window".into(), window.to_string()))
                        && l.contains(&("contrast".into(), arm.into()))
                })
                .count();
            assert_eq!(front_runners, 1, "{window} {arm}: one front-runner");
            let uncertain = b.best_set.len() > 1 && b.models.iter().any(|m| !m.baseline);
            assert_eq!(
                sample(&samples, "plumbline_front_runner_uncertain", &wl),
                f64::from(u8::from(uncertain))
            );
            assert_eq!(
                sample(&samples, "plumbline_no_detectable_heterogeneity", &wl),
                f64::from(u8::from(b.no_detectable_heterogeneity))
            );
            for m in &b.models {
                let ml = [
                    ("dataset", "offers"),
                    ("model", m.name.as_str()),
                    ("window", *window),
                    ("contrast", arm),
                ];
                let what = format!("{window} {arm} {}", m.name);
                assert_eq!(
                    sample(&samples, "plumbline_model_rank", &ml),
                    f64::from(m.rank)
                );
                assert_same(
                    sample(&samples, "plumbline_model_draw_share", &ml),
                    m.draw_share,
                    &what,
                );
                if let Some(bound) = m.rmse_lower_bound {
                    assert_same(
                        sample(&samples, "plumbline_model_rmse_lower_bound", &ml),
                        bound,
                        &what,
                    );
                }
                for (key, estimate, se) in history_values(m) {
                    let sl = [
                        ("dataset", "offers"),
                        ("model", m.name.as_str()),
                        ("estimator", key.as_str()),
                        ("window", *window),
                        ("contrast", arm),
                    ];
                    assert_same(
                        sample(&samples, "plumbline_model_score", &sl),
                        estimate,
                        &format!("{what} {key}"),
                    );
                    assert_same(
                        sample(&samples, "plumbline_model_score_se", &sl),
                        se,
                        &format!("{what} {key} se"),
                    );
                    checked += 2;
                }
            }
        }
    }
    // "text-only" predicts one contrast: it has no mail series.
    assert!(!samples.iter().any(|(_, l, _)| {
        l.contains(&("model".into(), "text-only".into()))
            && l.contains(&("contrast".into(), "mail".into()))
    }));
    for (k, p) in offline["propensity"]
        .as_array()
        .expect("propensity per arm")
        .iter()
        .enumerate()
    {
        let arm = p["arm"].as_str().expect("arm");
        assert_eq!(arm, ARMS[k]);
        let want = p["effective_share"].as_f64().expect("number");
        for window in ["cumulative", "recent"] {
            let got = sample(
                &samples,
                "plumbline_overlap_effective_share",
                &[("dataset", "offers"), ("window", window), ("arm", arm)],
            );
            // The service's board equals the offline document to 1e-9.
            assert!(
                (got - want).abs() <= 1e-9,
                "{window} {arm}: {got} vs {want}"
            );
        }
        println!("arm {arm}: effective share {want:.4} on /metrics and offline");
    }
    println!("{checked} per-contrast score and se series equal to the boards");
    arm_overlap_and_nuisance(&mut c, &samples, &boards, offline).await;

    // History per contrast: the one recompute's values, as on the board.
    for b in &boards[0].1.contrasts {
        for m in &b.models {
            for (key, estimate, se) in history_values(m) {
                let points = c
                    .scoring
                    .get_history(pb::GetHistoryRequest {
                        dataset: "offers".into(),
                        model: m.name.clone(),
                        estimator: key.clone(),
                        arm: b.arm.clone(),
                        ..Default::default()
                    })
                    .await
                    .expect("history of a contrast")
                    .into_inner()
                    .points;
                assert_eq!(points.len(), 1, "{} {} {key}", b.arm, m.name);
                let v = points[0].value.unwrap_or_default();
                // Stored as a double and read back: the same number.
                assert_eq!((v.estimate, v.se), (estimate, se), "{} {key}", m.name);
                assert_eq!(points[0].rank, m.rank);
            }
        }
    }
    let ask = |arm: &str| pb::GetHistoryRequest {
        dataset: "offers".into(),
        model: "good".into(),
        estimator: "corrected_pehe".into(),
        arm: arm.into(),
        ..Default::default()
    };
    let refused = c.scoring.get_history(ask("")).await.expect_err("no arm");
    assert_eq!(refused.code(), tonic::Code::InvalidArgument);
    assert!(
        refused.message().starts_with("arm:") && refused.message().contains("text, mail"),
        "{}",
        refused.message()
    );
    for arm in ["none", "sms"] {
        let refused = c
            .scoring
            .get_history(ask(arm))
            .await
            .expect_err("no contrast");
        assert_eq!(refused.code(), tonic::Code::NotFound, "{arm}");
        assert!(
            refused.message().starts_with("arm:"),
            "{}",
            refused.message()
        );
    }

    // A binary dataset beside it: its series carry no contrast label.
    let mut spec = common::service::continuous_spec("clicks", 1);
    spec.folds = 3;
    c.datasets
        .create_dataset(pb::CreateDatasetRequest { spec: Some(spec) })
        .await
        .expect("create");
    common::service::register(&mut c, "clicks", "m").await;
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let (mut units, mut preds, mut outcomes) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..400 {
        let (x1, _, arm, y, tau) = common::three_arm_unit(&mut rng);
        let key = format!("c{i}");
        units.push(common::service::unit_row(
            &key,
            &[x1],
            f64::from(u8::from(arm > 0)),
            None,
            "",
        ));
        preds.push(pb::PredictionRow {
            model: "m".into(),
            unit_key: key.clone(),
            effect: tau[1],
            ..Default::default()
        });
        outcomes.push(pb::OutcomeRow {
            unit_key: key,
            value: y,
            observed_at_ms: 0,
        });
    }
    common::service::send_units(&mut c, "clicks", units).await;
    common::service::send_predictions(&mut c, "clicks", preds).await;
    common::service::send_outcomes(&mut c, "clicks", outcomes).await;
    common::service::recompute(&mut c, "clicks", false).await;
    let binary = common::service::board(&mut c, "clicks", pb::window::Kind::Cumulative).await;
    let (_, text) = common::service::http_get(srv.http, "/metrics");
    let samples = common::service::parse_metrics(&text);
    let of_clicks: Vec<_> = samples
        .iter()
        .filter(|(_, l, _)| l.first() == Some(&("dataset".into(), "clicks".into())))
        .collect();
    assert!(of_clicks.len() > 20, "{}", of_clicks.len());
    assert!(
        of_clicks
            .iter()
            .all(|(_, l, _)| l.iter().all(|(k, _)| k != "contrast")),
        "a binary dataset's series have no contrast label"
    );
    let m = binary.models.iter().find(|m| m.name == "m").expect("m");
    let rank = [
        ("dataset", "clicks"),
        ("model", "m"),
        ("window", "cumulative"),
    ];
    assert_eq!(
        sample(&samples, "plumbline_model_rank", &rank),
        f64::from(m.rank)
    );
    for arm in ["treated", "control"] {
        sample(
            &samples,
            "plumbline_overlap_effective_share",
            &[
                ("dataset", "clicks"),
                ("window", "cumulative"),
                ("arm", arm),
            ],
        );
    }
    let refused = c
        .scoring
        .get_history(pb::GetHistoryRequest {
            dataset: "clicks".into(),
            ..ask("text")
        })
        .await
        .expect_err("an arm on a binary dataset");
    assert_eq!(refused.code(), tonic::Code::InvalidArgument);
    assert!(
        refused.message().starts_with("arm:"),
        "{}",
        refused.message()
    );
    let points = c
        .scoring
        .get_history(pb::GetHistoryRequest {
            dataset: "clicks".into(),
            model: "m".into(),
            estimator: "corrected_pehe".into(),
            ..Default::default()
        })
        .await
        .expect("binary history")
        .into_inner()
        .points;
    assert_eq!(points.len(), 1);
    binary_overlap_and_series(&mut c, &samples, &binary).await;
    println!(
        "binary dataset: {} series without a contrast label",
        of_clicks.len()
    );
}

fn overlap_request(dataset: &str, kind: pb::window::Kind, arm: &str) -> pb::GetOverlapRequest {
    pb::GetOverlapRequest {
        dataset: dataset.into(),
        window: Some(pb::Window {
            kind: kind as i32,
            cohort: String::new(),
        }),
        arm: arm.into(),
    }
}

/// GetOverlap per contrast: the summary is the contrast board's own (the
/// same doubles), the JSON its report with both arms' generalized
/// propensity equal to `plumbline score --arms`'s; the request's arm is
/// required (INVALID_ARGUMENT), and the reference or an undeclared arm is
/// NOT_FOUND. /metrics has each arm's extreme share beside its effective
/// share and the nuisance losses per arm, equal to the board's.
async fn arm_overlap_and_nuisance(
    c: &mut common::service::Clients,
    samples: &[common::service::Sample],
    boards: &[(&str, pb::Scoreboard)],
    offline: &Value,
) {
    let per_arm = offline["propensity"]
        .as_array()
        .expect("propensity per arm");
    for ((window, board), kind) in boards
        .iter()
        .zip([pb::window::Kind::Cumulative, pb::window::Kind::Recent])
    {
        for b in &board.contrasts {
            let r = c
                .scoring
                .get_overlap(overlap_request("offers", kind, &b.arm))
                .await
                .expect("overlap of a contrast")
                .into_inner();
            // The same record converted twice: equal to the last bit.
            assert_eq!(r.summary, b.overlap, "{window} {}", b.arm);
            let s = r.summary.unwrap_or_default();
            let doc: Value = serde_json::from_str(&r.json).expect("overlap json");
            assert_eq!(doc["arm"], b.arm.as_str());
            assert_eq!(doc["reference_arm"], "none");
            assert_eq!(
                doc["treated"]["effective_share"].as_f64(),
                Some(s.treated_effective_share)
            );
            assert_eq!(
                doc["control"]["effective_share"].as_f64(),
                Some(s.control_effective_share)
            );
            assert_eq!(doc["share_outside_eps"].as_f64(), Some(s.extreme_share));
            if *window == "cumulative" {
                // The conditional propensity's AUC on the two arms' units:
                // the offline document's, and above chance here (arms drawn
                // by a softmax of x1).
                let off = offline["contrasts"]
                    .as_array()
                    .expect("contrasts")
                    .iter()
                    .find(|c| c["arm"] == b.arm.as_str())
                    .expect("offline contrast");
                let want = off["propensity_auc"].as_f64().expect("auc");
                println!(
                    "{} vs none: conditional propensity AUC {:.4} (offline {want:.4}), {} clipped",
                    b.arm, s.propensity_auc, s.clipped
                );
                assert!((s.propensity_auc - want).abs() <= 1e-9, "{}", b.arm);
                assert_eq!(Some(s.clipped), off["clipped"].as_u64(), "{}", b.arm);
                assert!(s.propensity_auc > 0.55, "{}: {}", b.arm, s.propensity_auc);
            }
            let pair = doc["generalized_propensity"]
                .as_array()
                .expect("two arms' generalized propensity");
            assert_eq!(pair.len(), 2);
            for (entry, arm) in pair.iter().zip(["none", b.arm.as_str()]) {
                assert_eq!(entry["arm"], arm);
                let off = per_arm
                    .iter()
                    .find(|p| p["arm"] == arm)
                    .expect("offline arm");
                for key in ["effective_share", "extreme_share", "effective_sample_size"] {
                    let (got, want) = (
                        entry[key].as_f64().expect("number"),
                        off[key].as_f64().expect("number"),
                    );
                    // The served board equals the offline document to 1e-9.
                    assert!(
                        (got - want).abs() <= 1e-9 * want.abs().max(1.0),
                        "{window} {arm} {key}: {got} vs {want}"
                    );
                }
                assert_json_close(&entry["quantiles"], &off["quantiles"], 1e-9, "quantiles");
            }
            println!(
                "{window} {} vs none: effective share {:.4} / {:.4}, outside eps {:.4}; \
                 generalized propensity effective share {} / {}",
                b.arm,
                s.treated_effective_share,
                s.control_effective_share,
                s.extreme_share,
                pair[1]["effective_share"],
                pair[0]["effective_share"]
            );
        }
    }
    let refused = c
        .scoring
        .get_overlap(overlap_request("offers", pb::window::Kind::Cumulative, ""))
        .await
        .expect_err("no arm");
    assert_eq!(refused.code(), tonic::Code::InvalidArgument);
    assert!(
        refused.message().starts_with("arm: ") && refused.message().contains("text, mail"),
        "{}",
        refused.message()
    );
    for arm in ["none", "sms"] {
        let refused = c
            .scoring
            .get_overlap(overlap_request("offers", pb::window::Kind::Cumulative, arm))
            .await
            .expect_err("no contrast");
        assert_eq!(refused.code(), tonic::Code::NotFound, "{arm}");
        assert!(
            refused.message().starts_with("arm: "),
            "{}",
            refused.message()
        );
    }

    // Each arm's extreme share, beside its effective share. The share
    // below eps is 0 exactly when the arm's smallest propensity (its 0%
    // quantile, over the same units) is at least eps.
    let eps = boards[0].1.contrasts[0]
        .overlap
        .as_ref()
        .expect("overlap")
        .eps;
    for p in per_arm {
        let arm = p["arm"].as_str().expect("arm");
        let want = p["extreme_share"].as_f64().expect("number");
        let smallest = p["quantiles"][0][1].as_f64().expect("0% quantile");
        assert_eq!(p["quantiles"][0][0].as_f64(), Some(0.0));
        assert_eq!(want == 0.0, smallest >= eps, "{arm}: {want} {smallest}");
        println!("arm {arm}: smallest propensity {smallest:.4} against eps {eps}");
        for window in ["cumulative", "recent"] {
            let got = sample(
                samples,
                "plumbline_overlap_arm_extreme_share",
                &[("dataset", "offers"), ("window", window), ("arm", arm)],
            );
            assert!(
                (got - want).abs() <= 1e-9,
                "{window} {arm}: {got} vs {want}"
            );
        }
        println!("arm {arm}: extreme share {want:.4} on /metrics and offline");
    }

    // The nuisance losses: the generalized propensity's, and per arm its
    // outcome model's and the propensity's over the arm's units.
    let top = &boards[0].1;
    let component = |name: &str| {
        top.nuisance
            .iter()
            .find(|n| n.component == name)
            .unwrap_or_else(|| panic!("{name} on the board"))
            .oof_loss
    };
    let overall = component("propensity");
    assert_same(
        sample(
            samples,
            "plumbline_nuisance_oof_loss",
            &[("dataset", "offers"), ("component", "propensity")],
        ),
        overall,
        "propensity",
    );
    let off_nuisance = &offline["nuisance"]["propensity"];
    let units = offline["units_per_arm"].as_array().expect("units per arm");
    let n: f64 = units.iter().filter_map(Value::as_f64).sum();
    let mut weighted = 0.0;
    for (k, arm) in ARMS.iter().enumerate() {
        let outcome = sample(
            samples,
            "plumbline_nuisance_oof_loss",
            &[
                ("dataset", "offers"),
                ("component", "outcome"),
                ("arm", arm),
            ],
        );
        assert_same(outcome, component(&format!("outcome_{arm}")), arm);
        let got = sample(
            samples,
            "plumbline_nuisance_oof_loss",
            &[
                ("dataset", "offers"),
                ("component", "propensity"),
                ("arm", arm),
            ],
        );
        let want = off_nuisance["arm_oof_loss"][k].as_f64().expect("number");
        assert!(
            (got - want).abs() <= 1e-9 * want.abs().max(1.0),
            "{arm}: {got} vs {want}"
        );
        weighted += units[k].as_f64().expect("units") / n * got;
        println!("arm {arm}: outcome loss {outcome:.4}, propensity log-loss {got:.4}");
    }
    // The per-arm log-losses are the overall one regrouped by arm.
    assert!(
        (weighted - overall).abs() <= 1e-9,
        "{weighted} vs {overall}"
    );
    println!("propensity log-loss {overall:.5}; per arm, weighted by share {weighted:.5}");
}

/// A binary dataset: GetOverlap with no arm gives the board's summary and
/// its plain report, an arm is INVALID_ARGUMENT; its nuisance series carry
/// exactly the labels they always had, and it has no per-arm series.
async fn binary_overlap_and_series(
    c: &mut common::service::Clients,
    samples: &[common::service::Sample],
    binary: &pb::Scoreboard,
) {
    let r = c
        .scoring
        .get_overlap(overlap_request("clicks", pb::window::Kind::Cumulative, ""))
        .await
        .expect("binary overlap")
        .into_inner();
    assert_eq!(r.summary, binary.overlap);
    let doc: Value = serde_json::from_str(&r.json).expect("overlap json");
    assert!(doc.get("treated").is_some() && doc.get("generalized_propensity").is_none());
    let refused = c
        .scoring
        .get_overlap(overlap_request(
            "clicks",
            pb::window::Kind::Cumulative,
            "text",
        ))
        .await
        .expect_err("an arm on a binary dataset");
    assert_eq!(refused.code(), tonic::Code::InvalidArgument);
    assert!(
        refused.message().starts_with("arm: "),
        "{}",
        refused.message()
    );
    let losses: Vec<_> = samples
        .iter()
        .filter(|(n, l, _)| {
            n == "plumbline_nuisance_oof_loss"
                && l.first() == Some(&("dataset".into(), "clicks".into()))
        })
        .collect();
    let mut components: Vec<&str> = losses
        .iter()
        .map(|(_, l, _)| {
            let keys: Vec<&str> = l.iter().map(|(k, _)| k.as_str()).collect();
            assert_eq!(keys, ["dataset", "component"], "{l:?}");
            l[1].1.as_str()
        })
        .collect();
    components.sort_unstable();
    assert_eq!(
        components,
        ["outcome_control", "outcome_treated", "propensity"]
    );
    for (component, want) in binary.nuisance.iter().map(|n| (&n.component, n.oof_loss)) {
        if want > 0.0 {
            assert_same(
                sample(
                    samples,
                    "plumbline_nuisance_oof_loss",
                    &[("dataset", "clicks"), ("component", component)],
                ),
                want,
                component,
            );
        }
    }
    assert!(!samples
        .iter()
        .any(|(n, l, _)| n == "plumbline_overlap_arm_extreme_share"
            && l.first() == Some(&("dataset".into(), "clicks".into()))));
}

/// Under `limits.max_fit_units` a three-arm dataset's fit takes a sample,
/// as a binary refit does: the served board's nuisance report says how
/// many units the models saw (1,000 of 1,200, each arm's share kept), and
/// the board is `plumbline score --arms --max-fit-units 1000`'s on the
/// same files.
#[test]
fn a_three_arm_dataset_under_a_refit_cap_fits_a_sample_as_score_does() {
    let dir = TempDir::new("arms-cap");
    let config = dir.0.join("plumbline.toml");
    std::fs::write(&config, "[limits]\nmax_fit_units = 1000\n").expect("config");
    let config = config.display().to_string();
    let srv = Served(serve_binary(&dir, &["--config", &config], "warn", false));
    let server = format!("http://{}", srv.0.grpc);
    let files_dir = TempDir::new("arms-cap-files");
    let (units, offline_units, preds) = files(&files_dir.0);
    let [units, offline_units, preds] =
        [units, offline_units, preds].map(|p| p.display().to_string());
    let call_json = |args: &[&str]| -> Value {
        let v: Vec<&str> = args
            .iter()
            .copied()
            .chain(["--server", &server, "--format", "json"])
            .collect();
        json(&v)
    };
    create_offers(&server, &[]);
    for (kind, file) in [
        ("units", &units),
        ("predictions", &preds),
        ("outcomes", &units),
    ] {
        call_json(&["ingest", kind, "--dataset", "offers", file]);
    }
    let r = call_json(&["recompute", "--dataset", "offers"]);
    assert_eq!(r["units"], 1200, "{r}");
    let board = call_json(&["scoreboard", "--dataset", "offers"]);
    let nuisance = &board["scoreboard"]["nuisance"];
    println!(
        "served nuisance report: fitted_units {}, units {}",
        nuisance["fitted_units"], nuisance["units"]
    );
    assert_eq!(nuisance["max_fit_units"], 1000, "{nuisance}");
    assert_eq!(nuisance["fitted_units"], 1000, "{nuisance}");
    assert_eq!(nuisance["units"], 1200, "{nuisance}");
    let outcome_units: u64 = nuisance["outcome"]
        .as_array()
        .expect("outcome reports")
        .iter()
        .filter_map(|o| o["units"].as_u64())
        .sum();
    assert_eq!(outcome_units, 1000, "each arm's model on its sample units");

    let score = [
        "score",
        "--units",
        &offline_units,
        "--predictions",
        &preds,
        "--arms",
        "none,text,mail",
        "--seed",
        "7",
        "--max-fit-units",
        "1000",
    ];
    let offline = json(&[&score[..], &["--format", "json"]].concat());
    assert_json_close(&board["scoreboard"], &offline, 1e-9, "capped arms");
    let (code, text, err) = plumbline(&score);
    assert_eq!(code, Some(0), "{err}");
    assert!(
        text.contains("fitted on a sample of 1000 of 1200 units"),
        "{text}"
    );
}

#[test]
fn bad_rows_of_a_three_arm_dataset_are_refused_whole_with_field_and_row() {
    let dir = TempDir::new("arms-refuse");
    let srv = Served(serve_binary(&dir, &[], "warn", false));
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    rt.block_on(async {
        let mut c = common::service::clients(srv.0.grpc).await;
        let spec = pb::DatasetSpec {
            arms: ARMS.iter().map(|a| a.to_string()).collect(),
            ..common::service::continuous_spec("offers", 1)
        };
        c.datasets
            .create_dataset(pb::CreateDatasetRequest { spec: Some(spec) })
            .await
            .expect("create");
        common::service::register(&mut c, "offers", "m").await;
        let unit = |key: &str, treatment: u32, arm: &str| pb::UnitRow {
            key: key.into(),
            features: vec![0.5],
            treatment,
            arm: arm.into(),
            ..Default::default()
        };
        let refused = |status: tonic::Status| -> Vec<(u32, String)> {
            let receipt = receipt_of(&status).expect("receipt in details");
            assert_eq!(receipt.accepted, 0, "nothing of the batch is written");
            receipt
                .rejections
                .iter()
                .map(|r| (r.row, r.field.clone()))
                .collect()
        };
        let err = c
            .intake
            .send_units(tokio_stream::iter(vec![pb::UnitBatch {
                dataset: "offers".into(),
                rows: vec![unit("a", 0, "text"), unit("b", 0, "sms"), unit("c", 1, "")],
            }]))
            .await
            .expect_err("an unknown arm and a binary-style row");
        assert_eq!(
            refused(err),
            vec![
                (1, "arm".into()),
                (2, "treatment".into()),
                (2, "arm".into())
            ]
        );
        let d = c
            .datasets
            .get_dataset(pb::GetDatasetRequest {
                name: "offers".into(),
            })
            .await
            .expect("dataset")
            .into_inner();
        assert_eq!(d.units, 0, "the refused batch left nothing");
        common::service::send_units(
            &mut c,
            "offers",
            vec![unit("a", 0, "text"), unit("b", 0, "none")],
        )
        .await;
        let prediction = |arm: &str| pb::PredictionRow {
            model: "m".into(),
            unit_key: "a".into(),
            effect: 0.5,
            arm: arm.into(),
            ..Default::default()
        };
        let err = c
            .intake
            .send_predictions(tokio_stream::iter(vec![pb::PredictionBatch {
                dataset: "offers".into(),
                rows: vec![prediction("mail"), prediction("none"), prediction("")],
            }]))
            .await
            .expect_err("the reference and no arm");
        assert_eq!(refused(err), vec![(1, "arm".into()), (2, "arm".into())]);
        let receipt = common::service::send_predictions(
            &mut c,
            "offers",
            vec![prediction("text"), prediction("mail")],
        )
        .await;
        assert_eq!(receipt.accepted, 2, "one model, one unit, two arms");
    });
}

/// Rows `rows` (counted after the header) of a CSV file, with its header,
/// as a new file `name` beside it.
fn csv_part(file: &str, rows: std::ops::Range<usize>, name: &str) -> String {
    let text = std::fs::read_to_string(file).expect("read csv");
    let mut lines = text.lines();
    let header = lines.next().expect("header");
    let mut out = format!("{header}\n");
    for line in lines.skip(rows.start).take(rows.len()) {
        out.push_str(line);
        out.push('\n');
    }
    let path = Path::new(file).with_file_name(name);
    std::fs::write(&path, out).expect("write csv part");
    path.display().to_string()
}

/// A dataset with arms keeps its nuisance fit between recomputes as a
/// binary one does: the first recompute fits (and equals `score --arms` on
/// those units); outcomes that grow the data by less than
/// `refit_growth` are scored with the kept fit's fold models, not a new
/// fit; a restart reproduces the recorded fit, under the cap it was
/// fitted with, so the boards after it are the boards before it; and an
/// asked-for refit equals `score --arms` on every unit.
#[test]
fn a_three_arm_dataset_keeps_its_fit_between_refits_and_across_a_restart() {
    let dir = TempDir::new("arms-refit");
    let config = dir.0.join("plumbline.toml");
    std::fs::write(&config, "[limits]\nmax_fit_units = 1000\n").expect("config");
    let config = config.display().to_string();
    let srv = serve_binary(&dir, &["--config", &config], "warn", false);
    let files_dir = TempDir::new("arms-refit-files");
    let (units, offline_units, preds) = files(&files_dir.0);
    let [units, offline_units, preds] =
        [units, offline_units, preds].map(|p| p.display().to_string());
    let first = csv_part(&units, 0..1100, "first.csv");
    let rest = csv_part(&units, 1100..1200, "rest.csv");
    let offline_first = csv_part(&offline_units, 0..1100, "offline_first.csv");
    let preds_first = csv_part(&preds, 0..1100, "preds_first.csv");
    let call_json = |server: &str, args: &[&str]| -> Value {
        let v: Vec<&str> = args
            .iter()
            .copied()
            .chain(["--server", server, "--format", "json"])
            .collect();
        json(&v)
    };
    let offline = |units: &str, preds: &str, cap: &str| -> Value {
        json(&[
            "score",
            "--units",
            units,
            "--predictions",
            preds,
            "--arms",
            "none,text,mail",
            "--seed",
            "7",
            "--max-fit-units",
            cap,
            "--format",
            "json",
        ])
    };

    let server = format!("http://{}", srv.grpc);
    create_offers(
        &server,
        &[
            "--refit-growth",
            "0.5",
            "--recompute-every-outcomes",
            "1000000",
            "--recompute-every-seconds",
            "3600",
        ],
    );
    for (kind, file) in [
        ("units", &units),
        ("predictions", &preds),
        ("outcomes", &first),
    ] {
        call_json(&server, &["ingest", kind, "--dataset", "offers", file]);
    }
    let r = call_json(&server, &["recompute", "--dataset", "offers"]);
    assert_eq!(
        (&r["refitted"], &r["units"]),
        (&Value::Bool(true), &1100.into()),
        "{r}"
    );
    let fitted = call_json(&server, &["scoreboard", "--dataset", "offers"]);
    let cohort = |server: &str, name: &str| {
        let window = format!("cohort:{name}");
        call_json(
            server,
            &["scoreboard", "--dataset", "offers", "--window", &window],
        )
    };
    let first_cohort = cohort(&server, "first");
    assert_json_close(
        &fitted["scoreboard"],
        &offline(&offline_first, &preds_first, "1000"),
        1e-9,
        "first fit",
    );

    // 100 more outcomes: 9% growth, under refit_growth's 50%.
    call_json(
        &server,
        &["ingest", "outcomes", "--dataset", "offers", &rest],
    );
    let r = call_json(&server, &["recompute", "--dataset", "offers"]);
    assert_eq!(
        (&r["refitted"], &r["units"]),
        (&Value::Bool(false), &1200.into()),
        "{r}"
    );
    let extended = call_json(&server, &["scoreboard", "--dataset", "offers"]);
    let report = &extended["scoreboard"]["nuisance"];
    println!(
        "between refits: nuisance fitted on {} of {} units, board on {}",
        report["fitted_units"], report["units"], extended["scoreboard"]["units"]
    );
    assert_eq!(
        report, &fitted["scoreboard"]["nuisance"],
        "the kept fit's report"
    );
    assert_eq!(
        (&report["fitted_units"], &report["units"]),
        (&1000.into(), &1100.into())
    );
    // The new outcomes are all in cohort "second": "first" keeps its
    // board, snapshot included; "second" is scored again.
    assert_eq!(
        cohort(&server, "first"),
        first_cohort,
        "an unchanged cohort"
    );
    let second = cohort(&server, "second");
    assert_eq!(
        (&second["snapshot_id"], &second["scoreboard"]["n_units"]),
        (&extended["snapshot_id"], &600.into()),
        "{}",
        second["scoreboard"]
    );

    // A restart without the cap: the recorded fit is drawn again under
    // the cap it was fitted with, and scores the later units as before.
    let stopped = srv.terminate();
    assert!(stopped.status.success(), "{stopped:?}");
    let srv = serve_binary(&dir, &[], "warn", false);
    let server = format!("http://{}", srv.grpc);
    let r = call_json(&server, &["recompute", "--dataset", "offers"]);
    assert_eq!(r["refitted"], false, "{r}");
    let restarted = call_json(&server, &["scoreboard", "--dataset", "offers"]);
    assert_json_close(
        &restarted["scoreboard"],
        &extended["scoreboard"],
        1e-12,
        "after the restart",
    );

    let r = call_json(&server, &["recompute", "--dataset", "offers", "--refit"]);
    assert_eq!(r["refitted"], true, "{r}");
    let refitted = call_json(&server, &["scoreboard", "--dataset", "offers"]);
    assert_json_close(
        &refitted["scoreboard"],
        &offline(&offline_units, &preds, "200000"),
        1e-9,
        "asked-for refit",
    );
    let events = call_json(
        &server,
        &["events", "--dataset", "offers", "--kind", "nuisance_refit"],
    );
    let reasons: Vec<&str> = events
        .as_array()
        .expect("events")
        .iter()
        .filter_map(|e| e["details"]["reason"].as_str())
        .collect();
    assert_eq!(reasons, ["first_fit", "requested"], "{events}");
}

/// The assignment switches from an even draw of the three arms to one
/// driven by x1 (text above zero, mail below), with no logged
/// probabilities: the fitted generalized propensity goes stale. The
/// dataset's watch finds the misfit on the units scored with it and the
/// same recompute refits, as a binary dataset's does
/// (tests/service.rs, `a_policy_switch_is_found_and_refits`); nothing is
/// raised before the switch.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_arms_policy_switch_is_found_and_refits() {
    use common::service::{
        assert_switch_found, clients, continuous_spec, recompute, register, send_outcomes,
        send_predictions, send_units, server,
    };
    use plumbline::synth::standard_normal;
    use rand::Rng;
    let dir = TempDir::new("arms-switch");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    let name = "switch";
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(pb::DatasetSpec {
                arms: ARMS.map(String::from).to_vec(),
                ..continuous_spec(name, 3)
            }),
        })
        .await
        .expect("create");
    register(&mut c, name, "m").await;
    let mut rng = ChaCha8Rng::seed_from_u64(23);
    let switch_at = 4;
    let mut refitted = Vec::new();
    for k in 0..7 {
        let (mut units, mut preds, mut outcomes) = (Vec::new(), Vec::new(), Vec::new());
        for i in 0..1000 {
            let key = format!("c{k}-{i}");
            let x: Vec<f64> = (0..3).map(|_| standard_normal(&mut rng)).collect();
            let eta = if k >= switch_at {
                [0.0, 1.5 * x[0], -1.5 * x[0]]
            } else {
                [0.0; 3]
            };
            let total: f64 = eta.iter().map(|v| v.exp()).sum();
            let u = rng.gen::<f64>() * total;
            let arm = if u < 1.0 {
                0
            } else if u < 1.0 + eta[1].exp() {
                1
            } else {
                2
            };
            let tau = [0.0, 1.0 + x[1], 0.5 - x[2]];
            units.push(pb::UnitRow {
                key: key.clone(),
                features: x.clone(),
                cohort: format!("c{k}"),
                arm: ARMS[arm].into(),
                ..Default::default()
            });
            for (a, t) in [(1, tau[1]), (2, tau[2])] {
                preds.push(pb::PredictionRow {
                    model: "m".into(),
                    unit_key: key.clone(),
                    effect: t,
                    predicted_at_ms: 0,
                    arm: ARMS[a].into(),
                });
            }
            outcomes.push(pb::OutcomeRow {
                unit_key: key,
                value: x[0] + tau[arm] + standard_normal(&mut rng),
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
