//! K-fold cross-fitting of the nuisance components (Chernozhukov et al.
//! 2018, "Double/debiased machine learning").
//!
//! A unit's propensity and outcome-regression values always come from fits
//! that did not see it. Folds are stratified by arm so that each holds the
//! dataset's treated share. Each component tries every learner of its library
//! on the same folds and keeps the one with the lowest out-of-fold loss.
//!
//! This file runs a whole cross-fit ([`fit_nuisance_models_on`]); the parts
//! it assembles have a file each: `settings.rs` (how to fit), `folds.rs`
//! (which unit is held out where, and which units the models are fitted on
//! when their number is capped), `fitting.rs` (every fold fit of every
//! learner as one queue over the worker threads), `screen.rs` (dropping a
//! hopeless learner after the first fold), `choose.rs` (the learner each
//! component keeps), `nuisance.rs` (the per-unit values), `report.rs` (what
//! the fit reports) and `fold_models.rs` (the kept fold models, which score
//! units that arrive later).

mod arm_recalibrate;
mod arms;
mod choose;
mod fitting;
mod fold_models;
mod folds;
mod nuisance;
mod recalibrate;
mod report;
mod screen;
mod settings;

#[cfg(test)]
mod tests;

use super::data::{FeatureRows, OutcomeKind, UnitTable};
use super::error::{Degenerate, EstimateError};
use super::learner::{default_library, Fitted, Learner, SharedFeatures, Task};
use super::stats::auc;
use rayon::prelude::*;

pub use arm_recalibrate::{
    ArmPropensityMap, ArmRecalibration, ArmRecalibrationReport, ArmStageLoss,
};
pub use arms::{
    assign_arm_folds, fit_arm_nuisance, ArmCandidateLoss, ArmFittedNuisance, ArmNuisance,
    ArmNuisanceReport, ArmPropensityReport,
};
pub use fold_models::FittedNuisance;
pub use folds::{assign_arm_fit, assign_fit, assign_folds, FitAssignment};
pub use nuisance::Nuisance;
pub use recalibrate::{
    recalibrate_propensity, PropensityMap, Recalibration, RecalibrationChoice, RecalibrationReport,
    StageLoss,
};
pub use report::{
    binned_calibration, CandidateLoss, ComponentReport, NuisanceReport, PropensityReport,
    CALIBRATION_BINS,
};
pub use settings::NuisanceSettings;

use choose::choose;
use fitting::{out_of_fold, Component};
use folds::Folds;

/// Cross-fits propensity (unless logged) and both outcome regressions.
pub fn fit_nuisance(
    table: &UnitTable,
    settings: &NuisanceSettings,
) -> Result<(Nuisance, NuisanceReport), EstimateError> {
    fit_nuisance_models(table, settings).map(|(n, r, _)| (n, r))
}

/// As [`fit_nuisance`], also returning the fold models for scoring units
/// that arrive later.
pub fn fit_nuisance_models(
    table: &UnitTable,
    settings: &NuisanceSettings,
) -> Result<(Nuisance, NuisanceReport, FittedNuisance), EstimateError> {
    fit_nuisance_models_on(table, table.rows(), settings)
}

