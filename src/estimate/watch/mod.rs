//! The stream watch: what the service's alerts may claim, computed from
//! per-unit values that are fixed once, when a unit is first scored.
//!
//! Each look (one recompute) hands the watch the units that arrived since
//! the last one, with nuisance values from models fitted only on units
//! that arrived before them (so every value is predictable: it depends on
//! the past alone, and later refits never rewrite it), and the active
//! models' predictions. From these the watch keeps, with the error rates
//! of [`super::sequential`] whatever the number of looks:
//!
//! - **the reported front-runner**: a challenger replaces it when a confidence
//!   sequence on the mean difference of their squared pseudo-outcome errors
//!   (since the front-runner was appointed) excludes zero in the challenger's
//!   favour, or when a change detector finds the difference has turned in
//!   the challenger's favour since some recent look. Half of alpha goes to
//!   each route, shared over the challengers. A change restarts both.
//! - **front-runner uncertain / settled**: a new front-runner is uncertain until the
//!   confidence sequence of every challenger excludes zero in its favour.
//!   Only a change of front-runner makes it uncertain again, so it cannot flap.
//! - **heterogeneity**: detected when a model's confidence sequence against
//!   constant-effect (the pseudo-outcomes' running mean, as of the look
//!   before) excludes zero in the model's favour; lost when a detector
//!   finds the front-runner's advantage has fallen below zero.
//! - **overlap**: degraded when a detector finds the share of units with a
//!   propensity outside [eps, 1 - eps] above the dataset's limit; recovered
//!   when the opposite detector finds it below. A share that sits at the
//!   limit raises nothing.
//! - **population drift**: each feature's and the propensity's mean among
//!   arriving units, standardized by a reference (the first
//!   [`DRIFT_REFERENCE_UNITS`] units watched, or since the last drift),
//!   against a tolerance of [`WatchSettings::drift_tolerance`] standard
//!   deviations in either direction.
//! - **misfit of the nuisance models**: the fitted propensity's calibration
//!   on arriving units (treated share minus mean propensity, and its
//!   covariance with each feature) and each arm's outcome residual mean,
//!   against a tolerance; a detection asks the service for a refit.
//!
//! Every decision comes with its [`Evidence`]: the estimate with its
//! confidence-sequence bounds, the units and looks it rests on, the
//! detector's statistic against its threshold, and the alpha it spends.
//!
//! This file holds the watch's state and folds a look through the checks,
//! one file each: `front_runner.rs`, `heterogeneity.rs`, `overlap.rs`,
//! `drift.rs` and `misfit.rs`. They share the vocabulary of `signal.rs`
//! (what a look decides and the evidence for it), the settings of
//! `settings.rs`, and `tracked.rs`, the running mean with a detector that
//! every check is built from.

mod arms;
mod drift;
mod front_runner;
mod heterogeneity;
mod misfit;
mod overlap;
mod settings;
mod signal;
mod tracked;

#[cfg(test)]
mod tests;

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use super::crossfit::Nuisance;
use super::pseudo::aipw_pseudo_outcome;
use super::stats::Moments;

pub use arms::{ArmArrivals, ArmSignal};
pub use drift::DRIFT_REFERENCE_UNITS;
pub use heterogeneity::Heterogeneity;
pub use settings::{
    WatchSettings, DEFAULT_DRIFT_TOLERANCE, DEFAULT_HORIZON, DEFAULT_OUTCOME_TOLERANCE,
    DEFAULT_PROPENSITY_TOLERANCE,
};
pub use signal::{Evidence, Route, Signal};

use drift::DriftWatch;
use front_runner::FrontRunnerWatch;
use heterogeneity::HeterogeneityWatch;
use misfit::FitWatch;
use overlap::OverlapWatch;

