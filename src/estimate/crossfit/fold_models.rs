//! The fold models a cross-fit keeps, so that units arriving after it are
//! scored by models that never saw them.

use ndarray::ArrayView2;

use crate::estimate::error::EstimateError;
use crate::estimate::learner::Fitted;

use super::nuisance::Nuisance;
use super::recalibrate::PropensityMap;

/// The fold models of the chosen learner of every component, kept so that
/// units that arrive after a fit can be scored by models that never saw
/// them: a new unit gets the average of the K fold models' predictions.
pub struct FittedNuisance {
    /// None when the propensity was logged rather than fitted.
    pub propensity: Option<Vec<Box<dyn Fitted>>>,
    /// Each propensity fold model's last stage (the map fitted for its
    /// fold), so that later units get propensities on the scale the
    /// fitted units were weighted with. Empty: the raw predictions.
    pub propensity_maps: Vec<PropensityMap>,
    pub mu0: Vec<Box<dyn Fitted>>,
    pub mu1: Vec<Box<dyn Fitted>>,
    pub clip: f64,
}

fn fold_average(
    models: &[Box<dyn Fitted>],
    maps: &[PropensityMap],
    x: ArrayView2<'_, f64>,
) -> Vec<f64> {
    let mut sum = vec![0.0; x.nrows()];
    for (f, m) in models.iter().enumerate() {
        let map = maps.get(f).unwrap_or(&PropensityMap::Identity);
        for (s, p) in sum.iter_mut().zip(m.predict(x)) {
            *s += map.apply(p);
        }
    }
    let k = models.len().max(1) as f64;
    sum.iter().map(|s| s / k).collect()
}

impl FittedNuisance {
    /// Nuisance values for new units. `logged` propensities are used as
    /// given (clipped); without them a fitted propensity is required.
    pub fn predict(
        &self,
        x: ArrayView2<'_, f64>,
        logged: Option<&[f64]>,
    ) -> Result<(Nuisance, usize), EstimateError> {
        let propensity = match (logged, &self.propensity) {
            (Some(p), _) => p.to_vec(),
            (None, Some(models)) => fold_average(models, &self.propensity_maps, x),
            (None, None) => {
                return Err(EstimateError::invalid(
                    "the nuisance fit used logged propensities, and these units have none",
                ))
            }
        };
        Ok(Nuisance::from_parts(
            propensity,
            fold_average(&self.mu0, &[], x),
            fold_average(&self.mu1, &[], x),
            self.clip,
        ))
    }
}
