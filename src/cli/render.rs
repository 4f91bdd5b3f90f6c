//! The person-readable scoreboard: differences to constant-effect first,
//! then the best set, the per-model scores, the blend, overlap, nuisance
//! fits and the caveat.

use std::fmt::Write;

use crate::estimate::blend::{BlendReport, SHOWN_WEIGHT};
use crate::estimate::crossfit::ComponentReport;
use crate::estimate::estimators;
use crate::estimate::level::LevelReport;
use crate::estimate::overlap::{OverlapReport, CRUMP_LOW, SMD_FLAG};
use crate::estimate::scoreboard::Scoreboard;
use crate::estimate::stats::Estimate;

use super::board_table::{self, num, Row};
use crate::estimate::OutcomeKind;

fn pct(v: f64) -> String {
    format!("{:.1}%", 100.0 * v)
}

/// Renders the scoreboard as text.
/// `wide` adds each model's standard error, its interval taken alone and
/// every estimator's column; the default stays under 100 columns.
pub fn table(b: &Scoreboard, kind: OutcomeKind, folds: usize, wide: bool) -> String {
    let mut s = String::new();
    let kind = match kind {
        OutcomeKind::Continuous => "continuous",
        OutcomeKind::Binary => "binary",
    };
    let _ = writeln!(
        s,
        "{} units ({} treated, {} control), {kind} outcome, {folds}-fold cross-fit",
        b.n_units, b.n_treated, b.n_control
    );
    let _ = writeln!(
        s,
        "ATE (AIPW)  {}  se {}  95% CI [{}, {}]",
        num(b.ate.estimate),
        num(b.ate.se),
        num(b.ate.ci_low),
        num(b.ate.ci_high)
    );
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "Error against constant-effect: corrected PEHE of the model minus that of constant-effect \
         (below 0 = lower error)"
    );
    let rows: Vec<Row> = b
        .models
        .iter()
        .map(|m| Row::from_offline(m, &b.front_runner))
        .collect();
    s.push_str(&board_table::render(&rows, wide, "  "));
    s.push_str(&board_table::legend(
        &rows,
        Some(b.joint_critical_value),
        "  ",
    ));
    if let Some(line) = board_table::verdict_line(&rows) {
        let _ = writeln!(s, "  {line}");
    }
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "Front-runner: {}. Best set at alpha {} (Holm-corrected): {}.",
        b.front_runner,
        b.alpha,
        b.best_set.join(", ")
    );
    let _ = writeln!(
        s,
        "{} against constant-effect, allowing for its being the lowest of {} on these units: \
         {} [{}, {}].",
        b.front_runner,
        b.models.len(),
        num(b.front_runner_vs_constant.estimate),
        num(b.front_runner_vs_constant.ci_low),
        num(b.front_runner_vs_constant.ci_high)
    );
    let _ = writeln!(s);
    let _ = writeln!(s, "Per-model scores (mean, se in parentheses)");
    let with_se = |e: &Estimate| format!("{} ({})", num(e.estimate), num(e.se));
    // The ranking estimator first, with its standard error; the wide view
    // adds every other estimator, the share treated and the BLP slope.
    let mut header = vec!["model".to_string()];
    for (i, e) in estimators::ALL.iter().enumerate() {
        if i == estimators::RANKED_BY {
            header.push(format!("{} (lower)", e.label()));
        } else if wide {
            header.push(e.label().to_string());
        }
    }
    header.extend(["policy gain".to_string(), "AUTOC".to_string()]);
    if wide {
        header.extend(["treats".to_string(), "BLP slope".to_string()]);
    }
    let lines: Vec<Vec<String>> = b
        .models
        .iter()
        .map(|m| {
            let mut line = vec![m.name.clone()];
            for (i, (_, e)) in m.scores.iter().enumerate() {
                if i == estimators::RANKED_BY {
                    line.push(with_se(&e));
                } else if wide {
                    line.push(num(e.estimate));
                }
            }
            line.push(with_se(&Estimate::new(
                m.policy_gain.estimate,
                m.policy_gain.se,
            )));
            line.push(with_se(&m.autoc));
            if wide {
                line.push(pct(m.policy_gain.treated_share));
                line.push(
                    m.blp_slope
                        .as_ref()
                        .map_or_else(|| "no variation".into(), with_se),
                );
            }
            line
        })
        .collect();
    s.push_str(&grid("  ", &header, &lines));
    let _ = writeln!(
        s,
        "  policy gain: per unit over treating nobody, at cost {}",
        b.cost
    );
    if let Some(levels) = &b.levels {
        let _ = writeln!(s);
        rmse_at_least(&mut s, b, levels);
    }
    let _ = writeln!(s);
    if let Some(report) = &b.blend {
        blend(&mut s, report);
        let _ = writeln!(s);
    }
    overlap(&mut s, &b.overlap);
    if let Some(n) = &b.nuisance {
        let _ = writeln!(s);
        let sample = sample_note(n.fitted_units, n.units);
        let repeats = repeats_note(n.fold_repeats);
        let _ = writeln!(
            s,
            "Nuisance models ({}-fold cross-fit, seed {}{sample}{repeats})",
            n.folds, n.seed
        );
        match &n.propensity.fit {
            Some(c) => {
                component(&mut s, "propensity", c);
                if let Some(r) = &n.propensity.recalibration {
                    let losses: Vec<String> = r
                        .candidates
                        .iter()
                        .map(|k| format!("{} {}", k.stage.name(), num(k.oof_loss)))
                        .collect();
                    let _ = writeln!(
                        s,
                        "  {:<18}  last stage {} ({}; out-of-fold log loss {})",
                        "",
                        r.chosen.name(),
                        r.how,
                        losses.join(", ")
                    );
                }
            }
            None => {
                let _ = writeln!(s, "  {:<18}  logged (not fitted)", "propensity");
            }
        }
        let _ = writeln!(
            s,
            "  {:<18}  calibration error {} over {} bins (noise level {})",
            "",
            num(n.propensity.calibration_error),
            crate::estimate::crossfit::CALIBRATION_BINS,
            num(n.propensity.calibration_noise)
        );
        let _ = writeln!(
            s,
            "  {:<18}  AUC {:.3}; clipped {} units to [{}, {}]",
            "",
            n.propensity.auc,
            n.propensity.clipped,
            n.propensity.clip,
            1.0 - n.propensity.clip
        );
        component(&mut s, "outcome, control", &n.outcome_control);
        component(&mut s, "outcome, treated", &n.outcome_treated);
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "Note: {}", b.caveat);
    if wide {
        s
    } else {
        wrap_prose(&s, PROSE_WIDTH)
    }
}

