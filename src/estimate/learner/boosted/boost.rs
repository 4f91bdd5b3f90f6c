//! The boosting loop: rounds of gradients, a tree grown on a seeded
//! subsample of the rows, and early stopping.
//!
//! Early stopping: `validation_share` of the training rows (a seeded shuffle)
//! is held out; boosting stops once the held-out loss has not improved for
//! `patience` rounds and the model keeps the trees up to the best round.

use std::sync::Arc;

use rand::seq::SliceRandom;
use rand::{RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::grow::{Grower, BIN_STRIDE};
use super::model::BoostedFit;
use super::tree::Tree;
use super::Boosted;
use crate::estimate::learner::linear::sigmoid;
use crate::estimate::learner::shared::Binned;
use crate::estimate::learner::Task;

/// Below this many training rows the inner split is too small to stop on;
/// a short fixed number of rounds is used instead.
const MIN_ROWS_FOR_EARLY_STOPPING: usize = 100;
const ROUNDS_WITHOUT_EARLY_STOPPING: usize = 50;

/// Gradients and hessians of the loss at the current predictions `f`, for
/// the rows a round's tree is grown on (the others are not read).
fn gradients(task: Task, rows: &[u32], y: &[f64], f: &[f64], grad: &mut [f64], hess: &mut [f64]) {
    match task {
        Task::Regression => {
            for &i in rows {
                let i = i as usize;
                grad[i] = f[i] - y[i];
            }
        }
        Task::Classification => {
            for &i in rows {
                let i = i as usize;
                let p = sigmoid(f[i]);
                grad[i] = p - y[i];
                hess[i] = (p * (1.0 - p)).max(1e-16);
            }
        }
    }
}

fn validation_loss(task: Task, y: &[f64], f: &[f64]) -> f64 {
    let n = y.len().max(1) as f64;
    match task {
        Task::Regression => y.iter().zip(f).map(|(a, b)| (a - b).powi(2)).sum::<f64>() / n,
        // -(a ln p + (1 - a) ln(1 - p)) with p = sigmoid(z) is
        // softplus(z) - a z for labels a in {0, 1}: one exp and one log.
        Task::Classification => {
            y.iter()
                .zip(f)
                .map(|(&a, &z)| z.max(0.0) + (-z.abs()).exp().ln_1p() - a * z)
                .sum::<f64>()
                / n
        }
    }
}

impl Boosted {
    pub(super) fn fit_binned(
        &self,
        binned: Arc<Binned>,
        rows: &[usize],
        y: &[f64],
        task: Task,
        seed: u64,
    ) -> BoostedFit {
        let d = binned.d;
        let n = rows.len();
        let early = n >= MIN_ROWS_FOR_EARLY_STOPPING;
        let mut order: Vec<usize> = (0..n).collect();
        let n_valid = if early {
            order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
            ((n as f64) * self.validation_share).round() as usize
        } else {
            0
        };
        let (valid_pos, train_pos) = order.split_at(n_valid);
        let gather = |pos: &[usize]| -> (Vec<u8>, Vec<f64>) {
            let mut bins = Vec::with_capacity(pos.len() * d);
            let mut t = Vec::with_capacity(pos.len());
            for &p in pos {
                bins.extend_from_slice(binned.row(rows[p]));
                t.push(y[p]);
            }
            (bins, t)
        };
        let (train_bins, y_train) = gather(train_pos);
        let (valid_bins, y_valid) = gather(valid_pos);
        let n_train = y_train.len();
        let mut train_columns = vec![0u8; n_train * d];
        for (i, row) in train_bins.chunks_exact(d.max(1)).enumerate() {
            for (j, &b) in row.iter().enumerate() {
                train_columns[j * n_train + i] = b;
            }
        }

        let mean = y_train.iter().sum::<f64>() / y_train.len().max(1) as f64;
        let base = match task {
            Task::Regression => mean,
            Task::Classification => {
                let p = mean.clamp(1e-6, 1.0 - 1e-6);
                (p / (1.0 - p)).ln()
            }
        };
        let offsets: Vec<usize> = (0..d).map(|j| j * BIN_STRIDE).collect();
        let hist_len = d * BIN_STRIDE;
        let grower = Grower {
            bins: &train_bins,
            columns: &train_columns,
            rows: n_train,
            d,
            widths: &binned.widths,
            offsets: &offsets,
            hist_len,
            cuts: &binned.cuts,
            settings: self,
            task,
        };
        let mut f_train = vec![base; n_train];
        let mut f_valid = vec![base; y_valid.len()];
        let valid_rows: Vec<u32> = (0..y_valid.len() as u32).collect();
        let mut grad = vec![0.0; n_train];
        let mut hess = vec![1.0; n_train];
        // A round's tree grows on index[..kept]; the rows left out of its
        // sample are out_of_sample[..dropped] and get its leaf values by a
        // walk down the tree.
        let mut index: Vec<u32> = (0..n_train as u32).collect();
        let mut out_of_sample = vec![0u32; n_train];
        let mut scratch = vec![0u32; n_train];
        let sampling = self.subsample < 1.0 && n_train >= 2 * MIN_ROWS_FOR_EARLY_STOPPING;
        let mut sampler = ChaCha8Rng::seed_from_u64(seed ^ 0x5ab5_a3b1e);
        let threshold = (self.subsample * u32::MAX as f64) as u32;
        let rounds = if early {
            self.max_rounds
        } else {
            ROUNDS_WITHOUT_EARLY_STOPPING
        };
        let mut trees: Vec<Tree> = Vec::new();
        let (mut best_loss, mut best_len) = (f64::INFINITY, 0usize);
        for round in 0..rounds {
            let (mut kept, mut dropped) = (n_train, 0usize);
            if sampling {
                // Branch-free two-way split of the rows by a fresh draw each.
                kept = 0;
                for i in 0..n_train as u32 {
                    let keep = sampler.next_u32() <= threshold;
                    index[kept] = i;
                    out_of_sample[dropped] = i;
                    kept += usize::from(keep);
                    dropped += usize::from(!keep);
                }
            } else {
                // The previous round's tree reordered the rows.
                for (k, v) in index.iter_mut().enumerate() {
                    *v = k as u32;
                }
            }
            let in_sample = &mut index[..kept];
            gradients(task, in_sample, &y_train, &f_train, &mut grad, &mut hess);
            let tree = grower.tree(in_sample, &mut scratch, &grad, &hess, &mut f_train);
            tree.add_leaf_values(&train_bins, d, &out_of_sample[..dropped], &mut f_train);
            if early {
                tree.add_leaf_values(&valid_bins, d, &valid_rows, &mut f_valid);
            }
            trees.push(tree);
            if early {
                let loss = validation_loss(task, &y_valid, &f_valid);
                if loss < best_loss {
                    best_loss = loss;
                    best_len = trees.len();
                } else if round + 1 - best_len >= self.patience {
                    break;
                }
            } else {
                best_len = trees.len();
            }
        }
        trees.truncate(best_len);
        BoostedFit {
            base,
            trees,
            task,
            binned_id: binned.id,
            max_bins: binned.max_bins,
        }
    }
}
