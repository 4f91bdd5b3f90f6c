//! The cross-fit of a dataset with several arms: the generalized
//! propensity P(W = k | x) and one outcome model per arm, E[Y | x, W = k].
//!
//! The outcome models run through the same queue and the same choice by
//! out-of-fold loss as the binary components (one component per arm, fitted
//! on that arm's units and predicted for every held-out unit); the
//! generalized propensity chooses among the [`ArmLearner`]s by out-of-fold
//! log-loss, -log P(W_i | x_i). Folds are stratified by arm, as in the
//! binary fit.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::Serialize;

use super::choose::choose;
use super::fitting::{out_of_fold, Component};
use super::folds::Folds;
use super::report::ComponentReport;
use super::settings::NuisanceSettings;
use crate::estimate::data::{FeatureRows, OutcomeKind};
use crate::estimate::error::{Degenerate, EstimateError};
use crate::estimate::learner::{
    default_arm_library, default_library, ArmFitted, ArmLearner, Fitted, SharedFeatures, Task,
};

/// Probabilities are kept this far from 0 when scoring log-loss.
const LOG_LOSS_EPS: f64 = 1e-15;

/// Cross-fitted nuisance values of a dataset with `K` arms, one per unit.
#[derive(Debug, Clone)]
pub struct ArmNuisance {
    /// `propensity[k][i]` = P(W = k | x_i), out of fold, before clipping.
    pub propensity: Vec<Vec<f64>>,
    /// `outcome[k][i]` = E[Y | x_i, W = k], out of fold.
    pub outcome: Vec<Vec<f64>>,
}

/// The fold models of an arms cross-fit's chosen learners, kept so that
/// units arriving after it get values from models that never saw them: a
/// new unit gets the average of the K fold models' predictions.
pub struct ArmFittedNuisance {
    /// The generalized propensity's fold models.
    pub propensity: Vec<Box<dyn ArmFitted>>,
    /// `outcome[k]`: arm k's outcome fold models.
    pub outcome: Vec<Vec<Box<dyn Fitted>>>,
}

impl ArmFittedNuisance {
    /// Values for new units, `x` row-major with the fit's width: the fold
    /// models' average per arm, for the propensity and for the outcome.
    pub fn predict(&self, x: FeatureRows<'_>) -> ArmNuisance {
        let n = x.len();
        let arms = self.outcome.len();
        let rows: Vec<usize> = (0..n).collect();
        let shared = SharedFeatures::new(x);
        let mut propensity = vec![vec![0.0; n]; arms];
        for model in &self.propensity {
            for (sum, column) in propensity
                .iter_mut()
                .zip(model.probabilities_rows(&shared, &rows, arms))
            {
                for (s, p) in sum.iter_mut().zip(column) {
                    *s += p;
                }
            }
        }
        let k = self.propensity.len().max(1) as f64;
        for column in &mut propensity {
            for v in column.iter_mut() {
                *v /= k;
            }
        }
        let outcome = self
            .outcome
            .iter()
            .map(|models| {
                let mut sum = vec![0.0; n];
                for m in models {
                    for (s, v) in sum.iter_mut().zip(m.predict_rows(&shared, &rows)) {
                        *s += v;
                    }
                }
                let k = models.len().max(1) as f64;
                sum.iter().map(|s| s / k).collect()
            })
            .collect();
        ArmNuisance {
            propensity,
            outcome,
        }
    }
}

/// One generalized-propensity learner's out-of-fold log-loss.
#[derive(Debug, Clone, Serialize)]
pub struct ArmCandidateLoss {
    pub learner: String,
    pub oof_loss: f64,
    /// Why the learner could not be used, when one of its fold fits failed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub failed: Option<String>,
}

/// What the generalized propensity's fit reports.
#[derive(Debug, Clone, Serialize)]
pub struct ArmPropensityReport {
    pub learner: String,
    pub loss: &'static str,
    pub oof_loss: f64,
    /// The chosen learner's log-loss per arm, in the arms' order (the
    /// reference first): the mean of -log e_k(x_i) over arm k's units, out
    /// of fold. Weighted by the arms' shares of the units they sum to
    /// `oof_loss`; an arm whose loss stands out is the one the propensity
    /// model finds hard to tell from the others.
    pub arm_oof_loss: Vec<f64>,
    pub candidates: Vec<ArmCandidateLoss>,
}

