//! Heterogeneity of the effect: detected when a model's confidence
//! sequence against constant-effect (the pseudo-outcomes' running mean)
//! excludes zero in the model's favour, lost when a detector finds the
//! front-runner's advantage has fallen below zero.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::estimate::sequential::{cs_radius, log_threshold, Side};
use crate::estimate::stats::Moments;

use super::signal::{Route, Signal};
use super::tracked::Tracked;
use super::{Watch, WatchSettings};

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
pub(super) struct HeterogeneityWatch {
    pub(super) state: Heterogeneity,
    /// Per model: constant-effect's squared error minus the model's, since
    /// the state was entered (while not detected).
    models: BTreeMap<String, Moments>,
    /// While detected: the model that showed it and its advantage.
    lead: Option<(String, Tracked)>,
}

impl Watch {
    pub(super) fn check_heterogeneity(
        &mut self,
        losses: &[(&str, Vec<f64>)],
        baseline: &[f64],
        front_runner: Option<&str>,
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
                // The advantage watched is the reported front-runner's: when the
                // front-runner changes, its own advantage is watched from here on
                // (the first look places the detector's grid).
                if let Some(front_runner) =
                    front_runner.filter(|l| losses.iter().any(|(n, _)| n == l))
                {
                    if h.lead.as_ref().is_none_or(|(m, _)| m != front_runner) {
                        h.lead = Some((front_runner.to_string(), Tracked::new(Side::Below)));
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
}
