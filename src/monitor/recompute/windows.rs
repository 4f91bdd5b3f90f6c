//! The scoreboard of each window: which models it ranks, the from-scratch
//! pass, and the cumulative window's merge of the units that arrived since
//! the last recompute.

use crate::domain::{IncompleteModel, Window};
use std::collections::HashSet;

use crate::estimate::blend::{
    held_out_blend, report_of_blend, BlendReport, CrossFitBlend, FoldGrams,
};
use crate::estimate::crossfit::Nuisance;
use crate::estimate::data::{UnitTable, CONSTANT_EFFECT, ZERO_EFFECT};
use crate::estimate::incremental::GrowingWindow;
use crate::estimate::level::{level_report_on, LevelReport};
use crate::estimate::scoreboard::{
    score_keeping, Column, Gather, Scoreboard, ScoredColumn, UnitColumns,
};

use super::memo::{CumulativeMemo, WindowBlend};
use super::{settings, NuisanceState, RecomputeInput, WindowResult};

/// Windows below this many units get fresh rank metrics on every
/// recompute, whatever their growth: at 0.6 us per unit a refresh there
/// costs under 30 ms.
pub const RANKS_ALWAYS_FRESH_BELOW: usize = 50_000;

/// The default of `limits.max_blend_models`: a window's blend takes at
/// most this many registered models, the first by rank. Its per-fold sums
/// cost O(k^2) per unit and each of its K + 1 weight fits O(k^2) per step,
/// so a sweep of a thousand models is blended over its leading 50 (far
/// below them, models rarely take weight).
pub const BLEND_MODELS: usize = 50;

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
        let gathers = self.gathers(&ranked, &common);
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
        let mut scored = score_keeping(
            &table,
            self.features(&common),
            &self.spec.feature_names,
            &values,
            Some(nuisance.report.clone()),
            &models,
            &settings(&self.spec),
        );
        let levels = self.levels(
            &common,
            &table,
            &values,
            &scored.phi,
            scored.board.ate.estimate,
            &ranked,
            &columns,
            nuisance,
        );
        scored.board.levels = Some(levels.clone());
        let blend = self.blended(&scored.board, &ranked).map(|chosen| {
            let grams = self.blend_grams(&common, &ranked, &chosen, &scored.phi, nuisance);
            let report = self.blend_report(
                &grams,
                &common,
                &ranked,
                &chosen,
                &scored.board,
                &UnitColumns::new(&table, &values, &scored.phi),
                nuisance,
            );
            WindowBlend {
                models: chosen,
                grams,
                report,
            }
        });
        scored.board.blend = blend.as_ref().and_then(|b| b.report.clone());
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
                levels,
                blend,
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
            let joined = memo.window.units();
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
            if let Some(blend) = memo.blend.as_mut() {
                let columns: Vec<Column<'_>> = blend
                    .models
                    .iter()
                    .map(|&j| Column::Slice(&effects[j]))
                    .collect();
                let phi = &memo.window.phi()[joined..];
                blend
                    .grams
                    .add(&columns, phi, &self.folds_of(&fresh, nuisance));
            }
        }
        let n = memo.units.len();
        let due = memo.window.ranks_due(
            refresh_ranks,
            self.ranks_fresh_below,
            self.spec.rank_refresh_growth,
        );
        if due {
            self.refresh_ranks(&mut memo);
        }
        let mut board = memo.window.board(
            ranked.iter().map(|&k| self.models[k].0.clone()),
            &self.spec.feature_names,
            Some(nuisance.report.clone()),
            &settings(&self.spec),
        );
        if due {
            self.refresh_whole(&mut memo, &board, nuisance);
        }
        board.levels = Some(memo.levels.clone());
        board.blend = memo.blend.as_ref().and_then(|b| b.report.clone());
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

    /// The parts of the cumulative window that need every unit, brought up
    /// to date with its rank metrics (so as of `rank_metrics_units`
    /// between refreshes). The error bounds: the sieve's leave-one-out fit
    /// within each fold does not merge (every unit of a fold moves every
    /// other's fit), so it is recomputed whole. The blend: its per-fold
    /// sums were merged as units arrived (rebuilt only when the ranking
    /// changed the models it takes); its weights are fitted from them, and
    /// its held-out error and intervals read each unit once, for the
    /// models some fold weighs.
    fn refresh_whole(
        &self,
        memo: &mut CumulativeMemo,
        board: &Scoreboard,
        nuisance: &NuisanceState,
    ) {
        let units: Vec<usize> = memo.units.iter().map(|&u| u as usize).collect();
        let Ok(table) = self.table(&units, false) else {
            return;
        };
        let values = self.nuisance_values(&units, nuisance);
        let gathers = self.gathers(&memo.ranked, &units);
        let columns: Vec<Column<'_>> = gathers.iter().map(|g| Column::Gathered(g)).collect();
        memo.levels = self.levels(
            &units,
            &table,
            &values,
            memo.window.phi(),
            memo.window.ate(),
            &memo.ranked,
            &columns,
            nuisance,
        );
        let phi = memo.window.phi();
        memo.blend = self.blended(board, &memo.ranked).map(|chosen| {
            let grams = match memo.blend.take() {
                Some(kept) if kept.models == chosen => kept.grams,
                _ => self.blend_grams(&units, &memo.ranked, &chosen, phi, nuisance),
            };
            let report = self.blend_report(
                &grams,
                &units,
                &memo.ranked,
                &chosen,
                board,
                &UnitColumns::new(&table, &values, phi),
                nuisance,
            );
            WindowBlend {
                models: chosen,
                grams,
                report,
            }
        });
    }

    /// Each unit's cross-fit fold (see [`NuisanceState::fold_of`]).
    fn folds_of(&self, units: &[usize], nuisance: &NuisanceState) -> Vec<usize> {
        let folds = self.spec.folds as usize;
        units.iter().map(|&u| nuisance.fold_of(u, folds)).collect()
    }

    /// The positions in `ranked` of the models a blend takes: the
    /// registered models among `board`'s first `blend_models` by rank,
    /// in `ranked`'s order (registration order, as `plumbline score`
    /// blends them). None with fewer than two.
    fn blended(&self, board: &Scoreboard, ranked: &[usize]) -> Option<Vec<usize>> {
        let top: HashSet<&str> = board
            .models
            .iter()
            .filter(|m| !m.baseline)
            .take(self.blend_models)
            .map(|m| m.name.as_str())
            .collect();
        let chosen: Vec<usize> = ranked
            .iter()
            .enumerate()
            .filter(|(_, &k)| top.contains(self.models[k].0.as_str()))
            .map(|(j, _)| j)
            .collect();
        (chosen.len() >= 2).then_some(chosen)
    }

    /// The blend's per-fold sums over `units`, for the `chosen` positions
    /// of `ranked`.
    fn blend_grams(
        &self,
        units: &[usize],
        ranked: &[usize],
        chosen: &[usize],
        phi: &[f64],
        nuisance: &NuisanceState,
    ) -> FoldGrams {
        let picked: Vec<usize> = chosen.iter().map(|&j| ranked[j]).collect();
        let gathers = self.gathers(&picked, units);
        let columns: Vec<Column<'_>> = gathers.iter().map(|g| Column::Gathered(g)).collect();
        FoldGrams::of_columns(
            &columns,
            phi,
            &self.folds_of(units, nuisance),
            self.spec.folds as usize,
        )
    }

    /// The blend's report from its sums: the weights, then one pass over
    /// `units` (whose per-unit values are `columns`) reading the models
    /// some fold weighs and the best single model of `board`.
    #[allow(clippy::too_many_arguments)]
    fn blend_report(
        &self,
        grams: &FoldGrams,
        units: &[usize],
        ranked: &[usize],
        chosen: &[usize],
        board: &Scoreboard,
        columns: &UnitColumns<'_>,
        nuisance: &NuisanceState,
    ) -> Option<BlendReport> {
        let picked: Vec<usize> = chosen.iter().map(|&j| ranked[j]).collect();
        let best_model = board.models.iter().find(|m| !m.baseline)?.name.clone();
        let best = picked
            .iter()
            .position(|&k| self.models[k].0 == best_model)?;
        // Weights fitted without a fold need units outside it: a window
        // (a small cohort) held in one fold gets no blend.
        if grams.fold_units().iter().filter(|&&u| u > 0).count() < 2 {
            return None;
        }
        let (weights, fold_weights) = grams.solve();
        let predictions: Vec<Vec<f64>> = picked
            .iter()
            .enumerate()
            .map(|(j, &k)| {
                if j == best || fold_weights.iter().any(|w| w.weights[j] > 0.0) {
                    units.iter().map(|&u| self.models[k].1[u]).collect()
                } else {
                    Vec::new()
                }
            })
            .collect();
        let slices: Vec<&[f64]> = predictions.iter().map(Vec::as_slice).collect();
        let folds = self.folds_of(units, nuisance);
        let blend = CrossFitBlend {
            held_out: held_out_blend(&slices, &folds, &fold_weights),
            weights,
            fold_weights,
            fold_units: grams.fold_units(),
        };
        let names: Vec<String> = picked.iter().map(|&k| self.models[k].0.clone()).collect();
        Some(report_of_blend(
            &names,
            &blend,
            best_model,
            &predictions[best],
            columns,
            board.ate.estimate,
        ))
    }

    /// Each of the `ranked` models' predictions for `units`, read where the
    /// cache keeps them, a block at a time.
    fn gathers<'a>(&'a self, ranked: &[usize], units: &'a [usize]) -> Vec<Box<Gather<'a>>> {
        ranked
            .iter()
            .map(|&k| {
                let effects = &self.models[k].1;
                Box::new(move |start: usize, out: &mut [f64]| {
                    for (o, &u) in out.iter_mut().zip(&units[start..]) {
                        *o = effects[u];
                    }
                }) as Box<Gather<'a>>
            })
            .collect()
    }

    /// The lower bounds on each model's error over `units` (see
    /// [`level`](crate::estimate::level)): the baselines (constant-effect
    /// at the window's `ate`) and the `ranked` models, whose predictions
    /// are `columns`, on each unit's cross-fit fold.
    #[allow(clippy::too_many_arguments)]
    fn levels(
        &self,
        units: &[usize],
        table: &UnitTable,
        values: &Nuisance,
        phi: &[f64],
        ate: f64,
        ranked: &[usize],
        columns: &[Column<'_>],
        nuisance: &NuisanceState,
    ) -> LevelReport {
        let folds = self.spec.folds as usize;
        let fold_of_unit = self.folds_of(units, nuisance);
        let mut named: Vec<(&str, Column<'_>)> = vec![
            (ZERO_EFFECT, Column::Uniform(0.0)),
            (CONSTANT_EFFECT, Column::Uniform(ate)),
        ];
        named.extend(
            ranked
                .iter()
                .zip(columns)
                .map(|(&k, &c)| (self.models[k].0.as_str(), c)),
        );
        level_report_on(
            self.features(units),
            table,
            values,
            phi,
            &fold_of_unit,
            folds,
            &named,
        )
    }

    /// Model k's predictions for `units`.
    pub(super) fn gather(&self, k: usize, units: &[u32]) -> Vec<f64> {
        let e = &self.models[k].1;
        units.iter().map(|&u| e[u as usize]).collect()
    }
}
