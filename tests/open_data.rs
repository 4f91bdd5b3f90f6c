//! Checks against published results on open data sets shipped by the PyPI
//! package `causaldata` (see tests/data/SOURCES.md; regenerate with
//! tests/data/regenerate.py).

mod common;

use common::{fixture, num, repo_path};
use ndarray::{Array2, ArrayView2};
use plumbline::estimate::crossfit::{fit_nuisance, Nuisance, NuisanceSettings};
use plumbline::estimate::learner::{Linear, Task};
use plumbline::estimate::pseudo::{aipw_ate, aipw_pseudo_outcome, ipw_ate};
use plumbline::estimate::UnitTable;
use plumbline::input::read_units;

/// NSW experiment, Dehejia–Wahba subsample (185 treated, 260 controls).
/// The experimental effect on 1978 earnings is $1,794 (Dehejia & Wahba 1999,
/// the difference in means of the randomized sample). With the known
/// randomized propensity 185/445 and the default cross-fitted outcome models,
/// the AIPW ATE must lie within two of its own standard errors of it.
#[test]
fn nsw_aipw_ate_recovers_the_experimental_benchmark() {
    let units = read_units(&repo_path("tests/data/nsw_mixtape.csv"), None).expect("nsw csv");
    let t = &units.table;
    assert_eq!((t.len(), t.n_treated()), (445, 185));
    let known = vec![185.0 / 445.0; t.len()];
    let table = UnitTable::new(
        t.features().to_owned(),
        t.treatment().to_vec(),
        t.outcome().to_vec(),
        Some(known),
        t.outcome_kind(),
    )
    .expect("table");
    let (nuisance, report) = fit_nuisance(&table, &NuisanceSettings::default()).expect("fit");
    assert_eq!(report.propensity.source, "logged");
    let phi = aipw_pseudo_outcome(table.outcome(), table.treatment(), &nuisance);
    let ate = aipw_ate(&phi);
    eprintln!("NSW AIPW ATE {:.1} (se {:.1})", ate.estimate, ate.se);
    assert!(
        (ate.estimate - 1794.0).abs() < 2.0 * ate.se,
        "AIPW ATE {} (se {}) is more than 2 se from 1794",
        ate.estimate,
        ate.se
    );
    // The same AIPW with in-sample OLS per arm reproduces the statsmodels
    // reference computation (tests/fixtures/nsw_reference.json) to 1e-6.
    let reference = fixture("nsw_reference.json");
    let (mu0, mu1) = per_arm_ols(table.features(), table.treatment(), table.outcome());
    let (n2, _) = Nuisance::from_parts(vec![185.0 / 445.0; table.len()], mu0, mu1, 0.0);
    let phi2 = aipw_pseudo_outcome(table.outcome(), table.treatment(), &n2);
    let ate2 = aipw_ate(&phi2);
    assert!((ate2.estimate - num(&reference["aipw"]["ate"])).abs() < 1e-6);
    assert!((ate2.se - num(&reference["aipw"]["se"])).abs() < 1e-6);
}

/// OLS of the outcome on the features within each arm, predicted for all.
fn per_arm_ols(x: ArrayView2<'_, f64>, w: &[f64], y: &[f64]) -> (Vec<f64>, Vec<f64>) {
    let mut out = Vec::new();
    for arm in [0.0, 1.0] {
        let rows: Vec<usize> = (0..w.len()).filter(|&i| w[i] == arm).collect();
        let xa = x.select(ndarray::Axis(0), &rows);
        let ya: Vec<f64> = rows.iter().map(|&i| y[i]).collect();
        let fit = Linear { alpha: 0.0 }
            .fit_coefficients(xa.view(), &ya, Task::Regression)
            .expect("ols");
        out.push(fit.index(x));
    }
    let mu1 = out.pop().unwrap_or_default();
    let mu0 = out.pop().unwrap_or_default();
    (mu0, mu1)
}

