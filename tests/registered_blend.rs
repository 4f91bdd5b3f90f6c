//! A window's blend registered as a model, through the `plumbline` binary on
//! a real socket: the server derives its predictions from its members', it
//! is ranked like any model, and a restart restores it.

mod common;

use common::service::{
    board, clients, continuous_spec, recompute, register, send_outcomes, send_predictions,
    send_units, serve_binary, unit_row, Clients, ServeBinary, TempDir,
};
use plumbline::api::pb;
use rand::{Rng, SeedableRng};
use serde_json::Value;

const DATASET: &str = "blended";
/// Outcomes are stamped at this time, so that the check model below can
/// backfill predictions stamped earlier.
const OBSERVED_MS: i64 = 1_900_000_000_000;
const PREDICTED_MS: i64 = 1_800_000_000_000;
/// Units model "b" leaves unpredicted: neither the blend nor the check
/// model predicts them.
const B_SKIPS: usize = 20;

/// One unit of the design: x ~ N(0, I_2), a fair coin for treatment, effect
/// x1, outcome x2 + w x1 + N(0, 1); three models of the effect, none exact,
/// so that a blend of them has something to gain.
struct Unit {
    key: String,
    x: [f64; 2],
    w: f64,
    y: f64,
    predictions: [f64; 3],
}

/// A standard normal draw (Box-Muller).
fn normal(rng: &mut rand::rngs::StdRng) -> f64 {
    let u: f64 = 1.0 - rng.gen::<f64>();
    let v: f64 = rng.gen();
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

fn units(from: usize, to: usize, rng: &mut rand::rngs::StdRng) -> Vec<Unit> {
    (from..to)
        .map(|i| {
            let x = [normal(rng), normal(rng)];
            let w = f64::from(u8::from(rng.gen_bool(0.5)));
            let tau = x[0];
            let noise = normal(rng);
            let e = normal(rng);
            Unit {
                key: format!("u{i}"),
                x,
                w,
                y: x[1] + w * tau + noise,
                predictions: [tau + 0.6 * e, 0.6 * tau + 0.2, 0.5 * tau - 0.3 * x[1]],
            }
        })
        .collect()
}

const MODELS: [&str; 3] = ["a", "b", "c"];

/// Sends the units, the three models' predictions (b skipping the first
/// `B_SKIPS` of the whole dataset) and the outcomes, stamped.
async fn send(c: &mut Clients, batch: &[Unit], first: usize) {
    let rows = batch
        .iter()
        .map(|u| unit_row(&u.key, &u.x, u.w, Some(0.5), ""))
        .collect();
    send_units(c, DATASET, rows).await;
    let mut predictions = Vec::new();
    for (k, u) in batch.iter().enumerate() {
        for (m, name) in MODELS.iter().enumerate() {
            if *name == "b" && first + k < B_SKIPS {
                continue;
            }
            predictions.push(pb::PredictionRow {
                model: (*name).into(),
                unit_key: u.key.clone(),
                effect: u.predictions[m],
                predicted_at_ms: PREDICTED_MS,
                ..Default::default()
            });
        }
    }
    send_predictions(c, DATASET, predictions).await;
    let outcomes = batch
        .iter()
        .map(|u| pb::OutcomeRow {
            unit_key: u.key.clone(),
            value: u.y,
            observed_at_ms: OBSERVED_MS,
        })
        .collect();
    send_outcomes(c, DATASET, outcomes).await;
}

/// The blend's prediction for a unit, formed as the server forms it: the
/// members in the definition's order, sum of weight times prediction; None
/// where a member has not predicted the unit.
fn blended(u: &Unit, index: usize, members: &[(String, f64)]) -> Option<f64> {
    let mut sum = 0.0;
    for (model, weight) in members {
        let m = MODELS.iter().position(|n| n == model).expect("a member");
        if model == "b" && index < B_SKIPS {
            return None;
        }
        sum += weight * u.predictions[m];
    }
    Some(sum)
}

/// Sends the check model "check": the blend's predictions computed here,
/// backfilled (stamped before the outcomes).
async fn send_check(c: &mut Clients, batch: &[Unit], first: usize, members: &[(String, f64)]) {
    let rows: Vec<pb::PredictionRow> = batch
        .iter()
        .enumerate()
        .filter_map(|(k, u)| {
            Some(pb::PredictionRow {
                model: "check".into(),
                unit_key: u.key.clone(),
                effect: blended(u, first + k, members)?,
                predicted_at_ms: PREDICTED_MS,
                ..Default::default()
            })
        })
        .collect();
    send_predictions(c, DATASET, rows).await;
}

fn cli(server: &ServeBinary, args: &[&str]) -> std::process::Output {
    std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .args(args)
        .args(["--server", &format!("http://{}", server.grpc)])
        .output()
        .expect("run plumbline")
}

async fn models(c: &mut Clients) -> Vec<pb::Model> {
    c.models
        .list_models(pb::ListModelsRequest {
            dataset: DATASET.into(),
            include_retired: true,
        })
        .await
        .expect("models")
        .into_inner()
        .models
}

fn row<'a>(b: &'a pb::Scoreboard, name: &str) -> &'a pb::ModelScore {
    b.models
        .iter()
        .find(|m| m.name == name)
        .unwrap_or_else(|| panic!("{name} is ranked: {:?}", b.models))
}

