//! The status page in a real browser: the `plumbline serve` binary on real
//! sockets, a dataset with several models put through three recomputes
//! over gRPC, then headless Chromium reads the page (`--dump-dom`) and
//! draws it (`--screenshot`, saved as `page-screenshot.png` in the target
//! directory). A second test configures the token gate: no token gives
//! 401 and the sign-in form, a `read:*` token kept in the form's cookie
//! gives the page.
//!
//! Where Chromium is not installed the browser checks say "skipped:
//! chromium not found" and pass, except under `CI=true` (CI installs it:
//! `.ci/run`), as `tests/common/pg.rs` does for PostgreSQL.
//! `PLUMBLINE_CHROMIUM` names another binary.

mod common;

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use common::service::{
    clients, create_with_models, recompute, send_outcomes, send_predictions, send_units,
    serve_binary, unit_row, TempDir,
};
use plumbline::api::pb;
use plumbline::auth::{issue, Scope};
use plumbline::config::DATABASE_FILE;
use plumbline::store::{self, Durability, StoreConfig};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const DATASET: &str = "ride-offers";
const MODELS: [&str; 4] = ["uplift-forest", "uplift-linear", "old-rules", "noisy-copy"];

/// The Chromium binary: `PLUMBLINE_CHROMIUM` (a path that is not a file
/// counts as none, which is how the skip is tried on a machine that has
/// Chromium), else the usual names on PATH, else None after saying the test
/// skipped (a failure under CI).
fn chromium(test: &str) -> Option<PathBuf> {
    let chosen = std::env::var_os("PLUMBLINE_CHROMIUM").map(PathBuf::from);
    if let Some(p) = chosen.as_ref().filter(|p| p.is_file()) {
        return Some(p.clone());
    }
    let names = [
        "chromium",
        "chromium-browser",
        "google-chrome",
        "headless_shell",
    ];
    let path = std::env::var_os("PATH").unwrap_or_default();
    let searched = if chosen.is_some() {
        &[][..]
    } else {
        &names[..]
    };
    for dir in std::env::split_paths(&path).chain([PathBuf::from("/usr/bin")]) {
        for name in searched {
            let candidate = dir.join(name);
            if candidate.is_file() {
                return Some(candidate);
            }
        }
    }
    if std::env::var("CI").as_deref() == Ok("true") {
        panic!("{test}: chromium not found; CI installs it (.ci/run), so this test must run there");
    }
    eprintln!("skipped: chromium not found ({test}; install Debian's chromium package to run it)");
    None
}

/// Runs headless Chromium with `args` then `url`; its stdout.
fn browse(chromium: &Path, args: &[&str], url: &str) -> String {
    let profile = TempDir::new("chromium-profile");
    let out = Command::new(chromium)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-dev-shm-usage",
            "--no-first-run",
            "--hide-scrollbars",
        ])
        .arg(format!("--user-data-dir={}", profile.0.display()))
        .args(args)
        .arg(url)
        .output()
        .expect("run chromium");
    assert!(
        out.status.success(),
        "chromium {args:?} {url} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// The build's target directory: `CARGO_TARGET_DIR` when set, else the
/// directory above the one the test binary's `plumbline` was built into.
fn target_dir() -> PathBuf {
    if let Some(d) = std::env::var_os("CARGO_TARGET_DIR") {
        let d = PathBuf::from(d);
        return if d.is_absolute() {
            d
        } else {
            PathBuf::from(env!("CARGO_MANIFEST_DIR")).join(d)
        };
    }
    let exe = PathBuf::from(env!("CARGO_BIN_EXE_plumbline"));
    exe.parent()
        .and_then(Path::parent)
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("target"))
}

/// Elements of the DOM with `data-kind="kind"` and, if given, another
/// attribute's exact value.
fn count(dom: &str, kind: &str, extra: Option<(&str, &str)>) -> usize {
    dom.split('<')
        .filter(|tag| tag.contains(&format!("data-kind=\"{kind}\"")))
        .filter(|tag| match extra {
            Some((name, value)) => tag.contains(&format!("{name}=\"{value}\"")),
            None => true,
        })
        .count()
}

