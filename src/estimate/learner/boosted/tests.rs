//! The boosted learner on a step plus a curve: it learns both, a seed
//! reproduces a fit, and predictions by bins equal those by raw values.

use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::*;
use crate::estimate::learner::linear::sigmoid;
use crate::estimate::learner::mean_loss;

fn data(n: usize, seed: u64) -> (Array2<f64>, Vec<f64>, Vec<f64>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let x = Array2::from_shape_fn((n, 3), |_| rng.gen_range(-1.0..1.0));
    let signal: Vec<f64> = x
        .outer_iter()
        .map(|r| if r[0] > 0.2 { 1.0 } else { -0.5 } + r[1] * r[1])
        .collect();
    let y: Vec<f64> = signal
        .iter()
        .map(|s| s + 0.3 * rng.gen_range(-1.0..1.0))
        .collect();
    let labels: Vec<f64> = signal
        .iter()
        .map(|s| {
            if rng.gen::<f64>() < sigmoid(2.0 * s) {
                1.0
            } else {
                0.0
            }
        })
        .collect();
    (x, y, labels)
}

#[test]
fn learns_a_step_and_a_curve_and_is_reproducible() {
    let (x, y, labels) = data(3000, 1);
    let (xt, yt, lt) = data(2000, 2);
    let b = Boosted::default();
    let fit = b.fit(x.view(), &y, Task::Regression, 7).expect("fit");
    let pred = fit.predict(xt.view());
    let mean = yt.iter().sum::<f64>() / yt.len() as f64;
    let base_loss = mean_loss(Task::Regression, &yt, &vec![mean; yt.len()]);
    let loss = mean_loss(Task::Regression, &yt, &pred);
    // Noise variance is 0.03; the constant fit's loss is about 0.6.
    assert!(
        loss < 0.06 && base_loss > 0.4,
        "loss {loss}, constant {base_loss}"
    );
    let again = b.fit(x.view(), &y, Task::Regression, 7).expect("fit");
    assert_eq!(pred, again.predict(xt.view()));

    let clf = b
        .fit(x.view(), &labels, Task::Classification, 7)
        .expect("fit");
    let p = clf.predict(xt.view());
    assert!(p.iter().all(|&v| v > 0.0 && v < 1.0));
    let share = lt.iter().sum::<f64>() / lt.len() as f64;
    let base = mean_loss(Task::Classification, &lt, &vec![share; lt.len()]);
    assert!(mean_loss(Task::Classification, &lt, &p) < base - 0.05);
}

#[test]
fn shared_rows_predict_as_raw_values() {
    let (x, y, _) = data(1500, 3);
    let shared = SharedFeatures::new(FeatureRows::of_matrix(x.view()).expect("row-major"));
    let train: Vec<usize> = (0..1500).filter(|i| i % 3 != 0).collect();
    let held: Vec<usize> = (0..1500).filter(|i| i % 3 == 0).collect();
    let yt: Vec<f64> = train.iter().map(|&i| y[i]).collect();
    let fit = Boosted::default()
        .fit_rows(&shared, &train, &yt, Task::Regression, 1)
        .expect("fit");
    let by_bins = fit.predict_rows(&shared, &held);
    let by_values = fit.predict(x.select(ndarray::Axis(0), &held).view());
    assert_eq!(by_bins, by_values);
}
