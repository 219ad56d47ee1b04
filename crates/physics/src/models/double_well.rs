//! tarn's own asymmetric two-dimensional double well, and its exact state populations
//! by numerical quadrature.
//!
//! U(x, y) = h (x² − 1)² − t x + ½ κ(x) y²,  κ(x) = κ₀ + κ₁ tanh(s x),
//! with h = 5, t = 1, κ₀ = 3, κ₁ = 2, s = 2 (energies in units of kT = 1).
//!
//! Why these numbers: the tilt t makes the right well (x ≈ +1.012) about 2 kT deeper in
//! energy than the left (x ≈ −0.987), while κ(x) makes it narrower along y (κ ≈ 4.93
//! against ≈ 1.07), which costs it about ½ ln(4.93/1.07) ≈ 0.76 kT of entropy. The
//! barrier (saddle at x ≈ −0.050, y = 0) is about 4.0 kT above the left well and 6.0 kT
//! above the right one. So the free-energy difference is neither the energy difference
//! nor zero, and an estimator that forgets the widths is caught.
//!
//! States are the half-planes left and right of the saddle's x coordinate; their exact
//! populations at any kT come from [`double_well_reference`].

use super::par_each;
use crate::energy::{EnergyError, EnergyModel};

/// Parameters of the asymmetric double well (see the module doc for the formula).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DoubleWell {
    /// Barrier parameter h of h (x² − 1)².
    pub barrier: f64,
    /// Tilt t of the linear term −t x (positive t lowers the right well).
    pub tilt: f64,
    /// Mean transverse stiffness κ₀.
    pub kappa0: f64,
    /// Transverse stiffness contrast κ₁ (|κ₁| < κ₀ keeps κ positive).
    pub kappa1: f64,
    /// Sharpness s of the stiffness switch tanh(s x).
    pub sharpness: f64,
}

impl Default for DoubleWell {
    fn default() -> Self {
        DoubleWell {
            barrier: 5.0,
            tilt: 1.0,
            kappa0: 3.0,
            kappa1: 2.0,
            sharpness: 2.0,
        }
    }
}

impl DoubleWell {
    /// Transverse stiffness κ(x) and its derivative κ'(x).
    fn kappa(&self, x: f64) -> (f64, f64) {
        let th = (self.sharpness * x).tanh();
        (
            self.kappa0 + self.kappa1 * th,
            self.kappa1 * self.sharpness * (1.0 - th * th),
        )
    }

    /// Energy and gradient at one point.
    pub fn energy_gradient(&self, x: f64, y: f64) -> (f64, [f64; 2]) {
        let (k, dk) = self.kappa(x);
        let u = x * x - 1.0;
        let v = self.barrier * u * u - self.tilt * x + 0.5 * k * y * y;
        let gx = 4.0 * self.barrier * x * u - self.tilt + 0.5 * dk * y * y;
        let gy = k * y;
        (v, [gx, gy])
    }

    /// The x coordinate of the left minimum (y = 0 there).
    pub fn left_minimum_x(&self) -> f64 {
        self.stationary_x(-1.0)
    }

    /// The x coordinate of the right minimum.
    pub fn right_minimum_x(&self) -> f64 {
        self.stationary_x(1.0)
    }

    /// The x coordinate of the saddle, which divides the two states.
    pub fn saddle_x(&self) -> f64 {
        self.stationary_x(0.0)
    }

    /// The x coordinate near `x0` where the profile U(x, 0) is stationary, by Newton's
    /// method on 4h x(x² − 1) − t = 0 (minima and the saddle all lie on y = 0).
    fn stationary_x(&self, x0: f64) -> f64 {
        let mut x = x0;
        for _ in 0..100 {
            let g = 4.0 * self.barrier * x * (x * x - 1.0) - self.tilt;
            let dg = 4.0 * self.barrier * (3.0 * x * x - 1.0);
            let step = g / dg;
            x -= step;
            if step.abs() < 1e-15 {
                break;
            }
        }
        x
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
        par_each(2, x, energy, forces, |q, f| {
            let (v, g) = self.energy_gradient(q[0], q[1]);
            if let Some(f) = f {
                f[0] = -g[0];
                f[1] = -g[1];
            }
            v
        })
    }
}

