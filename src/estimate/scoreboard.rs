//! The whole estimation pass: nuisance fits, pseudo-outcomes, every
//! estimator for every model, comparisons, targeting, calibration and the
//! overlap report, gathered into one serializable [`Scoreboard`].

use rayon::prelude::*;
use serde::Serialize;

use super::blend::{blend_report, BlendReport};
use super::calibration::{calibration_ranked, Calibration};
use super::compare::{rank, Difference, RankSettings};
use super::crossfit::{assign_folds, fit_nuisance, Nuisance, NuisanceReport, NuisanceSettings};
use super::data::{FeatureRows, ModelPredictions, UnitTable, CONSTANT_EFFECT, ZERO_EFFECT};
use super::error::EstimateError;
use super::estimators::{self, Scores, UnitView};
use super::level::{level_report, LevelReport};
use super::overlap::{overlap_report, OverlapReport};
use super::policy::{Decisions, PolicyGain, PolicySums};
use super::pseudo::{aipw_ate, aipw_pseudo_outcome};
use super::stats::{holm_reject, normal_quantile, p_greater, Estimate};
use super::sums::ScoreSums;
use super::targeting::{descending_order, targeting_ranked, Ranked, Targeting};

/// Everything that shapes a scoring pass besides the data.
#[derive(Debug)]
pub struct Settings {
    pub nuisance: NuisanceSettings,
    /// Cost of treating one unit, in outcome units; a policy treats when the
    /// predicted effect exceeds it.
    pub cost: f64,
    /// Family-wise level of the best set and the heterogeneity test.
    pub alpha: f64,
    /// Overlap report threshold: share of propensities outside [eps, 1-eps].
    pub overlap_eps: f64,
    /// 0 (the default): AUTOC and Qini standard errors by the infinitesimal
    /// jackknife, one O(n) pass per model; otherwise the number of
    /// nonparametric bootstrap replicates (see `targeting`).
    pub bootstrap_replicates: usize,
    /// Normal draws behind draw_share, the chances and the joint critical
    /// values.
    pub draw_share_draws: usize,
    /// Pairwise differences are reported among this many top-ranked
    /// models (and the front-runner against every other): a sweep of a thousand
    /// models would otherwise carry half a million pairs.
    pub pairwise_top: usize,
}

impl Default for Settings {
    fn default() -> Self {
        Self {
            nuisance: NuisanceSettings::default(),
            cost: 0.0,
            alpha: 0.05,
            overlap_eps: 0.05,
            bootstrap_replicates: 0,
            draw_share_draws: 4000,
            pairwise_top: 20,
        }
    }
}

impl Settings {
    pub fn check(&self) -> Result<(), EstimateError> {
        self.nuisance.check()?;
        if !(self.alpha > 0.0 && self.alpha < 1.0) {
            return Err(EstimateError::invalid(format!(
                "alpha must lie in (0, 1) (got {})",
                self.alpha
            )));
        }
        if !self.cost.is_finite() {
            return Err(EstimateError::invalid("cost must be finite"));
        }
        if !(self.overlap_eps > 0.0 && self.overlap_eps < 0.5) {
            return Err(EstimateError::invalid(format!(
                "overlap eps must lie in (0, 0.5) (got {})",
                self.overlap_eps
            )));
        }
        Ok(())
    }
}

/// Receives the name of each stage as it starts, for progress display.
pub trait Progress: Sync {
    fn stage(&self, name: &str);
}

/// Progress that goes nowhere.
pub struct Silent;

impl Progress for Silent {
    fn stage(&self, _name: &str) {}
}

/// Confidence level of the reported intervals.
pub const CI_LEVEL: f64 = 0.95;

/// How to read the absolute corrected PEHE; carried in every scoreboard.
pub const CORRECTED_PEHE_CAVEAT: &str = "corrected PEHE is a lower estimate: its mean is below \
the true PEHE by the plug-in effect model's own error E[(tau - tau_tilde)^2]. Differences \
between models (vs_constant, pairwise) are the doubly robust numbers; rank on those.";

