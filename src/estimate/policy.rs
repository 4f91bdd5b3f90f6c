//! Value of the targeting policy a model implies (Athey & Wager 2021).
//!
//! Model k treats unit i when tau_hat_ik > cost. Its gain per unit over
//! treating nobody is mean d_ik (phi_i - cost); against treating everyone it
//! is mean (d_ik - 1)(phi_i - cost). Both are means of per-unit terms, so
//! their standard errors are the usual ones.

use serde::Serialize;

use super::stats::{mean_se, Estimate};

#[derive(Debug, Clone, Serialize)]
pub struct PolicyGain {
    /// Gain per unit over treating nobody.
    pub estimate: f64,
    pub se: f64,
    /// Gain per unit over treating everyone.
    pub vs_treat_all: Estimate,
    /// Share of units the policy treats.
    pub treated_share: f64,
}

pub fn policy_gain(phi: &[f64], tau_hat: &[f64], cost: f64) -> PolicyGain {
    let n = phi.len();
    let mut over_none = Vec::with_capacity(n);
    let mut over_all = Vec::with_capacity(n);
    let mut treated = 0usize;
    for i in 0..n {
        let d = if tau_hat[i] > cost { 1.0 } else { 0.0 };
        treated += d as usize;
        over_none.push(d * (phi[i] - cost));
        over_all.push((d - 1.0) * (phi[i] - cost));
    }
    let e = mean_se(&over_none);
    PolicyGain {
        estimate: e.estimate,
        se: e.se,
        vs_treat_all: mean_se(&over_all),
        treated_share: treated as f64 / n.max(1) as f64,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gain_counts_only_treated_units() {
        let phi = [3.0, -1.0, 2.0, 0.0];
        let tau_hat = [1.0, -1.0, 0.5, 0.2];
        let g = policy_gain(&phi, &tau_hat, 0.3);
        // Treated: units 0 and 2 -> (2.7 + 1.7) / 4.
        assert!((g.estimate - 1.1).abs() < 1e-12);
        assert_eq!(g.treated_share, 0.5);
        // Versus treat-all: minus the untreated units' (phi - cost): -(-1.3 - 0.3)/4.
        assert!((g.vs_treat_all.estimate - 0.4).abs() < 1e-12);
    }
}
