//! Misfit of the nuisance models on arriving units: the fitted
//! propensity's calibration (treated share minus mean propensity, and its
//! covariance with each feature) and each arm's outcome residual mean,
//! against a tolerance; on a dataset with arms, the same per arm, with the
//! generalized propensity e_k. A detection asks the service for a refit.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::estimate::sequential::{log_threshold, Side};

use super::signal::{Route, Signal};
use super::tracked::Tracked;
use super::{feature_name, ArmArrivals, Arrivals, Watch, WatchSettings};

/// Misfit detectors of the current nuisance fit, named by what they check.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub(super) struct FitWatch {
    checks: BTreeMap<String, Tracked>,
}

/// One misfit check: its name, the side it watches, its tolerance, the
/// arriving units' values, and whether they are bounded in [-1, 1].
type Check = (String, Side, f64, Vec<f64>, bool);

impl Watch {
    pub(super) fn check_fit(&mut self, a: &Arrivals<'_>, s: &WatchSettings, out: &mut Vec<Signal>) {
        let n = a.treatment.len();
        // Until the scales are known (a look of history), nothing is checked.
        if self.outcome.count() < 2 {
            return;
        }
        let mut checks = Vec::new();
        if a.propensity_fitted {
            let gap: Vec<f64> = (0..n)
                .map(|i| a.treatment[i] - a.nuisance.propensity[i])
                .collect();
            self.calibration_checks(
                "propensity: treated share",
                |feature| format!("propensity: {feature}"),
                gap,
                a.features,
                a.feature_names,
                s,
                &mut checks,
            );
        }
        for (arm, label, mu) in [
            (0.0, "outcome: control arm", &a.nuisance.mu0),
            (1.0, "outcome: treated arm", &a.nuisance.mu1),
        ] {
            let units: Vec<usize> = (0..n).filter(|&i| a.treatment[i] == arm).collect();
            self.residual_check(label, &units, a.outcome, mu, s, &mut checks);
        }
        self.fold_fit_checks(checks, s, out);
    }

    /// The misfit checks of a dataset with arms, on each arm: its fitted
    /// generalized propensity's calibration (the arm's share minus the
    /// mean e_k, and its covariance with each feature) when some arriving
    /// unit's propensity was not logged, and its outcome model's residual
    /// mean. One detection asks for a refit, as on a binary dataset.
    pub(super) fn check_arm_fit(
        &mut self,
        a: &ArmArrivals<'_>,
        s: &WatchSettings,
        out: &mut Vec<Signal>,
    ) {
        if self.outcome.count() < 2 {
            return;
        }
        let n = a.arm.len();
        let fitted = a.logged.iter().any(Option::is_none);
        let mut checks = Vec::new();
        for (k, name) in a.arms.iter().enumerate() {
            if fitted {
                let gap: Vec<f64> = (0..n)
                    .map(|i| f64::from(u8::from(a.arm[i] == k)) - a.nuisance.propensity[k][i])
                    .collect();
                self.calibration_checks(
                    &format!("propensity: {name} share"),
                    |feature| format!("propensity of {name}: {feature}"),
                    gap,
                    a.features,
                    a.feature_names,
                    s,
                    &mut checks,
                );
            }
            let units: Vec<usize> = (0..n).filter(|&i| a.arm[i] == k).collect();
            self.residual_check(
                &format!("outcome: {name} arm"),
                &units,
                a.outcome,
                &a.nuisance.outcome[k],
                s,
                &mut checks,
            );
        }
        self.fold_fit_checks(checks, s, out);
    }

    /// A propensity's calibration checks on `gap` (treatment indicator
    /// minus fitted propensity, per unit): its mean, and its covariance
    /// with each standardized feature, on both sides of the tolerance.
    #[allow(clippy::too_many_arguments)]
    fn calibration_checks(
        &self,
        share: &str,
        per_feature: impl Fn(&str) -> String,
        gap: Vec<f64>,
        features: &[f64],
        feature_names: &[String],
        s: &WatchSettings,
        checks: &mut Vec<Check>,
    ) {
        let n = gap.len();
        let d = features.len().checked_div(n).unwrap_or(0);
        let tol = s.propensity_tolerance;
        checks.push((share.into(), Side::Above, tol, gap.clone(), true));
        checks.push((share.into(), Side::Below, -tol, gap.clone(), true));
        if self.features.len() == d {
            for (j, m) in self.features.iter().enumerate() {
                let sd = m.sd();
                if sd <= 0.0 {
                    continue;
                }
                let cov: Vec<f64> = (0..n)
                    .map(|i| gap[i] * (features[i * d + j] - m.mean()) / sd)
                    .collect();
                let name = per_feature(&feature_name(feature_names, j));
                checks.push((name.clone(), Side::Above, tol, cov.clone(), false));
                checks.push((name, Side::Below, -tol, cov, false));
            }
        }
    }

    /// An outcome model's residual mean on its arm's `units`, in units of
    /// the watched outcomes' sd, on both sides of the tolerance.
    fn residual_check(
        &self,
        label: &str,
        units: &[usize],
        outcome: &[f64],
        mu: &[f64],
        s: &WatchSettings,
        checks: &mut Vec<Check>,
    ) {
        let scale = self.outcome.sd();
        if scale <= 0.0 {
            return;
        }
        let r: Vec<f64> = units
            .iter()
            .map(|&i| (outcome[i] - mu[i]) / scale)
            .collect();
        let tol = s.outcome_tolerance;
        checks.push((label.into(), Side::Above, tol, r.clone(), false));
        checks.push((label.into(), Side::Below, -tol, r, false));
    }

    /// Folds every check's values into its detector (the alpha split over
    /// the checks of the look); the first to fire is the look's signal.
    fn fold_fit_checks(&mut self, checks: Vec<Check>, s: &WatchSettings, out: &mut Vec<Signal>) {
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
