//! Misfit of the nuisance models on arriving units: the fitted
//! propensity's calibration (treated share minus mean propensity, and its
//! covariance with each feature) and each arm's outcome residual mean,
//! against a tolerance. A detection asks the service for a refit.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::estimate::sequential::{log_threshold, Side};

use super::signal::{Route, Signal};
use super::tracked::Tracked;
use super::{feature_name, Arrivals, Watch, WatchSettings};

/// Misfit detectors of the current nuisance fit, named by what they check.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub(super) struct FitWatch {
    checks: BTreeMap<String, Tracked>,
}

impl Watch {
    pub(super) fn check_fit(&mut self, a: &Arrivals<'_>, s: &WatchSettings, out: &mut Vec<Signal>) {
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
