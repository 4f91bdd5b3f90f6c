//! Anytime-valid statistics for a stream that is looked at after every
//! batch, forever.
//!
//! A fixed-sample test at level alpha, repeated after every recompute,
//! raises a false alarm with a probability that grows to one with the
//! number of looks. The two tools here keep their error rate whatever the
//! number of looks, and whenever one stops looking:
//!
//! - [`cs_radius`], a confidence sequence for a running mean: with
//!   probability at least 1 - alpha it covers the mean at every look at
//!   once (the Gaussian-mixture asymptotic confidence sequence of
//!   Waudby-Smith, Arbour, Sinha, Kennedy & Ramdas, "Time-uniform central
//!   limit theory and asymptotic confidence sequences", 2024, Theorem 2.2).
//!   It answers "is the mean since the sequence started above zero?".
//! - [`Detector`], a change detector: a mixture of Shiryaev-Roberts
//!   statistics over e-values (the e-detectors of Shin, Ramdas & Rinaldo,
//!   "E-detectors: a nonparametric framework for sequential change
//!   detection", 2023). It answers "has the mean been above a threshold
//!   since some recent look?", so that a change in the current population
//!   is seen without waiting for the whole history to turn.
//!
//! The detector's guarantee: each look folds in one e-value per grid
//! point, E[e | past] <= 1 while nothing has changed, so for the
//! Shiryaev-Roberts statistic R_t = (1 + R_{t-1}) e_t (and the grid's mean
//! of them) R_t - t is a supermartingale. For t <= H, R_t <= R_t - t + H,
//! a nonnegative supermartingale starting at H, so Ville's inequality gives
//! P(R_t >= A for some t <= H) <= H / A.
//! [`log_threshold`] sets A = H k / alpha for k detectors sharing alpha, so
//! that the chance of any false alarm within the first H looks is at most
//! alpha, and the average run length to a false alarm is at least H k /
//! alpha looks.
//!
//! Two kinds of e-values, chosen by what is known of the values:
//! - [`bounded_log_e`]: values in a known interval (an indicator, a
//!   treatment minus a propensity). Betting e-values 1 + lambda (x - theta)
//!   are exact e-values under E[x | past] <= theta, with no approximation.
//! - [`gaussian_log_e`]: unbounded values (differences of squared errors,
//!   outcome residuals). Self-normalized e-values exp(eta S - eta^2 V / 2)
//!   with S the batch's sum and V its sum of squares; exact for
//!   conditionally symmetric values (de la Pena 1999), and otherwise valid
//!   up to a skewness term of order eta^3 per value, which vanishes as the
//!   detector's grid moves to small shifts. Like the confidence sequence,
//!   the guarantee is asymptotic: it rests on the values having a few
//!   finite moments.

use serde::{Deserialize, Serialize};

/// Units at which the confidence sequence is tightest (its mixing
/// variance is tuned for this many values): wide enough to separate
/// models over a few weekly cohorts, and the width elsewhere grows only
/// like the square root of a logarithm.
pub const CS_TIGHTEST_AT: f64 = 10_000.0;

/// Half-width of the two-sided (1 - alpha) asymptotic confidence sequence
/// for a mean after `n` values with sample standard deviation `sd`:
///
///   sd * sqrt( 2 (n r + 1) / (n^2 r) * ln( sqrt(n r + 1) / alpha ) ),
///
/// with r = (-2 ln alpha + ln(-2 ln alpha + 1)) / [`CS_TIGHTEST_AT`] (the
/// choice that minimises the width at that many values). Infinite below two
/// values.
pub fn cs_radius(n: u64, sd: f64, alpha: f64) -> f64 {
    if n < 2 || !(alpha > 0.0 && alpha < 1.0) {
        return f64::INFINITY;
    }
    let a = -2.0 * alpha.ln();
    let r = (a + (a + 1.0).ln()) / CS_TIGHTEST_AT;
    let n = n as f64;
    let nr = n * r;
    sd * (2.0 * (nr + 1.0) / (n * n * r) * ((nr + 1.0).sqrt() / alpha).ln()).sqrt()
}

/// The grid of a detector: this many alternatives, each half the last.
pub const GRID: usize = 10;

/// The k-th grid point, 1/2, 1/4, ... 1/2^GRID: the largest bets a
/// one-unit stride from the threshold (for bounded values) or one standard
/// deviation (for unbounded ones) supports, and nine smaller ones for small
/// shifts that need many units to show.
fn grid_point(k: usize) -> f64 {
    0.5f64.powi(k as i32 + 1)
}

