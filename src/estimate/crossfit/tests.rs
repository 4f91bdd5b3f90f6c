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

// ---- A cap on the units the models are fitted on ----

use crate::estimate::learner::Fitted;
use crate::synth::{draw, Design};
use ndarray::ArrayView2;

fn synth_table(design: Design, n: usize, seed: u64) -> (UnitTable, Vec<f64>) {
    let d = draw(design, n, 5, 1.0, seed);
    let table = UnitTable::new(
        d.features,
        d.treatment,
        d.outcome,
        None,
        OutcomeKind::Continuous,
    )
    .expect("table");
    (table, d.tau)
}

fn capped(max_fit_units: Option<usize>) -> NuisanceSettings {
    NuisanceSettings {
        seed: 11,
        max_fit_units,
        ..NuisanceSettings::default()
    }
}

#[test]
fn a_cap_at_or_above_the_units_changes_nothing() {
    // The default library (linear, quadratic, boosted) on a nonlinear
    // design: any change in folds, rows or seeds would move the values.
    let n = 1500;
    let (t, _) = synth_table(Design::NieWagerD, n, 5);
    let (uncapped, report, _) = fit_nuisance_models(&t, &capped(None)).expect("fit");
    assert_eq!((report.fitted_units, report.units), (n, n));
    for cap in [n, n + 1, 2_000_000] {
        let (values, r, _) = fit_nuisance_models(&t, &capped(Some(cap))).expect("fit");
        assert_eq!(values.propensity, uncapped.propensity, "cap {cap}");
        assert_eq!(values.mu0, uncapped.mu0, "cap {cap}");
        assert_eq!(values.mu1, uncapped.mu1, "cap {cap}");
        // A cap that drew no sample is not recorded: the whole report is
        // the uncapped one, losses bit for bit.
        assert_eq!(r.max_fit_units, None);
        assert_eq!((r.fitted_units, r.units), (n, n));
        assert_eq!(
            serde_json::to_value(&r).expect("json"),
            serde_json::to_value(&report).expect("json"),
            "cap {cap}"
        );
    }
}

#[test]
fn the_sample_is_stratified_seeded_and_leaves_the_folds_alone() {
    // 1,000 treated of 3,001: a cap of 1,200 takes round(1200 x 1000 /
    // 3001) = round(399.87) = 400 treated and 800 control units.
    let w: Vec<f64> = (0..3001)
        .map(|i| if i % 3 == 1 && i < 3000 { 1.0 } else { 0.0 })
        .collect();
    assert_eq!(w.iter().filter(|&&v| v == 1.0).count(), 1000);
    let a = assign_fit(&w, 5, 7, Some(1200), 15);
    assert_eq!(a.fold_of_unit, assign_folds(&w, 5, 7));
    let sample = a.sample.clone().expect("a sample");
    assert_eq!(sample.len(), 1200);
    assert!(sample.windows(2).all(|p| p[0] < p[1]), "in unit order");
    let treated = sample.iter().filter(|&&i| w[i] == 1.0).count();
    assert_eq!(treated, 400);
    // Spread evenly over the folds: 80 treated and 160 control in each.
    for f in 0..5 {
        for (arm, expected) in [(0.0, 160), (1.0, 80)] {
            let in_fold = sample
                .iter()
                .filter(|&&i| a.fold_of_unit[i] == f && w[i] == arm)
                .count();
            assert_eq!(in_fold, expected, "fold {f}, arm {arm}");
        }
    }
    assert_eq!(a, assign_fit(&w, 5, 7, Some(1200), 15), "reproducible");
    assert_ne!(a.sample, assign_fit(&w, 5, 8, Some(1200), 15).sample);
    // A cap at or above the units draws no sample.
    assert_eq!(assign_fit(&w, 5, 7, Some(3001), 15).sample, None);
    assert_eq!(assign_fit(&w, 5, 7, None, 15).sample, None);
    // A rare arm widens the sample (proportionally) until each of its
    // folds can be fitted: 20 treated of 10,000 under a cap of 1,000 would
    // get 2; 15 need a sample of 15 x 10,000 / 20 = 7,500.
    assert_eq!(
        folds::sample_sizes(&[9_980, 20], 1_000, 15),
        Some(vec![7_485, 15])
    );
    assert_eq!(folds::sample_sizes(&[9_980, 20], 10_000, 15), None);
}

