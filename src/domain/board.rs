//! A window's board as a recompute publishes it: what `GetScoreboard`
//! serves, what a snapshot stores, and what a restart reads back. The
//! estimation pass's own [`crate::estimate::scoreboard::Scoreboard`] is the
//! input; this adds identity, time, the dataset's overlap thresholds and the
//! alerts' view, and drops what only the detail document needs.

use serde::{Deserialize, Serialize};

use crate::estimate::arms::{ArmCost, ArmPolicy, ArmPolicyReport, PolicyDifference, Valued};
use crate::estimate::estimators;
use crate::estimate::stats::Estimate;

/// Which units a board covers.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Window {
    /// Every unit with an outcome.
    Cumulative,
    /// The dataset's most recent outcomes (`recent_last_outcomes` /
    /// `recent_last_days`).
    Recent,
    /// One cohort label's units.
    Cohort(String),
}

impl Window {
    /// Stable key of a window, used in storage and metric labels:
    /// `cumulative`, `recent`, `cohort:<label>`.
    pub fn key(&self) -> String {
        match self {
            Window::Cumulative => "cumulative".into(),
            Window::Recent => "recent".into(),
            Window::Cohort(c) => format!("cohort:{c}"),
        }
    }
}

/// One estimator's score of a model, keyed as in [`estimators::ALL`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Score {
    pub estimator: String,
    #[serde(flatten)]
    pub value: Estimate,
}

/// A difference with its confidence interval and p-value.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct Difference {
    pub estimate: f64,
    pub se: f64,
    pub ci_low: f64,
    pub ci_high: f64,
    pub p_value: f64,
    /// The interval at the same level holding for every difference of its
    /// family at once (max-t); absent on boards stored before it existed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub joint: Option<(f64, f64)>,
}

impl Difference {
    /// The same difference read the other way round (second minus first).
    pub fn flipped(self) -> Self {
        Self {
            estimate: -self.estimate,
            ci_low: -self.ci_high,
            ci_high: -self.ci_low,
            joint: self.joint.map(|(low, high)| (-high, -low)),
            ..self
        }
    }
}

/// An estimate with an interval that is not estimate +- z se: the
/// front-runner's difference from constant-effect, adjusted for its selection.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct Adjusted {
    pub estimate: f64,
    pub ci_low: f64,
    pub ci_high: f64,
}

/// One ranked model (or baseline) of a board.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BoardModel {
    pub name: String,
    /// True for zero-effect and constant-effect.
    pub baseline: bool,
    /// 1 = lowest corrected PEHE.
    pub rank: u32,
    /// Every estimator's score, in [`estimators::ALL`]'s order.
    pub scores: Vec<Score>,
    /// Corrected PEHE minus that of constant-effect (one-sided p-value for
    /// "no lower error").
    pub vs_constant: Difference,
    /// Share of correlated draws in which the model has the lowest error
    /// (overstates the front-runner among ties; see `chance_lowest`).
    #[serde(alias = "p_best")]
    pub draw_share: f64,
    /// Chance of the lowest true error, the models pooled (empirical
    /// Bayes); absent on boards stored before it existed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub chance_lowest: Option<f64>,
    pub in_best_set: bool,
    /// Per unit over treating nobody, at the dataset's cost.
    pub policy_gain: Estimate,
    pub treated_share: f64,
    /// Policy gain minus the front-runner's (above 0: this model's
    /// targeting is worth more), its joint interval over the board's
    /// comparisons with the front-runner (Bonferroni); absent on the
    /// front-runner's row and on boards stored before it existed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub policy_vs_front_runner: Option<Difference>,
    pub autoc: Estimate,
    pub qini: Estimate,
    /// None when the predictions do not vary.
    pub blp_slope: Option<Estimate>,
    /// The top fifth's ATE minus the bottom fifth's; absent when the
    /// predictions do not vary or on boards stored before it existed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub top_minus_bottom: Option<Estimate>,
    /// One-sided 95% lower confidence bound on the model's RMSE that holds
    /// whatever the nuisance models' quality (up to the product-of-errors
    /// term), where the corrected PEHE alone is only a lower estimate (see
    /// `estimate::level`); absent on boards stored before it existed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rmse_lower_bound: Option<f64>,
    /// A registered blend's row: its weights were chosen on these units, so
    /// its scores are in-sample for the weights (the board's `blend`, fitted
    /// on other folds, is the honest figure); see [`REGISTERED_BLEND_NOTE`].
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub registered_blend: bool,
}

