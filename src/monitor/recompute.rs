//! One recompute of a dataset, as a blocking job over an immutable frame of
//! the cache: nuisance values for units that have none (a full cross-fitted
//! refit, or the current fold models applied to new units), then a
//! scoreboard per window.
//!
//! Between refits a recompute costs what its new units cost, not what the
//! history costs (DEVELOPERS.md, "Incremental recomputes"): a
//! [`ScoringMemo`] kept with the nuisance state holds each cohort window's
//! result (a window whose units did not change is not rescored), an index
//! of each cohort's units, and the cumulative window's mergeable parts
//! (per-estimator sums, the ATE's and each policy's moments, the overlap
//! sums), which the new units are merged into. The cumulative window's
//! rank and calibration metrics do not merge: they are recomputed over the
//! whole window when it has grown by the dataset's `rank_refresh_growth`
//! since they last were (each model's kept order merged with the new
//! units'), and carried over in between, the board saying over how many
//! units. A refit discards the memo, so the boards after a refit are a
//! from-scratch computation, equal to `plumbline score` on the same data.

use std::collections::HashMap;
use std::sync::Arc;

use ndarray::Array2;
use rayon::prelude::*;

use super::cache::{Columns, Shared, CHUNK_ROWS};
use crate::domain::{DatasetSpec, IncompleteModel, Window};
use crate::estimate::crossfit::{
    fit_nuisance_models_on, FittedNuisance, Nuisance, NuisanceReport, NuisanceSettings,
};
use crate::estimate::overlap::OverlapSums;
use crate::estimate::policy::{uniform_policy_gain, PolicySums};
use crate::estimate::pseudo::aipw_pseudo_outcome;
use crate::estimate::scoreboard::{
    assemble, column_rank_metrics, column_sums, score_keeping, Column, ConstantBasis, Gather,
    Parts, RankMetrics, Scoreboard, ScoredColumn, Settings, UnitColumns,
};
use crate::estimate::stats::Moments;
use crate::estimate::sums::ScoreSums;
use crate::estimate::targeting::{descending_order, merge_orders};
use crate::estimate::watch::{Arrivals, Signal, Watch, WatchSettings};
use crate::estimate::{EstimateError, FeatureRows, UnitTable, CONSTANT_EFFECT, ZERO_EFFECT};

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
    /// unit has not been scored yet. Chunked like the cache's columns, so
    /// scoring new units copies only the chunks they fall in.
    pub values: Shared<[f64; 3]>,
    /// Every unit among the first this many outcomes to arrive has values.
    pub scored_outcomes: usize,
    /// What the last recompute under this fit keeps for the next one.
    pub memo: Arc<ScoringMemo>,
}

/// What a recompute keeps for the next one under the same nuisance fit.
/// Valid only while the cache revision (bumped when a stored unit with an
/// outcome gets a prediction) and the active models are the ones it was
/// computed under; a refit starts a new one.
#[derive(Clone, Default)]
pub struct ScoringMemo {
    revision: u64,
    models: Vec<String>,
    /// Cohort windows: the number of units with outcomes each was scored on
    /// (outcomes are only ever added, so an equal count is an equal set) and
    /// its result.
    cohorts: HashMap<String, (usize, WindowResult)>,
    cumulative: Option<CumulativeMemo>,
    /// Kept across refits and revisions: it depends only on the arrival
    /// order of outcomes, which only grows.
    cohort_index: CohortIndex,
}

/// Each cohort's units with outcomes, in unit order, extended as outcomes
/// arrive, so that a recompute finds the cohorts that changed (and their
/// units) without a pass over the history.
#[derive(Clone, Default)]
struct CohortIndex {
    /// Outcomes folded in: a prefix of the arrival order.
    outcomes: usize,
    /// By cohort (index into the frame's cohort names).
    units: Vec<Vec<u32>>,
}

impl CohortIndex {
    fn update(&mut self, columns: &Columns, cohorts: usize) {
        let outcomes = columns.outcomes();
        if self.outcomes > outcomes {
            *self = Self::default();
        }
        if self.units.len() < cohorts {
            self.units.resize(cohorts, Vec::new());
        }
        let mut unsorted = Vec::new();
        for u in columns.arrived(self.outcomes..outcomes) {
            let c = columns.cohort[u] as usize;
            if c >= self.units.len() {
                self.units.resize(c + 1, Vec::new());
            }
            let units = &mut self.units[c];
            // An outcome may arrive late for a unit that came before ones
            // already indexed.
            if units.last().is_some_and(|&last| last as usize > u) {
                unsorted.push(c);
            }
            units.push(u as u32);
        }
        unsorted.sort_unstable();
        unsorted.dedup();
        for c in unsorted {
            self.units[c].sort_unstable();
        }
        self.outcomes = outcomes;
    }
}

