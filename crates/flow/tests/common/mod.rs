//! Shared helpers of the flow crate's tests: small energies of our own with exact
//! answers, and random flows.
#![allow(dead_code)]

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use tarn_flow::{Flow, FlowSpec, Real};
use tarn_physics::{EnergyError, EnergyModel};

/// E(x) = k/2 |x - c|^2 in `dim` dimensions.
pub struct Gaussian {
    pub dim: usize,
    pub k: f64,
    pub centre: f64,
}

impl EnergyModel for Gaussian {
    fn dim(&self) -> usize {
        self.dim
    }
    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        let d = self.dim;
        let mut f = forces;
        for (i, row) in x.chunks_exact(d).enumerate() {
            energy[i] = 0.5 * self.k * row.iter().map(|v| (v - self.centre).powi(2)).sum::<f64>();
            if let Some(f) = f.as_deref_mut() {
                for (o, v) in f[i * d..(i + 1) * d].iter_mut().zip(row) {
                    *o = -self.k * (v - self.centre);
                }
            }
        }
        Ok(())
    }
}

/// A 2-D asymmetric double well of our own, non-separable:
/// E(x, y) = a (x^2 - 1)^2 + b x + (1 + g x^2) y^2 / 2.
/// The y-integral is Gaussian, so Z restricted to x < 0 or x > 0 is a 1-D quadrature.
pub struct DoubleWell {
    pub a: f64,
    pub b: f64,
    pub g: f64,
}

impl DoubleWell {
    pub fn standard() -> Self {
        DoubleWell {
            a: 2.5,
            b: 0.7,
            g: 0.3,
        }
    }

    /// The marginal weight of x: integral over y of exp(-E) = exp(-a(x^2-1)^2 - bx) sqrt(2 pi / (1 + g x^2)).
    pub fn marginal(&self, x: f64) -> f64 {
        (-(self.a * (x * x - 1.0).powi(2) + self.b * x)).exp()
            * (2.0 * std::f64::consts::PI / (1.0 + self.g * x * x)).sqrt()
    }

    /// Exact F_right - F_left = -ln(Z_{x>0} / Z_{x<0}) (kT = 1), by Simpson quadrature.
    pub fn exact_delta_f(&self) -> f64 {
        let simpson = |lo: f64, hi: f64| {
            let n = 20000;
            let h = (hi - lo) / n as f64;
            let mut s = self.marginal(lo) + self.marginal(hi);
            for i in 1..n {
                let w = if i % 2 == 1 { 4.0 } else { 2.0 };
                s += w * self.marginal(lo + i as f64 * h);
            }
            s * h / 3.0
        };
        -(simpson(0.0, 4.0) / simpson(-4.0, 0.0)).ln()
    }

    /// Exact samples from one well (x < 0 if `left`): x by inverse CDF on a fine grid,
    /// then y | x exactly Gaussian.
    pub fn samples(&self, n: usize, left: bool, rng: &mut ChaCha8Rng) -> Vec<f64> {
        let (lo, hi) = if left { (-3.0, 0.0) } else { (0.0, 3.0) };
        let m = 30000;
        let h = (hi - lo) / m as f64;
        let mut cdf = vec![0.0; m + 1];
        for i in 0..m {
            let xm = lo + (i as f64 + 0.5) * h;
            cdf[i + 1] = cdf[i] + self.marginal(xm) * h;
        }
        let total = cdf[m];
        let mut out = Vec::with_capacity(2 * n);
        for _ in 0..n {
            let u: f64 = rng.gen::<f64>() * total;
            let i = cdf.partition_point(|&c| c < u).clamp(1, m) - 1;
            let frac = (u - cdf[i]) / (cdf[i + 1] - cdf[i]).max(1e-300);
            let x = lo + (i as f64 + frac) * h;
            let sd = 1.0 / (1.0 + self.g * x * x).sqrt();
            let y: f64 = rng.sample::<f64, _>(StandardNormal) * sd;
            out.push(x);
            out.push(y);
        }
        out
    }
}

impl EnergyModel for DoubleWell {
    fn dim(&self) -> usize {
        2
    }
    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        let mut f = forces;
        for (i, r) in x.chunks_exact(2).enumerate() {
            let (p, q) = (r[0], r[1]);
            energy[i] =
                self.a * (p * p - 1.0).powi(2) + self.b * p + 0.5 * (1.0 + self.g * p * p) * q * q;
            if let Some(f) = f.as_deref_mut() {
                f[2 * i] = -(4.0 * self.a * p * (p * p - 1.0) + self.b + self.g * p * q * q);
                f[2 * i + 1] = -((1.0 + self.g * p * p) * q);
            }
        }
        Ok(())
    }
}

/// A translation-invariant harmonic cluster: E = k/2 sum_{i<j} |x_i - x_j|^2 for N
/// particles in d dimensions. On the zero-centre-of-mass subspace E = (k N / 2) |y|^2 in
/// orthonormal coordinates, so Z = (2 pi / (k N))^{(N-1) d / 2} exactly (kT = 1).
pub struct HarmonicCluster {
    pub n: usize,
    pub d: usize,
    pub k: f64,
}

impl HarmonicCluster {
    pub fn exact_ln_z(&self) -> f64 {
        0.5 * ((self.n - 1) * self.d) as f64
            * (2.0 * std::f64::consts::PI / (self.k * self.n as f64)).ln()
    }
}

impl EnergyModel for HarmonicCluster {
    fn dim(&self) -> usize {
        self.n * self.d
    }
    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        let (n, d) = (self.n, self.d);
        let mut f = forces;
        for (r, row) in x.chunks_exact(n * d).enumerate() {
            let mut e = 0.0;
            let mut fr = vec![0.0; n * d];
            for i in 0..n {
                for j in i + 1..n {
                    for a in 0..d {
                        let diff = row[i * d + a] - row[j * d + a];
                        e += 0.5 * self.k * diff * diff;
                        fr[i * d + a] -= self.k * diff;
                        fr[j * d + a] += self.k * diff;
                    }
                }
            }
            energy[r] = e;
            if let Some(f) = f.as_deref_mut() {
                f[r * n * d..(r + 1) * n * d].copy_from_slice(&fr);
            }
        }
        Ok(())
    }
}

/// A flow for `spec` whose every parameter (output layers included) is drawn from
/// N(0, scale^2), so that tests exercise non-trivial s and t.
pub fn random_flow<T: Real>(
    spec: FlowSpec,
    init: Option<&[f64]>,
    seed: u64,
    scale: f64,
) -> Flow<T> {
    let mut flow = Flow::<T>::new(spec, init, seed).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5eed);
    for p in flow.params_mut() {
        *p = T::of(scale * rng.sample::<f64, _>(StandardNormal));
    }
    flow
}

/// `n * dim` standard normal values.
pub fn normals(n: usize, dim: usize, seed: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..n * dim).map(|_| rng.sample(StandardNormal)).collect()
}

/// log|det| of a square matrix by LU with partial pivoting.
pub fn log_abs_det(n: usize, mut a: Vec<f64>) -> f64 {
    let mut s = 0.0;
    for c in 0..n {
        let p = (c..n)
            .max_by(|&i, &j| a[i * n + c].abs().total_cmp(&a[j * n + c].abs()))
            .unwrap();
        if p != c {
            for k in 0..n {
                a.swap(c * n + k, p * n + k);
            }
        }
        let piv = a[c * n + c];
        s += piv.abs().ln();
        for i in c + 1..n {
            let f = a[i * n + c] / piv;
            for k in c..n {
                a[i * n + k] -= f * a[c * n + k];
            }
        }
    }
    s
}
