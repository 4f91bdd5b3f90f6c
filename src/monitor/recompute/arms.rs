//! The recompute of a dataset with arms: every window's boards, one per
//! contrast, and the value of each model's arm choice.
//!
//! The nuisance values come from `arm_nuisance.rs`: a cross-fitted refit
//! when the dataset's refit rule says one is due, otherwise the kept fit's
//! fold models applied to the new units. Every window is scored with its
//! units' values (each from models that did not see the unit), so a window
//! needs no fit of its own. Between refits a cohort window whose units did
//! not change keeps its result ([`ArmMemo`]), as on a binary dataset; the
//! cumulative and recent windows are scored from scratch on every
//! recompute (the binary path's merged sums do not apply here yet).
//!
//! The stream watch looks first, at the units whose outcomes arrived since
//! its last look, with values from the kept fit's fold models, which never
//! saw them; the extension reuses those values. Without a kept fit (a store
//! written before arms fits were recorded) the models are fitted once on
//! the units the watch has already seen, which are all earlier than the
//! arrivals, so every watched value still depends on the past alone.

use std::collections::HashMap;
use std::sync::Arc;

use super::arm_nuisance::{ArmFixed, ArmNuisanceState};
use super::{settings, RecomputeInput, RecomputeOptions, RefitReason};
use crate::domain::{IncompleteModel, Window};
use crate::estimate::arms::{score_arms, ArmModelPredictions, ArmTable, ArmsScoreboard};
use crate::estimate::crossfit::{ArmFittedNuisance, ArmNuisance, ArmNuisanceReport};
use crate::estimate::watch::{ArmArrivals, ArmSignal, Signal, Watch};
use crate::estimate::{EstimateError, FeatureRows};

/// One window's result on a dataset with arms.
#[derive(Clone)]
pub struct ArmWindowResult {
    pub key: String,
    pub window: Window,
    /// The named state of a window that cannot be scored, instead.
    pub board: Result<ArmsScoreboard, String>,
    /// Units scored (outcome known, covered by every kept prediction
    /// column).
    pub units: usize,
    pub incomplete: Vec<IncompleteModel>,
    /// Kept from the previous recompute: the window's units did not change.
    pub reused: bool,
}

/// What a recompute of a dataset with arms keeps for the next one under
/// the same fit: each cohort window's result with the number of units it
/// was scored on (outcomes are only ever added and a unit's values never
/// change under one fit, so an equal count is an equal board). Valid only
/// while the cache revision (bumped when a unit with an outcome gets a
/// prediction) and the active models are the ones it was computed under;
/// a refit starts a new one.
#[derive(Clone, Default)]
pub struct ArmMemo {
    revision: u64,
    models: Vec<String>,
    cohorts: HashMap<String, (usize, ArmWindowResult)>,
}

/// A recompute of a dataset with arms.
pub struct ArmsComputed {
    pub windows: Vec<ArmWindowResult>,
    /// The watch after this recompute's arrivals, and what it decided.
    pub watch: Watch,
    pub signals: Vec<ArmSignal>,
    /// The nuisance values to keep for the next recompute (None when the
    /// units could not support a fit: every window then names why).
    pub nuisance: Option<ArmNuisanceState>,
    /// Set when this recompute refitted (the fit still needs a record id).
    pub refit: Option<RefitReason>,
}

/// Which (model, arm) columns a window scores and on which units.
struct Chosen {
    /// Per active model, per contrast: whether the column is scored.
    kept: Vec<Vec<bool>>,
    /// The window's units every kept column covers, in unit order.
    common: Vec<usize>,
    incomplete: Vec<IncompleteModel>,
}

impl RecomputeInput {
    /// The watch's look, the nuisance values, then every window's boards.
    /// An error here is one the dataset's settings cause (e.g. folds); data
    /// that cannot support scores gives a window a named state instead.
    pub fn compute_arms(
        mut self,
        options: RecomputeOptions,
    ) -> Result<ArmsComputed, EstimateError> {
        settings(&self.spec).check()?;
        let (signals, fixed) = self.watch_arms()?;
        let misfit = signals
            .iter()
            .any(|s| matches!(s.signal, Signal::NuisanceMisfit { .. }));
        let (nuisance, refit) = match self.arm_nuisance(options.refit, misfit, fixed) {
            Ok((state, refit)) => (Ok(state), refit),
            Err(e) => (Err(e.to_string()), None),
        };
        if refit.is_some() {
            self.watch.restart_fit_checks();
        }
        let names: Vec<String> = self.arm_models.iter().map(|(n, _)| n.clone()).collect();
        let previous = match &nuisance {
            Ok(state)
                if refit.is_none()
                    && state.memo.revision == self.revision
                    && state.memo.models == names =>
            {
                Some(Arc::clone(&state.memo))
            }
            _ => None,
        };
        let (windows, cohorts) =
            self.arm_windows(nuisance.as_ref().map_err(Clone::clone), previous.as_deref());
        let nuisance = nuisance.ok().map(|mut state| {
            state.memo = Arc::new(ArmMemo {
                revision: self.revision,
                models: names,
                cohorts,
            });
            state
        });
        Ok(ArmsComputed {
            windows,
            watch: self.watch,
            signals,
            nuisance,
            refit,
        })
    }

