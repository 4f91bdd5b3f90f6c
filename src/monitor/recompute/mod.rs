//! One recompute of a dataset, as a blocking job over a [`RecomputeInput`]
//! copied out of the cache: nuisance values for units that have none (a
//! full cross-fitted refit, or the current fold models applied to new
//! units), then a scoreboard per window.
//!
//! Between refits a recompute costs what its new units cost, not what the
//! history costs (DEVELOPERS.md, "Incremental recomputes"): a
//! [`ScoringMemo`] kept with the nuisance state holds each cohort window's
//! result (a window whose units did not change is not rescored), an index
//! of each cohort's units, and the cumulative window as a
//! [`GrowingWindow`](crate::estimate::incremental::GrowingWindow), which
//! the new units are merged into; its rank metrics are refreshed when the
//! window has grown by the dataset's `rank_refresh_growth`. A refit
//! discards the memo, so the boards after a refit are a from-scratch
//! computation, equal to `plumbline score` on the same data.
//!
//! `input.rs` holds what the job reads, `nuisance.rs` the refit decision
//! and the nuisance values (`arm_nuisance.rs` those of a dataset with
//! arms, `arms.rs` its boards), `watch.rs` the stream watch's look at the
//! arrivals, `windows.rs` each window's board, `memo.rs` what is kept for
//! the next recompute; this file runs them in order.

mod arm_nuisance;
mod arms;
mod input;
mod memo;
mod nuisance;
#[cfg(test)]
mod tests;
mod watch;
mod windows;

use std::sync::Arc;

use crate::domain::{DatasetSpec, IncompleteModel, Window};
use crate::estimate::crossfit::NuisanceSettings;
use crate::estimate::scoreboard::{Scoreboard, Settings};
use crate::estimate::watch::{Signal, Watch};
use crate::estimate::EstimateError;

pub use arm_nuisance::ArmNuisanceState;
pub use arms::{ArmWindowResult, ArmsComputed};
pub use input::RecomputeInput;
pub use memo::ScoringMemo;
use nuisance::Fixed;
pub use nuisance::{recorded_max_fit_units, NuisanceState, RefitReason};
pub use windows::{BLEND_MODELS, RANKS_ALWAYS_FRESH_BELOW};

/// What a recompute was asked for beyond its schedule.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct RecomputeOptions {
    /// A full cross-fitted refit of the nuisance models.
    pub refit: bool,
    /// The cumulative window's rank metrics over all of its units, whatever
    /// its growth since they were last computed.
    pub refresh_ranks: bool,
}

/// One window's result.
#[derive(Clone)]
pub struct WindowResult {
    pub key: String,
    pub window: Window,
    pub board: Result<Scoreboard, String>,
    pub units: usize,
    pub incomplete: Vec<IncompleteModel>,
    /// Kept from the previous recompute: the window's units did not change.
    pub reused: bool,
}

pub struct Computed {
    pub nuisance: NuisanceState,
    /// Set when this recompute refitted (the fit still needs a record id).
    pub refit: Option<RefitReason>,
    pub windows: Vec<WindowResult>,
    pub newly_scored: usize,
    /// The watch after this recompute's arrivals, and what it decided.
    pub watch: Watch,
    pub signals: Vec<Signal>,
}

fn settings(spec: &DatasetSpec) -> Settings {
    Settings {
        nuisance: NuisanceSettings {
            folds: spec.folds as usize,
            seed: spec.seed,
            ..NuisanceSettings::default()
        },
        cost: spec.treatment_cost,
        alpha: spec.alpha,
        overlap_eps: spec.overlap_eps,
        ..Settings::default()
    }
}

impl RecomputeInput {
    /// The whole recompute.
    pub fn compute(mut self, options: RecomputeOptions) -> Result<Computed, EstimateError> {
        let previous = self
            .nuisance
            .as_mut()
            .map(|n| std::mem::take(&mut n.memo))
            .unwrap_or_default();
        let (signals, fixed) = self.watch_arrivals()?;
        let misfit = signals
            .iter()
            .any(|s| matches!(s, Signal::NuisanceMisfit { .. }));
        let (mut nuisance, refit, newly_scored) = self.nuisance(options.refit, misfit, &fixed)?;
        if refit.is_some() {
            self.watch.refitted();
        }
        let names: Vec<String> = self.models.iter().map(|(n, _)| n.clone()).collect();
        let mut previous = match Arc::try_unwrap(previous) {
            Ok(memo) => memo,
            Err(shared) => (*shared).clone(),
        };
        if refit.is_some() || previous.revision != self.revision || previous.models != names {
            previous = ScoringMemo::default();
        }
        let mut cohort_index = std::mem::take(&mut previous.cohort_index);
        cohort_index.update(&self.columns, self.cohort_names.len());
        let mut memo = ScoringMemo {
            revision: self.revision,
            models: names,
            ..ScoringMemo::default()
        };
        let named = |mut result: WindowResult, window: Window| {
            result.key = window.key();
            result.window = window;
            result
        };
        let mut windows = Vec::new();
        let cumulative = match previous
            .cumulative
            .take()
            .and_then(|m| self.extend_cumulative(m, &nuisance, options.refresh_ranks))
        {
            Some((r, m)) => {
                memo.cumulative = Some(m);
                r
            }
            None => {
                let (r, m) = self.score_window(&self.scorable(), &nuisance, true);
                memo.cumulative = m;
                r
            }
        };
        windows.push(named(cumulative, Window::Cumulative));
        windows.push(named(
            self.score_window(&self.recent(), &nuisance, false).0,
            Window::Recent,
        ));
        for (c, units) in cohort_index.units.iter().enumerate() {
            // Units sent without a cohort are in no cohort window.
            let Some(name) = self
                .cohort_names
                .get(c)
                .filter(|name| !units.is_empty() && !name.is_empty())
            else {
                continue;
            };
            let key = format!("cohort:{name}");
            let result = match previous.cohorts.remove(&key) {
                Some((count, r)) if count == units.len() => WindowResult { reused: true, ..r },
                _ => {
                    let units: Vec<usize> = units.iter().map(|&u| u as usize).collect();
                    self.score_window(&units, &nuisance, false).0
                }
            };
            let result = named(result, Window::Cohort(name.clone()));
            memo.cohorts.insert(key, (units.len(), result.clone()));
            windows.push(result);
        }
        memo.cohort_index = cohort_index;
        nuisance.memo = Arc::new(memo);
        Ok(Computed {
            nuisance,
            refit,
            windows,
            newly_scored,
            watch: self.watch,
            signals,
        })
    }
}