#[derive(Debug, Clone, Serialize)]
pub struct VsConstant {
    pub estimate: f64,
    pub se: f64,
    pub ci_low: f64,
    pub ci_high: f64,
    /// One-sided p-value for "this model has no lower error than constant-effect".
    pub p_value: f64,
    /// The interval at the same level holding jointly for every model's
    /// difference from constant-effect (max-t over the board's columns):
    /// the one to read when scanning a sweep for models that beat it.
    pub joint_low: f64,
    pub joint_high: f64,
}

/// The front-runner's difference from constant-effect with an interval that
/// accounts for its having been picked as the lowest of every column on
/// the same data (hybrid inference on winners, Andrews, Kitagawa &
/// McCloskey 2024; see `estimate::selection`). Among many models of equal
/// error the front-runner's own `vs_constant` interval sits too low; this one
/// does not.
#[derive(Debug, Clone, Serialize)]
pub struct SelectionAdjusted {
    pub estimate: f64,
    pub ci_low: f64,
    pub ci_high: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct ModelScore {
    pub name: String,
    /// True for the built-in zero-effect and constant-effect models.
    pub baseline: bool,
    pub rank: usize,
    /// Every estimator's score, one field each in JSON. Corrected PEHE, the
    /// first, is a lower estimate of PEHE: see `caveat`.
    #[serde(flatten)]
    pub scores: Scores,
    /// corrected PEHE of this model minus that of constant-effect (negative:
    /// lower error than treating everyone alike).
    pub vs_constant: VsConstant,
    /// Share of draws around the estimates in which the model is lowest;
    /// overstates the front-runner when models tie (see `chance_lowest`).
    pub draw_share: f64,
    /// Empirical-Bayes chance that the model has the lowest true error:
    /// near 1/m when the models tie.
    pub chance_lowest: f64,
    pub in_best_set: bool,
    pub policy_gain: PolicyGain,
    /// This model's policy gain minus the front-runner's (above 0: its
    /// targeting is worth more per unit), with a pointwise interval and a
    /// joint one over the board's comparisons with the front-runner
    /// (Bonferroni); None on the front-runner's own row and where a pass
    /// keeps no decisions.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub policy_vs_front_runner: Option<Difference>,
    pub autoc: Estimate,
    pub qini: Estimate,
    /// BLP slope; null when the predictions do not vary.
    pub blp_slope: Option<Estimate>,
    pub calibration: Calibration,
}

#[derive(Debug, Clone, Serialize)]
pub struct PairwiseDifference {
    pub first: String,
    pub second: String,
    /// corrected PEHE of `first` minus that of `second`.
    #[serde(flatten)]
    pub difference: Difference,
}

#[derive(Debug, Clone, Serialize)]
pub struct AteSummary {
    pub estimate: f64,
    pub se: f64,
    pub ci_low: f64,
    pub ci_high: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct Scoreboard {
    pub n_units: usize,
    pub n_treated: usize,
    pub n_control: usize,
    pub ate: AteSummary,
    pub front_runner: String,
    /// The front-runner's difference from constant-effect, selection-adjusted.
    pub front_runner_vs_constant: SelectionAdjusted,
    /// Max-t critical value behind every model's `vs_constant.joint_*`.
    pub joint_critical_value: f64,
    pub best_set: Vec<String>,
    /// True when models are registered and none beats constant-effect
    /// significantly (Holm); false with no registered model.
    pub no_detectable_heterogeneity: bool,
    pub alpha: f64,
    pub cost: f64,
    pub models: Vec<ModelScore>,
    /// Units the rank and calibration metrics (autoc, qini, blp_slope,
    /// calibration) were computed on: `n_units`, except in a growing window
    /// whose ranks are refreshed when it has grown by a set share, where
    /// it can be fewer (see [`RankMetrics`]).
    pub rank_metrics_units: usize,
    /// Every pair among the `pairwise_top` top-ranked models, then the
    /// front-runner against each model below them, by rank.
    pub pairwise: Vec<PairwiseDifference>,
    pub overlap: OverlapReport,
    pub nuisance: Option<NuisanceReport>,
    pub caveat: &'static str,
    /// One-sided 95% lower bounds on each model's PEHE and RMSE that hold
    /// whatever the nuisance models' quality (up to the product-of-errors
    /// term), where the corrected PEHE alone is only a lower estimate (see
    /// [`level`](super::level)). Filled by [`evaluate`], which knows the
    /// cross-fit's folds; None from the other paths.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub levels: Option<LevelReport>,
    /// The cross-fitted convex blend of the registered models and its
    /// held-out error (see [`blend`](super::blend)): filled by [`evaluate`]
    /// when at least two models are registered, None elsewhere.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub blend: Option<BlendReport>,
}

/// Fits the nuisance components by cross-fitting, then scores, then blends
/// the registered models.
pub fn evaluate(
    table: &UnitTable,
    feature_names: &[String],
    models: &[ModelPredictions],
    settings: &Settings,
    progress: &dyn Progress,
) -> Result<Scoreboard, EstimateError> {
    settings.check()?;
    check_predictions(table, models)?;
    progress.stage("fitting nuisance models");
    let (nuisance, report) = fit_nuisance(table, &settings.nuisance)?;
    progress.stage("scoring models");
    let mut board = score(
        table,
        feature_names,
        &nuisance,
        Some(report),
        models,
        settings,
    );
    progress.stage("blending models");
    board.blend = blend_report(table, &nuisance, models, settings, &board);
    progress.stage("bounding each model's error");
    board.levels = Some(levels(
        table,
        &nuisance,
        models,
        board.ate.estimate,
        settings,
    ));
    Ok(board)
}

/// The [`LevelReport`] of the baselines (constant-effect predicting `ate`)
/// and `models`, on the cross-fit's own folds: [`assign_folds`] with the
/// nuisance settings draws them again exactly (a capped fit keeps them).
fn levels(
    table: &UnitTable,
    nuisance: &Nuisance,
    models: &[ModelPredictions],
    ate: f64,
    settings: &Settings,
) -> LevelReport {
    let folds = settings.nuisance.folds;
    let fold_of_unit = assign_folds(table.treatment(), folds, settings.nuisance.seed);
    let phi = aipw_pseudo_outcome(table.outcome(), table.treatment(), nuisance);
    let mut columns = vec![
        (ZERO_EFFECT, Column::Uniform(0.0)),
        (CONSTANT_EFFECT, Column::Uniform(ate)),
    ];
    columns.extend(
        models
            .iter()
            .map(|m| (m.name.as_str(), Column::Slice(&m.effects))),
    );
    level_report(table, nuisance, &phi, &fold_of_unit, folds, &columns)
}

/// A registered model may not take a built-in baseline's name: the board
/// would list two models under one name.
pub(crate) fn check_model_name(name: &str) -> Result<(), EstimateError> {
    if name == ZERO_EFFECT || name == CONSTANT_EFFECT {
        return Err(EstimateError::invalid(format!(
            "model name {name:?} is reserved for a built-in baseline"
        )));
    }
    Ok(())
}

fn check_predictions(table: &UnitTable, models: &[ModelPredictions]) -> Result<(), EstimateError> {
    for m in models {
        check_model_name(&m.name)?;
        if m.effects.len() != table.len() {
            return Err(EstimateError::invalid(format!(
                "model {}: {} predictions for {} units",
                m.name,
                m.effects.len(),
                table.len()
            )));
        }
        if let Some(row) = m.effects.iter().position(|v| !v.is_finite()) {
            return Err(EstimateError::invalid(format!(
                "model {}: prediction for row {row} is not finite",
                m.name
            )));
        }
    }
    Ok(())
}

/// Units per block of the contribution pass: a block's contributions for
/// every model (m x 256 values) stay in cache while they are aggregated.
const BLOCK: usize = 256;
/// Units per parallel task. Fixed, and the partial aggregates are merged in
/// order, so results do not depend on the number of threads.
const CHUNK: usize = 1 << 15;

/// The per-unit values every estimator reads, aligned by unit.
#[derive(Debug, Clone, Copy)]
pub struct UnitColumns<'a> {
    pub outcome: &'a [f64],
    pub treatment: &'a [f64],
    /// Clipped propensity.
    pub propensity: &'a [f64],
    pub mu0: &'a [f64],
    pub mu1: &'a [f64],
    /// AIPW pseudo-outcome.
    pub phi: &'a [f64],
}

impl<'a> UnitColumns<'a> {
    /// The columns of `table`'s units with their nuisance values and
    /// pseudo-outcomes `phi`.
    pub fn new(table: &'a UnitTable, nuisance: &'a Nuisance, phi: &'a [f64]) -> Self {
        Self {
            outcome: table.outcome(),
            treatment: table.treatment(),
            propensity: &nuisance.propensity,
            mu0: &nuisance.mu0,
            mu1: &nuisance.mu1,
            phi,
        }
    }
}

impl UnitColumns<'_> {
    pub fn len(&self) -> usize {
        self.phi.len()
    }

