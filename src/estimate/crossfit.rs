//! K-fold cross-fitting of the nuisance components (Chernozhukov et al.
//! 2018, "Double/debiased machine learning").
//!
//! A unit's propensity and outcome-regression values always come from fits
//! that did not see it. Folds are stratified by arm so that each holds the
//! dataset's treated share. Each component tries every learner of its library
//! on the same folds and keeps the one with the lowest out-of-fold loss.

use ndarray::ArrayView2;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Mutex, OnceLock};

use serde::Serialize;

use super::data::{FeatureRows, OutcomeKind, UnitTable};
use super::error::{Degenerate, EstimateError};
use super::learner::{default_library, mean_loss, Fitted, Learner, SharedFeatures, Task};
use super::stats::auc;

/// How the nuisance components are fitted.
///
/// Empty learner lists mean "the default library for this data"
/// ([`default_library`]), chosen once the number of features is known.
#[derive(Debug)]
pub struct NuisanceSettings {
    pub folds: usize,
    pub seed: u64,
    /// Propensities are clipped to [clip, 1 - clip] for weighting.
    pub clip: f64,
    pub propensity_learners: Vec<Box<dyn Learner>>,
    pub outcome_learners: Vec<Box<dyn Learner>>,
    /// Each fold must hold at least this many units of each arm.
    pub min_units_per_fold: usize,
    /// A propensity AUC at or above this means the arms are separated.
    pub separation_auc: f64,
    /// First-fold screening: a learner whose held-out loss on the first
    /// fold is above the best learner's by more than this many standard
    /// errors (paired over that fold's units) is not fitted on the other
    /// folds. None fits every learner on every fold.
    pub screening_z: Option<f64>,
}

impl Default for NuisanceSettings {
    fn default() -> Self {
        Self {
            folds: 5,
            seed: 0,
            clip: 0.01,
            propensity_learners: Vec::new(),
            outcome_learners: Vec::new(),
            min_units_per_fold: 3,
            separation_auc: 0.995,
            // Four standard errors on a fifth of the data: a learner this far
            // behind on one fold is all but certain to lose on all five.
            screening_z: Some(4.0),
        }
    }
}

impl NuisanceSettings {
    pub fn check(&self) -> Result<(), EstimateError> {
        if self.folds < 2 {
            return Err(EstimateError::invalid(format!(
                "folds must be at least 2 (got {})",
                self.folds
            )));
        }
        if let Some(z) = self.screening_z {
            if !(z.is_finite() && z > 0.0) {
                return Err(EstimateError::invalid(format!(
                    "screening z must be a positive number (got {z})"
                )));
            }
        }
        if !(self.clip >= 0.0 && self.clip < 0.5) {
            return Err(EstimateError::invalid(format!(
                "propensity clip must lie in [0, 0.5) (got {})",
                self.clip
            )));
        }
        for l in self
            .propensity_learners
            .iter()
            .chain(&self.outcome_learners)
        {
            l.check()?;
        }
        Ok(())
    }
}

/// Cross-fitted nuisance values, one per unit.
#[derive(Debug, Clone)]
pub struct Nuisance {
    /// P(W = 1 | x), clipped to [clip, 1 - clip].
    pub propensity: Vec<f64>,
    /// E[Y | x, W = 0].
    pub mu0: Vec<f64>,
    /// E[Y | x, W = 1].
    pub mu1: Vec<f64>,
}

impl Nuisance {
    /// Builds nuisance values from raw propensities, clipping them; returns
    /// the values and how many propensities were clipped.
    pub fn from_parts(
        propensity: Vec<f64>,
        mu0: Vec<f64>,
        mu1: Vec<f64>,
        clip: f64,
    ) -> (Self, usize) {
        let (propensity, clipped) = clip_propensity(propensity, clip);
        (
            Self {
                propensity,
                mu0,
                mu1,
            },
            clipped,
        )
    }

    /// The plug-in effect tau_tilde = mu1 - mu0 of unit `i`.
    pub fn tau_tilde(&self, i: usize) -> f64 {
        self.mu1[i] - self.mu0[i]
    }

    /// The plug-in outcome mean m_tilde = pi mu1 + (1 - pi) mu0 of unit `i`.
    pub fn m_tilde(&self, i: usize) -> f64 {
        let p = self.propensity[i];
        p * self.mu1[i] + (1.0 - p) * self.mu0[i]
    }
}

