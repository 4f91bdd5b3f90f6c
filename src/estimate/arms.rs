//! Datasets with more than two arms: a reference arm 0 and arms 1..K-1.
//!
//! A model predicts, per unit, the effect of an arm against the reference
//! (a contrast). Everything per contrast comes from the generalized AIPW
//! scores of each arm (Robins, Rotnitzky & Zhao 1994; the multi-valued
//! treatment form of Cattaneo 2010):
//!
//!   Gamma_k = mu_k(x) + 1{W = k} (Y - mu_k(x)) / e_k(x),
//!
//! with e_k the generalized propensity P(W = k | x) and mu_k the outcome
//! model of arm k, both cross-fitted. Contrast k's pseudo-outcome is
//! phi_k = Gamma_k - Gamma_0 (E[phi_k | x] = tau_k(x) when either the
//! propensity or the two outcome models are right), and its plug-in effect
//! mu_k - mu_0. A contrast's board is then the binary board run on those
//! values ([`super::scoreboard::score_pass`]): the estimators that read only the
//! pseudo-outcome and the outcome models run on every unit; those that need
//! a binary treatment (R-loss, IPW loss) run on the units of the
//! contrast's two arms with the conditional propensity e_k / (e_k + e_0),
//! which is P(W = k | x, W in {0, k}).
//!
//! A model's arm choice (each unit gets the arm with the largest predicted
//! effect net of its cost, the reference when none is positive) is valued
//! by the mean of Gamma of the arm chosen, net of its cost
//! (Zhou, Athey & Wager 2023, the doubly robust policy value with several
//! actions), against giving everyone the reference and everyone the best
//! single arm.

use ndarray::Array2;
use serde::{Deserialize, Serialize};

use super::blend::{cross_fit_blend, report_of_blend, BlendReport};
use super::crossfit::{
    assign_arm_folds, fit_arm_nuisance, ArmNuisance, ArmNuisanceReport, Nuisance,
};
use super::data::{checked_features, FeatureRows, OutcomeKind, CONSTANT_EFFECT, ZERO_EFFECT};
use super::error::{Degenerate, EstimateError};
use super::learner::ArmLearner;
use super::level::{level_report_of_units, LevelReport};
use super::overlap::overlap_report;
use super::scoreboard::{
    check_model_name, score_pass, BinaryUnits, Column, Pass, Progress, Scoreboard, ScoredColumn,
    Settings, UnitColumns, CI_LEVEL,
};
use super::stats::{auc, mean_se, sorted_quantile, Estimate};

/// Units of a dataset with several arms, one row each.
///
/// Invariant (checked by [`ArmTable::new`]): at least two arms with
/// distinct names, every unit's arm below their number, every arm with at
/// least one unit, every value finite, a binary outcome 0 or 1, logged
/// probabilities in (0, 1].
#[derive(Debug, Clone)]
pub struct ArmTable {
    features: Array2<f64>,
    arm: Vec<usize>,
    outcome: Vec<f64>,
    logged: Vec<Option<f64>>,
    kind: OutcomeKind,
    arms: Vec<String>,
}