/// Each registered model's lower bound on its RMSE, in rank order.
fn rmse_at_least(s: &mut String, b: &Scoreboard, levels: &LevelReport) {
    let name_w = b
        .models
        .iter()
        .map(|m| m.name.len())
        .max()
        .unwrap_or(5)
        .max(5);
    let _ = writeln!(
        s,
        "RMSE at least ({:.0}% one-sided lower bound)",
        100.0 * levels.level
    );
    let _ = writeln!(
        s,
        "  {:<name_w$}  {:>13}  {:>22}",
        "model", "RMSE at least", "PEHE floor (se)"
    );
    for m in b.models.iter().filter(|m| !m.baseline) {
        if let Some(l) = levels.models.iter().find(|l| l.name == m.name) {
            let _ = writeln!(
                s,
                "  {:<name_w$}  {:>13}  {:>22}",
                m.name,
                num(l.rmse_lower_bound),
                format!("{} ({})", num(l.pehe_floor.estimate), num(l.pehe_floor.se))
            );
        }
    }
    let p = &levels.plugin_error_projection;
    let _ = writeln!(
        s,
        "  PEHE floor: corrected PEHE plus the part of the plug-in effect model's own error \
         that a sieve (constant, tau_tilde, the first {} features) sees, {} (se {})",
        levels.sieve_features,
        num(p.estimate),
        num(p.se)
    );
    let _ = writeln!(
        s,
        "  Each bound is a one-sided {:.0}% lower bound on the model's root mean squared error \
         under any nuisance quality, up to the product-of-errors term; it is not an estimate \
         of the error, and a bound of 0 says nothing.",
        100.0 * levels.level
    );
}

