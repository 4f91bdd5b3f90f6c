//! Turns a window's estimation result into the board a recompute
//! publishes, stores with its snapshot and reads back after a restart.

use crate::domain::{
    Adjusted, AlertView, BlendShare, Board, BoardBlend, BoardModel, Difference, Drift,
    IncompleteModel, NuisanceComponent, OverlapSummary, Pair, Score, Window,
};
use crate::estimate::arms::ArmsScoreboard;
use crate::estimate::blend::BlendReport;
use crate::estimate::compare;
use crate::estimate::level::LevelReport;
use crate::estimate::scoreboard::{ModelScore, Scoreboard};
use crate::estimate::stats::Estimate;

/// `levels` gives the model's error bound, looked up by name.
fn model(m: &ModelScore, levels: Option<&LevelReport>) -> BoardModel {
    BoardModel {
        name: m.name.clone(),
        baseline: m.baseline,
        rank: m.rank as u32,
        scores: m
            .scores
            .iter()
            .map(|(key, value)| Score {
                estimator: key.into(),
                value,
            })
            .collect(),
        vs_constant: Difference {
            estimate: m.vs_constant.estimate,
            se: m.vs_constant.se,
            ci_low: m.vs_constant.ci_low,
            ci_high: m.vs_constant.ci_high,
            p_value: m.vs_constant.p_value,
            joint: Some((m.vs_constant.joint_low, m.vs_constant.joint_high)),
        },
        draw_share: m.draw_share,
        chance_lowest: Some(m.chance_lowest),
        in_best_set: m.in_best_set,
        policy_gain: Estimate::new(m.policy_gain.estimate, m.policy_gain.se),
        treated_share: m.policy_gain.treated_share,
        policy_vs_front_runner: m.policy_vs_front_runner.as_ref().map(|d| Difference {
            joint: Some((d.joint_low, d.joint_high)),
            ..difference(d)
        }),
        autoc: m.autoc,
        qini: m.qini,
        blp_slope: m.blp_slope,
        top_minus_bottom: m.calibration.top_minus_bottom,
        rmse_lower_bound: levels.and_then(|l| {
            l.models
                .iter()
                .find(|level| level.name == m.name)
                .map(|level| level.rmse_lower_bound)
        }),
        registered_blend: false,
    }
}

/// A difference with its pointwise interval, without a joint one.
pub fn difference(d: &compare::Difference) -> Difference {
    Difference {
        estimate: d.estimate,
        se: d.se,
        ci_low: d.ci_low,
        ci_high: d.ci_high,
        p_value: d.p_value,
        joint: None,
    }
}

/// The board's view of a window's blend: the nonzero weights, largest
/// first, and the held-out error.
fn blend(b: &BlendReport) -> BoardBlend {
    let mut weights: Vec<BlendShare> = b
        .weights
        .iter()
        .filter(|w| w.weight > 0.0)
        .map(|w| BlendShare {
            model: w.model.clone(),
            weight: w.weight,
        })
        .collect();
    weights.sort_by(|a, b| b.weight.total_cmp(&a.weight));
    BoardBlend {
        weights,
        corrected_pehe: b.corrected_pehe,
        best_model: b.best_model.clone(),
        vs_best: difference(&b.vs_best),
        vs_constant: difference(&b.vs_constant),
        models_offered: b.weights.len() as u32,
    }
}

/// Overlap summary of a scoreboard, with the dataset's thresholds applied.
pub fn overlap_summary(
    b: &Scoreboard,
    max_extreme_share: f64,
    min_effective_share: f64,
) -> OverlapSummary {
    let o = &b.overlap;
    let (auc, clipped) = b
        .nuisance
        .as_ref()
        .map(|n| (n.propensity.auc, n.propensity.clipped as u64))
        .unwrap_or((0.5, 0));
    let degraded = o.share_outside_eps > max_extreme_share
        || o.treated.effective_share < min_effective_share
        || o.control.effective_share < min_effective_share;
    OverlapSummary {
        eps: o.eps,
        extreme_share: o.share_outside_eps,
        outside_crump_share: o.share_outside_crump,
        treated_effective_share: o.treated.effective_share,
        control_effective_share: o.control.effective_share,
        treated_max_weight: o.treated.max_normalized_weight,
        control_max_weight: o.control.max_normalized_weight,
        imbalanced_features: o
            .balance
            .iter()
            .filter(|f| f.flagged)
            .map(|f| f.feature.clone())
            .collect(),
        propensity_auc: auc,
        clipped,
        degraded,
    }
}