    /// Hands the watch the units whose outcomes arrived since its last
    /// look, with values from fold models that never saw them; the values
    /// when they came from the kept fit's models.
    fn watch_arms(&mut self) -> Result<(Vec<ArmSignal>, ArmFixed), EstimateError> {
        let (from, units) = self.unwatched();
        if units.is_empty() {
            return Ok((Vec::new(), ArmFixed::default()));
        }
        let kept = self.arm_nuisance.as_ref().map(|s| s.fitted.clone());
        let from_kept = kept.is_some();
        let fit = match kept {
            Some(fit) => Some(fit),
            None => self.fit_on(&self.columns.arrived(0..from)).map(Arc::new),
        };
        let Some(fit) = fit else {
            // Nothing earlier to fit on (the first look, or too few units
            // per arm): these units only fit the first models.
            self.watch.skip_baseline(units.len() as u64);
            return Ok((Vec::new(), ArmFixed::default()));
        };
        let x = self.rows(&units);
        let width = x.ncols();
        let nuisance = fit.predict(FeatureRows::dense(x.as_slice().unwrap_or(&[]), width));
        let arm: Vec<usize> = units
            .iter()
            .map(|&u| usize::from(self.columns.treatment[u]))
            .collect();
        let outcome: Vec<f64> = units
            .iter()
            .map(|&u| self.columns.outcome_of(u).unwrap_or(0.0))
            .collect();
        let logged: Vec<Option<f64>> = units
            .iter()
            .map(|&u| self.columns.propensity_of(u))
            .collect();
        let models: Vec<(String, Vec<Vec<f64>>)> = self
            .arm_models
            .iter()
            .map(|(name, columns)| {
                let per_contrast = columns
                    .iter()
                    .map(|c| units.iter().map(|&u| c[u]).collect())
                    .collect();
                (name.clone(), per_contrast)
            })
            .collect();
        let s = settings(&self.spec);
        let signals = self.watch.observe_arms(
            &ArmArrivals {
                arm: &arm,
                outcome: &outcome,
                logged: &logged,
                arms: &self.spec.arms,
                nuisance: &nuisance,
                clip: s.nuisance.clip,
                features: x.as_slice().unwrap_or(&[]),
                feature_names: &self.spec.feature_names,
                models: &models,
            },
            &self.watch_settings,
        );
        let fixed = if from_kept {
            ArmFixed {
                units,
                values: Some(nuisance),
            }
        } else {
            ArmFixed::default()
        };
        Ok((signals, fixed))
    }

    /// The fold models of a cross-fit on `units`, when they support one.
    fn fit_on(&self, units: &[usize]) -> Option<ArmFittedNuisance> {
        let table = self.arm_table(units).ok()?;
        self.fit_arm_table(&table, self.max_fit_units)
            .ok()
            .map(|(_, _, models)| models)
    }

    /// Every window's boards, from `nuisance` (or, when the units could not
    /// be fitted, why: the state of every window), with each cohort
    /// window's result and unit count for the next recompute's memo. A
    /// cohort window whose units did not change since `previous` is not
    /// scored again.
    fn arm_windows(
        &self,
        nuisance: Result<&ArmNuisanceState, String>,
        previous: Option<&ArmMemo>,
    ) -> (
        Vec<ArmWindowResult>,
        HashMap<String, (usize, ArmWindowResult)>,
    ) {
        let scorable = self.scorable();
        let mut kept = HashMap::new();
        let nuisance = match nuisance {
            Ok(n) => n,
            Err(state) => {
                let chosen = self.choose_columns(&scorable);
                let windows = vec![
                    ArmWindowResult {
                        key: Window::Cumulative.key(),
                        window: Window::Cumulative,
                        board: Err(state.clone()),
                        units: chosen.common.len(),
                        incomplete: chosen.incomplete,
                        reused: false,
                    },
                    self.unscored(Window::Recent, state),
                ];
                return (windows, kept);
            }
        };
        let mut out = vec![
            self.window(Window::Cumulative, &scorable, nuisance),
            self.window(Window::Recent, &self.recent(), nuisance),
        ];
        let mut cohorts: Vec<Vec<usize>> = vec![Vec::new(); self.cohort_names.len()];
        for &u in &scorable {
            if let Some(c) = cohorts.get_mut(self.columns.cohort[u] as usize) {
                c.push(u);
            }
        }
        for (name, units) in self.cohort_names.iter().zip(&cohorts) {
            // Units sent without a cohort are in no cohort window.
            if units.is_empty() || name.is_empty() {
                continue;
            }
            let window = Window::Cohort(name.clone());
            let result = match previous.and_then(|p| p.cohorts.get(&window.key())) {
                Some((count, r)) if *count == units.len() => ArmWindowResult {
                    reused: true,
                    ..r.clone()
                },
                _ => self.window(window, units, nuisance),
            };
            kept.insert(
                result.key.clone(),
                (
                    units.len(),
                    ArmWindowResult {
                        reused: false,
                        ..result.clone()
                    },
                ),
            );
            out.push(result);
        }
        (out, kept)
    }

