//! `plumbline score --arms REF,ARM1,...`: the offline boards of a dataset
//! with more than two arms, one per contrast, the generalized propensity
//! per arm and the value of each model's arm choice.

use std::fmt::Write;
use std::process::ExitCode;

use super::board_table::num;
use super::progress::StderrProgress;
use super::render;
use super::score::{finish, ScoreArgs};
use super::EXIT_BAD_INPUT;
use crate::estimate::arms::{evaluate_arms, ArmSettings, ArmsScoreboard, Valued};
use crate::estimate::crossfit::NuisanceSettings;
use crate::estimate::{OutcomeKind, Settings};
use crate::input::{align_ids, group_arm_predictions, read_arm_units, read_predictions};

/// The arms `--arms` declares, the reference first.
#[derive(Debug, Clone)]
pub struct ArmList(pub Vec<String>);

/// At least two distinct, non-empty labels without ':'.
pub fn parse_arms(v: &str) -> Result<ArmList, String> {
    let arms: Vec<String> = v.split(',').map(|a| a.trim().to_string()).collect();
    if arms.len() < 2 {
        return Err("a reference arm and at least one other, comma-separated".into());
    }
    for (j, a) in arms.iter().enumerate() {
        if a.is_empty() {
            return Err(format!("arm {} is empty", j + 1));
        }
        if a.contains(':') {
            return Err(format!("arm {a:?} contains ':', which separates MODEL:ARM"));
        }
        if arms[..j].contains(a) {
            return Err(format!("arm {a:?} is declared twice"));
        }
    }
    Ok(ArmList(arms))
}

/// `ARM=COST,...` as one cost per arm (0 where not named); an unknown arm
/// or a cost that is not a finite number is an error naming it.
pub fn arm_costs(spec: Option<&str>, arms: &[String]) -> Result<Vec<f64>, String> {
    let mut costs = vec![0.0; arms.len()];
    let Some(spec) = spec else { return Ok(costs) };
    for part in spec.split(',').filter(|p| !p.trim().is_empty()) {
        let (arm, cost) = part
            .split_once('=')
            .ok_or_else(|| format!("--arm-cost: {part:?} is not ARM=COST"))?;
        let k = arms
            .iter()
            .position(|a| a == arm.trim())
            .ok_or_else(|| format!("--arm-cost: arm {:?} is not declared by --arms", arm.trim()))?;
        costs[k] = cost
            .trim()
            .parse::<f64>()
            .ok()
            .filter(|c| c.is_finite())
            .ok_or_else(|| {
                format!(
                    "--arm-cost: cost {:?} of arm {arm} is not a finite number",
                    cost.trim()
                )
            })?;
    }
    Ok(costs)
}

pub fn run(args: &ScoreArgs, arms: &[String], kind: Option<OutcomeKind>) -> ExitCode {
    if args.cost != 0.0 {
        eprintln!(
            "plumbline score: --cost is for two arms; with --arms give --arm-cost ARM=COST,..."
        );
        return ExitCode::from(EXIT_BAD_INPUT);
    }
    let costs = match arm_costs(args.arm_cost.as_deref(), arms) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("plumbline score: {e}");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
    };
    let loaded = read_arm_units(&args.units, kind, arms).and_then(|units| {
        let preds = read_predictions(&args.predictions)?;
        let columns = align_ids(&units.ids, &args.units, preds, &args.predictions)?;
        let models = group_arm_predictions(columns, arms, &args.predictions)?;
        Ok((units, models))
    });
    let (units, models) = match loaded {
        Ok(v) => v,
        Err(e) => {
            eprintln!("plumbline score: {e}");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
    };
    let settings = Settings {
        nuisance: NuisanceSettings {
            folds: args.folds,
            seed: args.seed,
            max_fit_units: args.max_fit_units,
            fold_repeats: args.fold_repeats as usize,
            propensity_recalibration: super::score::recalibration(args),
            ..NuisanceSettings::default()
        },
        alpha: args.alpha,
        ..Settings::default()
    };
    let arm_settings = ArmSettings {
        costs,
        ..ArmSettings::default()
    };
    let progress = StderrProgress::start();
    let result = evaluate_arms(
        &units.table,
        &units.feature_names,
        &models,
        &settings,
        &arm_settings,
        &progress,
    );
    progress.finish();
    let kind = units.table.outcome_kind();
    finish(args, result, |board| {
        table(board, kind, args.folds, args.wide)
    })
}

fn valued(v: &Valued) -> String {
    format!(
        "{}  [{}, {}]",
        num(v.estimate),
        num(v.ci_low),
        num(v.ci_high)
    )
}

