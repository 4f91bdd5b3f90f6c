//! The incremental twin of
//! [`score_keeping`](super::scoreboard::score_keeping): a window that only grows,
//! kept as the parts of its scoreboard that new units merge into, so that a
//! window grown by a block costs what the block costs rather than what the
//! window costs.
//!
//! What merges: per-estimator [`ScoreSums`] (Chan et al. merges), the
//! moments of the pseudo-outcomes (the ATE) and of each model's policy
//! gain, and the overlap sums. The constant-effect baseline predicts the
//! window's ATE, which moves as units arrive; its sums are kept as those of
//! three fixed predictions and mapped to the current ATE
//! ([`ConstantBasis`]). The rank and calibration metrics do not merge (a
//! new unit changes the rank weight of every unit below it): they are
//! carried over until [`GrowingWindow::refresh_ranks`] brings them to the
//! whole window, merging each model's kept order with the new units' own.
//! Merged and refreshed, the board equals [`score`](super::score) on the
//! same units up to rounding (a test below checks it).

use rayon::prelude::*;

use super::crossfit::{Nuisance, NuisanceReport};
use super::data::{FeatureRows, UnitTable, CONSTANT_EFFECT, ZERO_EFFECT};
use super::estimators::RANKED_BY;
use super::overlap::OverlapSums;
use super::policy::{uniform_policy_gain, Decisions, PolicySums};
use super::pseudo::aipw_pseudo_outcome;
use super::scoreboard::{
    assemble, column_rank_metrics, column_sums, Column, Parts, RankMetrics, Scoreboard, Scored,
    Settings, UnitColumns,
};
use super::stats::{Estimate, Moments};
use super::sums::ScoreSums;
use super::targeting::{descending_order, merge_orders};

/// The aggregates of the constant-effect baseline, whose prediction (the
/// window's ATE) changes as units join, kept as the aggregates of three
/// fixed predictions 0, s and -s. Every estimator's contribution is a
/// quadratic in the prediction (see
/// [`Estimator`](super::estimators::Estimator)), so by Lagrange
/// interpolation through those nodes, with t = a / s,
/// c(a) = c(0) (1 - t^2) + c(s) t (t + 1) / 2 + c(-s) t (t - 1) / 2
/// for every unit, and a window's means and co-moments for prediction a are
/// a linear map of the three columns' (exact up to rounding). The scale s is
/// fixed when the aggregate starts (near the ATE then) so that t stays near
/// one and the map does not amplify rounding.
#[derive(Debug, Clone, Copy)]
pub struct ConstantBasis {
    pub scale: f64,
}

impl ConstantBasis {
    pub fn new(ate: f64) -> Self {
        Self {
            scale: if ate.abs() > 1e-12 { ate.abs() } else { 1.0 },
        }
    }

    /// The fixed predictions whose columns stand in for constant-effect:
    /// the zero-effect column itself, then s and -s.
    pub fn nodes(&self) -> [f64; 2] {
        [self.scale, -self.scale]
    }

    /// Maps aggregates over the columns [0, s, -s, registered...] to the
    /// scored columns [zero-effect, constant-effect at `ate`, registered...].
    pub fn resolve(&self, sums: &ScoreSums, ate: f64) -> ScoreSums {
        let t = ate / self.scale;
        sums.map_leading(&[
            vec![1.0, 0.0, 0.0],
            vec![1.0 - t * t, t * (t + 1.0) / 2.0, t * (t - 1.0) / 2.0],
        ])
    }
}

