//! The nuisance values a recompute of a dataset with arms scores with, kept
//! between recomputes as a binary dataset's are (`nuisance.rs`): a full
//! cross-fitted refit of the multinomial propensity and the per-arm outcome
//! models when one is due (asked for, the first fit, the stream watch found
//! the arriving units no longer fit them, the outcomes grown by
//! `recompute.refit_growth`, `recompute.refit_every_seconds` elapsed), and
//! between refits the current fold models applied to the units whose
//! outcomes arrived since, which they never saw. So a recompute between
//! refits costs what its new units cost to predict and the boards cost to
//! score, not a fit.
//!
//! The refit is on every unit with an outcome, in unit order, with the
//! dataset's folds and seed (and, above `limits.max_fit_units`, on the
//! seeded sample stratified by arm): `plumbline score --arms` on the same
//! units draws the same fit, so the boards after a refit are that
//! command's. A fit is recorded (its last outcome sequence number and its
//! cap) and reproduced at start-up, as a binary fit is.

use std::sync::Arc;

use super::arms::ArmMemo;
use super::{settings, RecomputeInput, RefitReason};
use crate::estimate::arms::ArmTable;
use crate::estimate::crossfit::{
    fit_arm_nuisance, ArmFittedNuisance, ArmNuisance, ArmNuisanceReport, NuisanceSettings,
};
use crate::estimate::{EstimateError, FeatureRows};
use crate::monitor::cache::ChunkedColumn;

/// Nuisance state of a dataset with arms between recomputes.
#[derive(Clone)]
pub struct ArmNuisanceState {
    /// The fold models, for units scored after the fit (and the stream
    /// watch's look at them).
    pub fitted: Arc<ArmFittedNuisance>,
    pub report: ArmNuisanceReport,
    /// The fit's record in the store (0 until it is stored).
    pub fit_id: i64,
    /// The fit used the units whose outcome sequence is at most this.
    pub last_outcome_seq: i64,
    pub fit_units: usize,
    pub fitted_at_ms: i64,
    /// Per unit (by sequence), one column per arm of the generalized
    /// propensity e_a (before clipping), then one per arm of the outcome
    /// mu_a; NaN where the unit has not been scored. Chunked like the
    /// cache's columns, so scoring new units copies only the chunks they
    /// fall in.
    values: Vec<ChunkedColumn<f64>>,
    /// Every unit among the first this many outcomes to arrive has values.
    pub scored_outcomes: usize,
    /// What the last recompute under this fit keeps for the next one.
    pub memo: Arc<ArmMemo>,
}

impl ArmNuisanceState {
    fn arms(&self) -> usize {
        self.values.len() / 2
    }

    /// Whether unit `u` has values.
    pub fn scored(&self, u: usize) -> bool {
        self.values
            .first()
            .and_then(|c| c.get(u))
            .is_some_and(|v| !v.is_nan())
    }

    /// The values of `units`, every one of them scored, in their order.
    pub fn of(&self, units: &[usize]) -> ArmNuisance {
        let arms = self.arms();
        let column = |c: &ChunkedColumn<f64>| units.iter().map(|&u| c[u]).collect();
        ArmNuisance {
            propensity: self.values[..arms].iter().map(column).collect(),
            outcome: self.values[arms..].iter().map(column).collect(),
        }
    }

    /// Writes `n`'s values of unit `units[i]` for every i that has none
    /// yet: a value once given (a fitted unit's out-of-fold one) is never
    /// rewritten.
    fn fill(&mut self, units: &[usize], n: &ArmNuisance) {
        let open: Vec<bool> = units.iter().map(|&u| !self.scored(u)).collect();
        let columns = n.propensity.iter().chain(&n.outcome);
        for (to, from) in self.values.iter_mut().zip(columns) {
            for ((&u, &v), &open) in units.iter().zip(from).zip(&open) {
                if open {
                    to[u] = v;
                }
            }
        }
    }
}

/// Values the stream watch gave this recompute's arrivals from the fold
/// models in place before any refit: the extension reuses them rather than
/// predicting the same units with the same models again.
#[derive(Default)]
pub(super) struct ArmFixed {
    pub units: Vec<usize>,
    pub values: Option<ArmNuisance>,
}

