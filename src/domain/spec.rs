//! A dataset's settings as the service keeps them, with defaults and checks.

use serde::{Deserialize, Serialize};

use crate::estimate::watch::WatchSettings;
use crate::estimate::OutcomeKind;

/// Settings of one dataset. Zero values on the wire mean "default"; once
/// stored, every field holds the value in force.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DatasetSpec {
    pub name: String,
    pub feature_names: Vec<String>,
    pub outcome_kind: OutcomeKind,
    pub treatment_cost: f64,
    pub folds: u32,
    pub overlap_eps: f64,
    pub overlap_max_extreme_share: f64,
    pub overlap_min_effective_share: f64,
    pub recent_last_outcomes: u32,
    pub recent_last_days: u32,
    pub recompute_every_outcomes: u32,
    pub recompute_every_seconds: u32,
    pub refit_growth: f64,
    pub refit_every_seconds: u32,
    /// The cumulative window's rank metrics are recomputed when it has
    /// grown by this share since they last were (specs stored before the
    /// setting existed read as the default).
    #[serde(default = "default_rank_refresh_growth")]
    pub rank_refresh_growth: f64,
    /// Recomputes over which an alert detector's chance of any false alarm
    /// is at most alpha (specs stored before the setting read as the
    /// default).
    #[serde(default = "default_alert_horizon")]
    pub alert_horizon: u32,
    pub min_coverage: f64,
    pub alpha: f64,
    pub seed: u64,
    /// The arms of a dataset with more than two, the reference first; empty
    /// for a binary dataset (treatment 0 or 1), as every spec stored before
    /// arms existed reads. A unit's arm is stored as its index here.
    #[serde(default)]
    pub arms: Vec<String>,
    /// Cost of giving a unit each arm, in outcome units, one per arm (the
    /// reference's first); empty: every arm costs 0. A binary dataset's
    /// cost stays in `treatment_cost`.
    #[serde(default)]
    pub arm_costs: Vec<f64>,
}

pub const DEFAULT_FOLDS: u32 = 5;
pub const DEFAULT_EPS: f64 = 0.05;
pub const DEFAULT_MAX_EXTREME_SHARE: f64 = 0.10;
pub const DEFAULT_MIN_EFFECTIVE_SHARE: f64 = 0.20;
pub const DEFAULT_RECENT_OUTCOMES: u32 = 5000;
pub const DEFAULT_EVERY_OUTCOMES: u32 = 1000;
pub const DEFAULT_EVERY_SECONDS: u32 = 60;
pub const DEFAULT_REFIT_GROWTH: f64 = 0.5;
pub const DEFAULT_RANK_REFRESH_GROWTH: f64 = 0.05;

fn default_rank_refresh_growth() -> f64 {
    DEFAULT_RANK_REFRESH_GROWTH
}
pub const DEFAULT_ALERT_HORIZON: u32 = 1000;

fn default_alert_horizon() -> u32 {
    DEFAULT_ALERT_HORIZON
}
pub const DEFAULT_MIN_COVERAGE: f64 = 0.95;
pub const DEFAULT_ALPHA: f64 = 0.05;

/// Most arms a dataset declares: a unit's arm is stored as a small index,
/// and each arm beyond the reference adds a board to every recompute.
pub const MAX_ARMS: usize = 32;

/// Longest dataset or model name.
pub const MAX_NAME_LEN: usize = 128;

/// Names are 1 to 128 characters of [A-Za-z0-9._-]: safe in URLs, metric
/// labels, file names and logs.
pub fn check_name(what: &str, name: &str) -> Result<(), String> {
    if name.is_empty() {
        return Err(format!("{what} is empty"));
    }
    if name.len() > MAX_NAME_LEN {
        return Err(format!(
            "{what} is {} characters long (at most {MAX_NAME_LEN})",
            name.len()
        ));
    }
    if let Some(c) = name
        .chars()
        .find(|c| !(c.is_ascii_alphanumeric() || matches!(c, '.' | '_' | '-')))
    {
        return Err(format!(
            "{what} contains {c:?}; use letters, digits, '.', '_' and '-'"
        ));
    }
    Ok(())
}

fn or_default<T: PartialEq + Default>(v: T, default: T) -> T {
    if v == T::default() {
        default
    } else {
        v
    }
}

