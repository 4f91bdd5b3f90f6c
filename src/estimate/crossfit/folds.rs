//! Fold assignment: which of the K folds holds each unit out, stratified
//! by arm so that each fold keeps the dataset's treated share, and
//! reproducible for a seed; and, under a cap on the units the models are
//! fitted on, which units they are fitted on.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// Assigns each unit a fold in 0..k, stratified by arm, reproducibly for a seed.
pub fn assign_folds(treatment: &[f64], k: usize, seed: u64) -> Vec<usize> {
    assign_fit(treatment, k, seed, None, 0).fold_of_unit
}

/// Where each unit stands in one cross-fit.
#[derive(Debug, Clone, PartialEq)]
pub struct FitAssignment {
    /// The fold that holds each unit out, in 0..k.
    pub fold_of_unit: Vec<usize>,
    /// The units the fold models are fitted on, in unit order; None when
    /// they are fitted on every unit (no cap, or a cap of at least the
    /// number of units). Fold f's models train on the sample's units
    /// outside fold f, and every unit of fold f, in the sample or not, gets
    /// its values from them: no unit's values come from a model that saw it.
    pub sample: Option<Vec<usize>>,
}

/// The folds of a cross-fit and, when `max_fit_units` is below the number
/// of units, the seeded sample the models are fitted on: a function of the
/// seed, the units' treatments and the cap alone, so a recorded fit is
/// drawn again exactly.
///
/// Each arm is shuffled once; a unit's fold is its position in its arm's
/// shuffle modulo k (as without a cap), and the sample is the first m_a
/// units of each arm's shuffle. So the sample is a uniform draw within each
/// arm, spread evenly over the folds, and the folds are the same whatever
/// the cap. The arms' shares m_1 = round(m n_1 / n), m_0 = m - m_1 keep the
/// treated share of the data, which the propensity model is fitted to (a
/// sample that over-drew one arm would shift every fitted propensity).
/// When that share would leave an arm fewer than `min_per_arm` units, m
/// grows, proportionally, until it does not (an arm that rare needs the
/// units for its outcome model to be fitted on every fold at all).
pub fn assign_fit(
    treatment: &[f64],
    k: usize,
    seed: u64,
    max_fit_units: Option<usize>,
    min_per_arm: usize,
) -> FitAssignment {
    let arm: Vec<usize> = treatment.iter().map(|&w| usize::from(w == 1.0)).collect();
    assign_arm_fit(&arm, 2, k, seed, max_fit_units, min_per_arm)
}

/// [`assign_fit`] for any number of arms, `arm[i]` unit i's arm in
/// 0..`arms` (0 the reference): each arm shuffled once in turn from one
/// seeded generator, a unit's fold its position in its arm's shuffle
/// modulo k, the sample the first m_a units of each arm's shuffle. The
/// non-reference arms take m_a = round(m n_a / n) and the reference the
/// rest, which with two arms is the rule above, so a binary fit draws
/// exactly what it drew before arms existed.
pub fn assign_arm_fit(
    arm: &[usize],
    arms: usize,
    k: usize,
    seed: u64,
    max_fit_units: Option<usize>,
    min_per_arm: usize,
) -> FitAssignment {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let k = k.max(1);
    let mut fold_of_unit = vec![0; arm.len()];
    let mut shuffles: Vec<Vec<usize>> = Vec::with_capacity(arms);
    for a in 0..arms {
        let mut idx: Vec<usize> = (0..arm.len()).filter(|&i| arm[i] == a).collect();
        idx.shuffle(&mut rng);
        for (pos, &i) in idx.iter().enumerate() {
            fold_of_unit[i] = pos % k;
        }
        shuffles.push(idx);
    }
    let counts: Vec<usize> = shuffles.iter().map(Vec::len).collect();
    let sample = max_fit_units
        .and_then(|cap| sample_sizes(&counts, cap, min_per_arm))
        .map(|sizes| {
            let mut units: Vec<usize> = shuffles
                .iter()
                .zip(sizes)
                .flat_map(|(idx, m)| idx[..m].iter().copied())
                .collect();
            units.sort_unstable();
            units
        });
    FitAssignment {
        fold_of_unit,
        sample,
    }
}

/// How many units of each arm (the reference first) a sample of at most
/// `cap` units takes; None when the sample would hold every unit.
pub(super) fn sample_sizes(counts: &[usize], cap: usize, min_per_arm: usize) -> Option<Vec<usize>> {
    // u128: a cap set near usize::MAX must not overflow the products.
    let n: u128 = counts.iter().map(|&c| c as u128).sum();
    let mut m = cap as u128;
    for &a in counts {
        if a > 0 {
            // Smallest m whose share of this arm, m a / n, reaches the minimum.
            m = m.max((min_per_arm as u128 * n).div_ceil(a as u128));
        }
    }
    if m >= n {
        return None;
    }
    // round(m n_a / n), halves up, in integers; the reference the rest.
    let mut sizes: Vec<usize> = counts
        .iter()
        .map(|&a| (((2 * m * a as u128 + n) / (2 * n)) as usize).min(a))
        .collect();
    let others: usize = sizes.iter().skip(1).sum();
    if let Some(first) = sizes.first_mut() {
        *first = (m as usize).saturating_sub(others).min(counts[0]);
    }
    // With three or more arms the others' roundings can leave the
    // reference a unit or two short of the minimum its share reached
    // before rounding: top it up (the sample then exceeds the cap by those
    // units). With two arms it never is short: m - round(m n_1 / n) is an
    // integer at least m n_0 / n - 1/2, itself at least the minimum.
    for (size, &a) in sizes.iter_mut().zip(counts) {
        *size = (*size).max(min_per_arm.min(a));
    }
    Some(sizes)
}

/// The folds of one cross-fit: which fold each unit is in, and how many.
pub(super) struct Folds<'a> {
    pub(super) of_unit: &'a [usize],
    pub(super) count: usize,
}
