//! The per-unit columns a recompute reads.

use std::ops::Range;

use super::chunked::{ChunkedColumn, Stamps};

/// The per-unit columns a recompute reads, in unit order. Every column is
/// chunked and shared, so a recompute's copy costs a pointer per 8,192 rows
/// and the cache copies a chunk only when it writes to one a recompute
/// still holds.
#[derive(Debug, Clone)]
pub struct Columns {
    /// One row of features per unit.
    pub features: ChunkedColumn<f64>,
    pub treatment: ChunkedColumn<u8>,
    /// The logged probability of treatment; NaN where the unit came
    /// without one (intake admits only values in (0, 1)). Read it through
    /// [`Columns::propensity_of`].
    propensity: ChunkedColumn<f64>,
    /// Index into the dataset's cohort names.
    pub cohort: ChunkedColumn<u32>,
    /// NaN until the unit's outcome arrives (intake admits only finite
    /// outcomes). Read it through [`Columns::outcome_of`].
    outcome: ChunkedColumn<f64>,
    /// When each outcome was observed (0: not stamped or no outcome).
    pub observed_at_ms: Stamps,
    /// Units with an outcome, in outcome arrival order. An outcome's
    /// sequence number is its position here: intake numbers new outcomes
    /// from [`DatasetCache::next_outcome_seq`](super::DatasetCache::next_outcome_seq)
    /// and the store returns them by sequence number.
    pub outcome_order: ChunkedColumn<u32>,
}

impl Columns {
    pub fn new(features_per_unit: usize) -> Self {
        Self {
            features: ChunkedColumn::new(features_per_unit),
            treatment: ChunkedColumn::new(1),
            propensity: ChunkedColumn::new(1),
            cohort: ChunkedColumn::new(1),
            outcome: ChunkedColumn::new(1),
            observed_at_ms: Stamps::default(),
            outcome_order: ChunkedColumn::new(1),
        }
    }

    pub fn units(&self) -> usize {
        self.treatment.len()
    }

    pub fn outcomes(&self) -> usize {
        self.outcome_order.len()
    }

    /// Unit `u`'s logged propensity, if it came with one.
    pub fn propensity_of(&self, u: usize) -> Option<f64> {
        Some(self.propensity[u]).filter(|p| !p.is_nan())
    }

    /// Unit `u`'s outcome, once it has arrived.
    pub fn outcome_of(&self, u: usize) -> Option<f64> {
        Some(self.outcome[u]).filter(|y| !y.is_nan())
    }

    /// Appends a unit, without an outcome.
    pub fn push_unit(
        &mut self,
        features: &[f64],
        treatment: u8,
        propensity: Option<f64>,
        cohort: u32,
    ) {
        self.push_unit_inputs(features, treatment, propensity, cohort);
        self.await_outcomes();
    }

    /// Appends a unit's inputs; [`Columns::await_outcomes`] completes the
    /// outcome columns once a batch of units is pushed.
    pub(super) fn push_unit_inputs(
        &mut self,
        features: &[f64],
        treatment: u8,
        propensity: Option<f64>,
        cohort: u32,
    ) {
        debug_assert!(propensity.is_none_or(|p| p > 0.0 && p < 1.0));
        self.features.push_row(features);
        self.treatment.push(treatment);
        self.propensity.push(propensity.unwrap_or(f64::NAN));
        self.cohort.push(cohort);
    }

    /// Marks the units pushed since the last call as waiting for their
    /// outcome: one write per chunk, not per unit.
    pub(super) fn await_outcomes(&mut self) {
        let units = self.treatment.len() - self.outcome.len();
        self.outcome.extend_filled(units, f64::NAN);
        self.observed_at_ms.extend_zeros(units);
    }

    /// Drops units `units..`, which must have no outcomes yet.
    pub(super) fn truncate_units(&mut self, units: usize) {
        self.features.truncate(units);
        self.treatment.truncate(units);
        self.propensity.truncate(units);
        self.cohort.truncate(units);
        self.outcome.truncate(units);
        self.observed_at_ms.truncate(units);
    }

    /// Records unit `u`'s outcome as the next to arrive.
    pub fn add_outcome(&mut self, u: usize, value: f64, observed_at_ms: i64) {
        debug_assert!(value.is_finite());
        self.outcome[u] = value;
        self.observed_at_ms.set(u, observed_at_ms);
        self.outcome_order.push(u as u32);
    }

    /// The units whose outcomes arrived at positions `range` of the
    /// arrival order, in unit order.
    pub fn arrived(&self, range: Range<usize>) -> Vec<usize> {
        let mut units: Vec<usize> = self
            .outcome_order
            .values(range)
            .map(|&u| u as usize)
            .collect();
        units.sort_unstable();
        units
    }
}
