//! One table of a board's models, the same in `score`, `scoreboard` and the
//! demo: the same columns, labels and number format wherever a person reads
//! a ranking.
//!
//! The default view is narrow (under 100 columns for names up to 28
//! characters) and shows one interval per model: the joint one, which holds
//! for every row at once. The sentence under the table that says whether any
//! model beats constant-effect is read off those same intervals, so the
//! table and the sentence cannot disagree. The wide view adds each model's
//! standard error, its interval taken alone and the one-sided lower bound
//! on its RMSE.

use std::fmt::Write;

use crate::api::pb;
use crate::estimate::blend::SHOWN_WEIGHT;
use crate::estimate::scoreboard::ModelScore;
use crate::estimate::CONSTANT_EFFECT;

/// One model's row.
#[derive(Debug, Clone, PartialEq)]
pub struct Row {
    pub rank: u32,
    pub name: String,
    pub baseline: bool,
    /// Corrected PEHE minus constant-effect's.
    pub estimate: f64,
    pub se: f64,
    /// 95% interval of this difference taken alone.
    pub alone: (f64, f64),
    /// 95% interval holding for every row at once (max-t); absent on boards
    /// from servers that predate it.
    pub joint: Option<(f64, f64)>,
    /// Chance of the lowest true error, pooled; absent on older boards.
    pub chance: Option<f64>,
    pub in_best_set: bool,
    pub front_runner: bool,
    /// One-sided 95% lower bound on the model's RMSE (the wide view's "RMSE
    /// at least"); absent on boards without it.
    pub rmse_at_least: Option<f64>,
    /// Policy gain minus the front-runner's and its joint interval (the
    /// wide view's "policy vs front-runner"); absent on the front-runner's
    /// row and on boards without it.
    pub policy_vs_front_runner: Option<(f64, (f64, f64))>,
}

impl Row {
    pub fn from_offline(m: &ModelScore, front_runner: &str) -> Self {
        let v = &m.vs_constant;
        Row {
            rank: m.rank as u32,
            name: m.name.clone(),
            baseline: m.baseline,
            estimate: v.estimate,
            se: v.se,
            alone: (v.ci_low, v.ci_high),
            joint: Some((v.joint_low, v.joint_high)),
            chance: Some(m.chance_lowest),
            in_best_set: m.in_best_set,
            front_runner: m.name == front_runner,
            rmse_at_least: None,
            policy_vs_front_runner: m
                .policy_vs_front_runner
                .as_ref()
                .map(|d| (d.estimate, (d.joint_low, d.joint_high))),
        }
    }

    pub fn from_wire(m: &pb::ModelScore, front_runner: &str) -> Self {
        let v = m.vs_constant.unwrap_or_default();
        Row {
            rank: m.rank,
            name: m.name.clone(),
            baseline: m.baseline,
            estimate: v.estimate,
            se: v.se,
            alone: (v.ci_low, v.ci_high),
            joint: v.joint_low.zip(v.joint_high),
            chance: m.chance_lowest,
            in_best_set: m.in_best_set,
            front_runner: m.name == front_runner,
            rmse_at_least: m.rmse_lower_bound,
            policy_vs_front_runner: m.policy_vs_front_runner.map(|d| {
                let joint = d.joint_low.zip(d.joint_high);
                (d.estimate, joint.unwrap_or((d.ci_low, d.ci_high)))
            }),
        }
    }

    /// The interval the default view shows and the verdict reads.
    fn shown(&self) -> (f64, f64) {
        self.joint.unwrap_or(self.alone)
    }

    fn note(&self) -> &'static str {
        if self.front_runner {
            "front-runner"
        } else if self.name == CONSTANT_EFFECT {
            "reference"
        } else if self.in_best_set {
            "best set"
        } else {
            ""
        }
    }

    /// Below, above or across zero, by the interval shown.
    fn verdict(&self) -> &'static str {
        let (low, high) = self.shown();
        if self.name == CONSTANT_EFFECT {
            "reference"
        } else if high < 0.0 {
            "lower error"
        } else if low > 0.0 {
            "higher error"
        } else {
            "not distinguishable"
        }
    }
}