    pub fn is_empty(&self) -> bool {
        self.phi.is_empty()
    }

    pub(crate) fn view(&self, i: usize) -> UnitView {
        UnitView {
            outcome: self.outcome[i],
            treatment: self.treatment[i],
            propensity: self.propensity[i],
            mu0: self.mu0[i],
            mu1: self.mu1[i],
            phi: self.phi[i],
        }
    }
}

/// Fills `out` with a column's predictions for the units `start..` of a
/// pass (as many as `out` holds).
pub type Gather<'a> = dyn Fn(usize, &mut [f64]) + Sync + 'a;

/// One scored column's predictions, read a block at a time so that a pass
/// need not hold every model's predictions at once: a slice, one value for
/// every unit (the baselines), or values gathered on demand from wherever
/// the caller keeps them.
#[derive(Clone, Copy)]
pub enum Column<'a> {
    Slice(&'a [f64]),
    Uniform(f64),
    Gathered(&'a Gather<'a>),
}

impl Column<'_> {
    /// The predictions of units `start..start + out.len()`.
    pub fn fill(&self, start: usize, out: &mut [f64]) {
        match self {
            Column::Slice(values) => out.copy_from_slice(&values[start..start + out.len()]),
            Column::Uniform(value) => out.fill(*value),
            Column::Gathered(gather) => gather(start, out),
        }
    }

    /// The predictions of the first `n` units.
    pub fn collect(&self, n: usize) -> Vec<f64> {
        let mut out = vec![0.0; n];
        self.fill(0, &mut out);
        out
    }
}