impl ArmTable {
    /// `arms[0]` is the reference. `logged[i]`, when given, is the logged
    /// probability of the arm unit i got; an empty `logged` means none.
    pub fn new(
        features: Array2<f64>,
        arm: Vec<usize>,
        outcome: Vec<f64>,
        logged: Vec<Option<f64>>,
        kind: OutcomeKind,
        arms: Vec<String>,
    ) -> Result<Self, EstimateError> {
        let n = features.nrows();
        if arms.len() < 2 {
            return Err(EstimateError::invalid(
                "arms: a reference arm and at least one other are needed",
            ));
        }
        for (j, a) in arms.iter().enumerate() {
            if a.is_empty() || arms[..j].contains(a) {
                return Err(EstimateError::invalid(format!(
                    "arms: {a:?} is empty or named twice"
                )));
            }
        }
        let logged = if logged.is_empty() {
            vec![None; n]
        } else {
            logged
        };
        if arm.len() != n || outcome.len() != n || logged.len() != n {
            return Err(EstimateError::invalid(format!(
                "column lengths differ: {n} feature rows, {} arms, {} outcomes, {} logged \
                 probabilities",
                arm.len(),
                outcome.len(),
                logged.len()
            )));
        }
        let features = checked_features(features)?;
        for (row, (&w, &y)) in arm.iter().zip(&outcome).enumerate() {
            if w >= arms.len() {
                return Err(EstimateError::invalid(format!(
                    "row {row}: treatment arm {w} is not one of the {} declared arms",
                    arms.len()
                )));
            }
            if !y.is_finite() || (kind == OutcomeKind::Binary && y != 0.0 && y != 1.0) {
                return Err(EstimateError::invalid(format!(
                    "row {row}: outcome {y} is not finite (or not 0 or 1 for a binary outcome)"
                )));
            }
            if let Some(p) = logged[row] {
                if !(p > 0.0 && p <= 1.0) {
                    return Err(EstimateError::invalid(format!(
                        "row {row}: logged probability {p} is outside (0, 1]"
                    )));
                }
            }
        }
        for (k, name) in arms.iter().enumerate() {
            if !arm.contains(&k) {
                return Err(Degenerate::EmptyArm { arm: name.clone() }.into());
            }
        }
        let first = outcome.first().copied().unwrap_or(0.0);
        if outcome.iter().all(|&y| y == first) {
            return Err(Degenerate::ConstantOutcome { value: first }.into());
        }
        Ok(Self {
            features,
            arm,
            outcome,
            logged,
            kind,
            arms,
        })
    }

    pub fn len(&self) -> usize {
        self.arm.len()
    }

    pub fn is_empty(&self) -> bool {
        self.arm.is_empty()
    }

    pub fn rows(&self) -> FeatureRows<'_> {
        FeatureRows::dense(
            self.features.as_slice().unwrap_or(&[]),
            self.features.ncols(),
        )
    }

    /// Each unit's arm, 0 the reference.
    pub fn arm(&self) -> &[usize] {
        &self.arm
    }

    pub fn outcome(&self) -> &[f64] {
        &self.outcome
    }

    pub fn logged(&self) -> &[Option<f64>] {
        &self.logged
    }

    pub fn outcome_kind(&self) -> OutcomeKind {
        self.kind
    }

    /// The arms' names, the reference first.
    pub fn arms(&self) -> &[String] {
        &self.arms
    }

    pub fn units_in(&self, k: usize) -> usize {
        self.arm.iter().filter(|&&w| w == k).count()
    }
}

/// One model's predicted effects for a dataset with several arms:
/// `effects[c]` is its prediction of arm c+1 against the reference, one
/// per unit, or None when the model does not predict that contrast.
#[derive(Debug, Clone)]
pub struct ArmModelPredictions {
    pub name: String,
    pub effects: Vec<Option<Vec<f64>>>,
}

/// What shapes an arms pass beyond the binary [`Settings`] (whose `cost`
/// is not read: each arm has its own).
#[derive(Debug, Default)]
pub struct ArmSettings {
    /// Cost of giving a unit each arm, in outcome units, the reference's
    /// first (0 when empty).
    pub costs: Vec<f64>,
    /// The generalized propensity's candidate learners; empty: the default
    /// library.
    pub propensity_learners: Vec<Box<dyn ArmLearner>>,
}

/// Says how the estimators that need a binary treatment ran on a contrast.
pub const BINARY_ESTIMATORS_NOTE: &str = "r_loss and ipw_loss are computed on the units of \
this arm and the reference only, with the conditional propensity e_k / (e_k + e_0); the other \
estimators on every unit, from the pseudo-outcome Gamma_k - Gamma_0.";

/// Says how the best single arm was chosen.
pub const BEST_SINGLE_ARM_NOTE: &str = "the best single arm is the arm with the largest mean \
doubly robust score net of its cost, chosen on the same data the policies are valued on, so \
differences against it lean slightly towards it.";