/// One look's newly scored units.
pub struct Arrivals<'a> {
    pub treatment: &'a [f64],
    pub outcome: &'a [f64],
    /// From models fitted only on earlier units (or logged).
    pub nuisance: &'a Nuisance,
    /// Whether the propensity was fitted (a logged one cannot go stale).
    pub propensity_fitted: bool,
    /// Row-major features, `features.len() / treatment.len()` per unit.
    pub features: &'a [f64],
    /// The features' names, for what the signals say.
    pub feature_names: &'a [String],
    /// The active models and their predicted effects (NaN: none).
    pub models: &'a [(String, Vec<f64>)],
}

/// One contrast's arrivals on a dataset with arms: its pseudo-outcomes
/// (Gamma_k - Gamma_0, from nuisance models fitted only on earlier units),
/// each unit's extreme-propensity indicator for the contrast (1 when e_0 or
/// e_k is below the overlap threshold), and the active models' predictions
/// of the contrast (NaN: none).
pub struct ContrastArrivals<'a> {
    pub pseudo: &'a [f64],
    pub extreme: &'a [f64],
    pub models: &'a [(String, Vec<f64>)],
}

/// The watch of one dataset's stream; small (a few numbers per model), kept
/// with every snapshot so that a restart resumes it.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct Watch {
    pub looks: u64,
    /// Units watched: the first `units` outcomes to arrive (the service
    /// resumes after them).
    pub units: u64,
    /// Units that were only used to fit the first nuisance models.
    pub baseline_units: u64,
    /// Every watched pseudo-outcome: constant-effect predicts their mean
    /// as of the look before.
    ate: Moments,
    /// Watched outcomes, for the residual tolerance's scale.
    outcome: Moments,
    /// Watched features, to standardize them in the calibration checks.
    features: Vec<Moments>,
    /// (Stored watches from before the rename carry the key `leader`.)
    #[serde(alias = "leader")]
    front_runner: Option<FrontRunnerWatch>,
    heterogeneity: HeterogeneityWatch,
    overlap: OverlapWatch,
    fit: FitWatch,
    #[serde(default)]
    drift: DriftWatch,
    /// On a dataset with arms, one watch per contrast, by its arm (this
    /// watch then counts the looks and units, and checks nothing itself).
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub contrasts: BTreeMap<String, Watch>,
}

/// The public state of a watch, for boards and metrics.
#[derive(Debug, Clone, PartialEq)]
pub struct WatchState {
    pub front_runner: Option<String>,
    pub front_runner_settled: bool,
    pub heterogeneity: Heterogeneity,
    pub overlap_degraded: bool,
    pub looks: u64,
    pub units: u64,
    pub baseline_units: u64,
    /// Per feature, then the propensity: the standardized mean difference
    /// of the units watched since the drift reference was complete (empty
    /// until it is).
    pub drift: Vec<(String, f64)>,
}

impl Watch {
    pub fn state(&self) -> WatchState {
        WatchState {
            front_runner: self.front_runner.as_ref().map(|l| l.name.clone()),
            front_runner_settled: self
                .front_runner
                .as_ref()
                .is_some_and(|l| l.settled || !l.contested),
            heterogeneity: self.heterogeneity.state,
            overlap_degraded: self.overlap.degraded,
            looks: self.looks,
            units: self.units,
            baseline_units: self.baseline_units,
            drift: self
                .drift
                .checks
                .iter()
                .filter_map(|(key, t)| {
                    key.strip_suffix(" up")
                        .map(|q| (q.to_string(), t.since.mean()))
                })
                .collect(),
        }
    }

    /// Units that arrived before any nuisance fit existed: they fit the
    /// first models and are never watched.
    pub fn skip_baseline(&mut self, units: u64) {
        self.units += units;
        self.baseline_units += units;
    }

    /// The misfit checks restart, after any refit. It is all a refit of a
    /// dataset with arms changes here: that watch's drift checks watch
    /// only the features, which a refit does not move.
    pub fn restart_fit_checks(&mut self) {
        self.fit = FitWatch::default();
    }