/// What an arms cross-fit reports: the learners chosen and their losses.
#[derive(Debug, Clone, Serialize)]
pub struct ArmNuisanceReport {
    pub folds: usize,
    pub seed: u64,
    pub propensity: ArmPropensityReport,
    /// One per arm, in the arms' order (the reference first).
    pub outcome: Vec<ComponentReport>,
}

/// Fold of each unit, stratified by arm: each arm shuffled once (seeded),
/// a unit's fold its position in the shuffle modulo `k`.
pub fn assign_arm_folds(arm: &[usize], arms: usize, k: usize, seed: u64) -> Vec<usize> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let k = k.max(1);
    let mut fold = vec![0; arm.len()];
    for a in 0..arms {
        let mut idx: Vec<usize> = (0..arm.len()).filter(|&i| arm[i] == a).collect();
        idx.shuffle(&mut rng);
        for (pos, &i) in idx.iter().enumerate() {
            fold[i] = pos % k;
        }
    }
    fold
}

/// Cross-fits the generalized propensity and every arm's outcome model,
/// keeping the chosen learners' fold models. `arm[i]` is unit i's arm, an
/// index into `arm_names` (0 the reference); the names only label errors.
pub fn fit_arm_nuisance(
    features: FeatureRows<'_>,
    arm: &[usize],
    arm_names: &[String],
    outcome: &[f64],
    kind: OutcomeKind,
    settings: &NuisanceSettings,
    propensity_learners: Vec<Box<dyn ArmLearner>>,
) -> Result<(ArmNuisance, ArmNuisanceReport, ArmFittedNuisance), EstimateError> {
    settings.check()?;
    let arms = arm_names.len();
    let n = arm.len();
    if features.len() != n || outcome.len() != n {
        return Err(EstimateError::invalid(format!(
            "{} feature rows and {} outcomes for {n} units",
            features.len(),
            outcome.len()
        )));
    }
    let k = settings.folds;
    let needed = k * settings.min_units_per_fold;
    for (a, name) in arm_names.iter().enumerate() {
        let units = arm.iter().filter(|&&w| w == a).count();
        if units < needed {
            return Err(Degenerate::TooFewUnitsPerFold {
                arm: name.clone(),
                units,
                folds: k,
                per_fold: settings.min_units_per_fold,
                needed,
            }
            .into());
        }
    }
    let fold_of_unit = assign_arm_folds(arm, arms, k, settings.seed);
    let folds = Folds {
        of_unit: &fold_of_unit,
        count: k,
    };
    let x = SharedFeatures::new(features);
    let outcome_learners = if settings.outcome_learners.is_empty() {
        default_library(features.width())
    } else {
        settings
            .outcome_learners
            .iter()
            .map(|l| l.boxed_clone())
            .collect()
    };
    for learner in &outcome_learners {
        learner.prepare(&x);
    }
    let task = match kind {
        OutcomeKind::Continuous => Task::Regression,
        OutcomeKind::Binary => Task::Classification,
    };
    let masks: Vec<Vec<bool>> = (0..arms)
        .map(|a| arm.iter().map(|&w| w == a).collect())
        .collect();
    let components: Vec<Component<'_>> = masks
        .iter()
        .enumerate()
        .map(|(a, mask)| Component {
            target: outcome,
            train_mask: mask,
            learners: &outcome_learners,
            task,
            seed: settings.seed.wrapping_add(1 + a as u64),
        })
        .collect();
    let fitted = out_of_fold(&x, &folds, &components, settings.screening_z);
    let mut outcome_values = Vec::with_capacity(arms);
    let mut outcome_reports = Vec::with_capacity(arms);
    let mut outcome_models = Vec::with_capacity(arms);
    for (oof, mask) in fitted.into_iter().zip(&masks) {
        let (values, models, report) = choose(&outcome_learners, oof?, outcome, mask, task);
        outcome_values.push(values);
        outcome_reports.push(report);
        outcome_models.push(models);
    }
    let library = if propensity_learners.is_empty() {
        default_arm_library()
    } else {
        propensity_learners
    };
    let (propensity, propensity_report, propensity_models) =
        fit_generalized_propensity(&x, &library, arm, arms, &fold_of_unit, k, settings.seed)?;
    Ok((
        ArmNuisance {
            propensity,
            outcome: outcome_values,
        },
        ArmNuisanceReport {
            folds: k,
            seed: settings.seed,
            propensity: propensity_report,
            outcome: outcome_reports,
        },
        ArmFittedNuisance {
            propensity: propensity_models,
            outcome: outcome_models,
        },
    ))
}

