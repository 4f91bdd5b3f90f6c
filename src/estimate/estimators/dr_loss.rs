//! Doubly robust pseudo-outcome loss: mean (phi - tau_hat)^2 (Kennedy 2023).
//! Its differences between models equal those of the corrected PEHE; its
//! level carries the pseudo-outcome's own noise.

use super::{Estimator, UnitView};

#[derive(Debug, Clone, Copy)]
pub struct DrLoss;

impl Estimator for DrLoss {
    fn key(&self) -> &'static str {
        "dr_loss"
    }

    fn label(&self) -> &'static str {
        "DR loss"
    }

    #[inline]
    fn contribution(&self, u: &UnitView, tau_hat: f64) -> f64 {
        (u.phi - tau_hat).powi(2)
    }
}