/// A learner that remembers which units it was fitted on (feature 0 is
/// the unit's index) and whose predictions say so: for regression the sum
/// of the indices it was fitted on, plus 1e12 for a unit among them; for
/// classification a probability in [0.25, 0.75] made from that sum, or
/// 0.999 for a unit among them. So every value names the model it came
/// from and whether that model saw the unit.
#[derive(Debug, Clone, Copy)]
struct Memorizer;

struct Memorized {
    seen: std::collections::HashSet<usize>,
    task: Task,
}

fn memorized_value(task: Task, id_sum: usize, saw: bool) -> f64 {
    match (task, saw) {
        (Task::Regression, false) => id_sum as f64,
        (Task::Regression, true) => id_sum as f64 + 1e12,
        (Task::Classification, false) => 0.25 + 0.5 * ((id_sum % 997) as f64 / 997.0),
        (Task::Classification, true) => 0.999,
    }
}

impl Fitted for Memorized {
    fn predict(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let id_sum: usize = self.seen.iter().sum();
        x.outer_iter()
            .map(|row| {
                let saw = self.seen.contains(&(row[0] as usize));
                memorized_value(self.task, id_sum, saw)
            })
            .collect()
    }
}

impl Learner for Memorizer {
    fn name(&self) -> &'static str {
        "memorizer"
    }
    fn check(&self) -> Result<(), EstimateError> {
        Ok(())
    }
    fn boxed_clone(&self) -> Box<dyn Learner> {
        Box::new(*self)
    }
    fn fit(
        &self,
        x: ArrayView2<'_, f64>,
        _y: &[f64],
        task: Task,
        _seed: u64,
    ) -> Result<Box<dyn Fitted>, EstimateError> {
        let seen = x.outer_iter().map(|row| row[0] as usize).collect();
        Ok(Box::new(Memorized { seen, task }))
    }
}

