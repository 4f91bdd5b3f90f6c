//! The service's own records, shared by the monitor, the store and the api:
//! a dataset's settings, the rows that arrive, the boards a recompute
//! publishes, the values history keeps, and events. Plain data with serde,
//! free of the wire (`api` converts to and from `proto/`) and of any
//! backend (`store` persists them).

pub mod board;
pub mod records;
pub mod spec;

pub use board::{
    Adjusted, AlertView, ArmPolicyBoard, BlendShare, Board, BoardBlend, BoardModel, Difference,
    Drift, IncompleteModel, NuisanceComponent, OverlapSummary, Pair, Score, Window,
};
pub use records::{
    BlendDefinition, BlendMember, EventRecord, FitRecord, HistoryRow, OutcomeRecord,
    PredictionRecord, ScoreRow, StoredDataset, StoredModel, UnitRecord,
};
pub use spec::DatasetSpec;
