//! Fold assignment: which of the K folds holds each unit out, stratified
//! by arm so that each fold keeps the dataset's treated share, and
//! reproducible for a seed.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

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
pub(super) struct Folds<'a> {
    pub(super) of_unit: &'a [usize],
    pub(super) count: usize,
}
