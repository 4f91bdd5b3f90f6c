//! The constant learner: predicts the training mean. It is the floor every
//! other learner must beat, and the fallback when a training fold's targets
//! do not vary.

use ndarray::ArrayView2;

use super::{Fitted, Learner, Task};
use crate::estimate::error::EstimateError;

#[derive(Debug, Clone, Copy, Default)]
pub struct Constant;

pub(crate) struct ConstantFit {
    value: f64,
}

impl ConstantFit {
    pub(crate) fn for_targets(y: &[f64], task: Task) -> Self {
        let n = y.len() as f64;
        let sum: f64 = y.iter().sum();
        let value = match task {
            Task::Regression => sum / n.max(1.0),
            // Add-one-half smoothing keeps a class that never occurred in a
            // training fold from getting probability exactly 0.
            Task::Classification => (sum + 0.5) / (n + 1.0),
        };
        Self { value }
    }
}

impl Fitted for ConstantFit {
    fn predict(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        vec![self.value; x.nrows()]
    }
}

impl Learner for Constant {
    fn name(&self) -> &'static str {
        "constant"
    }

    fn boxed_clone(&self) -> Box<dyn Learner> {
        Box::new(*self)
    }

    fn check(&self) -> Result<(), EstimateError> {
        Ok(())
    }

    fn fit(
        &self,
        _x: ArrayView2<'_, f64>,
        y: &[f64],
        task: Task,
        _seed: u64,
    ) -> Result<Box<dyn Fitted>, EstimateError> {
        Ok(Box::new(ConstantFit::for_targets(y, task)))
    }
}
