//! The per-dataset in-memory columnar cache: every unit, outcome and
//! prediction of a dataset, rebuilt from the store at start-up and appended
//! on ingest. Units are indexed by their sequence number (arrival order).

use std::collections::HashMap;
use std::hash::{BuildHasher, RandomState};
use std::ops::{Index, IndexMut, Range};
use std::sync::Arc;

use hashbrown::HashTable;

use crate::domain::{OutcomeRecord, PredictionRecord, StoredModel, UnitRecord};

/// Rows per chunk of a [`Shared`] column.
pub const CHUNK_ROWS: usize = 8192;

/// An append-only column of rows of `width` values, kept in chunks that
/// recompute jobs share instead of copying: a clone costs one pointer per
/// 8,192 rows. A chunk is copied only when it is written (a new row, or an
/// outcome or prediction for a stored unit) while a job still holds it, so
/// a writer pays for at most one chunk per write and a recompute never
/// copies the history.
#[derive(Debug, Clone)]
pub struct Shared<T> {
    width: usize,
    rows: usize,
    chunks: Vec<Arc<Vec<T>>>,
}

impl<T: Clone> Shared<T> {
    pub fn new(width: usize) -> Self {
        Self {
            width,
            rows: 0,
            chunks: Vec::new(),
        }
    }

    /// A column holding `values`, `width` per row.
    pub fn from_rows(width: usize, values: &[T]) -> Self {
        let mut out = Self::new(width);
        for row in values.chunks_exact(width.max(1)) {
            out.push_row(row);
        }
        out
    }

    /// A column of width one holding `rows` copies of `value`, built chunk
    /// by chunk.
    pub fn filled(rows: usize, value: T) -> Self {
        let mut out = Self::new(1);
        out.extend_filled(rows, value);
        out
    }

    pub fn len(&self) -> usize {
        self.rows
    }

    pub fn is_empty(&self) -> bool {
        self.rows == 0
    }

    pub fn width(&self) -> usize {
        self.width
    }

    /// The chunks, [`CHUNK_ROWS`] rows each (the last may hold fewer).
    pub fn chunks(&self) -> &[Arc<Vec<T>>] {
        &self.chunks
    }

    pub fn row(&self, i: usize) -> &[T] {
        let start = (i % CHUNK_ROWS) * self.width;
        &self.chunks[i / CHUNK_ROWS][start..start + self.width]
    }

    pub fn push_row(&mut self, values: &[T]) {
        debug_assert_eq!(values.len(), self.width);
        if self.rows % CHUNK_ROWS == 0 {
            self.chunks
                .push(Arc::new(Vec::with_capacity(CHUNK_ROWS * self.width)));
        }
        if let Some(last) = self.chunks.last_mut() {
            Arc::make_mut(last).extend_from_slice(values);
        }
        self.rows += 1;
    }

    /// Appends `rows` rows of `value` (every value of a row `value`),
    /// writing each chunk once rather than once per row.
    pub fn extend_filled(&mut self, rows: usize, value: T) {
        let mut left = rows;
        while left > 0 {
            let at = self.rows % CHUNK_ROWS;
            if at == 0 {
                self.chunks
                    .push(Arc::new(Vec::with_capacity(CHUNK_ROWS * self.width)));
            }
            let n = left.min(CHUNK_ROWS - at);
            if let Some(last) = self.chunks.last_mut() {
                let chunk = Arc::make_mut(last);
                chunk.resize(chunk.len() + n * self.width, value.clone());
            }
            self.rows += n;
            left -= n;
        }
    }

    /// Drops every row from `rows` on (copying the last kept chunk if a
    /// recompute still holds it).
    pub fn truncate(&mut self, rows: usize) {
        if rows >= self.rows {
            return;
        }
        if let Some((last, kept)) = cut_chunks(&mut self.chunks, rows) {
            Arc::make_mut(last).truncate(kept * self.width);
        }
        self.rows = rows;
    }

    /// Appends one value to a column of width one.
    pub fn push(&mut self, value: T) {
        self.push_row(std::slice::from_ref(&value));
    }

