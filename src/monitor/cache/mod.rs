//! The per-dataset in-memory columnar cache: every unit, outcome and
//! prediction of a dataset, rebuilt from the store at start-up and appended
//! on ingest. Units are indexed by their sequence number (arrival order).
//!
//! `chunked.rs` holds the shared chunked column types, `keys.rs` the unit
//! key index, `columns.rs` the per-unit columns a recompute reads; this
//! file the cache proper and each model's predictions.

mod chunked;
mod columns;
mod keys;

use std::collections::HashMap;

pub use chunked::{ChunkedColumn, Stamps, CHUNK_ROWS};
pub use columns::Columns;
pub use keys::UnitKeys;

use crate::domain::{OutcomeRecord, PredictionRecord, StoredModel, UnitRecord};

/// One model's predictions, aligned with the units.
///
/// `effects` holds the effect of arm 1 against arm 0: on a binary dataset
/// the treatment effect, the only column. A dataset with arms keeps arms
/// 2, 3, ... in `further_arms`, so the binary path reads exactly the
/// columns it always did.
#[derive(Debug, Clone)]
pub struct ModelColumn {
    pub model: StoredModel,
    /// Predicted effect per unit; NaN marks "no prediction" (internal only:
    /// never scored, never shown).
    pub effects: ChunkedColumn<f64>,
    /// When each prediction was made (0: not stamped), for the intake
    /// ordering rules.
    pub predicted_at_ms: Stamps,
    pub count: u64,
    /// `further_arms[j]`: the predictions for arm j + 2.
    pub further_arms: Vec<ArmEffects>,
    /// For a registered blend, its members' positions in the cache's
    /// models and their weights; None for a model whose predictions are
    /// sent (or a blend whose members the cache does not hold, which then
    /// predicts nothing). A blend derives arm 1's predictions only: the
    /// blends a board offers are of its binary models.
    pub members: Option<Vec<(usize, f64)>>,
}

/// One model's predictions of one further arm's effect, as in
/// [`ModelColumn`].
#[derive(Debug, Clone)]
pub struct ArmEffects {
    pub effects: ChunkedColumn<f64>,
    pub predicted_at_ms: Stamps,
    pub count: u64,
}

impl ArmEffects {
    fn new(units: usize) -> Self {
        Self {
            effects: ChunkedColumn::filled(units, f64::NAN),
            predicted_at_ms: Stamps::zeros(units),
            count: 0,
        }
    }
}

impl ModelColumn {
    /// `arms`: the dataset's declared arms (0 for a binary dataset).
    pub fn new(model: StoredModel, units: usize, arms: usize) -> Self {
        Self {
            model,
            effects: ChunkedColumn::filled(units, f64::NAN),
            predicted_at_ms: Stamps::zeros(units),
            count: 0,
            further_arms: (2..arms).map(|_| ArmEffects::new(units)).collect(),
            members: None,
        }
    }

    pub fn has(&self, unit: usize) -> bool {
        self.effects.get(unit).is_some_and(|v| !v.is_nan())
    }

    /// The effects and stamps of arm `arm` (1 the binary treatment), if the
    /// dataset has it.
    pub fn arm(&self, arm: usize) -> Option<(&ChunkedColumn<f64>, &Stamps)> {
        match arm {
            1 => Some((&self.effects, &self.predicted_at_ms)),
            a if a >= 2 => self
                .further_arms
                .get(a - 2)
                .map(|c| (&c.effects, &c.predicted_at_ms)),
            _ => None,
        }
    }

    /// Whether the model predicted arm `arm`'s effect for `unit`.
    pub fn has_arm(&self, arm: usize, unit: usize) -> bool {
        self.arm(arm)
            .and_then(|(e, _)| e.get(unit))
            .is_some_and(|v| !v.is_nan())
    }

    /// Every arm's (arm, effects, stamps), arm 1 first.
    pub fn arms(&self) -> impl Iterator<Item = (usize, &ChunkedColumn<f64>, &Stamps)> {
        std::iter::once((1, &self.effects, &self.predicted_at_ms)).chain(
            self.further_arms
                .iter()
                .enumerate()
                .map(|(j, c)| (j + 2, &c.effects, &c.predicted_at_ms)),
        )
    }