/// As [`fit_nuisance_models`], with the features given as `features`, one
/// row per unit of `table`, wherever they are stored (the table's own
/// feature matrix is not read).
///
/// With `settings.max_fit_units` below the number of units, the fold
/// models are fitted on a seeded sample ([`assign_fit`]), the learners are
/// chosen by their out-of-fold loss on it, and every unit outside it gets
/// its values from the chosen learner's model of its own fold, which was
/// fitted on sample units of the other folds only. Without a cap, or with
/// one of at least the number of units, the fit is the uncapped one, bit
/// for bit.
///
/// With more than one fold split (`settings.fold_repeats`),
/// the cross-fit runs once per split, the splits' seeds stepping from
/// `settings.seed`, and each unit's values are the mean over the splits of
/// its out-of-fold values. The report's per-learner losses and the fold
/// models kept for later units are the first split's, which is the
/// single-split fit bit for bit.
pub fn fit_nuisance_models_on(
    table: &UnitTable,
    features: FeatureRows<'_>,
    settings: &NuisanceSettings,
) -> Result<(Nuisance, NuisanceReport, FittedNuisance), EstimateError> {
    settings.check()?;
    let repeats = settings.fold_repeats;
    let (mut nuisance, mut report, fitted) =
        fit_one_split(table, features, settings, settings.seed)?;
    report.fold_repeats = repeats;
    if repeats > 1 {
        for split in 1..repeats {
            let (more, _, _) =
                fit_one_split(table, features, settings, split_seed(settings.seed, split))?;
            for (sum, v) in [
                (&mut nuisance.propensity, &more.propensity),
                (&mut nuisance.mu0, &more.mu0),
                (&mut nuisance.mu1, &more.mu1),
            ] {
                sum.iter_mut().zip(v).for_each(|(s, v)| *s += v);
            }
        }
        let scale = 1.0 / repeats as f64;
        for values in [
            &mut nuisance.propensity,
            &mut nuisance.mu0,
            &mut nuisance.mu1,
        ] {
            values.iter_mut().for_each(|v| *v *= scale);
        }
    }
    // On the values the scores weight with: clipped, and averaged over
    // the splits when there are several.
    let (error, noise) =
        binned_calibration(&nuisance.propensity, table.treatment(), CALIBRATION_BINS);
    report.propensity.calibration_error = error;
    report.propensity.calibration_noise = noise;
    Ok((nuisance, report, fitted))
}

/// The step between the seeds of successive fold splits: odd and far from
/// small numbers, so that split seeds never meet the `seed + 1` and
/// `seed + 2` the outcome components of a split derive from its seed.
const SPLIT_SEED_STEP: u64 = 0x9e37_79b9_7f4a_7c15;

/// The seed of fold split `split` (0 is the first) of a repeated cross-fit
/// seeded with `seed`, binary or with arms.
fn split_seed(seed: u64, split: usize) -> u64 {
    seed.wrapping_add((split as u64).wrapping_mul(SPLIT_SEED_STEP))
}

