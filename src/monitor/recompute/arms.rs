//! The recompute of a dataset with arms: every window's boards, one per
//! contrast, and the value of each model's arm choice.
//!
//! Each recompute fits the multinomial propensity and the per-arm outcome
//! models afresh, cross-fitted on the cumulative window's units with the
//! dataset's folds and seed, exactly as `plumbline score --arms` does on
//! the same units in the same order: the cumulative boards are that
//! command's. The recent and cohort windows are scored with those units'
//! cross-fitted values (each from fits that did not see the unit), so a
//! window needs no fit of its own. Above `limits.max_fit_units` units the
//! models are fitted on a seeded sample stratified by arm, as a binary
//! refit's are (`plumbline score --arms --max-fit-units` draws the same
//! one), and every unit still gets values from a fold model that never saw
//! it. The binary path's incremental scoring
//! (merged sums, kept windows) does not apply here yet: a recompute costs a
//! full fit.
//!
//! The stream watch looks first, at the units whose outcomes arrived since
//! its last look, with values from the fold models of the previous
//! recompute's fit (kept in memory), which never saw them. After a restart
//! there are none: the models are fitted once on the units the watch has
//! already seen, which are all earlier than the arrivals, so every watched
//! value still depends on the past alone.

use std::collections::HashMap;
use std::sync::Arc;

use super::{settings, RecomputeInput};
use crate::domain::{IncompleteModel, Window};
use crate::estimate::arms::{score_arms, ArmModelPredictions, ArmTable, ArmsScoreboard};
use crate::estimate::crossfit::{
    fit_arm_nuisance, ArmFittedNuisance, ArmNuisance, ArmNuisanceReport, NuisanceSettings,
};
use crate::estimate::watch::{ArmArrivals, ArmSignal, Watch};
use crate::estimate::{EstimateError, FeatureRows};

/// One window's result on a dataset with arms.
pub struct ArmWindowResult {
    pub key: String,
    pub window: Window,
    /// The named state of a window that cannot be scored, instead.
    pub board: Result<ArmsScoreboard, String>,
    /// Units scored (outcome known, covered by every kept prediction
    /// column).
    pub units: usize,
    pub incomplete: Vec<IncompleteModel>,
}

/// A recompute of a dataset with arms.
pub struct ArmsComputed {
    pub windows: Vec<ArmWindowResult>,
    /// The watch after this recompute's arrivals, and what it decided.
    pub watch: Watch,
    pub signals: Vec<ArmSignal>,
    /// The cumulative fit's fold models, for the watch's next look (None
    /// when the cumulative window could not be fitted).
    pub fit: Option<Arc<ArmFittedNuisance>>,
}

/// The cumulative fit, kept for the other windows: each fitted unit's
/// position in it, its values and its report.
struct Fit {
    position: HashMap<usize, usize>,
    nuisance: ArmNuisance,
    report: ArmNuisanceReport,
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
    /// The watch's look, then every window's boards. An error here is one
    /// the dataset's settings cause (e.g. folds); data that cannot support
    /// scores gives a window a named state instead.
    pub fn compute_arms(mut self) -> Result<ArmsComputed, EstimateError> {
        settings(&self.spec).check()?;
        let signals = self.watch_arms()?;
        let (windows, fit) = self.arm_windows()?;
        Ok(ArmsComputed {
            windows,
            watch: self.watch,
            signals,
            fit: fit.map(Arc::new),
        })
    }