impl RecomputeInput {
    /// The dataset's cross-fit (its folds and seed) of a table's units,
    /// fitted on at most `max_fit_units` of them.
    pub(super) fn fit_arm_table(
        &self,
        table: &ArmTable,
        max_fit_units: Option<usize>,
    ) -> Result<(ArmNuisance, ArmNuisanceReport, ArmFittedNuisance), EstimateError> {
        fit_arm_nuisance(
            table.rows(),
            table.arm(),
            table.arms(),
            table.outcome(),
            table.outcome_kind(),
            &NuisanceSettings {
                max_fit_units,
                ..settings(&self.spec).nuisance
            },
            Vec::new(),
        )
    }

    /// Full cross-fitted refit on `scorable`: the units of the first
    /// outcomes to arrive, in unit order.
    fn arm_refit(
        &self,
        scorable: &[usize],
        max_fit_units: Option<usize>,
    ) -> Result<ArmNuisanceState, EstimateError> {
        let table = self.arm_table(scorable)?;
        let (values, report, fitted) = self.fit_arm_table(&table, max_fit_units)?;
        let arms = self.spec.arms.len();
        let mut state = ArmNuisanceState {
            fitted: Arc::new(fitted),
            report,
            fit_id: 0,
            last_outcome_seq: scorable.len() as i64 - 1,
            fit_units: scorable.len(),
            fitted_at_ms: self.now_ms,
            values: (0..2 * arms)
                .map(|_| ChunkedColumn::filled(self.columns.units(), f64::NAN))
                .collect(),
            scored_outcomes: scorable.len(),
            memo: Arc::default(),
        };
        state.fill(scorable, &values);
        Ok(state)
    }

    /// Reproduces a recorded fit: the units whose outcome sequence is at
    /// most `last_outcome_seq`, in unit order, with the dataset's seed and
    /// the cap the fit recorded, so the values are the recorded fit's.
    pub fn reproduce_arm_fit(
        &self,
        last_outcome_seq: i64,
        max_fit_units: Option<usize>,
    ) -> Result<ArmNuisanceState, EstimateError> {
        let outcomes = usize::try_from(last_outcome_seq.saturating_add(1))
            .unwrap_or(0)
            .min(self.columns.outcomes());
        self.arm_refit(&self.columns.arrived(0..outcomes), max_fit_units)
    }

    /// Scores the units whose outcomes arrived since `state` last scored
    /// any, with its fold models (or the watch's values of them, from the
    /// same models). Touches only those units.
    fn arm_extend(&self, state: &ArmNuisanceState, fixed: ArmFixed) -> ArmNuisanceState {
        let outcomes = self.columns.outcomes();
        let mut next = state.clone();
        for c in &mut next.values {
            if c.len() < self.columns.units() {
                c.extend_filled(self.columns.units() - c.len(), f64::NAN);
            }
        }
        if let Some(values) = &fixed.values {
            next.fill(&fixed.units, values);
        }
        let new: Vec<usize> = self
            .columns
            .arrived(state.scored_outcomes.min(outcomes)..outcomes)
            .into_iter()
            .filter(|&u| !next.scored(u))
            .collect();
        if !new.is_empty() {
            let x = self.rows(&new);
            let width = x.ncols();
            let values = state
                .fitted
                .predict(FeatureRows::dense(x.as_slice().unwrap_or(&[]), width));
            next.fill(&new, &values);
        }
        next.scored_outcomes = outcomes;
        next
    }

    /// Decides whether to refit, then brings the nuisance values up to
    /// date; the reason when this refitted.
    pub(super) fn arm_nuisance(
        &self,
        requested: bool,
        misfit: bool,
        fixed: ArmFixed,
    ) -> Result<(ArmNuisanceState, Option<RefitReason>), EstimateError> {
        let reason = match &self.arm_nuisance {
            _ if requested => Some(RefitReason::Requested),
            None => Some(RefitReason::FirstFit),
            Some(_) if misfit => Some(RefitReason::Misfit),
            Some(s) => self.refit_due(s.fit_units, s.fitted_at_ms),
        };
        match (reason, &self.arm_nuisance) {
            (None, Some(state)) => Ok((self.arm_extend(state, fixed), None)),
            (reason, _) => {
                let state = self.arm_refit(&self.scorable(), self.max_fit_units)?;
                Ok((state, reason.or(Some(RefitReason::Requested))))
            }
        }
    }
}
