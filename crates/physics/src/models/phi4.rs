//! Two-dimensional lattice φ⁴ on an L×L periodic lattice (Albergo, Kanwar & Shanahan,
//! Phys. Rev. D 100, 034515, 2019):
//!
//! S(φ) = Σ_x [Σ_μ φ_x(2φ_x − φ_{x+μ} − φ_{x−μ}) + m² φ_x² + λ φ_x⁴]
//!      = Σ_x [Σ_μ (φ_{x+μ} − φ_x)² + m² φ_x² + λ φ_x⁴],
//!
//! with probability ∝ exp(−S), so the "energy" of a configuration is S and kT = 1 is the
//! physical point. Site x = (col, row) is coordinate `row · L + col`. For m² < 0 and
//! small enough λ the model is in its broken phase, with two ordered states of opposite
//! magnetisation and exactly equal free energies (φ → −φ symmetry).
//!
//! The kernel vectorises along lattice rows (see `site_rows` and [`crate::simd`]).

use super::par_evaluate;
use crate::energy::{EnergyError, EnergyModel};
use crate::error::{require, PhysicsError};
use crate::simd::{dispatch_kernel, fma, LANES};

/// Floating-point operations per site with forces, counted by hand from `row_kernel`
/// (a fused multiply-add counts as two): 11 for the action (2 differences, 1 square,
/// 4 fused ops), 9 for the force (3 additions, 1 doubling, 2 multiplications for the
/// cubic, 2 fused ops).
pub const FLOPS_PER_SITE: f64 = 20.0;

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

    /// Evaluates one chunk, one configuration at a time; each lattice row is an
    /// element-wise vector loop (see [`site_rows`]).
    fn block(&self, xc: &[f64], ec: &mut [f64], mut fc: Option<&mut [f64]>) {
        let dim = self.size * self.size;
        let mut padded = vec![0.0; (self.size + 2) * (self.size + 2)];
        for (c, e) in ec.iter_mut().enumerate() {
            let phi = &xc[c * dim..(c + 1) * dim];
            let f = fc.as_deref_mut().map(|f| &mut f[c * dim..(c + 1) * dim]);
            *e = sites_simd(self.size, self.m2, self.lambda, phi, f, &mut padded);
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

dispatch_kernel!(fn sites_simd(size: usize, m2: f64, lambda: f64, phi: &[f64], forces: Option<&mut [f64]>, padded: &mut [f64]) -> f64 => site_rows);

/// Action and (optionally) forces of one lattice, row by row. The lattice is first
/// copied into `padded`, an (L+2)×(L+2) array with a one-site periodic halo, so that a
/// row's left, right, upper and lower neighbours are contiguous slices and every
/// per-site operation is an element-wise loop. The action is accumulated in [`LANES`]
/// partial sums (site `col` into sum `col % LANES` when L is a multiple of [`LANES`])
/// that are added in a fixed order at the end, so the result is deterministic and
/// needs no reassociation by the compiler.
#[inline(always)]
fn site_rows<const FMA: bool>(
    size: usize,
    m2: f64,
    lambda: f64,
    phi: &[f64],
    forces: Option<&mut [f64]>,
    padded: &mut [f64],
) -> f64 {
    // Common lattice sizes get code specialised for a constant L (the call is inlined
    // with a literal size), which unrolls the row loops and the halo copies.
    match size {
        8 => site_rows_sized::<FMA>(8, m2, lambda, phi, forces, padded),
        16 => site_rows_sized::<FMA>(16, m2, lambda, phi, forces, padded),
        _ => site_rows_sized::<FMA>(size, m2, lambda, phi, forces, padded),
    }
}

/// The body of [`site_rows`] for one lattice size.
#[inline(always)]
fn site_rows_sized<const FMA: bool>(
    size: usize,
    m2: f64,
    lambda: f64,
    phi: &[f64],
    mut forces: Option<&mut [f64]>,
    padded: &mut [f64],
) -> f64 {
    let w = size + 2;
    let padded = &mut padded[..w * w];
    for prow in 0..w {
        let src_row = match prow {
            0 => size - 1,
            r if r == w - 1 => 0,
            r => r - 1,
        };
        let src = &phi[src_row * size..(src_row + 1) * size];
        let dst = &mut padded[prow * w..(prow + 1) * w];
        dst[0] = src[size - 1];
        dst[1..=size].copy_from_slice(src);
        dst[size + 1] = src[0];
    }
    let padded = &*padded;
    let mut acc = [0.0; LANES];
    // Force = -(8 + 2m²) φ + 2 Σ_nbr φ − 4λ φ³.
    let c_lin = -(8.0 + 2.0 * m2);
    let c_cub = -4.0 * lambda;
    for row in 0..size {
        let mid = &padded[(row + 1) * w..(row + 2) * w];
        let cur = &mid[1..=size];
        let left = &mid[..size];
        let right = &mid[2..size + 2];
        let up = &padded[(row + 2) * w + 1..][..size];
        let down = &padded[row * w + 1..][..size];
        let out = forces
            .as_deref_mut()
            .map(|f| &mut f[row * size..(row + 1) * size]);
        if size.is_multiple_of(LANES) {
            row_kernel::<FMA, LANES>(
                cur, right, left, up, down, m2, lambda, c_lin, c_cub, out, &mut acc,
            );
        } else {
            let mut one = [0.0; 1];
            row_kernel::<FMA, 1>(
                cur, right, left, up, down, m2, lambda, c_lin, c_cub, out, &mut one,
            );
            acc[0] += one[0];
        }
    }
    acc.iter().sum()
}

/// One row in blocks of `W` sites: the action's link and on-site terms into `acc`,
/// the forces into `out`.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn row_kernel<const FMA: bool, const W: usize>(
    cur: &[f64],
    right: &[f64],
    left: &[f64],
    up: &[f64],
    down: &[f64],
    m2: f64,
    lambda: f64,
    c_lin: f64,
    c_cub: f64,
    out: Option<&mut [f64]>,
    acc: &mut [f64; W],
) {
    // Two passes (action, then forces) vectorise; a fused loop measured 2.5x slower.
    let blocks = cur
        .chunks_exact(W)
        .zip(right.chunks_exact(W))
        .zip(up.chunks_exact(W));
    for ((p, r), u) in blocks {
        for l in 0..W {
            acc[l] = site_action::<FMA>(p[l], r[l], u[l], m2, lambda, acc[l]);
        }
    }
    if let Some(out) = out {
        let blocks = out
            .chunks_exact_mut(W)
            .zip(cur.chunks_exact(W))
            .zip(right.chunks_exact(W).zip(left.chunks_exact(W)))
            .zip(up.chunks_exact(W).zip(down.chunks_exact(W)));
        for (((o, p), (r, le)), (u, d)) in blocks {
            for l in 0..W {
                let nbr = (r[l] + le[l]) + (u[l] + d[l]);
                let lin = fma::<FMA>(c_lin, p[l], 2.0 * nbr);
                o[l] = fma::<FMA>(c_cub * p[l] * p[l], p[l], lin);
            }
        }
    }
}

/// One site's links to its right and upper neighbours and its on-site terms, added to
/// `acc`: (φ_r − φ)² + (φ_u − φ)² + φ²(m² + λφ²).
#[inline(always)]
fn site_action<const FMA: bool>(p: f64, r: f64, u: f64, m2: f64, lambda: f64, acc: f64) -> f64 {
    let dr = r - p;
    let du = u - p;
    let p2 = p * p;
    let a = fma::<FMA>(dr, dr, acc);
    let a = fma::<FMA>(du, du, a);
    fma::<FMA>(p2, fma::<FMA>(lambda, p2, m2), a)
}
