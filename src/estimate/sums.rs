//! Mergeable per-model score aggregates.
//!
//! For one estimator and m models, a [`ScoreSums`] holds the unit count, the
//! mean contribution of every model and co-moments
//! sum (c_k - mean_k)(c_l - mean_l). Two aggregates over disjoint sets of units
//! merge exactly (Chan, Golub & LeVeque 1979), so partitions of a dataset
//! (cohorts, shards, time slices) can be scored separately and combined
//! without revisiting units. Centered co-moments avoid the cancellation that
//! raw sums of squares suffer when a mean is large relative to its spread.
//!
//! Which co-moments are kept is chosen when the aggregate starts: those of
//! every column with each of the first `lead` columns, and each column's
//! own. With `lead` equal to the number of columns that is the whole
//! matrix, which the estimator that ranks models needs (every pairwise
//! difference, the joint distribution behind the simultaneous intervals);
//! the other estimators keep only their baselines' (`lead` of 2 or 3), so a
//! sweep of a thousand models costs each of them n m, not n m^2.

use ndarray::linalg::general_mat_mul;
use ndarray::{s, ArrayView2, ArrayViewMut2};

use super::stats::Estimate;

#[derive(Debug, Clone, PartialEq)]
pub struct ScoreSums {
    n: u64,
    mean: Vec<f64>,
    /// The leading columns whose co-moments with every column are kept.
    lead: usize,
    /// Row-major m x lead: `cross[k * lead + j]` is the co-moment of
    /// column k with leading column j (the whole matrix when lead = m).
    cross: Vec<f64>,
    /// The co-moment of each trailing column (k >= lead) with itself, at
    /// k - lead.
    own: Vec<f64>,
}

/// Rows per tile of the whole co-moment matrix: a block's products are
/// taken a tile of rows at a time against the columns from the tile on,
/// so little more than the upper triangle is multiplied.
const TILE: usize = 128;

impl ScoreSums {
    /// An aggregate that keeps every co-moment.
    pub fn new(models: usize) -> Self {
        Self::with_lead(models, models)
    }

    /// An aggregate that keeps the co-moments of every column with the
    /// first `lead` columns (at most `models`), and each column's own.
    pub fn with_lead(models: usize, lead: usize) -> Self {
        let lead = lead.min(models);
        Self {
            n: 0,
            mean: vec![0.0; models],
            lead,
            cross: vec![0.0; models * lead],
            own: vec![0.0; models - lead],
        }
    }

    pub fn models(&self) -> usize {
        self.mean.len()
    }

    pub fn count(&self) -> u64 {
        self.n
    }

    /// Whether every co-moment is kept.
    pub fn is_whole(&self) -> bool {
        self.lead == self.mean.len()
    }

    /// Whether the co-moment of columns k and l is kept.
    pub fn keeps(&self, k: usize, l: usize) -> bool {
        k == l || k < self.lead || l < self.lead
    }

    /// The kept co-moment of columns k and l. The whole matrix is kept on
    /// and above its diagonal (block products add only there; the cells
    /// below are never read), so a pair is read at (min, max).
    fn comoment(&self, k: usize, l: usize) -> f64 {
        let lead = self.lead;
        if self.is_whole() {
            let (a, b) = (k.min(l), k.max(l));
            return self.cross[a * lead + b];
        }
        if l < lead {
            self.cross[k * lead + l]
        } else if k < lead {
            self.cross[l * lead + k]
        } else if k == l {
            self.own[k - lead]
        } else {
            debug_assert!(false, "co-moment of {k} and {l} is not kept");
            f64::NAN
        }
    }

    /// Adds `f(k, j)` to every kept co-moment (j a leading column), and
    /// `g(k)` to each trailing column's own.
    fn add_to_kept(&mut self, f: impl Fn(usize, usize) -> f64, g: impl Fn(usize) -> f64) {
        let lead = self.lead;
        for (k, row) in self.cross.chunks_exact_mut(lead.max(1)).enumerate() {
            for (j, cell) in row.iter_mut().enumerate() {
                *cell += f(k, j);
            }
        }
        for (i, cell) in self.own.iter_mut().enumerate() {
            *cell += g(lead + i);
        }
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
        let after: Vec<f64> = c
            .iter()
            .zip(&self.mean)
            .map(|(ck, mean)| ck - mean)
            .collect();
        self.add_to_kept(|k, j| after[k] * delta[j], |k| after[k] * delta[k]);
    }

