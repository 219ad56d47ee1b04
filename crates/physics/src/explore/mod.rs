//! Explorers in configuration space: Metropolis Monte Carlo, Langevin dynamics with the
//! BAOAB splitting, and well-tempered metadynamics on top of BAOAB.
//!
//! Every explorer takes any [`EnergyModel`] (built-in or external), a start
//! configuration, the temperature `kt` (the campaign's kT) scaled by the explorer's
//! `temperature_factor`, a parameter struct (serde, unknown keys refused, sensible
//! defaults) and a seeded [`ChaCha8Rng`]; the same seed gives the same numbers. Results
//! are plain structs with flat `[n_frames, dim]` arrays. Saved frames of clusters are
//! moved to the centre-of-mass frame (translation is a zero mode of their energy).
//!
//! [`ChaCha8Rng`]: rand_chacha::ChaCha8Rng

pub mod hmc;
pub mod langevin;
pub mod metad;
pub mod metropolis;

pub use hmc::{hmc, HmcParams, HmcRun};
pub use langevin::{langevin_baoab, LangevinParams, LangevinRun};
pub use metad::{metadynamics, Bias, GridAxis, InterpolatedBias, MetadParams, MetadRun};
pub use metropolis::{metropolis, MetropolisParams, MetropolisRun};

use serde::Serialize;

use crate::energy::EnergyModel;
use crate::error::{require, PhysicsError};
use crate::models::lennard_jones::centre_of_mass_frame;

/// Saved frames of one exploration chain.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Trajectory {
    /// Coordinates per configuration.
    pub dim: usize,
    /// Saved configurations, `[n_frames, dim]` row-major.
    pub frames: Vec<f64>,
    /// Potential energy (unbiased) of each saved frame, `[n_frames]`.
    pub energies: Vec<f64>,
    /// The chain's last configuration (not moved to the centre-of-mass frame), so that
    /// a later task can continue the chain exactly.
    pub final_config: Vec<f64>,
    /// Its energy.
    pub final_energy: f64,
    /// Energy evaluations (configurations evaluated) spent by the chain.
    pub n_evals: u64,
}

impl Trajectory {
    /// An empty trajectory for `dim` coordinates.
    fn new(dim: usize, n_frames_hint: usize) -> Trajectory {
        Trajectory {
            dim,
            frames: Vec::with_capacity(n_frames_hint * dim),
            energies: Vec::with_capacity(n_frames_hint),
            final_config: Vec::new(),
            final_energy: f64::NAN,
            n_evals: 0,
        }
    }

    /// Number of saved frames.
    pub fn n_frames(&self) -> usize {
        self.energies.len()
    }

    /// Saved frame `i`.
    pub fn frame(&self, i: usize) -> &[f64] {
        &self.frames[i * self.dim..(i + 1) * self.dim]
    }

    /// Appends a frame, in the centre-of-mass frame when the model is a cluster.
    fn save(&mut self, x: &[f64], energy: f64, particle_dims: Option<usize>) {
        let start = self.frames.len();
        self.frames.extend_from_slice(x);
        if let Some(d) = particle_dims {
            centre_of_mass_frame(&mut self.frames[start..], d);
        }
        self.energies.push(energy);
    }
}

/// Checks what every explorer needs: a start of the right size, a positive finite
/// temperature, and returns the sampling temperature kT · temperature_factor.
fn check_start(
    model: &dyn EnergyModel,
    x0: &[f64],
    kt: f64,
    temperature_factor: f64,
) -> Result<f64, PhysicsError> {
    let dim = model.dim();
    if x0.len() != dim {
        return Err(PhysicsError::StartShape { dim, got: x0.len() });
    }
    require(x0.iter().all(|v| v.is_finite()), "start", "must be finite")?;
    require(kt.is_finite() && kt > 0.0, "kT", "must be positive")?;
    require(
        temperature_factor.is_finite() && temperature_factor > 0.0,
        "temperature_factor",
        "must be positive",
    )?;
    Ok(kt * temperature_factor)
}
