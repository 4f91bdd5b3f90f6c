//! Growing one tree on a round's gradients and hessians. Split gains are
//! G_L^2/(H_L + l2) + G_R^2/(H_R + l2) - G^2/(H + l2) and leaves predict
//! -lr G/(H + l2). Trees grow level by level; a node's histogram is built
//! from its rows only for the smaller child, the larger one is the
//! parent's minus it, and the last level's children, which are never
//! split, get none.

use super::tree::{Node, Tree};
use super::Boosted;
use crate::estimate::learner::Task;

/// Leaves need at least this hessian sum (log-loss hessians are p(1-p)).
const MIN_LEAF_HESSIAN: f64 = 1e-3;
/// Largest absolute log-odds step of one log-loss leaf (as XGBoost's
/// max_delta_step for logistic regression), so a leaf of near-certain rows
/// cannot jump to an extreme probability.
const MAX_CLASSIFICATION_STEP: f64 = 1.0;

/// Gradient, hessian and row count of one histogram bin.
#[derive(Debug, Clone, Copy, Default)]
struct Bin {
    g: f64,
    h: f64,
    n: u32,
}

/// Histogram slots per feature: the most bins a feature can have, so that a
/// bin number (a u8) indexes a feature's slots without a bounds check.
pub(super) const BIN_STRIDE: usize = 256;

/// The rows of one growing node: a range of the index buffer, its sums and
/// (when it may be split) its histogram.
struct Open {
    node: usize,
    start: usize,
    end: usize,
    g: f64,
    h: f64,
    hist: Option<Vec<Bin>>,
}

struct Split {
    feature: usize,
    bin: usize,
    gain: f64,
    left_g: f64,
    left_h: f64,
    left_n: usize,
}

/// The training state shared by the rounds of one fit.
pub(super) struct Grower<'a> {
    /// Row-major bins of the training rows, `d` per row (histograms read a
    /// row's bins together).
    pub(super) bins: &'a [u8],
    /// The same bins column-major, `rows` per feature (a partition reads one
    /// feature of many rows).
    pub(super) columns: &'a [u8],
    pub(super) rows: usize,
    pub(super) d: usize,
    /// Bins used per feature (cut points + 1).
    pub(super) widths: &'a [usize],
    /// Start of each feature's slice of a histogram.
    pub(super) offsets: &'a [usize],
    pub(super) hist_len: usize,
    pub(super) cuts: &'a [Vec<f64>],
    pub(super) settings: &'a Boosted,
    pub(super) task: Task,
}

