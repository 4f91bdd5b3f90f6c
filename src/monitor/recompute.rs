//! One recompute of a dataset, as a blocking job over an immutable frame of
//! the cache: nuisance values for units that have none (a full cross-fitted
//! refit, or the current fold models applied to new units), then a
//! scoreboard per window.

use std::sync::Arc;

use ndarray::Array2;

use super::spec::DatasetSpec;
use crate::api::pb;
use crate::estimate::crossfit::{
    fit_nuisance_models, FittedNuisance, Nuisance, NuisanceReport, NuisanceSettings,
};
use crate::estimate::scoreboard::{score, Scoreboard, Settings};
use crate::estimate::{EstimateError, ModelPredictions, UnitTable};

/// Nuisance state of a dataset between recomputes.
#[derive(Clone)]
pub struct NuisanceState {
    pub fitted: Arc<FittedNuisance>,
    pub report: NuisanceReport,
    pub fit_id: i64,
    /// The fit used the units whose outcome sequence is at most this.
    pub last_outcome_seq: i64,
    pub fit_units: usize,
    pub fitted_at_ms: i64,
    /// Whether the fit used logged propensities.
    pub logged: bool,
    /// Per unit (by sequence): propensity (clipped), mu0, mu1; NaN where the
    /// unit has not been scored yet.
    pub values: Arc<Vec<[f64; 3]>>,
}

/// What a recompute reads: a copy of the cache's columns.
pub struct Frame {
    pub spec: DatasetSpec,
    pub features_per_unit: usize,
    pub features: Vec<f64>,
    pub treatment: Vec<u8>,
    pub propensity: Vec<Option<f64>>,
    pub cohort: Vec<u32>,
    pub cohort_names: Vec<String>,
    pub outcome: Vec<Option<f64>>,
    pub outcome_seq: Vec<i64>,
    pub observed_at_ms: Vec<i64>,
    pub outcome_order: Vec<usize>,
    /// Active models: name and effects (NaN = missing), in registration order.
    pub models: Vec<(String, Vec<f64>)>,
    pub nuisance: Option<NuisanceState>,
    pub now_ms: i64,
}

impl Frame {
    /// Reproduces a recorded fit: the units whose outcome sequence is at most
    /// `last_outcome_seq`, in unit order, with the dataset's seed.
    pub fn reproduce_fit(&self, last_outcome_seq: i64) -> Result<NuisanceState, EstimateError> {
        let units: Vec<usize> = self
            .scorable()
            .into_iter()
            .filter(|&u| self.outcome_seq[u] <= last_outcome_seq)
            .collect();
        self.refit(&units).map(|(s, _)| s)
    }
}

/// Why the nuisance models are refitted.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum RefitReason {
    Requested,
    FirstFit,
    Growth,
    Schedule,
    PropensitySource,
}

/// One window's result.
pub struct WindowResult {
    pub key: String,
    pub window: pb::Window,
    pub board: Result<Scoreboard, String>,
    pub units: usize,
    pub incomplete: Vec<pb::IncompleteModel>,
}

pub struct Computed {
    pub nuisance: NuisanceState,
    /// Set when this recompute refitted (the fit still needs a record id).
    pub refit: Option<RefitReason>,
    pub windows: Vec<WindowResult>,
    pub newly_scored: usize,
}

fn settings(spec: &DatasetSpec) -> Settings {
    Settings {
        nuisance: NuisanceSettings {
            folds: spec.folds as usize,
            seed: spec.seed,
            ..NuisanceSettings::default()
        },
        cost: spec.treatment_cost,
        alpha: spec.alpha,
        overlap_eps: spec.overlap_eps,
        ..Settings::default()
    }
}

impl Frame {
    fn rows(&self, units: &[usize]) -> Array2<f64> {
        let d = self.features_per_unit;
        let mut out = Vec::with_capacity(units.len() * d);
        for &u in units {
            out.extend_from_slice(&self.features[u * d..(u + 1) * d]);
        }
        Array2::from_shape_vec((units.len(), d), out).unwrap_or_else(|_| Array2::zeros((0, d)))
    }

    fn table(&self, units: &[usize], with_logged: bool) -> Result<UnitTable, EstimateError> {
        let logged = if with_logged {
            units
                .iter()
                .map(|&u| self.propensity[u])
                .collect::<Option<Vec<f64>>>()
        } else {
            None
        };
        UnitTable::new(
            self.rows(units),
            units
                .iter()
                .map(|&u| f64::from(self.treatment[u]))
                .collect(),
            units
                .iter()
                .map(|&u| self.outcome[u].unwrap_or(0.0))
                .collect(),
            logged,
            self.spec.outcome_kind,
        )
    }