/// The scoring pass proper: every estimator's contribution for every unit
/// and model (`effects[k]` is model k's prediction per unit), gathered into
/// one mergeable [`ScoreSums`] per estimator of [`estimators::ALL`]. Units
/// go in blocks of [`BLOCK`] (one dynamic estimator call per block and
/// model, the co-moments as vectorized dot products) and chunks of
/// [`CHUNK`] in parallel.
pub fn contribution_sums(units: &UnitColumns<'_>, effects: &[&[f64]]) -> Vec<ScoreSums> {
    let columns: Vec<Column<'_>> = effects.iter().map(|e| Column::Slice(e)).collect();
    column_sums(units, &columns, columns.len())
}

/// The aggregates a pass starts from: the ranking estimator's keeps every
/// co-moment (pairwise differences, the joint intervals); the others keep
/// those with the first `lead` columns (the baselines), enough for their
/// scores and their differences from the baselines, at n m rather than
/// n m^2.
fn empty_sums(m: usize, lead: usize) -> Vec<ScoreSums> {
    (0..estimators::ALL.len())
        .map(|e| {
            if e == estimators::RANKED_BY {
                ScoreSums::new(m)
            } else {
                ScoreSums::with_lead(m, lead)
            }
        })
        .collect()
}

/// [`contribution_sums`] over columns read a block at a time, the
/// estimators other than the ranking one keeping the co-moments with the
/// first `lead` columns only (see [`ScoreSums::with_lead`]).
pub fn column_sums(units: &UnitColumns<'_>, effects: &[Column<'_>], lead: usize) -> Vec<ScoreSums> {
    let n = units.len();
    let m = effects.len();
    let chunks: Vec<(usize, usize)> = (0..n)
        .step_by(CHUNK)
        .map(|s| (s, (s + CHUNK).min(n)))
        .collect();
    let parts: Vec<Vec<ScoreSums>> = chunks
        .par_iter()
        .map(|&(start, end)| chunk_sums(units, effects, start, end, lead))
        .collect();
    let mut total = empty_sums(m, lead);
    for part in &parts {
        for (t, p) in total.iter_mut().zip(part) {
            t.merge(p);
        }
    }
    total
}

