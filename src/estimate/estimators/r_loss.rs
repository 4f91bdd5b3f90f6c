//! R-loss (Nie & Wager 2021): mean ((Y - m) - (W - pi) tau_hat)^2 with
//! m = pi mu1 + (1 - pi) mu0.

use super::{Estimator, UnitView};

#[derive(Debug, Clone, Copy)]
pub struct RLoss;

impl Estimator for RLoss {
    fn key(&self) -> &'static str {
        "r_loss"
    }

    fn label(&self) -> &'static str {
        "R-loss"
    }

    fn needs_binary_treatment(&self) -> bool {
        true
    }

    #[inline]
    fn contribution(&self, u: &UnitView, tau_hat: f64) -> f64 {
        ((u.outcome - u.m_tilde()) - (u.treatment - u.propensity) * tau_hat).powi(2)
    }
}