impl DatasetSpec {
    /// A dataset with every other setting zero, which [`Self::normalized`]
    /// turns into its default (as on the wire).
    pub fn new(name: &str, feature_names: Vec<String>, outcome_kind: OutcomeKind) -> Self {
        Self {
            name: name.into(),
            feature_names,
            outcome_kind,
            treatment_cost: 0.0,
            folds: 0,
            overlap_eps: 0.0,
            overlap_max_extreme_share: 0.0,
            overlap_min_effective_share: 0.0,
            recent_last_outcomes: 0,
            recent_last_days: 0,
            recompute_every_outcomes: 0,
            recompute_every_seconds: 0,
            refit_growth: 0.0,
            refit_every_seconds: 0,
            rank_refresh_growth: 0.0,
            alert_horizon: 0,
            min_coverage: 0.0,
            alpha: 0.0,
            seed: 0,
            arms: Vec::new(),
            arm_costs: Vec::new(),
        }
    }

    /// Whether the dataset declares arms (more than two); false for a
    /// binary dataset.
    pub fn has_arms(&self) -> bool {
        !self.arms.is_empty()
    }

    /// One cost per arm, the reference's first (zeros when none given).
    pub fn costs_per_arm(&self) -> Vec<f64> {
        if self.arm_costs.is_empty() {
            vec![0.0; self.arms.len()]
        } else {
            self.arm_costs.clone()
        }
    }

    /// How the stream watch behind the alerts decides.
    pub fn watch_settings(&self) -> WatchSettings {
        WatchSettings {
            alpha: self.alpha,
            horizon: u64::from(self.alert_horizon),
            overlap_eps: self.overlap_eps,
            max_extreme_share: self.overlap_max_extreme_share,
            ..WatchSettings::default()
        }
    }

    /// Fills zero values with defaults and checks every field. The error
    /// names the field.
    pub fn normalized(mut self) -> Result<Self, (String, String)> {
        let bad = |field: &str, why: String| Err((field.to_string(), why));
        if let Err(e) = check_name("name", &self.name) {
            return bad("name", e);
        }
        if self.feature_names.is_empty() {
            return bad("feature_names", "at least one feature is required".into());
        }
        let mut seen = std::collections::HashSet::new();
        for (i, f) in self.feature_names.iter().enumerate() {
            if f.is_empty() || f.len() > MAX_NAME_LEN || f.chars().any(char::is_control) {
                return bad(
                    &format!("feature_names[{i}]"),
                    "must be 1 to 128 printable characters".into(),
                );
            }
            if !seen.insert(f.as_str()) {
                return bad(
                    &format!("feature_names[{i}]"),
                    format!("duplicate feature {f:?}"),
                );
            }
        }
        self.folds = or_default(self.folds, DEFAULT_FOLDS);
        self.overlap_eps = or_default(self.overlap_eps, DEFAULT_EPS);
        self.overlap_max_extreme_share =
            or_default(self.overlap_max_extreme_share, DEFAULT_MAX_EXTREME_SHARE);
        self.overlap_min_effective_share = or_default(
            self.overlap_min_effective_share,
            DEFAULT_MIN_EFFECTIVE_SHARE,
        );
        if self.recent_last_outcomes == 0 && self.recent_last_days == 0 {
            self.recent_last_outcomes = DEFAULT_RECENT_OUTCOMES;
        }
        self.recompute_every_outcomes =
            or_default(self.recompute_every_outcomes, DEFAULT_EVERY_OUTCOMES);
        self.recompute_every_seconds =
            or_default(self.recompute_every_seconds, DEFAULT_EVERY_SECONDS);
        self.refit_growth = or_default(self.refit_growth, DEFAULT_REFIT_GROWTH);
        self.rank_refresh_growth =
            or_default(self.rank_refresh_growth, DEFAULT_RANK_REFRESH_GROWTH);
        self.alert_horizon = or_default(self.alert_horizon, DEFAULT_ALERT_HORIZON);
        self.min_coverage = or_default(self.min_coverage, DEFAULT_MIN_COVERAGE);
        self.alpha = or_default(self.alpha, DEFAULT_ALPHA);

        if !self.treatment_cost.is_finite() {
            return bad("treatment_cost", "must be finite".into());
        }
        if !(2..=20).contains(&self.folds) {
            return bad("folds", format!("{} is outside 2..=20", self.folds));
        }
        if !(self.overlap_eps > 0.0 && self.overlap_eps < 0.5) {
            return bad(
                "overlap.eps",
                format!("{} is outside (0, 0.5)", self.overlap_eps),
            );
        }
        for (field, v) in [
            ("overlap.max_extreme_share", self.overlap_max_extreme_share),
            (
                "overlap.min_effective_share",
                self.overlap_min_effective_share,
            ),
            ("min_coverage", self.min_coverage),
        ] {
            if !(v > 0.0 && v <= 1.0) {
                return bad(field, format!("{v} is outside (0, 1]"));
            }
        }
        if !(self.refit_growth > 0.0 && self.refit_growth.is_finite()) {
            return bad(
                "recompute.refit_growth",
                format!("{} must be > 0", self.refit_growth),
            );
        }
        if !(self.rank_refresh_growth > 0.0 && self.rank_refresh_growth.is_finite()) {
            return bad(
                "recompute.rank_refresh_growth",
                format!("{} must be > 0", self.rank_refresh_growth),
            );
        }
        if !(self.alpha > 0.0 && self.alpha < 1.0) {
            return bad("alpha", format!("{} is outside (0, 1)", self.alpha));
        }
        self.check_arms()?;
        Ok(self)
    }