#[test]
fn a_capped_fit_trains_on_the_sample_and_scores_every_unit_out_of_fold() {
    let n = 3000;
    let cap = 1000;
    let (t, _) = synth_table(Design::NieWagerD, n, 9);
    // Feature 0 is the unit's index, for the memorizer; feature 1 noise.
    let x: Vec<f64> = (0..n)
        .flat_map(|i| [i as f64, ((i * 7919) % 101) as f64])
        .collect();
    let t = UnitTable::new(
        ndarray::Array2::from_shape_vec((n, 2), x).expect("shape"),
        t.treatment().to_vec(),
        t.outcome().to_vec(),
        None,
        OutcomeKind::Continuous,
    )
    .expect("table");
    let settings = NuisanceSettings {
        propensity_learners: vec![Box::new(Memorizer)],
        outcome_learners: vec![Box::new(Memorizer)],
        // The raw values, so that each is its fold model's own prediction
        // (a recalibration map would move them).
        propensity_recalibration: RecalibrationChoice::Fixed(Recalibration::Raw),
        ..capped(Some(cap))
    };
    let (values, report, fitted) = fit_nuisance_models(&t, &settings).expect("fit");
    let w = t.treatment();
    let n1 = w.iter().filter(|&&v| v == 1.0).count();

    // The sample the fit drew: exactly the cap, the treated share kept.
    let a = assign_fit(w, 5, 11, Some(cap), 15);
    let sample = a.sample.expect("a sample");
    assert_eq!(sample.len(), cap);
    let treated = sample.iter().filter(|&&i| w[i] == 1.0).count();
    assert_eq!(treated, (2 * cap * n1 + n) / (2 * n), "round(cap n1 / n)");
    assert_eq!((report.fitted_units, report.units), (cap, n));
    assert_eq!(report.max_fit_units, Some(cap));
    assert_eq!(report.outcome_treated.units, treated);
    assert_eq!(report.outcome_control.units, cap - treated);
    assert_eq!(fitted.mu0.len(), 5);

    // Fold f's models are fitted on the sample's units outside fold f
    // (of one arm, for an outcome model); unit i is scored by the models
    // of its own fold.
    let fitted_on = |f: usize, arm: Option<f64>| -> Vec<usize> {
        sample
            .iter()
            .copied()
            .filter(|&j| a.fold_of_unit[j] != f && arm.is_none_or(|v| w[j] == v))
            .collect()
    };
    let training: Vec<[Vec<usize>; 3]> = (0..5)
        .map(|f| {
            [
                fitted_on(f, None),
                fitted_on(f, Some(0.0)),
                fitted_on(f, Some(1.0)),
            ]
        })
        .collect();
    // Over the folds, the propensity's models saw exactly the sample.
    let mut union: Vec<usize> = training.iter().flat_map(|t| t[0].clone()).collect();
    union.sort_unstable();
    union.dedup();
    assert_eq!(union, sample);
    let (mut outside, mut inside) = (0, 0);
    for i in 0..n {
        let f = a.fold_of_unit[i];
        let [p, c, tr] = &training[f];
        // Straight from the assignment: the models of i's fold never saw i.
        assert!(!p.contains(&i) && !c.contains(&i) && !tr.contains(&i));
        // And the values are those models' predictions for a unit they did
        // not see (a seen unit would carry 1e12, or 0.999 -> 0.99).
        let sum = |v: &Vec<usize>| v.iter().sum::<usize>();
        let expected = [
            memorized_value(Task::Classification, sum(p), false),
            memorized_value(Task::Regression, sum(c), false),
            memorized_value(Task::Regression, sum(tr), false),
        ];
        let got = [values.propensity[i], values.mu0[i], values.mu1[i]];
        assert!(got.iter().all(|v| v.is_finite()), "unit {i}: {got:?}");
        assert_eq!(got, expected, "unit {i}");
        if sample.binary_search(&i).is_ok() {
            inside += 1;
        } else {
            outside += 1;
        }
    }
    assert_eq!((inside, outside), (cap, n - cap));
    // Units arriving later get the average of the five fold models, none
    // of which saw them.
    let later = ndarray::Array2::from_shape_vec((1, 2), vec![n as f64, 0.0]).expect("row");
    let (next, _) = fitted.predict(later.view(), None).expect("predict");
    let mean: f64 = training
        .iter()
        .map(|t| t[1].iter().sum::<usize>() as f64)
        .sum::<f64>()
        / 5.0;
    assert!(
        (next.mu0[0] - mean).abs() < 1e-6,
        "{} vs {mean}",
        next.mu0[0]
    );
}

/// Mean and standard deviation.
fn mean_sd(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, var.sqrt())
}

