//! Mergeable per-model score aggregates.
//!
//! For one estimator and m models, a [`ScoreSums`] holds the unit count, the
//! mean contribution of every model and the co-moment matrix
//! sum (c_k - mean_k)(c_l - mean_l). Two aggregates over disjoint sets of units
//! merge exactly (Chan, Golub & LeVeque 1979), so partitions of a dataset
//! (cohorts, shards, time slices) can be scored separately and combined
//! without revisiting units. Centered co-moments avoid the cancellation that
//! raw sums of squares suffer when a mean is large relative to its spread.

use serde::{Deserialize, Serialize};

use super::stats::Estimate;

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ScoreSums {
    n: u64,
    mean: Vec<f64>,
    /// Row-major m x m co-moment matrix.
    comoment: Vec<f64>,
}

impl ScoreSums {
    pub fn new(models: usize) -> Self {
        Self {
            n: 0,
            mean: vec![0.0; models],
            comoment: vec![0.0; models * models],
        }
    }

    pub fn models(&self) -> usize {
        self.mean.len()
    }

    pub fn count(&self) -> u64 {
        self.n
    }

    /// Adds one unit's contributions (one per model).
    pub fn push(&mut self, c: &[f64]) {
        let m = self.mean.len();
        debug_assert_eq!(c.len(), m);
        self.n += 1;
        let inv = 1.0 / self.n as f64;
        let mut delta = vec![0.0; m];
        for ((d, mean), &ck) in delta.iter_mut().zip(self.mean.iter_mut()).zip(c) {
            *d = ck - *mean;
            *mean += *d * inv;
        }
        for ((row, &ck), mean) in self.comoment.chunks_mut(m).zip(c).zip(&self.mean) {
            let after = ck - mean;
            for (cell, d) in row.iter_mut().zip(&delta) {
                *cell += d * after;
            }
        }
    }

    /// Adds a block of `len` units whose contributions are stored model by
    /// model: `columns[k * len + i]` is unit i's contribution for model k.
    /// The block's means and co-moments are formed first (two passes over
    /// contiguous columns, the co-moments as dot products of centered
    /// columns, which the compiler vectorizes) and then merged as in
    /// [`ScoreSums::merge`]. `columns` is centered in place.
    pub fn push_block(&mut self, columns: &mut [f64], len: usize) {
        let m = self.mean.len();
        debug_assert_eq!(columns.len(), m * len);
        if len == 0 {
            return;
        }
        let (na, nb) = (self.n as f64, len as f64);
        let n = na + nb;
        let mut delta = Vec::with_capacity(m);
        for (k, col) in columns.chunks_exact_mut(len).enumerate() {
            let mean = col.iter().sum::<f64>() / nb;
            for v in col.iter_mut() {
                *v -= mean;
            }
            delta.push(mean - self.mean[k]);
        }
        let cross = na * nb / n;
        for k in 0..m {
            let a = &columns[k * len..(k + 1) * len];
            for l in k..m {
                let b = &columns[l * len..(l + 1) * len];
                let add = dot(a, b) + delta[k] * delta[l] * cross;
                self.comoment[k * m + l] += add;
                if l != k {
                    self.comoment[l * m + k] += add;
                }
            }
        }
        for (mean, d) in self.mean.iter_mut().zip(&delta) {
            *mean += d * nb / n;
        }
        self.n += len as u64;
    }

    /// The aggregate of the linear combinations `weights[j]` of the columns:
    /// output column j is sum_k weights[j][k] c_k. Means map linearly and
    /// co-moments as W C W', exactly up to rounding.
    pub fn linear_map(&self, weights: &[Vec<f64>]) -> ScoreSums {
        let m = self.mean.len();
        let out_m = weights.len();
        let mut out = ScoreSums::new(out_m);
        out.n = self.n;
        for (j, w) in weights.iter().enumerate() {
            debug_assert_eq!(w.len(), m);
            out.mean[j] = w.iter().zip(&self.mean).map(|(a, b)| a * b).sum();
        }
        // W C, then (W C) W'.
        let mut wc = vec![0.0; out_m * m];
        for (j, w) in weights.iter().enumerate() {
            for (k, &wk) in w.iter().enumerate() {
                if wk != 0.0 {
                    for l in 0..m {
                        wc[j * m + l] += wk * self.comoment[k * m + l];
                    }
                }
            }
        }
        for j in 0..out_m {
            for (i, w) in weights.iter().enumerate() {
                out.comoment[j * out_m + i] = w
                    .iter()
                    .zip(&wc[j * m..(j + 1) * m])
                    .map(|(a, b)| a * b)
                    .sum();
            }
        }
        out
    }

