//! Boosting on the softmax (multinomial log-) loss: the generalized
//! propensity's tree learner. Each round grows one tree per arm on that
//! arm's gradient p_k - 1{W = k} and diagonal hessian p_k (1 - p_k), all
//! from the same round-start scores (Friedman 2001's K-class boosting with
//! second-order leaves, as the histogram boosters do it), and the rounds
//! stop early on the held-out multinomial log-loss.
//!
//! Unlike one classifier per arm renormalized afterwards, the arms' scores
//! are fitted jointly, so the probabilities are a softmax by construction
//! and the loss that stops the rounds is the one the cross-fit compares
//! learners by.

use std::sync::Arc;

use super::boost::{RowDraw, Stopping};
use super::tree::Tree;
use super::Boosted;
use crate::estimate::learner::multinomial::softmax;
use crate::estimate::learner::shared::Binned;
use crate::estimate::learner::{SharedFeatures, Task};

/// Floor on an arm's share when it sets the arm's base score, so an arm
/// absent from a fold's training rows starts far below, not at minus
/// infinity.
const MIN_BASE_SHARE: f64 = 1e-6;

/// A fitted softmax booster: per arm a base score and one tree per round.
pub(crate) struct SoftmaxFit {
    base: Vec<f64>,
    /// `trees[k]`: arm k's trees, one per kept round.
    trees: Vec<Vec<Tree>>,
    binned_id: u64,
    max_bins: usize,
}

/// Mean multinomial log-loss of scores `f[k][i]` for labels `labels[i]`:
/// logsumexp_k f[k][i] - f[labels[i]][i].
fn log_loss(f: &[Vec<f64>], labels: &[usize]) -> f64 {
    let n = labels.len().max(1) as f64;
    let mut total = 0.0;
    let mut row = vec![0.0; f.len()];
    for (i, &w) in labels.iter().enumerate() {
        for (r, column) in row.iter_mut().zip(f) {
            *r = column[i];
        }
        let top = row.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let lse = top + row.iter().map(|v| (v - top).exp()).sum::<f64>().ln();
        total += lse - row[w];
    }
    total / n
}

impl Boosted {
    /// Fits the softmax booster on rows `rows` of `binned`, whose arms are
    /// `labels` (one per row, each below `arms`).
    pub(crate) fn fit_softmax(
        &self,
        data: &SharedFeatures<'_>,
        rows: &[usize],
        labels: &[usize],
        arms: usize,
        seed: u64,
    ) -> SoftmaxFit {
        let binned = data.binned(self.max_bins);
        self.fit_softmax_binned(binned, rows, labels, arms, seed)
    }

    fn fit_softmax_binned(
        &self,
        binned: Arc<Binned>,
        rows: &[usize],
        labels: &[usize],
        arms: usize,
        seed: u64,
    ) -> SoftmaxFit {
        let layout = self.layout(&binned, rows, seed);
        let (d, early) = (layout.d, layout.early);
        let w_train: Vec<usize> = layout.train_pos.iter().map(|&p| labels[p]).collect();
        let w_valid: Vec<usize> = layout.valid_pos.iter().map(|&p| labels[p]).collect();
        let n_train = w_train.len();
        let base: Vec<f64> = (0..arms)
            .map(|k| {
                let share =
                    w_train.iter().filter(|&&w| w == k).count() as f64 / n_train.max(1) as f64;
                share.max(MIN_BASE_SHARE).ln()
            })
            .collect();
        let grower = self.grower(&layout, &binned, Task::Classification);
        let mut f_train: Vec<Vec<f64>> = base.iter().map(|&b| vec![b; n_train]).collect();
        let mut f_valid: Vec<Vec<f64>> = base.iter().map(|&b| vec![b; w_valid.len()]).collect();
        let valid_rows = layout.valid_rows();
        // Per arm, the round's gradients and hessians, all from the scores
        // at the start of the round.
        let mut grad = vec![vec![0.0; n_train]; arms];
        let mut hess = vec![vec![1.0; n_train]; arms];
        let mut p = vec![0.0; arms];
        let mut draw = RowDraw::new(self, n_train, seed);
        let mut trees: Vec<Vec<Tree>> = vec![Vec::new(); arms];
        let mut stopping = Stopping::new(self.patience);
        for round in 0..self.round_cap(early) {
            let (kept, dropped) = draw.draw();
            for &i in &draw.index[..kept] {
                let i = i as usize;
                for (pk, column) in p.iter_mut().zip(&f_train) {
                    *pk = column[i];
                }
                softmax(&mut p);
                for k in 0..arms {
                    grad[k][i] = p[k] - f64::from(u8::from(w_train[i] == k));
                    hess[k][i] = (p[k] * (1.0 - p[k])).max(1e-16);
                }
            }
            for k in 0..arms {
                let in_sample = &mut draw.index[..kept];
                let tree = grower.tree(
                    in_sample,
                    &mut draw.scratch,
                    &grad[k],
                    &hess[k],
                    &mut f_train[k],
                );
                tree.add_leaf_values(
                    &layout.train_bins,
                    d,
                    &draw.out_of_sample[..dropped],
                    &mut f_train[k],
                );
                if early {
                    tree.add_leaf_values(&layout.valid_bins, d, &valid_rows, &mut f_valid[k]);
                }
                trees[k].push(tree);
            }
            if early {
                if stopping.stop_after(round + 1, log_loss(&f_valid, &w_valid)) {
                    break;
                }
            } else {
                stopping.best_rounds = round + 1;
            }
        }
        for t in &mut trees {
            t.truncate(stopping.best_rounds);
        }
        SoftmaxFit {
            base,
            trees,
            binned_id: binned.id,
            max_bins: binned.max_bins,
        }
    }
}

impl SoftmaxFit {
    /// Probabilities of every arm for one row, its leaves found by `leaf`.
    fn probabilities_by(&self, leaf: impl Fn(&Tree) -> f64) -> Vec<f64> {
        let mut f: Vec<f64> = self
            .base
            .iter()
            .zip(&self.trees)
            .map(|(b, trees)| b + trees.iter().map(&leaf).sum::<f64>())
            .collect();
        softmax(&mut f);
        f
    }

    /// P(W = k | x) for one row of raw feature values.
    pub(crate) fn probabilities(&self, x: &[f64]) -> Vec<f64> {
        self.probabilities_by(|t| t.leaf_of_values(|j| x[j]))
    }

    /// P(W = k | x) for rows of a shared matrix, one column per arm; by
    /// bins when the rows belong to the matrix the trees were grown on.
    pub(crate) fn probabilities_rows(
        &self,
        data: &SharedFeatures<'_>,
        rows: &[usize],
    ) -> Vec<Vec<f64>> {
        let mut out = vec![Vec::with_capacity(rows.len()); self.base.len()];
        let binned = data
            .binned_if_cached(self.max_bins)
            .filter(|b| b.id == self.binned_id);
        let x = data.x();
        for &r in rows {
            let p = match &binned {
                Some(b) => self.probabilities_by(|t| t.leaf_of_bins(b.row(r))),
                None => self.probabilities(x.row(r)),
            };
            for (column, v) in out.iter_mut().zip(p) {
                column.push(v);
            }
        }
        out
    }
}
