//! The wire's shape of a board and a window: conversions between the
//! domain's records ([`crate::domain::board`]) and `proto/`, written once.

use tonic::Status;

use super::pb;
use crate::domain::ArmPolicyBoard;
use crate::domain::{
    Adjusted, AlertView, Board, BoardBlend, BoardModel, Difference, IncompleteModel,
    NuisanceComponent, OverlapSummary, Window,
};
use crate::estimate::arms::Valued;
use crate::estimate::stats::Estimate;

/// A request's window; cumulative when absent.
pub fn window_of(w: &Option<pb::Window>) -> Result<Window, Status> {
    let Some(w) = w else {
        return Ok(Window::Cumulative);
    };
    match pb::window::Kind::try_from(w.kind) {
        Ok(pb::window::Kind::Unspecified | pb::window::Kind::Cumulative) => Ok(Window::Cumulative),
        Ok(pb::window::Kind::Recent) => Ok(Window::Recent),
        Ok(pb::window::Kind::Cohort) if w.cohort.is_empty() => Err(Status::invalid_argument(
            "window.cohort: required for a cohort window",
        )),
        Ok(pb::window::Kind::Cohort) => Ok(Window::Cohort(w.cohort.clone())),
        Err(_) => Err(Status::invalid_argument(format!(
            "window.kind: {} is not a window kind",
            w.kind
        ))),
    }
}

impl From<&Window> for pb::Window {
    fn from(w: &Window) -> Self {
        let (kind, cohort) = match w {
            Window::Cumulative => (pb::window::Kind::Cumulative, String::new()),
            Window::Recent => (pb::window::Kind::Recent, String::new()),
            Window::Cohort(c) => (pb::window::Kind::Cohort, c.clone()),
        };
        pb::Window {
            kind: kind as i32,
            cohort,
        }
    }
}

impl From<Estimate> for pb::Estimate {
    fn from(e: Estimate) -> Self {
        pb::Estimate {
            estimate: e.estimate,
            se: e.se,
        }
    }
}

impl From<Difference> for pb::Difference {
    fn from(d: Difference) -> Self {
        pb::Difference {
            estimate: d.estimate,
            se: d.se,
            ci_low: d.ci_low,
            ci_high: d.ci_high,
            p_value: d.p_value,
            joint_low: d.joint.map(|j| j.0),
            joint_high: d.joint.map(|j| j.1),
        }
    }
}

impl From<BoardBlend> for pb::Blend {
    fn from(b: BoardBlend) -> Self {
        pb::Blend {
            weights: b
                .weights
                .into_iter()
                .map(|w| pb::BlendWeight {
                    model: w.model,
                    weight: w.weight,
                })
                .collect(),
            corrected_pehe: b.corrected_pehe,
            best_model: b.best_model,
            vs_best: Some(b.vs_best.into()),
            vs_constant: Some(b.vs_constant.into()),
            models_offered: b.models_offered,
        }
    }
}

impl From<Adjusted> for pb::AdjustedInterval {
    fn from(a: Adjusted) -> Self {
        pb::AdjustedInterval {
            estimate: a.estimate,
            ci_low: a.ci_low,
            ci_high: a.ci_high,
        }
    }
}

impl From<BoardModel> for pb::ModelScore {
    fn from(m: BoardModel) -> Self {
        pb::ModelScore {
            name: m.name,
            baseline: m.baseline,
            rank: m.rank,
            scores: m
                .scores
                .into_iter()
                .map(|s| pb::EstimatorScore {
                    estimator: s.estimator,
                    estimate: s.value.estimate,
                    se: s.value.se,
                })
                .collect(),
            vs_constant: Some(m.vs_constant.into()),
            draw_share: m.draw_share,
            chance_lowest: m.chance_lowest,
            in_best_set: m.in_best_set,
            policy_gain: Some(m.policy_gain.into()),
            treated_share: m.treated_share,
            policy_vs_front_runner: m.policy_vs_front_runner.map(Into::into),
            autoc: Some(m.autoc.into()),
            qini: Some(m.qini.into()),
            blp_slope: m.blp_slope.map(Into::into),
            top_minus_bottom: m.top_minus_bottom.map(Into::into),
            rmse_lower_bound: m.rmse_lower_bound,
            registered_blend: m.registered_blend,
        }
    }
}

impl From<IncompleteModel> for pb::IncompleteModel {
    fn from(i: IncompleteModel) -> Self {
        pb::IncompleteModel {
            name: i.name,
            coverage: i.coverage,
        }
    }
}

