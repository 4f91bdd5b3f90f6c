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
//! (which unit is held out where), `fitting.rs` (every fold fit of every
//! learner as one queue over the worker threads), `screen.rs` (dropping a
//! hopeless learner after the first fold), `choose.rs` (the learner each
//! component keeps), `nuisance.rs` (the per-unit values), `report.rs` (what
//! the fit reports) and `fold_models.rs` (the kept fold models, which score
//! units that arrive later).

mod choose;
mod fitting;
mod fold_models;
mod folds;
mod nuisance;
mod report;
mod screen;
mod settings;

#[cfg(test)]
mod tests;

use super::data::{FeatureRows, OutcomeKind, UnitTable};
use super::error::{Degenerate, EstimateError};
use super::learner::{default_library, Learner, SharedFeatures, Task};
use super::stats::auc;

pub use fold_models::FittedNuisance;
pub use folds::assign_folds;
pub use nuisance::Nuisance;
pub use report::{CandidateLoss, ComponentReport, NuisanceReport, PropensityReport};
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
pub fn fit_nuisance_models_on(
    table: &UnitTable,
    features: FeatureRows<'_>,
    settings: &NuisanceSettings,
) -> Result<(Nuisance, NuisanceReport, FittedNuisance), EstimateError> {
    settings.check()?;
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
    let x = &SharedFeatures::new(features);
    let w = table.treatment();
    let y = table.outcome();
    let fold_of_unit = assign_folds(w, k, settings.seed);
    let folds = Folds {
        of_unit: &fold_of_unit,
        count: k,
    };
    let everyone = vec![true; table.len()];
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
            seed: settings.seed,
        });
    }
    for (arm, mask) in [(0u64, &control), (1, &treated)] {
        components.push(Component {
            target: y,
            train_mask: mask,
            learners: &outcome_learners,
            task: outcome_task,
            seed: settings.seed.wrapping_add(1 + arm),
        });
    }
    for learner in propensity_learners.iter().chain(&outcome_learners) {
        learner.prepare(x);
    }
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
            (p, Some(report), Some(models))
        }
    };
    let propensity_auc = auc(&raw_propensity, w);
    if propensity_auc >= settings.separation_auc {
        return Err(Degenerate::SeparatedArms {
            auc: propensity_auc,
            limit: settings.separation_auc,
        }
        .into());
    }
    let (mu0, mu0_models, outcome_control) =
        choose(&outcome_learners, next()?, y, &control, outcome_task);
    let (mu1, mu1_models, outcome_treated) =
        choose(&outcome_learners, next()?, y, &treated, outcome_task);

    let (nuisance, clipped) = Nuisance::from_parts(raw_propensity, mu0, mu1, settings.clip);
    let report = NuisanceReport {
        folds: k,
        seed: settings.seed,
        propensity: PropensityReport {
            source: if propensity_fit.is_some() {
                "fitted"
            } else {
                "logged"
            },
            fit: propensity_fit,
            auc: propensity_auc,
            clip: settings.clip,
            clipped,
        },
        outcome_control,
        outcome_treated,
    };
    let fitted = FittedNuisance {
        propensity: propensity_models,
        mu0: mu0_models,
        mu1: mu1_models,
        clip: settings.clip,
    };
    Ok((nuisance, report, fitted))
}
