//! The fitting of a cross-fit: every learner of every component on every
//! fold, as one queue of jobs taken in order by every worker thread, with
//! each component's learners screened as soon as their first-fold fits are
//! done.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Mutex, OnceLock};

use crate::estimate::error::EstimateError;
use crate::estimate::learner::{Fitted, Learner, SharedFeatures, Task};

use super::folds::Folds;
use super::screen::screen;

/// One nuisance component to cross-fit: its target, the units its fits may
/// train on (and whose losses judge it), its learners, its task and its
/// seed.
pub(super) struct Component<'a> {
    pub(super) target: &'a [f64],
    pub(super) train_mask: &'a [bool],
    pub(super) learners: &'a [Box<dyn Learner>],
    pub(super) task: Task,
    pub(super) seed: u64,
}

/// One fold's fit of one learner of one component: the model and its
/// predictions for the held-out rows.
type FoldFit = (Box<dyn Fitted>, Vec<f64>);

/// A learner fitted on every fold: its out-of-fold prediction for every
/// unit and its fold models.
pub(super) type FullFit = (Vec<f64>, Vec<Box<dyn Fitted>>);

/// A component's cross-fit: for each learner, its out-of-fold predictions
/// and fold models when it was fitted on every fold, or the z of its
/// screening when it was dropped after the first fold
/// (`learners[l]` is `Err(z)` then). `first_fold_loss` is each learner's
/// mean loss on the first fold's scored units.
pub(super) struct OutOfFold {
    pub(super) learners: Vec<Result<FullFit, f64>>,
    pub(super) first_fold_loss: Vec<f64>,
}

/// What a fit job left in its slot.
enum Slot {
    Pending,
    Done(Result<FoldFit, EstimateError>),
    /// Not run: its learner was screened out after the first fold.
    Skipped,
}