    pub fn get(&self, i: usize) -> Option<&T> {
        (i < self.rows).then(|| &self[i])
    }

    /// The values of rows `range` (those that exist) of a column of width
    /// one.
    pub fn values(&self, range: Range<usize>) -> impl Iterator<Item = &T> {
        self.chunks
            .iter()
            .flat_map(|c| c.iter())
            .skip(range.start)
            .take(range.len())
    }
}

/// Drops the chunks wholly past `rows` and returns the last kept chunk with
/// the number of its rows that stay, when it keeps only some of them.
fn cut_chunks<C>(chunks: &mut Vec<C>, rows: usize) -> Option<(&mut C, usize)> {
    chunks.truncate(rows.div_ceil(CHUNK_ROWS));
    let kept = rows % CHUNK_ROWS;
    if kept == 0 {
        return None;
    }
    chunks.last_mut().map(|c| (c, kept))
}

impl<T> Index<usize> for Shared<T> {
    type Output = T;

    /// The value of row `i` in a column of width one.
    fn index(&self, i: usize) -> &T {
        &self.chunks[i / CHUNK_ROWS][i % CHUNK_ROWS]
    }
}

impl<T: Clone> IndexMut<usize> for Shared<T> {
    fn index_mut(&mut self, i: usize) -> &mut T {
        &mut Arc::make_mut(&mut self.chunks[i / CHUNK_ROWS])[i % CHUNK_ROWS]
    }
}

/// A column of Unix-millisecond stamps, 0 meaning "not stamped", kept in
/// chunks of 8,192 rows where a chunk without any stamp takes no memory:
/// many deployments never stamp, and the stamps are read only by intake's
/// checks (ordering rules, re-sent rows) and the recent window. A chunk is
/// allocated at the first nonzero stamp written into it; like [`Shared`]'s,
/// chunks are shared between clones and copied only when written while
/// shared.
#[derive(Debug, Clone, Default)]
pub struct Stamps {
    rows: usize,
    /// One entry per chunk of rows; None while every row in it is 0.
    chunks: Vec<Option<Arc<[i64]>>>,
}

impl Stamps {
    /// A column of `rows` unstamped rows.
    pub fn zeros(rows: usize) -> Self {
        Self {
            rows,
            chunks: vec![None; rows.div_ceil(CHUNK_ROWS)],
        }
    }

    pub fn len(&self) -> usize {
        self.rows
    }

    pub fn is_empty(&self) -> bool {
        self.rows == 0
    }

    pub fn push(&mut self, stamp: i64) {
        if self.rows % CHUNK_ROWS == 0 {
            self.chunks.push(None);
        }
        self.rows += 1;
        self.set(self.rows - 1, stamp);
    }

    /// Appends `rows` unstamped rows (they take no memory until stamped:
    /// an allocated chunk's rows past the end are always 0).
    pub fn extend_zeros(&mut self, rows: usize) {
        self.rows += rows;
        self.chunks.resize(self.rows.div_ceil(CHUNK_ROWS), None);
    }

    /// Drops every row from `rows` on.
    pub fn truncate(&mut self, rows: usize) {
        if rows >= self.rows {
            return;
        }
        if let Some((Some(last), kept)) = cut_chunks(&mut self.chunks, rows) {
            Arc::make_mut(last)[kept..].fill(0);
        }
        self.rows = rows;
    }

    /// Sets row `i`, allocating its chunk only for a nonzero stamp.
    pub fn set(&mut self, i: usize, stamp: i64) {
        assert!(i < self.rows, "stamp {i} of {}", self.rows);
        let chunk = &mut self.chunks[i / CHUNK_ROWS];
        if chunk.is_none() && stamp == 0 {
            return;
        }
        let chunk = chunk.get_or_insert_with(|| vec![0; CHUNK_ROWS].into());
        Arc::make_mut(chunk)[i % CHUNK_ROWS] = stamp;
    }
}

impl Index<usize> for Stamps {
    type Output = i64;

    fn index(&self, i: usize) -> &i64 {
        assert!(i < self.rows, "stamp {i} of {}", self.rows);
        match &self.chunks[i / CHUNK_ROWS] {
            Some(chunk) => &chunk[i % CHUNK_ROWS],
            None => &0,
        }
    }
}