fn chunk_sums(
    units: &UnitColumns<'_>,
    effects: &[Column<'_>],
    start: usize,
    end: usize,
    lead: usize,
) -> Vec<ScoreSums> {
    let m = effects.len();
    let mut sums = empty_sums(m, lead);
    let mut views: Vec<UnitView> = Vec::with_capacity(BLOCK);
    let mut columns = vec![0.0; m * BLOCK];
    let mut predictions = vec![0.0; m * BLOCK];
    let mut block_start = start;
    while block_start < end {
        let block_end = (block_start + BLOCK).min(end);
        let len = block_end - block_start;
        views.clear();
        views.extend((block_start..block_end).map(|i| units.view(i)));
        let columns = &mut columns[..m * len];
        let predictions = &mut predictions[..m * len];
        for (block, effect) in predictions.chunks_exact_mut(len).zip(effects) {
            effect.fill(block_start, block);
        }
        for (e, s) in estimators::ALL.iter().zip(sums.iter_mut()) {
            for (column, tau_hat) in columns
                .chunks_exact_mut(len)
                .zip(predictions.chunks_exact(len))
            {
                e.contributions(&views, tau_hat, column);
            }
            s.push_block(columns, len);
        }
        block_start = block_end;
    }
    sums
}

/// One column's metrics that depend on the whole window's predictions at
/// once: the targeting areas (ranks) and the calibration (the BLP's
/// centering and the quintile groups). Unlike the estimators' sums they do
/// not merge, so a growing window may carry them over from an earlier pass
/// and say over how many units ([`Scoreboard::rank_metrics_units`]).
#[derive(Debug, Clone)]
pub struct RankMetrics {
    pub targeting: Targeting,
    pub calibration: Calibration,
}

/// [`RankMetrics`] of column `column` (its index seeds the bootstrap, when
/// one is asked for), from its [`descending_order`].
pub fn column_rank_metrics(
    phi: &[f64],
    tau_hat: &[f64],
    order: &[u32],
    column: usize,
    settings: &Settings,
) -> RankMetrics {
    let ranked = Ranked::new(phi, tau_hat, order);
    RankMetrics {
        targeting: targeting_ranked(
            &ranked,
            order,
            settings.bootstrap_replicates,
            settings.nuisance.seed.wrapping_add(column as u64),
        ),
        calibration: calibration_ranked(phi, tau_hat, &ranked),
    }
}

/// Everything [`assemble`] turns into a scoreboard; each piece may come from
/// a fresh pass over the units or from aggregates kept between passes.
pub struct Parts<'a> {
    /// Name and baseline flag per scored column: zero-effect, constant-effect,
    /// then the registered models.
    pub models: Vec<(String, bool)>,
    pub n_units: usize,
    pub ate: Estimate,
    pub n_treated: usize,
    /// One per estimator of [`estimators::ALL`], over the same columns.
    pub sums: Vec<ScoreSums>,
    /// Per column.
    pub policy: Vec<PolicyGain>,
    /// The registered models' decisions and the pseudo-outcomes of the same
    /// units, for the policy comparisons with the front-runner.
    pub decisions: Option<(&'a Decisions, &'a [f64])>,
    /// Per column, computed on the first `rank_units` units.
    pub rank: &'a [RankMetrics],
    pub rank_units: usize,
    pub overlap: OverlapReport,
    pub nuisance: Option<NuisanceReport>,
}