/// Added to a board's caveat when a registered blend is ranked on it.
pub const REGISTERED_BLEND_NOTE: &str = "A registered blend (registered_blend) is scored on the \
     units its weights were chosen on, so its error here is an in-sample figure that favours it; \
     the board's own blend, whose weights are fitted on the other folds, is the honest one.";

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

impl BoardModel {
    /// The values history keeps, keyed as [`history_keys`] lists them.
    pub fn history_values(&self) -> Vec<(String, Estimate)> {
        let v = &self.vs_constant;
        // In the order of MEASURES.
        let measures = [
            Estimate::new(v.estimate, v.se),
            self.policy_gain,
            self.autoc,
            self.qini,
        ];
        self.scores
            .iter()
            .map(|s| (s.estimator.clone(), s.value))
            .chain(MEASURES.iter().map(|k| k.to_string()).zip(measures))
            .collect()
    }
}

/// Corrected PEHE of `first` minus that of `second`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Pair {
    pub first: String,
    pub second: String,
    #[serde(flatten)]
    pub difference: Difference,
}

/// A model left out of the ranking for lack of coverage.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct IncompleteModel {
    pub name: String,
    /// Share of the window's units with outcomes that it predicted.
    pub coverage: f64,
}

/// One nuisance component's chosen learner and out-of-fold loss.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NuisanceComponent {
    /// "propensity", "outcome_control" or "outcome_treated".
    pub component: String,
    /// Chosen learner, or "logged" for logged propensities.
    pub learner: String,
    pub oof_loss: f64,
    /// "log_loss" or "squared_error"; empty for logged propensities.
    pub loss: String,
}

/// Overlap of a window, with the dataset's thresholds applied.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OverlapSummary {
    pub eps: f64,
    pub extreme_share: f64,
    pub outside_crump_share: f64,
    pub treated_effective_share: f64,
    pub control_effective_share: f64,
    pub treated_max_weight: f64,
    pub control_max_weight: f64,
    pub imbalanced_features: Vec<String>,
    pub propensity_auc: f64,
    pub clipped: u64,
    pub degraded: bool,
}

/// A covariate's (or the propensity's) standardized difference between the
/// watch's reference population and the units arriving now.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Drift {
    pub quantity: String,
    pub standardized_difference: f64,
}

/// The alerts' view of a dataset: the stream watch's states, which every
/// board of a recompute carries.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct AlertView {
    /// Empty until the watch appoints one. (Records stored before the
    /// rename carry the older keys; the aliases read them.)
    #[serde(alias = "leader")]
    pub front_runner: String,
    #[serde(alias = "leader_settled")]
    pub front_runner_settled: bool,
    /// "unknown", "detected" or "absent".
    pub heterogeneity: String,
    pub overlap_degraded: bool,
    pub looks: u64,
    pub units: u64,
    pub drift: Vec<Drift>,
}

