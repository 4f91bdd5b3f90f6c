//! The choice of a component's learner: the fully fitted one with the
//! lowest out-of-fold loss, and the report of every candidate's loss.

use crate::estimate::learner::{mean_loss, Fitted, Learner, Task};

use super::fitting::OutOfFold;
use super::report::{CandidateLoss, ComponentReport};

/// Picks, among the learners fitted on every fold, the one with the lowest
/// out-of-fold loss on the `scored` units.
pub(super) fn choose(
    learners: &[Box<dyn Learner>],
    oof: OutOfFold,
    target: &[f64],
    scored: &[bool],
    task: Task,
) -> (Vec<f64>, Vec<Box<dyn Fitted>>, ComponentReport) {
    let idx: Vec<usize> = (0..target.len()).filter(|&i| scored[i]).collect();
    let y: Vec<f64> = idx.iter().map(|&i| target[i]).collect();
    let candidates: Vec<CandidateLoss> = learners
        .iter()
        .zip(&oof.learners)
        .zip(&oof.first_fold_loss)
        .map(|((l, fitted), &first)| match fitted {
            Ok((p, _)) => {
                let pv: Vec<f64> = idx.iter().map(|&i| p[i]).collect();
                CandidateLoss {
                    learner: l.name().to_string(),
                    oof_loss: mean_loss(task, &y, &pv),
                    screened_out_z: None,
                }
            }
            Err(z) => CandidateLoss {
                learner: l.name().to_string(),
                oof_loss: first,
                screened_out_z: Some(*z),
            },
        })
        .collect();
    // The best learner on the first fold is never screened out, so there is
    // always a fully fitted candidate.
    let best = candidates
        .iter()
        .enumerate()
        .filter(|(_, c)| c.screened_out_z.is_none())
        .min_by(|a, b| a.1.oof_loss.total_cmp(&b.1.oof_loss))
        .map(|(i, _)| i)
        .unwrap_or(0);
    let report = ComponentReport {
        learner: candidates[best].learner.clone(),
        loss: match task {
            Task::Regression => "squared_error",
            Task::Classification => "log_loss",
        },
        oof_loss: candidates[best].oof_loss,
        candidates,
        units: idx.len(),
    };
    let (chosen, chosen_models) = oof
        .learners
        .into_iter()
        .nth(best)
        .and_then(Result::ok)
        .unwrap_or_default();
    (chosen, chosen_models, report)
}