fn component(s: &mut String, label: &str, c: &ComponentReport) {
    let others: Vec<String> = c
        .candidates
        .iter()
        .map(|k| match k.screened_out_z {
            Some(z) => format!(
                "{} {} on fold 1 only ({:.1} se behind; dropped)",
                k.learner,
                num(k.oof_loss),
                z
            ),
            None => format!("{} {}", k.learner, num(k.oof_loss)),
        })
        .collect();
    let _ = writeln!(
        s,
        "  {label:<18}  {:<9} out-of-fold {} {}  (candidates: {})",
        c.learner,
        c.loss.replace('_', " "),
        num(c.oof_loss),
        others.join(", ")
    );
}

fn blend(s: &mut String, b: &BlendReport) {
    let _ = writeln!(
        s,
        "Blend: convex weights on the registered models that minimise corrected PEHE\n  \
         (each fold's units scored with weights fitted on the other folds)"
    );
    let mut shown: Vec<_> = b
        .weights
        .iter()
        .filter(|w| w.weight > SHOWN_WEIGHT)
        .collect();
    shown.sort_by(|x, y| y.weight.total_cmp(&x.weight));
    let name_w = shown.iter().map(|w| w.model.len()).max().unwrap_or(5);
    for w in &shown {
        let _ = writeln!(
            s,
            "  {:<name_w$}  weight {:.3}  (without one fold: {:.3} to {:.3})",
            w.model, w.weight, w.fold_min, w.fold_max
        );
    }
    let rest = b.weights.len() - shown.len();
    if rest > 0 {
        let _ = writeln!(
            s,
            "  ({rest} other models at weight {SHOWN_WEIGHT} or below)"
        );
    }
    for (label, d) in [
        (format!("best single model ({})", b.best_model), &b.vs_best),
        ("constant-effect".to_string(), &b.vs_constant),
    ] {
        let _ = writeln!(
            s,
            "  blend minus {label}: {}  95% CI [{}, {}]",
            num(d.estimate),
            num(d.ci_low),
            num(d.ci_high)
        );
    }
    let best = &b.best_model;
    let meaning = if b.vs_best.ci_high < 0.0 {
        format!("The blend has lower error than {best} alone")
    } else if b.vs_best.ci_low > 0.0 {
        format!("The blend has higher error than {best} alone (deploy that model)")
    } else {
        format!(
            "The blend is not distinguishable from {best} alone (blending adds nothing \
             measurable here)"
        )
    };
    let _ = writeln!(
        s,
        "  {meaning}, measured on units its weights never saw; {best} was picked as best on the \
         same data, which favours it."
    );
    if !b.converged {
        let _ = writeln!(
            s,
            "  (a weight fit stopped at its iteration cap: the weights may not be the exact minimum)"
        );
    }
}

fn overlap(s: &mut String, o: &OverlapReport) {
    let _ = writeln!(s, "Overlap");
    let _ = writeln!(
        s,
        "  propensity outside [{}, {}]: {} of units; outside [{CRUMP_LOW}, {}] (Crump et al. rule of thumb): {}",
        o.eps,
        1.0 - o.eps,
        pct(o.share_outside_eps),
        1.0 - CRUMP_LOW,
        pct(o.share_outside_crump)
    );
    for (label, arm) in [("treated", &o.treated), ("control", &o.control)] {
        let q = |p: f64| {
            arm.quantiles
                .iter()
                .find(|(k, _)| *k == p)
                .map(|(_, v)| format!("{v:.3}"))
                .unwrap_or_default()
        };
        let _ = writeln!(
            s,
            "  {label:<8} propensity min {} / median {} / max {}; effective sample size {:.0} of {} ({}); largest weight {} of the arm's total",
            q(0.0),
            q(0.5),
            q(1.0),
            arm.effective_sample_size,
            arm.units,
            pct(arm.effective_share),
            pct(arm.max_normalized_weight)
        );
    }
    let flagged: Vec<String> = o
        .balance
        .iter()
        .filter(|f| f.flagged)
        .map(|f| format!("{} ({:.2})", f.feature, f.smd_weighted))
        .collect();
    let _ = writeln!(
        s,
        "  features with weighted |SMD| > {SMD_FLAG} (Austin rule of thumb): {}",
        if flagged.is_empty() {
            "none".to_string()
        } else {
            flagged.join(", ")
        }
    );
}

