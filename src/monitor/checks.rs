//! Validation of intake batches against the cache, before anything is
//! written. A batch is accepted whole or refused whole.
//!
//! Rules: an identical re-send of a stored row is a duplicate (no-op); a row
//! that conflicts with a stored one, or with another row of the same batch,
//! is a conflict; an outcome or prediction for an unknown unit is refused;
//! a prediction for a unit whose outcome is already known is refused unless
//! both carry timestamps and the prediction's is earlier (a backfill); a
//! prediction stamped after its outcome is always refused.

use std::collections::HashMap;

use super::cache::DatasetCache;
use crate::domain::{OutcomeRecord, PredictionRecord, UnitRecord};
use crate::estimate::OutcomeKind;

/// Longest unit key, in bytes.
pub const MAX_KEY_BYTES: usize = 256;
/// Longest cohort label, in bytes.
pub const MAX_COHORT_BYTES: usize = 128;
/// Most rows in one batch.
pub const MAX_BATCH_ROWS: usize = 10_000;
/// Most row-level reasons returned for a refused batch. Every faulty row
/// is recorded (a batch holds at most [`MAX_BATCH_ROWS`]), so the receipt
/// can count them all; only the reasons sent back are capped.
pub const MAX_REJECTIONS: usize = 100;

/// What kind of problem a row has; decides the status code.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Fault {
    /// Malformed: INVALID_ARGUMENT.
    Invalid,
    /// Conflicts with stored data or with the batch itself: ALREADY_EXISTS.
    Conflict,
    /// Refers to a unit or model that does not exist: NOT_FOUND.
    Unknown,
    /// Breaks an ordering rule (prediction after outcome, retired model):
    /// FAILED_PRECONDITION.
    Order,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Rejection {
    pub row: usize,
    pub field: String,
    pub reason: String,
    pub fault: Fault,
}

/// A validated batch: the new rows to write, and how many were duplicates.
#[derive(Debug)]
pub struct Checked<T> {
    pub new_rows: Vec<T>,
    pub duplicate: usize,
}

impl<T> Default for Checked<T> {
    fn default() -> Self {
        Self {
            new_rows: Vec::new(),
            duplicate: 0,
        }
    }
}

/// A unit as received.
#[derive(Debug, Clone)]
pub struct UnitIn {
    pub key: String,
    pub features: Vec<f64>,
    pub treatment: u32,
    pub propensity: Option<f64>,
    pub cohort: String,
    pub assigned_at_ms: i64,
}

#[derive(Debug, Clone)]
pub struct OutcomeIn {
    pub unit_key: String,
    pub value: f64,
    pub observed_at_ms: i64,
}

#[derive(Debug, Clone)]
pub struct PredictionIn {
    pub model: String,
    pub unit_key: String,
    pub effect: f64,
    pub predicted_at_ms: i64,
}

struct Faults(Vec<Rejection>);

impl Faults {
    /// The batch if no row was at fault, else every recorded fault.
    fn finish<T>(self, checked: Checked<T>) -> Result<Checked<T>, Vec<Rejection>> {
        if self.0.is_empty() {
            Ok(checked)
        } else {
            Err(self.0)
        }
    }

    fn add(
        &mut self,
        row: usize,
        field: impl Into<String>,
        fault: Fault,
        reason: impl Into<String>,
    ) {
        self.0.push(Rejection {
            row,
            field: field.into(),
            reason: reason.into(),
            fault,
        });
    }
}

fn check_size(len: usize) -> Result<(), Vec<Rejection>> {
    if len == 0 {
        return Err(vec![Rejection {
            row: 0,
            field: "rows".into(),
            reason: "the batch is empty".into(),
            fault: Fault::Invalid,
        }]);
    }
    if len > MAX_BATCH_ROWS {
        return Err(vec![Rejection {
            row: MAX_BATCH_ROWS,
            field: "rows".into(),
            reason: format!("{len} rows; a batch holds at most {MAX_BATCH_ROWS}"),
            fault: Fault::Invalid,
        }]);
    }
    Ok(())
}

fn check_key(f: &mut Faults, row: usize, field: &str, key: &str) -> bool {
    if key.is_empty() || key.len() > MAX_KEY_BYTES {
        f.add(
            row,
            field,
            Fault::Invalid,
            format!("must be 1 to {MAX_KEY_BYTES} bytes"),
        );
        return false;
    }
    if key.chars().any(char::is_control) {
        f.add(row, field, Fault::Invalid, "contains a control character");
        return false;
    }
    true
}

fn check_time(f: &mut Faults, row: usize, field: &str, t: i64) {
    if t < 0 {
        f.add(
            row,
            field,
            Fault::Invalid,
            format!("{t} is negative (Unix milliseconds, or 0 if unknown)"),
        );
    }
}

