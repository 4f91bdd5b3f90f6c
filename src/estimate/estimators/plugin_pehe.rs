//! Plug-in PEHE: mean (tau_hat - tau_tilde)^2. Reported for context, never
//! ranked on alone: it inherits the outcome models' bias in full.

use super::{Estimator, UnitView};

#[derive(Debug, Clone, Copy)]
pub struct PluginPehe;

impl Estimator for PluginPehe {
    fn key(&self) -> &'static str {
        "plugin_pehe"
    }

    fn label(&self) -> &'static str {
        "plug-in PEHE"
    }

    #[inline]
    fn contribution(&self, u: &UnitView, tau_hat: f64) -> f64 {
        (tau_hat - u.tau_tilde()).powi(2)
    }
}