/// The board of one contrast: arm `arm` against the reference.
#[derive(Debug, Clone, Serialize)]
pub struct ContrastBoard {
    pub arm: String,
    pub reference: String,
    pub note: &'static str,
    pub board: Scoreboard,
    /// The conditional propensity e_k / (e_k + e_0) on the contrast's two
    /// arms' units: its AUC for telling arm k from the reference (0.5: no
    /// better than chance, near 1: the arms barely overlap), and the units
    /// whose value was held at the clip.
    pub propensity_auc: f64,
    pub clipped: usize,
}

/// The generalized propensity of one arm, over every unit.
#[derive(Debug, Clone, Serialize)]
pub struct ArmPropensity {
    pub arm: String,
    pub units: usize,
    /// (probability, quantile of e_k over every unit) pairs.
    pub quantiles: Vec<(f64, f64)>,
    /// Kish effective sample size of the arm's units under weights 1/e_k,
    /// and as a share of the arm.
    pub effective_sample_size: f64,
    pub effective_share: f64,
    /// Share of every unit whose e_k is below the overlap threshold `eps`.
    pub extreme_share: f64,
    /// Units of this arm whose e_k was raised to the clip.
    pub clipped: usize,
}

/// An estimate with its 95% interval.
#[derive(Debug, Clone, Copy, Serialize, PartialEq, Deserialize)]
pub struct Valued {
    pub estimate: f64,
    pub se: f64,
    pub ci_low: f64,
    pub ci_high: f64,
}

impl From<Estimate> for Valued {
    fn from(e: Estimate) -> Self {
        let (ci_low, ci_high) = e.interval(CI_LEVEL);
        Self {
            estimate: e.estimate,
            se: e.se,
            ci_low,
            ci_high,
        }
    }
}

/// Share of units one policy gives an arm.
#[derive(Debug, Clone, Serialize, PartialEq, Deserialize)]
pub struct ArmShare {
    pub arm: String,
    pub share: f64,
}

/// The value of one model's arm choice.
#[derive(Debug, Clone, Serialize, PartialEq, Deserialize)]
pub struct ArmPolicy {
    pub model: String,
    /// Mean outcome per unit, net of the arms' costs, under the choice.
    pub value: Valued,
    pub vs_reference: Valued,
    pub vs_best_single_arm: Valued,
    pub shares: Vec<ArmShare>,
}

/// The difference of two models' policy values.
#[derive(Debug, Clone, Serialize, PartialEq, Deserialize)]
pub struct PolicyDifference {
    pub first: String,
    pub second: String,
    /// Value of `first`'s choice minus that of `second`'s.
    pub difference: Valued,
}

/// Every model's arm choice, valued.
#[derive(Debug, Clone, Serialize)]
pub struct ArmPolicyReport {
    /// Cost per arm, the reference first.
    pub costs: Vec<ArmCost>,
    pub reference_value: Valued,
    pub best_single_arm: String,
    pub best_single_arm_value: Valued,
    pub note: &'static str,
    pub models: Vec<ArmPolicy>,
    pub pairwise: Vec<PolicyDifference>,
}

#[derive(Debug, Clone, Serialize, PartialEq, Deserialize)]
pub struct ArmCost {
    pub arm: String,
    pub cost: f64,
}

/// The whole pass of a dataset with several arms.
#[derive(Debug, Clone, Serialize)]
pub struct ArmsScoreboard {
    pub arms: Vec<String>,
    pub reference: String,
    pub n_units: usize,
    pub units_per_arm: Vec<usize>,
    /// One per arm other than the reference, in the arms' order.
    pub contrasts: Vec<ContrastBoard>,
    pub propensity: Vec<ArmPropensity>,
    pub policy: ArmPolicyReport,
    pub nuisance: Option<ArmNuisanceReport>,
}

/// The doubly robust scores Gamma_k per arm and unit, and the
/// propensities they used: the fitted e_k, replaced by the logged
/// probability for the arm a unit got where one is given, raised to
/// `clip` (with the count raised per arm).
pub struct DrScores {
    /// `gamma[k][i]`.
    pub gamma: Vec<Vec<f64>>,
    /// `propensity[k][i]`, as weighted.
    pub propensity: Vec<Vec<f64>>,
    pub clipped: Vec<usize>,
}