/// Exact thermodynamics of the default [`DoubleWell`] at one temperature, from 2-D
/// composite Simpson quadrature (converged far below the statistical errors of any
/// sampler test).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DoubleWellReference {
    /// The temperature the numbers belong to.
    pub kt: f64,
    /// x coordinate of the saddle; the dividing line between the two states.
    pub x_saddle: f64,
    /// Energy at the saddle.
    pub e_saddle: f64,
    /// Left minimum (x, y) and its energy.
    pub left_minimum: [f64; 2],
    /// Energy of the left minimum.
    pub e_left: f64,
    /// Right minimum (x, y) and its energy.
    pub right_minimum: [f64; 2],
    /// Energy of the right minimum.
    pub e_right: f64,
    /// Probability of x < x_saddle.
    pub p_left: f64,
    /// Probability of x > x_saddle.
    pub p_right: f64,
    /// F_right − F_left in units of kT, i.e. −ln(p_right / p_left).
    pub delta_f: f64,
    /// ln ∫ exp(−U/kT) dx dy over the plane.
    pub ln_z: f64,
}

/// Composite Simpson weights for `n` intervals (n even) of width `h` on a grid of n + 1
/// points.
fn simpson_weight(i: usize, n: usize, h: f64) -> f64 {
    let w = if i == 0 || i == n {
        1.0
    } else if i % 2 == 1 {
        4.0
    } else {
        2.0
    };
    w * h / 3.0
}

/// ∫∫ exp(−(U − shift)/kT) over [x_lo, x_hi] × [−y_max, y_max] by composite Simpson.
fn integrate_box(dw: &DoubleWell, kt: f64, shift: f64, x_lo: f64, x_hi: f64, y_max: f64) -> f64 {
    const NX: usize = 1200;
    const NY: usize = 1200;
    let hx = (x_hi - x_lo) / NX as f64;
    let hy = 2.0 * y_max / NY as f64;
    let mut total = 0.0;
    for i in 0..=NX {
        let x = x_lo + i as f64 * hx;
        let mut row = 0.0;
        for j in 0..=NY {
            let y = -y_max + j as f64 * hy;
            let (u, _) = dw.energy_gradient(x, y);
            row += simpson_weight(j, NY, hy) * (-(u - shift) / kt).exp();
        }
        total += simpson_weight(i, NX, hx) * row;
    }
    total
}

/// The exact populations and free-energy difference of the default [`DoubleWell`] at
/// temperature `kt`, by 2-D quadrature of the Boltzmann factor on each side of the
/// saddle. Tests of samplers and estimators compare against this. `kt` must be
/// positive; the integration box is sized for kT up to about 10.
pub fn double_well_reference(kt: f64) -> DoubleWellReference {
    let dw = DoubleWell::default();
    let x_saddle = dw.stationary_x(0.0);
    let xl = dw.stationary_x(-1.0);
    let xr = dw.stationary_x(1.0);
    let e = |x: f64| dw.energy_gradient(x, 0.0).0;
    let shift = e(xl).min(e(xr));
    // The integrand is below exp(-40) beyond these bounds for kT up to about 10: the
    // quartic dominates in x, and the softest transverse stiffness is κ₀ − κ₁ = 1.
    let x_span = 2.2 + (40.0 * kt / dw.barrier).powf(0.25);
    let y_max = (80.0 * kt / (dw.kappa0 - dw.kappa1)).sqrt();
    let z_left = integrate_box(&dw, kt, shift, -x_span, x_saddle, y_max);
    let z_right = integrate_box(&dw, kt, shift, x_saddle, x_span, y_max);
    let z = z_left + z_right;
    DoubleWellReference {
        kt,
        x_saddle,
        e_saddle: e(x_saddle),
        left_minimum: [xl, 0.0],
        e_left: e(xl),
        right_minimum: [xr, 0.0],
        e_right: e(xr),
        p_left: z_left / z,
        p_right: z_right / z,
        delta_f: -(z_right / z_left).ln(),
        ln_z: z.ln() - shift / kt,
    }
}
