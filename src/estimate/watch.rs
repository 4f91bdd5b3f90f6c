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
//! - **the reported leader**: a challenger replaces it when a confidence
//!   sequence on the mean difference of their squared pseudo-outcome errors
//!   (since the leader was appointed) excludes zero in the challenger's
//!   favour, or when a change detector finds the difference has turned in
//!   the challenger's favour since some recent look. Half of alpha goes to
//!   each route, shared over the challengers. A change restarts both.
//! - **leader uncertain / settled**: a new leader is uncertain until the
//!   confidence sequence of every challenger excludes zero in its favour.
//!   Only a change of leader makes it uncertain again, so it cannot flap.
//! - **heterogeneity**: detected when a model's confidence sequence against
//!   constant-effect (the pseudo-outcomes' running mean, as of the look
//!   before) excludes zero in the model's favour; lost when a detector
//!   finds the leader's advantage has fallen below zero.
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

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use super::crossfit::Nuisance;
use super::pseudo::aipw_pseudo_outcome;
use super::sequential::{
    bounded_log_e, cs_radius, gaussian_log_e, indicator_log_e, log_threshold, BatchSums, Detector,
    Side,
};
use super::stats::Moments;

/// How a watch decides.
#[derive(Debug, Clone, PartialEq)]
pub struct WatchSettings {
    /// Each family of alerts (leader, heterogeneity, overlap, misfit)
    /// keeps its false-alarm probability at most this.
    pub alpha: f64,
    /// Looks over which a detector's false-alarm probability is at most
    /// its share of alpha (its average run length to a false alarm is at
    /// least `horizon` / that share).
    pub horizon: u64,
    pub overlap_eps: f64,
    pub max_extreme_share: f64,
    /// Calibration the fitted propensity may lose before it is stale: the
    /// treated share minus the mean propensity, and their covariance with
    /// a standardized feature.
    pub propensity_tolerance: f64,
    /// Shift of an arm's mean outcome residual, in outcome standard
    /// deviations, the outcome models may show before they are stale.
    pub outcome_tolerance: f64,
    /// Standardized mean difference of a feature or the propensity, between
    /// arriving units and the reference, that counts as drift.
    pub drift_tolerance: f64,
}

pub const DEFAULT_HORIZON: u64 = 1000;
pub const DEFAULT_PROPENSITY_TOLERANCE: f64 = 0.02;
pub const DEFAULT_OUTCOME_TOLERANCE: f64 = 0.1;
/// 0.1 standard deviations: the usual line for a meaningful imbalance
/// between two groups (Austin 2009; common practice).
pub const DEFAULT_DRIFT_TOLERANCE: f64 = 0.1;
/// Units the drift reference holds: the noise of its means, about 0.014
/// standard deviations, stays well inside the tolerance.
pub const DRIFT_REFERENCE_UNITS: u64 = 5000;

impl Default for WatchSettings {
    fn default() -> Self {
        Self {
            alpha: 0.05,
            horizon: DEFAULT_HORIZON,
            overlap_eps: 0.05,
            max_extreme_share: 0.10,
            propensity_tolerance: DEFAULT_PROPENSITY_TOLERANCE,
            outcome_tolerance: DEFAULT_OUTCOME_TOLERANCE,
            drift_tolerance: DEFAULT_DRIFT_TOLERANCE,
        }
    }
}

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

/// Why a decision was taken.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Route {
    /// A confidence sequence's bound crossed.
    Sequence,
    /// A change detector crossed its threshold.
    Detector,
    /// The reported leader no longer predicts.
    Gone,
}

/// What a decision rests on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Evidence {
    pub route: Route,
    /// The mean of the watched quantity since its sequence started, or for
    /// a detector since the change it dates (the looks since the running
    /// sum of deviations from the threshold was last at its minimum).
    pub estimate: f64,
    /// Its confidence-sequence bounds at the alpha spent on sequences
    /// (over a detector's dated stretch they describe, they do not test:
    /// the stretch was chosen by the data).
    pub lower: f64,
    pub upper: f64,
    pub units: u64,
    /// Looks since the sequence or detector started.
    pub looks: u64,
    /// ln of the detector's statistic and of its threshold (the detector
    /// fires at or above it).
    pub log_statistic: f64,
    pub log_threshold: f64,
    /// The threshold the quantity is compared with.
    pub threshold: f64,
    /// The alpha this one test spends (its share of the family's).
    pub alpha: f64,
}

