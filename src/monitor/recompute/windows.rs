//! The scoreboard of each window: which models it ranks, the from-scratch
//! pass, and the cumulative window's merge of the units that arrived since
//! the last recompute.

use crate::domain::{IncompleteModel, Window};
use crate::estimate::crossfit::Nuisance;
use crate::estimate::incremental::GrowingWindow;
use crate::estimate::scoreboard::{score_keeping, Column, Gather, Scoreboard, ScoredColumn};

use super::memo::CumulativeMemo;
use super::{settings, NuisanceState, RecomputeInput, WindowResult};

/// Windows below this many units get fresh rank metrics on every
/// recompute, whatever their growth: at 0.6 us per unit a refresh there
/// costs under 30 ms.
pub const RANKS_ALWAYS_FRESH_BELOW: usize = 50_000;

impl RecomputeInput {
    /// Which active models a window ranks, from how many of its units with
    /// outcomes each predicts (`covered`, out of `units`); the rest are
    /// listed as incomplete with their coverage.
    pub(super) fn ranked_models(
        &self,
        covered: &[usize],
        units: usize,
    ) -> (Vec<usize>, Vec<IncompleteModel>) {
        let mut ranked = Vec::new();
        let mut incomplete = Vec::new();
        for (k, ((name, _), &c)) in self.models.iter().zip(covered).enumerate() {
            let share = if units == 0 {
                0.0
            } else {
                c as f64 / units as f64
            };
            if share >= self.spec.min_coverage && c > 0 {
                ranked.push(k);
            } else {
                incomplete.push(IncompleteModel {
                    name: name.clone(),
                    coverage: share,
                });
            }
        }
        (ranked, incomplete)
    }

    pub(super) fn coverage(&self, units: &[usize]) -> Vec<usize> {
        self.models
            .iter()
            .map(|(_, effects)| units.iter().filter(|&&u| !effects[u].is_nan()).count())
            .collect()
    }

    /// The units of `units` that every ranked model covers and that have
    /// nuisance values.
    pub(super) fn common(
        &self,
        units: &[usize],
        ranked: &[usize],
        nuisance: &NuisanceState,
    ) -> Vec<usize> {
        units
            .iter()
            .copied()
            .filter(|&u| ranked.iter().all(|&k| !self.models[k].1[u].is_nan()))
            .filter(|&u| !nuisance.values[u][0].is_nan())
            .collect()
    }

    /// The named states of a window that cannot be scored.
    pub(super) fn degenerate(&self, common: &[usize]) -> Option<String> {
        let n = common.len();
        let treated = common
            .iter()
            .filter(|&&u| self.columns.treatment[u] == 1)
            .count();
        if treated < 2 || n - treated < 2 {
            return Some(format!(
                "too few units to score: {treated} treated and {} control units (at least 2 of each)",
                n - treated
            ));
        }
        let first = self.columns.outcome_of(common[0]);
        if common.iter().all(|&u| self.columns.outcome_of(u) == first) {
            return Some("constant outcome: every outcome in the window is equal".into());
        }
        None
    }

    /// Scores one window from scratch on the units every ranked model
    /// covers; with `keep`, also returns the parts a later recompute can
    /// merge new units into.
    pub(super) fn score_window(
        &self,
        units: &[usize],
        nuisance: &NuisanceState,
        keep: bool,
    ) -> (WindowResult, Option<CumulativeMemo>) {
        let covered = self.coverage(units);
        let (ranked, incomplete) = self.ranked_models(&covered, units.len());
        let common = self.common(units, &ranked, nuisance);
        let n = common.len();
        let result = |board: Result<Scoreboard, String>, incomplete| WindowResult {
            key: String::new(),
            window: Window::Cumulative,
            board,
            units: n,
            incomplete,
            reused: false,
        };
        if let Some(state) = self.degenerate(&common) {
            return (result(Err(state), incomplete), None);
        }
        let table = match self.table(&common, false) {
            Ok(t) => t,
            Err(e) => return (result(Err(e.to_string()), incomplete), None),
        };
        let values = self.nuisance_values(&common, nuisance);
        // Each model's predictions are read where the cache keeps them, a
        // block at a time: the pass never holds all models' columns.
        let gathers: Vec<Box<Gather<'_>>> = ranked
            .iter()
            .map(|&k| {
                let (effects, common) = (&self.models[k].1, &common);
                Box::new(move |start: usize, out: &mut [f64]| {
                    for (o, &u) in out.iter_mut().zip(&common[start..]) {
                        *o = effects[u];
                    }
                }) as Box<Gather<'_>>
            })
            .collect();
        let columns: Vec<Column<'_>> = gathers.iter().map(|g| Column::Gathered(g)).collect();
        let models: Vec<ScoredColumn<'_>> = ranked
            .iter()
            .zip(&columns)
            .map(|(&k, &effects)| ScoredColumn {
                name: self.models[k].0.clone(),
                baseline: false,
                effects,
            })
            .collect();
        let scored = score_keeping(
            &table,
            self.features(&common),
            &self.spec.feature_names,
            &values,
            Some(nuisance.report.clone()),
            &models,
            &settings(&self.spec),
        );
        let (board, memo) = if keep {
            let (board, window) = GrowingWindow::start(
                scored,
                &table,
                &values,
                self.features(&common),
                &columns,
                &settings(&self.spec),
            );
            let memo = CumulativeMemo {
                outcomes: self.columns.outcomes(),
                covered,
                ranked: ranked.clone(),
                units: common.iter().map(|&u| u as u32).collect(),
                window,
            };
            (board, Some(memo))
        } else {
            (scored.board, None)
        };
        (result(Ok(board), incomplete), memo)
    }