    /// Adds a block of `len` units whose contributions are stored model by
    /// model: `columns[k * len + i]` is unit i's contribution for model k.
    /// The block's means and co-moments are formed first (the means over
    /// contiguous columns; the whole co-moment matrix as matrix products of
    /// the centered block by tiles, the others as dot products) and then
    /// merged as in [`ScoreSums::merge`]. `columns` is centered in place.
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
        let columns = &*columns;
        if self.is_whole() {
            self.add_block_products(columns, len);
        } else {
            let lead = self.lead;
            let column = |k: usize| &columns[k * len..(k + 1) * len];
            for k in 0..m {
                for j in 0..lead {
                    self.cross[k * lead + j] += dot(column(k), column(j));
                }
            }
            for k in lead..m {
                self.own[k - lead] += dot(column(k), column(k));
            }
        }
        self.add_to_kept(
            |k, j| delta[k] * delta[j] * cross,
            |k| delta[k] * delta[k] * cross,
        );
        for (mean, d) in self.mean.iter_mut().zip(&delta) {
            *mean += d * nb / n;
        }
        self.n += len as u64;
    }

    /// Adds the centered block's C C' to the whole co-moment matrix, on
    /// and above the diagonal only (see [`ScoreSums::comoment`]): one
    /// matrix product per tile of rows, against the columns from the
    /// tile's first on, so that each operand is packed once per product.
    fn add_block_products(&mut self, columns: &[f64], len: usize) {
        let m = self.mean.len();
        let Ok(all) = ArrayView2::from_shape((m, len), columns) else {
            return;
        };
        let Ok(mut whole) = ArrayViewMut2::from_shape((m, m), &mut self.cross[..]) else {
            return;
        };
        for a in (0..m).step_by(TILE) {
            let a_end = (a + TILE).min(m);
            let rows = all.slice(s![a..a_end, ..]);
            let trailing = all.slice(s![a.., ..]);
            let mut out = whole.slice_mut(s![a..a_end, a..]);
            general_mat_mul(1.0, &rows, &trailing.t(), 1.0, &mut out);
        }
    }

    /// The aggregate of columns formed from this one's: first the
    /// combinations `mix[j]` of its leading `q = mix[j].len()` columns
    /// (output column j is sum_a `mix[j][a]` c_a), then its columns q.. as
    /// they are. Means map linearly and co-moments as W C W', exactly up to
    /// rounding; the output keeps every co-moment this one kept (its
    /// leading columns are the combinations and the columns q..lead).
    pub fn map_leading(&self, mix: &[Vec<f64>]) -> ScoreSums {
        let m = self.mean.len();
        let q = mix.first().map_or(0, Vec::len);
        debug_assert!(q <= self.lead && mix.iter().all(|w| w.len() == q));
        let p = mix.len();
        let out_m = p + m - q;
        let mut out = ScoreSums::with_lead(out_m, p + self.lead - q);
        out.n = self.n;
        // Output column k as a combination of this one's columns.
        enum Side<'a> {
            Mixed(&'a [f64]),
            Column(usize),
        }
        let side = |k: usize| {
            if k < p {
                Side::Mixed(&mix[k])
            } else {
                Side::Column(k - p + q)
            }
        };
        let covariance = |x: &Side<'_>, y: &Side<'_>| -> f64 {
            match (x, y) {
                (Side::Column(i), Side::Column(j)) => self.comoment(*i, *j),
                (Side::Mixed(w), Side::Column(i)) | (Side::Column(i), Side::Mixed(w)) => w
                    .iter()
                    .enumerate()
                    .map(|(a, wa)| wa * self.comoment(a, *i))
                    .sum(),
                (Side::Mixed(w), Side::Mixed(v)) => w
                    .iter()
                    .enumerate()
                    .map(|(a, wa)| {
                        wa * v
                            .iter()
                            .enumerate()
                            .map(|(b, vb)| vb * self.comoment(a, b))
                            .sum::<f64>()
                    })
                    .sum(),
            }
        };
        for k in 0..out_m {
            out.mean[k] = match side(k) {
                Side::Mixed(w) => w.iter().zip(&self.mean).map(|(a, b)| a * b).sum(),
                Side::Column(i) => self.mean[i],
            };
        }
        let lead = out.lead;
        for k in 0..out_m {
            for j in 0..lead {
                out.cross[k * lead + j] = covariance(&side(k), &side(j));
            }
        }
        for k in lead..out_m {
            out.own[k - lead] = covariance(&side(k), &side(k));
        }
        out
    }

    /// Combines aggregates over disjoint units; the result equals the
    /// aggregate over their union up to rounding. Both must keep the same
    /// co-moments.
    pub fn merge(&mut self, other: &ScoreSums) {
        let m = self.mean.len();
        debug_assert_eq!(other.mean.len(), m);
        debug_assert_eq!(other.lead, self.lead);
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
        let cross = na * nb / n;
        for (a, b) in self.cross.iter_mut().zip(&other.cross) {
            *a += b;
        }
        for (a, b) in self.own.iter_mut().zip(&other.own) {
            *a += b;
        }
        self.add_to_kept(
            |k, j| delta[k] * delta[j] * cross,
            |k| delta[k] * delta[k] * cross,
        );
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
    /// with n - 1, over n), for a pair whose co-moment is kept
    /// ([`ScoreSums::keeps`]; NaN otherwise). Zero with fewer than two units.
    pub fn mean_covariance(&self, k: usize, l: usize) -> f64 {
        if self.n < 2 {
            return 0.0;
        }
        let n = self.n as f64;
        self.comoment(k, l) / (n - 1.0) / n
    }

    /// The covariance matrix of the sample means, row-major m x m; only for
    /// an aggregate that keeps every co-moment.
    pub fn covariance_matrix(&self) -> Vec<f64> {
        debug_assert!(self.is_whole());
        let m = self.mean.len();
        if self.n < 2 {
            return vec![0.0; m * m];
        }
        let n = self.n as f64;
        let scale = 1.0 / (n - 1.0) / n;
        let mut out = vec![0.0; m * m];
        for k in 0..m {
            for l in k..m {
                let v = self.cross[k * m + l] * scale;
                out[k * m + l] = v;
                out[l * m + k] = v;
            }
        }
        out
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
pub(crate) fn dot(a: &[f64], b: &[f64]) -> f64 {
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
    fn a_leading_map_equals_the_aggregate_of_the_combinations() {
        let data = rows();
        let weights = vec![vec![1.0, 0.0, 0.0], vec![0.5, -2.0, 3.0]];
        let mut direct = ScoreSums::new(2);
        let mut source = ScoreSums::new(3);
        for r in &data {
            source.push(r);
            direct.push(&[r[0], 0.5 * r[0] - 2.0 * r[1] + 3.0 * r[2]]);
        }
        let mapped = source.map_leading(&weights);
        for k in 0..2 {
            assert!((mapped.mean(k) - direct.mean(k)).abs() < 1e-9 * direct.mean(k).abs().max(1.0));
            for l in 0..2 {
                let scale = (direct.mean_covariance(k, k) * direct.mean_covariance(l, l)).sqrt();
                let (a, b) = (mapped.mean_covariance(k, l), direct.mean_covariance(k, l));
                assert!((a - b).abs() < 1e-8 * scale, "{k},{l}: {a} vs {b}");
            }
        }
    }

    /// Six columns, wide enough for two tiles when TILE is small in
    /// spirit: the tiled products must equal unit-by-unit pushes, and an
    /// aggregate that keeps only the leading columns' co-moments must agree
    /// with the whole one wherever it keeps them, through blocks, merges
    /// and a leading map.
    #[test]
    fn kept_co_moments_agree_with_the_whole_matrix() {
        let m = TILE + 3;
        let data: Vec<Vec<f64>> = (0..700)
            .map(|i| {
                let t = i as f64;
                (0..m)
                    .map(|k| (t * (0.1 + 0.013 * k as f64)).sin() * (1.0 + k as f64 / 7.0))
                    .collect()
            })
            .collect();
        let mut single = ScoreSums::new(m);
        for r in &data {
            single.push(r);
        }
        let fill = |sums: &mut ScoreSums, rows: &[Vec<f64>]| {
            for chunk in rows.chunks(97) {
                let len = chunk.len();
                let mut columns = vec![0.0; m * len];
                for (i, r) in chunk.iter().enumerate() {
                    for k in 0..m {
                        columns[k * len + i] = r[k];
                    }
                }
                sums.push_block(&mut columns, len);
            }
        };
        let (first, second) = data.split_at(300);
        let mut whole = ScoreSums::new(m);
        let mut whole_b = ScoreSums::new(m);
        let mut kept = ScoreSums::with_lead(m, 3);
        let mut kept_b = ScoreSums::with_lead(m, 3);
        fill(&mut whole, first);
        fill(&mut whole_b, second);
        fill(&mut kept, first);
        fill(&mut kept_b, second);
        whole.merge(&whole_b);
        kept.merge(&kept_b);
        let mix = vec![vec![1.0, 0.0, 0.0], vec![0.2, 0.5, 0.3]];
        let (whole_mapped, kept_mapped) = (whole.map_leading(&mix), kept.map_leading(&mix));
        let single_mapped = single.map_leading(&mix);
        for (a, b, keeps) in [
            (&whole, &single, &kept),
            (&whole_mapped, &single_mapped, &kept_mapped),
        ] {
            assert_eq!(a.models(), b.models());
            for k in 0..a.models() {
                assert!((a.mean(k) - b.mean(k)).abs() < 1e-12);
                for l in 0..a.models() {
                    let scale = (b.mean_covariance(k, k) * b.mean_covariance(l, l)).sqrt();
                    let tol = 1e-9 * scale.max(1e-300);
                    assert!((a.mean_covariance(k, l) - b.mean_covariance(k, l)).abs() <= tol);
                    assert!(a.mean_covariance(k, l) == a.mean_covariance(l, k));
                    if keeps.keeps(k, l) {
                        let (x, y) = (keeps.mean_covariance(k, l), b.mean_covariance(k, l));
                        assert!((x - y).abs() <= tol, "{k},{l}: {x} vs {y}");
                    }
                }
            }
        }
        assert!(kept.keeps(m - 1, 2) && !kept.keeps(m - 1, m - 2));
    }
}
