//! Population drift: each feature's and the propensity's mean among
//! arriving units, standardized by a reference population, against a
//! tolerance in either direction. A detection starts a new reference.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::estimate::sequential::{log_threshold, Side};
use crate::estimate::stats::Moments;

use super::signal::{Route, Signal};
use super::tracked::Tracked;
use super::{feature_name, Arrivals, Watch, WatchSettings};

/// Units the drift reference holds: the noise of its means, about 0.014
/// standard deviations, stays well inside the tolerance.
pub const DRIFT_REFERENCE_UNITS: u64 = 5000;

/// Drift of the arriving units from a reference population.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub(super) struct DriftWatch {
    /// Per feature, then the propensity: the reference's moments, taken
    /// from the first [`DRIFT_REFERENCE_UNITS`] units after a (re)start
    /// (for the propensity, also after each refit).
    pub(super) reference: Vec<Moments>,
    pub(super) checks: BTreeMap<String, Tracked>,
}

impl Watch {
    pub(super) fn check_drift(
        &mut self,
        a: &Arrivals<'_>,
        s: &WatchSettings,
        out: &mut Vec<Signal>,
    ) {
        let mut columns = feature_columns(a.features, a.feature_names, a.treatment.len());
        columns.push(("propensity".into(), a.nuisance.propensity.clone()));
        self.check_drift_of(&columns, s, out);
    }

    /// The drift checks on named columns of the arriving units' values
    /// (the same columns, in the same order, at every look).
    pub(super) fn check_drift_of(
        &mut self,
        columns: &[(String, Vec<f64>)],
        s: &WatchSettings,
        out: &mut Vec<Signal>,
    ) {
        let q = columns.len();
        let column = |j: usize| -> &Vec<f64> { &columns[j].1 };
        let name = |j: usize| -> String { columns[j].0.clone() };
        let w = &mut self.drift;
        if w.reference.len() != q {
            *w = DriftWatch {
                reference: vec![Moments::default(); q],
                checks: BTreeMap::new(),
            };
        }
        let log_a = log_threshold(s.alpha, s.horizon, 2 * q.max(1));
        let alpha = s.alpha / (2 * q.max(1)) as f64;
        let tol = s.drift_tolerance;
        let mut fired = None;
        for j in 0..q {
            // Until a quantity's reference is complete, the look builds it.
            if w.reference[j].count() < DRIFT_REFERENCE_UNITS {
                w.reference[j].merge(&Moments::of(column(j)));
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
}

/// The features of `n` row-major units as named columns.
pub(super) fn feature_columns(
    features: &[f64],
    names: &[String],
    n: usize,
) -> Vec<(String, Vec<f64>)> {
    let d = features.len().checked_div(n).unwrap_or(0);
    (0..d)
        .map(|j| {
            (
                feature_name(names, j),
                (0..n).map(|i| features[i * d + j]).collect(),
            )
        })
        .collect()
}