/// Mean -log p[k][i] over the units i of each arm k (0 for an arm with no
/// units, which a fit never has).
fn arm_log_loss(p: &[Vec<f64>], arm: &[usize], arms: usize) -> Vec<f64> {
    let mut sum = vec![0.0; arms];
    let mut count = vec![0usize; arms];
    for (i, &k) in arm.iter().enumerate() {
        if let Some(v) = p.get(k).and_then(|column| column.get(i)) {
            sum[k] -= v.max(LOG_LOSS_EPS).ln();
            count[k] += 1;
        }
    }
    sum.iter()
        .zip(&count)
        .map(|(s, &c)| if c == 0 { 0.0 } else { s / c as f64 })
        .collect()
}

/// One fold model, its held-out units and, per arm, their probabilities.
type HeldOut = (Box<dyn ArmFitted>, Vec<usize>, Vec<Vec<f64>>);

/// The chosen learner's out-of-fold probabilities, its report and its fold
/// models.
type Chosen = (Vec<Vec<f64>>, ArmPropensityReport, Vec<Box<dyn ArmFitted>>);

/// Every arm learner on every fold (in parallel), the one with the lowest
/// out-of-fold log-loss kept.
fn fit_generalized_propensity(
    x: &SharedFeatures<'_>,
    library: &[Box<dyn ArmLearner>],
    arm: &[usize],
    arms: usize,
    fold_of_unit: &[usize],
    k: usize,
    seed: u64,
) -> Result<Chosen, EstimateError> {
    for learner in library {
        learner.check()?;
    }
    let n = arm.len();
    let jobs: Vec<(usize, usize)> = (0..library.len())
        .flat_map(|l| (0..k).map(move |f| (l, f)))
        .collect();
    let fits: Vec<Result<HeldOut, EstimateError>> = jobs
        .par_iter()
        .map(|&(l, f)| {
            let train: Vec<usize> = (0..n).filter(|&i| fold_of_unit[i] != f).collect();
            let labels: Vec<usize> = train.iter().map(|&i| arm[i]).collect();
            let model: Box<dyn ArmFitted> =
                library[l].fit(x, &train, &labels, arms, seed.wrapping_add(f as u64))?;
            let held: Vec<usize> = (0..n).filter(|&i| fold_of_unit[i] == f).collect();
            let columns = model.probabilities_rows(x, &held, arms);
            Ok((model, held, columns))
        })
        .collect();
    let mut per_learner: Vec<Result<Vec<Vec<f64>>, String>> =
        vec![Ok(vec![vec![f64::NAN; n]; arms]); library.len()];
    let mut models: Vec<Vec<Box<dyn ArmFitted>>> = (0..library.len()).map(|_| Vec::new()).collect();
    for (&(l, _), fit) in jobs.iter().zip(fits) {
        match (fit, &mut per_learner[l]) {
            (Ok((model, held, columns)), Ok(table)) => {
                for (column, values) in table.iter_mut().zip(columns) {
                    for (&i, v) in held.iter().zip(values) {
                        column[i] = v;
                    }
                }
                models[l].push(model);
            }
            (Err(e), slot @ Ok(_)) => *slot = Err(e.to_string()),
            (_, Err(_)) => {}
        }
    }
    let candidates: Vec<ArmCandidateLoss> = library
        .iter()
        .zip(&per_learner)
        .map(|(learner, values)| match values {
            Ok(p) => ArmCandidateLoss {
                learner: learner.name().to_string(),
                oof_loss: (0..n)
                    .map(|i| -p[arm[i]][i].max(LOG_LOSS_EPS).ln())
                    .sum::<f64>()
                    / n.max(1) as f64,
                failed: None,
            },
            Err(reason) => ArmCandidateLoss {
                learner: learner.name().to_string(),
                oof_loss: f64::INFINITY,
                failed: Some(reason.clone()),
            },
        })
        .collect();
    let best = candidates
        .iter()
        .enumerate()
        .filter(|(_, c)| c.failed.is_none())
        .min_by(|a, b| a.1.oof_loss.total_cmp(&b.1.oof_loss))
        .map(|(i, _)| i)
        .ok_or_else(|| EstimateError::Learner {
            learner: "generalized propensity".into(),
            reason: candidates
                .iter()
                .filter_map(|c| c.failed.clone())
                .collect::<Vec<_>>()
                .join("; "),
        })?;
    let chosen = per_learner
        .into_iter()
        .nth(best)
        .and_then(Result::ok)
        .unwrap_or_default();
    let report = ArmPropensityReport {
        learner: candidates[best].learner.clone(),
        loss: "log_loss",
        oof_loss: candidates[best].oof_loss,
        arm_oof_loss: arm_log_loss(&chosen, arm, arms),
        candidates,
    };
    let fold_models = models.into_iter().nth(best).unwrap_or_default();
    Ok((chosen, report, fold_models))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::stats::standard_normal;

    /// Each arm's log-loss is the mean over its own units, by hand.
    #[test]
    fn arm_log_loss_is_the_mean_over_each_arms_units() {
        let p = vec![vec![0.5, 0.25, 0.2], vec![0.5, 0.75, 0.8]];
        let got = arm_log_loss(&p, &[0, 1, 1], 2);
        let want = [-(0.5f64.ln()), -(0.75f64.ln() + 0.8f64.ln()) / 2.0];
        println!("per-arm log-loss {got:?}, by hand {want:?}");
        assert!((got[0] - want[0]).abs() < 1e-15 && (got[1] - want[1]).abs() < 1e-15);
    }

    /// On a real three-arm fit the per-arm losses, weighted by the arms'
    /// shares, give back the reported log-loss (the same sum regrouped:
    /// 1e-12 leaves room for the order of additions only).
    #[test]
    fn per_arm_losses_weighted_by_share_sum_to_the_fit_loss() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let n = 600;
        let mut x = Vec::with_capacity(2 * n);
        let mut arm = Vec::with_capacity(n);
        let mut y = Vec::with_capacity(n);
        for _ in 0..n {
            let (x1, x2) = (standard_normal(&mut rng), standard_normal(&mut rng));
            x.extend([x1, x2]);
            let scores = [0.0, x1, -x1];
            let total: f64 = scores.iter().map(|s: &f64| s.exp()).sum();
            let u: f64 = rand::Rng::gen(&mut rng);
            let mut acc = 0.0;
            let mut k = 2;
            for (j, s) in scores.iter().enumerate() {
                acc += s.exp() / total;
                if u < acc {
                    k = j;
                    break;
                }
            }
            arm.push(k);
            y.push(x2 + k as f64 + standard_normal(&mut rng));
        }
        let names: Vec<String> = ["none", "text", "mail"].map(String::from).to_vec();
        let (_, report, _) = fit_arm_nuisance(
            FeatureRows::dense(&x, 2),
            &arm,
            &names,
            &y,
            OutcomeKind::Continuous,
            &NuisanceSettings::default(),
            Vec::new(),
        )
        .expect("fit");
        let p = &report.propensity;
        assert_eq!(p.arm_oof_loss.len(), 3);
        let weighted: f64 = (0..3)
            .map(|k| {
                let share = arm.iter().filter(|&&w| w == k).count() as f64 / n as f64;
                share * p.arm_oof_loss[k]
            })
            .sum();
        println!(
            "per-arm log-loss {:?}; share-weighted {weighted}, reported {}",
            p.arm_oof_loss, p.oof_loss
        );
        assert!((weighted - p.oof_loss).abs() <= 1e-12 * p.oof_loss.max(1.0));
    }
}
