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

/// One fit's training rows, split for early stopping and laid out for
/// growing: the shared preparation of the binary and the softmax loops.
pub(super) struct Layout {
    pub(super) d: usize,
    /// Whether an inner validation split stops the rounds.
    pub(super) early: bool,
    /// Positions in the caller's `rows` of the training rows and of the
    /// validation rows, in the order their bins are laid out.
    pub(super) train_pos: Vec<usize>,
    pub(super) valid_pos: Vec<usize>,
    /// Row-major bins of the training rows, and the same column-major.
    pub(super) train_bins: Vec<u8>,
    pub(super) train_columns: Vec<u8>,
    pub(super) valid_bins: Vec<u8>,
    pub(super) offsets: Vec<usize>,
}

impl Layout {
    pub(super) fn n_train(&self) -> usize {
        self.train_pos.len()
    }

    /// Every validation row, as the walks take them.
    pub(super) fn valid_rows(&self) -> Vec<u32> {
        (0..self.valid_pos.len() as u32).collect()
    }
}

/// The rows each round's trees grow on: all of them, or a fresh seeded
/// draw of `subsample` of them per round (Friedman's stochastic gradient
/// boosting), with the rows left out listed so they still get the round's
/// leaf values.
pub(super) struct RowDraw {
    sampling: bool,
    sampler: ChaCha8Rng,
    threshold: u32,
    /// The round's rows are `index[..kept]`; the trees reorder them.
    pub(super) index: Vec<u32>,
    /// The rows left out of the round are `out_of_sample[..dropped]`.
    pub(super) out_of_sample: Vec<u32>,
    pub(super) scratch: Vec<u32>,
}

impl RowDraw {
    pub(super) fn new(settings: &Boosted, n_train: usize, seed: u64) -> Self {
        Self {
            sampling: settings.subsample < 1.0 && n_train >= 2 * MIN_ROWS_FOR_EARLY_STOPPING,
            sampler: ChaCha8Rng::seed_from_u64(seed ^ 0x5ab5_a3b1e),
            threshold: (settings.subsample * u32::MAX as f64) as u32,
            index: (0..n_train as u32).collect(),
            out_of_sample: vec![0u32; n_train],
            scratch: vec![0u32; n_train],
        }
    }

    /// Draws the next round's rows; returns how many were kept and how
    /// many left out.
    pub(super) fn draw(&mut self) -> (usize, usize) {
        let n_train = self.index.len();
        if !self.sampling {
            // The previous round's trees reordered the rows.
            for (k, v) in self.index.iter_mut().enumerate() {
                *v = k as u32;
            }
            return (n_train, 0);
        }
        // Branch-free two-way split of the rows by a fresh draw each.
        let (mut kept, mut dropped) = (0usize, 0usize);
        for i in 0..n_train as u32 {
            let keep = self.sampler.next_u32() <= self.threshold;
            self.index[kept] = i;
            self.out_of_sample[dropped] = i;
            kept += usize::from(keep);
            dropped += usize::from(!keep);
        }
        (kept, dropped)
    }
}

/// Early stopping's bookkeeping: the best validation loss so far and how
/// many rounds reached it.
pub(super) struct Stopping {
    best_loss: f64,
    pub(super) best_rounds: usize,
    patience: usize,
}

impl Stopping {
    pub(super) fn new(patience: usize) -> Self {
        Self {
            best_loss: f64::INFINITY,
            best_rounds: 0,
            patience,
        }
    }

    /// Records the loss after `rounds` rounds; true when the rounds should
    /// stop (`patience` rounds without improvement).
    pub(super) fn stop_after(&mut self, rounds: usize, loss: f64) -> bool {
        if loss < self.best_loss {
            self.best_loss = loss;
            self.best_rounds = rounds;
            false
        } else {
            rounds - self.best_rounds >= self.patience
        }
    }
}