/// What a look decided.
#[derive(Debug, Clone, PartialEq)]
pub enum Signal {
    /// The first leader: no event, the watch has just started.
    LeaderAppointed {
        leader: String,
    },
    /// `evidence` is on the difference old minus new in squared error
    /// (positive: the new leader errs less).
    LeaderChanged {
        old: String,
        new: String,
        evidence: Evidence,
    },
    /// The leader is not yet separated from these challengers.
    LeaderUncertain {
        leader: String,
        tied: Vec<String>,
    },
    /// Every challenger is separated from the leader.
    LeaderSettled {
        leader: String,
    },
    /// `evidence` is on constant-effect's error minus the model's.
    HeterogeneityDetected {
        model: String,
        evidence: Evidence,
    },
    /// The leader's advantage over constant-effect has gone.
    HeterogeneityLost {
        model: String,
        evidence: Evidence,
    },
    /// `evidence` is on the extreme-propensity share.
    OverlapDegraded {
        evidence: Evidence,
    },
    OverlapRecovered {
        evidence: Evidence,
    },
    /// `component` names the fit and the check that failed.
    NuisanceMisfit {
        component: String,
        evidence: Evidence,
    },
    /// `evidence` is on the standardized mean of `quantity` (a feature's
    /// name or "propensity") among arriving units, against the reference.
    PopulationDrift {
        quantity: String,
        evidence: Evidence,
    },
}

/// A running mean with a detector on it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct Tracked {
    since: Moments,
    detector: Detector,
    /// The looks since the running sum of the deviations from the
    /// threshold (signed by the detector's side) was last at its minimum:
    /// the stretch a CUSUM would date a change from. A detector's evidence
    /// reports the mean over it.
    #[serde(default)]
    stretch: Moments,
}

impl Tracked {
    fn new(side: Side) -> Self {
        Self {
            since: Moments::default(),
            detector: Detector::new(side),
            stretch: Moments::default(),
        }
    }

    fn fold_stretch(&mut self, values: &[f64], theta: f64) {
        self.stretch.merge(&Moments::of(values));
        let sign = match self.detector.side {
            Side::Above => 1.0,
            Side::Below => -1.0,
        };
        if sign * (self.stretch.mean() - theta) <= 0.0 {
            self.stretch = Moments::default();
        }
    }

    /// Folds a look of unbounded values in; the detector's grid is placed
    /// by the standard deviation of the earlier looks (the first look only
    /// sets it).
    fn fold_gaussian(&mut self, values: &[f64], theta: f64) {
        if values.is_empty() {
            return;
        }
        if self.since.count() >= 2 && self.since.sd() > 0.0 {
            let log_e = gaussian_log_e(
                &BatchSums::of(values.iter().copied()),
                theta,
                self.since.sd(),
                self.detector.side,
            );
            self.detector.update(&log_e);
        }
        self.since.merge(&Moments::of(values));
        self.fold_stretch(values, theta);
    }

    fn fold_indicators(&mut self, values: &[f64], theta: f64) {
        if values.is_empty() {
            return;
        }
        let ones = values.iter().filter(|&&v| v == 1.0).count() as u64;
        self.detector.update(&indicator_log_e(
            ones,
            values.len() as u64,
            theta,
            self.detector.side,
        ));
        self.since.merge(&Moments::of(values));
        self.fold_stretch(values, theta);
    }

    fn fold_bounded(&mut self, values: &[f64], theta: f64, lo: f64, hi: f64) {
        if values.is_empty() {
            return;
        }
        self.detector
            .update(&bounded_log_e(values, theta, lo, hi, self.detector.side));
        self.since.merge(&Moments::of(values));
        self.fold_stretch(values, theta);
    }

