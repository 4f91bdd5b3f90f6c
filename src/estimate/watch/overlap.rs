//! Overlap: a detector on the share of arriving units whose propensity
//! lies outside [eps, 1 - eps], degraded above the dataset's limit and
//! recovered when the opposite detector finds it below.

use serde::{Deserialize, Serialize};

use crate::estimate::sequential::{log_threshold, Side};

use super::signal::{Route, Signal};
use super::tracked::Tracked;
use super::{Arrivals, Watch, WatchSettings};

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(super) struct OverlapWatch {
    pub(super) degraded: bool,
    /// The extreme-propensity indicator since the state was entered.
    share: Tracked,
}

impl Default for OverlapWatch {
    fn default() -> Self {
        Self {
            degraded: false,
            share: Tracked::new(Side::Above),
        }
    }
}

impl Watch {
    pub(super) fn check_overlap(
        &mut self,
        a: &Arrivals<'_>,
        s: &WatchSettings,
        out: &mut Vec<Signal>,
    ) {
        let eps = s.overlap_eps;
        let extreme: Vec<f64> = a
            .nuisance
            .propensity
            .iter()
            .map(|&p| f64::from(u8::from(p < eps || p > 1.0 - eps)))
            .collect();
        self.check_extreme_share(&extreme, s, out);
    }

    /// The detector on arriving units' extreme-propensity indicators (1:
    /// extreme, 0: not).
    pub(super) fn check_extreme_share(
        &mut self,
        extreme: &[f64],
        s: &WatchSettings,
        out: &mut Vec<Signal>,
    ) {
        let o = &mut self.overlap;
        o.share.fold_indicators(extreme, s.max_extreme_share);
        let log_a = log_threshold(s.alpha, s.horizon, 1);
        if o.share.fired(log_a) {
            let evidence = o.share.evidence(
                Route::Detector,
                s.max_extreme_share,
                s.alpha,
                log_a,
                s.alpha,
            );
            o.degraded = !o.degraded;
            out.push(if o.degraded {
                Signal::OverlapDegraded { evidence }
            } else {
                Signal::OverlapRecovered { evidence }
            });
            o.share = Tracked::new(if o.degraded { Side::Below } else { Side::Above });
        }
    }
}