    /// Predictions stored for this model, every arm together.
    pub fn total(&self) -> u64 {
        self.count + self.further_arms.iter().map(|c| c.count).sum::<u64>()
    }

    pub fn active(&self) -> bool {
        self.model.retired_at_ms == 0
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
    /// Each model's position in `models` by its store id: every stored
    /// prediction names its model by id, so intake and catching up look
    /// one up per row (a scan of 1,000 models per row, before).
    model_ids: HashMap<i64, usize>,
    /// The dataset's declared arms, the reference first; empty for a
    /// binary dataset. Intake maps arm labels to indices with it.
    pub arms: Vec<String>,
    /// Positions of the registered blends in `models`, whose predictions
    /// the cache derives from their members' as these arrive.
    derived: Vec<usize>,
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
            model_ids: HashMap::new(),
            arms: Vec::new(),
            derived: Vec::new(),
            revision: 0,
        }
    }

    /// A cache for a dataset with these arms (empty: binary).
    pub fn with_arms(features_per_unit: usize, arms: Vec<String>) -> Self {
        Self {
            arms,
            ..Self::new(features_per_unit)
        }
    }

    /// The index of the arm labelled `label`, on a dataset with arms.
    pub fn arm_index(&self, label: &str) -> Option<usize> {
        self.arms.iter().position(|a| a == label)
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

    /// Predictions sent (and stored); a registered blend's derived ones are
    /// not among them, as they are not stored.
    pub fn predictions(&self) -> u64 {
        self.models
            .iter()
            .filter(|m| m.model.blend.is_none())
            .map(ModelColumn::total)
            .sum()
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
            for c in &mut m.further_arms {
                c.effects.extend_filled(units.len(), f64::NAN);
                c.predicted_at_ms.extend_zeros(units.len());
            }
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
            for c in &mut m.further_arms {
                c.effects.truncate(mark.units);
                c.predicted_at_ms.truncate(mark.units);
            }
        }
    }

    pub fn add_outcome(&mut self, o: &OutcomeRecord) {
        debug_assert_eq!(o.seq, self.next_outcome_seq());
        self.columns
            .add_outcome(o.unit_seq as usize, o.value, o.observed_at_ms);
    }

    /// Adds a model; a registered blend gets at once every prediction its
    /// members allow, and the rest as they arrive ([`Self::add_prediction`]).
    pub fn add_model(&mut self, model: StoredModel) {
        let m = self.models.len();
        self.model_index.insert(model.name.clone(), m);
        self.model_ids.entry(model.id).or_insert(m);
        let units = self.units();
        let members = model.blend.as_ref().and_then(|b| {
            b.members
                .iter()
                .map(|x| Some((self.model_by_id(x.model_id)?, x.weight)))
                .collect::<Option<Vec<_>>>()
        });
        let derived = members.is_some();
        self.models.push(ModelColumn {
            members,
            ..ModelColumn::new(model, units, self.arms.len())
        });
        if derived {
            self.derived.push(m);
            for u in 0..units {
                self.derive(m, u);
            }
        }
    }

    /// Sets blend `d`'s prediction for unit `u` to the weighted sum of its
    /// members' predictions, when every member has predicted the unit
    /// (members' predictions are never replaced, so neither is this). The
    /// sum runs in the definition's order, so it is the same number
    /// whenever it is formed.
    fn derive(&mut self, d: usize, u: usize) {
        if self.models[d].has(u) {
            return;
        }
        let Some(members) = &self.models[d].members else {
            return;
        };
        let mut sum = 0.0;
        for &(m, w) in members {
            let e = self.models[m].effects.get(u).copied().unwrap_or(f64::NAN);
            if e.is_nan() {
                return;
            }
            sum += w * e;
        }
        let col = &mut self.models[d];
        col.effects[u] = sum;
        col.count += 1;
    }

    pub fn model_by_id(&self, id: i64) -> Option<usize> {
        self.model_ids.get(&id).copied()
    }

    /// Stores a checked prediction in its model's column of its arm (a
    /// record for an arm the dataset lacks was refused by intake and never
    /// stored; it is skipped here rather than trusted).
    pub fn add_prediction(&mut self, model: usize, p: &PredictionRecord) {
        let col = &mut self.models[model];
        let u = p.unit_seq as usize;
        let (effects, stamps, count) = match p.arm {
            1 => (&mut col.effects, &mut col.predicted_at_ms, &mut col.count),
            a => match col.further_arms.get_mut(usize::from(a).wrapping_sub(2)) {
                Some(c) => (&mut c.effects, &mut c.predicted_at_ms, &mut c.count),
                None => return,
            },
        };
        if effects[u].is_nan() {
            *count += 1;
        }
        effects[u] = p.effect;
        stamps.set(u, p.predicted_at_ms);
        if self.columns.outcome_of(u).is_some() {
            self.revision += 1;
        }
        // Blends derive arm 1's predictions only.
        let derived = if p.arm == 1 { self.derived.len() } else { 0 };
        for i in 0..derived {
            let d = self.derived[i];
            let member = self.models[d]
                .members
                .as_ref()
                .is_some_and(|ms| ms.iter().any(|&(k, _)| k == model));
            if member {
                self.derive(d, u);
            }
        }
    }

    /// Next outcome sequence number.
    pub fn next_outcome_seq(&self) -> i64 {
        self.outcomes() as i64
    }

    /// Predictions are numbered in arrival order; each stored one is counted
    /// once in its model's column.
    pub fn next_prediction_seq(&self) -> i64 {
        self.predictions() as i64
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
            blend: None,
        }
    }

    fn prediction(model_id: i64, unit: usize, effect: f64) -> PredictionRecord {
        PredictionRecord {
            model_id,
            unit_seq: unit as i64,
            seq: 0,
            effect,
            predicted_at_ms: 0,
            arm: 1,
        }
    }

    /// A registered blend predicts exactly the units every member has
    /// predicted, with the weighted sum, whether the members' predictions
    /// came before its registration or after; it is not counted among the
    /// predictions sent, which number the stored ones.
    #[test]
    fn a_blend_predicts_the_weighted_sum_where_every_member_has_predicted() {
        use crate::domain::{BlendDefinition, BlendMember};
        let mut cache = DatasetCache::new(2);
        for id in 0..2 {
            cache.add_model(model(id));
        }
        for u in 0..4 {
            cache.add_unit(&unit(u, "spring"));
        }
        // Before: unit 0 by both, unit 1 by m0 only.
        cache.add_prediction(0, &prediction(0, 0, 1.5));
        cache.add_prediction(1, &prediction(1, 0, -2.0));
        cache.add_prediction(0, &prediction(0, 1, 3.0));
        let member = |id: i64, weight: f64| BlendMember {
            model_id: id,
            model: format!("m{id}"),
            weight,
        };
        cache.add_model(StoredModel {
            id: 9,
            name: "b".into(),
            blend: Some(BlendDefinition {
                snapshot_id: 4,
                window: crate::domain::Window::Cumulative,
                members: vec![member(0, 0.75), member(1, 0.25)],
            }),
            ..model(9)
        });
        let b = cache.model_index["b"];
        assert_eq!(cache.models[b].effects[0], 0.75 * 1.5 + 0.25 * -2.0);
        assert!(!cache.models[b].has(1) && !cache.models[b].has(2));
        assert_eq!(cache.models[b].count, 1);
        // After: unit 1 completed, unit 2 half done.
        cache.add_prediction(1, &prediction(1, 1, 0.5));
        cache.add_prediction(1, &prediction(1, 2, 7.0));
        assert_eq!(cache.models[b].effects[1], 0.75 * 3.0 + 0.25 * 0.5);
        assert!(!cache.models[b].has(2) && !cache.models[b].has(3));
        assert_eq!(cache.models[b].count, 2);
        assert_eq!(cache.predictions(), 5);
        assert_eq!(cache.next_prediction_seq(), 5);
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
            batched.models[0].effects.chunks().len(),
            units.div_ceil(CHUNK_ROWS)
        );
        // Outcomes land on the batched units as on any others.
        batched.columns.add_outcome(units - 1, 2.5, 9);
        assert_eq!(batched.columns.outcome_of(units - 1), Some(2.5));
        assert_eq!(batched.columns.observed_at_ms[units - 1], 9);
    }
}