    pub(super) fn nuisance_values(&self, units: &[usize], nuisance: &NuisanceState) -> Nuisance {
        Nuisance::from_parts(
            units.iter().map(|&u| nuisance.values[u][0]).collect(),
            units.iter().map(|&u| nuisance.values[u][1]).collect(),
            units.iter().map(|&u| nuisance.values[u][2]).collect(),
            0.0,
        )
        .0
    }

    /// The cumulative window after merging the units whose outcomes arrived
    /// since `memo` into it. None when the merge would not equal a
    /// from-scratch pass: the set of ranked models changed (the common
    /// units would change for the whole history).
    pub(super) fn extend_cumulative(
        &self,
        mut memo: CumulativeMemo,
        nuisance: &NuisanceState,
        refresh_ranks: bool,
    ) -> Option<(WindowResult, CumulativeMemo)> {
        let outcomes = self.columns.outcomes();
        if memo.outcomes > outcomes {
            return None;
        }
        let new = self.columns.arrived(memo.outcomes..outcomes);
        for (c, added) in memo.covered.iter_mut().zip(self.coverage(&new)) {
            *c += added;
        }
        let (ranked, incomplete) = self.ranked_models(&memo.covered, self.columns.outcomes());
        if ranked != memo.ranked {
            return None;
        }
        memo.outcomes = self.columns.outcomes();
        let fresh = self.common(&new, &ranked, nuisance);
        if !fresh.is_empty() {
            let table = self.table(&fresh, false).ok()?;
            let values = self.nuisance_values(&fresh, nuisance);
            let effects: Vec<Vec<f64>> = ranked
                .iter()
                .map(|&k| fresh.iter().map(|&u| self.models[k].1[u]).collect())
                .collect();
            memo.window.add(
                &table,
                &values,
                self.features(&fresh),
                &effects,
                &settings(&self.spec),
            );
            memo.units.extend(fresh.iter().map(|&u| u as u32));
        }
        let n = memo.units.len();
        if memo.window.ranks_due(
            refresh_ranks,
            self.ranks_fresh_below,
            self.spec.rank_refresh_growth,
        ) {
            self.refresh_ranks(&mut memo);
        }
        let board = memo.window.board(
            ranked.iter().map(|&k| self.models[k].0.clone()),
            &self.spec.feature_names,
            Some(nuisance.report.clone()),
            &settings(&self.spec),
        );
        let result = WindowResult {
            key: String::new(),
            window: Window::Cumulative,
            board: Ok(board),
            units: n,
            incomplete,
            reused: false,
        };
        Some((result, memo))
    }

    /// Brings the cumulative window's rank metrics up to all of its units
    /// (see [`GrowingWindow::refresh_ranks`]).
    pub(super) fn refresh_ranks(&self, memo: &mut CumulativeMemo) {
        let CumulativeMemo {
            window,
            units,
            ranked,
            ..
        } = memo;
        window.refresh_ranks(|j| self.gather(ranked[j], units), &settings(&self.spec));
    }

    /// Model k's predictions for `units`.
    pub(super) fn gather(&self, k: usize, units: &[u32]) -> Vec<f64> {
        let e = &self.models[k].1;
        units.iter().map(|&u| e[u as usize]).collect()
    }
}