fn clip_propensity(mut p: Vec<f64>, clip: f64) -> (Vec<f64>, usize) {
    let mut clipped = 0;
    for v in &mut p {
        let c = v.clamp(clip, 1.0 - clip);
        if c != *v {
            clipped += 1;
            *v = c;
        }
    }
    (p, clipped)
}

/// One learner's out-of-fold loss for a component.
#[derive(Debug, Clone, Serialize)]
pub struct CandidateLoss {
    pub learner: String,
    /// Mean held-out loss: over every scored unit for a learner fitted on
    /// all folds; over the first fold's scored units for one screened out.
    pub oof_loss: f64,
    /// Present when the learner was screened out after the first fold: how
    /// many standard errors its first-fold loss lay above the best
    /// learner's.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub screened_out_z: Option<f64>,
}

/// Which learner a component chose and how well it did out of fold.
#[derive(Debug, Clone, Serialize)]
pub struct ComponentReport {
    pub learner: String,
    /// "log_loss" or "squared_error".
    pub loss: &'static str,
    pub oof_loss: f64,
    pub candidates: Vec<CandidateLoss>,
    /// Units whose outcome the loss was computed on.
    pub units: usize,
}

/// Where the propensities came from and how they behave.
#[derive(Debug, Clone, Serialize)]
pub struct PropensityReport {
    /// "fitted" or "logged".
    pub source: &'static str,
    /// Present when the propensity was fitted.
    pub fit: Option<ComponentReport>,
    /// AUC of the (unclipped) propensity for the treatment.
    pub auc: f64,
    pub clip: f64,
    pub clipped: usize,
}

#[derive(Debug, Clone, Serialize)]
pub struct NuisanceReport {
    pub folds: usize,
    pub seed: u64,
    pub propensity: PropensityReport,
    pub outcome_control: ComponentReport,
    pub outcome_treated: ComponentReport,
}

/// Assigns each unit a fold in 0..k, stratified by arm, reproducibly for a seed.
pub fn assign_folds(treatment: &[f64], k: usize, seed: u64) -> Vec<usize> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut folds = vec![0; treatment.len()];
    for arm in [0.0, 1.0] {
        let mut idx: Vec<usize> = (0..treatment.len())
            .filter(|&i| treatment[i] == arm)
            .collect();
        idx.shuffle(&mut rng);
        for (pos, &i) in idx.iter().enumerate() {
            folds[i] = pos % k;
        }
    }
    folds
}

/// The folds of one cross-fit: which fold each unit is in, and how many.
struct Folds<'a> {
    of_unit: &'a [usize],
    count: usize,
}

/// One nuisance component to cross-fit: its target, the units its fits may
/// train on (and whose losses judge it), its learners, its task and its
/// seed.
struct Component<'a> {
    target: &'a [f64],
    train_mask: &'a [bool],
    learners: &'a [Box<dyn Learner>],
    task: Task,
    seed: u64,
}

/// One fold's fit of one learner of one component: the model and its
/// predictions for the held-out rows.
type FoldFit = (Box<dyn Fitted>, Vec<f64>);

/// A learner fitted on every fold: its out-of-fold prediction for every
/// unit and its fold models.
type FullFit = (Vec<f64>, Vec<Box<dyn Fitted>>);

/// A component's cross-fit: for each learner, its out-of-fold predictions
/// and fold models when it was fitted on every fold, or the z of its
/// screening when it was dropped after the first fold
/// (`learners[l]` is `Err(z)` then). `first_fold_loss` is each learner's
/// mean loss on the first fold's scored units.
struct OutOfFold {
    learners: Vec<Result<FullFit, f64>>,
    first_fold_loss: Vec<f64>,
}

/// What a fit job left in its slot.
enum Slot {
    Pending,
    Done(Result<FoldFit, EstimateError>),
    /// Not run: its learner was screened out after the first fold.
    Skipped,
}

/// Per-unit loss of one prediction.
fn unit_loss(task: Task, y: f64, p: f64) -> f64 {
    mean_loss(task, &[y], &[p])
}