    /// Arms: none (binary), or 2 to [`MAX_ARMS`] distinct names (safe as
    /// names, so `MODEL:ARM` columns and metric labels stay unambiguous);
    /// costs none or one finite value per arm; a binary `treatment_cost`
    /// is refused beside arms, whose costs are per arm.
    fn check_arms(&self) -> Result<(), (String, String)> {
        let bad = |field: String, why: String| Err((field, why));
        if self.arms.is_empty() {
            if !self.arm_costs.is_empty() {
                return bad(
                    "arm_costs".into(),
                    "arm costs need declared arms (a binary dataset has treatment_cost)".into(),
                );
            }
            return Ok(());
        }
        if self.arms.len() < 2 || self.arms.len() > MAX_ARMS {
            return bad(
                "arms".into(),
                format!(
                    "{} arms; declare a reference arm and 1 to {} others",
                    self.arms.len(),
                    MAX_ARMS - 1
                ),
            );
        }
        for (j, a) in self.arms.iter().enumerate() {
            if let Err(e) = check_name("arm", a) {
                return bad(format!("arms[{j}]"), e);
            }
            if self.arms[..j].contains(a) {
                return bad(format!("arms[{j}]"), format!("arm {a:?} is declared twice"));
            }
        }
        if self.treatment_cost != 0.0 {
            return bad(
                "treatment_cost".into(),
                "is for two arms; with arms give arm_costs, one per arm".into(),
            );
        }
        if !self.arm_costs.is_empty() && self.arm_costs.len() != self.arms.len() {
            return bad(
                "arm_costs".into(),
                format!(
                    "{} costs for {} arms; give one per arm, the reference's first",
                    self.arm_costs.len(),
                    self.arms.len()
                ),
            );
        }
        if let Some(j) = self.arm_costs.iter().position(|c| !c.is_finite()) {
            return bad(format!("arm_costs[{j}]"), "must be finite".into());
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn with_arms(arms: &[&str], costs: &[f64], treatment_cost: f64) -> DatasetSpec {
        DatasetSpec {
            arms: arms.iter().map(|a| a.to_string()).collect(),
            arm_costs: costs.to_vec(),
            treatment_cost,
            ..DatasetSpec::new("d", vec!["x".into()], OutcomeKind::Continuous)
        }
    }

    #[test]
    fn arms_are_checked_and_named_in_the_refusal() {
        let ok = with_arms(&["none", "text", "mail"], &[0.0, 0.1, 0.3], 0.0)
            .normalized()
            .expect("valid arms");
        assert_eq!(ok.costs_per_arm(), vec![0.0, 0.1, 0.3]);
        let free = with_arms(&["a", "b"], &[], 0.0)
            .normalized()
            .expect("no costs");
        assert_eq!(free.costs_per_arm(), vec![0.0, 0.0]);
        for (spec, field) in [
            (with_arms(&["only"], &[], 0.0), "arms"),
            (with_arms(&["a", "a"], &[], 0.0), "arms[1]"),
            (with_arms(&["a", "b:c"], &[], 0.0), "arms[1]"),
            (with_arms(&["a", "b"], &[], 1.0), "treatment_cost"),
            (with_arms(&["a", "b"], &[0.0], 0.0), "arm_costs"),
            (
                with_arms(&["a", "b"], &[0.0, f64::NAN], 0.0),
                "arm_costs[1]",
            ),
            (with_arms(&[], &[0.5], 0.0), "arm_costs"),
        ] {
            let (got, why) = spec.normalized().expect_err(field);
            assert_eq!(got, field, "{why}");
        }
    }
}