    /// Units with outcomes, in unit order.
    fn scorable(&self) -> Vec<usize> {
        let mut s: Vec<usize> = self.outcome_order.clone();
        s.sort_unstable();
        s
    }

    fn all_logged(&self, units: &[usize]) -> bool {
        !units.is_empty() && units.iter().all(|&u| self.propensity[u].is_some())
    }

    /// Full cross-fitted refit on every unit with an outcome.
    fn refit(&self, scorable: &[usize]) -> Result<(NuisanceState, usize), EstimateError> {
        let logged = self.all_logged(scorable);
        let table = self.table(scorable, logged)?;
        let (values, report, fitted) = fit_nuisance_models(&table, &settings(&self.spec).nuisance)?;
        let mut all = vec![[f64::NAN; 3]; self.treatment.len()];
        for (i, &u) in scorable.iter().enumerate() {
            all[u] = [values.propensity[i], values.mu0[i], values.mu1[i]];
        }
        let last_outcome_seq = scorable
            .iter()
            .map(|&u| self.outcome_seq[u])
            .max()
            .unwrap_or(-1);
        Ok((
            NuisanceState {
                fitted: Arc::new(fitted),
                report,
                fit_id: 0,
                last_outcome_seq,
                fit_units: scorable.len(),
                fitted_at_ms: self.now_ms,
                logged,
                values: Arc::new(all),
            },
            scorable.len(),
        ))
    }

    /// Scores units without nuisance values using the current fold models.
    fn extend(
        &self,
        state: &NuisanceState,
        scorable: &[usize],
    ) -> Result<(NuisanceState, usize), EstimateError> {
        let mut values: Vec<[f64; 3]> = state.values.as_ref().clone();
        values.resize(self.treatment.len(), [f64::NAN; 3]);
        let new: Vec<usize> = scorable
            .iter()
            .copied()
            .filter(|&u| values[u][0].is_nan())
            .collect();
        if !new.is_empty() {
            let x = self.rows(&new);
            let logged: Option<Vec<f64>> = if state.logged {
                new.iter().map(|&u| self.propensity[u]).collect()
            } else {
                None
            };
            let (n, _) = state.fitted.predict(x.view(), logged.as_deref())?;
            for (i, &u) in new.iter().enumerate() {
                values[u] = [n.propensity[i], n.mu0[i], n.mu1[i]];
            }
        }
        let mut next = state.clone();
        next.values = Arc::new(values);
        Ok((next, new.len()))
    }

    /// Decides whether to refit, then brings nuisance values up to date.
    pub fn nuisance(
        &self,
        requested: bool,
    ) -> Result<(NuisanceState, Option<RefitReason>, usize), EstimateError> {
        let scorable = self.scorable();
        let reason = match &self.nuisance {
            _ if requested => Some(RefitReason::Requested),
            None => Some(RefitReason::FirstFit),
            Some(s) if s.logged && !self.all_logged(&scorable) => {
                Some(RefitReason::PropensitySource)
            }
            Some(s)
                if (scorable.len() as f64)
                    >= (s.fit_units as f64) * (1.0 + self.spec.refit_growth) =>
            {
                Some(RefitReason::Growth)
            }
            Some(s)
                if self.spec.refit_every_seconds > 0
                    && self.now_ms - s.fitted_at_ms
                        >= i64::from(self.spec.refit_every_seconds) * 1000 =>
            {
                Some(RefitReason::Schedule)
            }
            Some(_) => None,
        };
        match (reason, &self.nuisance) {
            (None, Some(state)) => {
                let (s, n) = self.extend(state, &scorable)?;
                Ok((s, None, n))
            }
            (reason, _) => {
                let (s, n) = self.refit(&scorable)?;
                Ok((s, reason.or(Some(RefitReason::Requested)), n))
            }
        }
    }

