//! The Müller–Brown surface (Müller & Brown, Theor. Chim. Acta 53, 75, 1979): three
//! minima and two saddles in two dimensions, the classic test of path and state finding.
//!
//! V(x, y) = Σ_k A_k exp[a_k (x − x0_k)² + b_k (x − x0_k)(y − y0_k) + c_k (y − y0_k)²].

use super::par_each;
use crate::energy::{EnergyError, EnergyModel};

/// Amplitudes A_k of the four Gaussian-like terms.
pub const A: [f64; 4] = [-200.0, -100.0, -170.0, 15.0];
/// Coefficients a_k of (x − x0)².
pub const AX: [f64; 4] = [-1.0, -1.0, -6.5, 0.7];
/// Coefficients b_k of (x − x0)(y − y0).
pub const BXY: [f64; 4] = [0.0, 0.0, 11.0, 0.6];
/// Coefficients c_k of (y − y0)².
pub const CY: [f64; 4] = [-10.0, -10.0, -6.5, 0.7];
/// Centres x0_k.
pub const X0: [f64; 4] = [1.0, 0.0, -0.5, -1.0];
/// Centres y0_k.
pub const Y0: [f64; 4] = [0.0, 0.5, 1.5, 1.0];

/// The Müller–Brown potential with the 1979 parameters; dim 2.
#[derive(Debug, Clone, Copy, Default)]
pub struct MullerBrown;

impl MullerBrown {
    /// Energy and gradient (not force) at one point.
    pub fn energy_gradient(x: f64, y: f64) -> (f64, [f64; 2]) {
        let mut v = 0.0;
        let mut g = [0.0; 2];
        for k in 0..4 {
            let dx = x - X0[k];
            let dy = y - Y0[k];
            let t = A[k] * (AX[k] * dx * dx + BXY[k] * dx * dy + CY[k] * dy * dy).exp();
            v += t;
            g[0] += t * (2.0 * AX[k] * dx + BXY[k] * dy);
            g[1] += t * (BXY[k] * dx + 2.0 * CY[k] * dy);
        }
        (v, g)
    }

    /// The analytic Hessian at one point, row-major `[[xx, xy], [yx, yy]]`; used to
    /// classify stationary points (a saddle has one negative eigenvalue).
    pub fn hessian(x: f64, y: f64) -> [[f64; 2]; 2] {
        let mut h = [[0.0; 2]; 2];
        for k in 0..4 {
            let dx = x - X0[k];
            let dy = y - Y0[k];
            let t = A[k] * (AX[k] * dx * dx + BXY[k] * dx * dy + CY[k] * dy * dy).exp();
            let gx = 2.0 * AX[k] * dx + BXY[k] * dy;
            let gy = BXY[k] * dx + 2.0 * CY[k] * dy;
            h[0][0] += t * (gx * gx + 2.0 * AX[k]);
            h[0][1] += t * (gx * gy + BXY[k]);
            h[1][1] += t * (gy * gy + 2.0 * CY[k]);
        }
        h[1][0] = h[0][1];
        h
    }
}

impl EnergyModel for MullerBrown {
    fn dim(&self) -> usize {
        2
    }

    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        par_each(2, x, energy, forces, |q, f| {
            let (v, g) = MullerBrown::energy_gradient(q[0], q[1]);
            if let Some(f) = f {
                f[0] = -g[0];
                f[1] = -g[1];
            }
            v
        })
    }
}

/// Energies of the three minima A, B, C (deepest first), recomputed from the 1979
/// parameters by quenching from their published positions.
pub const MINIMA_ENERGIES: [f64; 3] = [-146.699517, -108.166724, -80.767818];

/// The index of the minimum (A = 0, B = 1, C = 2) whose energy is within `tol` of
/// `energy`, if any.
pub fn basin_of_energy(energy: f64, tol: f64) -> Option<usize> {
    MINIMA_ENERGIES
        .iter()
        .position(|m| (energy - m).abs() < tol)
}

/// Exact basin free energies F_s − F_A (in kT) at `kt`, by quadrature: the Boltzmann
/// factor summed on a grid of spacing `h` over [−1.9, 1.4] × [−0.7, 2.3], each grid point
/// assigned to the minimum its FIRE quench ends in — the definition of a basin that the
/// quench-based state assignment uses. Costs about (3.3·3/h²)·150 energy evaluations.
pub fn basin_free_energies(kt: f64, h: f64) -> Result<[f64; 3], crate::error::PhysicsError> {
    use crate::quench::{quench_batch, FireParams};
    let (x0, x1, y0, y1) = (-1.9, 1.4, -0.7, 2.3);
    let nx = ((x1 - x0) / h) as usize;
    let ny = ((y1 - y0) / h) as usize;
    let mut pts = Vec::with_capacity(nx * ny * 2);
    for i in 0..nx {
        for j in 0..ny {
            pts.push(x0 + (i as f64 + 0.5) * h);
            pts.push(y0 + (j as f64 + 0.5) * h);
        }
    }
    let mut e = vec![0.0; nx * ny];
    MullerBrown.evaluate(&pts, &mut e, None)?;
    let fire = FireParams {
        force_tolerance: 1e-4,
        ..FireParams::default()
    };
    let q = quench_batch(&MullerBrown, &pts, &fire)?;
    let mut z = [0.0f64; 3];
    for (ek, qk) in e.iter().zip(&q.energies) {
        if let Some(b) = basin_of_energy(*qk, 1e-3) {
            z[b] += (-(ek - MINIMA_ENERGIES[0]) / kt).exp();
        }
    }
    Ok([0.0, -(z[1] / z[0]).ln(), -(z[2] / z[0]).ln()])
}
