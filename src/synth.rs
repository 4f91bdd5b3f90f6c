//! Published simulation designs with known effects (and one three-arm
//! design of our own, [`draw_arms`]), for checks and
//! benchmarks.
//!
//! Outcome model in every design: Y = b(X) + (W - 1/2) tau(X) + sigma eps,
//! eps ~ N(0, 1), so mu0 = b - tau/2 and mu1 = b + tau/2.
//!
//! - Nie & Wager (2021), "Quasi-oracle estimation of heterogeneous treatment
//!   effects", setups A to D (recalled from memory of the paper):
//!   A: X ~ U(0,1)^d, b = sin(pi X1 X2) + 2 (X3 - 1/2)^2 + X4 + X5/2,
//!   e = clamp(sin(pi X1 X2), 0.1, 0.9), tau = (X1 + X2)/2.
//!   B: X ~ N(0, I), b = max(X1 + X2, X3, 0) + max(X4 + X5, 0), e = 1/2,
//!   tau = X1 + log(1 + exp(X2)).
//!   C: X ~ N(0, I), b = 2 log(1 + exp(X1 + X2 + X3)),
//!   e = 1/(1 + exp(X2 + X3)), tau = 1.
//!   D: X ~ N(0, I), b = (max(X1 + X2 + X3, 0) + max(X4 + X5, 0))/2,
//!   e = 1/(1 + exp(-X1) + exp(-X2)), tau = max(X1 + X2 + X3, 0) - max(X4 + X5, 0).
//! - Wager & Athey (2018), "Estimation and inference of heterogeneous
//!   treatment effects using random forests", section 5 (from memory):
//!   heterogeneous design: X ~ U(0,1)^d, e = 1/2, b = 0,
//!   tau = s(X1) s(X2) with s(x) = 1 + 1/(1 + exp(-20 (x - 1/3)));
//!   confounded design: e = (1 + beta_{2,4}(X1))/4, b = 2 X1 - 1, tau = 0.
//!
//! Candidate "models" are fixed distortions of the true effect with known
//! PEHE, so a ranking's truth is known exactly.

use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use crate::estimate::ModelPredictions;

// The draw lives with the statistics, which import nothing from outside
// the estimation core; the simulations' callers keep finding it here.
pub use crate::estimate::stats::standard_normal;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Design {
    NieWagerA,
    NieWagerB,
    NieWagerC,
    NieWagerD,
    WagerAtheyHeterogeneous,
    WagerAtheyConfounded,
}

impl Design {
    pub const ALL: [Design; 6] = [
        Design::NieWagerA,
        Design::NieWagerB,
        Design::NieWagerC,
        Design::NieWagerD,
        Design::WagerAtheyHeterogeneous,
        Design::WagerAtheyConfounded,
    ];

    pub fn key(&self) -> &'static str {
        match self {
            Design::NieWagerA => "nie-wager-a",
            Design::NieWagerB => "nie-wager-b",
            Design::NieWagerC => "nie-wager-c",
            Design::NieWagerD => "nie-wager-d",
            Design::WagerAtheyHeterogeneous => "wager-athey-heterogeneous",
            Design::WagerAtheyConfounded => "wager-athey-confounded",
        }
    }

    pub fn from_key(key: &str) -> Option<Design> {
        Self::ALL.iter().copied().find(|d| d.key() == key)
    }

    fn uniform_features(&self) -> bool {
        matches!(
            self,
            Design::NieWagerA | Design::WagerAtheyHeterogeneous | Design::WagerAtheyConfounded
        )
    }

    /// (b, e, tau) at x.
    pub fn functions(&self, x: &[f64]) -> (f64, f64, f64) {
        use std::f64::consts::PI;
        let pos = |v: f64| v.max(0.0);
        let softplus = |v: f64| (1.0 + v.exp()).ln();
        match self {
            Design::NieWagerA => {
                let s = (PI * x[0] * x[1]).sin();
                let b = s + 2.0 * (x[2] - 0.5).powi(2) + x[3] + 0.5 * x[4];
                (b, s.clamp(0.1, 0.9), (x[0] + x[1]) / 2.0)
            }
            Design::NieWagerB => {
                let b = (x[0] + x[1]).max(x[2]).max(0.0) + pos(x[3] + x[4]);
                (b, 0.5, x[0] + softplus(x[1]))
            }
            Design::NieWagerC => {
                let b = 2.0 * softplus(x[0] + x[1] + x[2]);
                (b, 1.0 / (1.0 + (x[1] + x[2]).exp()), 1.0)
            }
            Design::NieWagerD => {
                let b = (pos(x[0] + x[1] + x[2]) + pos(x[3] + x[4])) / 2.0;
                let e = 1.0 / (1.0 + (-x[0]).exp() + (-x[1]).exp());
                (b, e, pos(x[0] + x[1] + x[2]) - pos(x[3] + x[4]))
            }
            Design::WagerAtheyHeterogeneous => {
                let s = |v: f64| 1.0 + 1.0 / (1.0 + (-20.0 * (v - 1.0 / 3.0)).exp());
                (0.0, 0.5, s(x[0]) * s(x[1]))
            }
            Design::WagerAtheyConfounded => {
                let beta24 = 20.0 * x[0] * (1.0 - x[0]).powi(3);
                (2.0 * x[0] - 1.0, (1.0 + beta24) / 4.0, 0.0)
            }
        }
    }
}