/// The arms report for a person: each contrast's board as the binary
/// table, then the propensity per arm and the arm choices' values.
pub fn table(b: &ArmsScoreboard, kind: OutcomeKind, folds: usize, wide: bool) -> String {
    let mut s = String::new();
    let counts: Vec<String> = b
        .arms
        .iter()
        .zip(&b.units_per_arm)
        .map(|(a, n)| format!("{a} {n}"))
        .collect();
    let _ = writeln!(
        s,
        "{} units in {} arms ({}); reference arm {}",
        b.n_units,
        b.arms.len(),
        counts.join(", "),
        b.reference
    );
    for c in &b.contrasts {
        let _ = writeln!(s);
        let _ = writeln!(s, "=== Contrast {} against {} ===", c.arm, c.reference);
        s.push_str(&render::table(&c.board, kind, folds, wide));
        let _ = writeln!(s, "  ({})", c.note);
    }
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "Generalized propensity per arm (e_k over every unit; effective size of the arm's units under 1/e_k)"
    );
    let _ = writeln!(
        s,
        "  {:<16} {:>7} {:>8} {:>8} {:>8} {:>10} {:>9} {:>8}",
        "arm", "units", "min", "median", "max", "effective", "extreme", "clipped"
    );
    for p in &b.propensity {
        let q = |at: f64| {
            p.quantiles
                .iter()
                .find(|(x, _)| *x == at)
                .map_or(f64::NAN, |(_, v)| *v)
        };
        let _ = writeln!(
            s,
            "  {:<16} {:>7} {:>8.4} {:>8.4} {:>8.4} {:>9.1}% {:>8.1}% {:>8}",
            p.arm,
            p.units,
            q(0.0),
            q(0.5),
            q(1.0),
            100.0 * p.effective_share,
            100.0 * p.extreme_share,
            p.clipped
        );
    }
    if let Some(n) = &b.nuisance {
        let sample = super::render::sample_note(n.fitted_units, n.units);
        let repeats = super::render::repeats_note(n.fold_repeats);
        let _ = writeln!(
            s,
            "  propensity learner {} (out-of-fold log-loss {}); outcome learners: {}{sample}{repeats}",
            n.propensity.learner,
            num(n.propensity.oof_loss),
            b.arms
                .iter()
                .zip(&n.outcome)
                .map(|(a, r)| format!("{a} {}", r.learner))
                .collect::<Vec<_>>()
                .join(", ")
        );
        if let Some(r) = &n.propensity.recalibration {
            let losses: Vec<String> = r
                .candidates
                .iter()
                .map(|c| format!("{} {}", c.stage.name(), num(c.oof_loss)))
                .collect();
            let _ = writeln!(
                s,
                "  propensity last stage {} ({}; out-of-fold log-loss {})",
                r.chosen.name(),
                r.how,
                losses.join(", ")
            );
        }
    }
    let p = &b.policy;
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "Arm choice: each unit gets the arm with the largest predicted effect net of its cost, \
         the reference when none is positive; value per unit net of cost (95% CI)"
    );
    let _ = writeln!(
        s,
        "  everyone {}: {}",
        b.reference,
        valued(&p.reference_value)
    );
    let _ = writeln!(
        s,
        "  everyone {} (best single arm): {}",
        p.best_single_arm,
        valued(&p.best_single_arm_value)
    );
    // Columns as wide as their widest cell, so the table fits a terminal
    // whatever the model names.
    let name = p
        .models
        .iter()
        .map(|m| m.model.len())
        .max()
        .unwrap_or(0)
        .max(5);
    let cells: Vec<[String; 3]> = p
        .models
        .iter()
        .map(|m| {
            [
                valued(&m.value),
                valued(&m.vs_reference),
                valued(&m.vs_best_single_arm),
            ]
        })
        .collect();
    let heads = [
        "value".to_string(),
        format!("vs everyone {}", b.reference),
        format!("vs everyone {}", p.best_single_arm),
    ];
    let width = |j: usize| {
        cells
            .iter()
            .map(|c| c[j].len())
            .chain([heads[j].len()])
            .max()
            .unwrap_or(0)
    };
    let (w0, w1) = (width(0), width(1));
    let _ = writeln!(
        s,
        "  {:<name$}  {:<w0$}  {:<w1$}  {}",
        "model", heads[0], heads[1], heads[2]
    );
    for (m, c) in p.models.iter().zip(&cells) {
        let _ = writeln!(
            s,
            "  {:<name$}  {:<w0$}  {:<w1$}  {}",
            m.model, c[0], c[1], c[2]
        );
    }
    if !p.pairwise.is_empty() {
        let _ = writeln!(s, "  Pairwise (first's value minus second's):");
        for d in &p.pairwise {
            let _ = writeln!(
                s,
                "    {} - {}: {}",
                d.first,
                d.second,
                valued(&d.difference)
            );
        }
    }
    let _ = writeln!(s, "  ({})", p.note);
    if wide {
        s
    } else {
        render::wrap_prose(&s, render::PROSE_WIDTH)
    }
}