/// The registered blend and the check model carry the same predictions, so
/// every score of theirs is the same number: the columns are formed by the
/// same sums in the same order (bit for bit), and the estimators then read
/// them the same way; 1e-12 leaves room only for a summation order that
/// differs by position in the ranking. CompareModels sees a difference of
/// 0 with a standard error of 0, which needs equal contributions on every
/// unit scored.
async fn blend_equals_check(c: &mut Clients, b: &pb::Scoreboard) {
    let (mix, check) = (row(b, "mix"), row(b, "check"));
    assert!(mix.registered_blend && !check.registered_blend);
    assert_eq!(mix.scores.len(), check.scores.len());
    for (s, t) in mix.scores.iter().zip(&check.scores) {
        assert_eq!(s.estimator, t.estimator);
        assert!(
            (s.estimate - t.estimate).abs() <= 1e-12 && (s.se - t.se).abs() <= 1e-12,
            "{}: {} vs {}",
            s.estimator,
            s.estimate,
            t.estimate
        );
    }
    let gain = |m: &pb::ModelScore| m.policy_gain.as_ref().map(|e| e.estimate);
    let (pm, pc) = (gain(mix).expect("gain"), gain(check).expect("gain"));
    assert!((pm - pc).abs() <= 1e-12, "policy gain {pm} vs {pc}");
    let d = c
        .scoring
        .compare_models(pb::CompareModelsRequest {
            dataset: DATASET.into(),
            first: "mix".into(),
            second: "check".into(),
            window: None,
            ..Default::default()
        })
        .await
        .expect("compare")
        .into_inner();
    let diff = d.difference.unwrap_or_default();
    println!(
        "mix minus check on {} units: {:e} (se {:e})",
        d.units, diff.estimate, diff.se
    );
    assert!(diff.estimate.abs() <= 1e-12 && diff.se <= 1e-12, "{diff:?}");
    assert!(
        b.caveat.contains("registered blend"),
        "the caveat says the row is in-sample: {}",
        b.caveat
    );
}