pub fn dr_scores(table: &ArmTable, nuisance: &ArmNuisance, clip: f64) -> DrScores {
    dr_scores_of(
        &table.arm,
        &table.outcome,
        &table.logged,
        table.arms.len(),
        nuisance,
        clip,
    )
}

/// [`dr_scores`] on columns: unit i got arm `arm[i]` (below `arms`), with
/// outcome `outcome[i]` and, when logged, the probability `logged[i]` of
/// that arm.
pub fn dr_scores_of(
    arm: &[usize],
    outcome: &[f64],
    logged: &[Option<f64>],
    arms: usize,
    nuisance: &ArmNuisance,
    clip: f64,
) -> DrScores {
    let mut clipped = vec![0; arms];
    let mut propensity = nuisance.propensity.clone();
    for (i, (&w, logged)) in arm.iter().zip(logged).enumerate() {
        if let Some(p) = logged {
            propensity[w][i] = *p;
        }
    }
    for (k, column) in propensity.iter_mut().enumerate() {
        for (i, v) in column.iter_mut().enumerate() {
            if *v < clip {
                *v = clip;
                if arm[i] == k {
                    clipped[k] += 1;
                }
            }
        }
    }
    let gamma = (0..arms)
        .map(|k| {
            (0..arm.len())
                .map(|i| {
                    let mu = nuisance.outcome[k][i];
                    if arm[i] == k {
                        mu + (outcome[i] - mu) / propensity[k][i]
                    } else {
                        mu
                    }
                })
                .collect()
        })
        .collect();
    DrScores {
        gamma,
        propensity,
        clipped,
    }
}

/// Cross-fits the nuisance models, then scores every contrast and values
/// every model's arm choice.
pub fn evaluate_arms(
    table: &ArmTable,
    feature_names: &[String],
    models: &[ArmModelPredictions],
    settings: &Settings,
    arm_settings: &ArmSettings,
    progress: &dyn Progress,
) -> Result<ArmsScoreboard, EstimateError> {
    settings.check()?;
    check_arm_models(table, models)?;
    let costs = arm_costs(table, arm_settings)?;
    progress.stage("fitting nuisance models");
    let library: Vec<Box<dyn ArmLearner>> = arm_settings
        .propensity_learners
        .iter()
        .map(|l| l.boxed_clone())
        .collect();
    let (nuisance, report, _) = fit_arm_nuisance(
        table.rows(),
        &table.arm,
        &table.arms,
        &table.outcome,
        table.kind,
        &settings.nuisance,
        library,
    )?;
    progress.stage("scoring models");
    Ok(score_arms(
        table,
        feature_names,
        &nuisance,
        Some(report),
        models,
        settings,
        &costs,
    ))
}

/// Each arm's cost, the reference's first; a missing list is all zeros.
fn arm_costs(table: &ArmTable, s: &ArmSettings) -> Result<Vec<f64>, EstimateError> {
    let arms = table.arms.len();
    if s.costs.is_empty() {
        return Ok(vec![0.0; arms]);
    }
    if s.costs.len() != arms || s.costs.iter().any(|c| !c.is_finite()) {
        return Err(EstimateError::invalid(format!(
            "arm costs: {} finite values are needed, one per arm",
            arms
        )));
    }
    Ok(s.costs.clone())
}