/// One raw HTTP/1.1 exchange: status, headers (lowercased names), body.
fn http(
    addr: SocketAddr,
    method: &str,
    path: &str,
    headers: &[(&str, &str)],
    body: &str,
) -> (u16, Vec<(String, String)>, String) {
    let mut s = TcpStream::connect(addr).expect("connect");
    s.set_read_timeout(Some(Duration::from_secs(30)))
        .expect("timeout");
    let mut request = format!("{method} {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n");
    for (k, v) in headers {
        request.push_str(&format!("{k}: {v}\r\n"));
    }
    request.push_str(&format!("Content-Length: {}\r\n\r\n{body}", body.len()));
    s.write_all(request.as_bytes()).expect("write");
    let mut raw = String::new();
    s.read_to_string(&mut raw).expect("read");
    let (head, body) = raw.split_once("\r\n\r\n").unwrap_or((&raw, ""));
    let mut lines = head.lines();
    let status = lines
        .next()
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|c| c.parse().ok())
        .unwrap_or(0);
    let headers = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(k, v)| (k.trim().to_ascii_lowercase(), v.trim().to_string()))
        .collect();
    (status, headers, body.to_string())
}

fn header<'a>(headers: &'a [(String, String)], name: &str) -> Option<&'a str> {
    headers
        .iter()
        .find(|(k, _)| k == name)
        .map(|(_, v)| v.as_str())
}

/// One round of units: two features, a logged propensity that depends on
/// the first (so the arms' histograms differ), the outcome, and each
/// model's prediction (good, coarser, stale, noisy).
struct Round {
    units: Vec<pb::UnitRow>,
    outcomes: Vec<pb::OutcomeRow>,
    predictions: Vec<pb::PredictionRow>,
}