/// ln A for `detectors` detectors that share `alpha` over the first
/// `horizon` looks (see the module notes).
pub fn log_threshold(alpha: f64, horizon: u64, detectors: usize) -> f64 {
    (horizon.max(1) as f64 * detectors.max(1) as f64 / alpha).ln()
}

/// Which side of the threshold a detector watches for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Side {
    /// The mean has risen above the threshold.
    Above,
    /// The mean has fallen below the threshold.
    Below,
}

impl Side {
    fn sign(self) -> f64 {
        match self {
            Side::Above => 1.0,
            Side::Below => -1.0,
        }
    }
}

/// One look's log e-values, one per grid point, for values in [lo, hi]
/// against H0: E[x | past] <= theta ([`Side::Above`]) or >= theta
/// ([`Side::Below`]). Each bet lambda x (x - theta) stays above -1 on
/// [lo, hi], so every e-value is positive and exact.
pub fn bounded_log_e(values: &[f64], theta: f64, lo: f64, hi: f64, side: Side) -> [f64; GRID] {
    let reach = match side {
        Side::Above => theta - lo,
        Side::Below => hi - theta,
    };
    let s = side.sign();
    let mut out = [0.0; GRID];
    if reach <= 0.0 {
        return out;
    }
    for (k, o) in out.iter_mut().enumerate() {
        let lambda = grid_point(k) / reach;
        *o = values
            .iter()
            .map(|&x| (s * lambda * (x.clamp(lo, hi) - theta)).ln_1p())
            .sum();
    }
    out
}

/// [`bounded_log_e`] for 0/1 values, from their count: `ones` of `n`.
pub fn indicator_log_e(ones: u64, n: u64, theta: f64, side: Side) -> [f64; GRID] {
    let mut out = [0.0; GRID];
    let reach = match side {
        Side::Above => theta,
        Side::Below => 1.0 - theta,
    };
    if reach <= 0.0 || ones > n {
        return out;
    }
    let s = side.sign();
    let (ones, zeros) = (ones as f64, (n - ones) as f64);
    for (k, o) in out.iter_mut().enumerate() {
        let lambda = grid_point(k) / reach;
        *o = ones * (s * lambda * (1.0 - theta)).ln_1p() + zeros * (-s * lambda * theta).ln_1p();
    }
    out
}

/// Sums of one look's values: count, sum and sum of squares, from which
/// the Gaussian e-values against any threshold follow.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct BatchSums {
    pub n: u64,
    pub sum: f64,
    pub sum_sq: f64,
}

impl BatchSums {
    pub fn of(values: impl IntoIterator<Item = f64>) -> Self {
        let mut s = Self::default();
        for v in values {
            s.n += 1;
            s.sum += v;
            s.sum_sq += v * v;
        }
        s
    }
}

/// One look's log e-values, one per grid point, for unbounded values
/// against H0: E[x | past] <= theta ([`Side::Above`]) or >= theta
/// ([`Side::Below`]): ln e = eta S - eta^2 V / 2 with S and V the sum and
/// sum of squares of the signed deviations from theta, and eta = grid /
/// `scale`. `scale` (the values' standard deviation) must be known before
/// the look, from earlier looks: it only places the grid, and a poor one
/// costs power, not validity.
pub fn gaussian_log_e(sums: &BatchSums, theta: f64, scale: f64, side: Side) -> [f64; GRID] {
    let mut out = [0.0; GRID];
    if sums.n == 0 || !(scale > 0.0 && scale.is_finite()) {
        return out;
    }
    let n = sums.n as f64;
    // Deviations y = s (x - theta): sum and sum of squares.
    let s = side.sign();
    let sy = s * (sums.sum - n * theta);
    let syy = (sums.sum_sq - 2.0 * theta * sums.sum + n * theta * theta).max(0.0);
    for (k, o) in out.iter_mut().enumerate() {
        let eta = grid_point(k) / scale;
        *o = eta * sy - 0.5 * eta * eta * syy;
    }
    out
}

/// A mixture of Shiryaev-Roberts statistics, one per grid point, kept on
/// the log scale (they grow geometrically under a change).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Detector {
    pub side: Side,
    /// ln R per grid point; -inf before the first look. JSON has no
    /// infinity, so -inf is stored as null (see [`log_scale`]).
    #[serde(with = "log_scale")]
    log_r: Vec<f64>,
    /// Looks folded in since the detector (re)started.
    pub looks: u64,
}

