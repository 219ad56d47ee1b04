//! Langevin dynamics with the BAOAB splitting (Leimkuhler & Matthews, Appl. Math. Res.
//! Express 2013, 34): half kick (B), half drift (A), exact Ornstein–Uhlenbeck momentum
//! refresh (O), half drift, half kick, with unit masses. Its configurational sampling is
//! very accurate at large time steps (exact for a harmonic well), which is why it is the
//! high-temperature explorer.

use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use serde::{Deserialize, Serialize};

use super::{check_start, Trajectory};
use crate::energy::EnergyModel;
use crate::error::{require, PhysicsError};

/// Parameters of a BAOAB Langevin run.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct LangevinParams {
    /// Number of time steps.
    pub n_steps: u64,
    /// Time step h.
    pub dt: f64,
    /// Friction γ (inverse time).
    pub friction: f64,
    /// Save every `save_stride`-th step.
    pub save_stride: u64,
    /// The run samples exp(−U / (kT · temperature_factor)).
    pub temperature_factor: f64,
}

impl Default for LangevinParams {
    fn default() -> Self {
        LangevinParams {
            n_steps: 10_000,
            dt: 0.005,
            friction: 1.0,
            save_stride: 10,
            temperature_factor: 1.0,
        }
    }
}

impl LangevinParams {
    /// Checks the parameters, naming the first bad one.
    pub fn validate(&self) -> Result<(), PhysicsError> {
        require(
            self.dt.is_finite() && self.dt > 0.0,
            "dt",
            "must be positive",
        )?;
        require(
            self.friction.is_finite() && self.friction >= 0.0,
            "friction",
            "must be non-negative",
        )?;
        require(self.save_stride > 0, "save_stride", "must be positive")
    }
}

/// A finished Langevin run.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LangevinRun {
    /// Saved frames, energies, last state and cost.
    pub trajectory: Trajectory,
    /// Momenta at the end, so that a continuation keeps the dynamics exact.
    pub final_momenta: Vec<f64>,
}

/// The BAOAB integrator's state and constants, shared with metadynamics.
pub(crate) struct Baoab {
    pub q: Vec<f64>,
    pub p: Vec<f64>,
    pub f: Vec<f64>,
    pub energy: f64,
    half_dt: f64,
    c1: f64,
    c2: f64,
}

impl Baoab {
    /// Starts at `q0` with Maxwell–Boltzmann momenta at `kt`; `f` must be filled by the
    /// caller with the forces at `q0`.
    pub fn new(q0: &[f64], params: &LangevinParams, kt: f64, rng: &mut ChaCha8Rng) -> Baoab {
        let c1 = (-params.friction * params.dt).exp();
        let p = q0
            .iter()
            .map(|_| kt.sqrt() * rng.sample::<f64, _>(StandardNormal))
            .collect();
        Baoab {
            q: q0.to_vec(),
            p,
            f: vec![0.0; q0.len()],
            energy: f64::NAN,
            half_dt: 0.5 * params.dt,
            c1,
            c2: ((1.0 - c1 * c1) * kt).sqrt(),
        }
    }

    /// B, A, O, A: everything up to the force evaluation at the new position.
    pub fn first_half(&mut self, rng: &mut ChaCha8Rng) {
        let h = self.half_dt;
        for ((q, p), f) in self.q.iter_mut().zip(self.p.iter_mut()).zip(&self.f) {
            *p += h * f;
            *q += h * *p;
            let z: f64 = rng.sample(StandardNormal);
            *p = self.c1 * *p + self.c2 * z;
            *q += h * *p;
        }
    }

    /// The final B with the forces at the new position.
    pub fn second_half(&mut self) {
        let h = self.half_dt;
        for (p, f) in self.p.iter_mut().zip(&self.f) {
            *p += h * f;
        }
    }

    /// Whether the energy and all forces are finite.
    pub fn finite(&self) -> bool {
        self.energy.is_finite() && self.f.iter().all(|v| v.is_finite())
    }
}

/// Runs BAOAB Langevin dynamics from `x0` at temperature `kt · temperature_factor`.
/// Fails with [`PhysicsError::NonFinite`] if the dynamics blow up (time step too large).
pub fn langevin_baoab(
    model: &dyn EnergyModel,
    x0: &[f64],
    kt: f64,
    params: &LangevinParams,
    rng: &mut ChaCha8Rng,
) -> Result<LangevinRun, PhysicsError> {
    let kt_run = check_start(model, x0, kt, params.temperature_factor)?;
    params.validate()?;
    let pd = model.particle_dims();
    let mut s = Baoab::new(x0, params, kt_run, rng);
    s.energy = model.energy_and_forces_of(&s.q, &mut s.f)?;
    if !s.finite() {
        return Err(PhysicsError::NonFinite {
            what: "langevin start",
            step: 0,
        });
    }
    let mut traj = Trajectory::new(x0.len(), (params.n_steps / params.save_stride) as usize);
    for step in 1..=params.n_steps {
        s.first_half(rng);
        s.energy = model.energy_and_forces_of(&s.q, &mut s.f)?;
        if !s.finite() {
            return Err(PhysicsError::NonFinite {
                what: "langevin",
                step,
            });
        }
        s.second_half();
        if step % params.save_stride == 0 {
            traj.save(&s.q, s.energy, pd);
        }
    }
    traj.n_evals = params.n_steps + 1;
    traj.final_energy = s.energy;
    traj.final_config = s.q;
    Ok(LangevinRun {
        trajectory: traj,
        final_momenta: s.p,
    })
}
