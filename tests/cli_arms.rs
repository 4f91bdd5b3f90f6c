//! `plumbline score --arms`: the real binary on three-arm CSV files, its
//! per-contrast boards and arm-choice values, and the errors bad input
//! gets (each naming the field and, where there is one, the row).

use std::path::{Path, PathBuf};
use std::process::Command;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

mod common;

use common::service::TempDir as Dir;

fn write(dir: &Dir, name: &str, text: &str) -> PathBuf {
    let p = dir.0.join(name);
    std::fs::write(&p, text).expect("write");
    p
}

fn score(units: &Path, preds: &Path, extra: &[&str]) -> (i32, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .arg("score")
        .arg("--units")
        .arg(units)
        .arg("--predictions")
        .arg(preds)
        .args(extra)
        .output()
        .expect("run plumbline");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// `score --arms none,text,mail --format json` plus `extra`, which must
/// succeed; its JSON document.
fn score_json(units: &Path, preds: &Path, extra: &[&str]) -> serde_json::Value {
    let args: Vec<&str> = ["--arms", "none,text,mail", "--format", "json"]
        .iter()
        .chain(extra)
        .copied()
        .collect();
    let (code, out, err) = score(units, preds, &args);
    assert_eq!(code, 0, "{err}");
    serde_json::from_str(&out).expect("json")
}

const ARMS: [&str; 3] = ["none", "text", "mail"];

/// 900 units, arms drawn by a softmax of x1, effects of text 1 + x1 and of
/// mail 0.5 - x2; predictions: "good" is the truth, "flat" predicts 0.2,
/// and "text-only" predicts only the text contrast.
fn files(dir: &Dir) -> (PathBuf, PathBuf) {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut units = String::from("unit_id,treatment,outcome,x1,x2\n");
    let mut preds =
        String::from("unit_id,good:text,good:mail,flat:text,flat:mail,text-only:text\n");
    for i in 0..900 {
        let (x1, x2, arm, y, tau) = common::three_arm_unit(&mut rng);
        units.push_str(&format!("u{i},{},{y:.6},{x1:.6},{x2:.6}\n", ARMS[arm]));
        preds.push_str(&format!(
            "u{i},{:.6},{:.6},0.2,0.2,{:.6}\n",
            tau[1],
            tau[2],
            tau[1] + 0.3
        ));
    }
    (
        write(dir, "units.csv", &units),
        write(dir, "preds.csv", &preds),
    )
}

#[test]
fn three_arms_give_a_board_per_contrast_and_value_each_arm_choice() {
    let dir = Dir::new("ok");
    let (units, preds) = files(&dir);
    let v = score_json(&units, &preds, &["--arm-cost", "mail=0.1"]);
    assert_eq!(v["reference"], "none");
    let contrasts = v["contrasts"].as_array().expect("contrasts");
    assert_eq!(contrasts.len(), 2);
    assert_eq!(contrasts[0]["arm"], "text");
    assert_eq!(contrasts[1]["arm"], "mail");
    let names = |c: &serde_json::Value| -> Vec<String> {
        c["board"]["models"]
            .as_array()
            .expect("models")
            .iter()
            .filter(|m| m["baseline"] == false)
            .map(|m| m["name"].as_str().unwrap_or("").to_string())
            .collect()
    };
    // The text-only model is on the text board and not on the mail board.
    assert!(names(&contrasts[0]).contains(&"text-only".to_string()));
    assert!(!names(&contrasts[1]).contains(&"text-only".to_string()));
    // The true effects are the front-runner on both contrasts: with 900
    // units their corrected PEHE sits well below the flat model's (true
    // PEHE gap 1/3 for text and mail alike, x uniform on [-1, 1]).
    for c in contrasts {
        assert_eq!(c["board"]["front_runner"], "good", "{}", c["arm"]);
    }
    assert_eq!(v["propensity"].as_array().expect("per arm").len(), 3);
    let policy = &v["policy"];
    assert_eq!(policy["costs"][2]["cost"], 0.1);
    let models = policy["models"].as_array().expect("policies");
    assert_eq!(models.len(), 3);
    assert_eq!(policy["pairwise"].as_array().expect("pairs").len(), 3);
    // Choosing by the true effects beats everyone-none: its true gain is
    // E[max(0, 1 + x1, 0.4 - x2)] near 0.9 on this design, far above its
    // standard error at 900 units (about 0.15).
    let good = models.iter().find(|m| m["model"] == "good").expect("good");
    assert!(
        good["vs_reference"]["ci_low"].as_f64().expect("low") > 0.0,
        "{good}"
    );

    let (code, table, err) = score(&units, &preds, &["--arms", "none,text,mail"]);
    assert_eq!(code, 0, "{err}");
    assert!(
        table.contains("=== Contrast text against none ==="),
        "{table}"
    );
    assert!(table.contains("best single arm"), "{table}");
    // The report for a person fits a 100-column terminal, as `score`'s
    // binary table does.
    for line in table.lines() {
        assert!(
            line.chars().count() <= 100,
            "{} columns: {line}",
            line.len()
        );
    }
}

#[test]
fn bad_arm_input_is_refused_naming_field_and_row() {
    let dir = Dir::new("bad");
    let (units, preds) = files(&dir);
    let text = std::fs::read_to_string(&units).expect("read");

    // A label that is not declared, in data row 3.
    let unknown = text.replacen("u2,", "u2,sms-", 1);
    let bad = write(&dir, "unknown.csv", &unknown);
    let (code, _, err) = score(&bad, &preds, &["--arms", "none,text,mail"]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("row 3") && err.contains("\"treatment\""),
        "{err}"
    );

    // A declared arm with no units.
    let (code, _, err) = score(&units, &preds, &["--arms", "none,text,mail,call"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("call") && err.contains("no units"), "{err}");

    // A prediction column naming an arm that is not declared.
    let p = std::fs::read_to_string(&preds).expect("read");
    let renamed = write(
        &dir,
        "preds-call.csv",
        &p.replacen("flat:mail", "flat:call", 1),
    );
    let (code, _, err) = score(&units, &renamed, &["--arms", "none,text,mail"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("flat:call"), "{err}");

    // A column without an arm.
    let plain = write(&dir, "preds-plain.csv", &p.replacen("flat:mail", "flat", 1));
    let (code, _, err) = score(&units, &plain, &["--arms", "none,text,mail"]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("\"flat\"") && err.contains("MODEL:ARM"),
        "{err}"
    );

    // An arm cost for an arm that is not declared.
    let (code, _, err) = score(
        &units,
        &preds,
        &["--arms", "none,text,mail", "--arm-cost", "call=1"],
    );
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("call"), "{err}");
}

/// The generalized propensity's last stage: by default chosen by
/// out-of-fold log-loss between the raw probabilities and matrix scaling,
/// both reported; `--recalibrate-propensity` fixes matrix scaling; the
/// table names the stage.
#[test]
fn the_propensity_last_stage_is_reported_and_can_be_fixed() {
    let dir = Dir::new("arms-stage");
    let (units, preds) = files(&dir);
    let chosen = score_json(&units, &preds, &[]);
    let stage = &chosen["nuisance"]["propensity"]["recalibration"];
    assert_eq!(stage["how"], "chosen by loss", "{stage}");
    let names: Vec<&str> = stage["candidates"]
        .as_array()
        .expect("candidates")
        .iter()
        .filter_map(|c| c["stage"].as_str())
        .collect();
    assert_eq!(names, ["raw", "matrix_scaling"], "{stage}");
    let fixed = score_json(&units, &preds, &["--recalibrate-propensity"]);
    let stage = &fixed["nuisance"]["propensity"]["recalibration"];
    assert_eq!(stage["chosen"], "matrix_scaling", "{stage}");
    assert_eq!(stage["how"], "fixed", "{stage}");
    let (code, table, err) = score(
        &units,
        &preds,
        &["--arms", "none,text,mail", "--recalibrate-propensity"],
    );
    assert_eq!(code, 0, "{err}");
    assert!(
        table.contains("propensity last stage matrix_scaling (fixed"),
        "{table}"
    );
}

/// `--fold-repeats` with arms: the JSON report and the table say how many
/// fold splits the nuisance values were averaged over, the learners'
/// losses are the first split's, the averaged values move the estimates,
/// and a count outside 1..=20 is refused as on a binary run.
#[test]
fn fold_repeats_average_the_arms_fit() {
    let dir = Dir::new("arms-repeats");
    let (units, preds) = files(&dir);
    let json = |repeats: &str| score_json(&units, &preds, &["--fold-repeats", repeats]);
    let (one, three) = (json("1"), json("3"));
    assert_eq!(one["nuisance"]["fold_repeats"], 1, "{}", one["nuisance"]);
    assert_eq!(three["nuisance"]["fold_repeats"], 3);
    assert_eq!(
        one["nuisance"]["propensity"]["oof_loss"],
        three["nuisance"]["propensity"]["oof_loss"]
    );
    let ate =
        |v: &serde_json::Value, c: usize| v["contrasts"][c]["board"]["ate"]["estimate"].clone();
    for c in 0..2 {
        assert!(ate(&one, c).is_f64(), "{}", one["contrasts"][c]);
        assert_ne!(ate(&one, c), ate(&three, c), "contrast {c}");
    }
    let (code, table, err) = score(
        &units,
        &preds,
        &["--arms", "none,text,mail", "--fold-repeats", "2"],
    );
    assert_eq!(code, 0, "{err}");
    assert!(table.contains("averaged over 2 fold splits"), "{table}");
    for bad in ["0", "21"] {
        let (code, _, err) = score(
            &units,
            &preds,
            &["--arms", "none,text,mail", "--fold-repeats", bad],
        );
        assert_eq!(code, 2, "--fold-repeats {bad}: {err}");
        assert!(err.contains("--fold-repeats"), "{err}");
    }
}

/// `plumbline simulate --design three-arms` writes files `score --arms`
/// reads, with each model's true PEHE per contrast, and the boards find
/// that truth: every model's difference from constant-effect lies within
/// four of its standard errors of the true one, true PEHE minus Var(tau)
/// (constant-effect's PEHE, up to the square of the ATE's error, about
/// 0.002 here against standard errors of 0.03 to 0.09). Eight such
/// checks at four standard errors fail by chance with probability under
/// 8 x 6.3e-5 = 5e-4 were the estimates right; the differences of one
/// contrast share constant-effect's noise, so they move together
/// (measured: within 1.2 standard errors of the truth, all eight).
#[test]
fn simulated_arms_are_scored_against_their_known_truth() {
    let dir = Dir::new("arms-simulate");
    let out = Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .args([
            "simulate",
            "--design",
            "three-arms",
            "--units",
            "4000",
            "--models",
            "4",
            "--seed",
            "3",
            "--format",
            "json",
            "--out",
        ])
        .arg(&dir.0)
        .output()
        .expect("simulate");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let written: serde_json::Value = serde_json::from_slice(&out.stdout).expect("json");
    assert_eq!(written["arms"], serde_json::json!(["none", "text", "mail"]));
    let truth = std::fs::read_to_string(dir.0.join("truth.csv")).expect("truth");
    let mut rows = truth.lines();
    assert_eq!(rows.next(), Some("model,arm,true_pehe"));
    let truth: Vec<(String, String, f64)> = rows
        .map(|line| {
            let f: Vec<&str> = line.split(',').collect();
            (f[0].into(), f[1].into(), f[2].parse().expect("number"))
        })
        .collect();
    assert_eq!(truth.len(), 8, "{truth:?}");
    // The sharp model's noise has sd 0.25 of the effect's sd: PEHE 0.0625
    // Var(tau), with Var(tau) 0.64 for text and 0.52 for mail.
    assert!((truth[0].2 - 0.0625 * 0.64).abs() < 1e-12, "{truth:?}");
    assert!((truth[4].2 - 0.0625 * 0.52).abs() < 1e-12, "{truth:?}");

    let board = score_json(
        &dir.0.join("units.csv"),
        &dir.0.join("predictions.csv"),
        &[],
    );
    let variance = [("text", 0.64), ("mail", 0.52)];
    let mut checked = 0;
    for (c, (arm, var_tau)) in variance.iter().enumerate() {
        let contrast = &board["contrasts"][c];
        assert_eq!(contrast["arm"], *arm);
        for (model, _, pehe) in truth.iter().filter(|(_, a, _)| a == arm) {
            let m = contrast["board"]["models"]
                .as_array()
                .and_then(|ms| ms.iter().find(|m| m["name"] == model.as_str()))
                .unwrap_or_else(|| panic!("{model} on {arm}"));
            let (estimate, se) = (
                m["vs_constant"]["estimate"].as_f64().expect("estimate"),
                m["vs_constant"]["se"].as_f64().expect("se"),
            );
            let want = pehe - var_tau;
            println!("{arm} {model}: vs constant {estimate:+.4} (se {se:.4}), true {want:+.4}");
            assert!(
                (estimate - want).abs() < 4.0 * se,
                "{arm} {model}: {estimate} (se {se}) against {want}"
            );
            checked += 1;
        }
    }
    assert_eq!(checked, 8);
}