    /// The nuisance models were refitted: the misfit checks restart.
    pub fn refitted(&mut self) {
        self.restart_fit_checks();
        // A new propensity model moves the fitted propensities by itself:
        // their drift reference starts again from the new model's values.
        if let Some(r) = self.drift.reference.last_mut() {
            *r = Moments::default();
        }
        self.drift
            .checks
            .retain(|k, _| !k.starts_with("propensity "));
    }

    /// Folds one look in. Returns what it decided; a
    /// [`Signal::NuisanceMisfit`] asks for a refit.
    pub fn observe(&mut self, a: &Arrivals<'_>, s: &WatchSettings) -> Vec<Signal> {
        let n = a.treatment.len();
        self.units += n as u64;
        if n == 0 {
            return Vec::new();
        }
        self.looks += 1;
        let phi = aipw_pseudo_outcome(a.outcome, a.treatment, a.nuisance);
        let mut out = Vec::new();
        self.check_fit(a, s, &mut out);
        self.check_overlap(a, s, &mut out);
        self.check_drift(a, s, &mut out);
        self.judge_models(&phi, a.models, s, &mut out);
        self.ate.merge(&Moments::of(&phi));
        self.remember(a.outcome, a.features, n);
        out
    }

    /// Merges a look's outcomes and features (row-major, `n` rows) into the
    /// scales the misfit checks use.
    fn remember(&mut self, outcome: &[f64], features: &[f64], n: usize) {
        self.outcome.merge(&Moments::of(outcome));
        let d = features.len().checked_div(n).unwrap_or(0);
        if self.features.len() != d {
            self.features = vec![Moments::default(); d];
        }
        for (j, m) in self.features.iter_mut().enumerate() {
            let column: Vec<f64> = (0..n).map(|i| features[i * d + j]).collect();
            m.merge(&Moments::of(&column));
        }
    }

    /// Folds one contrast's look in (a watch in [`Watch::contrasts`]): the
    /// front-runner, heterogeneity and overlap checks on the values given.
    pub fn observe_contrast(&mut self, a: &ContrastArrivals<'_>, s: &WatchSettings) -> Vec<Signal> {
        let n = a.pseudo.len();
        self.units += n as u64;
        if n == 0 {
            return Vec::new();
        }
        self.looks += 1;
        let mut out = Vec::new();
        self.check_extreme_share(a.extreme, s, &mut out);
        self.judge_models(a.pseudo, a.models, s, &mut out);
        self.ate.merge(&Moments::of(a.pseudo));
        out
    }

    /// The front-runner and heterogeneity checks on one look's
    /// pseudo-outcomes `phi` and the models' predictions.
    fn judge_models(
        &mut self,
        phi: &[f64],
        models: &[(String, Vec<f64>)],
        s: &WatchSettings,
        out: &mut Vec<Signal>,
    ) {
        // Squared pseudo-outcome errors: differences of them are the
        // differences of corrected PEHE contributions.
        let losses: Vec<(&str, Vec<f64>)> = models
            .iter()
            .map(|(name, effects)| {
                let l = phi
                    .iter()
                    .zip(effects)
                    .map(|(p, e)| {
                        if e.is_nan() {
                            f64::NAN
                        } else {
                            (p - e).powi(2)
                        }
                    })
                    .collect();
                (name.as_str(), l)
            })
            .filter(|(_, l): &(&str, Vec<f64>)| l.iter().any(|v| !v.is_nan()))
            .collect();
        self.check_front_runner(&losses, models, s, out);
        if self.ate.count() >= 2 {
            let constant = self.ate.mean();
            let baseline: Vec<f64> = phi.iter().map(|p| (p - constant).powi(2)).collect();
            let front_runner = self.front_runner.as_ref().map(|l| l.name.clone());
            self.check_heterogeneity(&losses, &baseline, front_runner.as_deref(), s, out);
        }
    }
}

fn feature_name(names: &[String], j: usize) -> String {
    names
        .get(j)
        .cloned()
        .unwrap_or_else(|| format!("feature {}", j + 1))
}