/// First-fold screening of a component's learners: `Err(z)` for a learner
/// whose paired first-fold loss exceeds the best learner's by more than
/// `z_limit` standard errors, `Ok(())` for the others; and each learner's
/// mean first-fold loss. `predictions[l]` are learner l's predictions for
/// `held` (the first fold's units), of which the `scored` ones count.
fn screen(
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
fn out_of_fold(
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

/// The fold models of the chosen learner of every component, kept so that
/// units that arrive after a fit can be scored by models that never saw
/// them: a new unit gets the average of the K fold models' predictions.
pub struct FittedNuisance {
    /// None when the propensity was logged rather than fitted.
    pub propensity: Option<Vec<Box<dyn Fitted>>>,
    pub mu0: Vec<Box<dyn Fitted>>,
    pub mu1: Vec<Box<dyn Fitted>>,
    pub clip: f64,
}

fn fold_average(models: &[Box<dyn Fitted>], x: ArrayView2<'_, f64>) -> Vec<f64> {
    let mut sum = vec![0.0; x.nrows()];
    for m in models {
        for (s, p) in sum.iter_mut().zip(m.predict(x)) {
            *s += p;
        }
    }
    let k = models.len().max(1) as f64;
    sum.iter().map(|s| s / k).collect()
}

impl FittedNuisance {
    /// Nuisance values for new units. `logged` propensities are used as
    /// given (clipped); without them a fitted propensity is required.
    pub fn predict(
        &self,
        x: ArrayView2<'_, f64>,
        logged: Option<&[f64]>,
    ) -> Result<(Nuisance, usize), EstimateError> {
        let propensity = match (logged, &self.propensity) {
            (Some(p), _) => p.to_vec(),
            (None, Some(models)) => fold_average(models, x),
            (None, None) => {
                return Err(EstimateError::invalid(
                    "the nuisance fit used logged propensities, and these units have none",
                ))
            }
        };
        Ok(Nuisance::from_parts(
            propensity,
            fold_average(&self.mu0, x),
            fold_average(&self.mu1, x),
            self.clip,
        ))
    }
}

/// Picks, among the learners fitted on every fold, the one with the lowest
/// out-of-fold loss on the `scored` units.
fn choose(
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

/// Cross-fits propensity (unless logged) and both outcome regressions.
pub fn fit_nuisance(
    table: &UnitTable,
    settings: &NuisanceSettings,
) -> Result<(Nuisance, NuisanceReport), EstimateError> {
    fit_nuisance_models(table, settings).map(|(n, r, _)| (n, r))
}

/// As [`fit_nuisance`], also returning the fold models for scoring units
/// that arrive later.
pub fn fit_nuisance_models(
    table: &UnitTable,
    settings: &NuisanceSettings,
) -> Result<(Nuisance, NuisanceReport, FittedNuisance), EstimateError> {
    fit_nuisance_models_on(table, table.rows(), settings)
}

/// As [`fit_nuisance_models`], with the features given as `features`, one
/// row per unit of `table`, wherever they are stored (the table's own
/// feature matrix is not read).
pub fn fit_nuisance_models_on(
    table: &UnitTable,
    features: FeatureRows<'_>,
    settings: &NuisanceSettings,
) -> Result<(Nuisance, NuisanceReport, FittedNuisance), EstimateError> {
    settings.check()?;
    if features.len() != table.len() {
        return Err(EstimateError::invalid(format!(
            "{} feature rows for {} units",
            features.len(),
            table.len()
        )));
    }
    table.check_estimable(settings.folds, settings.min_units_per_fold)?;
    let library = |given: &[Box<dyn Learner>]| -> Vec<Box<dyn Learner>> {
        if given.is_empty() {
            default_library(features.width())
        } else {
            given.iter().map(|l| l.boxed_clone()).collect()
        }
    };
    let propensity_learners = library(&settings.propensity_learners);
    let outcome_learners = library(&settings.outcome_learners);
    let k = settings.folds;
    let x = &SharedFeatures::new(features);
    let w = table.treatment();
    let y = table.outcome();
    let fold_of_unit = assign_folds(w, k, settings.seed);
    let folds = Folds {
        of_unit: &fold_of_unit,
        count: k,
    };
    let everyone = vec![true; table.len()];
    let outcome_task = match table.outcome_kind() {
        OutcomeKind::Continuous => Task::Regression,
        OutcomeKind::Binary => Task::Classification,
    };
    // Each arm's outcome model is fitted on that arm only and predicted for
    // every held-out unit, so both mu0 and mu1 exist for all units.
    let in_arm = |arm: f64| -> Vec<bool> { w.iter().map(|&v| v == arm).collect() };
    let (control, treated) = (in_arm(0.0), in_arm(1.0));
    let logged = table.logged_propensity();
    let mut components = Vec::with_capacity(3);
    if logged.is_none() {
        components.push(Component {
            target: w,
            train_mask: &everyone,
            learners: &propensity_learners,
            task: Task::Classification,
            seed: settings.seed,
        });
    }
    for (arm, mask) in [(0u64, &control), (1, &treated)] {
        components.push(Component {
            target: y,
            train_mask: mask,
            learners: &outcome_learners,
            task: outcome_task,
            seed: settings.seed.wrapping_add(1 + arm),
        });
    }
    for learner in propensity_learners.iter().chain(&outcome_learners) {
        learner.prepare(x);
    }
    // Errors surface in the order the components were once fitted one by
    // one: the propensity's own, then separated arms, then the outcomes'.
    let mut fitted = out_of_fold(x, &folds, &components, settings.screening_z).into_iter();
    let mut next = || {
        fitted
            .next()
            .unwrap_or_else(|| Err(EstimateError::invalid("missing cross-fit")))
    };

    let (raw_propensity, propensity_fit, propensity_models) = match logged {
        Some(p) => (p.to_vec(), None, None),
        None => {
            let (p, models, report) = choose(
                &propensity_learners,
                next()?,
                w,
                &everyone,
                Task::Classification,
            );
            (p, Some(report), Some(models))
        }
    };
    let propensity_auc = auc(&raw_propensity, w);
    if propensity_auc >= settings.separation_auc {
        return Err(Degenerate::SeparatedArms {
            auc: propensity_auc,
            limit: settings.separation_auc,
        }
        .into());
    }
    let (mu0, mu0_models, outcome_control) =
        choose(&outcome_learners, next()?, y, &control, outcome_task);
    let (mu1, mu1_models, outcome_treated) =
        choose(&outcome_learners, next()?, y, &treated, outcome_task);

    let (nuisance, clipped) = Nuisance::from_parts(raw_propensity, mu0, mu1, settings.clip);
    let report = NuisanceReport {
        folds: k,
        seed: settings.seed,
        propensity: PropensityReport {
            source: if propensity_fit.is_some() {
                "fitted"
            } else {
                "logged"
            },
            fit: propensity_fit,
            auc: propensity_auc,
            clip: settings.clip,
            clipped,
        },
        outcome_control,
        outcome_treated,
    };
    let fitted = FittedNuisance {
        propensity: propensity_models,
        mu0: mu0_models,
        mu1: mu1_models,
        clip: settings.clip,
    };
    Ok((nuisance, report, fitted))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folds_are_stratified_and_reproducible() {
        let w: Vec<f64> = (0..103)
            .map(|i| if i % 3 == 0 { 1.0 } else { 0.0 })
            .collect();
        let a = assign_folds(&w, 5, 7);
        assert_eq!(a, assign_folds(&w, 5, 7));
        assert_ne!(a, assign_folds(&w, 5, 8));
        for f in 0..5 {
            let treated = (0..w.len()).filter(|&i| a[i] == f && w[i] == 1.0).count();
            // 35 treated over 5 folds: exactly 7 each.
            assert_eq!(treated, 7);
        }
    }

    fn table(x: Vec<f64>, w: Vec<f64>, y: Vec<f64>) -> UnitTable {
        let n = w.len();
        let x = ndarray::Array2::from_shape_vec((n, x.len() / n), x).expect("shape");
        UnitTable::new(x, w, y, None, OutcomeKind::Continuous).expect("table")
    }

    #[test]
    fn degenerate_data_gets_named_states() {
        let n = 60;
        let x: Vec<f64> = (0..n).map(|i| i as f64).collect();
        let y: Vec<f64> = (0..n).map(|i| (i % 7) as f64).collect();
        let settings = NuisanceSettings::default();
        let state = |t: &UnitTable| match fit_nuisance(t, &settings) {
            Err(EstimateError::Degenerate(d)) => d,
            other => panic!("expected a degenerate state, got {:?}", other.map(|_| ())),
        };
        // Treated exactly when x >= 200 of 400: the propensity separates
        // the arms (out-of-fold AUC 0.999 here).
        let big = 400;
        let bx: Vec<f64> = (0..big).map(|i| i as f64).collect();
        let by: Vec<f64> = (0..big).map(|i| (i % 7) as f64).collect();
        let bw: Vec<f64> = (0..big).map(|i| if i >= 200 { 1.0 } else { 0.0 }).collect();
        assert!(matches!(
            state(&table(bx, bw, by)),
            Degenerate::SeparatedArms { .. }
        ));
        // Nobody treated.
        assert!(matches!(
            state(&table(x.clone(), vec![0.0; n], y.clone())),
            Degenerate::EmptyArm { .. }
        ));
        // Alternating arms but a constant outcome.
        let alt: Vec<f64> = (0..n).map(|i| (i % 2) as f64).collect();
        assert!(matches!(
            state(&table(x.clone(), alt.clone(), vec![2.5; n])),
            Degenerate::ConstantOutcome { .. }
        ));
        // Only 10 treated: 5 folds need at least 3 per fold, 15 in all.
        let few: Vec<f64> = (0..n).map(|i| if i % 6 == 0 { 1.0 } else { 0.0 }).collect();
        assert!(matches!(
            state(&table(x, few, y)),
            Degenerate::TooFewUnitsPerFold {
                needed: 15,
                units: 10,
                ..
            }
        ));
    }

    /// A linear signal with a strong slope: the constant learner is far
    /// behind the linear one on every fold.
    fn linear_signal(n: usize) -> UnitTable {
        let x: Vec<f64> = (0..n).map(|i| ((i * 7919) % 1000) as f64 / 100.0).collect();
        let w: Vec<f64> = (0..n).map(|i| ((i * 31) % 2) as f64).collect();
        let y: Vec<f64> = x
            .iter()
            .enumerate()
            .map(|(i, v)| 2.0 * v + ((i * 104_729) % 97) as f64 / 97.0)
            .collect();
        table(x, w, y)
    }

    fn with_learners(screening_z: Option<f64>) -> NuisanceSettings {
        use crate::estimate::learner::{Constant, Linear};
        NuisanceSettings {
            propensity_learners: vec![Box::new(Constant), Box::new(Linear::default())],
            outcome_learners: vec![Box::new(Constant), Box::new(Linear::default())],
            screening_z,
            ..NuisanceSettings::default()
        }
    }

    #[test]
    fn screening_drops_a_hopeless_learner_without_changing_the_fit() {
        let t = linear_signal(2000);
        let (screened, report) = fit_nuisance(&t, &with_learners(Some(4.0))).expect("fit");
        let (full, full_report) = fit_nuisance(&t, &with_learners(None)).expect("fit");
        for (c, f) in [
            (&report.outcome_control, &full_report.outcome_control),
            (&report.outcome_treated, &full_report.outcome_treated),
        ] {
            assert_eq!(c.learner, "linear");
            assert_eq!(c.oof_loss, f.oof_loss);
            // The constant learner's first-fold loss is about the variance
            // of 2x, 4 x 100 / 12 = 33.3, against 1/12 for linear. Its
            // per-unit excess (2x - 10)^2 has sd about 30, so over the
            // first fold's ~200 units of an arm z is near 33 / (30 / 14).
            let constant = &c.candidates[0];
            let z = constant.screened_out_z.expect("constant screened out");
            assert!(z > 10.0, "z = {z}");
            assert!(
                constant.oof_loss > 25.0 && constant.oof_loss < 42.0,
                "{}",
                constant.oof_loss
            );
            assert!(f.candidates.iter().all(|c| c.screened_out_z.is_none()));
        }
        // The chosen fits are the same fits: identical nuisance values.
        assert_eq!(screened.mu0, full.mu0);
        assert_eq!(screened.mu1, full.mu1);
        assert_eq!(screened.propensity, full.propensity);
    }

    #[test]
    fn screening_keeps_learners_that_are_close() {
        // The treatment alternates with i, so no learner can predict it:
        // constant and linear are within noise of each other on the first
        // fold and both are fitted on every fold.
        let t = linear_signal(2000);
        let (_, report) = fit_nuisance(&t, &with_learners(Some(4.0))).expect("fit");
        let fit = report.propensity.fit.expect("fitted propensity");
        assert!(fit.candidates.iter().all(|c| c.screened_out_z.is_none()));
    }

    #[test]
    fn screening_z_must_be_positive() {
        for z in [0.0, -1.0, f64::NAN] {
            let s = NuisanceSettings {
                screening_z: Some(z),
                ..NuisanceSettings::default()
            };
            assert!(s.check().is_err(), "{z}");
        }
    }

    #[test]
    fn clipping_counts_clipped_units() {
        let (n, clipped) =
            Nuisance::from_parts(vec![0.001, 0.5, 0.999], vec![0.0; 3], vec![0.0; 3], 0.01);
        assert_eq!(clipped, 2);
        assert_eq!(n.propensity, vec![0.01, 0.5, 0.99]);
    }
}