    /// Combines aggregates over disjoint units; the result equals the
    /// aggregate over their union up to rounding.
    pub fn merge(&mut self, other: &ScoreSums) {
        let m = self.mean.len();
        debug_assert_eq!(other.mean.len(), m);
        if other.n == 0 {
            return;
        }
        if self.n == 0 {
            *self = other.clone();
            return;
        }
        let (na, nb) = (self.n as f64, other.n as f64);
        let n = na + nb;
        let delta: Vec<f64> = (0..m).map(|k| other.mean[k] - self.mean[k]).collect();
        for k in 0..m {
            for l in 0..m {
                self.comoment[k * m + l] +=
                    other.comoment[k * m + l] + delta[k] * delta[l] * na * nb / n;
            }
        }
        for (mean, d) in self.mean.iter_mut().zip(&delta) {
            *mean += d * nb / n;
        }
        self.n += other.n;
    }

    pub fn mean(&self, k: usize) -> f64 {
        self.mean[k]
    }

    pub fn means(&self) -> &[f64] {
        &self.mean
    }

    /// Covariance of the sample means of models k and l (sample covariance
    /// with n - 1, over n). Zero with fewer than two units.
    pub fn mean_covariance(&self, k: usize, l: usize) -> f64 {
        if self.n < 2 {
            return 0.0;
        }
        let n = self.n as f64;
        self.comoment[k * self.mean.len() + l] / (n - 1.0) / n
    }

    /// Mean contribution of model k with its standard error.
    pub fn estimate(&self, k: usize) -> Estimate {
        Estimate::new(self.mean[k], self.mean_covariance(k, k).max(0.0).sqrt())
    }

    /// Mean of c_k - c_l with its standard error, using the covariance so
    /// that the noise shared by both models cancels.
    pub fn difference(&self, k: usize, l: usize) -> Estimate {
        let var = self.mean_covariance(k, k) + self.mean_covariance(l, l)
            - 2.0 * self.mean_covariance(k, l);
        Estimate::new(self.mean[k] - self.mean[l], var.max(0.0).sqrt())
    }
}