/// Scores every model against given nuisance values. The built-in baselines
/// are added first; `models` must not use their names.
pub fn score(
    table: &UnitTable,
    feature_names: &[String],
    nuisance: &Nuisance,
    nuisance_report: Option<NuisanceReport>,
    models: &[ModelPredictions],
    settings: &Settings,
) -> Scoreboard {
    let columns: Vec<ScoredColumn<'_>> = models
        .iter()
        .map(|m| ScoredColumn {
            name: m.name.clone(),
            baseline: m.baseline,
            effects: Column::Slice(&m.effects),
        })
        .collect();
    score_keeping(
        table,
        table.rows(),
        feature_names,
        nuisance,
        nuisance_report,
        &columns,
        settings,
    )
    .board
}

/// A model to score: its name, whether it is a built-in baseline, and its
/// predictions for the pass's units.
pub struct ScoredColumn<'a> {
    pub name: String,
    pub baseline: bool,
    pub effects: Column<'a>,
}

/// A scoreboard with the per-unit values a later pass over more units can
/// build on.
pub struct Scored {
    pub board: Scoreboard,
    pub phi: Vec<f64>,
    /// [`descending_order`] of each registered model, in `models` order.
    pub orders: Vec<Vec<u32>>,
    /// Per column (zero-effect, constant-effect, then `models`).
    pub rank: Vec<RankMetrics>,
    /// Per column, as for `rank`.
    pub policy: Vec<PolicySums>,
    /// The registered models' decisions, in `models` order.
    pub decisions: Decisions,
}

/// [`score`], keeping the pseudo-outcomes, the models' orders, rank
/// metrics and policy sums; the features (read only for the overlap
/// report) are `features`, one row per unit of `table`, wherever they are
/// stored. The models' predictions are read a block at a time for the
/// estimators' sums, then one model per thread for everything that needs
/// a whole column (order, rank metrics, policy), so a pass holds at most a
/// thread's worth of full columns beyond the orders it keeps.
pub fn score_keeping(
    table: &UnitTable,
    features: FeatureRows<'_>,
    feature_names: &[String],
    nuisance: &Nuisance,
    nuisance_report: Option<NuisanceReport>,
    models: &[ScoredColumn<'_>],
    settings: &Settings,
) -> Scored {
    let (y, w) = (table.outcome(), table.treatment());
    let phi = aipw_pseudo_outcome(y, w, nuisance);
    let units = UnitColumns::new(table, nuisance, &phi);
    let (board, orders, rank, policy, decisions) = score_pass(
        Pass {
            units,
            binary_units: None,
            n_treated: table.n_treated(),
            cost: settings.cost,
            overlap: overlap_report(
                features,
                feature_names,
                w,
                &nuisance.propensity,
                settings.overlap_eps,
            ),
            nuisance: nuisance_report,
        },
        models,
        settings,
    );
    Scored {
        board,
        phi,
        orders,
        rank,
        policy,
        decisions,
    }
}

/// The units of one scoring pass and what the board reports beside the
/// models. The binary pass and each contrast of a dataset with several
/// arms ([`crate::estimate::arms`]) are both one of these, so both run the
/// same code.
pub struct Pass<'a> {
    /// Every unit, with its pseudo-outcome: the estimators that read only
    /// the pseudo-outcome and the outcome models run on these.
    pub units: UnitColumns<'a>,
    /// Where the treatment of `units` is not binary (a contrast of several
    /// arms), the units of the contrast's two arms, whose treatment and
    /// (conditional) propensity are: the estimators that need a binary
    /// treatment ([`estimators::Estimator::needs_binary_treatment`]) run
    /// on these instead. None: they run on `units`.
    pub binary_units: Option<BinaryUnits<'a>>,
    pub n_treated: usize,
    /// Cost of treating one unit, for the policy gains.
    pub cost: f64,
    pub overlap: OverlapReport,
    pub nuisance: Option<NuisanceReport>,
}

/// A subset of a pass's units with a binary treatment: their columns and
/// their positions among the pass's units.
pub struct BinaryUnits<'a> {
    pub units: UnitColumns<'a>,
    pub index: &'a [usize],
}

/// A pass's board, the registered models' orders, the rank metrics and
/// policy sums per column, and the registered models' decisions.
type PassResult = (
    Scoreboard,
    Vec<Vec<u32>>,
    Vec<RankMetrics>,
    Vec<PolicySums>,
    Decisions,
);