/// The cumulative window's mergeable parts, and its rank metrics as of the
/// last refresh.
#[derive(Clone)]
struct CumulativeMemo {
    /// Units of `outcome_order` folded in (a prefix of it).
    outcomes: usize,
    /// Per active model: how many folded units it predicts.
    covered: Vec<usize>,
    /// The ranked models (indices into the frame's active models).
    ranked: Vec<usize>,
    /// The scored units (covered by every ranked model), in folding order.
    units: Vec<u32>,
    phi: Vec<f64>,
    /// Moments of `phi`: the ATE and its standard error.
    ate: Moments,
    treated: usize,
    basis: ConstantBasis,
    /// Per estimator, over the columns [0, s, -s, ranked...] (see
    /// [`ConstantBasis`]).
    sums: Vec<ScoreSums>,
    /// Per ranked model.
    policy: Vec<PolicySums>,
    overlap: OverlapSums,
    /// The rank metrics were computed on the first `rank_units` of `units`.
    rank_units: usize,
    /// Per scored column (zero-effect, constant-effect, ranked...).
    rank: Vec<RankMetrics>,
    /// Per ranked model, the descending order of the first `rank_units` of
    /// `units` by its prediction.
    orders: Vec<Vec<u32>>,
}

/// Windows below this many units get fresh rank metrics on every
/// recompute, whatever their growth: at 0.6 us per unit a refresh there
/// costs under 30 ms.
pub const RANKS_ALWAYS_FRESH_BELOW: usize = 50_000;

/// What a recompute reads: the cache's columns, shared chunk by chunk
/// rather than copied.
pub struct Frame {
    pub spec: DatasetSpec,
    pub columns: Columns,
    pub cohort_names: Vec<String>,
    /// Active models: name and effects (NaN = missing), in registration order.
    pub models: Vec<(String, Shared<f64>)>,
    /// The cache's revision (see [`ScoringMemo`]).
    pub revision: u64,
    pub nuisance: Option<NuisanceState>,
    pub now_ms: i64,
    /// The cumulative window's rank metrics are refreshed on every
    /// recompute below this many units ([`RANKS_ALWAYS_FRESH_BELOW`]).
    pub ranks_fresh_below: usize,
    /// The stream watch as the last recompute left it; this one folds in
    /// the outcomes that arrived since.
    pub watch: Watch,
    pub watch_settings: WatchSettings,
}

/// Nuisance values fixed for the units the watch took this recompute, by
/// unit, from the fold models in place before any refit.
type Fixed = HashMap<usize, [f64; 3]>;

impl Frame {
    /// Reproduces a recorded fit: the units whose outcome sequence is at most
    /// `last_outcome_seq`, in unit order, with the dataset's seed.
    pub fn reproduce_fit(&self, last_outcome_seq: i64) -> Result<NuisanceState, EstimateError> {
        let outcomes = usize::try_from(last_outcome_seq.saturating_add(1))
            .unwrap_or(0)
            .min(self.columns.outcomes());
        self.refit(&self.columns.arrived(0..outcomes))
            .map(|(s, _)| s)
    }
}

/// What a recompute was asked for beyond its schedule.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Asked {
    /// A full cross-fitted refit of the nuisance models.
    pub refit: bool,
    /// The cumulative window's rank metrics over all of its units, whatever
    /// its growth since they were last computed.
    pub refresh_ranks: bool,
}

/// Why the nuisance models are refitted.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum RefitReason {
    Requested,
    FirstFit,
    Growth,
    Schedule,
    PropensitySource,
    Misfit,
}

impl RefitReason {
    /// A stable name for machine readers (event details).
    pub fn code(self) -> &'static str {
        match self {
            Self::Requested => "requested",
            Self::FirstFit => "first_fit",
            Self::Growth => "growth",
            Self::Schedule => "schedule",
            Self::PropensitySource => "propensity_source",
            Self::Misfit => "misfit",
        }
    }
}

impl std::fmt::Display for RefitReason {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Self::Requested => "asked for",
            Self::FirstFit => "first fit",
            Self::Growth => "outcomes grew past recompute.refit_growth",
            Self::Schedule => "recompute.refit_every_seconds elapsed",
            Self::PropensitySource => {
                "units arrived without a logged propensity; fitting one instead"
            }
            Self::Misfit => "arriving units no longer fit the nuisance models",
        })
    }
}

/// One window's result.
#[derive(Clone)]
pub struct WindowResult {
    pub key: String,
    pub window: Window,
    pub board: Result<Scoreboard, String>,
    pub units: usize,
    pub incomplete: Vec<IncompleteModel>,
    /// Kept from the previous recompute: the window's units did not change.
    pub reused: bool,
}