fn check_arm_models(table: &ArmTable, models: &[ArmModelPredictions]) -> Result<(), EstimateError> {
    let contrasts = table.arms.len() - 1;
    for m in models {
        check_model_name(&m.name)?;
        if m.effects.len() != contrasts {
            return Err(EstimateError::invalid(format!(
                "model {}: {} contrast slots for {contrasts} arms besides the reference",
                m.name,
                m.effects.len()
            )));
        }
        if m.effects.iter().all(Option::is_none) {
            return Err(EstimateError::invalid(format!(
                "model {}: predicts no contrast",
                m.name
            )));
        }
        for (c, effects) in m.effects.iter().enumerate() {
            let Some(effects) = effects else { continue };
            if effects.len() != table.len() {
                return Err(EstimateError::invalid(format!(
                    "model {} arm {}: {} predictions for {} units",
                    m.name,
                    table.arms[c + 1],
                    effects.len(),
                    table.len()
                )));
            }
            if let Some(row) = effects.iter().position(|v| !v.is_finite()) {
                return Err(EstimateError::invalid(format!(
                    "model {} arm {}: prediction for row {row} is not finite",
                    m.name,
                    table.arms[c + 1]
                )));
            }
        }
    }
    Ok(())
}

/// Scores every contrast and values every model's arm choice against given
/// nuisance values. `costs` holds one cost per arm, the reference first.
pub fn score_arms(
    table: &ArmTable,
    feature_names: &[String],
    nuisance: &ArmNuisance,
    report: Option<ArmNuisanceReport>,
    models: &[ArmModelPredictions],
    settings: &Settings,
    costs: &[f64],
) -> ArmsScoreboard {
    let arms = table.arms.len();
    let n = table.len();
    let clip = settings.nuisance.clip;
    let scores = dr_scores(table, nuisance, clip);
    // The folds the nuisance models were cross-fitted on, which the blends
    // are cross-fitted on too.
    let fold_of_unit = assign_arm_folds(
        &table.arm,
        arms,
        settings.nuisance.folds,
        settings.nuisance.seed,
    );
    let contrasts = (1..arms)
        .map(|k| {
            score_contrast(
                table,
                feature_names,
                nuisance,
                &scores,
                &fold_of_unit,
                k,
                models,
                settings,
                costs[k],
            )
        })
        .collect();
    let propensity = (0..arms)
        .map(|k| arm_propensity(table, &scores, k, settings.overlap_eps))
        .collect();
    ArmsScoreboard {
        arms: table.arms.clone(),
        reference: table.arms[0].clone(),
        n_units: n,
        units_per_arm: (0..arms).map(|k| table.units_in(k)).collect(),
        contrasts,
        propensity,
        policy: policy_report(table, &scores.gamma, models, costs),
        nuisance: report,
    }
}

