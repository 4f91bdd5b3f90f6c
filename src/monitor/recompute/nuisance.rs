//! The nuisance values a recompute scores with: whether to refit, the
//! cross-fitted refit itself, and the current fold models applied to the
//! units that arrived since the last recompute.

use std::collections::HashMap;
use std::sync::Arc;

use serde::Deserialize;

use super::{settings, RecomputeInput, ScoringMemo};
use crate::estimate::crossfit::{
    assign_folds, fit_nuisance_models_on, FittedNuisance, NuisanceReport, NuisanceSettings,
};
use crate::estimate::EstimateError;
use crate::monitor::cache::ChunkedColumn;

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
    pub values: ChunkedColumn<[f64; 3]>,
    /// Per unit (by sequence): the cross-fit fold whose models gave the
    /// unit its values, [`NO_FOLD`] for a unit scored after the fit. The
    /// error bounds and the blend need each unit's fold (see
    /// [`NuisanceState::fold_of`]); the fit's folds are those
    /// `plumbline score` draws on the same units and seed.
    pub folds: ChunkedColumn<u8>,
    /// Every unit among the first this many outcomes to arrive has values.
    pub scored_outcomes: usize,
    /// What the last recompute under this fit keeps for the next one.
    pub memo: Arc<ScoringMemo>,
}

/// The fold of a unit the fit did not see (see [`NuisanceState::folds`]).
pub const NO_FOLD: u8 = u8::MAX;

impl NuisanceState {
    /// The fold unit `u` is held out in, in 0..`folds`: the fit's own for
    /// the units it was fitted on; for a unit scored after the fit (its
    /// values the average of every fold's models, which saw none of these
    /// units), its sequence number modulo `folds`, a rule that never moves
    /// a unit as others arrive, so a growing window keeps its folds.
    pub fn fold_of(&self, u: usize, folds: usize) -> usize {
        match self.folds.get(u) {
            Some(&f) if f != NO_FOLD => f as usize,
            _ => u % folds.max(1),
        }
    }
}

/// Nuisance values fixed for the units the watch took this recompute, by
/// unit, from the fold models in place before any refit.
pub(super) type Fixed = HashMap<usize, [f64; 3]>;

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

/// The cap on the units a stored fit's models were fitted on, read from
/// its report ([`NuisanceReport::max_fit_units`]); None (null, or no such
/// field in a report written before fits were capped) for a fit on every
/// unit.
pub fn recorded_max_fit_units(report_json: &str) -> Result<Option<usize>, String> {
    #[derive(Deserialize)]
    struct Recorded {
        #[serde(default)]
        max_fit_units: Option<usize>,
    }
    serde_json::from_str::<Recorded>(report_json)
        .map(|r| r.max_fit_units)
        .map_err(|e| format!("nuisance fit report: {e}"))
}

impl RecomputeInput {
    /// Reproduces a recorded fit: the units whose outcome sequence is at most
    /// `last_outcome_seq`, in unit order, with the dataset's seed and the
    /// cap the fit recorded (`max_fit_units`, from
    /// [`recorded_max_fit_units`]), not the server's current one: the
    /// sample is a function of the seed, the units and the cap, so the
    /// reproduced values are the recorded fit's.
    pub fn reproduce_fit(
        &self,
        last_outcome_seq: i64,
        max_fit_units: Option<usize>,
    ) -> Result<NuisanceState, EstimateError> {
        let outcomes = usize::try_from(last_outcome_seq.saturating_add(1))
            .unwrap_or(0)
            .min(self.columns.outcomes());
        self.refit(&self.columns.arrived(0..outcomes), max_fit_units)
            .map(|(s, _)| s)
    }

    pub(super) fn all_logged(&self, units: &[usize]) -> bool {
        !units.is_empty()
            && units
                .iter()
                .all(|&u| self.columns.propensity_of(u).is_some())
    }

    /// Full cross-fitted refit on `scorable`: the units of the first
    /// outcomes to arrive (all of them, or those of a recorded fit), in unit
    /// order; so the last outcome sequence number the fit used is their
    /// count minus one. The models are fitted on at most `max_fit_units` of
    /// them; every one gets values.
    pub(super) fn refit(
        &self,
        scorable: &[usize],
        max_fit_units: Option<usize>,
    ) -> Result<(NuisanceState, usize), EstimateError> {
        let logged = self.all_logged(scorable);
        let table = self.table(scorable, logged)?;
        let nuisance_settings = NuisanceSettings {
            max_fit_units,
            ..settings(&self.spec).nuisance
        };
        let (values, report, fitted) =
            fit_nuisance_models_on(&table, self.features(scorable), &nuisance_settings)?;
        let mut all = ChunkedColumn::filled(self.columns.units(), [f64::NAN; 3]);
        for (i, &u) in scorable.iter().enumerate() {
            all[u] = [values.propensity[i], values.mu0[i], values.mu1[i]];
        }
        // The fit's folds, drawn again as the fit drew them (the same
        // seed, treatments and number of folds; a cap does not move them).
        let k = nuisance_settings.folds;
        let mut folds = ChunkedColumn::filled(self.columns.units(), NO_FOLD);
        for (&u, f) in
            scorable
                .iter()
                .zip(assign_folds(table.treatment(), k, nuisance_settings.seed))
        {
            folds[u] = f as u8;
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
                folds,
                scored_outcomes: scorable.len(),
                memo: Arc::default(),
            },
            scorable.len(),
        ))
    }

    /// Scores the units whose outcomes arrived since `state` last scored
    /// any, with the current fold models. Touches only those units.
    /// `arrivals`: [`RecomputeInput::arrivals_since`] of `state`.
    pub(super) fn extend(
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

    /// The units whose outcomes arrived since `state` last scored any, in
    /// unit order.
    pub(super) fn arrivals_since(&self, state: &NuisanceState) -> Vec<usize> {
        let outcomes = self.columns.outcomes();
        self.columns
            .arrived(state.scored_outcomes.min(outcomes)..outcomes)
    }

    /// The dataset's own refit rule for a fit on `fit_units` units made at
    /// `fitted_at_ms`: the outcomes have grown by `recompute.refit_growth`
    /// since, or `recompute.refit_every_seconds` have passed. Binary and
    /// arms datasets share it.
    pub(super) fn refit_due(&self, fit_units: usize, fitted_at_ms: i64) -> Option<RefitReason> {
        let outcomes = self.columns.outcomes() as f64;
        if outcomes >= (fit_units as f64) * (1.0 + self.spec.refit_growth) {
            Some(RefitReason::Growth)
        } else if self.spec.refit_every_seconds > 0
            && self.now_ms - fitted_at_ms >= i64::from(self.spec.refit_every_seconds) * 1000
        {
            Some(RefitReason::Schedule)
        } else {
            None
        }
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
            Some(s) => self.refit_due(s.fit_units, s.fitted_at_ms),
        };
        match (reason, &self.nuisance) {
            (None, Some(state)) => {
                let (s, n) = self.extend(state, arrivals, fixed)?;
                Ok((s, None, n))
            }
            (reason, _) => {
                let (s, n) = self.refit(&self.scorable(), self.max_fit_units)?;
                Ok((s, reason.or(Some(RefitReason::Requested)), n))
            }
        }
    }
}
