//! Value of the targeting policy a model implies (Athey & Wager 2021).
//!
//! Model k treats unit i when tau_hat_ik > cost. Its gain per unit over
//! treating nobody is mean d_ik (phi_i - cost); against treating everyone it
//! is mean (d_ik - 1)(phi_i - cost). Both are means of per-unit terms, so
//! their standard errors are the usual ones.

use serde::Serialize;

use super::stats::{Estimate, Moments};

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
    let mut sums = PolicySums::default();
    sums.add(phi, tau_hat, cost);
    sums.gain()
}

/// The gain of treating every unit alike (`treat`) or none, from the
/// window's mean pseudo-outcome and its standard error: the baselines
/// predict one value for every unit, so their policy needs no pass.
pub fn uniform_policy_gain(phi: Estimate, treat: bool, cost: f64) -> PolicyGain {
    let net = Estimate::new(phi.estimate - cost, phi.se);
    let none = Estimate::new(0.0, 0.0);
    let (over_none, over_all) = if treat {
        (net, none)
    } else {
        (none, Estimate::new(-net.estimate, net.se))
    };
    PolicyGain {
        estimate: over_none.estimate,
        se: over_none.se,
        vs_treat_all: over_all,
        treated_share: if treat { 1.0 } else { 0.0 },
    }
}

/// One model's [`policy_gain`] as mergeable moments, for a window that
/// grows: each block of new units is added once.
#[derive(Debug, Clone, Default)]
pub struct PolicySums {
    over_none: Moments,
    over_all: Moments,
    treated: u64,
}

impl PolicySums {
    pub fn add(&mut self, phi: &[f64], tau_hat: &[f64], cost: f64) {
        let n = phi.len();
        let mut over_none = Vec::with_capacity(n);
        let mut over_all = Vec::with_capacity(n);
        for (&p, &t) in phi.iter().zip(tau_hat) {
            let d = if t > cost { 1.0 } else { 0.0 };
            self.treated += d as u64;
            over_none.push(d * (p - cost));
            over_all.push((d - 1.0) * (p - cost));
        }
        self.over_none.merge(&Moments::of(&over_none));
        self.over_all.merge(&Moments::of(&over_all));
    }

    pub fn gain(&self) -> PolicyGain {
        let e = self.over_none.estimate();
        PolicyGain {
            estimate: e.estimate,
            se: e.se,
            vs_treat_all: self.over_all.estimate(),
            treated_share: self.treated as f64 / self.over_none.count().max(1) as f64,
        }
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
