//! The person-readable scoreboard: differences to constant-effect first,
//! then the best set, the per-model scores, the blend, overlap, nuisance
//! fits and the caveat.

use std::fmt::Write;

use crate::estimate::blend::{BlendReport, SHOWN_WEIGHT};
use crate::estimate::crossfit::ComponentReport;
use crate::estimate::estimators;
use crate::estimate::level::LevelReport;
use crate::estimate::overlap::{OverlapReport, CRUMP_LOW, SMD_FLAG};
use crate::estimate::scoreboard::{ModelScore, Scoreboard};
use crate::estimate::OutcomeKind;

fn num(v: f64) -> String {
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

fn verdict(m: &ModelScore) -> &'static str {
    if m.name == crate::estimate::CONSTANT_EFFECT {
        "reference"
    } else if m.vs_constant.ci_high < 0.0 {
        "lower error"
    } else if m.vs_constant.ci_low > 0.0 {
        "higher error"
    } else {
        "not distinguishable"
    }
}

/// A model's chance of the lowest error, or "-" on a board from a server
/// that predates it.
pub fn chance(c: Option<f64>) -> String {
    c.map_or_else(|| "-".to_string(), |c| format!("{c:.3}"))
}

fn pct(v: f64) -> String {
    format!("{:.1}%", 100.0 * v)
}

/// Renders the scoreboard as text.
pub fn table(b: &Scoreboard, kind: OutcomeKind, folds: usize) -> String {
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
    let name_w = b
        .models
        .iter()
        .map(|m| m.name.len())
        .max()
        .unwrap_or(5)
        .max(5);
    let _ = writeln!(
        s,
        "  {:>4}  {:<name_w$}  {:>12}  {:>27}  {:>6}  {:>4}  verdict",
        "rank", "model", "difference", "95% CI", "chance", "best"
    );
    for m in &b.models {
        let ci = format!(
            "[{}, {}]",
            num(m.vs_constant.ci_low),
            num(m.vs_constant.ci_high)
        );
        let _ = writeln!(
            s,
            "  {:>4}  {:<name_w$}  {:>12}  {:>27}  {:>6.3}  {:>4}  {}",
            m.rank,
            m.name,
            num(m.vs_constant.estimate),
            ci,
            m.chance_lowest,
            if m.in_best_set { "yes" } else { "" },
            verdict(m)
        );
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
    let _ = writeln!(
        s,
        "Chance: of having the lowest true error (pooled over the models, even when they tie). \
         Intervals holding for all {} rows at once: difference +- {} se.",
        b.models.len(),
        num(b.joint_critical_value)
    );
    if b.no_detectable_heterogeneity {
        let _ = writeln!(
            s,
            "No detectable heterogeneity: no model has significantly lower error than \
             constant-effect, so targeting on these models adds nothing measurable here."
        );
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "Per-model scores (mean, se in parentheses)");
    // One column per estimator of `estimators::ALL`; the ranking one, first,
    // carries its standard error.
    let columns: Vec<(String, usize)> = estimators::ALL
        .iter()
        .enumerate()
        .map(|(i, e)| {
            if i == estimators::RANKED_BY {
                (format!("{} (lower)", e.label()), 22)
            } else {
                (e.label().to_string(), e.label().len().max(10))
            }
        })
        .collect();
    let mut header = format!("  {:<name_w$}", "model");
    for (label, w) in &columns {
        let _ = write!(header, "  {label:>w$}");
    }
    let _ = writeln!(
        s,
        "{header}  {:>22}  {:>7}  {:>20}  {:>18}",
        "policy gain", "treats", "AUTOC", "BLP slope"
    );
    for m in &b.models {
        let slope = match &m.blp_slope {
            Some(e) => format!("{} ({})", num(e.estimate), num(e.se)),
            None => "no variation".to_string(),
        };
        let mut line = format!("  {:<name_w$}", m.name);
        for (i, ((_, e), (_, w))) in m.scores.iter().zip(&columns).enumerate() {
            let cell = if i == estimators::RANKED_BY {
                format!("{} ({})", num(e.estimate), num(e.se))
            } else {
                num(e.estimate)
            };
            let _ = write!(line, "  {cell:>w$}");
        }
        let _ = writeln!(
            s,
            "{line}  {:>22}  {:>7}  {:>20}  {:>18}",
            format!(
                "{} ({})",
                num(m.policy_gain.estimate),
                num(m.policy_gain.se)
            ),
            pct(m.policy_gain.treated_share),
            format!("{} ({})", num(m.autoc.estimate), num(m.autoc.se)),
            slope
        );
    }
    let _ = writeln!(
        s,
        "  policy gain: per unit over treating nobody, at cost {}",
        b.cost
    );
    if let Some(levels) = &b.levels {
        let _ = writeln!(s);
        rmse_at_least(&mut s, b, levels, name_w);
    }
    let _ = writeln!(s);
    if let Some(report) = &b.blend {
        blend(&mut s, report);
        let _ = writeln!(s);
    }
    overlap(&mut s, &b.overlap);
    if let Some(n) = &b.nuisance {
        let _ = writeln!(s);
        // A capped fit says so: its models saw a sample, every unit was scored.
        let sample = if n.fitted_units < n.units {
            format!(
                "; fitted on a sample of {} of {} units",
                n.fitted_units, n.units
            )
        } else {
            String::new()
        };
        let _ = writeln!(
            s,
            "Nuisance models ({}-fold cross-fit, seed {}{sample})",
            n.folds, n.seed
        );
        match &n.propensity.fit {
            Some(c) => component(&mut s, "propensity", c),
            None => {
                let _ = writeln!(s, "  {:<18}  logged (not fitted)", "propensity");
            }
        }
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
    s
}

/// Each registered model's lower bound on its RMSE, in rank order.
fn rmse_at_least(s: &mut String, b: &Scoreboard, levels: &LevelReport, name_w: usize) {
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