    /// Hands the watch the units whose outcomes arrived since its last
    /// look, with values from fold models that never saw them.
    fn watch_arms(&mut self) -> Result<Vec<ArmSignal>, EstimateError> {
        let (from, units) = self.unwatched();
        if units.is_empty() {
            return Ok(Vec::new());
        }
        let fit = match self.arm_fit.clone() {
            Some(fit) => Some(fit),
            None => self.fit_on(&self.columns.arrived(0..from)).map(Arc::new),
        };
        let Some(fit) = fit else {
            // Nothing earlier to fit on (the first look, or too few units
            // per arm): these units only fit the first models.
            self.watch.skip_baseline(units.len() as u64);
            return Ok(Vec::new());
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
        Ok(self.watch.observe_arms(
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
        ))
    }

    /// The fold models of a cross-fit on `units`, when they support one.
    fn fit_on(&self, units: &[usize]) -> Option<ArmFittedNuisance> {
        let table = self.arm_table(units).ok()?;
        self.fit_table(&table).ok().map(|(_, _, models)| models)
    }

    /// The dataset's cross-fit (its folds and seed) of a table's units.
    fn fit_table(
        &self,
        table: &ArmTable,
    ) -> Result<(ArmNuisance, ArmNuisanceReport, ArmFittedNuisance), EstimateError> {
        fit_arm_nuisance(
            table.rows(),
            table.arm(),
            table.arms(),
            table.outcome(),
            table.outcome_kind(),
            &NuisanceSettings {
                max_fit_units: self.max_fit_units,
                ..settings(&self.spec).nuisance
            },
            Vec::new(),
        )
    }

    /// Every window's boards, and the cumulative fit's fold models.
    fn arm_windows(
        &self,
    ) -> Result<(Vec<ArmWindowResult>, Option<ArmFittedNuisance>), EstimateError> {
        let scorable = self.scorable();
        let chosen = self.choose_columns(&scorable);
        let mut out = Vec::new();
        let fitted = self.arm_table(&chosen.common).and_then(|table| {
            let (nuisance, report, models) = self.fit_table(&table)?;
            Ok((table, nuisance, report, models))
        });
        let (fit, models) = match fitted {
            Ok((table, nuisance, report, models)) => {
                let board = self.score(&table, &chosen, &nuisance, Some(report.clone()));
                out.push(ArmWindowResult {
                    key: Window::Cumulative.key(),
                    window: Window::Cumulative,
                    board: Ok(board),
                    units: chosen.common.len(),
                    incomplete: chosen.incomplete,
                });
                let fit = Fit {
                    position: chosen
                        .common
                        .iter()
                        .enumerate()
                        .map(|(i, &u)| (u, i))
                        .collect(),
                    nuisance,
                    report,
                };
                (fit, models)
            }
            Err(e) => {
                // Without the cumulative fit no window has values.
                let state = e.to_string();
                out.push(ArmWindowResult {
                    key: Window::Cumulative.key(),
                    window: Window::Cumulative,
                    board: Err(state.clone()),
                    units: chosen.common.len(),
                    incomplete: chosen.incomplete,
                });
                out.push(self.unscored(Window::Recent, state));
                return Ok((out, None));
            }
        };
        out.push(self.sub_window(Window::Recent, &self.recent(), &fit));
        let mut cohorts: Vec<Vec<usize>> = vec![Vec::new(); self.cohort_names.len()];
        for &u in &scorable {
            if let Some(c) = cohorts.get_mut(self.columns.cohort[u] as usize) {
                c.push(u);
            }
        }
        for (name, units) in self.cohort_names.iter().zip(&cohorts) {
            if !units.is_empty() {
                out.push(self.sub_window(Window::Cohort(name.clone()), units, &fit));
            }
        }
        Ok((out, Some(models)))
    }

    fn unscored(&self, window: Window, state: String) -> ArmWindowResult {
        ArmWindowResult {
            key: window.key(),
            window,
            board: Err(state),
            units: 0,
            incomplete: Vec::new(),
        }
    }

    /// A window scored with the cumulative fit's values of its units.
    fn sub_window(&self, window: Window, units: &[usize], fit: &Fit) -> ArmWindowResult {
        let fitted: Vec<usize> = units
            .iter()
            .copied()
            .filter(|u| fit.position.contains_key(u))
            .collect();
        let chosen = self.choose_columns(&fitted);
        let board = self.arm_table(&chosen.common).map(|table| {
            let pick = |values: &[Vec<f64>]| -> Vec<Vec<f64>> {
                values
                    .iter()
                    .map(|v| chosen.common.iter().map(|u| v[fit.position[u]]).collect())
                    .collect()
            };
            let nuisance = ArmNuisance {
                propensity: pick(&fit.nuisance.propensity),
                outcome: pick(&fit.nuisance.outcome),
            };
            self.score(&table, &chosen, &nuisance, Some(fit.report.clone()))
        });
        ArmWindowResult {
            key: window.key(),
            window,
            board: board.map_err(|e| e.to_string()),
            units: chosen.common.len(),
            incomplete: chosen.incomplete,
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
    fn arm_table(&self, units: &[usize]) -> Result<ArmTable, EstimateError> {
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