impl From<NuisanceComponent> for pb::NuisanceComponent {
    fn from(c: NuisanceComponent) -> Self {
        pb::NuisanceComponent {
            component: c.component,
            learner: c.learner,
            oof_loss: c.oof_loss,
            loss: c.loss,
        }
    }
}

impl From<OverlapSummary> for pb::OverlapSummary {
    fn from(o: OverlapSummary) -> Self {
        pb::OverlapSummary {
            eps: o.eps,
            extreme_share: o.extreme_share,
            outside_crump_share: o.outside_crump_share,
            treated_effective_share: o.treated_effective_share,
            control_effective_share: o.control_effective_share,
            treated_max_weight: o.treated_max_weight,
            control_max_weight: o.control_max_weight,
            imbalanced_features: o.imbalanced_features,
            propensity_auc: o.propensity_auc,
            clipped: o.clipped,
            degraded: o.degraded,
        }
    }
}

impl From<AlertView> for pb::AlertView {
    fn from(a: AlertView) -> Self {
        pb::AlertView {
            front_runner: a.front_runner,
            front_runner_settled: a.front_runner_settled,
            heterogeneity: a.heterogeneity,
            overlap_degraded: a.overlap_degraded,
            looks: a.looks,
            units: a.units,
            drift: a
                .drift
                .into_iter()
                .map(|d| pb::Drift {
                    quantity: d.quantity,
                    standardized_difference: d.standardized_difference,
                })
                .collect(),
        }
    }
}

impl From<Board> for pb::Scoreboard {
    fn from(b: Board) -> Self {
        pb::Scoreboard {
            dataset: b.dataset,
            window: Some((&b.window).into()),
            snapshot_id: b.snapshot_id,
            computed_at_ms: b.computed_at_ms,
            units: b.units,
            ate: b.ate.map(Into::into),
            front_runner: b.front_runner,
            best_set: b.best_set,
            no_detectable_heterogeneity: b.no_detectable_heterogeneity,
            models: b.models.into_iter().map(Into::into).collect(),
            incomplete: b.incomplete.into_iter().map(Into::into).collect(),
            overlap: b.overlap.map(Into::into),
            nuisance: b.nuisance.into_iter().map(Into::into).collect(),
            degenerate: b.degenerate,
            caveat: b.caveat,
            json: b.detail_json,
            rank_metrics_units: b.rank_metrics_units,
            alerts: b.alerts.map(Into::into),
            front_runner_vs_constant: b.front_runner_vs_constant.map(Into::into),
            joint_critical_value: b.joint_critical_value,
            plugin_error_projection: b.plugin_error_projection.map(Into::into),
            blend: b.blend.map(Into::into),
            arm: b.arm,
            reference_arm: b.reference_arm,
            contrasts: b.contrasts.into_iter().map(Into::into).collect(),
            arm_policy: b.arm_policy.map(Into::into),
        }
    }
}

impl From<Valued> for pb::IntervalValue {
    fn from(v: Valued) -> Self {
        pb::IntervalValue {
            estimate: v.estimate,
            se: v.se,
            ci_low: v.ci_low,
            ci_high: v.ci_high,
        }
    }
}

impl From<ArmPolicyBoard> for pb::ArmPolicyReport {
    fn from(r: ArmPolicyBoard) -> Self {
        pb::ArmPolicyReport {
            costs: r
                .costs
                .into_iter()
                .map(|c| pb::ArmCost {
                    arm: c.arm,
                    cost: c.cost,
                })
                .collect(),
            reference_value: Some(r.reference_value.into()),
            best_single_arm: r.best_single_arm,
            best_single_arm_value: Some(r.best_single_arm_value.into()),
            note: r.note,
            models: r
                .models
                .into_iter()
                .map(|m| pb::ArmPolicy {
                    model: m.model,
                    value: Some(m.value.into()),
                    vs_reference: Some(m.vs_reference.into()),
                    vs_best_single_arm: Some(m.vs_best_single_arm.into()),
                    shares: m
                        .shares
                        .into_iter()
                        .map(|s| pb::ArmShare {
                            arm: s.arm,
                            share: s.share,
                        })
                        .collect(),
                })
                .collect(),
            pairwise: r
                .pairwise
                .into_iter()
                .map(|d| pb::PolicyDifference {
                    first: d.first,
                    second: d.second,
                    difference: Some(d.difference.into()),
                })
                .collect(),
        }
    }
}