pub fn check_units(
    cache: &DatasetCache,
    rows: &[UnitIn],
) -> Result<Checked<UnitRecord>, Vec<Rejection>> {
    check_size(rows.len())?;
    let d = cache.features_per_unit;
    let mut f = Faults(Vec::new());
    let mut out = Checked::default();
    let mut in_batch: HashMap<&str, usize> = HashMap::new();
    for (i, r) in rows.iter().enumerate() {
        let before = f.0.len();
        check_key(&mut f, i, "key", &r.key);
        if r.features.len() != d {
            f.add(
                i,
                "features",
                Fault::Invalid,
                format!("{} values for {d} features", r.features.len()),
            );
        } else if let Some(j) = r.features.iter().position(|v| !v.is_finite()) {
            f.add(
                i,
                format!("features[{j}]"),
                Fault::Invalid,
                format!("{} is not finite", r.features[j]),
            );
        }
        if r.treatment > 1 {
            f.add(
                i,
                "treatment",
                Fault::Invalid,
                format!("{} is not 0 or 1", r.treatment),
            );
        }
        if let Some(p) = r.propensity {
            if !(p > 0.0 && p < 1.0) {
                f.add(
                    i,
                    "propensity",
                    Fault::Invalid,
                    format!("{p} is outside (0, 1)"),
                );
            }
        }
        if r.cohort.len() > MAX_COHORT_BYTES || r.cohort.chars().any(char::is_control) {
            f.add(
                i,
                "cohort",
                Fault::Invalid,
                format!("must be at most {MAX_COHORT_BYTES} printable bytes"),
            );
        }
        check_time(&mut f, i, "assigned_at_ms", r.assigned_at_ms);
        if f.0.len() > before {
            continue;
        }
        let same =
            |features: &[f64], treatment: u8, propensity: Option<f64>, cohort: &str, at: i64| {
                features
                    .iter()
                    .zip(&r.features)
                    .all(|(a, b)| a.to_bits() == b.to_bits())
                    && u32::from(treatment) == r.treatment
                    && propensity.map(f64::to_bits) == r.propensity.map(f64::to_bits)
                    && cohort == r.cohort
                    && at == r.assigned_at_ms
            };
        if let Some(u) = cache.unit_of(&r.key) {
            let cohort = &cache.cohort_names[cache.columns.cohort[u] as usize];
            if same(
                cache.unit_features(u),
                cache.columns.treatment[u],
                cache.columns.propensity_of(u),
                cohort,
                cache.assigned_at_ms[u],
            ) {
                out.duplicate += 1;
            } else {
                f.add(
                    i,
                    "key",
                    Fault::Conflict,
                    format!("unit {:?} is already stored with different values", r.key),
                );
            }
            continue;
        }
        if let Some(&first) = in_batch.get(r.key.as_str()) {
            let o = &rows[first];
            if same(
                &o.features,
                o.treatment as u8,
                o.propensity,
                &o.cohort,
                o.assigned_at_ms,
            ) {
                out.duplicate += 1;
            } else {
                f.add(
                    i,
                    "key",
                    Fault::Conflict,
                    format!(
                        "unit {:?} appears in row {first} with different values",
                        r.key
                    ),
                );
            }
            continue;
        }
        in_batch.insert(&r.key, i);
        out.new_rows.push(UnitRecord {
            seq: (cache.units() + out.new_rows.len()) as i64,
            key: r.key.clone(),
            features: r.features.clone(),
            treatment: r.treatment as u8,
            propensity: r.propensity,
            cohort: r.cohort.clone(),
            assigned_at_ms: r.assigned_at_ms,
        });
    }
    f.finish(out)
}

pub fn check_outcomes(
    cache: &DatasetCache,
    kind: OutcomeKind,
    rows: &[OutcomeIn],
) -> Result<Checked<OutcomeRecord>, Vec<Rejection>> {
    check_size(rows.len())?;
    let mut f = Faults(Vec::new());
    let mut out = Checked::default();
    let mut in_batch: HashMap<usize, usize> = HashMap::new();
    for (i, r) in rows.iter().enumerate() {
        let before = f.0.len();
        if !check_key(&mut f, i, "unit_key", &r.unit_key) {
            continue;
        }
        if !r.value.is_finite() {
            f.add(
                i,
                "value",
                Fault::Invalid,
                format!("{} is not finite", r.value),
            );
        } else if kind == OutcomeKind::Binary && r.value != 0.0 && r.value != 1.0 {
            f.add(
                i,
                "value",
                Fault::Invalid,
                format!("{} is not 0 or 1 on a binary dataset", r.value),
            );
        }
        check_time(&mut f, i, "observed_at_ms", r.observed_at_ms);
        if f.0.len() > before {
            continue;
        }
        let Some(u) = cache.unit_of(&r.unit_key) else {
            f.add(
                i,
                "unit_key",
                Fault::Unknown,
                format!("unit {:?} has not been sent", r.unit_key),
            );
            continue;
        };
        if let Some(v) = cache.columns.outcome_of(u) {
            if v.to_bits() == r.value.to_bits()
                && cache.columns.observed_at_ms[u] == r.observed_at_ms
            {
                out.duplicate += 1;
            } else {
                f.add(
                    i,
                    "value",
                    Fault::Conflict,
                    format!("unit {:?} already has outcome {v}", r.unit_key),
                );
            }
            continue;
        }
        if let Some(&first) = in_batch.get(&u) {
            let o = &rows[first];
            if o.value.to_bits() == r.value.to_bits() && o.observed_at_ms == r.observed_at_ms {
                out.duplicate += 1;
            } else {
                f.add(
                    i,
                    "value",
                    Fault::Conflict,
                    format!("unit {:?} has another outcome in row {first}", r.unit_key),
                );
            }
            continue;
        }
        // A stored prediction stamped after this outcome would have seen it.
        if r.observed_at_ms > 0 {
            if let Some(m) = cache
                .models
                .iter()
                .find(|m| m.has(u) && m.predicted_at_ms[u] > r.observed_at_ms)
            {
                f.add(
                    i,
                    "observed_at_ms",
                    Fault::Order,
                    format!(
                        "model {} predicted unit {:?} after this observation time",
                        m.model.name, r.unit_key
                    ),
                );
                continue;
            }
        }
        in_batch.insert(u, i);
        out.new_rows.push(OutcomeRecord {
            unit_seq: u as i64,
            seq: cache.next_outcome_seq() + out.new_rows.len() as i64,
            value: r.value,
            observed_at_ms: r.observed_at_ms,
        });
    }
    f.finish(out)
}