/// Numbers as every table prints them: four decimals, or three significant
/// digits in scientific form when very small or very large.
pub fn num(v: f64) -> String {
    // Rounding residue of an exact zero (e.g. the AUTOC of a constant model).
    let v = if v.abs() < 1e-12 { 0.0 } else { v };
    let a = v.abs();
    if a != 0.0 && !(1e-3..1e6).contains(&a) {
        format!("{v:.3e}")
    } else if a >= 1000.0 {
        format!("{v:.1}")
    } else {
        format!("{v:.4}")
    }
}

/// A signed number in the same format, for differences.
pub fn signed(v: f64) -> String {
    let s = num(v);
    if s.starts_with('-') {
        s
    } else {
        format!("+{s}")
    }
}

fn interval((low, high): (f64, f64)) -> String {
    format!("[{}, {}]", signed(low), signed(high))
}

/// A model's chance of the lowest error, or "-" on a board from a server
/// that predates it.
pub fn chance(c: Option<f64>) -> String {
    c.map_or_else(|| "-".to_string(), |c| format!("{c:.3}"))
}

/// The wide view's column of policy gains against the front-runner's.
const POLICY_LABEL: &str = "policy vs front-runner (joint 95%)";

/// Longest name given its own column; longer names push their row wider.
const NAME_WIDTH: usize = 28;

/// The table, each line starting with `indent`.
pub fn render(rows: &[Row], wide: bool, indent: &str) -> String {
    let name_w = rows
        .iter()
        .map(|r| r.name.chars().count())
        .max()
        .unwrap_or(5)
        .clamp(5, NAME_WIDTH);
    let joint = rows.iter().any(|r| r.joint.is_some());
    let shown_label = if joint {
        "95% joint interval"
    } else {
        "95% interval"
    };
    let cells: Vec<(String, String)> = rows
        .iter()
        .map(|r| (signed(r.estimate), interval(r.shown())))
        .collect();
    let est_w = cells
        .iter()
        .map(|c| c.0.len())
        .max()
        .unwrap_or(0)
        .max("vs constant".len());
    let int_w = cells
        .iter()
        .map(|c| c.1.len())
        .max()
        .unwrap_or(0)
        .max(shown_label.len());
    let mut s = String::new();
    let _ = write!(
        s,
        "{indent}{:>4}  {:<name_w$}  {:>est_w$}  {:<int_w$}  {:>6}",
        "rank", "model", "vs constant", shown_label, "chance"
    );
    let alone: Vec<String> = rows.iter().map(|r| interval(r.alone)).collect();
    let alone_w = alone
        .iter()
        .map(String::len)
        .max()
        .unwrap_or(0)
        .max("95% alone".len());
    let policy: Vec<String> = rows
        .iter()
        .map(|r| {
            r.policy_vs_front_runner.map_or_else(
                || "-".to_string(),
                |(e, i)| format!("{} {}", signed(e), interval(i)),
            )
        })
        .collect();
    let policy_w = policy
        .iter()
        .map(String::len)
        .max()
        .unwrap_or(0)
        .max(POLICY_LABEL.len());
    if wide {
        let _ = write!(
            s,
            "  {:>8}  {:<alone_w$}  {:<19}  {:>13}  {:<policy_w$}",
            "se", "95% alone", "verdict", "RMSE at least", POLICY_LABEL
        );
    }
    let _ = writeln!(s, "  note");
    for (((r, (est, shown)), alone), policy) in rows.iter().zip(&cells).zip(&alone).zip(&policy) {
        let mut line = format!(
            "{indent}{:>4}  {:<name_w$}  {est:>est_w$}  {shown:<int_w$}  {:>6}",
            r.rank,
            r.name,
            chance(r.chance)
        );
        if wide {
            let _ = write!(
                line,
                "  {:>8}  {alone:<alone_w$}  {:<19}  {:>13}  {policy:<policy_w$}",
                num(r.se),
                r.verdict(),
                r.rmse_at_least.map_or_else(|| "-".to_string(), num)
            );
        }
        let _ = writeln!(s, "{}", format!("{line}  {}", r.note()).trim_end());
    }
    s
}

