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
