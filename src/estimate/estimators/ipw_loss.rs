//! IPW transformed-outcome loss: Y* = Y (W - pi) / (pi (1 - pi)),
//! mean (Y* - tau_hat)^2. Unbiased for PEHE plus a constant when pi is
//! right; noisy when propensities are extreme.

use super::{Estimator, UnitView};

#[derive(Debug, Clone, Copy)]
pub struct IpwLoss;

impl Estimator for IpwLoss {
    fn key(&self) -> &'static str {
        "ipw_loss"
    }

    fn label(&self) -> &'static str {
        "IPW loss"
    }

    fn needs_binary_treatment(&self) -> bool {
        true
    }

    #[inline]
    fn contribution(&self, u: &UnitView, tau_hat: f64) -> f64 {
        let p = u.propensity;
        let transformed = u.outcome * (u.treatment - p) / (p * (1.0 - p));
        (transformed - tau_hat).powi(2)
    }
}
