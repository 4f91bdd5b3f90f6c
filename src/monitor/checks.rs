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
    /// The arm label, on a dataset with arms (`treatment` is then 0).
    pub arm: String,
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
    /// The arm the effect is for, on a dataset with arms.
    pub arm: String,
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

/// The treatment a unit row stores: 0 or 1 on a binary dataset (the
/// `treatment` field), the index of its arm label on a dataset with arms.
/// A row in the other dataset's style is refused, naming the field.
fn unit_arm(f: &mut Faults, cache: &DatasetCache, row: usize, r: &UnitIn) -> u8 {
    if cache.arms.is_empty() {
        if !r.arm.is_empty() {
            f.add(
                row,
                "arm",
                Fault::Invalid,
                format!(
                    "the dataset declares no arms; give treatment 0 or 1 (got arm {:?})",
                    r.arm
                ),
            );
        }
        if r.treatment > 1 {
            f.add(
                row,
                "treatment",
                Fault::Invalid,
                format!("{} is not 0 or 1", r.treatment),
            );
        }
        return u8::from(r.treatment == 1);
    }
    if r.treatment != 0 {
        f.add(
            row,
            "treatment",
            Fault::Invalid,
            format!(
                "the dataset declares arms ({}); give the arm label in arm, not treatment {}",
                cache.arms.join(", "),
                r.treatment
            ),
        );
    }
    match cache.arm_index(&r.arm) {
        Some(k) => k as u8,
        None => {
            let why = unknown_arm(&r.arm);
            f.add(
                row,
                "arm",
                Fault::Invalid,
                format!("{why}; the dataset's arms are {}", cache.arms.join(", ")),
            );
            0
        }
    }
}

/// Why `label` names no declared arm.
fn unknown_arm(label: &str) -> String {
    if label.is_empty() {
        "is empty".to_string()
    } else {
        format!("{label:?} is not a declared arm")
    }
}

/// The treatment an already checked row stores (see [`unit_arm`]).
fn arm_index(cache: &DatasetCache, r: &UnitIn) -> u8 {
    if cache.arms.is_empty() {
        r.treatment as u8
    } else {
        cache.arm_index(&r.arm).map_or(0, |k| k as u8)
    }
}

