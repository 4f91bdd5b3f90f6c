//! The cross-fitted nuisance values every estimator reads, one per unit,
//! with the propensity clipping that keeps the inverse weights bounded.

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