/// Scores every model of `models` (after the two baselines) on a pass's
/// units.
pub fn score_pass(pass: Pass<'_>, models: &[ScoredColumn<'_>], settings: &Settings) -> PassResult {
    let units = &pass.units;
    let n = units.len();
    let phi = units.phi;
    let ate = aipw_ate(phi);
    let mut columns = vec![Column::Uniform(0.0), Column::Uniform(ate.estimate)];
    columns.extend(models.iter().map(|m| m.effects));
    // The baselines, zero-effect and constant-effect, lead.
    let mut sums = column_sums(units, &columns, 2);
    if let Some(binary) = &pass.binary_units {
        let picked: Vec<Vec<f64>> = columns[2..]
            .iter()
            .map(|c| {
                let all = c.collect(n);
                binary.index.iter().map(|&i| all[i]).collect()
            })
            .collect();
        let mut binary_columns = columns[..2].to_vec();
        binary_columns.extend(picked.iter().map(|v| Column::Slice(v)));
        let binary_sums = column_sums(&binary.units, &binary_columns, 2);
        for ((e, s), b) in estimators::ALL.iter().zip(sums.iter_mut()).zip(binary_sums) {
            if e.needs_binary_treatment() {
                *s = b;
            }
        }
    }
    type Whole = (
        Vec<Vec<u32>>,
        (Vec<RankMetrics>, Vec<(PolicySums, Decisions)>),
    );
    let (mut orders, (rank, policy)): Whole = columns
        .par_iter()
        .enumerate()
        .map(|(k, column)| {
            let tau = column.collect(n);
            let order = descending_order(&tau);
            let rank = column_rank_metrics(phi, &tau, &order, k, settings);
            let mut policy = PolicySums::default();
            policy.add(phi, &tau, pass.cost);
            // One model's bits, joined with the others' below.
            let mut decided = Decisions::new(usize::from(k >= 2), pass.cost);
            if k >= 2 {
                decided.extend(&[&tau]);
            }
            (order, (rank, (policy, decided)))
        })
        .unzip();
    orders.drain(..2);
    let (policy, decided): (Vec<PolicySums>, Vec<Decisions>) = policy.into_iter().unzip();
    let decisions = Decisions::join(n, pass.cost, decided);
    let mut names = vec![
        (ZERO_EFFECT.to_string(), true),
        (CONSTANT_EFFECT.to_string(), true),
    ];
    names.extend(models.iter().map(|m| (m.name.clone(), m.baseline)));
    let mut board = assemble(
        Parts {
            models: names,
            n_units: n,
            ate,
            n_treated: pass.n_treated,
            sums,
            policy: policy.iter().map(PolicySums::gain).collect(),
            decisions: Some((&decisions, phi)),
            rank: &rank,
            rank_units: n,
            overlap: pass.overlap,
            nuisance: pass.nuisance,
        },
        settings,
    );
    board.cost = pass.cost;
    (board, orders, rank, policy, decisions)
}

/// Each of `m` scored columns' policy gain minus the front-runner's, with
/// a joint interval over the m - 1 comparisons (Bonferroni: their
/// correlations would cost a pass per pair); None for the front-runner
/// and for every column without decisions.
fn policy_vs_front_runner(
    decisions: Option<(&Decisions, &[f64])>,
    front_runner: usize,
    m: usize,
    ate: f64,
) -> Vec<Option<Difference>> {
    let Some((decisions, phi)) = decisions else {
        return vec![None; m];
    };
    let family = m.saturating_sub(1).max(1) as f64;
    let critical = normal_quantile(1.0 - (1.0 - CI_LEVEL) / (2.0 * family));
    (0..m)
        .map(|k| {
            (k != front_runner).then(|| {
                let e = decisions.difference(phi, ate, k, front_runner);
                Difference::from_estimate(e, CI_LEVEL).with_joint(critical)
            })
        })
        .collect()
}