/// Everything of a window's result except identity and time.
pub struct BoardParts<'a> {
    pub dataset: &'a str,
    pub window: Window,
    pub snapshot_id: u64,
    pub computed_at_ms: i64,
    pub incomplete: Vec<IncompleteModel>,
    pub max_extreme_share: f64,
    pub min_effective_share: f64,
}

pub fn scoreboard(parts: BoardParts<'_>, b: &Scoreboard) -> Board {
    let nuisance = b
        .nuisance
        .as_ref()
        .map(|n| {
            let mut v = Vec::new();
            match &n.propensity.fit {
                Some(f) => v.push(NuisanceComponent {
                    component: "propensity".into(),
                    learner: f.learner.clone(),
                    oof_loss: f.oof_loss,
                    loss: f.loss.into(),
                }),
                None => v.push(NuisanceComponent {
                    component: "propensity".into(),
                    learner: "logged".into(),
                    oof_loss: 0.0,
                    loss: String::new(),
                }),
            }
            for (name, c) in [
                ("outcome_control", &n.outcome_control),
                ("outcome_treated", &n.outcome_treated),
            ] {
                v.push(NuisanceComponent {
                    component: name.into(),
                    learner: c.learner.clone(),
                    oof_loss: c.oof_loss,
                    loss: c.loss.into(),
                });
            }
            v
        })
        .unwrap_or_default();
    Board {
        dataset: parts.dataset.into(),
        window: parts.window,
        snapshot_id: parts.snapshot_id,
        computed_at_ms: parts.computed_at_ms,
        units: b.n_units as u64,
        ate: Some(Estimate::new(b.ate.estimate, b.ate.se)),
        front_runner: b.front_runner.clone(),
        front_runner_vs_constant: Some(Adjusted {
            estimate: b.front_runner_vs_constant.estimate,
            ci_low: b.front_runner_vs_constant.ci_low,
            ci_high: b.front_runner_vs_constant.ci_high,
        }),
        joint_critical_value: Some(b.joint_critical_value),
        best_set: b.best_set.clone(),
        no_detectable_heterogeneity: b.no_detectable_heterogeneity,
        models: b
            .models
            .iter()
            .map(|m| model(m, b.levels.as_ref()))
            .collect(),
        incomplete: parts.incomplete,
        overlap: Some(overlap_summary(
            b,
            parts.max_extreme_share,
            parts.min_effective_share,
        )),
        nuisance,
        pairwise: b
            .pairwise
            .iter()
            .map(|p| Pair {
                first: p.first.clone(),
                second: p.second.clone(),
                difference: Difference {
                    estimate: p.difference.estimate,
                    se: p.difference.se,
                    ci_low: p.difference.ci_low,
                    ci_high: p.difference.ci_high,
                    p_value: p.difference.p_value,
                    joint: Some((p.difference.joint_low, p.difference.joint_high)),
                },
            })
            .collect(),
        degenerate: String::new(),
        caveat: b.caveat.into(),
        detail_json: serde_json::to_string(b).unwrap_or_default(),
        rank_metrics_units: b.rank_metrics_units as u64,
        alerts: None,
        plugin_error_projection: b.levels.as_ref().map(|l| l.plugin_error_projection),
        blend: b.blend.as_ref().map(blend),
        arm: String::new(),
        reference_arm: String::new(),
        contrasts: Vec::new(),
        arm_policy: None,
    }
}

/// Marks the rows of registered blends, whose scores are in-sample for
/// their weights, and says so in the caveat.
pub fn mark_registered_blends(b: &mut Board, blends: &std::collections::HashSet<String>) {
    let mut any = false;
    for m in &mut b.models {
        if blends.contains(&m.name) {
            m.registered_blend = true;
            any = true;
        }
    }
    if any {
        b.caveat.push(' ');
        b.caveat
            .push_str(crate::domain::board::REGISTERED_BLEND_NOTE);
    }
}

