//! Calibration of a model's effect predictions: the best linear predictor
//! (BLP) of Chernozhukov, Demirer, Duflo & Fernandez-Val ("Generic machine
//! learning inference on heterogeneous treatment effects") and group ATEs by
//! quintile of the prediction.
//!
//! OLS of phi on [1, tau_hat - mean tau_hat]: a slope of 1 means the
//! predictions are calibrated in scale, 0 means they carry no signal about
//! the effect. Standard errors are heteroskedasticity-robust (HC1).

use serde::Serialize;

use super::stats::{mean_se, Estimate};
use super::targeting::{descending_order, Ranked};

#[derive(Debug, Clone, Serialize)]
pub struct GroupAte {
    /// 1 = lowest fifth of predictions.
    pub quintile: usize,
    pub units: usize,
    pub mean_prediction: f64,
    pub ate: Estimate,
}

#[derive(Debug, Clone, Serialize)]
pub struct Calibration {
    /// None when the predictions do not vary (state says so).
    pub slope: Option<Estimate>,
    pub intercept: Estimate,
    /// "ok" or "constant_predictions".
    pub state: &'static str,
    pub groups: Vec<GroupAte>,
    /// The top fifth's ATE minus the bottom fifth's (the GATES contrast of
    /// Chernozhukov et al.): how much more the units the model ranks first
    /// gain than those it ranks last. The groups are disjoint sets of
    /// units and the model was fitted elsewhere, so the se is the two
    /// groups' in quadrature. None when fewer than two groups exist.
    pub top_minus_bottom: Option<Estimate>,
}

/// The highest group's ATE minus the lowest's.
fn top_minus_bottom(groups: &[GroupAte]) -> Option<Estimate> {
    match (groups.first(), groups.last()) {
        (Some(low), Some(high)) if groups.len() >= 2 => Some(Estimate::new(
            high.ate.estimate - low.ate.estimate,
            (high.ate.se.powi(2) + low.ate.se.powi(2)).sqrt(),
        )),
        _ => None,
    }
}

pub fn calibration(phi: &[f64], tau_hat: &[f64]) -> Calibration {
    calibration_ordered(phi, tau_hat, &descending_order(tau_hat))
}

/// [`calibration`] given the units' descending order by `tau_hat` (shared
/// with targeting, so the predictions are sorted once per pass).
pub fn calibration_ordered(phi: &[f64], tau_hat: &[f64], order: &[u32]) -> Calibration {
    calibration_ranked(phi, tau_hat, &Ranked::new(phi, tau_hat, order))
}

/// [`calibration`] given the units [`Ranked`] by `tau_hat` (shared with
/// targeting).
pub fn calibration_ranked(phi: &[f64], tau_hat: &[f64], ranked: &Ranked) -> Calibration {
    let n = phi.len();
    let nf = n as f64;
    let mean_tau = tau_hat.iter().sum::<f64>() / nf;
    let centered: Vec<f64> = tau_hat.iter().map(|t| t - mean_tau).collect();
    let sxx: f64 = centered.iter().map(|c| c * c).sum();
    let ate = mean_se(phi);
    let scale = tau_hat
        .iter()
        .map(|t| t.abs())
        .fold(0.0, f64::max)
        .max(1e-300);
    if n < 3 || sxx <= (1e-12 * scale).powi(2) * nf {
        return Calibration {
            slope: None,
            intercept: ate,
            state: "constant_predictions",
            groups: Vec::new(),
            top_minus_bottom: None,
        };
    }
    let slope = centered.iter().zip(phi).map(|(c, p)| c * p).sum::<f64>() / sxx;
    let intercept = ate.estimate;
    // HC1 sandwich; X'X is diagonal because the regressor is centered.
    let (mut meat_b, mut meat_a) = (0.0, 0.0);
    for i in 0..n {
        let e = phi[i] - intercept - slope * centered[i];
        meat_b += (e * centered[i]).powi(2);
        meat_a += e * e;
    }
    let hc1 = nf / (nf - 2.0);
    let se_slope = (hc1 * meat_b).sqrt() / sxx;
    let se_intercept = (hc1 * meat_a).sqrt() / nf;

    let groups = quintile_groups(ranked);
    Calibration {
        slope: Some(Estimate::new(slope, se_slope)),
        intercept: Estimate::new(intercept, se_intercept),
        state: "ok",
        top_minus_bottom: top_minus_bottom(&groups),
        groups,
    }
}

/// Group ATEs by quintile of the prediction. Tied predictions stay in one
/// group (the group of their average rank), so groups can be uneven or empty
/// when predictions take few values; empty groups are omitted. A group's
/// units are a run of the ranked order (lower positions, higher groups).
fn quintile_groups(r: &Ranked) -> Vec<GroupAte> {
    let n = r.len();
    // (first position, end position) of each quintile's run.
    let mut runs: [Option<(usize, usize)>; 5] = [None; 5];
    for (s, e) in r.blocks() {
        // Average ascending rank (1-based): a tie block at descending
        // positions [s, e) holds ascending ranks n - e + 1 ..= n - s.
        let rank = (2 * n - s - e + 1) as f64 / 2.0;
        let g = ((((rank - 0.5) / n as f64) * 5.0).floor() as usize).min(4);
        let run = runs[g].get_or_insert((s, e));
        run.0 = run.0.min(s);
        run.1 = run.1.max(e);
    }
    runs.iter()
        .enumerate()
        .filter_map(|(g, run)| run.map(|(s, e)| (g, s, e)))
        .map(|(g, s, e)| GroupAte {
            quintile: g + 1,
            units: e - s,
            mean_prediction: r.tau[s..e].iter().sum::<f64>() / (e - s) as f64,
            ate: mean_se(&r.phi[s..e]),
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exact_linear_signal_has_slope_one() {
        let tau_hat: Vec<f64> = (0..100).map(|i| i as f64 / 10.0).collect();
        let phi: Vec<f64> = tau_hat.iter().map(|t| 2.0 + (t - 4.95)).collect();
        let c = calibration(&phi, &tau_hat);
        let s = c.slope.expect("varying predictions");
        assert!((s.estimate - 1.0).abs() < 1e-12);
        assert!(s.se < 1e-9);
        assert_eq!(c.groups.len(), 5);
        assert!(c.groups.iter().all(|g| g.units == 20));
        assert!((c.intercept.estimate - 2.0).abs() < 1e-12);
        // Fifths of 0.0..9.9 step 0.1: group means 0.95 and 8.95 apart by 8.
        let d = c.top_minus_bottom.expect("five groups");
        assert!((d.estimate - 8.0).abs() < 1e-12, "{d:?}");
        let (low, high) = (&c.groups[0].ate, &c.groups[4].ate);
        assert!((d.se - (low.se.powi(2) + high.se.powi(2)).sqrt()).abs() < 1e-15);
    }

    #[test]
    fn constant_predictions_are_a_named_state() {
        let c = calibration(&[1.0, 2.0, 3.0], &[0.5, 0.5, 0.5]);
        assert!(c.slope.is_none());
        assert_eq!(c.state, "constant_predictions");
    }
}
