//! Shared test model: a one-dimensional asymmetric double well with exact quadrature
//! and exact samplers (rejection from a uniform box, and a Gaussian-mixture proposal
//! with known density). The model is tarn's own test scenario.

#![allow(dead_code)]

use rand::Rng;

/// Lower and upper edge of the box that holds all the probability (the density at
/// |x| = 3 is below e^{−100} of its maximum for the parameters used).
pub const LO: f64 = -3.0;
/// Upper edge of the box.
pub const HI: f64 = 3.0;

/// U(x) = height·(x² − 1)² + tilt·x: minima near ±1, state A is x < 0, B is x > 0.
#[derive(Clone, Copy)]
pub struct DoubleWell {
    pub height: f64,
    pub tilt: f64,
}

impl DoubleWell {
    pub fn energy(&self, x: f64) -> f64 {
        self.height * (x * x - 1.0).powi(2) + self.tilt * x
    }
}

/// Returns ∫_a^b exp(−g(x)) dx by composite Simpson's rule with n (even) intervals.
pub fn simpson(g: impl Fn(f64) -> f64, a: f64, b: f64, n: usize) -> f64 {
    let h = (b - a) / n as f64;
    let mut sum = (-g(a)).exp() + (-g(b)).exp();
    for i in 1..n {
        let c = if i % 2 == 1 { 4.0 } else { 2.0 };
        sum += c * (-g(a + i as f64 * h)).exp();
    }
    sum * h / 3.0
}

/// Returns the exact ΔF_AB / kT = −ln(P_B/P_A) for the density exp(−g(x)).
pub fn exact_delta_f(g: impl Fn(f64) -> f64 + Copy) -> f64 {
    let pa = simpson(g, LO, 0.0, 20_000);
    let pb = simpson(g, 0.0, HI, 20_000);
    -(pb / pa).ln()
}

/// Draws `n` exact samples from the density ∝ exp(−g(x)) on [LO, HI] by rejection
/// from the uniform box, with the envelope set by the grid minimum of g minus a margin
/// (so that the acceptance probability never exceeds one).
pub fn rejection_samples<R: Rng>(g: impl Fn(f64) -> f64, n: usize, rng: &mut R) -> Vec<f64> {
    let g_min = (0..=60_000)
        .map(|i| g(LO + (HI - LO) * i as f64 / 60_000.0))
        .fold(f64::INFINITY, f64::min)
        - 0.01;
    let mut out = Vec::with_capacity(n);
    while out.len() < n {
        let x = rng.gen_range(LO..HI);
        if rng.gen::<f64>() < (-(g(x) - g_min)).exp() {
            out.push(x);
        }
    }
    out
}

/// An equal mixture of two normal distributions, a proposal with known density.
#[derive(Clone, Copy)]
pub struct Mixture {
    pub centers: [f64; 2],
    pub sigma: f64,
    pub weight_first: f64,
}

impl Mixture {
    pub fn sample<R: Rng>(&self, rng: &mut R) -> f64 {
        use rand_distr::{Distribution, StandardNormal};
        let z: f64 = StandardNormal.sample(rng);
        let c = if rng.gen::<f64>() < self.weight_first {
            self.centers[0]
        } else {
            self.centers[1]
        };
        c + self.sigma * z
    }

    pub fn log_density(&self, x: f64) -> f64 {
        let norm = -(self.sigma * (2.0 * std::f64::consts::PI).sqrt()).ln();
        let a = self.weight_first.ln() + norm
            - (x - self.centers[0]).powi(2) / (2.0 * self.sigma.powi(2));
        let b = (1.0 - self.weight_first).ln() + norm
            - (x - self.centers[1]).powi(2) / (2.0 * self.sigma.powi(2));
        tarn_stats::logsumexp(&[a, b])
    }
}

/// Labels x < 0 as state 0 (A) and x ≥ 0 as state 1 (B).
pub fn label(x: f64) -> Option<u32> {
    Some(u32::from(x >= 0.0))
}