/// One cross-fit on one fold split, drawn from `seed`.
fn fit_one_split(
    table: &UnitTable,
    features: FeatureRows<'_>,
    settings: &NuisanceSettings,
    seed: u64,
) -> Result<(Nuisance, NuisanceReport, FittedNuisance), EstimateError> {
    if features.len() != table.len() {
        return Err(EstimateError::invalid(format!(
            "{} feature rows for {} units",
            features.len(),
            table.len()
        )));
    }
    table.check_estimable(settings.folds, settings.min_units_per_fold)?;
    let library = |given: &[Box<dyn Learner>]| -> Vec<Box<dyn Learner>> {
        if given.is_empty() {
            default_library(features.width())
        } else {
            given.iter().map(|l| l.boxed_clone()).collect()
        }
    };
    let propensity_learners = library(&settings.propensity_learners);
    let outcome_learners = library(&settings.outcome_learners);
    let k = settings.folds;
    let assignment = assign_fit(
        table.treatment(),
        k,
        seed,
        settings.max_fit_units,
        k * settings.min_units_per_fold,
    );
    // The units the models are fitted on: every unit (the columns as they
    // are), or the sample (its rows read in place, its columns copied).
    let sample = assignment.sample.as_deref();
    let fitted_only = |v: &[f64]| -> Vec<f64> {
        sample.map_or_else(Vec::new, |s| s.iter().map(|&i| v[i]).collect())
    };
    let (w_sample, y_sample) = (fitted_only(table.treatment()), fitted_only(table.outcome()));
    let (w, y) = match sample {
        None => (table.treatment(), table.outcome()),
        Some(_) => (&w_sample[..], &y_sample[..]),
    };
    let sample_folds: Vec<usize> = sample.map_or_else(Vec::new, |s| {
        s.iter().map(|&i| assignment.fold_of_unit[i]).collect()
    });
    let fold_of_unit = match sample {
        None => &assignment.fold_of_unit[..],
        Some(_) => &sample_folds[..],
    };
    let fit_rows = match sample {
        None => features,
        Some(s) => features.picked(s),
    };
    let x = &SharedFeatures::new(fit_rows);
    let folds = Folds {
        of_unit: fold_of_unit,
        count: k,
    };
    let everyone = vec![true; w.len()];
    let outcome_task = match table.outcome_kind() {
        OutcomeKind::Continuous => Task::Regression,
        OutcomeKind::Binary => Task::Classification,
    };
    // Each arm's outcome model is fitted on that arm only and predicted for
    // every held-out unit, so both mu0 and mu1 exist for all units.
    let in_arm = |arm: f64| -> Vec<bool> { w.iter().map(|&v| v == arm).collect() };
    let (control, treated) = (in_arm(0.0), in_arm(1.0));
    let logged = table.logged_propensity();
    let mut components = Vec::with_capacity(3);
    if logged.is_none() {
        components.push(Component {
            target: w,
            train_mask: &everyone,
            learners: &propensity_learners,
            task: Task::Classification,
            seed,
        });
    }
    for (arm, mask) in [(0u64, &control), (1, &treated)] {
        components.push(Component {
            target: y,
            train_mask: mask,
            learners: &outcome_learners,
            task: outcome_task,
            seed: seed.wrapping_add(1 + arm),
        });
    }
    for learner in propensity_learners.iter().chain(&outcome_learners) {
        learner.prepare(x);
    }
    // Values for every unit from values for the fitted ones: a unit outside
    // the sample gets the prediction of its own fold's model.
    let all_rows = SharedFeatures::new(features);
    let spread = |fitted: Vec<f64>, models: &[Box<dyn Fitted>]| -> Vec<f64> {
        match sample {
            None => fitted,
            Some(s) => spread_to_every_unit(fitted, s, &assignment.fold_of_unit, models, &all_rows),
        }
    };
    // Errors surface in the order a one-by-one fit of the components would
    // meet them: the propensity's own, then separated arms, then the
    // outcomes'.
    let mut fitted = out_of_fold(x, &folds, &components, settings.screening_z).into_iter();
    let mut next = || {
        fitted
            .next()
            .unwrap_or_else(|| Err(EstimateError::invalid("missing cross-fit")))
    };

    let (raw_propensity, propensity_fit, propensity_models) = match logged {
        Some(p) => (p.to_vec(), None, None),
        None => {
            let (p, models, report) = choose(
                &propensity_learners,
                next()?,
                w,
                &everyone,
                Task::Classification,
            );
            (spread(p, &models), Some(report), Some(models))
        }
    };
    let propensity_auc = auc(&raw_propensity, table.treatment());
    if propensity_auc >= settings.separation_auc {
        return Err(Degenerate::SeparatedArms {
            auc: propensity_auc,
            limit: settings.separation_auc,
        }
        .into());
    }
    // A logged propensity is the one the assignment used: never remapped.
    let (raw_propensity, propensity_maps, recalibration) = if logged.is_none() {
        let (p, maps, report) = recalibrate::last_stage(
            settings.propensity_recalibration,
            &raw_propensity,
            table.treatment(),
            &assignment.fold_of_unit,
            k,
        );
        (p, maps, Some(report))
    } else {
        (raw_propensity, Vec::new(), None)
    };
    let (mu0, mu0_models, outcome_control) =
        choose(&outcome_learners, next()?, y, &control, outcome_task);
    let mu0 = spread(mu0, &mu0_models);
    let (mu1, mu1_models, outcome_treated) =
        choose(&outcome_learners, next()?, y, &treated, outcome_task);
    let mu1 = spread(mu1, &mu1_models);

    let (nuisance, clipped) = Nuisance::from_parts(raw_propensity, mu0, mu1, settings.clip);
    let report = NuisanceReport {
        folds: k,
        seed: settings.seed,
        fold_repeats: 1,
        // Only a cap that drew a sample is recorded: a fit on every unit is
        // the same fit under no cap and under any cap at or above the units,
        // so its report (and its reproduction) is too.
        max_fit_units: sample.and(settings.max_fit_units),
        fitted_units: w.len(),
        units: table.len(),
        propensity: PropensityReport {
            source: if propensity_fit.is_some() {
                "fitted"
            } else {
                "logged"
            },
            fit: propensity_fit,
            recalibration,
            auc: propensity_auc,
            // Filled in by the caller, on the values of every split.
            calibration_error: f64::NAN,
            calibration_noise: f64::NAN,
            clip: settings.clip,
            clipped,
        },
        outcome_control,
        outcome_treated,
    };
    let fitted = FittedNuisance {
        propensity: propensity_models,
        propensity_maps,
        mu0: mu0_models,
        mu1: mu1_models,
        clip: settings.clip,
    };
    Ok((nuisance, report, fitted))
}