fn round(rng: &mut ChaCha8Rng, round: usize, n: usize) -> Round {
    let mut r = Round {
        units: Vec::new(),
        outcomes: Vec::new(),
        predictions: Vec::new(),
    };
    let normal = |rng: &mut ChaCha8Rng| plumbline::synth::standard_normal(rng);
    for i in 0..n {
        let key = format!("r{round}-u{i:04}");
        let x = [normal(rng), normal(rng)];
        let p = 1.0 / (1.0 + (-1.4 * x[0]).exp());
        let w = if rng.gen::<f64>() < p { 1.0 } else { 0.0 };
        let tau = 1.0 + 1.5 * x[1];
        let y = x[0] + w * tau + normal(rng);
        r.units.push(unit_row(&key, &x, w, Some(p), "c"));
        r.outcomes.push(pb::OutcomeRow {
            unit_key: key.clone(),
            value: y,
            observed_at_ms: 0,
        });
        let guesses = [
            tau + 0.2 * normal(rng),
            1.0 + 0.8 * x[1] + 0.3 * normal(rng),
            1.2 + 0.4 * normal(rng),
            tau + 1.2 * normal(rng),
        ];
        for (m, effect) in MODELS.iter().zip(guesses) {
            r.predictions.push(pb::PredictionRow {
                model: (*m).into(),
                unit_key: key.clone(),
                effect,
                predicted_at_ms: 0,
                arm: String::new(),
            });
        }
    }
    r
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_page_draws_board_history_overlap_and_events_in_a_browser() {
    let test = "the_page_draws_board_history_overlap_and_events_in_a_browser";
    let dir = TempDir::new("page-browser");
    let server = serve_binary(&dir, &[], "warn", false);
    let channel = server.channel().await;
    create_with_models(&channel, DATASET, &MODELS).await;
    let mut c = clients(server.grpc).await;
    let mut rng = ChaCha8Rng::seed_from_u64(18);
    for k in 0..3 {
        let r = round(&mut rng, k, 700);
        send_units(&mut c, DATASET, r.units).await;
        send_predictions(&mut c, DATASET, r.predictions).await;
        send_outcomes(&mut c, DATASET, r.outcomes).await;
        recompute(&mut c, DATASET, k == 0).await;
    }
    let board = common::service::board(&mut c, DATASET, pb::window::Kind::Cumulative).await;
    assert!(board.degenerate.is_empty(), "{}", board.degenerate);
    let ranked = board.models.len();
    let registered = board.models.iter().filter(|m| !m.baseline).count();
    assert_eq!(registered, MODELS.len());

    // The server answers whether or not a browser is at hand.
    let page = format!("/datasets/{DATASET}");
    let (status, headers, html) = http(server.http, "GET", &page, &[], "");
    assert_eq!(status, 200, "{html}");
    assert_eq!(
        header(&headers, "content-type"),
        Some("text/html; charset=utf-8")
    );
    assert!(header(&headers, "content-security-policy")
        .is_some_and(|p| p.contains("default-src 'none'")));
    assert!(html.contains("<meta http-equiv=\"refresh\""));
    assert_eq!(
        http(server.http, "GET", "/datasets/no-such", &[], "").0,
        404
    );

    let Some(chromium) = chromium(test) else {
        server.terminate();
        return;
    };
    let base = format!("http://{}", server.http);
    let dom = browse(&chromium, &["--dump-dom"], &format!("{base}{page}"));
    assert!(dom.contains("<svg"), "the browser built the page: {dom}");

    // The board: exactly one interval per ranked model, on one axis with
    // zero marked, the front-runner marked once, the chance column.
    assert_eq!(
        count(&dom, "interval", None),
        ranked,
        "one interval per ranked model"
    );
    for m in &board.models {
        assert_eq!(
            count(&dom, "interval", Some(("data-model", &m.name))),
            1,
            "{}",
            m.name
        );
    }
    assert_eq!(count(&dom, "board-chart", None), 1, "one shared axis");
    assert!(count(&dom, "zero-line", None) >= 1);
    assert_eq!(
        count(&dom, "board-row", Some(("data-front-runner", "true"))),
        1
    );
    assert_eq!(
        count(&dom, "board-row", Some(("data-model", &board.front_runner))),
        1,
        "front-runner {}",
        board.front_runner
    );
    assert_eq!(count(&dom, "chance", None), ranked);
    assert_eq!(count(&dom, "joint-interval", None), ranked);

    // History: one line (with its band and legend entry) per model.
    assert_eq!(count(&dom, "history-line", None), registered);
    assert_eq!(count(&dom, "history-band", None), registered);
    assert_eq!(count(&dom, "legend-item", None), registered);
    for m in MODELS {
        assert_eq!(
            count(&dom, "history-line", Some(("data-model", m))),
            1,
            "{m}"
        );
    }
    assert_eq!(
        count(&dom, "history-line", Some(("data-points", "3"))),
        registered,
        "a point per recompute"
    );

    // Propensities of both arms against the overlap thresholds.
    assert!(count(&dom, "propensity-bar", Some(("data-arm", "treated"))) >= 3);
    assert!(count(&dom, "propensity-bar", Some(("data-arm", "control"))) >= 3);
    assert_eq!(count(&dom, "overlap-threshold", None), 2);
    assert_eq!(
        count(&dom, "overlap-threshold", Some(("data-at", "0.05"))),
        1
    );

    // Events on the timeline (the registrations and the first refit at
    // least), and the alert conditions with a state each.
    assert!(count(&dom, "event", None) > MODELS.len());
    assert!(count(&dom, "event", Some(("data-event", "nuisance_refit"))) >= 1);
    assert!(count(&dom, "event-row", None) >= 1);
    assert_eq!(count(&dom, "alert", None), 5);
    assert!(dom.contains("data-kind=\"drawn-at\""));

    // The index links the dataset.
    let index = browse(&chromium, &["--dump-dom"], &format!("{base}/"));
    assert_eq!(count(&index, "dataset-link", None), 1);
    assert!(index.contains(&format!("href=\"/datasets/{DATASET}\"")));

    // A screenshot for people to look at.
    let shot = target_dir().join("page-screenshot.png");
    let _ = std::fs::remove_file(&shot);
    browse(
        &chromium,
        &[
            &format!("--screenshot={}", shot.display()),
            "--window-size=1400,2400",
        ],
        &format!("{base}{page}"),
    );
    let png = std::fs::read(&shot).expect("screenshot written");
    assert!(png.starts_with(b"\x89PNG\r\n\x1a\n"), "a PNG");
    assert!(
        png.len() > 50_000,
        "a drawn page, not a blank one: {} bytes",
        png.len()
    );
    eprintln!("screenshot: {}", shot.display());
    server.terminate();
}

/// The number in attribute `attr` of the one element with
/// `data-kind="kind"` and the attribute `key` equal to `value`.
fn number(dom: &str, kind: &str, key: (&str, &str), attr: &str) -> f64 {
    let tags: Vec<&str> = dom
        .split('<')
        .filter(|tag| tag.contains(&format!("data-kind=\"{kind}\"")))
        .filter(|tag| tag.contains(&format!("{}=\"{}\"", key.0, key.1)))
        .collect();
    assert_eq!(tags.len(), 1, "one {kind} with {key:?}");
    let start = format!("{attr}=\"");
    let at = tags[0]
        .find(&start)
        .unwrap_or_else(|| panic!("{kind} {key:?} has no {attr}"))
        + start.len();
    let rest = &tags[0][at..];
    let text = &rest[..rest.find('"').unwrap_or(rest.len())];
    text.parse()
        .unwrap_or_else(|e| panic!("{kind} {key:?} {attr}={text:?}: {e}"))
}

/// The page writes each number in its shortest round-trip form, so a
/// drawn number reads back as the board's double: 1e-12 relative leaves
/// room for nothing more than that.
fn assert_same(got: f64, want: f64, what: &str) {
    assert!(
        (got - want).abs() <= 1e-12 * want.abs().max(1.0),
        "{what}: {got} on the page, {want} on the board"
    );
    println!("{what}: {got} on the page and the board");
}

/// A dataset with three arms on the page: a board per contrast with one
/// interval per ranked model at the board's bounds, each arm's
/// generalized propensity (5%, 50%, 95% quantiles, extreme and effective
/// shares) as the board's detail document has it, and the arm-choice
/// table with each model's value and differences from the board's policy
/// report. `doc` is the server's HTML or the browser's DOM.
fn check_arms_page(doc: &str, board: &pb::Scoreboard, what: &str) {
    println!("{what}:");
    assert_eq!(count(doc, "contrast-board", None), board.contrasts.len());
    assert_eq!(count(doc, "board-chart", None), board.contrasts.len());
    for c in &board.contrasts {
        assert_eq!(count(doc, "contrast-board", Some(("data-arm", &c.arm))), 1);
        assert_eq!(
            count(
                doc,
                "contrast-board",
                Some(("data-front-runner", &c.front_runner))
            ),
            board
                .contrasts
                .iter()
                .filter(|o| o.front_runner == c.front_runner)
                .count()
        );
    }
    // Intervals: one per ranked model and contrast. Each contrast's chart
    // is its own section, so its rows are found after its heading.
    let ranked: usize = board.contrasts.iter().map(|c| c.models.len()).sum();
    assert_eq!(count(doc, "interval", None), ranked);
    for c in &board.contrasts {
        let start = doc
            .find(&format!(
                "data-kind=\"contrast-board\" data-arm=\"{}\"",
                c.arm
            ))
            .expect("contrast section");
        let section = &doc[start..];
        let section = &section[..section[1..]
            .find("data-kind=\"contrast-board\"")
            .map(|i| i + 1)
            .unwrap_or(section.len())];
        for m in &c.models {
            let v = m.vs_constant.unwrap_or_default();
            for (attr, want) in [("data-low", v.ci_low), ("data-high", v.ci_high)] {
                assert_same(
                    number(section, "interval", ("data-model", &m.name), attr),
                    want,
                    &format!("{} {} {attr}", c.arm, m.name),
                );
            }
        }
    }
    // Each arm's generalized propensity, from the top board's document.
    let detail: serde_json::Value = serde_json::from_str(&board.json).expect("board json");
    let arms = detail["propensity"].as_array().expect("propensity per arm");
    assert_eq!(count(doc, "arm-propensity", None), arms.len());
    assert_eq!(count(doc, "arm-propensity-box", None), arms.len());
    for a in arms {
        let arm = a["arm"].as_str().expect("arm");
        let quantile = |p: f64| {
            a["quantiles"]
                .as_array()
                .expect("quantiles")
                .iter()
                .find(|q| q[0].as_f64() == Some(p))
                .and_then(|q| q[1].as_f64())
                .expect("quantile")
        };
        for (attr, want) in [
            ("data-q05", quantile(0.05)),
            ("data-median", quantile(0.5)),
            ("data-q95", quantile(0.95)),
            (
                "data-extreme-share",
                a["extreme_share"].as_f64().expect("share"),
            ),
            (
                "data-effective-share",
                a["effective_share"].as_f64().expect("share"),
            ),
        ] {
            assert_same(
                number(doc, "arm-propensity", ("data-arm", arm), attr),
                want,
                &format!("arm {arm} {attr}"),
            );
        }
    }
    assert_eq!(count(doc, "overlap-threshold", None), 1);
    // The alerts: the watch's three conditions once per contrast, each as
    // that contrast's alert view has it.
    for c in &board.contrasts {
        let view = c.alerts.as_ref().expect("a contrast's alert view");
        assert_eq!(count(doc, "alert", Some(("data-arm", &c.arm))), 3);
        let tags: Vec<&str> = doc
            .split('<')
            .filter(|t| t.contains("data-alert=\"front-runner-not-separated\""))
            .filter(|t| t.contains(&format!("data-arm=\"{}\"", c.arm)))
            .filter(|t| t.contains("data-kind=\"alert\""))
            .collect();
        assert_eq!(tags.len(), 1, "{}", c.arm);
        let want = if view.front_runner_settled {
            "clear"
        } else {
            "active"
        };
        println!(
            "  contrast {}: watched front-runner {} over {} units, condition {want}",
            c.arm, view.front_runner, view.units
        );
        assert!(
            tags[0].contains(&format!("data-state=\"{want}\"")),
            "{}: {}",
            c.arm,
            tags[0]
        );
    }
    // The arm choice: each model's value and its two differences.
    let p = board.arm_policy.as_ref().expect("arm policy");
    assert_eq!(count(doc, "arm-policy-row", None), p.models.len());
    assert_eq!(count(doc, "arm-policy-fixed", None), 2);
    for m in &p.models {
        for (attr, want) in [
            ("data-value", m.value),
            ("data-vs-reference", m.vs_reference),
            ("data-vs-best-single-arm", m.vs_best_single_arm),
        ] {
            assert_same(
                number(doc, "arm-policy-row", ("data-model", &m.model), attr),
                want.unwrap_or_default().estimate,
                &format!("{} {attr}", m.model),
            );
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_page_of_a_dataset_with_arms_draws_each_contrast_arm_and_choice() {
    let test = "the_page_of_a_dataset_with_arms_draws_each_contrast_arm_and_choice";
    let dir = TempDir::new("page-arms");
    let server = serve_binary(&dir, &[], "warn", false);
    let mut c = clients(server.grpc).await;
    let arms = ["none", "text", "mail"];
    let spec = pb::DatasetSpec {
        arms: arms.iter().map(|a| a.to_string()).collect(),
        ..common::service::continuous_spec("offers", 2)
    };
    c.datasets
        .create_dataset(pb::CreateDatasetRequest { spec: Some(spec) })
        .await
        .expect("create");
    for m in ["good", "flat"] {
        common::service::register(&mut c, "offers", m).await;
    }
    let mut rng = ChaCha8Rng::seed_from_u64(41);
    let (mut units, mut predictions, mut outcomes) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..900 {
        let (x1, x2, arm, y, tau) = common::three_arm_unit(&mut rng);
        let key = format!("u{i}");
        units.push(pb::UnitRow {
            key: key.clone(),
            features: vec![x1, x2],
            arm: arms[arm].into(),
            ..Default::default()
        });
        for (k, arm) in arms.iter().enumerate().skip(1) {
            for (model, effect) in [("good", tau[k]), ("flat", 0.3)] {
                predictions.push(pb::PredictionRow {
                    model: model.into(),
                    unit_key: key.clone(),
                    effect,
                    arm: (*arm).into(),
                    ..Default::default()
                });
            }
        }
        outcomes.push(pb::OutcomeRow {
            unit_key: key,
            value: y,
            observed_at_ms: 0,
        });
    }
    // In two halves, a recompute after each: the first half fits the
    // first nuisance models, the alerts watch the second.
    let per = predictions.len() / units.len();
    for half in 0..2 {
        let range = half * 450..(half + 1) * 450;
        send_units(&mut c, "offers", units[range.clone()].to_vec()).await;
        send_predictions(
            &mut c,
            "offers",
            predictions[range.start * per..range.end * per].to_vec(),
        )
        .await;
        send_outcomes(&mut c, "offers", outcomes[range].to_vec()).await;
        recompute(&mut c, "offers", half == 0).await;
    }
    let board = common::service::board(&mut c, "offers", pb::window::Kind::Cumulative).await;
    assert_eq!(board.contrasts.len(), 2, "{}", board.degenerate);

    let (status, _, html) = http(server.http, "GET", "/datasets/offers", &[], "");
    assert_eq!(status, 200, "{html}");
    check_arms_page(&html, &board, "served HTML");
    // Each contrast's history: a line of two points per registered model.
    assert_eq!(count(&html, "contrast-history", None), 2);
    for arm in ["text", "mail"] {
        assert_eq!(count(&html, "contrast-history", Some(("data-arm", arm))), 1);
    }
    assert_eq!(count(&html, "history-line", Some(("data-points", "2"))), 4);
    // The index names each contrast's front-runner.
    let (_, _, index) = http(server.http, "GET", "/", &[], "");
    for c in &board.contrasts {
        assert!(
            index.contains(&format!(
                r#"data-kind="contrast-front-runner" data-arm="{}">{}: {}<"#,
                c.arm, c.arm, c.front_runner
            )),
            "{index}"
        );
    }

    let Some(chromium) = chromium(test) else {
        server.terminate();
        return;
    };
    let base = format!("http://{}", server.http);
    let dom = browse(
        &chromium,
        &["--dump-dom"],
        &format!("{base}/datasets/offers"),
    );
    check_arms_page(&dom, &board, "browser DOM");
    let shot = target_dir().join("page-arms-screenshot.png");
    let _ = std::fs::remove_file(&shot);
    browse(
        &chromium,
        &[
            &format!("--screenshot={}", shot.display()),
            "--window-size=1400,2600",
        ],
        &format!("{base}/datasets/offers"),
    );
    let png = std::fs::read(&shot).expect("screenshot written");
    assert!(png.starts_with(b"\x89PNG\r\n\x1a\n"), "a PNG");
    eprintln!("screenshot: {}", shot.display());
    server.terminate();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_gated_page_wants_a_token_that_reads_everything_by_header_or_cookie() {
    let test = "a_gated_page_wants_a_token_that_reads_everything_by_header_or_cookie";
    let dir = TempDir::new("page-gate");
    let store = store::open(&StoreConfig {
        claim: false,
        ..StoreConfig::sqlite(dir.0.join(DATABASE_FILE), Durability::Full)
    })
    .await
    .expect("store");
    let mut tokens = Vec::new();
    for scopes in [&["read:*"][..], &["read:one"][..], &["admin"][..]] {
        let scopes: Vec<Scope> = scopes
            .iter()
            .map(|s| Scope::parse(s).expect("scope"))
            .collect();
        let issued = issue(&scopes, "page test", 1).expect("issue");
        store.insert_token(&issued.record).await.expect("insert");
        tokens.push(issued.token);
    }
    store.close().await;
    let (everything, one, admin) = (&tokens[0], &tokens[1], &tokens[2]);
    let config = dir.0.join("gated.toml");
    std::fs::write(&config, "metrics_require_token = true\n").expect("config");
    let config = config.display().to_string();
    let server = serve_binary(&dir, &["--config", &config], "warn", false);

    // A dataset, created with the admin's token, to have a page to open.
    let channel = server.channel().await;
    let mut datasets = pb::dataset_registry_client::DatasetRegistryClient::new(channel);
    let mut request = tonic::Request::new(pb::CreateDatasetRequest {
        spec: Some(common::service::continuous_spec("one", 2)),
    });
    request.metadata_mut().insert(
        "authorization",
        format!("Bearer {admin}").parse().expect("ascii"),
    );
    datasets
        .create_dataset(request)
        .await
        .expect("admin creates");

    let get = |path: &str, headers: &[(&str, &str)]| http(server.http, "GET", path, headers, "");
    let cookie = |token: &str| format!("plumbline_token={token}");

    // No token: 401 with the sign-in form, on every page.
    for path in ["/", "/datasets/one"] {
        let (status, headers, body) = get(path, &[]);
        assert_eq!(status, 401, "{path}");
        assert_eq!(header(&headers, "www-authenticate"), Some("Bearer"));
        assert!(body.contains("data-kind=\"sign-in\""), "{body}");
        assert!(body.contains("method=\"post\" action=\"/sign-in\""));
    }
    // A token for one dataset only: 403, by header or cookie.
    let bearer_one = format!("Bearer {one}");
    assert_eq!(get("/", &[("Authorization", &bearer_one)]).0, 403);
    assert_eq!(get("/", &[("Cookie", &cookie(one))]).0, 403);
    // read:*: 200 by header, and by cookie (for /metrics as well: one rule).
    let bearer = format!("Bearer {everything}");
    assert_eq!(get("/", &[("Authorization", &bearer)]).0, 200);
    let (status, _, body) = get("/datasets/one", &[("Cookie", &cookie(everything))]);
    assert_eq!(status, 200, "{body}");
    assert!(
        body.contains("action=\"/sign-out\""),
        "a cookie caller may forget it"
    );
    assert_eq!(get("/metrics", &[("Cookie", &cookie(everything))]).0, 200);
    assert_eq!(get("/metrics", &[]).0, 401);
    // A stale cookie is refused and removed.
    // The last character changed to one it is not (a fixed '0' would be no
    // change at all for one token in the alphabet's size).
    let last = everything.chars().last().expect("a token");
    let other = if last == '0' { '1' } else { '0' };
    let stale = format!(
        "plumbline_token={}{other}",
        &everything[..everything.len() - 1]
    );
    let (status, headers, _) = get("/", &[("Cookie", &stale)]);
    assert_eq!(status, 401);
    assert!(header(&headers, "set-cookie").is_some_and(|c| c.contains("Max-Age=0")));

    // The form: a one-dataset token gets the form again and no cookie; a
    // read:* token gets the cookie (HttpOnly, SameSite=Strict) and goes on
    // to the page it came from, with the token nowhere in the address.
    let form = |token: &str| format!("token={token}&next=%2Fdatasets%2Fone");
    let post = |body: &str, extra: &[(&str, &str)]| {
        let mut headers = vec![("Content-Type", "application/x-www-form-urlencoded")];
        headers.extend_from_slice(extra);
        http(server.http, "POST", "/sign-in", &headers, body)
    };
    let (status, headers, body) = post(&form(one), &[]);
    assert_eq!(status, 403, "{body}");
    assert!(header(&headers, "set-cookie").is_none());
    assert_eq!(post("token=plb_nonsense&next=%2F", &[]).0, 401);
    let (status, headers, _) = post(&form(everything), &[("Sec-Fetch-Site", "cross-site")]);
    assert_eq!(status, 403, "a form posted from another site");
    assert!(header(&headers, "set-cookie").is_none());
    let (status, headers, _) = post(&form(everything), &[("Sec-Fetch-Site", "same-origin")]);
    assert_eq!(status, 303);
    let location = header(&headers, "location").expect("location");
    assert_eq!(location, "/datasets/one");
    let set = header(&headers, "set-cookie").expect("cookie set");
    assert!(
        set.starts_with(&format!("plumbline_token={everything};")),
        "{set}"
    );
    assert!(set.contains("HttpOnly") && set.contains("SameSite=Strict") && set.contains("Path=/"));
    let value = set.split(';').next().expect("pair");
    assert_eq!(get(location, &[("Cookie", value)]).0, 200);
    let (status, headers, _) = http(server.http, "POST", "/sign-out", &[("Cookie", value)], "");
    assert_eq!(status, 303);
    assert!(header(&headers, "set-cookie").is_some_and(|c| c.contains("Max-Age=0")));
    assert_eq!(get("/healthz", &[]).0, 200, "probes stay open");

    // In a browser without a token: the sign-in form.
    if let Some(chromium) = chromium(test) {
        let dom = browse(
            &chromium,
            &["--dump-dom"],
            &format!("http://{}/datasets/one", server.http),
        );
        assert_eq!(count(&dom, "sign-in", None), 1, "{dom}");
        assert!(!dom.contains(everything.as_str()));
    }
    server.terminate();
}