pub struct Computed {
    pub nuisance: NuisanceState,
    /// Set when this recompute refitted (the fit still needs a record id).
    pub refit: Option<RefitReason>,
    pub windows: Vec<WindowResult>,
    pub newly_scored: usize,
    /// The watch after this recompute's arrivals, and what it decided.
    pub watch: Watch,
    pub signals: Vec<Signal>,
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
        let d = self.columns.features.width();
        let mut out = Vec::with_capacity(units.len() * d);
        for &u in units {
            out.extend_from_slice(self.columns.features.row(u));
        }
        Array2::from_shape_vec((units.len(), d), out).unwrap_or_else(|_| Array2::zeros((0, d)))
    }

    /// The features of `units`, read where the cache keeps them.
    fn features<'a>(&'a self, units: &'a [usize]) -> FeatureRows<'a> {
        FeatureRows::chunked(
            self.columns.features.chunks(),
            CHUNK_ROWS,
            self.columns.features.width(),
            units,
        )
    }

    /// The treatments, outcomes and (`with_logged`) logged propensities of
    /// `units`. The table holds no features: they stay in the cache and
    /// travel as [`Frame::features`], so no pass copies the history's.
    fn table(&self, units: &[usize], with_logged: bool) -> Result<UnitTable, EstimateError> {
        let logged = if with_logged {
            units
                .iter()
                .map(|&u| self.columns.propensity_of(u))
                .collect::<Option<Vec<f64>>>()
        } else {
            None
        };
        UnitTable::new(
            Array2::zeros((units.len(), 0)),
            units
                .iter()
                .map(|&u| f64::from(self.columns.treatment[u]))
                .collect(),
            units
                .iter()
                .map(|&u| self.columns.outcome_of(u).unwrap_or(0.0))
                .collect(),
            logged,
            self.spec.outcome_kind,
        )
    }

    /// Units with outcomes, in unit order.
    fn scorable(&self) -> Vec<usize> {
        self.columns.arrived(0..self.columns.outcomes())
    }

    fn all_logged(&self, units: &[usize]) -> bool {
        !units.is_empty()
            && units
                .iter()
                .all(|&u| self.columns.propensity_of(u).is_some())
    }

    /// Full cross-fitted refit on `scorable`: the units of the first
    /// outcomes to arrive (all of them, or those of a recorded fit), in unit
    /// order; so the last outcome sequence number the fit used is their
    /// count minus one.
    fn refit(&self, scorable: &[usize]) -> Result<(NuisanceState, usize), EstimateError> {
        let logged = self.all_logged(scorable);
        let table = self.table(scorable, logged)?;
        let (values, report, fitted) = fit_nuisance_models_on(
            &table,
            self.features(scorable),
            &settings(&self.spec).nuisance,
        )?;
        let mut all = Shared::filled(self.columns.units(), [f64::NAN; 3]);
        for (i, &u) in scorable.iter().enumerate() {
            all[u] = [values.propensity[i], values.mu0[i], values.mu1[i]];
        }
        let last_outcome_seq = scorable.len() as i64 - 1;
        Ok((
            NuisanceState {
                fitted: Arc::new(fitted),
                report,
                fit_id: 0,
                last_outcome_seq,
                fit_units: scorable.len(),
                fitted_at_ms: self.now_ms,
                logged,
                values: all,
                scored_outcomes: scorable.len(),
                memo: Arc::default(),
            },
            scorable.len(),
        ))
    }

    /// Scores the units whose outcomes arrived since `state` last scored
    /// any, with the current fold models. Touches only those units.
    /// `arrivals`: [`Frame::arrivals_since`] of `state`.
    fn extend(
        &self,
        state: &NuisanceState,
        arrivals: Vec<usize>,
        fixed: &Fixed,
    ) -> Result<(NuisanceState, usize), EstimateError> {
        let outcomes = self.columns.outcomes();
        let mut values = state.values.clone();
        while values.len() < self.columns.units() {
            values.push([f64::NAN; 3]);
        }
        let mut new: Vec<usize> = arrivals
            .into_iter()
            .filter(|&u| values[u][0].is_nan())
            .collect();
        let scored = new.len();
        // The watch already applied these fold models to its units.
        new.retain(|u| match fixed.get(u) {
            Some(v) => {
                values[*u] = *v;
                false
            }
            None => true,
        });
        if !new.is_empty() {
            let x = self.rows(&new);
            let logged: Option<Vec<f64>> = if state.logged {
                new.iter().map(|&u| self.columns.propensity_of(u)).collect()
            } else {
                None
            };
            let (n, _) = state.fitted.predict(x.view(), logged.as_deref())?;
            for (i, &u) in new.iter().enumerate() {
                values[u] = [n.propensity[i], n.mu0[i], n.mu1[i]];
            }
        }
        let mut next = state.clone();
        next.values = values;
        next.scored_outcomes = outcomes;
        Ok((next, scored))
    }

    /// Hands the watch the units whose outcomes arrived since it last
    /// looked, with nuisance values from the fold models in place before
    /// this recompute (which never saw them); returns what it decided and
    /// those values, which the boards reuse unless the recompute refits.
    /// Before the first fit there are no such models: those units only fit
    /// it, and the watch starts after them.
    fn watch_arrivals(&mut self) -> Result<(Vec<Signal>, Fixed), EstimateError> {
        let outcomes = self.columns.outcomes();
        let from = usize::try_from(self.watch.units)
            .unwrap_or(usize::MAX)
            .min(outcomes);
        let units = self.columns.arrived(from..outcomes);
        if units.is_empty() {
            return Ok((Vec::new(), Fixed::new()));
        }
        let logged: Option<Vec<f64>> = units
            .iter()
            .map(|&u| self.columns.propensity_of(u))
            .collect();
        let Some(state) = self
            .nuisance
            .as_ref()
            .filter(|s| !s.logged || logged.is_some())
        else {
            // No fit yet, or a fit on logged propensities and units without
            // one (the propensity-source refit comes next): not watched.
            self.watch.skip_baseline(units.len() as u64);
            return Ok((Vec::new(), Fixed::new()));
        };
        let x = self.rows(&units);
        let logged = if state.logged { logged } else { None };
        let (nuisance, _) = state.fitted.predict(x.view(), logged.as_deref())?;
        let treatment: Vec<f64> = units
            .iter()
            .map(|&u| f64::from(self.columns.treatment[u]))
            .collect();
        let outcome: Vec<f64> = units
            .iter()
            .map(|&u| self.columns.outcome_of(u).unwrap_or(0.0))
            .collect();
        let models: Vec<(String, Vec<f64>)> = self
            .models
            .iter()
            .map(|(name, effects)| (name.clone(), units.iter().map(|&u| effects[u]).collect()))
            .collect();
        // Standard layout: `rows` builds it from one row after another.
        let features = x.as_slice().unwrap_or(&[]);
        let signals = self.watch.observe(
            &Arrivals {
                treatment: &treatment,
                outcome: &outcome,
                nuisance: &nuisance,
                propensity_fitted: !state.logged,
                features,
                feature_names: &self.spec.feature_names,
                models: &models,
            },
            &self.watch_settings,
        );
        let fixed = units
            .iter()
            .enumerate()
            .map(|(i, &u)| {
                (
                    u,
                    [nuisance.propensity[i], nuisance.mu0[i], nuisance.mu1[i]],
                )
            })
            .collect();
        Ok((signals, fixed))
    }

    /// The units whose outcomes arrived since `state` last scored any, in
    /// unit order.
    fn arrivals_since(&self, state: &NuisanceState) -> Vec<usize> {
        let outcomes = self.columns.outcomes();
        self.columns
            .arrived(state.scored_outcomes.min(outcomes)..outcomes)
    }

    /// Decides whether to refit, then brings nuisance values up to date.
    /// Without a refit this reads only the outcomes that arrived since the
    /// last recompute.
    pub fn nuisance(
        &self,
        requested: bool,
        misfit: bool,
        fixed: &Fixed,
    ) -> Result<(NuisanceState, Option<RefitReason>, usize), EstimateError> {
        let outcomes = self.columns.outcomes();
        let arrivals = self
            .nuisance
            .as_ref()
            .map(|s| self.arrivals_since(s))
            .unwrap_or_default();
        let reason = match &self.nuisance {
            _ if requested => Some(RefitReason::Requested),
            None => Some(RefitReason::FirstFit),
            Some(_) if misfit => Some(RefitReason::Misfit),
            Some(s)
                if s.logged
                    && arrivals
                        .iter()
                        .any(|&u| self.columns.propensity_of(u).is_none()) =>
            {
                Some(RefitReason::PropensitySource)
            }
            Some(s)
                if (outcomes as f64) >= (s.fit_units as f64) * (1.0 + self.spec.refit_growth) =>
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
                let (s, n) = self.extend(state, arrivals, fixed)?;
                Ok((s, None, n))
            }
            (reason, _) => {
                let (s, n) = self.refit(&self.scorable())?;
                Ok((s, reason.or(Some(RefitReason::Requested)), n))
            }
        }
    }

    /// The recent window's units: the last N outcomes and / or the last D
    /// days of observations, in unit order.
    fn recent(&self) -> Vec<usize> {
        let outcomes = self.columns.outcomes();
        let n = match self.spec.recent_last_outcomes {
            0 => outcomes,
            n => outcomes.min(n as usize),
        };
        let mut recent = self.columns.arrived(outcomes - n..outcomes);
        if self.spec.recent_last_days > 0 {
            let since = self.now_ms - i64::from(self.spec.recent_last_days) * 86_400_000;
            recent.retain(|&u| {
                self.columns.observed_at_ms[u] == 0 || self.columns.observed_at_ms[u] >= since
            });
        }
        recent
    }

    /// Which active models a window ranks, from how many of its units with
    /// outcomes each predicts (`covered`, out of `units`); the rest are
    /// listed as incomplete with their coverage.
    fn ranked_models(&self, covered: &[usize], units: usize) -> (Vec<usize>, Vec<IncompleteModel>) {
        let mut ranked = Vec::new();
        let mut incomplete = Vec::new();
        for (k, ((name, _), &c)) in self.models.iter().zip(covered).enumerate() {
            let share = if units == 0 {
                0.0
            } else {
                c as f64 / units as f64
            };
            if share >= self.spec.min_coverage && c > 0 {
                ranked.push(k);
            } else {
                incomplete.push(IncompleteModel {
                    name: name.clone(),
                    coverage: share,
                });
            }
        }
        (ranked, incomplete)
    }

    fn coverage(&self, units: &[usize]) -> Vec<usize> {
        self.models
            .iter()
            .map(|(_, effects)| units.iter().filter(|&&u| !effects[u].is_nan()).count())
            .collect()
    }

    /// The units of `units` that every ranked model covers and that have
    /// nuisance values.
    fn common(&self, units: &[usize], ranked: &[usize], nuisance: &NuisanceState) -> Vec<usize> {
        units
            .iter()
            .copied()
            .filter(|&u| ranked.iter().all(|&k| !self.models[k].1[u].is_nan()))
            .filter(|&u| !nuisance.values[u][0].is_nan())
            .collect()
    }

    /// The named states of a window that cannot be scored.
    fn degenerate(&self, common: &[usize]) -> Option<String> {
        let n = common.len();
        let treated = common
            .iter()
            .filter(|&&u| self.columns.treatment[u] == 1)
            .count();
        if treated < 2 || n - treated < 2 {
            return Some(format!(
                "too few units to score: {treated} treated and {} control units (at least 2 of each)",
                n - treated
            ));
        }
        let first = self.columns.outcome_of(common[0]);
        if common.iter().all(|&u| self.columns.outcome_of(u) == first) {
            return Some("constant outcome: every outcome in the window is equal".into());
        }
        None
    }

    /// Scores one window from scratch on the units every ranked model
    /// covers; with `keep`, also returns the parts a later recompute can
    /// merge new units into.
    fn score_window(
        &self,
        units: &[usize],
        nuisance: &NuisanceState,
        keep: bool,
    ) -> (WindowResult, Option<CumulativeMemo>) {
        let covered = self.coverage(units);
        let (ranked, incomplete) = self.ranked_models(&covered, units.len());
        let common = self.common(units, &ranked, nuisance);
        let n = common.len();
        let result = |board: Result<Scoreboard, String>, incomplete| WindowResult {
            key: String::new(),
            window: Window::Cumulative,
            board,
            units: n,
            incomplete,
            reused: false,
        };
        if let Some(state) = self.degenerate(&common) {
            return (result(Err(state), incomplete), None);
        }
        let table = match self.table(&common, false) {
            Ok(t) => t,
            Err(e) => return (result(Err(e.to_string()), incomplete), None),
        };
        let values = self.nuisance_values(&common, nuisance);
        // Each model's predictions are read where the cache keeps them, a
        // block at a time: the pass never holds all models' columns.
        let gathers: Vec<Box<Gather<'_>>> = ranked
            .iter()
            .map(|&k| {
                let (effects, common) = (&self.models[k].1, &common);
                Box::new(move |start: usize, out: &mut [f64]| {
                    for (o, &u) in out.iter_mut().zip(&common[start..]) {
                        *o = effects[u];
                    }
                }) as Box<Gather<'_>>
            })
            .collect();
        let columns: Vec<Column<'_>> = gathers.iter().map(|g| Column::Gathered(g)).collect();
        let models: Vec<ScoredColumn<'_>> = ranked
            .iter()
            .zip(&columns)
            .map(|(&k, &effects)| ScoredColumn {
                name: self.models[k].0.clone(),
                baseline: false,
                effects,
            })
            .collect();
        let scored = score_keeping(
            &table,
            self.features(&common),
            &self.spec.feature_names,
            &values,
            Some(nuisance.report.clone()),
            &models,
            &settings(&self.spec),
        );
        let memo = keep.then(|| {
            let basis = ConstantBasis::new(scored.board.ate.estimate);
            let mut overlap =
                OverlapSums::new(self.columns.features.width(), self.spec.overlap_eps);
            overlap.add(
                self.features(&common),
                table.treatment(),
                &values.propensity,
            );
            CumulativeMemo {
                outcomes: self.columns.outcomes(),
                covered,
                ranked: ranked.clone(),
                units: common.iter().map(|&u| u as u32).collect(),
                treated: table.n_treated(),
                basis,
                sums: basis_sums(&table, &values, &scored.phi, basis, &columns),
                policy: scored.policy[2..].to_vec(),
                ate: Moments::of(&scored.phi),
                rank_units: n,
                rank: scored.rank,
                orders: scored.orders,
                phi: scored.phi,
                overlap,
            }
        });
        (result(Ok(scored.board), incomplete), memo)
    }

    fn nuisance_values(&self, units: &[usize], nuisance: &NuisanceState) -> Nuisance {
        Nuisance::from_parts(
            units.iter().map(|&u| nuisance.values[u][0]).collect(),
            units.iter().map(|&u| nuisance.values[u][1]).collect(),
            units.iter().map(|&u| nuisance.values[u][2]).collect(),
            0.0,
        )
        .0
    }

    /// The cumulative window after merging the units whose outcomes arrived
    /// since `memo` into it. None when the merge would not equal a
    /// from-scratch pass: the set of ranked models changed (the common
    /// units would change for the whole history).
    fn extend_cumulative(
        &self,
        mut memo: CumulativeMemo,
        nuisance: &NuisanceState,
        refresh_ranks: bool,
    ) -> Option<(WindowResult, CumulativeMemo)> {
        let outcomes = self.columns.outcomes();
        if memo.outcomes > outcomes {
            return None;
        }
        let new = self.columns.arrived(memo.outcomes..outcomes);
        for (c, added) in memo.covered.iter_mut().zip(self.coverage(&new)) {
            *c += added;
        }
        let (ranked, incomplete) = self.ranked_models(&memo.covered, self.columns.outcomes());
        if ranked != memo.ranked {
            return None;
        }
        memo.outcomes = self.columns.outcomes();
        let fresh = self.common(&new, &ranked, nuisance);
        if !fresh.is_empty() {
            let table = self.table(&fresh, false).ok()?;
            let values = self.nuisance_values(&fresh, nuisance);
            let phi = aipw_pseudo_outcome(table.outcome(), table.treatment(), &values);
            let effects: Vec<Vec<f64>> = ranked
                .iter()
                .map(|&k| fresh.iter().map(|&u| self.models[k].1[u]).collect())
                .collect();
            let slices: Vec<Column<'_>> = effects.iter().map(|e| Column::Slice(e)).collect();
            let added = basis_sums(&table, &values, &phi, memo.basis, &slices);
            for (total, part) in memo.sums.iter_mut().zip(&added) {
                total.merge(part);
            }
            for (p, e) in memo.policy.iter_mut().zip(&effects) {
                p.add(&phi, e, self.spec.treatment_cost);
            }
            memo.ate.merge(&Moments::of(&phi));
            memo.units.extend(fresh.iter().map(|&u| u as u32));
            memo.phi.extend_from_slice(&phi);
            memo.treated += table.n_treated();
            memo.overlap
                .add(self.features(&fresh), table.treatment(), &values.propensity);
        }
        let n = memo.units.len();
        let grown = (n - memo.rank_units) as f64;
        if refresh_ranks
            || n < self.ranks_fresh_below
            || (grown > 0.0 && grown >= self.spec.rank_refresh_growth * memo.rank_units as f64)
        {
            self.refresh_ranks(&mut memo);
        }
        let ate = memo.ate.estimate();
        let cost = self.spec.treatment_cost;
        let mut policy = vec![
            uniform_policy_gain(ate, 0.0 > cost, cost),
            uniform_policy_gain(ate, ate.estimate > cost, cost),
        ];
        policy.extend(memo.policy.iter().map(PolicySums::gain));
        let mut names = vec![
            (ZERO_EFFECT.to_string(), true),
            (CONSTANT_EFFECT.to_string(), true),
        ];
        names.extend(ranked.iter().map(|&k| (self.models[k].0.clone(), false)));
        let board = assemble(
            Parts {
                models: names,
                n_units: n,
                ate,
                n_treated: memo.treated,
                sums: memo
                    .sums
                    .iter()
                    .map(|s| memo.basis.resolve(s, ate.estimate))
                    .collect(),
                policy,
                rank: &memo.rank,
                rank_units: memo.rank_units,
                overlap: memo.overlap.report(&self.spec.feature_names),
                nuisance: Some(nuisance.report.clone()),
            },
            &settings(&self.spec),
        );
        let result = WindowResult {
            key: String::new(),
            window: Window::Cumulative,
            board: Ok(board),
            units: n,
            incomplete,
            reused: false,
        };
        Some((result, memo))
    }

    /// Brings the cumulative window's rank metrics up to all of its units:
    /// each model's kept order is merged with the new units' own, one model
    /// at a time per thread so that only those models' predictions are
    /// gathered at once.
    fn refresh_ranks(&self, memo: &mut CumulativeMemo) {
        let settings = settings(&self.spec);
        let (n, offset) = (memo.units.len(), memo.rank_units);
        let (phi, units) = (&memo.phi, &memo.units);
        let models: Vec<RankMetrics> = memo
            .orders
            .par_iter_mut()
            .zip(&memo.ranked)
            .enumerate()
            .map(|(j, (order, &k))| {
                let all = self.gather(k, units);
                if offset < n {
                    let later: Vec<u32> = descending_order(&all[offset..])
                        .into_iter()
                        .map(|i| i + offset as u32)
                        .collect();
                    *order = merge_orders(&all, order, &later);
                }
                column_rank_metrics(phi, &all, order, j + 2, &settings)
            })
            .collect();
        // The baselines predict one value for every unit: every unit is
        // tied, in unit order.
        let identity: Vec<u32> = (0..n as u32).collect();
        let ate = memo.ate.estimate().estimate;
        let mut rank: Vec<RankMetrics> = [0.0, ate]
            .iter()
            .enumerate()
            .map(|(c, &value)| column_rank_metrics(phi, &vec![value; n], &identity, c, &settings))
            .collect();
        rank.extend(models);
        memo.rank = rank;
        memo.rank_units = n;
    }

    /// Model k's predictions for `units`.
    fn gather(&self, k: usize, units: &[u32]) -> Vec<f64> {
        let e = &self.models[k].1;
        units.iter().map(|&u| e[u as usize]).collect()
    }

    /// The whole recompute.
    pub fn compute(mut self, asked: Asked) -> Result<Computed, EstimateError> {
        let previous = self
            .nuisance
            .as_mut()
            .map(|n| std::mem::take(&mut n.memo))
            .unwrap_or_default();
        let (signals, fixed) = self.watch_arrivals()?;
        let misfit = signals
            .iter()
            .any(|s| matches!(s, Signal::NuisanceMisfit { .. }));
        let (mut nuisance, refit, newly_scored) = self.nuisance(asked.refit, misfit, &fixed)?;
        if refit.is_some() {
            self.watch.refitted();
        }
        let names: Vec<String> = self.models.iter().map(|(n, _)| n.clone()).collect();
        let mut previous = match Arc::try_unwrap(previous) {
            Ok(memo) => memo,
            Err(shared) => (*shared).clone(),
        };
        if refit.is_some() || previous.revision != self.revision || previous.models != names {
            previous = ScoringMemo::default();
        }
        let mut cohort_index = std::mem::take(&mut previous.cohort_index);
        cohort_index.update(&self.columns, self.cohort_names.len());
        let mut memo = ScoringMemo {
            revision: self.revision,
            models: names,
            ..ScoringMemo::default()
        };
        let named = |mut result: WindowResult, window: Window| {
            result.key = window.key();
            result.window = window;
            result
        };
        let mut windows = Vec::new();
        let cumulative = match previous
            .cumulative
            .take()
            .and_then(|m| self.extend_cumulative(m, &nuisance, asked.refresh_ranks))
        {
            Some((r, m)) => {
                memo.cumulative = Some(m);
                r
            }
            None => {
                let (r, m) = self.score_window(&self.scorable(), &nuisance, true);
                memo.cumulative = m;
                r
            }
        };
        windows.push(named(cumulative, Window::Cumulative));
        windows.push(named(
            self.score_window(&self.recent(), &nuisance, false).0,
            Window::Recent,
        ));
        for (c, units) in cohort_index.units.iter().enumerate() {
            let Some(name) = self.cohort_names.get(c).filter(|_| !units.is_empty()) else {
                continue;
            };
            let key = format!("cohort:{name}");
            let result = match previous.cohorts.remove(&key) {
                Some((count, r)) if count == units.len() => WindowResult { reused: true, ..r },
                _ => {
                    let units: Vec<usize> = units.iter().map(|&u| u as usize).collect();
                    self.score_window(&units, &nuisance, false).0
                }
            };
            let result = named(result, Window::Cohort(name.clone()));
            memo.cohorts.insert(key, (units.len(), result.clone()));
            windows.push(result);
        }
        memo.cohort_index = cohort_index;
        nuisance.memo = Arc::new(memo);
        Ok(Computed {
            nuisance,
            refit,
            windows,
            newly_scored,
            watch: self.watch,
            signals,
        })
    }
}