    fn evidence(
        &self,
        route: Route,
        threshold: f64,
        cs_alpha: f64,
        log_threshold: f64,
        alpha: f64,
    ) -> Evidence {
        // A detector dates the change: its evidence is the stretch since.
        let m = match route {
            Route::Detector if self.stretch.count() > 0 => &self.stretch,
            _ => &self.since,
        };
        let r = cs_radius(m.count(), m.sd(), cs_alpha);
        Evidence {
            route,
            estimate: m.mean(),
            lower: m.mean() - r,
            upper: m.mean() + r,
            units: m.count(),
            looks: self.detector.looks,
            log_statistic: self.detector.log_statistic(),
            log_threshold,
            threshold,
            alpha,
        }
    }

    fn fired(&self, log_threshold: f64) -> bool {
        self.detector.log_statistic() >= log_threshold
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct LeaderWatch {
    name: String,
    settled: bool,
    /// Per challenger: the leader's squared error minus the challenger's
    /// (positive: the challenger errs less), since the appointment.
    pairs: BTreeMap<String, Tracked>,
    /// Another model has predicted since the appointment: with none, there
    /// is nothing to be uncertain about.
    #[serde(default)]
    contested: bool,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Heterogeneity {
    /// No evidence either way yet.
    #[default]
    Unknown,
    Detected,
    /// Detected once, then lost.
    Absent,
}

#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
struct HeterogeneityWatch {
    state: Heterogeneity,
    /// Per model: constant-effect's squared error minus the model's, since
    /// the state was entered (while not detected).
    models: BTreeMap<String, Moments>,
    /// While detected: the model that showed it and its advantage.
    lead: Option<(String, Tracked)>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct OverlapWatch {
    degraded: bool,
    /// The extreme-propensity indicator since the state was entered.
    share: Tracked,
}

impl Default for OverlapWatch {
    fn default() -> Self {
        Self {
            degraded: false,
            share: Tracked::new(Side::Above),
        }
    }
}

/// Drift of the arriving units from a reference population.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
struct DriftWatch {
    /// Per feature, then the propensity: the reference's moments, taken
    /// from the first [`DRIFT_REFERENCE_UNITS`] units after a (re)start
    /// (for the propensity, also after each refit).
    reference: Vec<Moments>,
    checks: BTreeMap<String, Tracked>,
}

/// Misfit detectors of the current nuisance fit, named by what they check.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
struct FitWatch {
    checks: BTreeMap<String, Tracked>,
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
    leader: Option<LeaderWatch>,
    heterogeneity: HeterogeneityWatch,
    overlap: OverlapWatch,
    fit: FitWatch,
    #[serde(default)]
    drift: DriftWatch,
}

/// The public state of a watch, for boards and metrics.
#[derive(Debug, Clone, PartialEq)]
pub struct WatchState {
    pub leader: Option<String>,
    pub leader_settled: bool,
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
            leader: self.leader.as_ref().map(|l| l.name.clone()),
            leader_settled: self
                .leader
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

    /// The nuisance models were refitted: the misfit checks restart.
    pub fn refitted(&mut self) {
        self.fit = FitWatch::default();
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
        // Squared pseudo-outcome errors: differences of them are the
        // differences of corrected PEHE contributions.
        let losses: Vec<(&str, Vec<f64>)> = a
            .models
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
        self.check_leader(&losses, a.models, s, &mut out);
        if self.ate.count() >= 2 {
            let constant = self.ate.mean();
            let baseline: Vec<f64> = phi.iter().map(|p| (p - constant).powi(2)).collect();
            let leader = self.leader.as_ref().map(|l| l.name.clone());
            self.check_heterogeneity(&losses, &baseline, leader.as_deref(), s, &mut out);
        }
        self.ate.merge(&Moments::of(&phi));
        self.outcome.merge(&Moments::of(a.outcome));
        let d = a.features.len().checked_div(n).unwrap_or(0);
        if self.features.len() != d {
            self.features = vec![Moments::default(); d];
        }
        for (j, m) in self.features.iter_mut().enumerate() {
            let column: Vec<f64> = (0..n).map(|i| a.features[i * d + j]).collect();
            m.merge(&Moments::of(&column));
        }
        out
    }

    fn check_leader(
        &mut self,
        losses: &[(&str, Vec<f64>)],
        active: &[(String, Vec<f64>)],
        s: &WatchSettings,
        out: &mut Vec<Signal>,
    ) {
        let Some(leader) = self.leader.as_mut() else {
            // Appoint the model with the lowest mean error on this look.
            let best = losses
                .iter()
                .map(|(name, l)| (*name, mean_present(l)))
                .filter(|(_, m)| m.is_finite())
                .min_by(|a, b| a.1.total_cmp(&b.1));
            if let Some((name, _)) = best {
                self.leader = Some(LeaderWatch {
                    name: name.to_string(),
                    settled: false,
                    pairs: BTreeMap::new(),
                    contested: losses.len() > 1,
                });
                out.push(Signal::LeaderAppointed {
                    leader: name.to_string(),
                });
                if losses.len() > 1 {
                    out.push(Signal::LeaderUncertain {
                        leader: name.to_string(),
                        tied: losses
                            .iter()
                            .map(|(n, _)| n.to_string())
                            .filter(|n| n != name)
                            .collect(),
                    });
                }
            }
            return;
        };
        let Some(leader_losses) = losses
            .iter()
            .find(|(n, _)| *n == leader.name)
            .map(|(_, l)| l)
        else {
            if active.iter().any(|(n, _)| *n == leader.name) {
                // Still active, but no prediction for these units (a late
                // or failed batch of its predictions): nothing to compare.
                return;
            }
            // The leader was retired: the best challenger so far takes
            // over.
            let next = leader
                .pairs
                .iter()
                .filter(|(n, _)| losses.iter().any(|(m, _)| m == n))
                .max_by(|a, b| a.1.since.mean().total_cmp(&b.1.since.mean()))
                .map(|(n, t)| (n.clone(), t.clone()))
                .or_else(|| {
                    losses
                        .first()
                        .map(|(n, _)| (n.to_string(), Tracked::new(Side::Above)))
                });
            if let Some((name, tracked)) = next {
                let old = leader.name.clone();
                let evidence = tracked.evidence(Route::Gone, 0.0, 1.0, f64::INFINITY, 0.0);
                self.appoint(name.clone(), losses.len() > 1);
                out.push(Signal::LeaderChanged {
                    old,
                    new: name,
                    evidence,
                });
            }
            return;
        };
        let challengers = losses.len().saturating_sub(1).max(1);
        let cs_alpha = s.alpha / 2.0 / challengers as f64;
        let log_a = log_threshold(s.alpha / 2.0, s.horizon, challengers);
        for (name, l) in losses {
            if *name == leader.name {
                continue;
            }
            let d: Vec<f64> = leader_losses
                .iter()
                .zip(l)
                .filter(|(a, b)| !a.is_nan() && !b.is_nan())
                .map(|(a, b)| a - b)
                .collect();
            leader
                .pairs
                .entry(name.to_string())
                .or_insert_with(|| Tracked::new(Side::Above))
                .fold_gaussian(&d, 0.0);
        }
        // Challengers that are still predicting, with their evidence.
        let mut best: Option<(String, Evidence, f64)> = None;
        let mut tied = Vec::new();
        for (name, t) in &leader.pairs {
            if !losses.iter().any(|(n, _)| n == name) {
                continue;
            }
            let r = cs_radius(t.since.count(), t.since.sd(), cs_alpha);
            let m = t.since.mean();
            let route = if m - r > 0.0 {
                Some(Route::Sequence)
            } else if t.fired(log_a) {
                Some(Route::Detector)
            } else {
                None
            };
            if m + r >= 0.0 {
                tied.push(name.clone());
            }
            if let Some(route) = route {
                let strength = match route {
                    Route::Sequence => (m - r) / r.max(f64::MIN_POSITIVE),
                    _ => t.detector.log_statistic() - log_a,
                };
                if best.as_ref().is_none_or(|(_, _, b)| strength > *b) {
                    best = Some((
                        name.clone(),
                        t.evidence(
                            route,
                            0.0,
                            cs_alpha,
                            log_a,
                            s.alpha / 2.0 / challengers as f64,
                        ),
                        strength,
                    ));
                }
            }
        }
        if let Some((new, evidence, _)) = best {
            let old = leader.name.clone();
            self.appoint(new.clone(), losses.len() > 1);
            out.push(Signal::LeaderChanged {
                old,
                new: new.clone(),
                evidence,
            });
            if losses.len() > 1 {
                out.push(Signal::LeaderUncertain {
                    leader: new.clone(),
                    tied: losses
                        .iter()
                        .map(|(n, _)| n.to_string())
                        .filter(|n| *n != new)
                        .collect(),
                });
            }
            return;
        }
        leader.contested |= !leader.pairs.is_empty();
        if !leader.settled && tied.is_empty() && !leader.pairs.is_empty() {
            leader.settled = true;
            out.push(Signal::LeaderSettled {
                leader: leader.name.clone(),
            });
        }
    }

    fn appoint(&mut self, name: String, contested: bool) {
        self.leader = Some(LeaderWatch {
            name,
            settled: false,
            pairs: BTreeMap::new(),
            contested,
        });
    }

    fn check_heterogeneity(
        &mut self,
        losses: &[(&str, Vec<f64>)],
        baseline: &[f64],
        leader: Option<&str>,
        s: &WatchSettings,
        out: &mut Vec<Signal>,
    ) {
        let advantage = |l: &[f64]| -> Vec<f64> {
            baseline
                .iter()
                .zip(l)
                .filter(|(_, v)| !v.is_nan())
                .map(|(b, v)| b - v)
                .collect()
        };
        let h = &mut self.heterogeneity;
        let log_a = log_threshold(s.alpha / 2.0, s.horizon, 1);
        match h.state {
            Heterogeneity::Detected => {
                // The advantage watched is the reported leader's: when the
                // leader changes, its own advantage is watched from here on
                // (the first look places the detector's grid).
                if let Some(leader) = leader.filter(|l| losses.iter().any(|(n, _)| n == l)) {
                    if h.lead.as_ref().is_none_or(|(m, _)| m != leader) {
                        h.lead = Some((leader.to_string(), Tracked::new(Side::Below)));
                    }
                }
                let Some((model, tracked)) = h.lead.as_mut() else {
                    return;
                };
                let Some((_, l)) = losses.iter().find(|(n, _)| n == model) else {
                    // The model that showed it is gone: look again.
                    h.state = Heterogeneity::Unknown;
                    h.lead = None;
                    return;
                };
                tracked.fold_gaussian(&advantage(l), 0.0);
                if tracked.fired(log_a) {
                    let evidence =
                        tracked.evidence(Route::Detector, 0.0, s.alpha / 2.0, log_a, s.alpha / 2.0);
                    out.push(Signal::HeterogeneityLost {
                        model: model.clone(),
                        evidence,
                    });
                    h.state = Heterogeneity::Absent;
                    h.lead = None;
                    h.models.clear();
                }
            }
            Heterogeneity::Unknown | Heterogeneity::Absent => {
                let cs_alpha = s.alpha / 2.0 / losses.len().max(1) as f64;
                let mut best: Option<(String, f64)> = None;
                for (name, l) in losses {
                    let m = h.models.entry(name.to_string()).or_default();
                    m.merge(&Moments::of(&advantage(l)));
                    let lower = m.mean() - cs_radius(m.count(), m.sd(), cs_alpha);
                    if lower > 0.0 && best.as_ref().is_none_or(|(_, b)| lower > *b) {
                        best = Some((name.to_string(), lower));
                    }
                }
                if let Some((model, _)) = best {
                    // The loss detector starts from the advantage so far,
                    // which places its grid.
                    let mut tracked = Tracked::new(Side::Below);
                    tracked.since = h.models.get(&model).copied().unwrap_or_default();
                    out.push(Signal::HeterogeneityDetected {
                        model: model.clone(),
                        evidence: tracked.evidence(
                            Route::Sequence,
                            0.0,
                            cs_alpha,
                            f64::NAN,
                            cs_alpha,
                        ),
                    });
                    h.state = Heterogeneity::Detected;
                    h.lead = Some((model, tracked));
                    h.models.clear();
                }
            }
        }
    }

    fn check_overlap(&mut self, a: &Arrivals<'_>, s: &WatchSettings, out: &mut Vec<Signal>) {
        let eps = s.overlap_eps;
        let extreme: Vec<f64> = a
            .nuisance
            .propensity
            .iter()
            .map(|&p| f64::from(u8::from(p < eps || p > 1.0 - eps)))
            .collect();
        let o = &mut self.overlap;
        o.share.fold_indicators(&extreme, s.max_extreme_share);
        let log_a = log_threshold(s.alpha, s.horizon, 1);
        if o.share.fired(log_a) {
            let evidence = o.share.evidence(
                Route::Detector,
                s.max_extreme_share,
                s.alpha,
                log_a,
                s.alpha,
            );
            o.degraded = !o.degraded;
            out.push(if o.degraded {
                Signal::OverlapDegraded { evidence }
            } else {
                Signal::OverlapRecovered { evidence }
            });
            o.share = Tracked::new(if o.degraded { Side::Below } else { Side::Above });
        }
    }

    fn check_drift(&mut self, a: &Arrivals<'_>, s: &WatchSettings, out: &mut Vec<Signal>) {
        let n = a.treatment.len();
        let d = a.features.len().checked_div(n).unwrap_or(0);
        let column = |j: usize| -> Vec<f64> {
            if j < d {
                (0..n).map(|i| a.features[i * d + j]).collect()
            } else {
                a.nuisance.propensity.clone()
            }
        };
        let name = |j: usize| -> String {
            if j < d {
                feature_name(a.feature_names, j)
            } else {
                "propensity".into()
            }
        };
        let w = &mut self.drift;
        if w.reference.len() != d + 1 {
            *w = DriftWatch {
                reference: vec![Moments::default(); d + 1],
                checks: BTreeMap::new(),
            };
        }
        let log_a = log_threshold(s.alpha, s.horizon, 2 * (d + 1));
        let alpha = s.alpha / (2 * (d + 1)) as f64;
        let tol = s.drift_tolerance;
        let mut fired = None;
        for j in 0..=d {
            // Until a quantity's reference is complete, the look builds it.
            if w.reference[j].count() < DRIFT_REFERENCE_UNITS {
                w.reference[j].merge(&Moments::of(&column(j)));
                continue;
            }
            let (mean, sd) = (w.reference[j].mean(), w.reference[j].sd());
            if sd <= 0.0 {
                continue;
            }
            let z: Vec<f64> = column(j).iter().map(|v| (v - mean) / sd).collect();
            for (side, theta, label) in [(Side::Above, tol, "up"), (Side::Below, -tol, "down")] {
                let t = w
                    .checks
                    .entry(format!("{} {label}", name(j)))
                    .or_insert_with(|| Tracked::new(side));
                t.fold_gaussian(&z, theta);
                if fired.is_none() && t.fired(log_a) {
                    fired = Some(Signal::PopulationDrift {
                        quantity: name(j),
                        evidence: t.evidence(Route::Detector, theta, alpha, log_a, alpha),
                    });
                }
            }
        }
        if let Some(signal) = fired {
            out.push(signal);
            // The population has moved: a new reference from here on.
            *w = DriftWatch::default();
        }
    }

    fn check_fit(&mut self, a: &Arrivals<'_>, s: &WatchSettings, out: &mut Vec<Signal>) {
        let n = a.treatment.len();
        let d = a.features.len().checked_div(n).unwrap_or(0);
        // Until the scales are known (a look of history), nothing is checked.
        if self.outcome.count() < 2 {
            return;
        }
        let p = &a.nuisance.propensity;
        let mut checks: Vec<(String, Side, f64, Vec<f64>, bool)> = Vec::new();
        let tol = s.propensity_tolerance;
        if a.propensity_fitted {
            let gap: Vec<f64> = (0..n).map(|i| a.treatment[i] - p[i]).collect();
            checks.push((
                "propensity: treated share".into(),
                Side::Above,
                tol,
                gap.clone(),
                true,
            ));
            checks.push((
                "propensity: treated share".into(),
                Side::Below,
                -tol,
                gap.clone(),
                true,
            ));
            if self.features.len() == d {
                for (j, m) in self.features.iter().enumerate() {
                    let sd = m.sd();
                    if sd <= 0.0 {
                        continue;
                    }
                    let cov: Vec<f64> = (0..n)
                        .map(|i| gap[i] * (a.features[i * d + j] - m.mean()) / sd)
                        .collect();
                    let name = format!("propensity: {}", feature_name(a.feature_names, j));
                    checks.push((name.clone(), Side::Above, tol, cov.clone(), false));
                    checks.push((name, Side::Below, -tol, cov, false));
                }
            }
        }
        let scale = self.outcome.sd();
        if scale > 0.0 {
            for (arm, label) in [(0.0, "outcome: control arm"), (1.0, "outcome: treated arm")] {
                let r: Vec<f64> = (0..n)
                    .filter(|&i| a.treatment[i] == arm)
                    .map(|i| {
                        let mu = if arm == 1.0 {
                            a.nuisance.mu1[i]
                        } else {
                            a.nuisance.mu0[i]
                        };
                        (a.outcome[i] - mu) / scale
                    })
                    .collect();
                let tol = s.outcome_tolerance;
                checks.push((label.into(), Side::Above, tol, r.clone(), false));
                checks.push((label.into(), Side::Below, -tol, r, false));
            }
        }
        let count = checks.len();
        let log_a = log_threshold(s.alpha, s.horizon, count);
        let mut fired = None;
        for (name, side, theta, values, bounded) in checks {
            let key = format!(
                "{name} {}",
                if side == Side::Above {
                    "above"
                } else {
                    "below"
                }
            );
            let t = self
                .fit
                .checks
                .entry(key)
                .or_insert_with(|| Tracked::new(side));
            if bounded {
                t.fold_bounded(&values, theta, -1.0, 1.0);
            } else {
                t.fold_gaussian(&values, theta);
            }
            if fired.is_none() && t.fired(log_a) {
                fired = Some(Signal::NuisanceMisfit {
                    component: name,
                    evidence: t.evidence(
                        Route::Detector,
                        theta,
                        s.alpha / count as f64,
                        log_a,
                        s.alpha / count as f64,
                    ),
                });
            }
        }
        if let Some(signal) = fired {
            out.push(signal);
        }
    }
}

fn feature_name(names: &[String], j: usize) -> String {
    names
        .get(j)
        .cloned()
        .unwrap_or_else(|| format!("feature {}", j + 1))
}

fn mean_present(values: &[f64]) -> f64 {
    let (mut s, mut n) = (0.0, 0usize);
    for v in values.iter().filter(|v| !v.is_nan()) {
        s += v;
        n += 1;
    }
    if n == 0 {
        f64::NAN
    } else {
        s / n as f64
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// A look of `n` units with three N(shift_j, 1) features, a coin-flip
    /// assignment with a correct propensity, a correct outcome model and
    /// one model predicting the true effect.
    fn look(
        rng: &mut ChaCha8Rng,
        n: usize,
        shift: [f64; 3],
    ) -> (Vec<f64>, Vec<f64>, Vec<f64>, Nuisance) {
        let normal = |rng: &mut ChaCha8Rng| crate::synth::standard_normal(rng);
        let mut x = Vec::with_capacity(3 * n);
        let (mut w, mut y) = (Vec::new(), Vec::new());
        let mut nu = Nuisance {
            propensity: Vec::new(),
            mu0: Vec::new(),
            mu1: Vec::new(),
        };
        for _ in 0..n {
            let row: Vec<f64> = shift.iter().map(|s| s + normal(rng)).collect();
            let t = f64::from(u8::from(rng.gen::<bool>()));
            y.push(row[0] + t * (1.0 + row[1]) + normal(rng));
            nu.propensity.push(0.5);
            nu.mu0.push(row[0]);
            nu.mu1.push(row[0] + 1.0 + row[1]);
            w.push(t);
            x.extend(row);
        }
        (x, w, y, nu)
    }

    /// Folds one look into `watch`.
    fn fold(
        watch: &mut Watch,
        (x, w, y, nu): &(Vec<f64>, Vec<f64>, Vec<f64>, Nuisance),
        names: &[String],
        models: &[(String, Vec<f64>)],
    ) -> Vec<Signal> {
        watch.observe(
            &Arrivals {
                treatment: w,
                outcome: y,
                nuisance: nu,
                propensity_fitted: true,
                features: x,
                feature_names: names,
                models,
            },
            &WatchSettings::default(),
        )
    }

    /// 100 streams of 60 looks of 500 units; from look 30 the second
    /// feature's mean moves by 0.3 standard deviations. Nothing is raised
    /// before (the threshold allows a false alarm in at most 5% of streams
    /// over 1000 looks, far fewer over 30), and the drift is found, naming
    /// that feature, within four looks in at least 95 of 100 streams.
    #[test]
    fn a_feature_drift_is_found_and_named() {
        let names: Vec<String> = ["age", "tenure", "visits"].map(String::from).to_vec();
        let (mut early, mut found, mut delays) = (0, 0, Vec::new());
        for stream in 0..100 {
            let mut rng = ChaCha8Rng::seed_from_u64(stream);
            let mut watch = Watch::default();
            for k in 0..60 {
                let shift = if k >= 30 { [0.0, 0.3, 0.0] } else { [0.0; 3] };
                let units = look(&mut rng, 500, shift);
                let models = vec![(
                    "m".to_string(),
                    (0..500).map(|i| 1.0 + units.0[3 * i + 1]).collect(),
                )];
                let signals = fold(&mut watch, &units, &names, &models);
                let drift: Vec<&String> = signals
                    .iter()
                    .filter_map(|s| match s {
                        Signal::PopulationDrift { quantity, .. } => Some(quantity),
                        _ => None,
                    })
                    .collect();
                if drift.is_empty() {
                    continue;
                }
                if k < 30 {
                    early += 1;
                } else {
                    assert_eq!(drift, vec!["tenure"]);
                    found += 1;
                    delays.push(k - 30 + 1);
                }
                break;
            }
        }
        delays.sort_unstable();
        let within = delays.iter().filter(|&&d| d <= 4).count();
        println!("drift: {early} early alarms, {found} found, {within} within 4 looks, delays {delays:?}");
        assert_eq!(early, 0);
        assert!(within >= 95, "{within}");
    }

    /// A leader with no predictions for one look keeps its place; a retired
    /// one (no longer among the active models) hands it to a challenger,
    /// and the event says why.
    #[test]
    fn a_missing_batch_is_not_a_retirement() {
        let names: Vec<String> = ["a", "b", "c"].map(String::from).to_vec();
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let mut watch = Watch::default();
        let mut observe = |watch: &mut Watch, models: &[&str], missing: Option<&str>| {
            let units = look(&mut rng, 300, [0.0; 3]);
            let x = &units.0;
            let models: Vec<(String, Vec<f64>)> = models
                .iter()
                .map(|&m| {
                    let e = (0..300)
                        .map(|i| {
                            if Some(m) == missing {
                                f64::NAN
                            } else {
                                1.0 + x[3 * i + 1]
                            }
                        })
                        .collect();
                    (m.to_string(), e)
                })
                .collect();
            fold(watch, &units, &names, &models)
        };
        // One model alone has no one to be separated from.
        let mut alone = Watch::default();
        observe(&mut alone, &["m1"], None);
        assert!(alone.state().leader_settled);
        observe(&mut watch, &["m1", "m2"], None);
        assert!(!watch.state().leader_settled);
        let leader = watch.state().leader.expect("appointed");
        let other = if leader == "m1" { "m2" } else { "m1" };
        let signals = observe(&mut watch, &["m1", "m2"], Some(leader.as_str()));
        assert!(
            !signals
                .iter()
                .any(|s| matches!(s, Signal::LeaderChanged { .. })),
            "{signals:?}"
        );
        assert_eq!(watch.state().leader.as_deref(), Some(leader.as_str()));
        let signals = observe(&mut watch, &[other], None);
        let changed = signals.iter().find_map(|s| match s {
            Signal::LeaderChanged { new, evidence, .. } => Some((new.clone(), evidence.route)),
            _ => None,
        });
        assert_eq!(changed, Some((other.to_string(), Route::Gone)));
    }
}