pub fn check_predictions(
    cache: &DatasetCache,
    rows: &[PredictionIn],
) -> Result<Checked<PredictionRecord>, Vec<Rejection>> {
    check_size(rows.len())?;
    let mut f = Faults(Vec::new());
    let mut out = Checked::default();
    let mut in_batch: HashMap<(usize, usize), usize> = HashMap::new();
    for (i, r) in rows.iter().enumerate() {
        let before = f.0.len();
        if let Err(e) = crate::domain::spec::check_name("model", &r.model) {
            f.add(i, "model", Fault::Invalid, e);
        }
        check_key(&mut f, i, "unit_key", &r.unit_key);
        if !r.effect.is_finite() {
            f.add(
                i,
                "effect",
                Fault::Invalid,
                format!("{} is not finite", r.effect),
            );
        }
        check_time(&mut f, i, "predicted_at_ms", r.predicted_at_ms);
        if f.0.len() > before {
            continue;
        }
        let Some(&m) = cache.model_index.get(&r.model) else {
            f.add(
                i,
                "model",
                Fault::Unknown,
                format!("model {:?} is not registered", r.model),
            );
            continue;
        };
        let col = &cache.models[m];
        if !col.active() {
            f.add(
                i,
                "model",
                Fault::Order,
                format!("model {:?} is retired", r.model),
            );
            continue;
        }
        let Some(u) = cache.unit_of(&r.unit_key) else {
            f.add(
                i,
                "unit_key",
                Fault::Unknown,
                format!("unit {:?} has not been sent", r.unit_key),
            );
            continue;
        };
        if col.has(u) {
            if col.effects[u].to_bits() == r.effect.to_bits()
                && col.predicted_at_ms[u] == r.predicted_at_ms
            {
                out.duplicate += 1;
            } else {
                f.add(
                    i,
                    "effect",
                    Fault::Conflict,
                    format!(
                        "model {:?} already predicted {} for unit {:?}",
                        r.model, col.effects[u], r.unit_key
                    ),
                );
            }
            continue;
        }
        if let Some(&first) = in_batch.get(&(m, u)) {
            let o = &rows[first];
            if o.effect.to_bits() == r.effect.to_bits() && o.predicted_at_ms == r.predicted_at_ms {
                out.duplicate += 1;
            } else {
                f.add(
                    i,
                    "effect",
                    Fault::Conflict,
                    format!("another prediction for the same unit in row {first}"),
                );
            }
            continue;
        }
        if cache.columns.outcome_of(u).is_some() {
            let observed = cache.columns.observed_at_ms[u];
            let backfill = r.predicted_at_ms > 0 && observed > 0 && r.predicted_at_ms < observed;
            if !backfill {
                let why = if r.predicted_at_ms > 0 && observed > 0 {
                    "the prediction is stamped after the unit's outcome was observed"
                } else {
                    "the unit's outcome is already known, so the prediction could have seen it \
                     (stamp predicted_at_ms and observed_at_ms to backfill)"
                };
                f.add(
                    i,
                    "unit_key",
                    Fault::Order,
                    format!("unit {:?}: {why}", r.unit_key),
                );
                continue;
            }
        }
        in_batch.insert((m, u), i);
        out.new_rows.push(PredictionRecord {
            model_id: col.model.id,
            unit_seq: u as i64,
            seq: cache.next_prediction_seq() + out.new_rows.len() as i64,
            effect: r.effect,
            predicted_at_ms: r.predicted_at_ms,
        });
    }
    f.finish(out)
}