/// Per-estimator sums over the columns [0, s, -s, models...] that stand in
/// for the scored columns of a window that will grow (see
/// [`ConstantBasis`]).
fn basis_sums(
    table: &UnitTable,
    values: &Nuisance,
    phi: &[f64],
    basis: ConstantBasis,
    effects: &[Column<'_>],
) -> Vec<ScoreSums> {
    let [up, down] = basis.nodes();
    let mut columns = vec![
        Column::Uniform(0.0),
        Column::Uniform(up),
        Column::Uniform(down),
    ];
    columns.extend_from_slice(effects);
    column_sums(
        &UnitColumns {
            outcome: table.outcome(),
            treatment: table.treatment(),
            propensity: &values.propensity,
            mu0: &values.mu0,
            mu1: &values.mu1,
            phi,
        },
        &columns,
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::OutcomeKind;
    use crate::synth::{candidates, draw, effect_moments, Design};

    const D: usize = 4;

    /// A frame over the first `units` of a fixed draw, in cohorts of 1,000,
    /// every unit with an outcome and a prediction from three models.
    fn frame(units: usize, nuisance: Option<NuisanceState>) -> Frame {
        let data = draw(Design::NieWagerB, 5000, D, 1.0, 17);
        let (_, var_tau) = effect_moments(Design::NieWagerB, 20_000, 3);
        let models = candidates(&data.tau, var_tau, 3, 5);
        let spec = DatasetSpec {
            name: "t".into(),
            feature_names: (1..=D).map(|j| format!("x{j}")).collect(),
            outcome_kind: OutcomeKind::Continuous,
            treatment_cost: 0.0,
            folds: 0,
            overlap_eps: 0.0,
            overlap_max_extreme_share: 0.0,
            overlap_min_effective_share: 0.0,
            recent_last_outcomes: 0,
            recent_last_days: 0,
            recompute_every_outcomes: 0,
            recompute_every_seconds: 0,
            refit_growth: 10.0,
            refit_every_seconds: 0,
            rank_refresh_growth: 0.0,
            alert_horizon: 0,
            min_coverage: 0.0,
            alpha: 0.0,
            seed: 3,
        }
        .normalized()
        .expect("spec");
        let cohorts = 5;
        let mut columns = Columns::new(D);
        let features = data.features.as_slice().expect("standard layout");
        for u in 0..units {
            columns.push_unit(
                &features[u * D..(u + 1) * D],
                data.treatment[u] as u8,
                None,
                (u / 1000) as u32,
            );
            columns.add_outcome(u, data.outcome[u], 0);
        }
        Frame {
            spec,
            columns,
            cohort_names: (0..cohorts).map(|c| format!("c{c}")).collect(),
            models: models
                .iter()
                .map(|m| {
                    (
                        m.predictions.name.clone(),
                        Shared::from_rows(1, &m.predictions.effects[..units]),
                    )
                })
                .collect(),
            revision: 0,
            nuisance,
            now_ms: 0,
            ranks_fresh_below: RANKS_ALWAYS_FRESH_BELOW,
            watch: Watch::default(),
            watch_settings: WatchSettings::default(),
        }
    }

    /// Numbers agree to 1e-9 relative (rounding of merged versus one-pass
    /// sums is near 1e-15; p_best counts draws, which would differ by
    /// 1/4000 only if a draw sat within rounding of a tie); everything else
    /// is equal.
    fn assert_close(a: &serde_json::Value, b: &serde_json::Value, path: &str) {
        use serde_json::Value;
        match (a, b) {
            (Value::Number(x), Value::Number(y)) => {
                let (x, y) = (x.as_f64().unwrap_or(0.0), y.as_f64().unwrap_or(0.0));
                let tol = 1e-9 * x.abs().max(y.abs()).max(1.0);
                assert!((x - y).abs() <= tol, "{path}: {x} vs {y}");
            }
            (Value::Array(x), Value::Array(y)) => {
                assert_eq!(x.len(), y.len(), "{path}");
                for (i, (p, q)) in x.iter().zip(y).enumerate() {
                    assert_close(p, q, &format!("{path}[{i}]"));
                }
            }
            (Value::Object(x), Value::Object(y)) => {
                assert_eq!(x.len(), y.len(), "{path}");
                for (k, v) in x {
                    assert_close(v, &y[k], &format!("{path}.{k}"));
                }
            }
            _ => assert_eq!(a, b, "{path}"),
        }
    }

    fn board(c: &Computed, key: &str) -> serde_json::Value {
        let w = c.windows.iter().find(|w| w.key == key).expect("window");
        serde_json::to_value(w.board.as_ref().expect("scored")).expect("json")
    }

    #[test]
    fn merged_cumulative_equals_a_from_scratch_pass() {
        let first = frame(3000, None)
            .compute(Asked::default())
            .expect("first fit");
        assert!(first.refit.is_some());
        let kept = first.nuisance.clone();
        assert!(kept.memo.cumulative.is_some());

        // Two more cohorts arrive; the fit is current, so nothing is refit.
        let second = frame(5000, Some(kept.clone()))
            .compute(Asked::default())
            .expect("incremental");
        assert!(second.refit.is_none());
        assert_eq!(second.newly_scored, 2000);
        let merged = second.nuisance.memo.cumulative.as_ref().expect("memo");
        assert_eq!(merged.units.len(), 5000);

        // The same recompute without the memo scores every window afresh.
        let mut cleared = kept;
        cleared.memo = Arc::default();
        let scratch = frame(5000, Some(cleared))
            .compute(Asked::default())
            .expect("scratch");
        assert_close(
            &board(&second, "cumulative"),
            &board(&scratch, "cumulative"),
            "",
        );
        for c in 0..5 {
            let key = format!("cohort:c{c}");
            assert_close(&board(&second, &key), &board(&scratch, &key), &key);
        }
        // Cohorts that did not change are the kept results, bit for bit.
        assert_eq!(board(&second, "cohort:c0"), board(&first, "cohort:c0"));
    }

    /// The board without the rank and calibration metrics (and the count of
    /// units they cover).
    fn without_rank_metrics(mut v: serde_json::Value) -> serde_json::Value {
        if let Some(o) = v.as_object_mut() {
            o.remove("rank_metrics_units");
        }
        for m in v["models"].as_array_mut().into_iter().flatten() {
            if let Some(o) = m.as_object_mut() {
                for key in ["autoc", "qini", "blp_slope", "calibration"] {
                    o.remove(key);
                }
            }
        }
        v
    }

    fn rank_metrics_of(v: &serde_json::Value) -> Vec<serde_json::Value> {
        let mut models: Vec<serde_json::Value> = v["models"]
            .as_array()
            .expect("models")
            .iter()
            .map(|m| {
                serde_json::json!([
                    m["name"],
                    m["autoc"],
                    m["qini"],
                    m["blp_slope"],
                    m["calibration"]
                ])
            })
            .collect();
        models.sort_by_key(|m| m[0].to_string());
        models
    }

    #[test]
    fn cumulative_rank_metrics_wait_for_the_set_growth_and_the_rest_is_exact() {
        let at = |units: usize, nuisance: Option<NuisanceState>| {
            let mut f = frame(units, nuisance);
            f.ranks_fresh_below = 0;
            f
        };
        let first = at(4000, None).compute(Asked::default()).expect("first fit");
        let scratch = |units: usize| {
            let mut cleared = first.nuisance.clone();
            cleared.memo = Arc::default();
            at(units, Some(cleared))
                .compute(Asked::default())
                .expect("scratch")
        };

        // 100 new units are 2.5% of the 4,000 ranked: under the default 5%,
        // so the rank metrics are the first recompute's, and say so.
        let second = at(4100, Some(first.nuisance.clone()))
            .compute(Asked::default())
            .expect("incremental");
        let (carried, fresh) = (
            board(&second, "cumulative"),
            board(&scratch(4100), "cumulative"),
        );
        assert_eq!(carried["n_units"], 4100);
        assert_eq!(carried["rank_metrics_units"], 4000);
        assert_eq!(fresh["rank_metrics_units"], 4100);
        assert_eq!(
            rank_metrics_of(&carried),
            rank_metrics_of(&board(&first, "cumulative"))
        );
        assert_ne!(rank_metrics_of(&carried), rank_metrics_of(&fresh));
        // Everything else is the from-scratch figure.
        assert_close(
            &without_rank_metrics(carried),
            &without_rank_metrics(fresh),
            "",
        );

        // Asked for, a refresh needs no growth.
        let mut asked = at(4100, Some(second.nuisance.clone()));
        asked.nuisance.as_mut().expect("fit").memo = second.nuisance.memo.clone();
        let on_request = asked
            .compute(Asked {
                refresh_ranks: true,
                ..Asked::default()
            })
            .expect("asked");
        assert_close(
            &board(&on_request, "cumulative"),
            &board(&scratch(4100), "cumulative"),
            "",
        );

        // 200 more make 7.5% of the 4,000: the refresh brings every figure
        // to the from-scratch pass over 4,300 units.
        let third = at(4300, Some(second.nuisance.clone()))
            .compute(Asked::default())
            .expect("refresh");
        let refreshed = board(&third, "cumulative");
        assert_eq!(refreshed["rank_metrics_units"], 4300);
        assert_close(&refreshed, &board(&scratch(4300), "cumulative"), "");
    }
}
