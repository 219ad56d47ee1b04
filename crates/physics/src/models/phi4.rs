//! Two-dimensional lattice φ⁴ on an L×L periodic lattice (Albergo, Kanwar & Shanahan,
//! Phys. Rev. D 100, 034515, 2019):
//!
//! S[φ] = Σ_x [Σ_μ φ_x(2φ_x − φ_{x+μ} − φ_{x−μ}) + m² φ_x² + λ φ_x⁴]
//!      = Σ_x [Σ_μ (φ_{x+μ} − φ_x)² + m² φ_x² + λ φ_x⁴],
//!
//! with probability ∝ exp(−S), so the "energy" of a configuration is S and kT = 1 is the
//! physical point. Site x = (col, row) is coordinate `row · L + col`. For m² < 0 and
//! small enough λ the model is in its broken phase, with two ordered states of opposite
//! magnetisation and exactly equal free energies (φ → −φ symmetry).
//!
//! The kernel processes eight configurations per SIMD block (see [`crate::simd`]).

use super::par_evaluate;
use crate::energy::{EnergyError, EnergyModel};
use crate::error::{require, PhysicsError};
use crate::simd::{dispatch_kernel, fma, Lanes, LANES};

/// Floating-point operations per site in the kernel, counted by hand from
/// `site_kernel` (a fused multiply-add counts as two): 11 for the action, 12 for the
/// gradient.
pub const FLOPS_PER_SITE: f64 = 23.0;

/// Lattice φ⁴ with periodic boundaries.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Phi4 {
    size: usize,
    m2: f64,
    lambda: f64,
}

impl Phi4 {
    /// A `size`×`size` lattice with mass squared `m2` and coupling `lambda` ≥ 0.
    pub fn new(size: usize, m2: f64, lambda: f64) -> Result<Self, PhysicsError> {
        require(
            size >= 2,
            "size",
            "the lattice needs at least 2 sites per side",
        )?;
        require(m2.is_finite(), "m2", "must be finite")?;
        require(
            lambda.is_finite() && lambda >= 0.0,
            "lambda",
            "must be finite and non-negative",
        )?;
        Ok(Phi4 { size, m2, lambda })
    }

    /// Lattice extent L.
    pub fn size(&self) -> usize {
        self.size
    }

    /// Mass squared m².
    pub fn m2(&self) -> f64 {
        self.m2
    }

    /// Quartic coupling λ.
    pub fn lambda(&self) -> f64 {
        self.lambda
    }

    /// Evaluates one chunk in SIMD blocks of eight configurations.
    fn block(&self, xc: &[f64], ec: &mut [f64], mut fc: Option<&mut [f64]>) {
        let dim = self.size * self.size;
        let n_conf = ec.len();
        let mut phi: Vec<Lanes> = vec![[0.0; LANES]; dim];
        let mut grad: Vec<Lanes> = vec![[0.0; LANES]; dim];
        let mut start = 0;
        while start < n_conf {
            let m = LANES.min(n_conf - start);
            for l in 0..LANES {
                let src = (start + l.min(m - 1)) * dim;
                for (k, p) in phi.iter_mut().enumerate() {
                    p[l] = xc[src + k];
                }
            }
            let s = sites_simd(self.size, self.m2, self.lambda, &phi, &mut grad);
            for l in 0..m {
                let c = start + l;
                ec[c] = s[l];
                if let Some(f) = fc.as_deref_mut() {
                    for (k, fk) in f[c * dim..(c + 1) * dim].iter_mut().enumerate() {
                        *fk = -grad[k][l];
                    }
                }
            }
            start += m;
        }
    }
}

impl EnergyModel for Phi4 {
    fn dim(&self) -> usize {
        self.size * self.size
    }

    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        par_evaluate(self.dim(), x, energy, forces, |xc, ec, fc| {
            self.block(xc, ec, fc)
        })
    }
}

dispatch_kernel!(fn sites_simd(size: usize, m2: f64, lambda: f64, phi: &[Lanes], grad: &mut [Lanes]) -> Lanes => site_kernel);

/// Action and gradient of eight lattices in lanes. Each site owns the links to its
/// right and upper neighbours, so every link is counted once.
#[inline(always)]
fn site_kernel<const FMA: bool>(
    size: usize,
    m2: f64,
    lambda: f64,
    phi: &[Lanes],
    grad: &mut [Lanes],
) -> Lanes {
    let dim = size * size;
    let phi = &phi[..dim];
    let grad = &mut grad[..dim];
    grad.fill([0.0; LANES]);
    let mut s = [0.0; LANES];
    let two_m2 = 2.0 * m2;
    let four_lambda = 4.0 * lambda;
    for row in 0..size {
        let up_row = if row + 1 == size { 0 } else { row + 1 };
        for col in 0..size {
            let right_col = if col + 1 == size { 0 } else { col + 1 };
            let x = row * size + col;
            let r = row * size + right_col;
            let u = up_row * size + col;
            let p = phi[x];
            let pr = phi[r];
            let pu = phi[u];
            let mut gx = [0.0; LANES];
            let mut gr = [0.0; LANES];
            let mut gu = [0.0; LANES];
            for l in 0..LANES {
                let dr = pr[l] - p[l];
                let du = pu[l] - p[l];
                let p2 = p[l] * p[l];
                let local = fma::<FMA>(lambda, p2, m2);
                let acc = fma::<FMA>(dr, dr, s[l]);
                let acc = fma::<FMA>(du, du, acc);
                s[l] = fma::<FMA>(p2, local, acc);
                let p3 = p2 * p[l];
                let onsite = fma::<FMA>(four_lambda, p3, two_m2 * p[l]);
                gx[l] = fma::<FMA>(-2.0, dr + du, onsite);
                gr[l] = 2.0 * dr;
                gu[l] = 2.0 * du;
            }
            for l in 0..LANES {
                grad[x][l] += gx[l];
            }
            for l in 0..LANES {
                grad[r][l] += gr[l];
            }
            for l in 0..LANES {
                grad[u][l] += gu[l];
            }
        }
    }
    s
}