/// Per-estimator sums over the columns [0, s, -s, models...] that stand in
/// for the scored columns of a window that will grow (see
/// [`ConstantBasis`]).
fn basis_sums(
    table: &UnitTable,
    values: &Nuisance,
    phi: &[f64],
    basis: ConstantBasis,
    effects: &[Column<'_>],
) -> Vec<ScoreSums> {
    let [up, down] = basis.nodes();
    let mut columns = vec![
        Column::Uniform(0.0),
        Column::Uniform(up),
        Column::Uniform(down),
    ];
    columns.extend_from_slice(effects);
    column_sums(&UnitColumns::new(table, values, phi), &columns, 3)
}

/// A growing window's scoreboard as mergeable parts, over the registered
/// models it was started with (in that order), and its rank metrics as of
/// the last refresh.
#[derive(Clone)]
pub struct GrowingWindow {
    /// The pseudo-outcome of every unit, in the order units joined.
    phi: Vec<f64>,
    /// Moments of `phi`: the ATE and its standard error.
    ate: Moments,
    treated: usize,
    basis: ConstantBasis,
    /// Per estimator, over the columns [0, s, -s, models...] (see
    /// [`ConstantBasis`]).
    sums: Vec<ScoreSums>,
    /// Per registered model.
    policy: Vec<PolicySums>,
    /// Per registered model, its decision for every unit (the policy
    /// comparisons with the front-runner; appended as units join).
    decisions: Decisions,
    overlap: OverlapSums,
    /// The rank metrics were computed on the first `rank_units` units.
    rank_units: usize,
    /// Per scored column (zero-effect, constant-effect, models...).
    rank: Vec<RankMetrics>,
    /// Per registered model, the descending order of the first
    /// `rank_units` units by its prediction.
    orders: Vec<Vec<u32>>,
}

impl GrowingWindow {
    /// Starts from a whole pass over the window's first units: `scored` is
    /// [`score_keeping`](super::scoreboard::score_keeping) of `table`, `nuisance`, `features` and the
    /// registered models' predictions `models` (the baselines excluded).
    /// Returns the pass's board and the window.
    pub fn start(
        scored: Scored,
        table: &UnitTable,
        nuisance: &Nuisance,
        features: FeatureRows<'_>,
        models: &[Column<'_>],
        settings: &Settings,
    ) -> (Scoreboard, Self) {
        let basis = ConstantBasis::new(scored.board.ate.estimate);
        let mut overlap = OverlapSums::new(features.width(), settings.overlap_eps);
        overlap.add(features, table.treatment(), &nuisance.propensity);
        let window = Self {
            treated: table.n_treated(),
            basis,
            sums: basis_sums(table, nuisance, &scored.phi, basis, models),
            policy: scored.policy[2..].to_vec(),
            decisions: scored.decisions,
            ate: Moments::of(&scored.phi),
            rank_units: table.len(),
            rank: scored.rank,
            orders: scored.orders,
            phi: scored.phi,
            overlap,
        };
        (scored.board, window)
    }

    /// Merges units that join the window: `table`, `nuisance` and
    /// `features` are theirs, `models[j]` is registered model j's
    /// predictions for them.
    pub fn add(
        &mut self,
        table: &UnitTable,
        nuisance: &Nuisance,
        features: FeatureRows<'_>,
        models: &[Vec<f64>],
        settings: &Settings,
    ) {
        let phi = aipw_pseudo_outcome(table.outcome(), table.treatment(), nuisance);
        let slices: Vec<Column<'_>> = models.iter().map(|e| Column::Slice(e)).collect();
        let added = basis_sums(table, nuisance, &phi, self.basis, &slices);
        for (total, part) in self.sums.iter_mut().zip(&added) {
            total.merge(part);
        }
        for (p, e) in self.policy.iter_mut().zip(models) {
            p.add(&phi, e, settings.cost);
        }
        self.decisions.extend(models);
        self.ate.merge(&Moments::of(&phi));
        self.phi.extend_from_slice(&phi);
        self.treated += table.n_treated();
        self.overlap
            .add(features, table.treatment(), &nuisance.propensity);
    }

    /// The pseudo-outcome of every unit, in the order units joined: what a
    /// pass over the whole window that does not merge (the error bounds)
    /// reads.
    pub fn phi(&self) -> &[f64] {
        &self.phi
    }

    /// Corrected PEHE of scored column `first` minus that of `second`
    /// (zero-effect, constant-effect, then the registered models in the
    /// order the window was started with), from the ranking estimator's
    /// whole co-moment matrix: any pair, not only those a board keeps, with
    /// the standard error the board's pairs have. A pair of registered
    /// models (or zero-effect) reads its three co-moments as kept; a pair
    /// with constant-effect maps the sums to the current ATE first (see
    /// [`ConstantBasis`]).
    pub fn difference(&self, first: usize, second: usize) -> Estimate {
        let sums = &self.sums[RANKED_BY];
        // Scored column -> column of the kept sums [0, s, -s, models...].
        let kept = |c: usize| match c {
            0 => Some(0),
            1 => None,
            c => Some(c + 1),
        };
        match (kept(first), kept(second)) {
            (Some(a), Some(b)) => sums.difference(a, b),
            _ => self
                .basis
                .resolve(sums, self.ate())
                .difference(first, second),
        }
    }

    /// Policy gain of scored column `first` minus that of `second`
    /// (zero-effect, constant-effect, then the registered models in the
    /// order the window was started with), over every unit of the window:
    /// any pair, as the board's comparisons with the front-runner are.
    pub fn policy_difference(&self, first: usize, second: usize) -> Estimate {
        self.decisions
            .difference(&self.phi, self.ate(), first, second)
    }

    /// The window's ATE (constant-effect's prediction).
    pub fn ate(&self) -> f64 {
        self.ate.estimate().estimate
    }

    /// Units in the window.
    pub fn units(&self) -> usize {
        self.phi.len()
    }

    /// Units the rank metrics cover.
    pub fn rank_units(&self) -> usize {
        self.rank_units
    }

    /// Whether the rank metrics are due for a refresh: `asked`, the window
    /// is below `always_below` units (a refresh there is cheap), or it has
    /// grown by `growth` (a share) since they were last computed.
    pub fn ranks_due(&self, asked: bool, always_below: usize, growth: f64) -> bool {
        let n = self.units();
        let grown = (n - self.rank_units) as f64;
        asked || n < always_below || (grown > 0.0 && grown >= growth * self.rank_units as f64)
    }

    /// Brings the rank metrics up to every unit of the window: each model's
    /// kept order is merged with the new units' own. `predictions(j)` is
    /// registered model j's prediction for every unit, in the order units
    /// joined; models go one per thread, so only those models' predictions
    /// are held at once.
    pub fn refresh_ranks(
        &mut self,
        predictions: impl Fn(usize) -> Vec<f64> + Sync,
        settings: &Settings,
    ) {
        let (n, offset) = (self.phi.len(), self.rank_units);
        let phi = &self.phi;
        let models: Vec<RankMetrics> = self
            .orders
            .par_iter_mut()
            .enumerate()
            .map(|(j, order)| {
                let all = predictions(j);
                if offset < n {
                    let later: Vec<u32> = descending_order(&all[offset..])
                        .into_iter()
                        .map(|i| i + offset as u32)
                        .collect();
                    *order = merge_orders(&all, order, &later);
                }
                column_rank_metrics(phi, &all, order, j + 2, settings)
            })
            .collect();
        // The baselines predict one value for every unit: every unit is
        // tied, in the order units joined.
        let identity: Vec<u32> = (0..n as u32).collect();
        let ate = self.ate.estimate().estimate;
        let mut rank: Vec<RankMetrics> = [0.0, ate]
            .iter()
            .enumerate()
            .map(|(c, &value)| column_rank_metrics(phi, &vec![value; n], &identity, c, settings))
            .collect();
        rank.extend(models);
        self.rank = rank;
        self.rank_units = n;
    }

    /// The window's scoreboard; `models` names the registered models, in
    /// the order the window was started with.
    pub fn board(
        &self,
        models: impl IntoIterator<Item = String>,
        feature_names: &[String],
        nuisance: Option<NuisanceReport>,
        settings: &Settings,
    ) -> Scoreboard {
        let ate = self.ate.estimate();
        let cost = settings.cost;
        let mut policy = vec![
            uniform_policy_gain(ate, 0.0 > cost, cost),
            uniform_policy_gain(ate, ate.estimate > cost, cost),
        ];
        policy.extend(self.policy.iter().map(PolicySums::gain));
        let decisions =
            (self.decisions.units() == self.phi.len()).then_some((&self.decisions, &self.phi[..]));
        let mut names = vec![
            (ZERO_EFFECT.to_string(), true),
            (CONSTANT_EFFECT.to_string(), true),
        ];
        names.extend(models.into_iter().map(|name| (name, false)));
        assemble(
            Parts {
                models: names,
                n_units: self.units(),
                ate,
                n_treated: self.treated,
                sums: self
                    .sums
                    .iter()
                    .map(|s| self.basis.resolve(s, ate.estimate))
                    .collect(),
                policy,
                decisions,
                rank: &self.rank,
                rank_units: self.rank_units,
                overlap: self.overlap.report(feature_names),
                nuisance,
            },
            settings,
        )
    }
}

#[cfg(test)]
mod tests {
    use ndarray::Array2;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    use super::*;
    use crate::estimate::data::{ModelPredictions, OutcomeKind};
    use crate::estimate::scoreboard::{score, score_keeping, ScoredColumn};
    use crate::estimate::stats::standard_normal;

    const D: usize = 3;

    /// Units with known nuisance values, and three models' predictions of
    /// varying quality.
    struct Draw {
        features: Vec<f64>,
        treatment: Vec<f64>,
        outcome: Vec<f64>,
        propensity: Vec<f64>,
        mu0: Vec<f64>,
        mu1: Vec<f64>,
        models: Vec<ModelPredictions>,
    }

    fn draw(n: usize, seed: u64) -> Draw {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut d = Draw {
            features: Vec::with_capacity(n * D),
            treatment: Vec::with_capacity(n),
            outcome: Vec::with_capacity(n),
            propensity: Vec::with_capacity(n),
            mu0: Vec::with_capacity(n),
            mu1: Vec::with_capacity(n),
            models: ["close", "shrunk", "noise"]
                .iter()
                .map(|name| ModelPredictions::new(*name, Vec::with_capacity(n)))
                .collect(),
        };
        for _ in 0..n {
            let x: Vec<f64> = (0..D).map(|_| standard_normal(&mut rng)).collect();
            let e = (1.0 / (1.0 + (-0.8 * x[0]).exp())).clamp(0.1, 0.9);
            let w = f64::from(u8::from(rng.gen::<f64>() < e));
            let tau = 1.0 + x[1];
            let base = x[0] - 0.5 * x[2];
            let y = base + w * tau + standard_normal(&mut rng);
            d.features.extend_from_slice(&x);
            d.treatment.push(w);
            d.outcome.push(y);
            d.propensity.push(e);
            d.mu0.push(base + 0.2 * standard_normal(&mut rng));
            d.mu1.push(base + tau + 0.2 * standard_normal(&mut rng));
            let noise = standard_normal(&mut rng);
            d.models[0].effects.push(tau + 0.3 * noise);
            d.models[1].effects.push(0.5 * tau + 0.2 * noise);
            d.models[2].effects.push(standard_normal(&mut rng));
        }
        d
    }

    /// Units `range` of a draw, as a table and its nuisance values.
    fn part(d: &Draw, range: std::ops::Range<usize>) -> (UnitTable, Nuisance) {
        let table = UnitTable::new(
            Array2::from_shape_vec(
                (range.len(), D),
                d.features[range.start * D..range.end * D].to_vec(),
            )
            .expect("shape"),
            d.treatment[range.clone()].to_vec(),
            d.outcome[range.clone()].to_vec(),
            None,
            OutcomeKind::Continuous,
        )
        .expect("table");
        let (nuisance, _) = Nuisance::from_parts(
            d.propensity[range.clone()].to_vec(),
            d.mu0[range.clone()].to_vec(),
            d.mu1[range].to_vec(),
            0.0,
        );
        (table, nuisance)
    }

    /// Equal to 1e-9 relative (or absolute below 1): the merged sums differ
    /// from a one-pass sum only in the order of additions and in the
    /// constant-effect basis's linear map, both of which move values by a
    /// few units of 1e-16 relative, while any difference of formula would
    /// show near 1e-3. draw_share counts seeded draws, which would differ by
    /// 1/4000 only if a draw sat within rounding of a tie. Everything
    /// that is not a number is equal.
    fn assert_close(a: &serde_json::Value, b: &serde_json::Value, path: &str) {
        crate::estimate::testing::assert_json_close(a, b, 1e-9, path);
    }

    fn json(board: &Scoreboard) -> serde_json::Value {
        serde_json::to_value(board).expect("json")
    }

    /// The board without the rank and calibration metrics.
    fn without_rank_metrics(mut v: serde_json::Value) -> serde_json::Value {
        if let Some(o) = v.as_object_mut() {
            o.remove("rank_metrics_units");
        }
        for m in v["models"].as_array_mut().into_iter().flatten() {
            if let Some(o) = m.as_object_mut() {
                for key in ["autoc", "qini", "blp_slope", "calibration"] {
                    o.remove(key);
                }
            }
        }
        v
    }

    #[test]
    fn a_merged_and_refreshed_window_equals_the_batch_score() {
        let (n, first, second) = (3000, 2000, 2600);
        let d = draw(n, 11);
        let settings = Settings::default();
        let names: Vec<String> = (0..D).map(|j| format!("x{j}")).collect();
        let models: Vec<String> = d.models.iter().map(|m| m.name.clone()).collect();

        let (table, nuisance) = part(&d, 0..first);
        let columns: Vec<Column<'_>> = d
            .models
            .iter()
            .map(|m| Column::Slice(&m.effects[..first]))
            .collect();
        let scored_columns: Vec<ScoredColumn<'_>> = models
            .iter()
            .zip(&columns)
            .map(|(name, &effects)| ScoredColumn {
                name: name.clone(),
                baseline: false,
                effects,
            })
            .collect();
        let scored = score_keeping(
            &table,
            table.rows(),
            &names,
            &nuisance,
            None,
            &scored_columns,
            &settings,
        );
        let (started, mut window) =
            GrowingWindow::start(scored, &table, &nuisance, table.rows(), &columns, &settings);
        assert_close(
            &json(&started),
            &json(&window.board(models.clone(), &names, None, &settings)),
            "started",
        );

        // Two blocks join.
        for range in [first..second, second..n] {
            let (table, nuisance) = part(&d, range.clone());
            let effects: Vec<Vec<f64>> = d
                .models
                .iter()
                .map(|m| m.effects[range.clone()].to_vec())
                .collect();
            window.add(&table, &nuisance, table.rows(), &effects, &settings);
        }
        let (whole, nuisance) = part(&d, 0..n);
        let batch = json(&score(
            &whole, &names, &nuisance, None, &d.models, &settings,
        ));

        // Before a refresh the rank metrics are the first pass's, and the
        // board says so; everything else is the batch figure.
        assert!(!window.ranks_due(false, 0, 0.6));
        let carried = json(&window.board(models.clone(), &names, None, &settings));
        assert_eq!(carried["n_units"], n);
        assert_eq!(carried["rank_metrics_units"], first);
        assert_close(
            &without_rank_metrics(carried),
            &without_rank_metrics(batch.clone()),
            "carried",
        );

        assert!(window.ranks_due(false, 0, 0.5));
        window.refresh_ranks(|j| d.models[j].effects.clone(), &settings);
        assert_eq!(window.rank_units(), n);
        let refreshed = json(&window.board(models, &names, None, &settings));
        assert_close(&refreshed, &batch, "refreshed");
    }
}
