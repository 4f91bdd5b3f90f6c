//! First-fold screening: a learner whose paired held-out loss on the
//! first fold lies too many standard errors above the best learner's is
//! not fitted on the other folds, which saves its fits without changing
//! the chosen one.

use crate::estimate::learner::{mean_loss, Task};

use super::fitting::Component;

/// Per-unit loss of one prediction.
fn unit_loss(task: Task, y: f64, p: f64) -> f64 {
    mean_loss(task, &[y], &[p])
}

/// First-fold screening of a component's learners: `Err(z)` for a learner
/// whose paired first-fold loss exceeds the best learner's by more than
/// `z_limit` standard errors, `Ok(())` for the others; and each learner's
/// mean first-fold loss. `predictions[l]` are learner l's predictions for
/// `held` (the first fold's units), of which the `scored` ones count.
pub(super) fn screen(
    comp: &Component<'_>,
    held: &[usize],
    predictions: &[&[f64]],
    z_limit: Option<f64>,
) -> (Vec<Result<(), f64>>, Vec<f64>) {
    let scored: Vec<usize> = (0..held.len())
        .filter(|&k| comp.train_mask[held[k]])
        .collect();
    let losses: Vec<Vec<f64>> = predictions
        .iter()
        .map(|p| {
            scored
                .iter()
                .map(|&k| unit_loss(comp.task, comp.target[held[k]], p[k]))
                .collect()
        })
        .collect();
    let m = scored.len().max(1) as f64;
    let means: Vec<f64> = losses.iter().map(|l| l.iter().sum::<f64>() / m).collect();
    let best = means
        .iter()
        .enumerate()
        .min_by(|a, b| a.1.total_cmp(b.1))
        .map_or(0, |(i, _)| i);
    let verdicts = losses
        .iter()
        .enumerate()
        .map(|(l, loss)| {
            let Some(limit) = z_limit else { return Ok(()) };
            if l == best || scored.len() < 2 {
                return Ok(());
            }
            let d: Vec<f64> = loss.iter().zip(&losses[best]).map(|(a, b)| a - b).collect();
            let mean = d.iter().sum::<f64>() / m;
            let var = d.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (m - 1.0);
            let se = (var / m).sqrt();
            let z = if se > 0.0 {
                mean / se
            } else if mean > 0.0 {
                f64::INFINITY
            } else {
                0.0
            };
            if z > limit {
                Err(z)
            } else {
                Ok(())
            }
        })
        .collect();
    (verdicts, means)
}