/// One simulated dataset with its truth.
#[derive(Debug, Clone)]
pub struct Draw {
    pub features: Array2<f64>,
    pub treatment: Vec<f64>,
    pub outcome: Vec<f64>,
    pub propensity: Vec<f64>,
    pub tau: Vec<f64>,
}

/// Draws n units with d >= 5 features.
pub fn draw(design: Design, n: usize, d: usize, sigma: f64, seed: u64) -> Draw {
    let d = d.max(5);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut features = Array2::zeros((n, d));
    let (mut treatment, mut outcome, mut propensity, mut tau) = (
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
    );
    let mut x = vec![0.0; d];
    for i in 0..n {
        for v in x.iter_mut() {
            *v = if design.uniform_features() {
                rng.gen::<f64>()
            } else {
                standard_normal(&mut rng)
            };
        }
        let (b, e, t) = design.functions(&x);
        let w = if rng.gen::<f64>() < e { 1.0 } else { 0.0 };
        let y = b + (w - 0.5) * t + sigma * standard_normal(&mut rng);
        for (j, v) in x.iter().enumerate() {
            features[[i, j]] = *v;
        }
        treatment.push(w);
        outcome.push(y);
        propensity.push(e);
        tau.push(t);
    }
    Draw {
        features,
        treatment,
        outcome,
        propensity,
        tau,
    }
}

/// The arms of [`draw_arms`], the reference first.
pub const ARM_NAMES: [&str; 3] = ["none", "text", "mail"];

/// Population mean and variance of each contrast's effect in
/// [`draw_arms`] (text, then mail), exact: tau_text = 0.5 + 0.8 x1 and
/// tau_mail = 0.3 - 0.6 x2 + 0.4 x3 with x ~ N(0, I).
pub const ARM_EFFECT_MOMENTS: [(f64, f64); 2] = [(0.5, 0.64), (0.3, 0.52)];

/// A three-arm draw with its truth.
#[derive(Debug, Clone)]
pub struct ArmDraw {
    pub features: Array2<f64>,
    /// Each unit's arm, an index into [`ARM_NAMES`].
    pub arm: Vec<usize>,
    pub outcome: Vec<f64>,
    /// Each contrast's true effect per unit (text, then mail, against none).
    pub tau: [Vec<f64>; 2],
}

/// Draws n units of a three-arm design of our own with d >= 5 features
/// (only x1 to x3 matter): x ~ N(0, I_d); the arm drawn with probabilities
/// softmax(0, 0.3 + 0.6 x1 - 0.4 x2, -0.2 - 0.5 x1 + 0.5 x3), so the
/// features that drive the outcome drive the arm too; Y = x1 + 0.5 x2 -
/// 0.5 x3 + tau_W(x) + sigma eps with tau_none = 0, tau_text = 0.5 + 0.8 x1
/// and tau_mail = 0.3 - 0.6 x2 + 0.4 x3 (the design of
/// tests/arms_simulation.rs).
pub fn draw_arms(n: usize, d: usize, sigma: f64, seed: u64) -> ArmDraw {
    let d = d.max(5);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut features = Array2::zeros((n, d));
    let (mut arm, mut outcome) = (Vec::with_capacity(n), Vec::with_capacity(n));
    let mut tau = [Vec::with_capacity(n), Vec::with_capacity(n)];
    for i in 0..n {
        for j in 0..d {
            features[[i, j]] = standard_normal(&mut rng);
        }
        let x = |j: usize| features[[i, j]];
        let eta = [
            0.0,
            0.3 + 0.6 * x(0) - 0.4 * x(1),
            -0.2 - 0.5 * x(0) + 0.5 * x(2),
        ];
        let total: f64 = eta.iter().map(|v| v.exp()).sum();
        let u = rng.gen::<f64>() * total;
        let w = if u < eta[0].exp() {
            0
        } else if u < eta[0].exp() + eta[1].exp() {
            1
        } else {
            2
        };
        let effects = [0.0, 0.5 + 0.8 * x(0), 0.3 - 0.6 * x(1) + 0.4 * x(2)];
        let b = x(0) + 0.5 * x(1) - 0.5 * x(2);
        arm.push(w);
        outcome.push(b + effects[w] + sigma * standard_normal(&mut rng));
        tau[0].push(effects[1]);
        tau[1].push(effects[2]);
    }
    ArmDraw {
        features,
        arm,
        outcome,
        tau,
    }
}

