//! Metropolis Monte Carlo in configuration space (Metropolis, Rosenbluth, Rosenbluth,
//! Teller & Teller, J. Chem. Phys. 21, 1087, 1953) with a symmetric Gaussian proposal on
//! all coordinates at once; the baseline explorer that benchmarks compare against.

use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use serde::{Deserialize, Serialize};

use super::{check_start, Trajectory};
use crate::energy::EnergyModel;
use crate::error::{require, PhysicsError};

/// Parameters of a Metropolis chain.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct MetropolisParams {
    /// Number of proposals.
    pub n_steps: u64,
    /// Standard deviation of the Gaussian displacement of every coordinate.
    pub step_size: f64,
    /// Save every `save_stride`-th state (after proposals stride, 2·stride, ...).
    pub save_stride: u64,
    /// The chain samples exp(−U / (kT · temperature_factor)).
    pub temperature_factor: f64,
}

impl Default for MetropolisParams {
    fn default() -> Self {
        MetropolisParams {
            n_steps: 10_000,
            step_size: 0.1,
            save_stride: 10,
            temperature_factor: 1.0,
        }
    }
}

/// A finished Metropolis chain.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MetropolisRun {
    /// Saved frames, energies, last state and cost.
    pub trajectory: Trajectory,
    /// Fraction of proposals accepted.
    pub acceptance: f64,
    /// Number of accepted proposals.
    pub n_accepted: u64,
}

/// Runs a Metropolis chain from `x0` at temperature `kt · temperature_factor`. A
/// proposal whose energy is not finite (e.g. overlapping particles) is rejected.
pub fn metropolis(
    model: &dyn EnergyModel,
    x0: &[f64],
    kt: f64,
    params: &MetropolisParams,
    rng: &mut ChaCha8Rng,
) -> Result<MetropolisRun, PhysicsError> {
    let kt_run = check_start(model, x0, kt, params.temperature_factor)?;
    require(
        params.step_size.is_finite() && params.step_size > 0.0,
        "step_size",
        "must be positive",
    )?;
    require(params.save_stride > 0, "save_stride", "must be positive")?;
    let pd = model.particle_dims();
    let mut x = x0.to_vec();
    let mut e = model.energy_of(&x)?;
    if !e.is_finite() {
        return Err(PhysicsError::NonFinite {
            what: "metropolis start",
            step: 0,
        });
    }
    let mut traj = Trajectory::new(x.len(), (params.n_steps / params.save_stride) as usize);
    let mut trial = x.clone();
    let mut n_accepted = 0u64;
    for step in 1..=params.n_steps {
        for (t, xi) in trial.iter_mut().zip(&x) {
            let z: f64 = rng.sample(StandardNormal);
            *t = xi + params.step_size * z;
        }
        let e_trial = model.energy_of(&trial)?;
        // Draw the uniform number on every step so the random stream does not depend
        // on the energies (a reproducibility aid when comparing models).
        let u: f64 = rng.gen();
        if e_trial.is_finite() && (e_trial <= e || u < (-(e_trial - e) / kt_run).exp()) {
            std::mem::swap(&mut x, &mut trial);
            e = e_trial;
            n_accepted += 1;
        }
        if step % params.save_stride == 0 {
            traj.save(&x, e, pd);
        }
    }
    traj.n_evals = params.n_steps + 1;
    traj.final_config = x;
    traj.final_energy = e;
    Ok(MetropolisRun {
        trajectory: traj,
        acceptance: if params.n_steps > 0 {
            n_accepted as f64 / params.n_steps as f64
        } else {
            0.0
        },
        n_accepted,
    })
}