#[allow(clippy::too_many_arguments)]
fn score_contrast(
    table: &ArmTable,
    feature_names: &[String],
    nuisance: &ArmNuisance,
    scores: &DrScores,
    fold_of_unit: &[usize],
    k: usize,
    models: &[ArmModelPredictions],
    settings: &Settings,
    cost: f64,
) -> ContrastBoard {
    let n = table.len();
    let clip = settings.nuisance.clip;
    let (g0, gk) = (&scores.gamma[0], &scores.gamma[k]);
    let phi: Vec<f64> = gk.iter().zip(g0).map(|(a, b)| a - b).collect();
    let treatment: Vec<f64> = table
        .arm
        .iter()
        .map(|&w| f64::from(u8::from(w == k)))
        .collect();
    let (e0, ek) = (&scores.propensity[0], &scores.propensity[k]);
    let raw: Vec<f64> = ek.iter().zip(e0).map(|(a, b)| a / (a + b)).collect();
    let conditional: Vec<f64> = raw.iter().map(|p| p.clamp(clip, 1.0 - clip)).collect();
    let units = UnitColumns {
        outcome: &table.outcome,
        treatment: &treatment,
        propensity: &conditional,
        mu0: &nuisance.outcome[0],
        mu1: &nuisance.outcome[k],
        phi: &phi,
    };
    let index: Vec<usize> = (0..n)
        .filter(|&i| table.arm[i] == 0 || table.arm[i] == k)
        .collect();
    let pick = |v: &[f64]| -> Vec<f64> { index.iter().map(|&i| v[i]).collect() };
    let (py, pw, pp) = (pick(&table.outcome), pick(&treatment), pick(&conditional));
    let (pmu0, pmu1, pphi) = (
        pick(&nuisance.outcome[0]),
        pick(&nuisance.outcome[k]),
        pick(&phi),
    );
    let binary = BinaryUnits {
        units: UnitColumns {
            outcome: &py,
            treatment: &pw,
            propensity: &pp,
            mu0: &pmu0,
            mu1: &pmu1,
            phi: &pphi,
        },
        index: &index,
    };
    let rows = table.rows();
    let overlap = overlap_report(
        rows.picked(&index),
        feature_names,
        &pw,
        &pp,
        settings.overlap_eps,
    );
    let columns: Vec<ScoredColumn<'_>> = models
        .iter()
        .filter_map(|m| {
            m.effects[k - 1].as_ref().map(|e| ScoredColumn {
                name: m.name.clone(),
                baseline: false,
                effects: Column::Slice(e),
            })
        })
        .collect();
    let (mut board, ..) = score_pass(
        Pass {
            units,
            binary_units: Some(binary),
            n_treated: table.units_in(k),
            cost,
            overlap,
            nuisance: None,
        },
        &columns,
        settings,
    );
    // The board's control count is the reference arm's, not every unit
    // outside arm k.
    board.n_control = table.units_in(0);
    board.blend = contrast_blend(models, k, &phi, fold_of_unit, &units, settings, &board);
    board.levels = Some(contrast_levels(
        table,
        nuisance,
        k,
        &units,
        fold_of_unit,
        models,
        board.ate.estimate,
        settings,
    ));
    ContrastBoard {
        arm: table.arms[k].clone(),
        reference: table.arms[0].clone(),
        note: BINARY_ESTIMATORS_NOTE,
        board,
        propensity_auc: auc(&pp, &pw),
        clipped: index
            .iter()
            .filter(|&&i| raw[i] < clip || raw[i] > 1.0 - clip)
            .count(),
    }
}

/// The cross-fitted convex blend of the models that predict contrast `k`
/// (see [`blend`](super::blend)), on the contrast's pseudo-outcome `phi`
/// over every unit and the nuisance models' folds; None with fewer than
/// two such models.
fn contrast_blend(
    models: &[ArmModelPredictions],
    k: usize,
    phi: &[f64],
    fold_of_unit: &[usize],
    units: &UnitColumns<'_>,
    settings: &Settings,
    board: &Scoreboard,
) -> Option<BlendReport> {
    let predicting: Vec<(&str, &[f64])> = models
        .iter()
        .filter_map(|m| m.effects[k - 1].as_deref().map(|e| (m.name.as_str(), e)))
        .collect();
    if predicting.len() < 2 {
        return None;
    }
    let best_model = board.models.iter().find(|m| !m.baseline)?.name.clone();
    let best = predicting
        .iter()
        .position(|(name, _)| *name == best_model)?;
    let effects: Vec<&[f64]> = predicting.iter().map(|(_, e)| *e).collect();
    let folds = settings.nuisance.folds;
    let blend = cross_fit_blend(&effects, phi, fold_of_unit, folds);
    let names: Vec<String> = predicting.iter().map(|(n, _)| n.to_string()).collect();
    Some(report_of_blend(
        &names,
        &blend,
        best_model,
        effects[best],
        units,
        board.ate.estimate,
    ))
}

/// The lower bounds on each model's RMSE for contrast `k` (see
/// [`level`](super::level)): the sieve projection of phi_k - tau_tilde_k,
/// tau_tilde_k = mu_k - mu_0, over every unit, on the nuisance models'
/// folds, for the baselines (constant-effect predicting `ate`) and the
/// models that predict the contrast.
#[allow(clippy::too_many_arguments)]
fn contrast_levels(
    table: &ArmTable,
    nuisance: &ArmNuisance,
    k: usize,
    units: &UnitColumns<'_>,
    fold_of_unit: &[usize],
    models: &[ArmModelPredictions],
    ate: f64,
    settings: &Settings,
) -> LevelReport {
    // The sieve reads the contrast's outcome models through a binary
    // nuisance record; the propensity is the conditional one the
    // contrast's columns carry.
    let pair = Nuisance {
        propensity: units.propensity.to_vec(),
        mu0: nuisance.outcome[0].clone(),
        mu1: nuisance.outcome[k].clone(),
    };
    let mut columns = vec![
        (ZERO_EFFECT, Column::Uniform(0.0)),
        (CONSTANT_EFFECT, Column::Uniform(ate)),
    ];
    columns.extend(models.iter().filter_map(|m| {
        m.effects[k - 1]
            .as_deref()
            .map(|e| (m.name.as_str(), Column::Slice(e)))
    }));
    level_report_of_units(
        table.rows(),
        units,
        &pair,
        fold_of_unit,
        settings.nuisance.folds,
        &columns,
    )
}