/// Rows predicted per task when the units outside a sample are scored.
pub(super) const SPREAD_BLOCK_ROWS: usize = 8192;

/// One component's values for every unit: `fitted[j]` is the out-of-fold
/// value of sample unit `sample[j]`; every other unit `i` gets the
/// prediction of `models[fold_of_unit[i]]`, which was fitted on sample
/// units outside that fold and so never saw it. The rest are predicted in
/// blocks on every worker thread, from their raw feature values (`rows`
/// is never binned).
pub(super) fn spread_to_every_unit(
    fitted: Vec<f64>,
    sample: &[usize],
    fold_of_unit: &[usize],
    models: &[Box<dyn Fitted>],
    rows: &SharedFeatures<'_>,
) -> Vec<f64> {
    spread_columns(
        vec![fitted],
        sample,
        fold_of_unit,
        models.len(),
        |f, block| vec![models[f].predict_rows(rows, block)],
    )
    .pop()
    .unwrap_or_default()
}

/// The shared part of spreading sample values to every unit, for a model
/// with one or several output columns: `fitted[c][j]` is column c's value
/// of sample unit `sample[j]`; every other unit gets, in each column,
/// `predict(fold, block)`'s value from its own fold's model, predicted in
/// blocks of [`SPREAD_BLOCK_ROWS`] on every worker thread.
pub(super) fn spread_columns(
    fitted: Vec<Vec<f64>>,
    sample: &[usize],
    fold_of_unit: &[usize],
    folds: usize,
    predict: impl Fn(usize, &[usize]) -> Vec<Vec<f64>> + Sync,
) -> Vec<Vec<f64>> {
    let n = fold_of_unit.len();
    let mut all: Vec<Vec<f64>> = fitted
        .into_iter()
        .map(|column| {
            let mut spread = vec![f64::NAN; n];
            for (v, &i) in column.into_iter().zip(sample) {
                spread[i] = v;
            }
            spread
        })
        .collect();
    let mut in_sample = vec![false; n];
    for &i in sample {
        in_sample[i] = true;
    }
    for f in 0..folds {
        let rest: Vec<usize> = (0..n)
            .filter(|&i| !in_sample[i] && fold_of_unit[i] == f)
            .collect();
        let blocks: Vec<Vec<Vec<f64>>> = rest
            .par_chunks(SPREAD_BLOCK_ROWS)
            .map(|block| predict(f, block))
            .collect();
        for (block, columns) in rest.chunks(SPREAD_BLOCK_ROWS).zip(blocks) {
            for (column, values) in all.iter_mut().zip(columns) {
                for (&i, v) in block.iter().zip(values) {
                    column[i] = v;
                }
            }
        }
    }
    all
}