/// What the intervals say about heterogeneity, in one sentence read off the
/// intervals the default view shows; None without a registered model.
pub fn verdict_line(rows: &[Row]) -> Option<String> {
    let candidates: Vec<&Row> = rows.iter().filter(|r| !r.baseline).collect();
    if candidates.is_empty() {
        return None;
    }
    let joint = rows.iter().any(|r| r.joint.is_some());
    let beat: Vec<&str> = candidates
        .iter()
        .filter(|r| r.shown().1 < 0.0)
        .map(|r| r.name.as_str())
        .collect();
    let accounted = if joint {
        format!("all {} holding at once", rows.len())
    } else {
        "each interval taken alone (the server gave no joint intervals)".to_string()
    };
    Some(if beat.is_empty() {
        format!("no model beats constant-effect: every model's interval reaches 0, {accounted}")
    } else {
        format!(
            "{} of {} models beat constant-effect (interval below 0, {accounted}): {}",
            beat.len(),
            candidates.len(),
            beat.join(", ")
        )
    })
}

/// The blend in one line under the table: the models with a nonzero
/// weight (largest first, those above 0.01 by name and the rest counted,
/// as `plumbline score` shows them), its corrected PEHE (a lower estimate
/// of its error, which can fall below zero) and its difference
/// from the best single model with the interval.
pub fn blend_line(b: &pb::Blend) -> String {
    let shown: Vec<String> = b
        .weights
        .iter()
        .filter(|w| w.weight > SHOWN_WEIGHT)
        .map(|w| format!("{} {:.3}", w.model, w.weight))
        .collect();
    let rest = b.weights.len() - shown.len();
    let rest = if rest > 0 {
        format!(", {rest} more at {SHOWN_WEIGHT} or below")
    } else {
        String::new()
    };
    let d = b.vs_best.unwrap_or_default();
    format!(
        "blend: {} ({} offered{rest}); corrected PEHE {} (a lower estimate); blend minus {} {}, \
         95% interval {}",
        shown.join(", "),
        b.models_offered,
        num(b.corrected_pehe),
        b.best_model,
        signed(d.estimate),
        interval((d.ci_low, d.ci_high))
    )
}

