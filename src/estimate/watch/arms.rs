//! The stream watch of a dataset with arms: one watch per contrast, fed
//! that contrast's generalized AIPW pseudo-outcomes Gamma_k - Gamma_0 (from
//! a multinomial propensity and per-arm outcome models fitted only on units
//! that arrived before), with a contrast's overlap judged on the share of
//! arriving units whose e_0 or e_k is below the threshold. Each contrast's
//! watch makes the binary watch's claims about that contrast, with the
//! same error rates per check; the features' drift is watched once, for
//! the dataset, and the nuisance models' misfit once, per arm
//! (`misfit.rs`): a detection asks for a refit.

use super::drift::feature_columns;
use super::signal::Signal;
use super::{ContrastArrivals, Watch, WatchSettings};
use crate::estimate::arms::dr_scores_of;
use crate::estimate::crossfit::ArmNuisance;

/// One look's newly scored units of a dataset with arms.
pub struct ArmArrivals<'a> {
    /// Each unit's arm, an index into `arms` (0 the reference).
    pub arm: &'a [usize],
    pub outcome: &'a [f64],
    /// The logged probability of the arm each unit got, where one was.
    pub logged: &'a [Option<f64>],
    pub arms: &'a [String],
    /// From models fitted only on earlier units.
    pub nuisance: &'a ArmNuisance,
    /// Propensities are raised to this before weighting.
    pub clip: f64,
    /// Row-major features.
    pub features: &'a [f64],
    pub feature_names: &'a [String],
    /// The active models: per contrast (`[c]` for arm c + 1) their
    /// predicted effects (NaN: none; an empty column: the model does not
    /// predict the contrast).
    pub models: &'a [(String, Vec<Vec<f64>>)],
}

/// A decision of a dataset's watch, with the contrast's arm it is about
/// (empty: the dataset's, e.g. a drift).
#[derive(Debug, Clone, PartialEq)]
pub struct ArmSignal {
    pub arm: String,
    pub signal: Signal,
}

impl Watch {
    /// Folds one look of a dataset with arms in: every contrast's watch
    /// (in [`Watch::contrasts`]) and the dataset's drift check.
    pub fn observe_arms(&mut self, a: &ArmArrivals<'_>, s: &WatchSettings) -> Vec<ArmSignal> {
        let n = a.arm.len();
        self.units += n as u64;
        if n == 0 {
            return Vec::new();
        }
        self.looks += 1;
        let mut out = Vec::new();
        // The dataset's own checks: the features' drift, the fit's misfit.
        let mut dataset = Vec::new();
        self.check_drift_of(
            &feature_columns(a.features, a.feature_names, n),
            s,
            &mut dataset,
        );
        self.check_arm_fit(a, s, &mut dataset);
        out.extend(dataset.into_iter().map(|signal| ArmSignal {
            arm: String::new(),
            signal,
        }));
        let scores = dr_scores_of(a.arm, a.outcome, a.logged, a.arms.len(), a.nuisance, a.clip);
        let eps = s.overlap_eps;
        for (k, name) in a.arms.iter().enumerate().skip(1) {
            let pseudo: Vec<f64> = scores.gamma[k]
                .iter()
                .zip(&scores.gamma[0])
                .map(|(g, g0)| g - g0)
                .collect();
            let extreme: Vec<f64> = scores.propensity[k]
                .iter()
                .zip(&scores.propensity[0])
                .map(|(&ek, &e0)| f64::from(u8::from(ek < eps || e0 < eps)))
                .collect();
            let models: Vec<(String, Vec<f64>)> = a
                .models
                .iter()
                .filter_map(|(model, columns)| {
                    columns
                        .get(k - 1)
                        .filter(|c| c.len() == n)
                        .map(|c| (model.clone(), c.clone()))
                })
                .collect();
            let watch = self.contrasts.entry(name.clone()).or_default();
            let signals = watch.observe_contrast(
                &ContrastArrivals {
                    pseudo: &pseudo,
                    extreme: &extreme,
                    models: &models,
                },
                s,
            );
            out.extend(signals.into_iter().map(|signal| ArmSignal {
                arm: name.clone(),
                signal,
            }));
        }
        self.remember(a.outcome, a.features, n);
        out
    }
}