    fn unscored(&self, window: Window, state: String) -> ArmWindowResult {
        ArmWindowResult {
            key: window.key(),
            window,
            board: Err(state),
            units: 0,
            incomplete: Vec::new(),
            reused: false,
        }
    }

    /// A window scored with its units' nuisance values.
    fn window(
        &self,
        window: Window,
        units: &[usize],
        nuisance: &ArmNuisanceState,
    ) -> ArmWindowResult {
        let scored: Vec<usize> = units
            .iter()
            .copied()
            .filter(|&u| nuisance.scored(u))
            .collect();
        let chosen = self.choose_columns(&scored);
        let board = self.arm_table(&chosen.common).map(|table| {
            let values = nuisance.of(&chosen.common);
            self.score(&table, &chosen, &values, Some(nuisance.report.clone()))
        });
        ArmWindowResult {
            key: window.key(),
            window,
            board: board.map_err(|e| e.to_string()),
            units: chosen.common.len(),
            incomplete: chosen.incomplete,
            reused: false,
        }
    }

    fn score(
        &self,
        table: &ArmTable,
        chosen: &Chosen,
        nuisance: &ArmNuisance,
        report: Option<ArmNuisanceReport>,
    ) -> ArmsScoreboard {
        let models: Vec<ArmModelPredictions> = self
            .arm_models
            .iter()
            .zip(&chosen.kept)
            .filter(|(_, kept)| kept.iter().any(|&k| k))
            .map(|((name, columns), kept)| ArmModelPredictions {
                name: name.clone(),
                effects: columns
                    .iter()
                    .zip(kept)
                    .map(|(c, &k)| k.then(|| chosen.common.iter().map(|&u| c[u]).collect()))
                    .collect(),
            })
            .collect();
        score_arms(
            table,
            &self.spec.feature_names,
            nuisance,
            report,
            &models,
            &settings(&self.spec),
            &self.spec.costs_per_arm(),
        )
    }

    /// The window's units as an [`ArmTable`] (features copied dense).
    pub(super) fn arm_table(&self, units: &[usize]) -> Result<ArmTable, EstimateError> {
        ArmTable::new(
            self.rows(units),
            units
                .iter()
                .map(|&u| usize::from(self.columns.treatment[u]))
                .collect(),
            units
                .iter()
                .map(|&u| self.columns.outcome_of(u).unwrap_or(0.0))
                .collect(),
            units
                .iter()
                .map(|&u| self.columns.propensity_of(u))
                .collect(),
            self.spec.outcome_kind,
            self.spec.arms.clone(),
        )
    }

    /// A (model, arm) column is scored when it covers at least
    /// `min_coverage` of the window's units (as a binary model is ranked);
    /// a model none of whose columns is scored is listed as incomplete
    /// with its best column's coverage. The window keeps the units every
    /// scored column covers.
    fn choose_columns(&self, units: &[usize]) -> Chosen {
        let n = units.len();
        let share = |c: usize| if n == 0 { 0.0 } else { c as f64 / n as f64 };
        let mut kept = Vec::new();
        let mut incomplete = Vec::new();
        for (name, columns) in &self.arm_models {
            let covered: Vec<usize> = columns
                .iter()
                .map(|c| units.iter().filter(|&&u| !c[u].is_nan()).count())
                .collect();
            let keep: Vec<bool> = covered
                .iter()
                .map(|&c| c > 0 && share(c) >= self.spec.min_coverage)
                .collect();
            if !keep.iter().any(|&k| k) {
                incomplete.push(IncompleteModel {
                    name: name.clone(),
                    coverage: share(covered.iter().copied().max().unwrap_or(0)),
                });
            }
            kept.push(keep);
        }
        let common = units
            .iter()
            .copied()
            .filter(|&u| {
                self.arm_models
                    .iter()
                    .zip(&kept)
                    .all(|((_, columns), keep)| {
                        columns.iter().zip(keep).all(|(c, &k)| !k || !c[u].is_nan())
                    })
            })
            .collect();
        Chosen {
            kept,
            common,
            incomplete,
        }
    }
}