/// Stores ln R values in JSON: -inf (a statistic that has not started) as
/// null, and read back as -inf. Without it a detector that has not looked
/// yet is written as null and cannot be read back, and a restart fails.
mod log_scale {
    use serde::{Deserialize, Deserializer, Serialize, Serializer};

    pub fn serialize<S: Serializer>(values: &[f64], s: S) -> Result<S::Ok, S::Error> {
        values
            .iter()
            .map(|&v| match v {
                v if v == f64::NEG_INFINITY => None,
                // ln R beyond any threshold; keeps its alarm after a restart.
                v if v.is_infinite() => Some(f64::MAX),
                v => Some(v),
            })
            .collect::<Vec<Option<f64>>>()
            .serialize(s)
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Vec<f64>, D::Error> {
        Ok(Vec::<Option<f64>>::deserialize(d)?
            .into_iter()
            .map(|v| v.unwrap_or(f64::NEG_INFINITY))
            .collect())
    }
}

impl Detector {
    pub fn new(side: Side) -> Self {
        Self {
            side,
            log_r: vec![f64::NEG_INFINITY; GRID],
            looks: 0,
        }
    }

    /// Folds one look's log e-values in: R = (1 + R) e per grid point.
    pub fn update(&mut self, log_e: &[f64; GRID]) {
        for (r, e) in self.log_r.iter_mut().zip(log_e) {
            // ln(1 + exp(r)), stable on both ends.
            let one_plus = if *r > 0.0 {
                *r + (-*r).exp().ln_1p()
            } else {
                r.exp().ln_1p()
            };
            *r = one_plus + e;
        }
        self.looks += 1;
    }

    /// ln of the mixture statistic: the log of the grid's mean R.
    pub fn log_statistic(&self) -> f64 {
        let max = self.log_r.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if max == f64::NEG_INFINITY {
            return f64::NEG_INFINITY;
        }
        let mean: f64 =
            self.log_r.iter().map(|r| (r - max).exp()).sum::<f64>() / self.log_r.len() as f64;
        max + mean.ln()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::stats::standard_normal;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    fn normal(rng: &mut ChaCha8Rng) -> f64 {
        standard_normal(rng)
    }

    #[test]
    fn radius_at_the_tuning_point() {
        // At n = CS_TIGHTEST_AT and alpha = 0.05, n r = a = 7.937 and the
        // radius is sd / sqrt(n) * sqrt(2 (a + 1) / a * ln(sqrt(a + 1) /
        // 0.05)) = 3.035 sd / sqrt(n), against 1.96 for one look: the price
        // of looking forever (hand computation from the formula).
        let r = cs_radius(10_000, 1.0, 0.05) * 100.0;
        assert!((r - 3.035).abs() < 0.005, "{r}");
        assert!(cs_radius(1, 1.0, 0.05).is_infinite());
        // Wider for smaller alpha, narrower with more values.
        assert!(cs_radius(10_000, 1.0, 0.01) > cs_radius(10_000, 1.0, 0.05));
        assert!(cs_radius(40_000, 1.0, 0.05) < cs_radius(10_000, 1.0, 0.05));
    }

    #[test]
    fn a_threshold_pays_for_looks_and_detectors() {
        assert!((log_threshold(0.05, 1000, 1) - (20_000f64).ln()).abs() < 1e-12);
        assert!((log_threshold(0.05, 1000, 4) - (80_000f64).ln()).abs() < 1e-12);
    }

    #[test]
    fn bounded_e_values_are_exact_at_the_threshold() {
        // A Bernoulli(theta) indicator: E[1 + lambda (x - theta)] = 1, so
        // the mean of the e-values over both outcomes, weighted, is 1.
        let theta = 0.1;
        let one = bounded_log_e(&[1.0], theta, 0.0, 1.0, Side::Above);
        let zero = bounded_log_e(&[0.0], theta, 0.0, 1.0, Side::Above);
        for k in 0..GRID {
            let mean = theta * one[k].exp() + (1.0 - theta) * zero[k].exp();
            assert!((mean - 1.0).abs() < 1e-12, "{k}: {mean}");
        }
        // The count form agrees with the values form.
        let values = [1.0, 0.0, 0.0, 1.0, 0.0];
        for side in [Side::Above, Side::Below] {
            let a = bounded_log_e(&values, theta, 0.0, 1.0, side);
            let b = indicator_log_e(2, 5, theta, side);
            for k in 0..GRID {
                assert!((a[k] - b[k]).abs() < 1e-12);
            }
        }
    }

    /// Simulation: 400 streams of 300 looks of 50 standard normal values
    /// each. The confidence sequence at alpha = 0.05 must cover the mean at
    /// every look in at least 95% of streams (400 streams put the binomial
    /// standard error of a 5% rate at 1.1%; a one-look interval reused at
    /// every look fails in well over half of them), and the detector with
    /// threshold H / alpha over H = 300 looks must stay quiet in at least
    /// 95%.
    #[test]
    fn no_false_alarms_over_many_looks() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let (streams, looks, batch) = (400, 300, 50);
        let (mut cs_miss, mut fixed_miss, mut alarms) = (0, 0, 0);
        let threshold = log_threshold(0.05, looks, 1);
        for _ in 0..streams {
            let mut m = crate::estimate::stats::Moments::default();
            let mut det = Detector::new(Side::Above);
            let (mut missed, mut fixed, mut alarmed) = (false, false, false);
            for _ in 0..looks {
                let values: Vec<f64> = (0..batch).map(|_| normal(&mut rng)).collect();
                let scale = if m.count() > 1 { m.sd() } else { 1.0 };
                det.update(&gaussian_log_e(
                    &BatchSums::of(values.iter().copied()),
                    0.0,
                    scale,
                    Side::Above,
                ));
                m.merge(&crate::estimate::stats::Moments::of(&values));
                let r = cs_radius(m.count(), m.sd(), 0.05);
                missed |= m.mean().abs() > r;
                fixed |= m.mean().abs() > 1.959964 * m.sd() / (m.count() as f64).sqrt();
                alarmed |= det.log_statistic() >= threshold;
            }
            cs_miss += usize::from(missed);
            fixed_miss += usize::from(fixed);
            alarms += usize::from(alarmed);
        }
        let rate = |k: usize| k as f64 / streams as f64;
        println!(
            "over {looks} looks: confidence sequence missed in {:.3} of streams, \
             a one-look interval in {:.3}; detector false alarms {:.3}",
            rate(cs_miss),
            rate(fixed_miss),
            rate(alarms)
        );
        assert!(rate(cs_miss) <= 0.05, "{}", rate(cs_miss));
        assert!(rate(alarms) <= 0.05, "{}", rate(alarms));
        assert!(rate(fixed_miss) >= 0.3, "{}", rate(fixed_miss));
    }

