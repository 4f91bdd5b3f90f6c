//! [`Tracked`], the one building block of every check: the mean of a
//! watched quantity since the check (re)started, a change detector on it,
//! and the stretch a detection dates the change from, turned into the
//! [`Evidence`] a decision reports.

use serde::{Deserialize, Serialize};

use crate::estimate::sequential::{
    bounded_log_e, cs_radius, gaussian_log_e, indicator_log_e, BatchSums, Detector, Side,
};
use crate::estimate::stats::Moments;

use super::signal::{Evidence, Route};

/// A running mean with a detector on it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(super) struct Tracked {
    pub(super) since: Moments,
    pub(super) detector: Detector,
    /// The looks since the running sum of the deviations from the
    /// threshold (signed by the detector's side) was last at its minimum:
    /// the stretch a CUSUM would date a change from. A detector's evidence
    /// reports the mean over it.
    #[serde(default)]
    stretch: Moments,
}

impl Tracked {
    pub(super) fn new(side: Side) -> Self {
        Self {
            since: Moments::default(),
            detector: Detector::new(side),
            stretch: Moments::default(),
        }
    }

    fn fold_stretch(&mut self, values: &[f64], theta: f64) {
        self.stretch.merge(&Moments::of(values));
        let sign = match self.detector.side {
            Side::Above => 1.0,
            Side::Below => -1.0,
        };
        if sign * (self.stretch.mean() - theta) <= 0.0 {
            self.stretch = Moments::default();
        }
    }

    /// Folds a look of unbounded values in; the detector's grid is placed
    /// by the standard deviation of the earlier looks (the first look only
    /// sets it).
    pub(super) fn fold_gaussian(&mut self, values: &[f64], theta: f64) {
        if values.is_empty() {
            return;
        }
        if self.since.count() >= 2 && self.since.sd() > 0.0 {
            let log_e = gaussian_log_e(
                &BatchSums::of(values.iter().copied()),
                theta,
                self.since.sd(),
                self.detector.side,
            );
            self.detector.update(&log_e);
        }
        self.since.merge(&Moments::of(values));
        self.fold_stretch(values, theta);
    }

    pub(super) fn fold_indicators(&mut self, values: &[f64], theta: f64) {
        if values.is_empty() {
            return;
        }
        let ones = values.iter().filter(|&&v| v == 1.0).count() as u64;
        self.detector.update(&indicator_log_e(
            ones,
            values.len() as u64,
            theta,
            self.detector.side,
        ));
        self.since.merge(&Moments::of(values));
        self.fold_stretch(values, theta);
    }

    pub(super) fn fold_bounded(&mut self, values: &[f64], theta: f64, lo: f64, hi: f64) {
        if values.is_empty() {
            return;
        }
        self.detector
            .update(&bounded_log_e(values, theta, lo, hi, self.detector.side));
        self.since.merge(&Moments::of(values));
        self.fold_stretch(values, theta);
    }

    pub(super) fn evidence(
        &self,
        route: Route,
        threshold: f64,
        cs_alpha: f64,
        log_threshold: f64,
        alpha: f64,
    ) -> Evidence {
        // A detector dates the change: its evidence is the stretch since.
        let m = match route {
            Route::Detector if self.stretch.count() > 0 => &self.stretch,
            _ => &self.since,
        };
        let r = cs_radius(m.count(), m.sd(), cs_alpha);
        Evidence {
            route,
            estimate: m.mean(),
            lower: m.mean() - r,
            upper: m.mean() + r,
            units: m.count(),
            looks: self.detector.looks,
            log_statistic: self.detector.log_statistic(),
            log_threshold,
            threshold,
            alpha,
        }
    }

    pub(super) fn fired(&self, log_threshold: f64) -> bool {
        self.detector.log_statistic() >= log_threshold
    }
}