impl Grower<'_> {
    /// The histogram of the rows `rows`. Rows are read one at a time with
    /// all their bins (one cache line), each bin adding its rows in the
    /// order of `rows`.
    fn histogram(&self, rows: &[u32], grad: &[f64], hess: &[f64]) -> Vec<Bin> {
        let mut hist = vec![Bin::default(); self.hist_len];
        let d = self.d;
        // One 256-slot array per feature: a bin number (a u8) indexes its
        // array without a bounds check.
        let mut features: Vec<&mut [Bin; BIN_STRIDE]> = hist
            .chunks_exact_mut(BIN_STRIDE)
            .filter_map(|c| <&mut [Bin; BIN_STRIDE]>::try_from(c).ok())
            .collect();
        match self.task {
            Task::Regression => {
                for &r in rows {
                    let r = r as usize;
                    let g = grad[r];
                    for (bins, &b) in features.iter_mut().zip(&self.bins[r * d..r * d + d]) {
                        let e = &mut bins[b as usize];
                        e.g += g;
                        e.n += 1;
                    }
                }
                // Squared-error hessians are all one: the count is the
                // hessian sum.
                for e in &mut hist {
                    e.h = e.n as f64;
                }
            }
            Task::Classification => {
                for &r in rows {
                    let r = r as usize;
                    let (g, h) = (grad[r], hess[r]);
                    for (bins, &b) in features.iter_mut().zip(&self.bins[r * d..r * d + d]) {
                        let e = &mut bins[b as usize];
                        e.g += g;
                        e.h += h;
                        e.n += 1;
                    }
                }
            }
        }
        hist
    }

    fn leaf_value(&self, g: f64, h: f64) -> f64 {
        let step = -g / (h + self.settings.l2);
        let step = match self.task {
            Task::Regression => step,
            Task::Classification => step.clamp(-MAX_CLASSIFICATION_STEP, MAX_CLASSIFICATION_STEP),
        };
        self.settings.learning_rate * step
    }

    fn best_split(&self, hist: &[Bin], g: f64, h: f64, n: usize) -> Option<Split> {
        let l2 = self.settings.l2;
        let min_n = self.settings.min_leaf_rows.max(1);
        let parent = g * g / (h + l2);
        let mut best: Option<Split> = None;
        for j in 0..self.d {
            let hj = &hist[self.offsets[j]..self.offsets[j] + self.widths[j]];
            let (mut lg, mut lh, mut ln) = (0.0, 0.0, 0usize);
            // Splitting after the last bin would send everything left.
            for (b, e) in hj.iter().enumerate().take(self.widths[j] - 1) {
                // An empty bin splits the rows as the bin before it does.
                if e.n == 0 {
                    continue;
                }
                lg += e.g;
                lh += e.h;
                ln += e.n as usize;
                if ln < min_n {
                    continue;
                }
                let rn = n - ln;
                if rn < min_n {
                    break;
                }
                let (rg, rh) = (g - lg, h - lh);
                if lh < MIN_LEAF_HESSIAN || rh < MIN_LEAF_HESSIAN {
                    continue;
                }
                let gain = lg * lg / (lh + l2) + rg * rg / (rh + l2) - parent;
                if gain > best.as_ref().map_or(1e-12, |s| s.gain) {
                    best = Some(Split {
                        feature: j,
                        bin: b,
                        gain,
                        left_g: lg,
                        left_h: lh,
                        left_n: ln,
                    });
                }
            }
        }
        best
    }

    /// Grows one tree on `index` (local training rows, reordered in place)
    /// and adds its leaf values to `pred`.
    pub(super) fn tree(
        &self,
        index: &mut [u32],
        scratch: &mut [u32],
        grad: &[f64],
        hess: &[f64],
        pred: &mut [f64],
    ) -> Tree {
        let (g, h): (f64, f64) = index.iter().fold((0.0, 0.0), |(a, b), &r| {
            (a + grad[r as usize], b + hess[r as usize])
        });
        let max_depth = self.settings.max_depth;
        let mut tree = Tree::default();
        tree.nodes.push(Node::leaf(0));
        let mut level = vec![Open {
            node: 0,
            start: 0,
            end: index.len(),
            g,
            h,
            hist: (max_depth > 0).then(|| self.histogram(index, grad, hess)),
        }];
        let mut leaves: Vec<Open> = Vec::new();
        for depth in 0..max_depth {
            let mut next = Vec::with_capacity(level.len() * 2);
            let children_split = depth + 1 < max_depth;
            for mut open in level {
                let n = open.end - open.start;
                let split = open
                    .hist
                    .as_deref()
                    .and_then(|hist| self.best_split(hist, open.g, open.h, n));
                let Some(split) = split else {
                    leaves.push(open);
                    continue;
                };
                // Stable partition of the node's rows: bin <= split.bin left.
                // Both destinations are written and one cursor advances, so
                // the loop has no branch to mispredict; a left write at l <= k
                // only overwrites rows already read.
                let rows = &mut index[open.start..open.end];
                let column =
                    &self.columns[split.feature * self.rows..(split.feature + 1) * self.rows];
                let bin = split.bin as u8;
                let (mut l, mut r) = (0usize, 0usize);
                let tmp = &mut scratch[..n];
                for k in 0..n {
                    let row = rows[k];
                    let left = column[row as usize] <= bin;
                    rows[l] = row;
                    tmp[r] = row;
                    l += usize::from(left);
                    r += usize::from(!left);
                }
                rows[l..].copy_from_slice(&tmp[..r]);
                debug_assert_eq!(l, split.left_n);
                let mid = open.start + l;

                let parent_hist = open.hist.take();
                let (left_hist, right_hist) = match parent_hist {
                    Some(mut large_hist) if children_split => {
                        let (small, small_is_left) = if l <= r {
                            (&index[open.start..mid], true)
                        } else {
                            (&index[mid..open.end], false)
                        };
                        let small_hist = self.histogram(small, grad, hess);
                        // The larger child's histogram is the parent's minus
                        // the smaller one's, in the parent's buffer.
                        for (p, s) in large_hist.iter_mut().zip(&small_hist) {
                            p.g -= s.g;
                            p.h -= s.h;
                            p.n -= s.n;
                        }
                        if small_is_left {
                            (Some(small_hist), Some(large_hist))
                        } else {
                            (Some(large_hist), Some(small_hist))
                        }
                    }
                    _ => (None, None),
                };
                let left_id = tree.nodes.len();
                tree.nodes.push(Node::leaf(left_id));
                tree.nodes.push(Node::leaf(left_id + 1));
                tree.depth = tree.depth.max(depth + 1);
                tree.nodes[open.node] = Node {
                    feature: split.feature as u32,
                    bin: split.bin as u8,
                    threshold: self.cuts[split.feature][split.bin],
                    left: left_id as u32,
                    right: left_id as u32 + 1,
                    value: 0.0,
                };
                next.push(Open {
                    node: left_id,
                    start: open.start,
                    end: mid,
                    g: split.left_g,
                    h: split.left_h,
                    hist: left_hist,
                });
                next.push(Open {
                    node: left_id + 1,
                    start: mid,
                    end: open.end,
                    g: open.g - split.left_g,
                    h: open.h - split.left_h,
                    hist: right_hist,
                });
            }
            level = next;
        }
        leaves.extend(level);
        for open in leaves {
            let value = self.leaf_value(open.g, open.h);
            tree.nodes[open.node].value = value;
            for &r in &index[open.start..open.end] {
                pred[r as usize] += value;
            }
        }
        tree
    }
}