    /// A shift of a quarter standard deviation after 100 quiet looks of 50
    /// values is caught within a few looks in every one of 100 streams.
    /// Before it, the threshold (1000 / 0.05) allows a false alarm in at
    /// most 100 / 20,000 = 0.5% of streams: 3 of 100 would be a rate that
    /// far off (binomial probability under 2%).
    #[test]
    fn a_detector_reads_back_from_json_before_and_after_its_first_look() {
        let fresh = Detector::new(Side::Below);
        let json = serde_json::to_string(&fresh).expect("serializes");
        let back: Detector = serde_json::from_str(&json).expect("a fresh detector reads back");
        assert_eq!(back, fresh);
        assert!(back.log_statistic().is_infinite() && back.log_statistic() < 0.0);
        let mut looked = fresh;
        looked.update(&gaussian_log_e(
            &BatchSums::of(vec![0.3, -0.1, 0.8]),
            0.0,
            1.0,
            Side::Below,
        ));
        let back: Detector =
            serde_json::from_str(&serde_json::to_string(&looked).expect("serializes"))
                .expect("reads back");
        assert_eq!(back, looked, "bit for bit after a look");
    }

    #[test]
    fn a_shift_is_caught() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let threshold = log_threshold(0.05, 1000, 1);
        let mut delays = Vec::new();
        for _ in 0..100 {
            let mut det = Detector::new(Side::Above);
            let mut delay = None;
            for look in 0..200 {
                let shift = if look >= 100 { 0.25 } else { 0.0 };
                let values: Vec<f64> = (0..50).map(|_| shift + normal(&mut rng)).collect();
                det.update(&gaussian_log_e(
                    &BatchSums::of(values),
                    0.0,
                    1.0,
                    Side::Above,
                ));
                if det.log_statistic() >= threshold {
                    delay = Some(look as i64 - 100);
                    break;
                }
            }
            delays.push(delay.expect("detected"));
        }
        delays.sort_unstable();
        let early = delays.iter().filter(|&&d| d < 0).count();
        println!(
            "median delay {} looks; {early} of 100 alarms before the shift",
            delays[50]
        );
        assert!(early < 3, "{early} false alarms before the shift");
        assert!(delays[50] <= 10, "{delays:?}");
    }
}
