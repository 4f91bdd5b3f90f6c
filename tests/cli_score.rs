//! `plumbline score` as a user runs it: the real binary, real files.

use std::path::{Path, PathBuf};
use std::process::Command;

fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_plumbline"))
}

struct Dir(PathBuf);

impl Dir {
    fn new(tag: &str) -> Self {
        let p = std::env::temp_dir().join(format!("plumbline-cli-{tag}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&p);
        std::fs::create_dir_all(&p).expect("temp dir");
        Dir(p)
    }
    fn write(&self, name: &str, text: &str) -> PathBuf {
        let p = self.0.join(name);
        std::fs::write(&p, text).expect("write");
        p
    }
}

impl Drop for Dir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

fn score(units: &Path, preds: &Path, extra: &[&str]) -> (i32, String, String) {
    let out = bin()
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

/// A small valid pair: 40 units alternating arms, two features.
fn valid_units() -> String {
    let mut s = String::from("unit_id,treatment,outcome,age,score\n");
    for i in 0..40 {
        let w = i % 2;
        let y = 1.0 + 0.1 * i as f64 + if w == 1 { 0.5 } else { 0.0 } + ((i * 7) % 5) as f64 * 0.3;
        s.push_str(&format!("u{i},{w},{y},{},{}\n", 20 + i, (i * 13) % 7));
    }
    s
}

fn valid_predictions() -> String {
    let mut s = String::from("unit_id,alpha,beta\n");
    for i in 0..40 {
        s.push_str(&format!("u{i},{},{}\n", 0.5 + 0.01 * i as f64, 0.4));
    }
    s
}

/// Each malformed input exits with status 2 and a message naming the
/// file, the row and the column.
#[test]
fn bad_input_names_file_row_and_column() {
    let d = Dir::new("bad");
    let good_u = d.write("units.csv", &valid_units());
    let good_p = d.write("preds.csv", &valid_predictions());
    let units = valid_units();
    let preds = valid_predictions();

    let cases: Vec<(&str, String, String, Vec<&str>)> = vec![
        (
            "missing column",
            units.replace("unit_id,treatment,outcome", "unit_id,arm,outcome"),
            preds.clone(),
            vec!["units.csv", "column \"treatment\"", "missing"],
        ),
        (
            "duplicate column",
            units.replace("age,score", "age,age"),
            preds.clone(),
            vec!["units.csv", "column \"age\"", "duplicate"],
        ),
        (
            "non-numeric cell",
            set_cell(&units, 4, "age", "abc"),
            preds.clone(),
            vec![
                "units.csv",
                "row 4",
                "column \"age\"",
                "\"abc\" is not a number",
            ],
        ),
        (
            "NaN value",
            set_cell(&units, 6, "outcome", "NaN"),
            preds.clone(),
            vec![
                "units.csv",
                "row 6",
                "column \"outcome\"",
                "not a finite number",
            ],
        ),
        (
            "infinite prediction",
            units.clone(),
            set_cell(&preds, 8, "alpha", "inf"),
            vec![
                "preds.csv",
                "row 8",
                "column \"alpha\"",
                "not a finite number",
            ],
        ),
        (
            "treatment not 0/1",
            set_cell(&units, 3, "treatment", "2"),
            preds.clone(),
            vec!["units.csv", "row 3", "column \"treatment\"", "not 0 or 1"],
        ),
        (
            "propensity outside (0,1)",
            add_propensity(&units, 9, "1"),
            preds.clone(),
            vec![
                "units.csv",
                "row 9",
                "column \"propensity\"",
                "outside (0, 1)",
            ],
        ),
        (
            "unit only in predictions",
            units.clone(),
            format!("{preds}u999,0.1,0.2\n"),
            vec!["preds.csv", "row 41", "column \"unit_id\"", "u999"],
        ),
        (
            "unit only in units",
            format!("{units}u40,1,2.0,30,1\n"),
            preds.clone(),
            vec![
                "units.csv",
                "row 41",
                "column \"unit_id\"",
                "no predictions",
            ],
        ),
        (
            "duplicate unit id",
            units.replace("\nu4,", "\nu3,"),
            preds.clone(),
            vec![
                "units.csv",
                "row 5",
                "column \"unit_id\"",
                "already appeared in row 4",
            ],
        ),
        (
            "binary outcome kind with a non-binary value",
            units.clone(),
            preds.clone(),
            vec!["units.csv", "column \"outcome\"", "not 0 or 1"],
        ),
    ];
    for (label, u, p, expected) in cases {
        let up = d.write("units.csv", &u);
        let pp = d.write("preds.csv", &p);
        let extra: Vec<&str> = if label.starts_with("binary") {
            vec!["--outcome-kind", "binary"]
        } else {
            vec![]
        };
        let (code, stdout, stderr) = score(&up, &pp, &extra);
        assert_eq!(code, 2, "{label}: exit code; stderr: {stderr}");
        assert!(stdout.is_empty(), "{label}: printed a report");
        for e in expected {
            assert!(stderr.contains(e), "{label}: {e:?} not in {stderr:?}");
        }
    }
    // The valid pair still scores.
    d.write("units.csv", &units);
    d.write("preds.csv", &preds);
    let (code, _, stderr) = score(&good_u, &good_p, &["--folds", "2"]);
    assert_eq!(code, 0, "{stderr}");
}

/// Replaces one cell: data row `row` (1-based), column `column`.
fn set_cell(csv: &str, row: usize, column: &str, value: &str) -> String {
    let mut lines: Vec<String> = csv.lines().map(str::to_string).collect();
    let col = lines[0]
        .split(',')
        .position(|h| h == column)
        .expect("column");
    let mut cells: Vec<String> = lines[row].split(',').map(str::to_string).collect();
    cells[col] = value.to_string();
    lines[row] = cells.join(",");
    lines.join("\n") + "\n"
}

fn add_propensity(units: &str, bad_row: usize, bad: &str) -> String {
    units
        .lines()
        .enumerate()
        .map(|(i, line)| match i {
            0 => format!("{line},propensity"),
            r if r == bad_row => format!("{line},{bad}"),
            _ => format!("{line},0.5"),
        })
        .collect::<Vec<_>>()
        .join("\n")
        + "\n"
}

/// Too few units per arm for the folds is a named state, exit status 3.
#[test]
fn too_few_units_for_the_folds_is_a_named_state() {
    let d = Dir::new("few");
    let u = d.write("units.csv", &valid_units());
    let p = d.write("preds.csv", &valid_predictions());
    let (code, _, stderr) = score(&u, &p, &["--folds", "10"]);
    assert_eq!(code, 3, "{stderr}");
    assert!(stderr.contains("too few units per fold"), "{stderr}");
    assert!(stderr.contains("units.csv"), "{stderr}");
}

/// The acceptance run: 5,000 units, 10 models, JSON with every key.
#[test]
fn five_thousand_units_ten_models_json_carries_every_key() {
    let d = Dir::new("json");
    let status = bin()
        .args([
            "simulate", "--units", "5000", "--models", "10", "--seed", "4", "--out",
        ])
        .arg(&d.0)
        .status()
        .expect("simulate");
    assert!(status.success());
    let (code, stdout, stderr) = score(
        &d.0.join("units.csv"),
        &d.0.join("predictions.csv"),
        &["--format", "json", "--cost", "0.2"],
    );
    assert_eq!(code, 0, "{stderr}");
    let v: serde_json::Value = serde_json::from_str(&stdout).expect("json");
    for key in [
        "n_units",
        "ate",
        "front_runner",
        "best_set",
        "models",
        "overlap",
        "nuisance",
        "pairwise",
    ] {
        assert!(v.get(key).is_some(), "missing {key}");
    }
    assert_eq!(v["n_units"], 5000);
    for k in ["estimate", "se"] {
        assert!(v["ate"][k].is_f64(), "ate.{k}");
    }
    let models = v["models"].as_array().expect("models");
    assert_eq!(models.len(), 12, "10 models + 2 baselines");
    let names: Vec<&str> = models.iter().filter_map(|m| m["name"].as_str()).collect();
    assert!(names.contains(&"zero-effect") && names.contains(&"constant-effect"));
    for m in models {
        for key in [
            "name",
            "rank",
            "corrected_pehe",
            "vs_constant",
            "plugin_pehe",
            "dr_loss",
            "r_loss",
            "draw_share",
            "in_best_set",
            "policy_gain",
            "autoc",
            "blp_slope",
        ] {
            assert!(m.get(key).is_some(), "{}: missing {key}", m["name"]);
        }
        for k in ["estimate", "se", "ci_low", "ci_high"] {
            assert!(
                m["vs_constant"][k].is_f64(),
                "{}: vs_constant.{k}",
                m["name"]
            );
        }
        for obj in ["corrected_pehe", "policy_gain", "autoc"] {
            assert!(
                m[obj]["estimate"].is_f64() && m[obj]["se"].is_f64(),
                "{obj}"
            );
        }
        let baseline = m["baseline"].as_bool().unwrap_or(false);
        assert_eq!(
            m["blp_slope"].is_null(),
            baseline,
            "{}: blp_slope",
            m["name"]
        );
    }
    let draw_share: f64 = models
        .iter()
        .map(|m| m["draw_share"].as_f64().unwrap_or(0.0))
        .sum();
    assert!((draw_share - 1.0).abs() < 1e-9);
    // Every model, baselines included, has its lower bounds, and the RMSE
    // bound is the root of the PEHE floor less 1.645 standard errors.
    let levels = &v["levels"];
    for k in ["estimate", "se"] {
        assert!(
            levels["plugin_error_projection"][k].is_f64(),
            "projection.{k}"
        );
    }
    let bounds = levels["models"].as_array().expect("levels.models");
    assert_eq!(bounds.len(), 12);
    for l in bounds {
        let floor = l["pehe_floor"]["estimate"].as_f64().expect("floor");
        let se = l["pehe_floor"]["se"].as_f64().expect("se");
        let bound = l["rmse_lower_bound"].as_f64().expect("bound");
        let expected = (floor - 1.644854 * se).max(0.0).sqrt();
        assert!((bound - expected).abs() < 1e-5, "{}: {bound}", l["name"]);
    }
    // The pipeline is deterministic for a seed.
    let (_, again, _) = score(
        &d.0.join("units.csv"),
        &d.0.join("predictions.csv"),
        &["--format", "json", "--cost", "0.2"],
    );
    assert_eq!(stdout, again);
    // And the table leads with the differences to constant-effect.
    let (code, table, _) = score(&d.0.join("units.csv"), &d.0.join("predictions.csv"), &[]);
    assert_eq!(code, 0);
    assert!(table.contains("Error against constant-effect"));
    assert!(table.contains("lower estimate"));
    assert!(table.contains("RMSE at least"));
    // The default report fits 100 columns (it once ran to 234); the wide
    // view carries every estimator's column and each model's interval
    // taken alone.
    let widest = |t: &str| t.lines().map(|l| l.chars().count()).max().unwrap_or(0);
    assert!(
        widest(&table) <= 100,
        "{} columns:\n{table}",
        widest(&table)
    );
    assert!(table.contains("95% joint interval") && !table.contains("R-loss"));
    let (code, wide, _) = score(
        &d.0.join("units.csv"),
        &d.0.join("predictions.csv"),
        &["--wide"],
    );
    assert_eq!(code, 0);
    assert!(
        wide.contains("95% alone") && wide.contains("R-loss"),
        "{wide}"
    );
}

/// The quick-start demo finishes by itself and its summary shows both a
/// front-runner change and an overlap alert.
#[test]
fn demo_summary_shows_a_front_runner_change_and_an_overlap_alert() {
    let out = bin().arg("demo").output().expect("demo");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8_lossy(&out.stdout);
    let summary = text.split("\nsummary").nth(1).expect("a summary");
    assert!(
        summary.contains("front-runner changed from credit-gbm-v3 to commuter-rules"),
        "{summary}"
    );
    assert!(summary.contains("overlap degraded"), "{summary}");
    assert!(summary.contains("overlap recovered"), "{summary}");
    assert!(summary.contains("/metrics"), "{summary}");
    // The cumulative board's blend, in one wrapped sentence.
    assert!(summary.contains("\n  blend: "), "{summary}");
    assert!(summary.contains("blend minus"), "{summary}");
    // (The summary, not the opening lines, which name a temporary path.)
    for line in summary.lines() {
        assert!(line.chars().count() <= 100, "{line}");
    }
}

/// `--fold-repeats`: the JSON report and the table say how many fold
/// splits the nuisance values were averaged over, the values differ from
/// one split's, and a count outside 1..=20 is refused before any fit.
#[test]
fn fold_repeats_are_reported_and_checked() {
    let d = Dir::new("repeats");
    let status = bin()
        .args([
            "simulate", "--units", "2000", "--models", "3", "--seed", "5", "--out",
        ])
        .arg(&d.0)
        .status()
        .expect("simulate");
    assert!(status.success());
    let (u, p) = (d.0.join("units.csv"), d.0.join("predictions.csv"));
    let json = |repeats: &str| -> serde_json::Value {
        let (code, stdout, stderr) =
            score(&u, &p, &["--format", "json", "--fold-repeats", repeats]);
        assert_eq!(code, 0, "{stderr}");
        serde_json::from_str(&stdout).expect("json")
    };
    let (one, three) = (json("1"), json("3"));
    assert_eq!(one["nuisance"]["fold_repeats"], 1);
    assert_eq!(three["nuisance"]["fold_repeats"], 3);
    // The report's losses are the first split's, the same as one split's.
    assert_eq!(
        one["nuisance"]["outcome_control"]["oof_loss"],
        three["nuisance"]["outcome_control"]["oof_loss"]
    );
    // The averaged values move the estimates.
    assert_ne!(one["ate"]["estimate"], three["ate"]["estimate"]);
    // By default the propensity's last stage is chosen by loss among
    // three; --recalibrate-propensity fixes Platt's. The report says
    // which, and its calibration error is of the values used.
    let chosen = &one["nuisance"]["propensity"]["recalibration"];
    assert_eq!(chosen["how"], "chosen by loss", "{chosen}");
    assert_eq!(chosen["candidates"].as_array().map(Vec::len), Some(3));
    let (code, stdout, stderr) = score(&u, &p, &["--format", "json", "--recalibrate-propensity"]);
    assert_eq!(code, 0, "{stderr}");
    let platt: serde_json::Value = serde_json::from_str(&stdout).expect("json");
    let fixed = &platt["nuisance"]["propensity"]["recalibration"];
    assert_eq!(fixed["chosen"], "platt", "{fixed}");
    assert_eq!(fixed["how"], "fixed", "{fixed}");
    assert!(platt["nuisance"]["propensity"]["calibration_error"].is_f64());
    let (code, table, stderr) = score(&u, &p, &["--fold-repeats", "2"]);
    assert_eq!(code, 0, "{stderr}");
    assert!(table.contains("averaged over 2 fold splits"), "{table}");
    for bad in ["0", "21"] {
        let (code, _, stderr) = score(&u, &p, &["--fold-repeats", bad]);
        assert_eq!(code, 2, "--fold-repeats {bad}: {stderr}");
        assert!(stderr.contains("--fold-repeats"), "{stderr}");
    }
}