/// The design of Hernán & Robins, Causal Inference: What If, ch. 12–13:
/// sex, race, age, age², education (dummies, level 1 reference), smoking
/// intensity and years with squares, exercise and activity (dummies, level 0
/// reference), baseline weight and its square.
fn nhefs_design(raw: ArrayView2<'_, f64>, names: &[String]) -> Array2<f64> {
    let col = |name: &str| {
        let j = names
            .iter()
            .position(|n| n == name)
            .unwrap_or_else(|| panic!("{name}"));
        raw.column(j).to_vec()
    };
    let (sex, race, age, edu) = (col("sex"), col("race"), col("age"), col("education"));
    let (intensity, years) = (col("smokeintensity"), col("smokeyrs"));
    let (exercise, active, wt) = (col("exercise"), col("active"), col("wt71"));
    let n = sex.len();
    let mut rows = Vec::with_capacity(n * 18);
    let is = |v: f64, k: f64| if v == k { 1.0 } else { 0.0 };
    for i in 0..n {
        rows.extend_from_slice(&[
            sex[i],
            race[i],
            age[i],
            age[i] * age[i],
            is(edu[i], 2.0),
            is(edu[i], 3.0),
            is(edu[i], 4.0),
            is(edu[i], 5.0),
            intensity[i],
            intensity[i] * intensity[i],
            years[i],
            years[i] * years[i],
            is(exercise[i], 1.0),
            is(exercise[i], 2.0),
            is(active[i], 1.0),
            is(active[i], 2.0),
            wt[i],
            wt[i] * wt[i],
        ]);
    }
    Array2::from_shape_vec((n, 18), rows).expect("design")
}

/// NHEFS: effect of quitting smoking on weight gain (kg). Published: IP
/// weighting 3.4 (95% CI 2.4 to 4.5), standardization 3.5 (Hernán & Robins,
/// What If, ch. 12–13). With the book's parametric models fitted in-sample
/// and the outcome fitted per arm, AIPW must lie in 3.4 ± 0.15.
#[test]
fn nhefs_parametric_aipw_and_ipw_match_the_book() {
    let units = read_units(&repo_path("tests/data/nhefs_complete.csv"), None).expect("nhefs");
    let t = &units.table;
    assert_eq!(t.len(), 1566);
    let design = nhefs_design(t.features(), &units.feature_names);
    let (w, y) = (t.treatment(), t.outcome());

    let ps = Linear { alpha: 0.0 }
        .fit_coefficients(design.view(), w, Task::Classification)
        .expect("propensity");
    let reference = fixture("nhefs_reference.json");
    let ref_coef = &reference["propensity_model"]["coef"];
    assert!((ps.intercept - num(&ref_coef["intercept"])).abs() < 1e-4);
    assert!((ps.coef[17] - num(&ref_coef["wt71_sq"])).abs() < 1e-6);
    let e: Vec<f64> = plumbline::estimate::learner::Fitted::predict(&ps, design.view());

    let ipw = ipw_ate(y, w, &e);
    let (lo, hi) = ipw.interval(0.95);
    eprintln!(
        "NHEFS IPW {:.3} (95% CI {:.3} to {:.3})",
        ipw.estimate, lo, hi
    );
    let one_decimal = |v: f64| (v * 10.0).round() / 10.0;
    assert_eq!(one_decimal(ipw.estimate), 3.4);
    assert_eq!((one_decimal(lo), one_decimal(hi)), (2.4, 4.5));
    // And to 1e-4 against the statsmodels computation of the same estimator.
    assert!((ipw.estimate - num(&reference["ipw"]["ate"])).abs() < 1e-4);
    assert!((ipw.se - num(&reference["ipw"]["se_robust"])).abs() < 1e-4);

    let (mu0, mu1) = per_arm_ols(design.view(), w, y);
    let (nuisance, clipped) = Nuisance::from_parts(e, mu0, mu1, 0.0);
    assert_eq!(clipped, 0);
    let ate = aipw_ate(&aipw_pseudo_outcome(y, w, &nuisance));
    eprintln!(
        "NHEFS parametric AIPW {:.4} (se {:.4})",
        ate.estimate, ate.se
    );
    assert!((ate.estimate - 3.4).abs() <= 0.15, "AIPW {}", ate.estimate);
    assert!((ate.estimate - num(&reference["aipw"]["ate"])).abs() < 1e-4);
}

/// The default cross-fitted pipeline on the raw NHEFS covariates must land
/// inside the published IP-weighting CI (2.4 to 4.5).
#[test]
fn nhefs_default_pipeline_lands_inside_the_published_interval() {
    let units = read_units(&repo_path("tests/data/nhefs_complete.csv"), None).expect("nhefs");
    let t = &units.table;
    let (nuisance, report) = fit_nuisance(t, &NuisanceSettings::default()).expect("fit");
    let ate = aipw_ate(&aipw_pseudo_outcome(t.outcome(), t.treatment(), &nuisance));
    eprintln!(
        "NHEFS cross-fitted AIPW {:.3} (se {:.3}); propensity {} AUC {:.3}, outcomes {} / {}",
        ate.estimate,
        ate.se,
        report
            .propensity
            .fit
            .as_ref()
            .map(|f| f.learner.as_str())
            .unwrap_or("logged"),
        report.propensity.auc,
        report.outcome_control.learner,
        report.outcome_treated.learner
    );
    assert!(
        ate.estimate > 2.4 && ate.estimate < 4.5,
        "ATE {}",
        ate.estimate
    );
}
