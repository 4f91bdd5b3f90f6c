//! The stream watch's look at a recompute's arrivals.

use super::{Fixed, RecomputeInput};
use crate::estimate::watch::{Arrivals, Signal};
use crate::estimate::EstimateError;

impl RecomputeInput {
    /// The units whose outcomes arrived since the watch last looked, in
    /// arrival order, after the first `from` it has seen.
    pub(super) fn unwatched(&self) -> (usize, Vec<usize>) {
        let outcomes = self.columns.outcomes();
        let from = usize::try_from(self.watch.units)
            .unwrap_or(usize::MAX)
            .min(outcomes);
        (from, self.columns.arrived(from..outcomes))
    }

    /// Hands the watch the units whose outcomes arrived since it last
    /// looked, with nuisance values from the fold models in place before
    /// this recompute (which never saw them); returns what it decided and
    /// those values, which the boards reuse unless the recompute refits.
    /// Before the first fit there are no such models: those units only fit
    /// it, and the watch starts after them.
    pub(super) fn watch_arrivals(&mut self) -> Result<(Vec<Signal>, Fixed), EstimateError> {
        let (_, units) = self.unwatched();
        if units.is_empty() {
            return Ok((Vec::new(), Fixed::new()));
        }
        let logged: Option<Vec<f64>> = units
            .iter()
            .map(|&u| self.columns.propensity_of(u))
            .collect();
        let Some(state) = self
            .nuisance
            .as_ref()
            .filter(|s| !s.logged || logged.is_some())
        else {
            // No fit yet, or a fit on logged propensities and units without
            // one (the propensity-source refit comes next): not watched.
            self.watch.skip_baseline(units.len() as u64);
            return Ok((Vec::new(), Fixed::new()));
        };
        let x = self.rows(&units);
        let logged = if state.logged { logged } else { None };
        let (nuisance, _) = state.fitted.predict(x.view(), logged.as_deref())?;
        let treatment: Vec<f64> = units
            .iter()
            .map(|&u| f64::from(self.columns.treatment[u]))
            .collect();
        let outcome: Vec<f64> = units
            .iter()
            .map(|&u| self.columns.outcome_of(u).unwrap_or(0.0))
            .collect();
        let models: Vec<(String, Vec<f64>)> = self
            .models
            .iter()
            .map(|(name, effects)| (name.clone(), units.iter().map(|&u| effects[u]).collect()))
            .collect();
        // Standard layout: `rows` builds it from one row after another.
        let features = x.as_slice().unwrap_or(&[]);
        let signals = self.watch.observe(
            &Arrivals {
                treatment: &treatment,
                outcome: &outcome,
                nuisance: &nuisance,
                propensity_fitted: !state.logged,
                features,
                feature_names: &self.spec.feature_names,
                models: &models,
            },
            &self.watch_settings,
        );
        let fixed = units
            .iter()
            .enumerate()
            .map(|(i, &u)| {
                (
                    u,
                    [nuisance.propensity[i], nuisance.mu0[i], nuisance.mu1[i]],
                )
            })
            .collect();
        Ok((signals, fixed))
    }
}