/// The units' keys, each stored once: their bytes back to back in one
/// buffer, and a hash table of unit numbers that hashes and compares the
/// bytes they point at. A `HashMap<String, usize>` would cost an allocation
/// and a 32-byte entry per unit; this costs the key's bytes, an 8-byte
/// offset, the key's 8-byte hash and a 4-byte table slot. The hashes are
/// kept so that growing the table moves slots without hashing every key
/// again: at a million units a growth that rehashed the keys held intake's
/// lock for a few hundred milliseconds.
#[derive(Debug, Clone, Default)]
pub struct UnitKeys {
    /// Every key's bytes, in unit order.
    bytes: Vec<u8>,
    /// `ends[u]` is where unit u's key ends in `bytes`; it starts where unit
    /// u - 1's ends (or at 0).
    ends: Vec<u64>,
    /// `hashes[u]` is unit u's key hashed by `hasher`.
    hashes: Vec<u64>,
    /// Unit numbers, hashed by their key's bytes. Keys are unique: intake
    /// refuses a second unit with a stored key, and a rebuild refuses a
    /// store that holds one twice. This table is the only key index. Unit
    /// numbers fit in u32 (the scoring memo keeps units as u32 too).
    table: HashTable<u32>,
    /// Seeded per process, like a std `HashMap`'s: keys come from clients.
    hasher: RandomState,
}

impl UnitKeys {
    fn key<'a>(bytes: &'a [u8], ends: &[u64], unit: usize) -> &'a [u8] {
        let start = unit.checked_sub(1).map_or(0, |p| ends[p] as usize);
        &bytes[start..ends[unit] as usize]
    }

    /// Appends the key of the next unit.
    pub fn push(&mut self, key: &str) {
        debug_assert!(u32::try_from(self.ends.len()).is_ok());
        let unit = self.ends.len() as u32;
        let hash = self.hasher.hash_one(key.as_bytes());
        self.bytes.extend_from_slice(key.as_bytes());
        self.ends.push(self.bytes.len() as u64);
        self.hashes.push(hash);
        let hashes = &self.hashes;
        self.table
            .insert_unique(hash, unit, |&u| hashes[u as usize]);
    }

    /// Forgets the keys of units `units..`, newest first.
    pub fn truncate(&mut self, units: usize) {
        while self.ends.len() > units {
            let unit = self.ends.len() - 1;
            if let Ok(entry) = self
                .table
                .find_entry(self.hashes[unit], |&u| u as usize == unit)
            {
                entry.remove();
            }
            let start = unit.checked_sub(1).map_or(0, |p| self.ends[p] as usize);
            self.bytes.truncate(start);
            self.ends.pop();
            self.hashes.pop();
        }
    }

    /// The unit with this key.
    pub fn unit_of(&self, key: &str) -> Option<usize> {
        let hash = self.hasher.hash_one(key.as_bytes());
        self.table
            .find(hash, |&u| {
                Self::key(&self.bytes, &self.ends, u as usize) == key.as_bytes()
            })
            .map(|&u| u as usize)
    }
}

/// One model's predictions, aligned with the units.
#[derive(Debug, Clone)]
pub struct ModelColumn {
    pub model: StoredModel,
    /// Predicted effect per unit; NaN marks "no prediction" (internal only:
    /// never scored, never shown).
    pub effects: Shared<f64>,
    /// When each prediction was made (0: not stamped), for the intake
    /// ordering rules.
    pub predicted_at_ms: Stamps,
    pub count: u64,
}

impl ModelColumn {
    pub fn new(model: StoredModel, units: usize) -> Self {
        Self {
            model,
            effects: Shared::filled(units, f64::NAN),
            predicted_at_ms: Stamps::zeros(units),
            count: 0,
        }
    }

    pub fn has(&self, unit: usize) -> bool {
        self.effects.get(unit).is_some_and(|v| !v.is_nan())
    }

    pub fn active(&self) -> bool {
        self.model.retired_at_ms == 0
    }
}

