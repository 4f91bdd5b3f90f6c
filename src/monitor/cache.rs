//! The per-dataset in-memory columnar cache: every unit, outcome and
//! prediction of a dataset, rebuilt from the store at start-up and appended
//! on ingest. Units are indexed by their sequence number (arrival order).

use std::collections::HashMap;

use crate::store::{OutcomeRecord, PredictionRecord, StoredModel, UnitRecord};

/// One model's predictions, aligned with the units.
#[derive(Debug, Clone)]
pub struct ModelColumn {
    pub model: StoredModel,
    /// Predicted effect per unit; NaN marks "no prediction" (internal only:
    /// never scored, never shown).
    pub effects: Vec<f64>,
    pub predicted_at_ms: Vec<i64>,
    pub count: u64,
}

impl ModelColumn {
    pub fn new(model: StoredModel, units: usize) -> Self {
        Self {
            model,
            effects: vec![f64::NAN; units],
            predicted_at_ms: vec![0; units],
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

#[derive(Debug, Clone, Default)]
pub struct DatasetCache {
    pub features_per_unit: usize,
    pub key_to_unit: HashMap<String, usize>,
    pub keys: Vec<String>,
    /// Row-major, units x features.
    pub features: Vec<f64>,
    pub treatment: Vec<u8>,
    pub propensity: Vec<Option<f64>>,
    pub cohort: Vec<u32>,
    pub cohort_names: Vec<String>,
    pub cohort_index: HashMap<String, u32>,
    pub assigned_at_ms: Vec<i64>,
    pub outcome: Vec<Option<f64>>,
    pub outcome_seq: Vec<i64>,
    pub observed_at_ms: Vec<i64>,
    /// Units with an outcome, in outcome arrival order.
    pub outcome_order: Vec<usize>,
    pub models: Vec<ModelColumn>,
    pub model_index: HashMap<String, usize>,
}

impl DatasetCache {
    pub fn new(features_per_unit: usize) -> Self {
        Self {
            features_per_unit,
            ..Self::default()
        }
    }

    pub fn units(&self) -> usize {
        self.keys.len()
    }

    pub fn outcomes(&self) -> usize {
        self.outcome_order.len()
    }

    pub fn predictions(&self) -> u64 {
        self.models.iter().map(|m| m.count).sum()
    }

    pub fn unit_features(&self, unit: usize) -> &[f64] {
        let d = self.features_per_unit;
        &self.features[unit * d..(unit + 1) * d]
    }

    pub fn add_unit(&mut self, u: &UnitRecord) {
        let idx = self.keys.len();
        debug_assert_eq!(u.seq as usize, idx);
        self.key_to_unit.insert(u.key.clone(), idx);
        self.keys.push(u.key.clone());
        self.features.extend_from_slice(&u.features);
        self.treatment.push(u.treatment);
        self.propensity.push(u.propensity);
        let cohort = match self.cohort_index.get(&u.cohort) {
            Some(&c) => c,
            None => {
                let c = self.cohort_names.len() as u32;
                self.cohort_names.push(u.cohort.clone());
                self.cohort_index.insert(u.cohort.clone(), c);
                c
            }
        };
        self.cohort.push(cohort);
        self.assigned_at_ms.push(u.assigned_at_ms);
        self.outcome.push(None);
        self.outcome_seq.push(-1);
        self.observed_at_ms.push(0);
        for m in &mut self.models {
            m.effects.push(f64::NAN);
            m.predicted_at_ms.push(0);
        }
    }

    pub fn add_outcome(&mut self, o: &OutcomeRecord) {
        let u = o.unit_seq as usize;
        self.outcome[u] = Some(o.value);
        self.outcome_seq[u] = o.seq;
        self.observed_at_ms[u] = o.observed_at_ms;
        self.outcome_order.push(u);
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
        col.predicted_at_ms[u] = p.predicted_at_ms;
    }

    /// Next outcome sequence number.
    pub fn next_outcome_seq(&self) -> i64 {
        self.outcome_order.len() as i64
    }
}