    /// The windows to score: cumulative, recent and each cohort.
    fn windows(&self) -> Vec<(String, pb::Window, Vec<usize>)> {
        let mut out = Vec::new();
        let cumulative = self.scorable();
        out.push((
            "cumulative".to_string(),
            pb::Window {
                kind: pb::window::Kind::Cumulative as i32,
                cohort: String::new(),
            },
            cumulative.clone(),
        ));
        // Recent: the last N outcomes and / or the last D days of observations.
        let mut recent: Vec<usize> = self.outcome_order.clone();
        if self.spec.recent_last_outcomes > 0 {
            let n = self.spec.recent_last_outcomes as usize;
            if recent.len() > n {
                recent.drain(..recent.len() - n);
            }
        }
        if self.spec.recent_last_days > 0 {
            let since = self.now_ms - i64::from(self.spec.recent_last_days) * 86_400_000;
            recent.retain(|&u| self.observed_at_ms[u] == 0 || self.observed_at_ms[u] >= since);
        }
        recent.sort_unstable();
        out.push((
            "recent".to_string(),
            pb::Window {
                kind: pb::window::Kind::Recent as i32,
                cohort: String::new(),
            },
            recent,
        ));
        let mut by_cohort: Vec<Vec<usize>> = vec![Vec::new(); self.cohort_names.len()];
        for &u in &cumulative {
            by_cohort[self.cohort[u] as usize].push(u);
        }
        for (c, units) in by_cohort.into_iter().enumerate() {
            if units.is_empty() {
                continue;
            }
            let name = self.cohort_names[c].clone();
            out.push((
                format!("cohort:{name}"),
                pb::Window {
                    kind: pb::window::Kind::Cohort as i32,
                    cohort: name,
                },
                units,
            ));
        }
        out
    }

    /// Scores one window on the units every ranked model covers.
    fn score_window(
        &self,
        units: &[usize],
        nuisance: &NuisanceState,
    ) -> (Result<Scoreboard, String>, usize, Vec<pb::IncompleteModel>) {
        let mut ranked = Vec::new();
        let mut incomplete = Vec::new();
        for (name, effects) in &self.models {
            let covered = units.iter().filter(|&&u| !effects[u].is_nan()).count();
            let share = if units.is_empty() {
                0.0
            } else {
                covered as f64 / units.len() as f64
            };
            if share >= self.spec.min_coverage && covered > 0 {
                ranked.push((name, effects));
            } else {
                incomplete.push(pb::IncompleteModel {
                    name: name.clone(),
                    coverage: share,
                });
            }
        }
        let common: Vec<usize> = units
            .iter()
            .copied()
            .filter(|&u| ranked.iter().all(|(_, e)| !e[u].is_nan()))
            .filter(|&u| !nuisance.values[u][0].is_nan())
            .collect();
        let n = common.len();
        let treated = common.iter().filter(|&&u| self.treatment[u] == 1).count();
        if treated < 2 || n - treated < 2 {
            return (
                Err(format!(
                    "too few units to score: {treated} treated and {} control units (at least 2 of each)",
                    n - treated
                )),
                n,
                incomplete,
            );
        }
        let first = self.outcome[common[0]];
        if common.iter().all(|&u| self.outcome[u] == first) {
            return (
                Err("constant outcome: every outcome in the window is equal".into()),
                n,
                incomplete,
            );
        }
        let table = match self.table(&common, false) {
            Ok(t) => t,
            Err(e) => return (Err(e.to_string()), n, incomplete),
        };
        let (values, _) = Nuisance::from_parts(
            common.iter().map(|&u| nuisance.values[u][0]).collect(),
            common.iter().map(|&u| nuisance.values[u][1]).collect(),
            common.iter().map(|&u| nuisance.values[u][2]).collect(),
            0.0,
        );
        let preds: Vec<ModelPredictions> = ranked
            .iter()
            .map(|(name, e)| {
                ModelPredictions::new((*name).clone(), common.iter().map(|&u| e[u]).collect())
            })
            .collect();
        let board = score(
            &table,
            &self.spec.feature_names,
            &values,
            Some(nuisance.report.clone()),
            &preds,
            &settings(&self.spec),
        );
        (Ok(board), n, incomplete)
    }

    /// The whole recompute.
    pub fn compute(&self, refit_requested: bool) -> Result<Computed, EstimateError> {
        let (nuisance, refit, newly_scored) = self.nuisance(refit_requested)?;
        let windows = self
            .windows()
            .into_iter()
            .map(|(key, window, units)| {
                let (board, n, incomplete) = self.score_window(&units, &nuisance);
                WindowResult {
                    key,
                    window,
                    board,
                    units: n,
                    incomplete,
                }
            })
            .collect();
        Ok(Computed {
            nuisance,
            refit,
            windows,
            newly_scored,
        })
    }
}