/// A table whose first column is left-aligned and the others right-aligned,
/// each as wide as its widest cell.
pub(super) fn grid(indent: &str, header: &[String], lines: &[Vec<String>]) -> String {
    let widths: Vec<usize> = (0..header.len())
        .map(|j| {
            lines
                .iter()
                .filter_map(|l| l.get(j))
                .chain(std::iter::once(&header[j]))
                .map(|c| c.chars().count())
                .max()
                .unwrap_or(0)
        })
        .collect();
    let mut out = String::new();
    for line in std::iter::once(header).chain(lines.iter().map(Vec::as_slice)) {
        let mut text = indent.to_string();
        for (j, (cell, w)) in line.iter().zip(&widths).enumerate() {
            if j == 0 {
                let _ = write!(text, "{cell:<w$}");
            } else {
                let _ = write!(text, "  {cell:>w$}");
            }
        }
        let _ = writeln!(out, "{}", text.trim_end());
    }
    out
}

/// Width that prose lines of the report are wrapped to.
pub(crate) const PROSE_WIDTH: usize = 100;

/// Wraps each line longer than `width` at spaces. A line's last cell (what
/// follows its last run of two spaces, or the whole text after the indent)
/// continues on the next lines under where that cell began, so a labelled
/// line such as "  treated  propensity min ..." keeps its label column.
/// The wide view is not wrapped: its rows are meant to be long.
pub(crate) fn wrap_prose(text: &str, width: usize) -> String {
    let mut out = String::with_capacity(text.len() + text.len() / 50);
    for line in text.lines() {
        if line.chars().count() <= width || !line.is_ascii() {
            out.push_str(line);
            out.push('\n');
            continue;
        }
        let body = line.trim_start();
        let indent = line.len() - body.len();
        let cell = |i: usize| indent + i + body[i..].len() - body[i..].trim_start().len();
        // Under the last cell, unless that leaves too little room; then under
        // the second.
        let start = match body.rfind("  ").map(cell) {
            Some(c) if c <= width / 2 => c,
            _ => body
                .find("  ")
                .map(cell)
                .filter(|&c| c <= width / 2)
                .unwrap_or(indent),
        };
        for (i, piece) in super::client::wrap(&line[start..], width - start)
            .iter()
            .enumerate()
        {
            let lead = if i == 0 { &line[..start] } else { "" };
            let _ = writeln!(out, "{lead:<start$}{piece}");
        }
    }
    out
}

/// What a capped fit adds to its nuisance line: its models saw a sample,
/// every unit was scored. Empty for a fit on every unit.
/// Repeated splits say so, and that the learners and losses shown are the
/// first split's; nothing for one split.
pub(super) fn repeats_note(fold_repeats: usize) -> String {
    if fold_repeats > 1 {
        format!("; values averaged over {fold_repeats} fold splits, losses of the first")
    } else {
        String::new()
    }
}

pub(super) fn sample_note(fitted_units: usize, units: usize) -> String {
    if fitted_units < units {
        format!("; fitted on a sample of {fitted_units} of {units} units")
    } else {
        String::new()
    }
}

#[cfg(test)]
mod tests {
    use super::wrap_prose;

    #[test]
    fn prose_wraps_and_tables_stay_whole() {
        let prose = format!("  {}", "word ".repeat(40).trim_end());
        let row = format!("  a  {}", "1234567890 ".repeat(12));
        let text = wrap_prose(&format!("{prose}\n{row}\nshort\n"), 60);
        let lines: Vec<&str> = text.lines().collect();
        assert!(lines.len() > 4, "{text}");
        for l in &lines {
            assert!(l.chars().count() <= 60, "{l:?}");
        }
        assert!(lines.iter().all(|l| l.starts_with("  ")) || lines.last() == Some(&"short"));
        // The labelled row continues under its last cell.
        let labelled = wrap_prose(&format!("  label  {}", "word ".repeat(20)), 40);
        for l in labelled.lines().skip(1) {
            assert!(l.starts_with("         word"), "{l:?}");
        }
        assert_eq!(lines[lines.len() - 1], "short");
        assert_eq!(text.split_whitespace().filter(|w| *w == "word").count(), 40);
    }
}