/// The legend under a table: what the columns mean, one line each, every
/// line starting with `indent`.
pub fn legend(rows: &[Row], joint_critical: Option<f64>, indent: &str) -> String {
    let joint = match joint_critical {
        Some(c) if rows.iter().any(|r| r.joint.is_some()) => format!(
            "joint interval: holds for all {} rows at once (estimate +- {} se, max-t)",
            rows.len(),
            num(c)
        ),
        _ => "interval: each row taken alone".to_string(),
    };
    format!(
        "{indent}vs constant: corrected PEHE minus constant-effect's (below 0 = lower error)\n\
         {indent}{joint}\n\
         {indent}chance: of the lowest true error, pooled over the models\n"
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(rank: u32, name: &str, estimate: f64, alone: (f64, f64), joint: (f64, f64)) -> Row {
        Row {
            rank,
            name: name.into(),
            baseline: name.ends_with("-effect"),
            estimate,
            se: 0.1,
            alone,
            joint: Some(joint),
            chance: Some(0.5),
            in_best_set: rank == 1,
            front_runner: rank == 1,
            rmse_at_least: Some(0.25),
            policy_vs_front_runner: (rank > 1).then_some((-0.05, (-0.12, 0.02))),
        }
    }

    /// The case the demo once showed: a model's interval taken alone lies
    /// below 0 while, all comparisons accounted for, none beats
    /// constant-effect. The table shows the joint interval and the sentence
    /// reads the same interval.
    fn disagreeing() -> Vec<Row> {
        vec![
            row(1, "credit-gbm-v3", -0.30, (-0.55, -0.05), (-0.62, 0.02)),
            row(2, "constant-effect", 0.0, (0.0, 0.0), (0.0, 0.0)),
            row(3, "zero-effect", 4.8, (3.9, 5.7), (3.6, 6.0)),
        ]
    }

    #[test]
    fn the_sentence_and_the_table_read_one_interval() {
        let rows = disagreeing();
        let table = render(&rows, false, "");
        assert!(table.contains("95% joint interval"), "{table}");
        assert!(table.contains("[-0.6200, +0.0200]"), "{table}");
        assert!(
            !table.contains("-0.0500"),
            "the interval alone is wide-only: {table}"
        );
        let line = verdict_line(&rows).expect("a candidate");
        assert!(line.starts_with("no model beats constant-effect"), "{line}");
        // The wide view shows both and names which is which.
        let wide = render(&rows, true, "");
        assert!(
            wide.contains("95% alone") && wide.contains("[-0.5500, -0.0500]"),
            "{wide}"
        );
        assert!(wide.contains("not distinguishable"), "{wide}");
        assert!(
            wide.contains("RMSE at least") && wide.contains("0.2500"),
            "{wide}"
        );
        // The policy comparisons with the front-runner: on every row but
        // its own, which says "-".
        assert!(
            wide.contains("policy vs front-runner")
                && wide.matches("-0.0500 [-0.1200, +0.0200]").count() == 2,
            "{wide}"
        );
    }

    #[test]
    fn a_model_below_zero_jointly_is_named() {
        let mut rows = disagreeing();
        rows[0].joint = Some((-0.7, -0.1));
        let line = verdict_line(&rows).expect("a candidate");
        assert_eq!(
            line,
            "1 of 1 models beat constant-effect (interval below 0, all 3 holding at once): \
             credit-gbm-v3"
        );
    }

    #[test]
    fn the_blend_reads_in_one_line() {
        let blend = pb::Blend {
            weights: vec![
                pb::BlendWeight {
                    model: "gbm".into(),
                    weight: 0.605,
                },
                pb::BlendWeight {
                    model: "linear".into(),
                    weight: 0.39,
                },
                pb::BlendWeight {
                    model: "old".into(),
                    weight: 0.005,
                },
            ],
            corrected_pehe: 0.1234,
            best_model: "gbm".into(),
            vs_best: Some(pb::Difference {
                estimate: -0.02,
                ci_low: -0.035,
                ci_high: -0.005,
                ..Default::default()
            }),
            vs_constant: None,
            models_offered: 4,
        };
        assert_eq!(
            blend_line(&blend),
            "blend: gbm 0.605, linear 0.390 (4 offered, 1 more at 0.01 or below); corrected \
             PEHE 0.1234 (a lower estimate); blend minus gbm -0.0200, 95% interval [-0.0350, \
             -0.0050]"
        );
    }

    #[test]
    fn baselines_alone_get_no_sentence() {
        let rows: Vec<Row> = disagreeing().into_iter().skip(1).collect();
        assert_eq!(verdict_line(&rows), None);
    }

    /// Names up to the name column's width keep the default view under 100
    /// columns, with the widest numbers a board shows.
    #[test]
    fn the_default_view_is_narrow() {
        let name = "x".repeat(NAME_WIDTH);
        let rows = vec![
            Row {
                rank: 1000,
                name: name.clone(),
                baseline: false,
                estimate: -123.4567,
                se: 12.0,
                alone: (-150.1234, -96.5432),
                joint: Some((-199.9999, -47.7777)),
                chance: Some(0.001),
                in_best_set: true,
                front_runner: true,
                rmse_at_least: None,
                policy_vs_front_runner: None,
            },
            row(2, "constant-effect", 0.0, (0.0, 0.0), (0.0, 0.0)),
            row(3, "tiny", 1.5e-5, (-2.5e-5, 5.5e-5), (-3.5e-5, 6.5e-5)),
        ];
        let table = render(&rows, false, "    ");
        let widest = table.lines().map(|l| l.chars().count()).max().unwrap_or(0);
        println!("{table}widest line: {widest}");
        assert!(widest <= 100, "{widest} columns:\n{table}");
        assert!(table.contains("front-runner") && table.contains("reference"));
    }
}