/// The arm a prediction row is for: 1 on a binary dataset; on a dataset
/// with arms, the index of its label, which must name an arm other than
/// the reference.
fn prediction_arm(f: &mut Faults, cache: &DatasetCache, row: usize, r: &PredictionIn) -> u8 {
    if cache.arms.is_empty() {
        if !r.arm.is_empty() {
            f.add(
                row,
                "arm",
                Fault::Invalid,
                format!(
                    "the dataset declares no arms; a prediction is the treatment's effect \
                     (got arm {:?})",
                    r.arm
                ),
            );
        }
        return 1;
    }
    match cache.arm_index(&r.arm) {
        Some(0) => {
            f.add(
                row,
                "arm",
                Fault::Invalid,
                format!(
                    "{:?} is the reference arm: effects are against it; name one of {}",
                    r.arm,
                    cache.arms[1..].join(", ")
                ),
            );
            1
        }
        Some(k) => k as u8,
        None => {
            let why = unknown_arm(&r.arm);
            f.add(
                row,
                "arm",
                Fault::Invalid,
                format!(
                    "{why}; a prediction names the arm whose effect against {} it is: one of {}",
                    cache.arms[0],
                    cache.arms[1..].join(", ")
                ),
            );
            1
        }
    }
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
        let treatment = unit_arm(&mut f, cache, i, r);
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
            |features: &[f64], stored: u8, propensity: Option<f64>, cohort: &str, at: i64| {
                features
                    .iter()
                    .zip(&r.features)
                    .all(|(a, b)| a.to_bits() == b.to_bits())
                    && stored == treatment
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
                arm_index(cache, o),
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
            treatment,
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
            if let Some(m) = cache.models.iter().find(|m| {
                m.arms()
                    .any(|(_, e, at)| !e[u].is_nan() && at[u] > r.observed_at_ms)
            }) {
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
    let mut in_batch: HashMap<(usize, u8, usize), usize> = HashMap::new();
    for (i, r) in rows.iter().enumerate() {
        let before = f.0.len();
        if let Err(e) = crate::domain::spec::check_name("model", &r.model) {
            f.add(i, "model", Fault::Invalid, e);
        }
        let arm = prediction_arm(&mut f, cache, i, r);
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
        if col.model.blend.is_some() {
            f.add(
                i,
                "model",
                Fault::Invalid,
                format!(
                    "model {:?} is a registered blend: the service computes its predictions \
                     from its members'",
                    r.model
                ),
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
        let Some((effects, stamps)) = col.arm(usize::from(arm)) else {
            f.add(
                i,
                "arm",
                Fault::Invalid,
                format!("arm {arm} is not one of the dataset's"),
            );
            continue;
        };
        if !effects[u].is_nan() {
            if effects[u].to_bits() == r.effect.to_bits() && stamps[u] == r.predicted_at_ms {
                out.duplicate += 1;
            } else {
                let of_arm = if cache.arms.is_empty() {
                    String::new()
                } else {
                    format!(" (arm {})", r.arm)
                };
                f.add(
                    i,
                    "effect",
                    Fault::Conflict,
                    format!(
                        "model {:?} already predicted {}{of_arm} for unit {:?}",
                        r.model, effects[u], r.unit_key
                    ),
                );
            }
            continue;
        }
        if let Some(&first) = in_batch.get(&(m, arm, u)) {
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
        in_batch.insert((m, arm, u), i);
        out.new_rows.push(PredictionRecord {
            model_id: col.model.id,
            unit_seq: u as i64,
            seq: cache.next_prediction_seq() + out.new_rows.len() as i64,
            arm,
            effect: r.effect,
            predicted_at_ms: r.predicted_at_ms,
        });
    }
    f.finish(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::domain::StoredModel;

    fn arms_cache() -> DatasetCache {
        let mut c = DatasetCache::with_arms(1, vec!["none".into(), "text".into(), "mail".into()]);
        c.add_model(StoredModel {
            id: 7,
            dataset_id: 1,
            name: "m".into(),
            version: "1".into(),
            description: String::new(),
            registered_at_ms: 0,
            retired_at_ms: 0,
            blend: None,
        });
        c
    }

    fn unit(key: &str, treatment: u32, arm: &str) -> UnitIn {
        UnitIn {
            key: key.into(),
            features: vec![0.5],
            treatment,
            propensity: None,
            cohort: String::new(),
            assigned_at_ms: 0,
            arm: arm.into(),
        }
    }

    fn prediction(key: &str, arm: &str, effect: f64) -> PredictionIn {
        PredictionIn {
            model: "m".into(),
            unit_key: key.into(),
            effect,
            predicted_at_ms: 0,
            arm: arm.into(),
        }
    }

    fn faults(r: Vec<Rejection>) -> Vec<(usize, String)> {
        r.into_iter().map(|r| (r.row, r.field)).collect()
    }

    #[test]
    fn units_of_a_dataset_with_arms_store_their_arm_index_and_refuse_binary_rows() {
        let c = arms_cache();
        let ok = check_units(&c, &[unit("a", 0, "none"), unit("b", 0, "mail")]).expect("valid");
        assert_eq!(
            ok.new_rows.iter().map(|u| u.treatment).collect::<Vec<_>>(),
            vec![0, 2]
        );
        let bad = check_units(
            &c,
            &[
                unit("a", 0, "text"),
                unit("b", 1, ""),
                unit("c", 0, "sms"),
                unit("d", 0, ""),
            ],
        )
        .expect_err("rows 1 to 3 are refused");
        assert_eq!(
            faults(bad),
            vec![
                (1, "treatment".into()),
                (1, "arm".into()),
                (2, "arm".into()),
                (3, "arm".into())
            ]
        );
        // A binary dataset refuses an arm label and keeps 0 or 1.
        let binary = DatasetCache::new(1);
        let bad = check_units(&binary, &[unit("a", 1, ""), unit("b", 0, "text")])
            .expect_err("an arm label on a binary dataset");
        assert_eq!(faults(bad), vec![(1, "arm".into())]);
        let ok = check_units(&binary, &[unit("a", 1, "")]).expect("binary row");
        assert_eq!(ok.new_rows[0].treatment, 1);
    }

    #[test]
    fn predictions_of_a_dataset_with_arms_are_kept_per_arm() {
        let mut c = arms_cache();
        let units = check_units(&c, &[unit("a", 0, "none")]).expect("unit");
        c.add_units(&units.new_rows);
        let rows = [prediction("a", "text", 0.5), prediction("a", "mail", -0.5)];
        let ok = check_predictions(&c, &rows).expect("one per arm");
        assert_eq!(
            ok.new_rows.iter().map(|p| p.arm).collect::<Vec<_>>(),
            vec![1, 2]
        );
        for p in &ok.new_rows {
            c.add_prediction(0, p);
        }
        assert_eq!(c.predictions(), 2);
        assert!(c.models[0].has_arm(1, 0) && c.models[0].has_arm(2, 0));
        // A re-send is a duplicate; another value for one arm a conflict.
        let again = check_predictions(&c, &rows[1..]).expect("a duplicate");
        assert_eq!((again.new_rows.len(), again.duplicate), (0, 1));
        let bad = check_predictions(
            &c,
            &[
                prediction("a", "mail", 0.25),
                prediction("a", "none", 0.0),
                prediction("a", "sms", 0.0),
                prediction("a", "", 0.0),
            ],
        )
        .expect_err("refused");
        assert_eq!(
            faults(bad),
            vec![
                (0, "effect".into()),
                (1, "arm".into()),
                (2, "arm".into()),
                (3, "arm".into())
            ]
        );
    }
}