/// The corrected estimates stay unbiased when the nuisance models are
/// fitted on a quarter of the units: the AIPW ATE, and the difference of
/// corrected PEHE between two candidate models (c_k - c_j equals
/// (phi - tau_k)^2 - (phi - tau_j)^2, so its mean is computed from the
/// pseudo-outcomes directly). Both are checked against the truth of each
/// draw (the mean of tau, and the mean of (tau_k - tau)^2 - (tau_j - tau)^2,
/// over its units), which removes the draw-to-draw spread of the truth
/// from the comparison.
///
/// Nie & Wager setup D (propensity and outcomes both nonlinear, so both
/// nuisance errors are real and their product, the bias term, is not
/// zero by construction), n = 2,000 and a cap of 500, with the default
/// library.
///
/// Replications: 200. The Monte Carlo standard error of a mean error is
/// the errors' sd over sqrt(200), about 0.07 of one estimate's own sd; the
/// check fails at 4 Monte Carlo standard errors (a chance of 6e-5 were the
/// estimates exactly unbiased), so it catches a bias of about 0.3 of an
/// estimate's standard error, the size at which a 95% confidence
/// interval's coverage falls to about 94%.
///
/// Every fourth replication is also fitted without the cap (50 pairs, to
/// keep the test's time modest). The standard errors are computed from
/// every unit, so they stay close to the uncapped ones: the check allows
/// 25%, half way to the factor of 2 (sqrt of 4) that an estimate from the
/// sample alone would have; here they are about 10% wider, the noisier
/// propensities' weights. The spread of the capped estimates is printed
/// beside the uncapped ones': at this small size the models fitted on 400
/// units per fold add noise of their own (the product of the nuisance
/// errors varies from fit to fit and does not shrink with the units
/// scored), about 1.4 times the uncapped spread here, and 1.2 times at
/// 8,000 units with a cap of 2,000 (60 draws, run once by hand with the
/// sizes below changed).
#[test]
fn capped_fits_keep_the_corrected_estimates_unbiased() {
    use crate::estimate::pseudo::{aipw_ate, aipw_pseudo_outcome};
    use crate::estimate::stats::mean_se;
    use crate::synth::{candidates, effect_moments};

    const REPLICATIONS: u64 = 200;
    const UNCAPPED_EVERY: u64 = 4;
    let (n, cap) = (2000, 500);
    let design = Design::NieWagerD;
    let (_, var_tau) = effect_moments(design, 20_000, 1);
    let started = std::time::Instant::now();
    let (mut ate_error, mut ate_se) = (Vec::new(), Vec::new());
    let (mut difference_error, mut difference_se) = (Vec::new(), Vec::new());
    // (capped error, capped se, uncapped error, uncapped se) of the ATE.
    let mut paired: Vec<[f64; 4]> = Vec::new();
    for r in 0..REPLICATIONS {
        let d = draw(design, n, 5, 1.0, 10_000 + r);
        let models = candidates(&d.tau, var_tau, 2, r);
        let (k, j) = (
            &models[0].predictions.effects,
            &models[1].predictions.effects,
        );
        let table = UnitTable::new(
            d.features.clone(),
            d.treatment.clone(),
            d.outcome.clone(),
            None,
            OutcomeKind::Continuous,
        )
        .expect("table");
        let fit = |cap: Option<usize>| {
            let settings = NuisanceSettings {
                seed: r,
                max_fit_units: cap,
                ..NuisanceSettings::default()
            };
            let (nuisance, report) = fit_nuisance(&table, &settings).expect("fit");
            (
                aipw_pseudo_outcome(&d.outcome, &d.treatment, &nuisance),
                report,
            )
        };
        let (phi, report) = fit(Some(cap));
        assert_eq!((report.fitted_units, report.units), (cap, n));
        let true_ate = d.tau.iter().sum::<f64>() / n as f64;
        let ate = aipw_ate(&phi);
        ate_error.push(ate.estimate - true_ate);
        ate_se.push(ate.se);
        let per_unit = |f: &dyn Fn(usize) -> f64| -> Vec<f64> { (0..n).map(f).collect() };
        let difference = mean_se(&per_unit(&|i| {
            (phi[i] - k[i]).powi(2) - (phi[i] - j[i]).powi(2)
        }));
        let true_difference = per_unit(&|i| (k[i] - d.tau[i]).powi(2) - (j[i] - d.tau[i]).powi(2))
            .iter()
            .sum::<f64>()
            / n as f64;
        difference_error.push(difference.estimate - true_difference);
        difference_se.push(difference.se);
        if r % UNCAPPED_EVERY == 0 {
            let uncapped = aipw_ate(&fit(None).0);
            paired.push([
                ate.estimate - true_ate,
                ate.se,
                uncapped.estimate - true_ate,
                uncapped.se,
            ]);
        }
    }
    let root_r = (REPLICATIONS as f64).sqrt();
    for (what, errors, ses) in [
        ("AIPW ATE", &ate_error, &ate_se),
        (
            "corrected PEHE difference (sharp minus shrunk)",
            &difference_error,
            &difference_se,
        ),
    ] {
        let (bias, sd) = mean_sd(errors);
        let monte_carlo_se = sd / root_r;
        let (typical_se, _) = mean_sd(ses);
        println!(
            "{what}, cap {cap} of {n} units, {REPLICATIONS} draws: mean error {bias:+.4} \
             (Monte Carlo se {monte_carlo_se:.4}, so {:+.2} of them; {:+.3} of an estimate's \
             se {typical_se:.4}); sd of the errors {sd:.4}",
            bias / monte_carlo_se,
            bias / typical_se,
        );
        assert!(
            bias.abs() < 4.0 * monte_carlo_se,
            "{what}: mean error {bias} against a Monte Carlo se of {monte_carlo_se}"
        );
    }
    let column = |c: usize| -> Vec<f64> { paired.iter().map(|p| p[c]).collect() };
    let (capped_bias, capped_sd) = mean_sd(&column(0));
    let (uncapped_bias, uncapped_sd) = mean_sd(&column(2));
    let (capped_se, uncapped_se) = (mean_sd(&column(1)).0, mean_sd(&column(3)).0);
    println!(
        "AIPW ATE on the {} draws fitted both ways: mean error capped {capped_bias:+.4}, \
         uncapped {uncapped_bias:+.4}; mean se capped / uncapped {:.3}; sd of the errors \
         capped / uncapped {:.3}; {:.1} s in all",
        paired.len(),
        capped_se / uncapped_se,
        capped_sd / uncapped_sd,
        started.elapsed().as_secs_f64()
    );
    assert!(
        capped_se / uncapped_se < 1.25,
        "{capped_se} vs {uncapped_se}"
    );
}

