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
    /// Set for a registered blend: a model whose predictions the service
    /// computes itself from other models' (see [`BlendDefinition`]); None
    /// for a model whose predictions are sent.
    pub blend: Option<BlendDefinition>,
}

/// What a registered blend is, frozen when it was registered: the models
/// it averages and their weights, and the board it was taken from. The
/// service predicts for a unit the weighted sum of the members'
/// predictions once every member has predicted it; a unit some member has
/// not predicted stays unpredicted, as for any model.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BlendDefinition {
    /// The recompute whose board's blend this is.
    pub snapshot_id: u64,
    /// That board's window.
    pub window: super::board::Window,
    /// Weights over models with sent predictions (a blend of a registered
    /// blend is stored over that blend's own members), largest first,
    /// summing to 1.
    pub members: Vec<BlendMember>,
}

/// One model's weight in a registered blend.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BlendMember {
    /// The member's model id (names are unique within a dataset, ids
    /// across the store; the id is what the cache looks members up by).
    pub model_id: i64,
    pub model: String,
    pub weight: f64,
}

#[derive(Debug, Clone, PartialEq)]
pub struct UnitRecord {
    pub seq: i64,
    pub key: String,
    pub features: Vec<f64>,
    /// 0 or 1 on a binary dataset; on a dataset with arms, the index of the
    /// unit's arm in the spec's `arms` (0 the reference).
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
    /// The arm whose effect against arm 0 this is: 1 on a binary dataset
    /// (the treatment), an index into the spec's `arms` otherwise.
    pub arm: u8,
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
    /// On a dataset with arms, the arm of the contrast whose board the
    /// value is on (that arm against the reference); empty on a binary
    /// dataset, as on every row stored before arms.
    pub arm: String,
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
