//! Linear learners against general-purpose reference libraries.
//!
//! Fixtures come from `tests/fixtures/regenerate_fixtures.py` (statsmodels
//! 0.15 and scikit-learn 1.9 from PyPI, versions recorded in each file).
//! Tolerance 1e-4 on every coefficient, as the estimation issue asks; our
//! solvers stop far closer than that.

mod common;

use common::{fixture, matrix, num, nums};
use plumbline::estimate::learner::{logistic_fit, ridge_fit, Linear, Task};

const TOL: f64 = 1e-4;

fn assert_close(what: &str, got: &[f64], want: &[f64]) {
    assert_eq!(got.len(), want.len(), "{what}: length");
    for (j, (g, w)) in got.iter().zip(want).enumerate() {
        assert!((g - w).abs() < TOL, "{what}[{j}]: {g} vs reference {w}");
    }
}

#[test]
fn unpenalized_logistic_matches_statsmodels_logit() {
    let f = fixture("logistic_reference.json");
    let x = matrix(&f["x"]);
    let y = nums(&f["y"]);
    let r = &f["fits"]["statsmodels_logit"];
    let fit = logistic_fit(x.view(), &y, 0.0).expect("fit");
    assert_close("intercept", &[fit.intercept], &[num(&r["intercept"])]);
    assert_close("coef", &fit.coef, &nums(&r["coef"]));
    // The standardizing learner reaches the same maximum likelihood fit.
    let scaled = Linear { alpha: 0.0 }
        .fit_coefficients(x.view(), &y, Task::Classification)
        .expect("fit");
    assert_close("scaled coef", &scaled.coef, &nums(&r["coef"]));
}

#[test]
fn l2_logistic_matches_scikit_learn() {
    let f = fixture("logistic_reference.json");
    let x = matrix(&f["x"]);
    let y = nums(&f["y"]);
    let r = &f["fits"]["sklearn_l2"];
    // scikit-learn minimizes |b|^2/2 + C * loss, i.e. loss + |b|^2 / (2C).
    let alpha = 1.0 / num(&r["C"]);
    let fit = logistic_fit(x.view(), &y, alpha).expect("fit");
    assert_close("intercept", &[fit.intercept], &[num(&r["intercept"])]);
    assert_close("coef", &fit.coef, &nums(&r["coef"]));
}

#[test]
fn ols_matches_statsmodels_and_ridge_matches_scikit_learn() {
    let f = fixture("ridge_reference.json");
    let x = matrix(&f["x"]);
    let y = nums(&f["y"]);
    let ols = &f["fits"]["statsmodels_ols"];
    let fit = ridge_fit(x.view(), &y, 0.0).expect("ols");
    assert_close("ols intercept", &[fit.intercept], &[num(&ols["intercept"])]);
    assert_close("ols coef", &fit.coef, &nums(&ols["coef"]));

    let ridge = &f["fits"]["sklearn_ridge"];
    let fit = ridge_fit(x.view(), &y, num(&ridge["alpha"])).expect("ridge");
    assert_close(
        "ridge intercept",
        &[fit.intercept],
        &[num(&ridge["intercept"])],
    );
    assert_close("ridge coef", &fit.coef, &nums(&ridge["coef"]));
}

/// Swapping the labels must negate the fit: the solver's internal class
/// order (majority first) must never leak into P(Y = 1).
#[test]
fn logistic_models_the_event_whichever_label_is_the_majority() {
    let f = fixture("logistic_reference.json");
    let x = matrix(&f["x"]);
    let y: Vec<f64> = nums(&f["y"]).iter().map(|v| 1.0 - v).collect();
    let r = &f["fits"]["statsmodels_logit"];
    let fit = logistic_fit(x.view(), &y, 0.0).expect("fit");
    assert_close("intercept", &[-fit.intercept], &[num(&r["intercept"])]);
    let negated: Vec<f64> = fit.coef.iter().map(|b| -b).collect();
    assert_close("coef", &negated, &nums(&r["coef"]));
}

/// The multinomial logit against statsmodels' `MNLogit` (base category 0,
/// unpenalized maximum likelihood): every coefficient and the fitted
/// probabilities of the first 50 units agree to 1e-4 (the bar;
/// both solvers run Newton's method to ~1e-11).
#[test]
fn multinomial_logit_matches_statsmodels_mnlogit() {
    use plumbline::estimate::learner::multinomial_fit;
    use plumbline::estimate::FeatureRows;
    let f = fixture("multinomial_reference.json");
    let x = matrix(&f["x"]);
    let labels: Vec<usize> = nums(&f["y"]).iter().map(|&v| v as usize).collect();
    let r = &f["fits"]["statsmodels_mnlogit"];
    let rows = FeatureRows::of_matrix(x.view()).expect("row-major");
    let fit = multinomial_fit(rows, &labels, 3, 0.0).expect("fit");
    assert_close("intercept", &fit.intercept, &nums(&r["intercept"]));
    let coef = r["coef"].as_array().expect("coef rows");
    assert_eq!(coef.len(), 2);
    for (k, want) in coef.iter().enumerate() {
        assert_close(&format!("coef arm {}", k + 1), &fit.coef[k], &nums(want));
    }
    let probs = r["probabilities_first_50"].as_array().expect("rows");
    for (i, want) in probs.iter().enumerate() {
        let got = fit.probabilities_of(rows.row(i));
        assert_close(&format!("probabilities row {i}"), &got, &nums(want));
    }
}