/// Ranks, compares and summarizes the models from a pass's parts.
pub fn assemble(parts: Parts<'_>, settings: &Settings) -> Scoreboard {
    let Parts {
        models: all,
        n_units: n,
        ate,
        n_treated,
        sums,
        policy,
        decisions,
        rank: rank_metrics,
        rank_units,
        overlap,
        nuisance: nuisance_report,
    } = parts;
    let constant = 1;
    let m = all.len();
    let corrected = &sums[estimators::RANKED_BY];
    let ranking = rank(
        corrected,
        constant,
        &RankSettings {
            alpha: settings.alpha,
            level: CI_LEVEL,
            draws: settings.draw_share_draws,
            seed: settings.nuisance.seed,
            pairwise_top: settings.pairwise_top,
            first_candidate: 2,
        },
    );
    let joint = ranking.joint_critical;
    let policy_vs = policy_vs_front_runner(decisions, ranking.front_runner, m, ate.estimate);

    let registered: Vec<usize> = (2..m).collect();
    let p_beats: Vec<f64> = registered
        .iter()
        .map(|&k| {
            let d = corrected.difference(k, constant);
            p_greater(Estimate::new(-d.estimate, d.se))
        })
        .collect();
    // Without a registered model there is no verdict to give: the two
    // baselines are references, not candidates.
    let no_detectable_heterogeneity =
        !registered.is_empty() && !holm_reject(&p_beats, settings.alpha).iter().any(|&r| r);

    let model_scores: Vec<ModelScore> = all
        .iter()
        .zip(policy)
        .zip(rank_metrics)
        .zip(policy_vs)
        .enumerate()
        .map(
            |(k, ((((name, baseline), policy_gain), r), policy_vs_front_runner))| {
                let d = corrected.difference(k, constant);
                let (ci_low, ci_high) = d.interval(CI_LEVEL);
                ModelScore {
                    name: name.clone(),
                    baseline: *baseline,
                    rank: ranking.rank[k],
                    scores: Scores::from_fn(|e| sums[e].estimate(k)),
                    vs_constant: VsConstant {
                        estimate: d.estimate,
                        se: d.se,
                        ci_low,
                        ci_high,
                        p_value: p_greater(Estimate::new(-d.estimate, d.se)),
                        joint_low: d.estimate - joint * d.se,
                        joint_high: d.estimate + joint * d.se,
                    },
                    draw_share: ranking.draw_share[k],
                    chance_lowest: ranking.chance_lowest[k],
                    in_best_set: ranking.in_best_set[k],
                    policy_gain,
                    policy_vs_front_runner,
                    autoc: r.targeting.autoc,
                    qini: r.targeting.qini,
                    blp_slope: r.calibration.slope,
                    calibration: r.calibration.clone(),
                }
            },
        )
        .collect();

    let pairwise = ranking
        .pairs
        .iter()
        .map(|&(a, b)| PairwiseDifference {
            first: all[a].0.clone(),
            second: all[b].0.clone(),
            difference: Difference::from_estimate(corrected.difference(a, b), CI_LEVEL)
                .with_joint(ranking.pair_critical),
        })
        .collect();

    let mut ordered = model_scores;
    ordered.sort_by_key(|s| s.rank);
    let best_set = ordered
        .iter()
        .filter(|s| s.in_best_set)
        .map(|s| s.name.clone())
        .collect();
    let (ci_low, ci_high) = ate.interval(CI_LEVEL);
    Scoreboard {
        n_units: n,
        n_treated,
        n_control: n - n_treated,
        ate: AteSummary {
            estimate: ate.estimate,
            se: ate.se,
            ci_low,
            ci_high,
        },
        front_runner: all[ranking.front_runner].0.clone(),
        front_runner_vs_constant: SelectionAdjusted {
            estimate: corrected.mean(ranking.front_runner) - corrected.mean(constant),
            ci_low: ranking.front_runner_interval.0,
            ci_high: ranking.front_runner_interval.1,
        },
        joint_critical_value: joint,
        best_set,
        no_detectable_heterogeneity,
        alpha: settings.alpha,
        cost: settings.cost,
        models: ordered,
        rank_metrics_units: rank_units,
        pairwise,
        overlap,
        nuisance: nuisance_report,
        caveat: CORRECTED_PEHE_CAVEAT,
        levels: None,
        blend: None,
    }
}