const QUANTILES: [f64; 7] = [0.0, 0.01, 0.05, 0.5, 0.95, 0.99, 1.0];

fn arm_propensity(table: &ArmTable, scores: &DrScores, k: usize, eps: f64) -> ArmPropensity {
    let e = &scores.propensity[k];
    let mut sorted = e.clone();
    sorted.sort_by(f64::total_cmp);
    let (mut sw, mut sw2, mut units) = (0.0, 0.0, 0usize);
    for (i, &p) in e.iter().enumerate() {
        if table.arm[i] == k {
            let w = 1.0 / p;
            sw += w;
            sw2 += w * w;
            units += 1;
        }
    }
    let ess = if sw2 > 0.0 { sw * sw / sw2 } else { 0.0 };
    ArmPropensity {
        arm: table.arms[k].clone(),
        units,
        quantiles: QUANTILES
            .iter()
            .map(|&q| (q, sorted_quantile(&sorted, q)))
            .collect(),
        effective_sample_size: ess,
        effective_share: ess / units.max(1) as f64,
        extreme_share: e.iter().filter(|&&p| p < eps).count() as f64 / e.len().max(1) as f64,
        clipped: scores.clipped[k],
    }
}

/// The arm each unit gets under a model: the largest predicted effect net
/// of its arm's cost among the contrasts the model predicts, the reference
/// when none is positive.
pub fn choose_arms(model: &ArmModelPredictions, costs: &[f64], n: usize) -> Vec<usize> {
    (0..n)
        .map(|i| {
            let mut best = (0, 0.0);
            for (c, effects) in model.effects.iter().enumerate() {
                if let Some(e) = effects {
                    let net = e[i] - costs[c + 1];
                    if net > best.1 {
                        best = (c + 1, net);
                    }
                }
            }
            best.0
        })
        .collect()
}

/// Per-unit value, net of cost, of giving each unit `choice[i]`.
fn net_values(gamma: &[Vec<f64>], costs: &[f64], choice: &[usize]) -> Vec<f64> {
    choice
        .iter()
        .enumerate()
        .map(|(i, &k)| gamma[k][i] - costs[k])
        .collect()
}

fn difference(a: &[f64], b: &[f64]) -> Estimate {
    let d: Vec<f64> = a.iter().zip(b).map(|(x, y)| x - y).collect();
    mean_se(&d)
}

