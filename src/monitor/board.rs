//! Converts a window's estimation result into the scoreboard message that is
//! served, stored with each snapshot and read back after a restart.

use crate::api::pb;
use crate::estimate::estimators;
use crate::estimate::scoreboard::{ModelScore, Scoreboard};
use crate::estimate::stats::Estimate;

fn est(e: &Estimate) -> pb::Estimate {
    pb::Estimate {
        estimate: e.estimate,
        se: e.se,
    }
}

fn model(m: &ModelScore) -> pb::ModelScore {
    pb::ModelScore {
        name: m.name.clone(),
        baseline: m.baseline,
        rank: m.rank as u32,
        scores: m
            .scores
            .iter()
            .map(|(key, e)| pb::EstimatorScore {
                estimator: key.into(),
                estimate: e.estimate,
                se: e.se,
            })
            .collect(),
        vs_constant: Some(pb::Difference {
            estimate: m.vs_constant.estimate,
            se: m.vs_constant.se,
            ci_low: m.vs_constant.ci_low,
            ci_high: m.vs_constant.ci_high,
            p_value: m.vs_constant.p_value,
        }),
        p_best: m.p_best,
        in_best_set: m.in_best_set,
        policy_gain: Some(pb::Estimate {
            estimate: m.policy_gain.estimate,
            se: m.policy_gain.se,
        }),
        treated_share: m.policy_gain.treated_share,
        autoc: Some(est(&m.autoc)),
        qini: Some(est(&m.qini)),
        blp_slope: m.blp_slope.as_ref().map(est),
    }
}

/// Overlap summary of a scoreboard, with the dataset's thresholds applied.
pub fn overlap_summary(
    b: &Scoreboard,
    max_extreme_share: f64,
    min_effective_share: f64,
) -> pb::OverlapSummary {
    let o = &b.overlap;
    let (auc, clipped) = b
        .nuisance
        .as_ref()
        .map(|n| (n.propensity.auc, n.propensity.clipped as u64))
        .unwrap_or((0.5, 0));
    let degraded = o.share_outside_eps > max_extreme_share
        || o.treated.effective_share < min_effective_share
        || o.control.effective_share < min_effective_share;
    pb::OverlapSummary {
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
    pub window: pb::Window,
    pub snapshot_id: u64,
    pub computed_at_ms: i64,
    pub incomplete: Vec<pb::IncompleteModel>,
    pub max_extreme_share: f64,
    pub min_effective_share: f64,
}

pub fn scoreboard(parts: BoardParts<'_>, b: &Scoreboard) -> pb::Scoreboard {
    let nuisance = b
        .nuisance
        .as_ref()
        .map(|n| {
            let mut v = Vec::new();
            match &n.propensity.fit {
                Some(f) => v.push(pb::NuisanceComponent {
                    component: "propensity".into(),
                    learner: f.learner.clone(),
                    oof_loss: f.oof_loss,
                    loss: f.loss.into(),
                }),
                None => v.push(pb::NuisanceComponent {
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
                v.push(pb::NuisanceComponent {
                    component: name.into(),
                    learner: c.learner.clone(),
                    oof_loss: c.oof_loss,
                    loss: c.loss.into(),
                });
            }
            v
        })
        .unwrap_or_default();
    pb::Scoreboard {
        dataset: parts.dataset.into(),
        window: Some(parts.window),
        snapshot_id: parts.snapshot_id,
        computed_at_ms: parts.computed_at_ms,
        units: b.n_units as u64,
        ate: Some(pb::Estimate {
            estimate: b.ate.estimate,
            se: b.ate.se,
        }),
        leader: b.leader.clone(),
        best_set: b.best_set.clone(),
        no_detectable_heterogeneity: b.no_detectable_heterogeneity,
        models: b.models.iter().map(model).collect(),
        incomplete: parts.incomplete,
        overlap: Some(overlap_summary(
            b,
            parts.max_extreme_share,
            parts.min_effective_share,
        )),
        nuisance,
        degenerate: String::new(),
        caveat: b.caveat.into(),
        json: serde_json::to_string(b).unwrap_or_default(),
        rank_metrics_units: b.rank_metrics_units as u64,
        alerts: None,
    }
}

/// A board for a window whose data cannot support scores.
pub fn degenerate(parts: BoardParts<'_>, units: u64, state: String) -> pb::Scoreboard {
    pb::Scoreboard {
        dataset: parts.dataset.into(),
        window: Some(parts.window),
        snapshot_id: parts.snapshot_id,
        computed_at_ms: parts.computed_at_ms,
        units,
        incomplete: parts.incomplete,
        degenerate: state,
        caveat: crate::estimate::scoreboard::CORRECTED_PEHE_CAVEAT.into(),
        ..Default::default()
    }
}

/// Per-model values kept in history besides the estimators' scores.
pub const MEASURES: [&str; 4] = ["vs_constant", "policy_gain", "autoc", "qini"];

/// Every key a history query may ask for: the keys of
/// [`estimators::ALL`], then [`MEASURES`].
pub fn history_keys() -> impl Iterator<Item = &'static str> {
    estimators::ALL
        .iter()
        .map(|e| e.key())
        .chain(MEASURES.iter().copied())
}

/// The values of one model that history keeps, keyed as
/// [`history_keys`] lists them.
pub fn estimator_values(m: &pb::ModelScore) -> Vec<(String, pb::Estimate)> {
    let mut out: Vec<(String, pb::Estimate)> = m
        .scores
        .iter()
        .map(|s| {
            (
                s.estimator.clone(),
                pb::Estimate {
                    estimate: s.estimate,
                    se: s.se,
                },
            )
        })
        .collect();
    let measures = [
        (
            "vs_constant",
            m.vs_constant.as_ref().map(|v| pb::Estimate {
                estimate: v.estimate,
                se: v.se,
            }),
        ),
        ("policy_gain", m.policy_gain),
        ("autoc", m.autoc),
        ("qini", m.qini),
    ];
    for (key, e) in measures {
        if let Some(e) = e {
            out.push((key.into(), e));
        }
    }
    out
}

/// Stable key of a window, used in storage and metric labels.
pub fn window_key(w: &pb::Window) -> String {
    match pb::window::Kind::try_from(w.kind).unwrap_or(pb::window::Kind::Cumulative) {
        pb::window::Kind::Unspecified | pb::window::Kind::Cumulative => "cumulative".into(),
        pb::window::Kind::Recent => "recent".into(),
        pb::window::Kind::Cohort => format!("cohort:{}", w.cohort),
    }
}

/// The alerts' view of a dataset, for its boards.
pub fn alert_view(watch: &crate::estimate::watch::Watch) -> pb::AlertView {
    use crate::estimate::watch::Heterogeneity;
    let s = watch.state();
    pb::AlertView {
        leader: s.leader.unwrap_or_default(),
        leader_settled: s.leader_settled,
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
            .map(|(quantity, standardized_difference)| pb::Drift {
                quantity,
                standardized_difference,
            })
            .collect(),
    }
}
