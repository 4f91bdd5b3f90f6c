//! What a recompute reads, copied out of the cache under the dataset's
//! lock: the columns (shared chunk by chunk, not copied), the active
//! models' predictions, the nuisance state and the watch; and the reads of
//! it every part of the job shares.

use ndarray::Array2;

use super::{ArmNuisanceState, NuisanceState};
use crate::domain::DatasetSpec;
use crate::estimate::watch::{Watch, WatchSettings};
use crate::estimate::{EstimateError, FeatureRows, UnitTable};
use crate::monitor::cache::{ChunkedColumn, Columns, CHUNK_ROWS};

/// What a recompute reads: the cache's columns, shared chunk by chunk
/// rather than copied.
pub struct RecomputeInput {
    pub spec: DatasetSpec,
    pub columns: Columns,
    pub cohort_names: Vec<String>,
    /// Active models: name and effects (NaN = missing), in registration order.
    pub models: Vec<(String, ChunkedColumn<f64>)>,
    /// On a dataset with arms, active models: name and effects per arm
    /// other than the reference (`[c]` for arm c + 1); empty on a binary
    /// dataset.
    pub arm_models: Vec<(String, Vec<ChunkedColumn<f64>>)>,
    /// The cache's revision (see [`ScoringMemo`](super::ScoringMemo)).
    pub revision: u64,
    pub nuisance: Option<NuisanceState>,
    /// On a dataset with arms: the nuisance state the last recompute left
    /// (its fit's fold models also give the stream watch's next look its
    /// values); None before the first fit.
    pub arm_nuisance: Option<ArmNuisanceState>,
    /// The most units a refit fits the nuisance models on
    /// (`limits.max_fit_units`); None fits every unit. A fit reproduced at
    /// start-up uses the cap it recorded instead.
    pub max_fit_units: Option<usize>,
    /// The most models a window's blend takes, the first by rank
    /// (`limits.max_blend_models`).
    pub blend_models: usize,
    pub now_ms: i64,
    /// The cumulative window's rank metrics are refreshed on every
    /// recompute below this many units ([`RANKS_ALWAYS_FRESH_BELOW`](super::RANKS_ALWAYS_FRESH_BELOW)).
    pub ranks_fresh_below: usize,
    /// The stream watch as the last recompute left it; this one folds in
    /// the outcomes that arrived since.
    pub watch: Watch,
    pub watch_settings: WatchSettings,
}

impl RecomputeInput {
    pub(super) fn rows(&self, units: &[usize]) -> Array2<f64> {
        let d = self.columns.features.width();
        let mut out = Vec::with_capacity(units.len() * d);
        for &u in units {
            out.extend_from_slice(self.columns.features.row(u));
        }
        Array2::from_shape_vec((units.len(), d), out).unwrap_or_else(|_| Array2::zeros((0, d)))
    }

    /// The features of `units`, read where the cache keeps them.
    pub(super) fn features<'a>(&'a self, units: &'a [usize]) -> FeatureRows<'a> {
        FeatureRows::chunked(
            self.columns.features.chunks(),
            CHUNK_ROWS,
            self.columns.features.width(),
            units,
        )
    }

    /// The treatments, outcomes and (`with_logged`) logged propensities of
    /// `units`. The table holds no features: they stay in the cache and
    /// travel as [`RecomputeInput::features`], so no pass copies the history's.
    pub(super) fn table(
        &self,
        units: &[usize],
        with_logged: bool,
    ) -> Result<UnitTable, EstimateError> {
        let logged = if with_logged {
            units
                .iter()
                .map(|&u| self.columns.propensity_of(u))
                .collect::<Option<Vec<f64>>>()
        } else {
            None
        };
        UnitTable::new(
            Array2::zeros((units.len(), 0)),
            units
                .iter()
                .map(|&u| f64::from(self.columns.treatment[u]))
                .collect(),
            units
                .iter()
                .map(|&u| self.columns.outcome_of(u).unwrap_or(0.0))
                .collect(),
            logged,
            self.spec.outcome_kind,
        )
    }

    /// Units with outcomes, in unit order.
    pub(super) fn scorable(&self) -> Vec<usize> {
        self.columns.arrived(0..self.columns.outcomes())
    }

    /// The recent window's units: the last N outcomes and / or the last D
    /// days of observations, in unit order.
    pub(super) fn recent(&self) -> Vec<usize> {
        let outcomes = self.columns.outcomes();
        let n = match self.spec.recent_last_outcomes {
            0 => outcomes,
            n => outcomes.min(n as usize),
        };
        let mut recent = self.columns.arrived(outcomes - n..outcomes);
        if self.spec.recent_last_days > 0 {
            let since = self.now_ms - i64::from(self.spec.recent_last_days) * 86_400_000;
            recent.retain(|&u| {
                self.columns.observed_at_ms[u] == 0 || self.columns.observed_at_ms[u] >= since
            });
        }
        recent
    }
}