impl Boosted {
    /// Splits `rows` into training and validation rows (a seeded shuffle)
    /// and lays out their bins.
    pub(super) fn layout(&self, binned: &Binned, rows: &[usize], seed: u64) -> Layout {
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
        let gather = |pos: &[usize]| -> Vec<u8> {
            let mut bins = Vec::with_capacity(pos.len() * d);
            for &p in pos {
                bins.extend_from_slice(binned.row(rows[p]));
            }
            bins
        };
        let train_bins = gather(train_pos);
        let valid_bins = gather(valid_pos);
        let n_train = train_pos.len();
        let mut train_columns = vec![0u8; n_train * d];
        for (i, row) in train_bins.chunks_exact(d.max(1)).enumerate() {
            for (j, &b) in row.iter().enumerate() {
                train_columns[j * n_train + i] = b;
            }
        }
        Layout {
            d,
            early,
            train_pos: train_pos.to_vec(),
            valid_pos: valid_pos.to_vec(),
            train_bins,
            train_columns,
            valid_bins,
            offsets: (0..d).map(|j| j * BIN_STRIDE).collect(),
        }
    }

    pub(super) fn grower<'a>(
        &'a self,
        layout: &'a Layout,
        binned: &'a Binned,
        task: Task,
    ) -> Grower<'a> {
        Grower {
            bins: &layout.train_bins,
            columns: &layout.train_columns,
            rows: layout.n_train(),
            d: layout.d,
            widths: &binned.widths,
            offsets: &layout.offsets,
            hist_len: layout.d * BIN_STRIDE,
            cuts: &binned.cuts,
            settings: self,
            task,
        }
    }

    /// The most rounds a fit runs.
    pub(super) fn round_cap(&self, early: bool) -> usize {
        if early {
            self.max_rounds
        } else {
            ROUNDS_WITHOUT_EARLY_STOPPING
        }
    }

    pub(super) fn fit_binned(
        &self,
        binned: Arc<Binned>,
        rows: &[usize],
        y: &[f64],
        task: Task,
        seed: u64,
    ) -> BoostedFit {
        let layout = self.layout(&binned, rows, seed);
        let (d, early) = (layout.d, layout.early);
        let y_train: Vec<f64> = layout.train_pos.iter().map(|&p| y[p]).collect();
        let y_valid: Vec<f64> = layout.valid_pos.iter().map(|&p| y[p]).collect();
        let n_train = y_train.len();
        let mean = y_train.iter().sum::<f64>() / y_train.len().max(1) as f64;
        let base = match task {
            Task::Regression => mean,
            Task::Classification => {
                let p = mean.clamp(1e-6, 1.0 - 1e-6);
                (p / (1.0 - p)).ln()
            }
        };
        let grower = self.grower(&layout, &binned, task);
        let mut f_train = vec![base; n_train];
        let mut f_valid = vec![base; y_valid.len()];
        let valid_rows = layout.valid_rows();
        let mut grad = vec![0.0; n_train];
        let mut hess = vec![1.0; n_train];
        let mut draw = RowDraw::new(self, n_train, seed);
        let mut trees: Vec<Tree> = Vec::new();
        let mut stopping = Stopping::new(self.patience);
        for _ in 0..self.round_cap(early) {
            let (kept, dropped) = draw.draw();
            let in_sample = &mut draw.index[..kept];
            gradients(task, in_sample, &y_train, &f_train, &mut grad, &mut hess);
            let tree = grower.tree(in_sample, &mut draw.scratch, &grad, &hess, &mut f_train);
            tree.add_leaf_values(
                &layout.train_bins,
                d,
                &draw.out_of_sample[..dropped],
                &mut f_train,
            );
            if early {
                tree.add_leaf_values(&layout.valid_bins, d, &valid_rows, &mut f_valid);
            }
            trees.push(tree);
            if early {
                if stopping.stop_after(trees.len(), validation_loss(task, &y_valid, &f_valid)) {
                    break;
                }
            } else {
                stopping.best_rounds = trees.len();
            }
        }
        trees.truncate(stopping.best_rounds);
        BoostedFit {
            base,
            trees,
            task,
            binned_id: binned.id,
            max_bins: binned.max_bins,
        }
    }
}
