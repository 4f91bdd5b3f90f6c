//! Cross-fitting: stratified folds, the named degenerate states, and a
//! screening that drops a hopeless learner without changing the fit.

use super::*;

#[test]
fn folds_are_stratified_and_reproducible() {
    let w: Vec<f64> = (0..103)
        .map(|i| if i % 3 == 0 { 1.0 } else { 0.0 })
        .collect();
    let a = assign_folds(&w, 5, 7);
    assert_eq!(a, assign_folds(&w, 5, 7));
    assert_ne!(a, assign_folds(&w, 5, 8));
    for f in 0..5 {
        let treated = (0..w.len()).filter(|&i| a[i] == f && w[i] == 1.0).count();
        // 35 treated over 5 folds: exactly 7 each.
        assert_eq!(treated, 7);
    }
}

fn table(x: Vec<f64>, w: Vec<f64>, y: Vec<f64>) -> UnitTable {
    let n = w.len();
    let x = ndarray::Array2::from_shape_vec((n, x.len() / n), x).expect("shape");
    UnitTable::new(x, w, y, None, OutcomeKind::Continuous).expect("table")
}

#[test]
fn degenerate_data_gets_named_states() {
    let n = 60;
    let x: Vec<f64> = (0..n).map(|i| i as f64).collect();
    let y: Vec<f64> = (0..n).map(|i| (i % 7) as f64).collect();
    let settings = NuisanceSettings::default();
    let state = |t: &UnitTable| match fit_nuisance(t, &settings) {
        Err(EstimateError::Degenerate(d)) => d,
        other => panic!("expected a degenerate state, got {:?}", other.map(|_| ())),
    };
    // Treated exactly when x >= 200 of 400: the propensity separates
    // the arms (out-of-fold AUC 0.999 here).
    let big = 400;
    let bx: Vec<f64> = (0..big).map(|i| i as f64).collect();
    let by: Vec<f64> = (0..big).map(|i| (i % 7) as f64).collect();
    let bw: Vec<f64> = (0..big).map(|i| if i >= 200 { 1.0 } else { 0.0 }).collect();
    assert!(matches!(
        state(&table(bx, bw, by)),
        Degenerate::SeparatedArms { .. }
    ));
    // Nobody treated.
    assert!(matches!(
        state(&table(x.clone(), vec![0.0; n], y.clone())),
        Degenerate::EmptyArm { .. }
    ));
    // Alternating arms but a constant outcome.
    let alt: Vec<f64> = (0..n).map(|i| (i % 2) as f64).collect();
    assert!(matches!(
        state(&table(x.clone(), alt.clone(), vec![2.5; n])),
        Degenerate::ConstantOutcome { .. }
    ));
    // Only 10 treated: 5 folds need at least 3 per fold, 15 in all.
    let few: Vec<f64> = (0..n).map(|i| if i % 6 == 0 { 1.0 } else { 0.0 }).collect();
    assert!(matches!(
        state(&table(x, few, y)),
        Degenerate::TooFewUnitsPerFold {
            needed: 15,
            units: 10,
            ..
        }
    ));
}

/// A linear signal with a strong slope: the constant learner is far
/// behind the linear one on every fold.
fn linear_signal(n: usize) -> UnitTable {
    let x: Vec<f64> = (0..n).map(|i| ((i * 7919) % 1000) as f64 / 100.0).collect();
    let w: Vec<f64> = (0..n).map(|i| ((i * 31) % 2) as f64).collect();
    let y: Vec<f64> = x
        .iter()
        .enumerate()
        .map(|(i, v)| 2.0 * v + ((i * 104_729) % 97) as f64 / 97.0)
        .collect();
    table(x, w, y)
}

fn with_learners(screening_z: Option<f64>) -> NuisanceSettings {
    use crate::estimate::learner::{Constant, Linear};
    NuisanceSettings {
        propensity_learners: vec![Box::new(Constant), Box::new(Linear::default())],
        outcome_learners: vec![Box::new(Constant), Box::new(Linear::default())],
        screening_z,
        ..NuisanceSettings::default()
    }
}

#[test]
fn screening_drops_a_hopeless_learner_without_changing_the_fit() {
    let t = linear_signal(2000);
    let (screened, report) = fit_nuisance(&t, &with_learners(Some(4.0))).expect("fit");
    let (full, full_report) = fit_nuisance(&t, &with_learners(None)).expect("fit");
    for (c, f) in [
        (&report.outcome_control, &full_report.outcome_control),
        (&report.outcome_treated, &full_report.outcome_treated),
    ] {
        assert_eq!(c.learner, "linear");
        assert_eq!(c.oof_loss, f.oof_loss);
        // The constant learner's first-fold loss is about the variance
        // of 2x, 4 x 100 / 12 = 33.3, against 1/12 for linear. Its
        // per-unit excess (2x - 10)^2 has sd about 30, so over the
        // first fold's ~200 units of an arm z is near 33 / (30 / 14).
        let constant = &c.candidates[0];
        let z = constant.screened_out_z.expect("constant screened out");
        assert!(z > 10.0, "z = {z}");
        assert!(
            constant.oof_loss > 25.0 && constant.oof_loss < 42.0,
            "{}",
            constant.oof_loss
        );
        assert!(f.candidates.iter().all(|c| c.screened_out_z.is_none()));
    }
    // The chosen fits are the same fits: identical nuisance values.
    assert_eq!(screened.mu0, full.mu0);
    assert_eq!(screened.mu1, full.mu1);
    assert_eq!(screened.propensity, full.propensity);
}

#[test]
fn screening_keeps_learners_that_are_close() {
    // The treatment alternates with i, so no learner can predict it:
    // constant and linear are within noise of each other on the first
    // fold and both are fitted on every fold.
    let t = linear_signal(2000);
    let (_, report) = fit_nuisance(&t, &with_learners(Some(4.0))).expect("fit");
    let fit = report.propensity.fit.expect("fitted propensity");
    assert!(fit.candidates.iter().all(|c| c.screened_out_z.is_none()));
}

#[test]
fn screening_z_must_be_positive() {
    for z in [0.0, -1.0, f64::NAN] {
        let s = NuisanceSettings {
            screening_z: Some(z),
            ..NuisanceSettings::default()
        };
        assert!(s.check().is_err(), "{z}");
    }
}

#[test]
fn clipping_counts_clipped_units() {
    let (n, clipped) =
        Nuisance::from_parts(vec![0.001, 0.5, 0.999], vec![0.0; 3], vec![0.0; 3], 0.01);
    assert_eq!(clipped, 2);
    assert_eq!(n.propensity, vec![0.01, 0.5, 0.99]);
}