/// Repeated cross-fitting: each unit's values are the mean of the single
/// splits' values, the first split is the one-split fit, and the report
/// says how many splits there were.
#[test]
fn repeated_splits_average_the_single_splits() {
    let t = linear_signal(600);
    let one = |seed: u64| {
        fit_nuisance(
            &t,
            &NuisanceSettings {
                seed,
                fold_repeats: 1,
                ..with_learners(None)
            },
        )
        .expect("fit")
    };
    let (repeated, report) = fit_nuisance(
        &t,
        &NuisanceSettings {
            seed: 4,
            fold_repeats: 3,
            ..with_learners(None)
        },
    )
    .expect("fit");
    assert_eq!(report.fold_repeats, 3);
    let splits: Vec<Nuisance> = (0..3usize).map(|s| one(split_seed(4, s)).0).collect();
    // Different splits give different values, or the test could not tell
    // an average from a copy.
    assert_ne!(splits[0].mu0, splits[1].mu0);
    for (i, mu0) in repeated.mu0.iter().enumerate() {
        let mean = splits.iter().map(|s| s.mu0[i]).sum::<f64>() / 3.0;
        // Summation order differs from the mean taken here only in the
        // last bits: 1e-12 of values of order 10.
        assert!((mu0 - mean).abs() < 1e-12, "unit {i}: {mu0} vs {mean}");
        let p = splits.iter().map(|s| s.propensity[i]).sum::<f64>() / 3.0;
        assert!((repeated.propensity[i] - p).abs() < 1e-12);
    }
    for bad in [0, settings::MAX_FOLD_REPEATS + 1] {
        let s = NuisanceSettings {
            fold_repeats: bad,
            ..NuisanceSettings::default()
        };
        assert!(s.check().is_err(), "{bad} splits accepted");
    }
}

/// The binned calibration error: exact on a propensity that is off by a
/// known amount, and near its noise level on a calibrated one.
#[test]
fn calibration_error_measures_the_gap_and_its_noise() {
    // Every propensity 0.3, half the units treated in every bin: the gap
    // is 0.2 in every bin; the noise is sqrt(2 / pi) sqrt(0.21 / 100).
    let p = vec![0.3; 1000];
    let w: Vec<f64> = (0..1000).map(|i| (i % 2) as f64).collect();
    let (error, noise) = binned_calibration(&p, &w, 10);
    assert!((error - 0.2).abs() < 1e-12, "{error}");
    let expected = (2.0 / std::f64::consts::PI).sqrt() * (0.21f64 / 100.0).sqrt();
    assert!((noise - expected).abs() < 1e-12, "{noise}");
    // Treated with the propensity they claim (a seeded draw): over 20,000
    // units, ten bins of 2,000, the error is the mean of ten |normal|s of
    // mean `noise` each, so it lies between 0.25 and 2 times it but for a
    // chance of about 1.5e-4 (a simulation of 2 million means of ten
    // half-normals: 2.2e-5 below, 1.2e-4 above).
    use rand::{Rng, SeedableRng};
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
    let p: Vec<f64> = (0..20_000).map(|_| rng.gen_range(0.1..0.9)).collect();
    let w: Vec<f64> = p
        .iter()
        .map(|&e| f64::from(u8::from(rng.gen::<f64>() < e)))
        .collect();
    let (error, noise) = binned_calibration(&p, &w, 10);
    assert!(
        error < 2.0 * noise && error > 0.25 * noise,
        "{error} vs {noise}"
    );
}