/// Out-of-fold predictions for every unit from every learner of every
/// component, where fold `f` is predicted by a fit on the units of the
/// component's `train_mask` outside fold `f`.
///
/// All fits of all components run as one queue, taken in order by every
/// worker thread: first every learner's first-fold fit (longest first),
/// then the other folds. Once a component's first-fold fits are all done,
/// its learners are screened ([`screen`]); a later fit of a screened-out
/// learner is skipped when it comes up (one already running when the
/// verdict lands is finished and discarded), so which fits run depends on
/// timing but the results never do.
pub(super) fn out_of_fold(
    x: &SharedFeatures<'_>,
    folds: &Folds<'_>,
    components: &[Component<'_>],
    screening_z: Option<f64>,
) -> Vec<Result<OutOfFold, EstimateError>> {
    let (k, fold_of) = (folds.count, folds.of_unit);
    let held: Vec<Vec<usize>> = (0..k)
        .map(|f| (0..fold_of.len()).filter(|&i| fold_of[i] == f).collect())
        .collect();
    // (component, learner, fold), the first fold first; within a fold the
    // components in order of training size (the propensity trains on
    // everyone), so the longest fits start first and short ones fill the end.
    let mut jobs: Vec<(usize, usize, usize)> = Vec::new();
    for f in 0..k {
        let mut by_size: Vec<usize> = (0..components.len()).collect();
        by_size.sort_by_key(|&c| {
            std::cmp::Reverse(components[c].train_mask.iter().filter(|&&t| t).count())
        });
        for &c in &by_size {
            for l in 0..components[c].learners.len() {
                jobs.push((c, l, f));
            }
        }
    }
    let slot_of = |c: usize, l: usize, f: usize| -> usize {
        jobs.iter()
            .position(|&j| j == (c, l, f))
            .unwrap_or(usize::MAX)
    };
    let slots: Vec<Mutex<Slot>> = jobs.iter().map(|_| Mutex::new(Slot::Pending)).collect();
    let first_fold_left: Vec<AtomicUsize> = components
        .iter()
        .map(|c| AtomicUsize::new(c.learners.len()))
        .collect();
    let verdicts: Vec<OnceLock<Vec<Result<(), f64>>>> =
        components.iter().map(|_| OnceLock::new()).collect();
    let next = AtomicUsize::new(0);
    let lock = |i: usize| slots[i].lock().unwrap_or_else(|e| e.into_inner());

    let fit = |c: usize, l: usize, f: usize| -> Result<FoldFit, EstimateError> {
        let comp = &components[c];
        let train: Vec<usize> = (0..fold_of.len())
            .filter(|&i| fold_of[i] != f && comp.train_mask[i])
            .collect();
        let yt: Vec<f64> = train.iter().map(|&i| comp.target[i]).collect();
        let fit_seed = comp.seed ^ ((f as u64 + 1) << 32) ^ (l as u64 + 1);
        let model = comp.learners[l].fit_rows(x, &train, &yt, comp.task, fit_seed)?;
        let pred = model.predict_rows(x, &held[f]);
        Ok((model, pred))
    };
    let worker = || loop {
        let i = next.fetch_add(1, Ordering::Relaxed);
        let Some(&(c, l, f)) = jobs.get(i) else {
            return;
        };
        let screened_out = verdicts[c]
            .get()
            .is_some_and(|v| v.get(l).is_some_and(Result::is_err));
        if f > 0 && screened_out {
            *lock(i) = Slot::Skipped;
            continue;
        }
        let result = fit(c, l, f);
        *lock(i) = Slot::Done(result);
        if f == 0 && first_fold_left[c].fetch_sub(1, Ordering::AcqRel) == 1 {
            // The last first-fold fit of this component: screen its learners.
            let guards: Vec<_> = (0..components[c].learners.len())
                .map(|l| lock(slot_of(c, l, 0)))
                .collect();
            let predictions: Option<Vec<&[f64]>> = guards
                .iter()
                .map(|g| match &**g {
                    Slot::Done(Ok((_, p))) => Some(p.as_slice()),
                    _ => None,
                })
                .collect();
            // A failed first-fold fit fails the component; nothing to screen.
            let verdict = match predictions {
                Some(p) => screen(&components[c], &held[0], &p, screening_z).0,
                None => vec![Ok(()); components[c].learners.len()],
            };
            drop(guards);
            let _ = verdicts[c].set(verdict);
        }
    };
    rayon::scope(|s| {
        for _ in 0..rayon::current_num_threads().max(1) {
            s.spawn(|_| worker());
        }
    });

    let mut slots: Vec<Slot> = slots
        .into_iter()
        .map(|m| m.into_inner().unwrap_or_else(|e| e.into_inner()))
        .collect();
    components
        .iter()
        .enumerate()
        .map(|(c, comp)| {
            let mut learners = Vec::with_capacity(comp.learners.len());
            let mut first: Vec<&[f64]> = Vec::new();
            let mut fits: Vec<Vec<FoldFit>> = Vec::new();
            // Errors in (learner, fold) order, as one-by-one fitting meets them.
            for l in 0..comp.learners.len() {
                let mut folds_done = Vec::with_capacity(k);
                for f in 0..k {
                    match std::mem::replace(&mut slots[slot_of(c, l, f)], Slot::Skipped) {
                        Slot::Done(Ok(fit)) => folds_done.push(fit),
                        Slot::Done(Err(e)) => return Err(e),
                        Slot::Skipped | Slot::Pending => {}
                    }
                }
                fits.push(folds_done);
            }
            for fits_l in &fits {
                first.push(fits_l.first().map_or(&[][..], |(_, p)| p.as_slice()));
            }
            let (verdict, first_fold_loss) = screen(comp, &held[0], &first, screening_z);
            for (fits_l, v) in fits.into_iter().zip(verdict) {
                learners.push(match v {
                    Err(z) => Err(z),
                    Ok(()) if fits_l.len() == k => {
                        let mut predictions = vec![0.0; fold_of.len()];
                        let mut models = Vec::with_capacity(k);
                        for (f, (model, pred)) in fits_l.into_iter().enumerate() {
                            for (&i, p) in held[f].iter().zip(pred) {
                                predictions[i] = p;
                            }
                            models.push(model);
                        }
                        Ok((predictions, models))
                    }
                    Ok(()) => {
                        return Err(EstimateError::invalid(
                            "internal: a learner that passed screening is missing a fold fit",
                        ))
                    }
                });
            }
            Ok(OutOfFold {
                learners,
                first_fold_loss,
            })
        })
        .collect()
}
