//! The whole estimation pass: nuisance fits, pseudo-outcomes, every
//! estimator for every model, comparisons, targeting, calibration and the
//! overlap report, gathered into one serializable [`Scoreboard`].

use rayon::prelude::*;
use serde::Serialize;

use super::calibration::{calibration, Calibration};
use super::compare::{rank, Difference};
use super::crossfit::{fit_nuisance, Nuisance, NuisanceReport, NuisanceSettings};
use super::data::{ModelPredictions, UnitTable, CONSTANT_EFFECT, ZERO_EFFECT};
use super::error::EstimateError;
use super::estimators::{self, Estimator, UnitView};
use super::overlap::{overlap_report, OverlapReport};
use super::policy::{policy_gain, PolicyGain};
use super::pseudo::{aipw_ate, aipw_pseudo_outcome};
use super::stats::{holm_reject, p_greater, Estimate};
use super::sums::ScoreSums;
use super::targeting::{targeting_many, Targeting};

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
    pub bootstrap_replicates: usize,
    pub p_best_draws: usize,
}

impl Default for Settings {
    fn default() -> Self {
        Self {
            nuisance: NuisanceSettings::default(),
            cost: 0.0,
            alpha: 0.05,
            overlap_eps: 0.05,
            bootstrap_replicates: 200,
            p_best_draws: 4000,
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
}

#[derive(Debug, Clone, Serialize)]
pub struct ModelScore {
    pub name: String,
    /// True for the built-in zero-effect and constant-effect models.
    pub baseline: bool,
    pub rank: usize,
    /// Lower estimate of PEHE: see `caveat`.
    pub corrected_pehe: Estimate,
    /// corrected PEHE of this model minus that of constant-effect (negative:
    /// lower error than treating everyone alike).
    pub vs_constant: VsConstant,
    pub plugin_pehe: Estimate,
    pub dr_loss: Estimate,
    pub r_loss: Estimate,
    pub ipw_loss: Estimate,
    pub p_best: f64,
    pub in_best_set: bool,
    pub policy_gain: PolicyGain,
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
    pub leader: String,
    pub best_set: Vec<String>,
    /// True when no registered model beats constant-effect significantly.
    pub no_detectable_heterogeneity: bool,
    pub alpha: f64,
    pub cost: f64,
    pub models: Vec<ModelScore>,
    pub pairwise: Vec<PairwiseDifference>,
    pub overlap: OverlapReport,
    pub nuisance: Option<NuisanceReport>,
    pub caveat: &'static str,
}

/// Fits the nuisance components by cross-fitting, then scores.
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
    Ok(score(
        table,
        feature_names,
        &nuisance,
        Some(report),
        models,
        settings,
    ))
}

fn check_predictions(table: &UnitTable, models: &[ModelPredictions]) -> Result<(), EstimateError> {
    for m in models {
        if m.name == ZERO_EFFECT || m.name == CONSTANT_EFFECT {
            return Err(EstimateError::invalid(format!(
                "model name {:?} is reserved for a built-in baseline",
                m.name
            )));
        }
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
    let n = table.len();
    let (y, w) = (table.outcome(), table.treatment());
    let phi = aipw_pseudo_outcome(y, w, nuisance);
    let ate = aipw_ate(&phi);

    let mut all: Vec<ModelPredictions> = Vec::with_capacity(models.len() + 2);
    all.push(ModelPredictions {
        name: ZERO_EFFECT.into(),
        effects: vec![0.0; n],
        baseline: true,
    });
    all.push(ModelPredictions {
        name: CONSTANT_EFFECT.into(),
        effects: vec![ate.estimate; n],
        baseline: true,
    });
    all.extend(models.iter().cloned());
    let constant = 1;
    let m = all.len();

    let mut sums: Vec<ScoreSums> = estimators::ALL.iter().map(|_| ScoreSums::new(m)).collect();
    let mut row = vec![0.0; m];
    for i in 0..n {
        let unit = UnitView {
            outcome: y[i],
            treatment: w[i],
            propensity: nuisance.propensity[i],
            mu0: nuisance.mu0[i],
            mu1: nuisance.mu1[i],
            phi: phi[i],
        };
        for (e, s) in estimators::ALL.iter().zip(sums.iter_mut()) {
            for (k, model) in all.iter().enumerate() {
                row[k] = e.contribution(&unit, model.effects[i]);
            }
            s.push(&row);
        }
    }
    let key_index = |key: &str| {
        estimators::ALL
            .iter()
            .position(|e: &&dyn Estimator| e.key() == key)
            .unwrap_or(0)
    };
    let corrected = &sums[key_index("corrected_pehe")];
    let ranking = rank(
        corrected,
        settings.alpha,
        settings.p_best_draws,
        settings.nuisance.seed,
    );

    let registered: Vec<usize> = (2..m).collect();
    let p_beats: Vec<f64> = registered
        .iter()
        .map(|&k| {
            let d = corrected.difference(k, constant);
            p_greater(Estimate::new(-d.estimate, d.se))
        })
        .collect();
    let no_detectable_heterogeneity = !holm_reject(&p_beats, settings.alpha).iter().any(|&r| r);

    // The targeting bootstrap draws its resamples once for every model.
    let effects: Vec<&[f64]> = all.iter().map(|m| m.effects.as_slice()).collect();
    let targets: Vec<Targeting> = targeting_many(
        &phi,
        &effects,
        settings.bootstrap_replicates,
        settings.nuisance.seed,
    );
    // Calibration sorts are per model and independent: run them in
    // parallel, results in model order.
    let model_scores: Vec<ModelScore> = all
        .par_iter()
        .enumerate()
        .map(|(k, model)| {
            let d = corrected.difference(k, constant);
            let (ci_low, ci_high) = d.interval(CI_LEVEL);
            let t = &targets[k];
            let cal = calibration(&phi, &model.effects);
            ModelScore {
                name: model.name.clone(),
                baseline: model.baseline,
                rank: ranking.rank[k],
                corrected_pehe: corrected.estimate(k),
                vs_constant: VsConstant {
                    estimate: d.estimate,
                    se: d.se,
                    ci_low,
                    ci_high,
                    p_value: p_greater(Estimate::new(-d.estimate, d.se)),
                },
                plugin_pehe: sums[key_index("plugin_pehe")].estimate(k),
                dr_loss: sums[key_index("dr_loss")].estimate(k),
                r_loss: sums[key_index("r_loss")].estimate(k),
                ipw_loss: sums[key_index("ipw_loss")].estimate(k),
                p_best: ranking.p_best[k],
                in_best_set: ranking.in_best_set[k],
                policy_gain: policy_gain(&phi, &model.effects, settings.cost),
                autoc: t.autoc,
                qini: t.qini,
                blp_slope: cal.slope,
                calibration: cal,
            }
        })
        .collect();

    let mut pairwise = Vec::new();
    for a in 0..m {
        for b in (a + 1)..m {
            pairwise.push(PairwiseDifference {
                first: all[a].name.clone(),
                second: all[b].name.clone(),
                difference: Difference::from_estimate(corrected.difference(a, b), CI_LEVEL),
            });
        }
    }

    let mut ordered = model_scores;
    ordered.sort_by_key(|s| s.rank);
    let best_set = ordered
        .iter()
        .filter(|s| s.in_best_set)
        .map(|s| s.name.clone())
        .collect();
    let (ci_low, ci_high) = ate.interval(CI_LEVEL);
    let n_treated = table.n_treated();
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
        leader: all[ranking.leader].name.clone(),
        best_set,
        no_detectable_heterogeneity,
        alpha: settings.alpha,
        cost: settings.cost,
        models: ordered,
        pairwise,
        overlap: overlap_report(
            table.features(),
            feature_names,
            w,
            &nuisance.propensity,
            settings.overlap_eps,
        ),
        nuisance: nuisance_report,
        caveat: CORRECTED_PEHE_CAVEAT,
    }
}