/// A window's scores as one recompute left them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Board {
    pub dataset: String,
    pub window: Window,
    pub snapshot_id: u64,
    pub computed_at_ms: i64,
    pub units: u64,
    /// None when the window cannot support scores (see `degenerate`).
    pub ate: Option<Estimate>,
    /// Empty when degenerate.
    #[serde(alias = "leader")]
    pub front_runner: String,
    /// The front-runner's difference from constant-effect with an interval that
    /// allows for its selection; absent when degenerate or stored before it
    /// existed.
    #[serde(
        default,
        alias = "leader_vs_constant",
        skip_serializing_if = "Option::is_none"
    )]
    pub front_runner_vs_constant: Option<Adjusted>,
    /// Max-t critical value of the models' joint intervals.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub joint_critical_value: Option<f64>,
    pub best_set: Vec<String>,
    pub no_detectable_heterogeneity: bool,
    /// By rank.
    pub models: Vec<BoardModel>,
    pub incomplete: Vec<IncompleteModel>,
    pub overlap: Option<OverlapSummary>,
    pub nuisance: Vec<NuisanceComponent>,
    /// The pairs the board keeps: every pair among the top-ranked models
    /// (`pairwise_top`), then the front-runner against each of the others.
    pub pairwise: Vec<Pair>,
    /// Why the window has no scores; empty when it has.
    pub degenerate: String,
    pub caveat: String,
    /// The estimation pass's whole document (calibration bins, balance,
    /// nuisance candidates), as `plumbline score --format json` prints it.
    pub detail_json: String,
    /// Units behind AUTOC, Qini and the calibration slope, which may lag
    /// `units` between rank refreshes.
    pub rank_metrics_units: u64,
    pub alerts: Option<AlertView>,
    /// The part of the plug-in effect model's own error that the error
    /// bounds add to each model's corrected PEHE (a lower estimate of it,
    /// with its standard error); computed with the rank metrics, so as of
    /// `rank_metrics_units`. Absent when degenerate or stored before it
    /// existed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub plugin_error_projection: Option<Estimate>,
    /// The cross-fitted convex blend of the window's leading models; absent
    /// with fewer than two ranked models, when degenerate, or on boards
    /// stored before it existed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub blend: Option<BoardBlend>,
    /// On a contrast's board (one of `contrasts`), the arm compared with
    /// `reference_arm`; empty on a binary dataset's board and on the top
    /// board of a dataset with arms.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub arm: String,
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub reference_arm: String,
    /// On a dataset with arms: one board per arm other than the reference,
    /// in the arms' order (the top board then has no models of its own).
    /// Empty on a binary dataset, and on every board stored before arms.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub contrasts: Vec<Board>,
    /// On a dataset with arms: each model's arm choice, valued.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub arm_policy: Option<ArmPolicyBoard>,
}

/// The value of each model's arm choice on a window of a dataset with
/// arms, as [`crate::estimate::arms::ArmPolicyReport`] computes it (kept
/// here with an owned note, so a stored board reads back).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ArmPolicyBoard {
    /// Cost per arm, the reference first.
    pub costs: Vec<ArmCost>,
    /// Everyone the reference arm.
    pub reference_value: Valued,
    pub best_single_arm: String,
    pub best_single_arm_value: Valued,
    pub note: String,
    pub models: Vec<ArmPolicy>,
    pub pairwise: Vec<PolicyDifference>,
}

impl From<&ArmPolicyReport> for ArmPolicyBoard {
    fn from(r: &ArmPolicyReport) -> Self {
        Self {
            costs: r.costs.clone(),
            reference_value: r.reference_value,
            best_single_arm: r.best_single_arm.clone(),
            best_single_arm_value: r.best_single_arm_value,
            note: r.note.into(),
            models: r.models.clone(),
            pairwise: r.pairwise.clone(),
        }
    }
}

/// A window's blend: a convex combination of its leading ranked models
/// whose weights are fitted on the other folds of each fold's units, so its
/// error is estimated on units its weights never saw (see
/// `estimate::blend`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BoardBlend {
    /// The models with a nonzero weight fitted on every unit (the blend a
    /// user would deploy), largest first.
    pub weights: Vec<BlendShare>,
    /// Mean corrected PEHE of the held-out blend: a lower estimate of its
    /// PEHE, as for any model.
    pub corrected_pehe: f64,
    /// The registered model ranked first, which the blend is compared with.
    pub best_model: String,
    /// Corrected PEHE of the held-out blend minus `best_model`'s (below 0:
    /// the blend has lower error).
    pub vs_best: Difference,
    /// Corrected PEHE of the held-out blend minus constant-effect's.
    pub vs_constant: Difference,
    /// Ranked models the blend could take (at most the window's first
    /// `limits.max_blend_models` by rank).
    pub models_offered: u32,
}

/// One model's weight in a blend.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BlendShare {
    pub model: String,
    pub weight: f64,
}

impl Board {
    /// The difference of corrected PEHE between two ranked models, `first`
    /// minus `second`, if both are on the board.
    pub fn compare(&self, first: &str, second: &str) -> Option<Difference> {
        self.pairwise.iter().find_map(|p| {
            if p.first == first && p.second == second {
                Some(p.difference)
            } else if p.first == second && p.second == first {
                Some(p.difference.flipped())
            } else {
                None
            }
        })
    }

