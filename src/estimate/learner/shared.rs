//! The feature matrix of one cross-fit, shared by all its fits, with the
//! quantile-binned copy that the boosted learner builds once and every
//! boosted fit reuses.

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

use crate::estimate::data::FeatureRows;
use rayon::prelude::*;

/// At most this many rows (evenly spaced) set the bin edges of a feature.
const QUANTILE_SAMPLE: usize = 50_000;
/// Rows binned per parallel task.
const BIN_BLOCK_ROWS: usize = 8192;

/// Features cut into quantile bins, row-major, one byte per value.
#[derive(Debug)]
pub struct Binned {
    /// Unique in the process: tells fits whether rows were binned by this
    /// very matrix.
    pub id: u64,
    pub max_bins: usize,
    pub d: usize,
    /// Cut points per feature, increasing: value x falls in the first bin k
    /// with x <= cuts[k], or in bin cuts.len() above them all.
    pub cuts: Vec<Vec<f64>>,
    /// Bins used per feature: cuts.len() + 1.
    pub widths: Vec<usize>,
    bins: Vec<u8>,
}

impl Binned {
    /// Bins `x`, in parallel: the cut points feature by feature, then the
    /// rows in blocks.
    pub fn new(x: FeatureRows<'_>, max_bins: usize) -> Self {
        let (n, d) = (x.len(), x.width());
        let max_bins = max_bins.clamp(2, 256);
        let step = n.div_ceil(QUANTILE_SAMPLE).max(1);
        let cuts: Vec<Vec<f64>> = (0..d)
            .into_par_iter()
            .map(|j| {
                let mut v: Vec<f64> = (0..n).step_by(step).map(|i| x.row(i)[j]).collect();
                v.sort_unstable_by(f64::total_cmp);
                feature_cuts(&v, max_bins)
            })
            .collect();
        let mut bins = vec![0u8; n * d];
        if d > 0 {
            bins.par_chunks_mut(BIN_BLOCK_ROWS * d)
                .enumerate()
                .for_each(|(block, out)| {
                    let first = block * BIN_BLOCK_ROWS;
                    for (k, out) in out.chunks_exact_mut(d).enumerate() {
                        let row = x.row(first + k);
                        for ((o, &v), c) in out.iter_mut().zip(row).zip(&cuts) {
                            *o = c.partition_point(|&c| c < v) as u8;
                        }
                    }
                });
        }
        let widths = cuts.iter().map(|c| c.len() + 1).collect();
        static NEXT_ID: AtomicU64 = AtomicU64::new(0);
        Self {
            id: NEXT_ID.fetch_add(1, Ordering::Relaxed),
            max_bins,
            d,
            cuts,
            widths,
            bins,
        }
    }

    /// The bins of row `i`.
    #[inline]
    pub fn row(&self, i: usize) -> &[u8] {
        &self.bins[i * self.d..(i + 1) * self.d]
    }
}

/// At most `max_bins - 1` cut points from sorted values: midpoints between
/// neighbouring distinct values when there are few of them, sample quantiles
/// otherwise.
fn feature_cuts(sorted: &[f64], max_bins: usize) -> Vec<f64> {
    let mut distinct: Vec<f64> = sorted.to_vec();
    distinct.dedup();
    if distinct.len() <= max_bins {
        return distinct
            .windows(2)
            .map(|w| w[0] + (w[1] - w[0]) / 2.0)
            .collect();
    }
    let n = sorted.len();
    let mut cuts: Vec<f64> = (1..max_bins)
        .map(|k| sorted[(k * n / max_bins).min(n - 1)])
        .collect();
    cuts.dedup();
    // A cut at the maximum would leave its last bin empty.
    if cuts.last() == sorted.last() {
        cuts.pop();
    }
    cuts
}

/// The rows every fit of a cross-fit draws from.
pub struct SharedFeatures<'a> {
    x: FeatureRows<'a>,
    binned: Mutex<Vec<Arc<Binned>>>,
}

impl<'a> SharedFeatures<'a> {
    pub fn new(x: FeatureRows<'a>) -> Self {
        Self {
            x,
            binned: Mutex::new(Vec::new()),
        }
    }

    pub fn x(&self) -> FeatureRows<'a> {
        self.x
    }

    /// The binned matrix for `max_bins`, built on first use.
    pub fn binned(&self, max_bins: usize) -> Arc<Binned> {
        let mut cache = self.binned.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(b) = cache.iter().find(|b| b.max_bins == max_bins) {
            return Arc::clone(b);
        }
        let b = Arc::new(Binned::new(self.x, max_bins));
        cache.push(Arc::clone(&b));
        b
    }

    /// The binned matrix for `max_bins` if some fit already built it.
    pub fn binned_if_cached(&self, max_bins: usize) -> Option<Arc<Binned>> {
        let cache = self.binned.lock().unwrap_or_else(|e| e.into_inner());
        cache.iter().find(|b| b.max_bins == max_bins).cloned()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bins_respect_the_cut_points() {
        let x = ndarray::Array2::from_shape_fn((1000, 2), |(i, j)| {
            if j == 0 {
                (i % 3) as f64
            } else {
                ((i * 7919) % 1000) as f64 / 10.0
            }
        });
        let b = Binned::new(FeatureRows::of_matrix(x.view()).expect("row-major"), 16);
        assert_eq!(b.cuts[0], vec![0.5, 1.5]);
        assert_eq!(b.widths[1], b.cuts[1].len() + 1);
        assert!(b.cuts[1].len() <= 15);
        for i in 0..1000 {
            for j in 0..2 {
                let bin = b.row(i)[j] as usize;
                let v = x[[i, j]];
                if bin < b.cuts[j].len() {
                    assert!(v <= b.cuts[j][bin]);
                }
                if bin > 0 {
                    assert!(v > b.cuts[j][bin - 1]);
                }
            }
        }
    }
}