// Two workers: `terminate` blocks its thread while the server drains, and
// the client's connection tasks must run meanwhile to close.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_registered_blend_is_predicted_by_the_server_ranked_and_restored() {
    let dir = TempDir::new("registered-blend");
    let mut rng = rand::rngs::StdRng::seed_from_u64(17);
    let first = units(0, 1_500, &mut rng);
    let later = units(1_500, 1_800, &mut rng);
    let last = units(1_800, 1_900, &mut rng);

    let server = serve_binary(&dir, &[], "warn", false);
    let mut c = clients(server.grpc).await;
    let mut spec = continuous_spec(DATASET, 2);
    spec.folds = 3;
    c.datasets
        .create_dataset(pb::CreateDatasetRequest { spec: Some(spec) })
        .await
        .expect("create");
    for m in MODELS {
        register(&mut c, DATASET, m).await;
    }
    send(&mut c, &first, 0).await;

    // Before any board there is no blend to register.
    let early = cli(
        &server,
        &["model", "register-blend", "--dataset", DATASET, "mix"],
    );
    assert!(!early.status.success());
    let said = String::from_utf8_lossy(&early.stderr);
    assert!(said.contains("recompute first"), "{said}");

    recompute(&mut c, DATASET, true).await;
    let before = board(&mut c, DATASET, pb::window::Kind::Cumulative).await;
    let offered = before.blend.clone().expect("a blend of three models");
    assert!(offered.weights.len() >= 2, "{offered:?}");

    let out = cli(
        &server,
        &[
            "model",
            "register-blend",
            "--dataset",
            DATASET,
            "mix",
            "--version",
            "v1",
            "--format",
            "json",
        ],
    );
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let json: Value = serde_json::from_slice(&out.stdout).expect("json");
    assert_eq!(
        json["blend"]["snapshot_id"].as_u64(),
        Some(before.snapshot_id)
    );
    let members: Vec<(String, f64)> = json["blend"]["members"]
        .as_array()
        .expect("members")
        .iter()
        .map(|m| {
            (
                m["model"].as_str().expect("model").to_string(),
                m["weight"].as_f64().expect("weight"),
            )
        })
        .collect();
    // The definition is the board's blend: the same models and weights
    // (JSON carries the shortest decimal that reads back as the same
    // double, so they are equal, not close).
    let board_weights: Vec<(String, f64)> = offered
        .weights
        .iter()
        .map(|w| (w.model.clone(), w.weight))
        .collect();
    assert_eq!(members, board_weights);
    let total: f64 = members.iter().map(|m| m.1).sum();
    assert!((total - 1.0).abs() < 1e-12, "weights sum to {total}");
    // Every unit but those b skipped has every member's prediction.
    let expected_count = |n: usize| {
        if members.iter().any(|m| m.0 == "b") {
            n - B_SKIPS
        } else {
            n
        }
    };
    let listed = models(&mut c).await;
    let mix = listed.iter().find(|m| m.name == "mix").expect("listed");
    assert_eq!(mix.predictions as usize, expected_count(1_500));

    // Sending predictions for it is refused, naming the field and row.
    let refused = c
        .intake
        .send_predictions(tokio_stream::iter(vec![pb::PredictionBatch {
            dataset: DATASET.into(),
            rows: vec![pb::PredictionRow {
                model: "mix".into(),
                unit_key: "u0".into(),
                effect: 1.0,
                ..Default::default()
            }],
        }]))
        .await
        .expect_err("refused");
    assert!(
        refused.message().contains("registered blend"),
        "{}",
        refused.message()
    );

    // The check model: the same predictions, sent.
    register(&mut c, DATASET, "check").await;
    send_check(&mut c, &first, 0, &members).await;
    // Units arriving after the registration: the server derives the
    // blend's predictions as its members' arrive.
    send(&mut c, &later, 1_500).await;
    send_check(&mut c, &later, 1_500, &members).await;
    recompute(&mut c, DATASET, false).await;
    let after = board(&mut c, DATASET, pb::window::Kind::Cumulative).await;
    blend_equals_check(&mut c, &after).await;
    let listed = models(&mut c).await;
    let mix = listed.iter().find(|m| m.name == "mix").expect("listed");
    assert_eq!(mix.predictions as usize, expected_count(1_800));

    // A restart restores the definition, and the server derives the
    // predictions again: units arriving after it are predicted too.
    drop(c);
    let stopped = server.terminate();
    assert!(stopped.status.success());
    let server = serve_binary(&dir, &[], "warn", false);
    let mut c = clients(server.grpc).await;
    let listed = models(&mut c).await;
    let mix = listed.iter().find(|m| m.name == "mix").expect("restored");
    let restored: Vec<(String, f64)> = mix
        .blend
        .as_ref()
        .expect("still a blend")
        .members
        .iter()
        .map(|w| (w.model.clone(), w.weight))
        .collect();
    assert_eq!(restored, members);
    assert_eq!(mix.predictions as usize, expected_count(1_800));
    let kept = board(&mut c, DATASET, pb::window::Kind::Cumulative).await;
    assert!(row(&kept, "mix").registered_blend);
    send(&mut c, &last, 1_800).await;
    send_check(&mut c, &last, 1_800, &members).await;
    recompute(&mut c, DATASET, false).await;
    let restarted = board(&mut c, DATASET, pb::window::Kind::Cumulative).await;
    blend_equals_check(&mut c, &restarted).await;

    // The table form names the members; a re-send is a no-op.
    let again = cli(
        &server,
        &[
            "model",
            "register-blend",
            "--dataset",
            DATASET,
            "mix",
            "--version",
            "v1",
        ],
    );
    let text = String::from_utf8_lossy(&again.stdout);
    assert!(again.status.success(), "{text}");
    assert!(text.contains("predicted by the server as"), "{text}");
    let taken = cli(
        &server,
        &["model", "register-blend", "--dataset", DATASET, "a"],
    );
    assert!(!taken.status.success());
    drop(server);
}
