//! A fitted boosted model: a base score and its trees, predicting by bins
//! when the rows belong to the binned matrix it was trained on (no
//! comparisons of raw values) and by raw values otherwise.

use ndarray::ArrayView2;

use super::tree::Tree;
use crate::estimate::learner::linear::sigmoid;
use crate::estimate::learner::{Fitted, SharedFeatures, Task};

pub(super) struct BoostedFit {
    pub(super) base: f64,
    pub(super) trees: Vec<Tree>,
    pub(super) task: Task,
    /// Which binned matrix the trees' bin numbers refer to ([`Binned::id`]),
    /// so predictions for rows of that same matrix can walk by bins. Only
    /// the id is kept: the fold models outlive the cross-fit, and holding the
    /// matrix would keep a byte per feature and unit alive with them.
    pub(super) binned_id: u64,
    pub(super) max_bins: usize,
}

impl BoostedFit {
    fn link(&self, f: f64) -> f64 {
        match self.task {
            Task::Regression => f,
            Task::Classification => sigmoid(f),
        }
    }

    /// The prediction for one row of raw (unbinned) feature values.
    fn predict_values(&self, value: impl Fn(usize) -> f64) -> f64 {
        let f = self.base
            + self
                .trees
                .iter()
                .map(|t| t.leaf_of_values(&value))
                .sum::<f64>();
        self.link(f)
    }
}

impl Fitted for BoostedFit {
    fn predict(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        x.outer_iter()
            .map(|row| self.predict_values(|j| row[j]))
            .collect()
    }

    fn predict_rows(&self, data: &SharedFeatures<'_>, rows: &[usize]) -> Vec<f64> {
        match data.binned_if_cached(self.max_bins) {
            Some(b) if b.id == self.binned_id => rows
                .iter()
                .map(|&r| {
                    let bins = b.row(r);
                    let f =
                        self.base + self.trees.iter().map(|t| t.leaf_of_bins(bins)).sum::<f64>();
                    self.link(f)
                })
                .collect(),
            _ => {
                let x = data.x();
                rows.iter()
                    .map(|&r| {
                        let row = x.row(r);
                        self.predict_values(|j| row[j])
                    })
                    .collect()
            }
        }
    }
}