fn policy_report(
    table: &ArmTable,
    gamma: &[Vec<f64>],
    models: &[ArmModelPredictions],
    costs: &[f64],
) -> ArmPolicyReport {
    let n = table.len();
    let arms = table.arms.len();
    let uniform: Vec<Vec<f64>> = (0..arms)
        .map(|k| net_values(gamma, costs, &vec![k; n]))
        .collect();
    let means: Vec<f64> = uniform.iter().map(|v| mean_se(v).estimate).collect();
    let best = (0..arms)
        .max_by(|&a, &b| means[a].total_cmp(&means[b]))
        .unwrap_or(0);
    let values: Vec<Vec<f64>> = models
        .iter()
        .map(|m| net_values(gamma, costs, &choose_arms(m, costs, n)))
        .collect();
    let policies = models
        .iter()
        .zip(&values)
        .map(|(m, v)| {
            let choice = choose_arms(m, costs, n);
            ArmPolicy {
                model: m.name.clone(),
                value: mean_se(v).into(),
                vs_reference: difference(v, &uniform[0]).into(),
                vs_best_single_arm: difference(v, &uniform[best]).into(),
                shares: (0..arms)
                    .map(|k| ArmShare {
                        arm: table.arms[k].clone(),
                        share: choice.iter().filter(|&&c| c == k).count() as f64 / n.max(1) as f64,
                    })
                    .collect(),
            }
        })
        .collect();
    let mut pairwise = Vec::new();
    for a in 0..models.len() {
        for b in a + 1..models.len() {
            pairwise.push(PolicyDifference {
                first: models[a].name.clone(),
                second: models[b].name.clone(),
                difference: difference(&values[a], &values[b]).into(),
            });
        }
    }
    ArmPolicyReport {
        costs: table
            .arms
            .iter()
            .zip(costs)
            .map(|(a, &c)| ArmCost {
                arm: a.clone(),
                cost: c,
            })
            .collect(),
        reference_value: mean_se(&uniform[0]).into(),
        best_single_arm: table.arms[best].clone(),
        best_single_arm_value: mean_se(&uniform[best]).into(),
        note: BEST_SINGLE_ARM_NOTE,
        models: policies,
        pairwise,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table() -> ArmTable {
        let x = Array2::from_shape_vec((6, 1), vec![0.0, 1.0, 2.0, 3.0, 4.0, 5.0]).expect("shape");
        ArmTable::new(
            x,
            vec![0, 1, 2, 0, 1, 2],
            vec![1.0, 2.0, 4.0, 1.5, 2.5, 3.0],
            vec![None, Some(0.5), None, None, None, None],
            OutcomeKind::Continuous,
            vec!["none".into(), "text".into(), "mail".into()],
        )
        .expect("valid")
    }

    #[test]
    fn dr_scores_correct_only_the_arm_a_unit_got_and_use_the_logged_probability() {
        let t = table();
        let nuisance = ArmNuisance {
            propensity: vec![vec![0.25; 6], vec![0.25; 6], vec![0.5; 6]],
            outcome: vec![vec![1.0; 6], vec![2.0; 6], vec![3.0; 6]],
        };
        let s = dr_scores(&t, &nuisance, 0.01);
        // Unit 1 got arm 1 with logged probability 0.5: 2 + (2 - 2) / 0.5.
        assert_eq!(s.gamma[1][1], 2.0);
        assert_eq!(s.propensity[1][1], 0.5);
        // Unit 4 got arm 1, fitted e = 0.25: 2 + (2.5 - 2) / 0.25 = 4.
        assert_eq!(s.gamma[1][4], 4.0);
        // Unit 2 got arm 2: its arm-0 score is the plug-in alone.
        assert_eq!(s.gamma[0][2], 1.0);
        assert_eq!(s.gamma[2][2], 3.0 + 1.0 / 0.5);
    }

    #[test]
    fn arm_choice_takes_the_largest_net_effect_or_the_reference() {
        let m = ArmModelPredictions {
            name: "m".into(),
            effects: vec![Some(vec![1.0, -1.0, 0.5]), Some(vec![0.5, -2.0, 2.0])],
        };
        assert_eq!(choose_arms(&m, &[0.0, 0.0, 0.0], 3), vec![1, 0, 2]);
        // A cost on arm 2 moves unit 2 to arm 1 (0.5 > 2.0 - 1.8).
        assert_eq!(choose_arms(&m, &[0.0, 0.0, 1.8], 3), vec![1, 0, 1]);
    }

    #[test]
    fn an_arm_without_units_is_refused() {
        let x = Array2::zeros((3, 1));
        let err = ArmTable::new(
            x,
            vec![0, 1, 0],
            vec![1.0, 2.0, 3.0],
            Vec::new(),
            OutcomeKind::Continuous,
            vec!["a".into(), "b".into(), "c".into()],
        )
        .expect_err("arm c has no units");
        assert!(err.to_string().contains('c'), "{err}");
    }
}