/// A board for a window whose data cannot support scores.
pub fn degenerate(parts: BoardParts<'_>, units: u64, state: String) -> Board {
    Board {
        dataset: parts.dataset.into(),
        window: parts.window,
        snapshot_id: parts.snapshot_id,
        computed_at_ms: parts.computed_at_ms,
        units,
        ate: None,
        front_runner: String::new(),
        front_runner_vs_constant: None,
        joint_critical_value: None,
        best_set: Vec::new(),
        no_detectable_heterogeneity: false,
        models: Vec::new(),
        incomplete: parts.incomplete,
        overlap: None,
        nuisance: Vec::new(),
        pairwise: Vec::new(),
        degenerate: state,
        caveat: crate::estimate::scoreboard::CORRECTED_PEHE_CAVEAT.into(),
        detail_json: String::new(),
        rank_metrics_units: 0,
        alerts: None,
        plugin_error_projection: None,
        blend: None,
        arm: String::new(),
        reference_arm: String::new(),
        contrasts: Vec::new(),
        arm_policy: None,
    }
}

/// The alerts' view of a dataset, for its boards.
pub fn alert_view(watch: &crate::estimate::watch::Watch) -> AlertView {
    use crate::estimate::watch::Heterogeneity;
    let s = watch.state();
    AlertView {
        front_runner: s.front_runner.unwrap_or_default(),
        front_runner_settled: s.front_runner_settled,
        heterogeneity: match s.heterogeneity {
            Heterogeneity::Unknown => "unknown",
            Heterogeneity::Detected => "detected",
            Heterogeneity::Absent => "absent",
        }
        .into(),
        overlap_degraded: s.overlap_degraded,
        looks: s.looks,
        units: s.units - s.baseline_units,
        drift: s
            .drift
            .into_iter()
            .map(|(quantity, standardized_difference)| Drift {
                quantity,
                standardized_difference,
            })
            .collect(),
    }
}

/// The board of one window of a dataset with arms: a top board with the
/// window, its units, the nuisance components (the multinomial propensity
/// and one outcome model per arm) and the value of each model's arm
/// choice; under it one board per contrast, each the binary board of that
/// arm against the reference.
pub fn arms_board(parts: BoardParts<'_>, b: &ArmsScoreboard) -> Board {
    let contrasts = b
        .contrasts
        .iter()
        .map(|c| {
            let parts = BoardParts {
                dataset: parts.dataset,
                window: parts.window.clone(),
                snapshot_id: parts.snapshot_id,
                computed_at_ms: parts.computed_at_ms,
                incomplete: parts.incomplete.clone(),
                max_extreme_share: parts.max_extreme_share,
                min_effective_share: parts.min_effective_share,
            };
            let mut board = Board {
                arm: c.arm.clone(),
                reference_arm: c.reference.clone(),
                ..scoreboard(parts, &c.board)
            };
            // The contrast's board has no binary nuisance report: its
            // propensity is the conditional one of its two arms.
            if let Some(o) = board.overlap.as_mut() {
                o.propensity_auc = c.propensity_auc;
                o.clipped = c.clipped as u64;
            }
            board
        })
        .collect();
    let nuisance = b
        .nuisance
        .as_ref()
        .map(|n| {
            let mut v = vec![NuisanceComponent {
                component: "propensity".into(),
                learner: n.propensity.learner.clone(),
                oof_loss: n.propensity.oof_loss,
                loss: n.propensity.loss.into(),
            }];
            for (arm, c) in b.arms.iter().zip(&n.outcome) {
                v.push(NuisanceComponent {
                    component: format!("outcome_{arm}"),
                    learner: c.learner.clone(),
                    oof_loss: c.oof_loss,
                    loss: c.loss.into(),
                });
            }
            v
        })
        .unwrap_or_default();
    let units = b.n_units as u64;
    Board {
        nuisance,
        contrasts,
        arm_policy: Some((&b.policy).into()),
        reference_arm: b.reference.clone(),
        detail_json: serde_json::to_string(b).unwrap_or_default(),
        rank_metrics_units: units,
        ..degenerate(parts, units, String::new())
    }
}
