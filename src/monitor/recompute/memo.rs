//! What a recompute keeps for the next one under the same nuisance fit.

use std::collections::HashMap;

use super::WindowResult;
use crate::estimate::blend::{BlendReport, FoldGrams};
use crate::estimate::incremental::GrowingWindow;
use crate::estimate::level::LevelReport;
use crate::estimate::stats::Estimate;
use crate::estimate::{CONSTANT_EFFECT, ZERO_EFFECT};
use crate::monitor::cache::Columns;

/// What a recompute keeps for the next one under the same nuisance fit.
/// Valid only while the cache revision (bumped when a stored unit with an
/// outcome gets a prediction) and the active models are the ones it was
/// computed under; a refit starts a new one.
#[derive(Clone, Default)]
pub struct ScoringMemo {
    pub(super) revision: u64,
    pub(super) models: Vec<String>,
    /// Cohort windows: the number of units with outcomes each was scored on
    /// (outcomes are only ever added, so an equal count is an equal set) and
    /// its result.
    pub(super) cohorts: HashMap<String, (usize, WindowResult)>,
    pub(super) cumulative: Option<CumulativeMemo>,
    /// Kept across refits and revisions: it depends only on the arrival
    /// order of outcomes, which only grows.
    pub(super) cohort_index: CohortIndex,
}

impl ScoringMemo {
    /// Corrected PEHE of `first` minus that of `second` (ranked models or
    /// baselines, by name) in the cumulative window, from the co-moments
    /// this memo keeps; None when it keeps no cumulative window, when
    /// either is not ranked there, or when its window is not of `units`
    /// units (the board a caller holds is from another recompute).
    pub fn cumulative_difference(&self, units: u64, first: &str, second: &str) -> Option<Estimate> {
        let (c, a, b) = self.cumulative_pair(units, first, second)?;
        Some(c.window.difference(a, b))
    }

    /// Policy gain of `first` minus that of `second` in the cumulative
    /// window, from the decisions it keeps; None as for
    /// [`Self::cumulative_difference`].
    pub fn cumulative_policy_difference(
        &self,
        units: u64,
        first: &str,
        second: &str,
    ) -> Option<Estimate> {
        let (c, a, b) = self.cumulative_pair(units, first, second)?;
        Some(c.window.policy_difference(a, b))
    }

    /// The cumulative window of `units` units and the scored columns of
    /// `first` and `second` in it.
    fn cumulative_pair(
        &self,
        units: u64,
        first: &str,
        second: &str,
    ) -> Option<(&CumulativeMemo, usize, usize)> {
        let c = self.cumulative.as_ref()?;
        if c.units.len() as u64 != units {
            return None;
        }
        let column = |name: &str| match name {
            ZERO_EFFECT => Some(0),
            CONSTANT_EFFECT => Some(1),
            _ => c
                .ranked
                .iter()
                .position(|&k| self.models.get(k).is_some_and(|m| m == name))
                .map(|j| j + 2),
        };
        Some((c, column(first)?, column(second)?))
    }
}

/// Each cohort's units with outcomes, in unit order, extended as outcomes
/// arrive, so that a recompute finds the cohorts that changed (and their
/// units) without a pass over the history.
#[derive(Clone, Default)]
pub(super) struct CohortIndex {
    /// Outcomes folded in: a prefix of the arrival order.
    outcomes: usize,
    /// By cohort (index into the input's cohort names).
    pub(super) units: Vec<Vec<u32>>,
}

impl CohortIndex {
    pub(super) fn update(&mut self, columns: &Columns, cohorts: usize) {
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

/// The cumulative window: which units and models its mergeable parts
/// cover, and the parts themselves.
#[derive(Clone)]
pub(super) struct CumulativeMemo {
    /// Units of `outcome_order` folded in (a prefix of it).
    pub(super) outcomes: usize,
    /// Per active model: how many folded units it predicts.
    pub(super) covered: Vec<usize>,
    /// The ranked models (indices into the input's active models).
    pub(super) ranked: Vec<usize>,
    /// The scored units (covered by every ranked model), in folding order.
    pub(super) units: Vec<u32>,
    /// The scoreboard's parts over `units` and the `ranked` models.
    pub(super) window: GrowingWindow,
    /// The error bounds, as of the last rank refresh (they do not merge;
    /// see `refresh_levels`).
    pub(super) levels: LevelReport,
    /// The blend's sums and report; None with fewer than two models.
    pub(super) blend: Option<WindowBlend>,
}

/// A growing window's blend: per-fold sums of the blended models' products
/// (merged as units arrive: no per-unit data), and the report as of the
/// last rank refresh.
#[derive(Clone)]
pub(super) struct WindowBlend {
    /// Positions in the window's ranked models of the blended ones.
    pub(super) models: Vec<usize>,
    pub(super) grams: FoldGrams,
    /// None when every unit is in one fold (no weights can be fitted
    /// without it).
    pub(super) report: Option<BlendReport>,
}