    /// The policy gain of `first` minus that of `second` when one of them
    /// is the front-runner (the board keeps every model's comparison with
    /// it), None otherwise.
    pub fn compare_policy(&self, first: &str, second: &str) -> Option<Difference> {
        let versus = |name: &str| {
            self.models
                .iter()
                .find(|m| m.name == name)
                .and_then(|m| m.policy_vs_front_runner)
        };
        if second == self.front_runner {
            versus(first)
        } else if first == self.front_runner {
            versus(second).map(Difference::flipped)
        } else {
            None
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_pair_read_backwards_flips_its_sign_and_interval() {
        let board = Board {
            dataset: "d".into(),
            window: Window::Cumulative,
            snapshot_id: 1,
            computed_at_ms: 0,
            units: 10,
            ate: None,
            front_runner: String::new(),
            front_runner_vs_constant: None,
            joint_critical_value: None,
            best_set: vec![],
            no_detectable_heterogeneity: true,
            models: vec![],
            incomplete: vec![],
            overlap: None,
            nuisance: vec![],
            pairwise: vec![Pair {
                first: "a".into(),
                second: "b".into(),
                difference: Difference {
                    estimate: 0.5,
                    se: 0.1,
                    ci_low: 0.3,
                    ci_high: 0.7,
                    p_value: 0.01,
                    joint: Some((0.2, 0.8)),
                },
            }],
            degenerate: String::new(),
            caveat: String::new(),
            detail_json: String::new(),
            rank_metrics_units: 10,
            alerts: None,
            plugin_error_projection: None,
            blend: None,
            arm: String::new(),
            reference_arm: String::new(),
            contrasts: Vec::new(),
            arm_policy: None,
        };
        let back = board.compare("b", "a").expect("pair");
        assert_eq!(
            (back.estimate, back.ci_low, back.ci_high),
            (-0.5, -0.7, -0.3)
        );
        assert_eq!(board.compare("a", "b").map(|d| d.estimate), Some(0.5));
        assert!(board.compare("a", "c").is_none());
    }

    /// Boards and alert views stored before the front-runner and draw-share
    /// names read back under the new ones.
    #[test]
    fn records_stored_under_the_older_keys_read_back() {
        let old = serde_json::json!({
            "dataset": "d", "window": "cumulative", "snapshot_id": 3, "computed_at_ms": 0,
            "units": 10, "ate": null, "leader": "m1",
            "leader_vs_constant": {"estimate": -0.5, "ci_low": -0.9, "ci_high": -0.1},
            "best_set": ["m1"], "no_detectable_heterogeneity": false,
            "models": [{
                "name": "m1", "baseline": false, "rank": 1, "scores": [],
                "vs_constant": {"estimate": -0.5, "se": 0.2, "ci_low": -0.9, "ci_high": -0.1,
                                "p_value": 0.01},
                "p_best": 0.75, "in_best_set": true, "treated_share": 0.5,
                "policy_gain": {"estimate": 0.1, "se": 0.05},
                "autoc": {"estimate": 0.1, "se": 0.05}, "qini": {"estimate": 0.1, "se": 0.05}
            }],
            "incomplete": [], "overlap": null, "nuisance": [], "pairwise": [],
            "degenerate": "", "caveat": "", "detail_json": "", "rank_metrics_units": 10,
            "alerts": {"leader": "m1", "leader_settled": true, "heterogeneity": "detected",
                       "overlap_degraded": false, "looks": 2, "units": 10, "drift": []}
        });
        let board: Board = serde_json::from_value(old).expect("an older board reads back");
        assert_eq!(board.front_runner, "m1");
        assert_eq!(
            board.front_runner_vs_constant.map(|a| a.estimate),
            Some(-0.5)
        );
        assert_eq!(board.models[0].draw_share, 0.75);
        let view = board.alerts.expect("alert view");
        assert_eq!(view.front_runner, "m1");
        assert!(view.front_runner_settled);
        // Written back, the new keys only.
        let text = serde_json::to_string(&board.models[0]).expect("encode");
        assert!(
            text.contains("draw_share") && !text.contains("p_best"),
            "{text}"
        );
    }

    #[test]
    fn window_keys() {
        assert_eq!(Window::Cohort("2026-w14".into()).key(), "cohort:2026-w14");
        assert_eq!(Window::Recent.key(), "recent");
    }
}