/// Population mean and variance of tau, by Monte Carlo with `n` draws.
pub fn effect_moments(design: Design, n: usize, seed: u64) -> (f64, f64) {
    let t = draw(design, n, 5, 0.0, seed).tau;
    let mean = t.iter().sum::<f64>() / n as f64;
    let var = t.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n as f64;
    (mean, var)
}

/// A candidate model and its population PEHE given the effect moments.
pub struct Candidate {
    pub predictions: ModelPredictions,
    pub true_pehe: f64,
}

/// Candidate models of graded quality: tau plus independent noise of sd
/// `scale * c` for several c, a shrunk version and a shifted one. `scale`
/// is the sd of tau (or 1 where tau is constant). Their population PEHEs
/// are exact: noise c -> (scale c)^2; shrink a -> (1-a)^2 Var(tau);
/// shift s -> (scale s)^2.
pub fn candidates(tau: &[f64], var_tau: f64, count: usize, seed: u64) -> Vec<Candidate> {
    let scale = if var_tau > 1e-12 { var_tau.sqrt() } else { 1.0 };
    let mean = tau.iter().sum::<f64>() / tau.len().max(1) as f64;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    // (name, kind, parameter); kinds: 0 noise, 1 shrink towards the mean, 2 shift.
    let specs: [(&str, u8, f64); 10] = [
        ("sharp", 0, 0.25),
        ("shrunk", 1, 0.5),
        ("noisy", 0, 0.6),
        ("shifted", 2, 0.8),
        ("rough", 0, 1.3),
        ("very-noisy", 0, 2.0),
        ("sharp-b", 0, 0.35),
        ("shifted-b", 2, 0.45),
        ("rough-b", 0, 1.6),
        ("shrunk-b", 1, 0.2),
    ];
    specs
        .iter()
        .take(count)
        .map(|&(name, kind, p)| {
            let effects: Vec<f64> = tau
                .iter()
                .map(|&t| match kind {
                    0 => t + scale * p * standard_normal(&mut rng),
                    1 => p * t + (1.0 - p) * mean,
                    _ => t + scale * p,
                })
                .collect();
            let true_pehe = match kind {
                0 => (scale * p).powi(2),
                1 => (1.0 - p).powi(2) * var_tau,
                _ => (scale * p).powi(2),
            };
            Candidate {
                predictions: ModelPredictions::new(name, effects),
                true_pehe,
            }
        })
        .collect()
}

/// A sweep of `count` candidates, as a hyperparameter search would leave
/// them: model k predicts a_k tau + (1 - a_k) mean + scale p_k e_k, with a
/// shrinkage a_k spread over [0.5, 1], a noise level p_k over [0.1, 1]
/// (the two stepping at different rates, so the sweep covers the plane)
/// and e_k independent standard normal noise per unit. Population PEHE
/// (1 - a_k)^2 Var(tau) + (scale p_k)^2. Named `sweep-0000`, ...
pub fn sweep(tau: &[f64], var_tau: f64, count: usize, seed: u64) -> Vec<Candidate> {
    let scale = if var_tau > 1e-12 { var_tau.sqrt() } else { 1.0 };
    let mean = tau.iter().sum::<f64>() / tau.len().max(1) as f64;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..count)
        .map(|k| {
            let a = 0.5 + 0.5 * ((k * 7) % 97) as f64 / 96.0;
            let p = 0.1 + 0.9 * ((k * 13) % 89) as f64 / 88.0;
            let effects = tau
                .iter()
                .map(|&t| a * t + (1.0 - a) * mean + scale * p * standard_normal(&mut rng))
                .collect();
            Candidate {
                predictions: ModelPredictions::new(format!("sweep-{k:04}"), effects),
                true_pehe: (1.0 - a).powi(2) * var_tau + (scale * p).powi(2),
            }
        })
        .collect()
}
