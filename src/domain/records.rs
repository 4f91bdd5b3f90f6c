//! What is stored and read back, row by row: datasets and models as
//! registered, units, outcomes and predictions as accepted, nuisance fit
//! records, the per-model values history keeps, and events.

use super::spec::DatasetSpec;

#[derive(Debug, Clone)]
pub struct StoredDataset {
    pub id: i64,
    pub spec: DatasetSpec,
    pub created_at_ms: i64,
}

#[derive(Debug, Clone, PartialEq)]
pub struct StoredModel {
    pub id: i64,
    pub dataset_id: i64,
    pub name: String,
    pub version: String,
    pub description: String,
    pub registered_at_ms: i64,
    pub retired_at_ms: i64,
}

#[derive(Debug, Clone, PartialEq)]
pub struct UnitRecord {
    pub seq: i64,
    pub key: String,
    pub features: Vec<f64>,
    pub treatment: u8,
    pub propensity: Option<f64>,
    pub cohort: String,
    pub assigned_at_ms: i64,
}

#[derive(Debug, Clone, PartialEq)]
pub struct OutcomeRecord {
    pub unit_seq: i64,
    pub seq: i64,
    pub value: f64,
    pub observed_at_ms: i64,
}

#[derive(Debug, Clone, PartialEq)]
pub struct PredictionRecord {
    pub model_id: i64,
    pub unit_seq: i64,
    /// Arrival order of predictions within the dataset, from 0.
    pub seq: i64,
    pub effect: f64,
    pub predicted_at_ms: i64,
}

#[derive(Debug, Clone)]
pub struct FitRecord {
    pub id: i64,
    pub fitted_at_ms: i64,
    pub units: i64,
    pub last_outcome_seq: i64,
    pub seed: i64,
    pub report_json: String,
}

#[derive(Debug, Clone)]
pub struct ScoreRow {
    pub model: String,
    pub estimator: String,
    pub window: String,
    pub estimate: f64,
    pub se: f64,
    pub rank: i64,
    pub units: i64,
}

#[derive(Debug, Clone)]
pub struct HistoryRow {
    pub snapshot_id: i64,
    pub computed_at_ms: i64,
    pub estimate: f64,
    pub se: f64,
    pub rank: i64,
    pub units: i64,
}

#[derive(Debug, Clone)]
pub struct EventRecord {
    pub id: i64,
    pub dataset: String,
    pub kind: String,
    pub at_ms: i64,
    pub snapshot_id: i64,
    pub summary: String,
    pub details_json: String,
}