/// Dot product with four partial sums, so that the loop vectorizes.
fn dot(a: &[f64], b: &[f64]) -> f64 {
    let mut acc = [0.0f64; 4];
    let (ca, cb) = (a.chunks_exact(4), b.chunks_exact(4));
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        acc[0] += x[0] * y[0];
        acc[1] += x[1] * y[1];
        acc[2] += x[2] * y[2];
        acc[3] += x[3] * y[3];
    }
    let mut tail = 0.0;
    for (x, y) in ra.iter().zip(rb) {
        tail += x * y;
    }
    (acc[0] + acc[1]) + (acc[2] + acc[3]) + tail
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rows() -> Vec<[f64; 3]> {
        (0..500)
            .map(|i| {
                let t = i as f64;
                [1e6 + (t * 0.37).sin(), (t * 0.11).cos() * 3.0, t * 0.01]
            })
            .collect()
    }

    #[test]
    fn merged_partitions_equal_the_whole() {
        let mut whole = ScoreSums::new(3);
        for r in rows() {
            whole.push(&r);
        }
        let mut parts: Vec<ScoreSums> = (0..4).map(|_| ScoreSums::new(3)).collect();
        for (i, r) in rows().iter().enumerate() {
            parts[i % 7 % 4].push(r);
        }
        let mut merged = ScoreSums::new(3);
        for p in &parts {
            merged.merge(p);
        }
        assert_eq!(merged.count(), whole.count());
        for k in 0..3 {
            assert!((merged.mean(k) - whole.mean(k)).abs() < 1e-9 * whole.mean(k).abs().max(1.0));
            for l in 0..3 {
                let (a, b) = (merged.mean_covariance(k, l), whole.mean_covariance(k, l));
                // Rounding is relative to the spreads, not to a small
                // covariance: compare against sd_k * sd_l. Column 0 sits at
                // 1e6 with unit spread, so 1e-16 * 1e6 per operation gives
                // errors near 1e-10 of that scale; 1e-8 leaves margin.
                let scale = (whole.mean_covariance(k, k) * whole.mean_covariance(l, l)).sqrt();
                assert!((a - b).abs() < 1e-8 * scale, "{k},{l}: {a} vs {b}");
            }
        }
    }

    #[test]
    fn matches_two_pass_formulas() {
        let mut s = ScoreSums::new(3);
        let data = rows();
        for r in &data {
            s.push(r);
        }
        let n = data.len() as f64;
        let m0 = data.iter().map(|r| r[0]).sum::<f64>() / n;
        let m1 = data.iter().map(|r| r[1]).sum::<f64>() / n;
        let cov01: f64 = data.iter().map(|r| (r[0] - m0) * (r[1] - m1)).sum::<f64>() / (n - 1.0);
        assert!((s.mean_covariance(0, 1) - cov01 / n).abs() < 1e-12);
        let d: Vec<f64> = data.iter().map(|r| r[0] - r[1]).collect();
        let e = crate::estimate::stats::mean_se(&d);
        let diff = s.difference(0, 1);
        assert!((diff.estimate - e.estimate).abs() < 1e-6);
        assert!((diff.se - e.se).abs() < 1e-9);
    }

    #[test]
    fn blocks_equal_unit_by_unit_pushes() {
        let data = rows();
        let mut single = ScoreSums::new(3);
        for r in &data {
            single.push(r);
        }
        let mut blocked = ScoreSums::new(3);
        for chunk in data.chunks(77) {
            let len = chunk.len();
            let mut columns = vec![0.0; 3 * len];
            for (i, r) in chunk.iter().enumerate() {
                for k in 0..3 {
                    columns[k * len + i] = r[k];
                }
            }
            blocked.push_block(&mut columns, len);
        }
        assert_eq!(blocked.count(), single.count());
        for k in 0..3 {
            // Same tolerances as `merged_partitions_equal_the_whole`.
            assert!(
                (blocked.mean(k) - single.mean(k)).abs() < 1e-9 * single.mean(k).abs().max(1.0)
            );
            for l in 0..3 {
                let scale = (single.mean_covariance(k, k) * single.mean_covariance(l, l)).sqrt();
                let (a, b) = (blocked.mean_covariance(k, l), single.mean_covariance(k, l));
                assert!((a - b).abs() < 1e-8 * scale, "{k},{l}: {a} vs {b}");
            }
        }
    }

    #[test]
    fn linear_map_equals_the_aggregate_of_the_combinations() {
        let data = rows();
        let weights = vec![vec![1.0, 0.0, 0.0], vec![0.5, -2.0, 3.0]];
        let mut direct = ScoreSums::new(2);
        let mut source = ScoreSums::new(3);
        for r in &data {
            source.push(r);
            direct.push(&[r[0], 0.5 * r[0] - 2.0 * r[1] + 3.0 * r[2]]);
        }
        let mapped = source.linear_map(&weights);
        for k in 0..2 {
            assert!((mapped.mean(k) - direct.mean(k)).abs() < 1e-9 * direct.mean(k).abs().max(1.0));
            for l in 0..2 {
                let scale = (direct.mean_covariance(k, k) * direct.mean_covariance(l, l)).sqrt();
                let (a, b) = (mapped.mean_covariance(k, l), direct.mean_covariance(k, l));
                assert!((a - b).abs() < 1e-8 * scale, "{k},{l}: {a} vs {b}");
            }
        }
    }
}
