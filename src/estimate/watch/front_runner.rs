//! The reported front-runner: the model with the lowest squared pseudo-outcome
//! error, replaced when a challenger's confidence sequence or change
//! detector shows it errs less, and settled once every challenger is
//! separated from it. A retired front-runner hands over to the best challenger.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::estimate::sequential::{cs_radius, log_threshold, Side};

use super::signal::{Evidence, Route, Signal};
use super::tracked::Tracked;
use super::{Watch, WatchSettings};

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(super) struct FrontRunnerWatch {
    pub(super) name: String,
    pub(super) settled: bool,
    /// Per challenger: the front-runner's squared error minus the challenger's
    /// (positive: the challenger errs less), since the appointment.
    pairs: BTreeMap<String, Tracked>,
    /// Another model has predicted since the appointment: with none, there
    /// is nothing to be uncertain about.
    #[serde(default)]
    pub(super) contested: bool,
}

impl Watch {
    pub(super) fn check_front_runner(
        &mut self,
        losses: &[(&str, Vec<f64>)],
        active: &[(String, Vec<f64>)],
        s: &WatchSettings,
        out: &mut Vec<Signal>,
    ) {
        let Some(front_runner) = self.front_runner.as_mut() else {
            // Appoint the model with the lowest mean error on this look.
            let best = losses
                .iter()
                .map(|(name, l)| (*name, mean_present(l)))
                .filter(|(_, m)| m.is_finite())
                .min_by(|a, b| a.1.total_cmp(&b.1));
            if let Some((name, _)) = best {
                self.front_runner = Some(FrontRunnerWatch {
                    name: name.to_string(),
                    settled: false,
                    pairs: BTreeMap::new(),
                    contested: losses.len() > 1,
                });
                out.push(Signal::FrontRunnerAppointed {
                    front_runner: name.to_string(),
                });
                if losses.len() > 1 {
                    out.push(Signal::FrontRunnerUncertain {
                        front_runner: name.to_string(),
                        tied: losses
                            .iter()
                            .map(|(n, _)| n.to_string())
                            .filter(|n| n != name)
                            .collect(),
                    });
                }
            }
            return;
        };
        let Some(front_runner_losses) = losses
            .iter()
            .find(|(n, _)| *n == front_runner.name)
            .map(|(_, l)| l)
        else {
            if active.iter().any(|(n, _)| *n == front_runner.name) {
                // Still active, but no prediction for these units (a late
                // or failed batch of its predictions): nothing to compare.
                return;
            }
            // The front-runner was retired: the best challenger so far takes
            // over.
            let next = front_runner
                .pairs
                .iter()
                .filter(|(n, _)| losses.iter().any(|(m, _)| m == n))
                .max_by(|a, b| a.1.since.mean().total_cmp(&b.1.since.mean()))
                .map(|(n, t)| (n.clone(), t.clone()))
                .or_else(|| {
                    losses
                        .first()
                        .map(|(n, _)| (n.to_string(), Tracked::new(Side::Above)))
                });
            if let Some((name, tracked)) = next {
                let old = front_runner.name.clone();
                let evidence = tracked.evidence(Route::Gone, 0.0, 1.0, f64::INFINITY, 0.0);
                self.appoint(name.clone(), losses.len() > 1);
                out.push(Signal::FrontRunnerChanged {
                    old,
                    new: name,
                    evidence,
                });
            }
            return;
        };
        let challengers = losses.len().saturating_sub(1).max(1);
        let cs_alpha = s.alpha / 2.0 / challengers as f64;
        let log_a = log_threshold(s.alpha / 2.0, s.horizon, challengers);
        for (name, l) in losses {
            if *name == front_runner.name {
                continue;
            }
            let d: Vec<f64> = front_runner_losses
                .iter()
                .zip(l)
                .filter(|(a, b)| !a.is_nan() && !b.is_nan())
                .map(|(a, b)| a - b)
                .collect();
            front_runner
                .pairs
                .entry(name.to_string())
                .or_insert_with(|| Tracked::new(Side::Above))
                .fold_gaussian(&d, 0.0);
        }
        // Challengers that are still predicting, with their evidence.
        let mut best: Option<(String, Evidence, f64)> = None;
        let mut tied = Vec::new();
        for (name, t) in &front_runner.pairs {
            if !losses.iter().any(|(n, _)| n == name) {
                continue;
            }
            let r = cs_radius(t.since.count(), t.since.sd(), cs_alpha);
            let m = t.since.mean();
            let route = if m - r > 0.0 {
                Some(Route::Sequence)
            } else if t.fired(log_a) {
                Some(Route::Detector)
            } else {
                None
            };
            if m + r >= 0.0 {
                tied.push(name.clone());
            }
            if let Some(route) = route {
                let strength = match route {
                    Route::Sequence => (m - r) / r.max(f64::MIN_POSITIVE),
                    _ => t.detector.log_statistic() - log_a,
                };
                if best.as_ref().is_none_or(|(_, _, b)| strength > *b) {
                    best = Some((
                        name.clone(),
                        t.evidence(
                            route,
                            0.0,
                            cs_alpha,
                            log_a,
                            s.alpha / 2.0 / challengers as f64,
                        ),
                        strength,
                    ));
                }
            }
        }
        if let Some((new, evidence, _)) = best {
            let old = front_runner.name.clone();
            self.appoint(new.clone(), losses.len() > 1);
            out.push(Signal::FrontRunnerChanged {
                old,
                new: new.clone(),
                evidence,
            });
            if losses.len() > 1 {
                out.push(Signal::FrontRunnerUncertain {
                    front_runner: new.clone(),
                    tied: losses
                        .iter()
                        .map(|(n, _)| n.to_string())
                        .filter(|n| *n != new)
                        .collect(),
                });
            }
            return;
        }
        front_runner.contested |= !front_runner.pairs.is_empty();
        if !front_runner.settled && tied.is_empty() && !front_runner.pairs.is_empty() {
            front_runner.settled = true;
            out.push(Signal::FrontRunnerSettled {
                front_runner: front_runner.name.clone(),
            });
        }
    }

    fn appoint(&mut self, name: String, contested: bool) {
        self.front_runner = Some(FrontRunnerWatch {
            name,
            settled: false,
            pairs: BTreeMap::new(),
            contested,
        });
    }
}

fn mean_present(values: &[f64]) -> f64 {
    let (mut s, mut n) = (0.0, 0usize);
    for v in values.iter().filter(|v| !v.is_nan()) {
        s += v;
        n += 1;
    }
    if n == 0 {
        f64::NAN
    } else {
        s / n as f64
    }
}