/// The per-unit columns a recompute reads, in unit order. Every column is
/// chunked and shared, so a recompute's copy costs a pointer per 8,192 rows
/// and the cache copies a chunk only when it writes to one a recompute
/// still holds.
#[derive(Debug, Clone)]
pub struct Columns {
    /// One row of features per unit.
    pub features: Shared<f64>,
    pub treatment: Shared<u8>,
    /// The logged probability of treatment; NaN where the unit came
    /// without one (intake admits only values in (0, 1)). Read it through
    /// [`Columns::propensity_of`].
    propensity: Shared<f64>,
    /// Index into the dataset's cohort names.
    pub cohort: Shared<u32>,
    /// NaN until the unit's outcome arrives (intake admits only finite
    /// outcomes). Read it through [`Columns::outcome_of`].
    outcome: Shared<f64>,
    /// When each outcome was observed (0: not stamped or no outcome).
    pub observed_at_ms: Stamps,
    /// Units with an outcome, in outcome arrival order. An outcome's
    /// sequence number is its position here: intake numbers new outcomes
    /// from [`DatasetCache::next_outcome_seq`] and the store returns them
    /// by sequence number.
    pub outcome_order: Shared<u32>,
}

impl Columns {
    pub fn new(features_per_unit: usize) -> Self {
        Self {
            features: Shared::new(features_per_unit),
            treatment: Shared::new(1),
            propensity: Shared::new(1),
            cohort: Shared::new(1),
            outcome: Shared::new(1),
            observed_at_ms: Stamps::default(),
            outcome_order: Shared::new(1),
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
    fn push_unit_inputs(
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
    fn await_outcomes(&mut self) {
        let units = self.treatment.len() - self.outcome.len();
        self.outcome.extend_filled(units, f64::NAN);
        self.observed_at_ms.extend_zeros(units);
    }

    /// Drops units `units..`, which must have no outcomes yet.
    fn truncate_units(&mut self, units: usize) {
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

/// A point in the cache's units to go back to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct UnitsMark {
    units: usize,
    cohorts: usize,
}

#[derive(Debug, Clone)]
pub struct DatasetCache {
    pub features_per_unit: usize,
    /// Every unit's key; look units up with [`DatasetCache::unit_of`].
    keys: UnitKeys,
    pub columns: Columns,
    pub cohort_names: Vec<String>,
    pub cohort_index: HashMap<String, u32>,
    /// When each unit was assigned (0: not stamped); read only to tell a
    /// re-sent unit from a conflicting one.
    pub assigned_at_ms: Stamps,
    pub models: Vec<ModelColumn>,
    pub model_index: HashMap<String, usize>,
    /// Bumped whenever a unit that already has an outcome gets a prediction
    /// (a historical backfill): scores kept from earlier recomputes no
    /// longer hold then.
    pub revision: u64,
}

impl DatasetCache {
    pub fn new(features_per_unit: usize) -> Self {
        Self {
            features_per_unit,
            keys: UnitKeys::default(),
            columns: Columns::new(features_per_unit),
            cohort_names: Vec::new(),
            cohort_index: HashMap::new(),
            assigned_at_ms: Stamps::default(),
            models: Vec::new(),
            model_index: HashMap::new(),
            revision: 0,
        }
    }

    pub fn units(&self) -> usize {
        self.columns.units()
    }

    /// The unit with this key, if it has been sent.
    pub fn unit_of(&self, key: &str) -> Option<usize> {
        self.keys.unit_of(key)
    }

    pub fn outcomes(&self) -> usize {
        self.columns.outcomes()
    }

    pub fn predictions(&self) -> u64 {
        self.models.iter().map(|m| m.count).sum()
    }

    pub fn unit_features(&self, unit: usize) -> &[f64] {
        self.columns.features.row(unit)
    }

    pub fn add_unit(&mut self, u: &UnitRecord) {
        self.add_units(std::slice::from_ref(u));
    }

    /// Appends a batch of units, in order, without outcomes or
    /// predictions. The columns every unit starts empty in (outcome,
    /// model predictions and their stamps) are extended once per batch.
    pub fn add_units(&mut self, units: &[UnitRecord]) {
        let mut last: Option<(&str, u32)> = None;
        for u in units {
            debug_assert_eq!(u.seq as usize, self.units());
            self.keys.push(&u.key);
            // Units of a batch mostly share a cohort; look it up only when
            // it changes.
            let cohort = match last {
                Some((name, c)) if name == u.cohort => c,
                _ => match self.cohort_index.get(&u.cohort) {
                    Some(&c) => c,
                    None => {
                        let c = self.cohort_names.len() as u32;
                        self.cohort_names.push(u.cohort.clone());
                        self.cohort_index.insert(u.cohort.clone(), c);
                        c
                    }
                },
            };
            last = Some((&u.cohort, cohort));
            self.columns
                .push_unit_inputs(&u.features, u.treatment, u.propensity, cohort);
            self.assigned_at_ms.push(u.assigned_at_ms);
        }
        self.columns.await_outcomes();
        for m in &mut self.models {
            m.effects.extend_filled(units.len(), f64::NAN);
            m.predicted_at_ms.extend_zeros(units.len());
        }
    }

    /// Where the units end now; [`DatasetCache::truncate_units`] goes back
    /// to it.
    pub fn units_mark(&self) -> UnitsMark {
        UnitsMark {
            units: self.units(),
            cohorts: self.cohort_names.len(),
        }
    }

    /// Forgets every unit added since `mark` (and the cohorts they
    /// introduced): intake adds a batch while the store writes it, and
    /// undoes the addition if the write fails. The units must have no
    /// outcomes or predictions yet, which holds while the dataset's lock is
    /// held from the mark on.
    pub fn truncate_units(&mut self, mark: UnitsMark) {
        for name in self.cohort_names.drain(mark.cohorts..) {
            self.cohort_index.remove(&name);
        }
        self.keys.truncate(mark.units);
        self.columns.truncate_units(mark.units);
        self.assigned_at_ms.truncate(mark.units);
        for m in &mut self.models {
            m.effects.truncate(mark.units);
            m.predicted_at_ms.truncate(mark.units);
        }
    }

    pub fn add_outcome(&mut self, o: &OutcomeRecord) {
        debug_assert_eq!(o.seq, self.next_outcome_seq());
        self.columns
            .add_outcome(o.unit_seq as usize, o.value, o.observed_at_ms);
    }

    pub fn add_model(&mut self, model: StoredModel) {
        self.model_index
            .insert(model.name.clone(), self.models.len());
        let units = self.units();
        self.models.push(ModelColumn::new(model, units));
    }

    pub fn model_by_id(&self, id: i64) -> Option<usize> {
        self.models.iter().position(|m| m.model.id == id)
    }

    pub fn add_prediction(&mut self, model: usize, p: &PredictionRecord) {
        let col = &mut self.models[model];
        let u = p.unit_seq as usize;
        if col.effects[u].is_nan() {
            col.count += 1;
        }
        col.effects[u] = p.effect;
        col.predicted_at_ms.set(u, p.predicted_at_ms);
        if self.columns.outcome_of(u).is_some() {
            self.revision += 1;
        }
    }

    /// Next outcome sequence number.
    pub fn next_outcome_seq(&self) -> i64 {
        self.outcomes() as i64
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn unit(seq: usize, cohort: &str) -> UnitRecord {
        UnitRecord {
            seq: seq as i64,
            key: format!("unit-{seq}"),
            features: vec![seq as f64, -(seq as f64)],
            treatment: (seq % 2) as u8,
            propensity: (seq % 3 == 0).then_some(0.25),
            cohort: cohort.into(),
            assigned_at_ms: if seq % 5 == 0 { 1_000 + seq as i64 } else { 0 },
        }
    }

    fn model(id: i64) -> StoredModel {
        StoredModel {
            id,
            dataset_id: 1,
            name: format!("m{id}"),
            version: "1".into(),
            description: String::new(),
            registered_at_ms: 0,
            retired_at_ms: 0,
        }
    }

    #[test]
    fn truncating_units_takes_back_a_batch_and_leaves_held_copies_alone() {
        let mut cache = DatasetCache::new(2);
        for id in 0..2 {
            cache.add_model(model(id));
        }
        let kept = CHUNK_ROWS + 10;
        for u in 0..kept {
            cache.add_unit(&unit(u, "spring"));
        }
        let mark = cache.units_mark();
        let batch: Vec<UnitRecord> = (kept..kept + 50)
            .map(|u| unit(u, if u % 2 == 0 { "spring" } else { "summer" }))
            .collect();
        cache.add_units(&batch);
        let held = cache.columns.clone();
        cache.truncate_units(mark);

        assert_eq!(cache.units(), kept);
        assert_eq!(cache.cohort_names, vec!["spring".to_string()]);
        assert!(!cache.cohort_index.contains_key("summer"));
        assert_eq!(cache.unit_of("unit-0"), Some(0));
        assert_eq!(cache.unit_of(&format!("unit-{}", kept - 1)), Some(kept - 1));
        assert_eq!(cache.unit_of(&format!("unit-{kept}")), None);
        assert_eq!(cache.assigned_at_ms.len(), kept);
        for m in &cache.models {
            assert_eq!((m.effects.len(), m.predicted_at_ms.len()), (kept, kept));
        }
        // The copy a recompute held still has the whole batch.
        assert_eq!(held.units(), kept + 50);
        assert_eq!(
            held.features.row(kept + 49),
            &[(kept + 49) as f64, -((kept + 49) as f64)]
        );

        // The same batch goes in again as if for the first time.
        for u in kept..kept + 50 {
            cache.add_unit(&unit(u, "summer"));
        }
        assert_eq!(cache.units(), kept + 50);
        assert_eq!(cache.unit_of(&format!("unit-{}", kept + 7)), Some(kept + 7));
        assert_eq!(
            cache.unit_features(kept + 7),
            &[(kept + 7) as f64, -((kept + 7) as f64)]
        );
        assert_eq!(
            cache.columns.propensity_of(kept + 1),
            unit(kept + 1, "").propensity
        );
        let stamped = kept + (5 - kept % 5) % 5;
        assert_eq!(cache.assigned_at_ms[stamped], 1_000 + stamped as i64);
        assert_eq!(cache.assigned_at_ms[stamped + 1], 0);
        assert_eq!(
            cache.cohort_names,
            vec!["spring".to_string(), "summer".to_string()]
        );
    }

    #[test]
    fn a_batch_of_units_lands_as_the_same_units_one_at_a_time() {
        let (mut batched, mut single) = (DatasetCache::new(2), DatasetCache::new(2));
        for cache in [&mut batched, &mut single] {
            cache.add_model(model(0));
        }
        // Batches that end mid-chunk, cross a chunk boundary and fill
        // several chunks; cohorts change within a batch and come back.
        let mut next = 0;
        for size in [3, CHUNK_ROWS - 5, 10, 2 * CHUNK_ROWS + 1] {
            let rows: Vec<UnitRecord> = (next..next + size)
                .map(|u| unit(u, ["spring", "summer", "spring"][(u / 1000) % 3]))
                .collect();
            batched.add_units(&rows);
            for r in &rows {
                single.add_unit(r);
            }
            next += size;
            // A stamp written inside the last chunk must not leak into the
            // rows the next batch appends after it.
            for cache in [&mut batched, &mut single] {
                cache.models[0].predicted_at_ms.set(next - 1, 77);
            }
        }
        let units = next;
        assert_eq!((batched.units(), single.units()), (units, units));
        assert_eq!(batched.cohort_names, single.cohort_names);
        assert_eq!(batched.cohort_names, vec!["spring", "summer"]);
        let (b, s) = (&batched.columns, &single.columns);
        for u in 0..units {
            assert_eq!(batched.unit_of(&format!("unit-{u}")), Some(u));
            assert_eq!(b.features.row(u), s.features.row(u), "unit {u}");
            assert_eq!(
                (
                    b.treatment[u],
                    b.cohort[u],
                    b.propensity_of(u),
                    b.outcome_of(u)
                ),
                (s.treatment[u], s.cohort[u], s.propensity_of(u), None),
                "unit {u}"
            );
            assert_eq!(b.observed_at_ms[u], 0);
            assert_eq!(batched.assigned_at_ms[u], single.assigned_at_ms[u]);
            let (bm, sm) = (&batched.models[0], &single.models[0]);
            assert!(!bm.has(u));
            assert_eq!(bm.predicted_at_ms[u], sm.predicted_at_ms[u], "unit {u}");
        }
        assert_eq!(
            batched.models[0].effects.chunks.len(),
            units.div_ceil(CHUNK_ROWS)
        );
        // Outcomes land on the batched units as on any others.
        batched.columns.add_outcome(units - 1, 2.5, 9);
        assert_eq!(batched.columns.outcome_of(units - 1), Some(2.5));
        assert_eq!(batched.columns.observed_at_ms[units - 1], 9);
    }

    #[test]
    fn a_filled_column_grows_like_a_pushed_one() {
        for rows in [0, 1, CHUNK_ROWS - 1, CHUNK_ROWS, 2 * CHUNK_ROWS + 5] {
            let mut filled = Shared::filled(rows, 7u32);
            let mut pushed = Shared::new(1);
            for _ in 0..rows {
                pushed.push(7u32);
            }
            for col in [&mut filled, &mut pushed] {
                col.push(9);
            }
            assert_eq!(filled.len(), rows + 1);
            assert!((0..=rows).all(|i| filled[i] == pushed[i]));
            assert_eq!(filled.chunks.len(), pushed.chunks.len());
        }
    }

    #[test]
    fn values_of_a_range_cross_chunks_and_stop_at_the_end() {
        let rows = 2 * CHUNK_ROWS + 3;
        let mut col = Shared::new(1);
        for i in 0..rows as u32 {
            col.push(i);
        }
        let got: Vec<u32> = col
            .values(CHUNK_ROWS - 2..CHUNK_ROWS + 3)
            .copied()
            .collect();
        let want: Vec<u32> = (CHUNK_ROWS as u32 - 2..CHUNK_ROWS as u32 + 3).collect();
        assert_eq!(got, want);
        assert_eq!(col.values(rows - 1..rows + 5).count(), 1);
        assert_eq!(col.values(rows + 1..rows + 5).count(), 0);
        assert_eq!(col.values(0..rows).count(), rows);
    }

    #[test]
    fn stamps_read_back_exactly_and_unstamped_chunks_stay_empty() {
        let rows = 3 * CHUNK_ROWS + 10;
        let mut stamps = Stamps::default();
        let mut plain = Vec::new();
        for i in 0..rows {
            // Stamps only in the second chunk and the tail.
            let t = if i / CHUNK_ROWS == 1 || i >= 3 * CHUNK_ROWS {
                (i as i64) * 1_000 + 1
            } else {
                0
            };
            stamps.push(t);
            plain.push(t);
        }
        let shared = stamps.clone();
        stamps.set(5, i64::MAX);
        stamps.set(CHUNK_ROWS + 1, 0);
        stamps.set(2 * CHUNK_ROWS, 0);
        plain[5] = i64::MAX;
        plain[CHUNK_ROWS + 1] = 0;
        let held: Vec<bool> = stamps.chunks.iter().map(Option::is_some).collect();
        assert_eq!(held, [true, true, false, true]);
        assert!((0..rows).all(|i| stamps[i] == plain[i]));
        // The clone kept its own values.
        assert_eq!(shared[5], 0);
        assert_eq!(shared[CHUNK_ROWS + 1], (CHUNK_ROWS as i64 + 1) * 1_000 + 1);
        assert_eq!(Stamps::zeros(rows).chunks.len(), held.len());
    }

    #[test]
    fn keys_find_their_units_through_table_growth() {
        let mut keys = UnitKeys::default();
        let names: Vec<String> = (0..20_000).map(|i| format!("k{i}")).collect();
        for k in &names {
            keys.push(k);
        }
        for (u, k) in names.iter().enumerate() {
            assert_eq!(keys.unit_of(k), Some(u));
        }
        // Keys that are prefixes or extensions of stored ones are other keys.
        for k in ["k", "k1000x", "k00", "", "x"] {
            assert_eq!(keys.unit_of(k), None, "{k:?}");
        }
    }
}
