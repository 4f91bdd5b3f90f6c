//! The AIPW (doubly robust) pseudo-outcome and the dataset ATE.

use super::crossfit::Nuisance;
use super::stats::{mean_se, Estimate};

/// AIPW pseudo-outcome per unit (Robins, Rotnitzky & Zhao 1994):
///
/// phi_i = tau_tilde_i + W_i (Y_i - mu1_i) / pi_i - (1 - W_i)(Y_i - mu0_i) / (1 - pi_i)
///
/// E[phi | X] = tau(X) when either the propensity or both outcome regressions
/// are right; otherwise the bias is a product of their errors.
pub fn aipw_pseudo_outcome(y: &[f64], w: &[f64], nuisance: &Nuisance) -> Vec<f64> {
    (0..y.len())
        .map(|i| {
            let p = nuisance.propensity[i];
            let (mu0, mu1) = (nuisance.mu0[i], nuisance.mu1[i]);
            mu1 - mu0 + w[i] * (y[i] - mu1) / p - (1.0 - w[i]) * (y[i] - mu0) / (1.0 - p)
        })
        .collect()
}

/// The AIPW ATE: mean pseudo-outcome with its standard error.
pub fn aipw_ate(phi: &[f64]) -> Estimate {
    mean_se(phi)
}

/// The inverse-probability-weighted ATE with normalized (Hajek) weights,
/// i.e. the weighted least-squares coefficient of Y on [1, W] with weights
/// W/pi + (1-W)/(1-pi), and its heteroskedasticity-robust (sandwich) standard
/// error that treats the weights as known, as a GEE with independence
/// working correlation reports it.
pub fn ipw_ate(y: &[f64], w: &[f64], propensity: &[f64]) -> Estimate {
    let (mut s1, mut s0, mut sy1, mut sy0) = (0.0, 0.0, 0.0, 0.0);
    for i in 0..y.len() {
        if w[i] == 1.0 {
            let wt = 1.0 / propensity[i];
            s1 += wt;
            sy1 += wt * y[i];
        } else {
            let wt = 1.0 / (1.0 - propensity[i]);
            s0 += wt;
            sy0 += wt * y[i];
        }
    }
    let (m1, m0) = (sy1 / s1, sy0 / s0);
    // Sandwich for a two-group weighted mean difference: each arm's mean has
    // variance sum(wt^2 (y - m)^2) / (sum wt)^2, and the arms are independent.
    let (mut v1, mut v0) = (0.0, 0.0);
    for i in 0..y.len() {
        if w[i] == 1.0 {
            let wt = 1.0 / propensity[i];
            v1 += (wt * (y[i] - m1)).powi(2);
        } else {
            let wt = 1.0 / (1.0 - propensity[i]);
            v0 += (wt * (y[i] - m0)).powi(2);
        }
    }
    Estimate::new(m1 - m0, (v1 / (s1 * s1) + v0 / (s0 * s0)).sqrt())
}
