//! The built-in energy models and the system specification that names them in a
//! campaign file.
//!
//! Owns: Müller–Brown, the asymmetric double well, Lennard-Jones clusters with a
//! confining wall, lattice φ⁴, a harmonic well for integrator checks, and
//! [`SystemSpec`]. All models are batched, have analytic forces, and spread a batch over
//! rayon in fixed chunks of [`CHUNK`] configurations; every configuration is computed
//! by one thread in a fixed order, so results do not depend on scheduling.

pub mod double_well;
pub mod harmonic;
pub mod lennard_jones;
pub mod muller_brown;
pub mod phi4;

pub use double_well::{double_well_reference, DoubleWell, DoubleWellReference};
pub use harmonic::Harmonic;
pub use lennard_jones::{LennardJones, Wall};
pub use muller_brown::MullerBrown;
pub use phi4::Phi4;

use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::energy::{check_batch, EnergyError, EnergyModel};
use crate::error::{require, PhysicsError};

/// Configurations per rayon task. Batches no larger than this run on the calling thread,
/// which keeps single-sample calls (Metropolis, quench of one sample) free of
/// thread-pool overhead.
pub const CHUNK: usize = 64;

/// Runs `block` over fixed chunks of a batch, in parallel when the batch is larger than
/// one chunk. `block` receives the chunk's configurations, energies and (optionally)
/// forces, and must compute each configuration independently.
pub(crate) fn par_evaluate<F>(
    dim: usize,
    x: &[f64],
    energy: &mut [f64],
    forces: Option<&mut [f64]>,
    block: F,
) -> Result<(), EnergyError>
where
    F: Fn(&[f64], &mut [f64], Option<&mut [f64]>) + Sync,
{
    let n = check_batch(dim, x, energy, forces.as_deref())?;
    let energy = &mut energy[..n];
    if n <= CHUNK {
        block(x, energy, forces.map(|f| &mut f[..n * dim]));
        return Ok(());
    }
    match forces {
        Some(f) => x
            .par_chunks(CHUNK * dim)
            .zip(energy.par_chunks_mut(CHUNK))
            .zip(f[..n * dim].par_chunks_mut(CHUNK * dim))
            .for_each(|((xc, ec), fc)| block(xc, ec, Some(fc))),
        None => x
            .par_chunks(CHUNK * dim)
            .zip(energy.par_chunks_mut(CHUNK))
            .for_each(|(xc, ec)| block(xc, ec, None)),
    }
    Ok(())
}

/// Runs a per-configuration function over a batch with [`par_evaluate`]'s chunking; for
/// models cheap enough that one configuration at a time is the natural kernel.
pub(crate) fn par_each<F>(
    dim: usize,
    x: &[f64],
    energy: &mut [f64],
    forces: Option<&mut [f64]>,
    one: F,
) -> Result<(), EnergyError>
where
    F: Fn(&[f64], Option<&mut [f64]>) -> f64 + Sync,
{
    par_evaluate(dim, x, energy, forces, |xc, ec, fc| match fc {
        Some(fc) => {
            for ((xi, ei), fi) in xc.chunks(dim).zip(ec.iter_mut()).zip(fc.chunks_mut(dim)) {
                *ei = one(xi, Some(fi));
            }
        }
        None => {
            for (xi, ei) in xc.chunks(dim).zip(ec.iter_mut()) {
                *ei = one(xi, None);
            }
        }
    })
}

/// A system as named in a campaign file (`[system]` table): which built-in model, or an
/// external command, and its parameters. Unknown keys are rejected.
///
/// ```toml
/// [system]
/// model = "lennard-jones"
/// particles = 7
/// dims = 2
/// ```
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "model", rename_all = "kebab-case", deny_unknown_fields)]
pub enum SystemSpec {
    /// Müller–Brown surface in two dimensions (no parameters; written as an empty
    /// struct variant so that unknown keys are still refused).
    MullerBrown {},
    /// tarn's asymmetric two-dimensional double well (fixed parameters, see
    /// [`DoubleWell`]).
    DoubleWell {},
    /// A Lennard-Jones cluster (ε = σ = 1, untruncated) in a confining wall.
    LennardJones {
        /// Number of particles, at least 2.
        particles: usize,
        /// Spatial dimension, 2 or 3.
        dims: usize,
        /// Wall radius around the centre of mass; default [`Wall::default_radius`].
        #[serde(default)]
        wall_radius: Option<f64>,
        /// Wall stiffness in ε/σ²; 0 switches the wall off. Default 1.
        #[serde(default = "default_wall_strength")]
        wall_strength: f64,
    },
    /// Lattice φ⁴ on a periodic `size`×`size` lattice; the energy is the action S.
    Phi4 {
        /// Lattice extent L (at least 2); dim = L².
        size: usize,
        /// Bare mass squared m² (negative in the broken phase).
        m2: f64,
        /// Quartic coupling λ ≥ 0.
        lambda: f64,
    },
    /// A user's program answering the framing of [`crate::external`].
    External {
        /// Program and arguments, e.g. `["python3", "energy.py"]`.
        command: Vec<String>,
        /// Coordinates per configuration.
        dim: usize,
    },
}

fn default_wall_strength() -> f64 {
    1.0
}

impl SystemSpec {
    /// Number of coordinates of one configuration of this system.
    pub fn dim(&self) -> usize {
        match self {
            SystemSpec::MullerBrown {} | SystemSpec::DoubleWell {} => 2,
            SystemSpec::LennardJones {
                particles, dims, ..
            } => particles * dims,
            SystemSpec::Phi4 { size, .. } => size * size,
            SystemSpec::External { dim, .. } => *dim,
        }
    }

    /// Checks the parameters without building the model, so that `tarn check` can
    /// report every problem before a campaign starts.
    pub fn validate(&self) -> Result<(), PhysicsError> {
        match self {
            SystemSpec::MullerBrown {} | SystemSpec::DoubleWell {} => Ok(()),
            SystemSpec::LennardJones {
                particles,
                dims,
                wall_radius,
                wall_strength,
            } => {
                require(
                    *particles >= 2,
                    "particles",
                    "a cluster needs at least 2 particles",
                )?;
                require(
                    *dims == 2 || *dims == 3,
                    "dims",
                    format!("must be 2 or 3, not {dims}"),
                )?;
                if let Some(r) = wall_radius {
                    require(
                        r.is_finite() && *r > 0.0,
                        "wall_radius",
                        "must be finite and positive",
                    )?;
                }
                require(
                    wall_strength.is_finite() && *wall_strength >= 0.0,
                    "wall_strength",
                    "must be finite and non-negative",
                )
            }
            SystemSpec::Phi4 { size, m2, lambda } => {
                require(
                    *size >= 2,
                    "size",
                    "the lattice needs at least 2 sites per side",
                )?;
                require(m2.is_finite(), "m2", "must be finite")?;
                require(
                    lambda.is_finite() && *lambda >= 0.0,
                    "lambda",
                    "must be finite and non-negative",
                )?;
                require(
                    *lambda > 0.0 || *m2 > 0.0,
                    "m2",
                    "with lambda = 0 the action is bounded below only for m2 > 0",
                )
            }
            SystemSpec::External { command, dim } => {
                require(!command.is_empty(), "command", "must name a program")?;
                require(*dim > 0, "dim", "must be positive")
            }
        }
    }

    /// The particles' spatial dimension for clusters (translation is a zero mode), and
    /// `None` for every other system.
    pub fn particle_dims(&self) -> Option<usize> {
        match self {
            SystemSpec::LennardJones { dims, .. } => Some(*dims),
            _ => None,
        }
    }

    /// A sensible start configuration for explorers of a built-in system: a minimum
    /// of Müller–Brown (the deepest, A) and of the double well (the left one), a compact
    /// lattice patch for clusters (triangular in 2-D, fcc in 3-D, nearest neighbours
    /// 2^{1/6} apart, centred), and the positive ordered field ±sqrt(−m²/2λ) for φ⁴ in
    /// its broken phase (zero otherwise). External systems have none.
    pub fn default_start(&self) -> Result<Vec<f64>, PhysicsError> {
        self.validate()?;
        Ok(match self {
            SystemSpec::MullerBrown {} => vec![-0.558224, 1.441726],
            SystemSpec::DoubleWell {} => {
                let r = double_well::DoubleWell::default();
                vec![r.left_minimum_x(), 0.0]
            }
            SystemSpec::LennardJones {
                particles, dims, ..
            } => lennard_jones::compact_cluster(*particles, *dims, 2f64.powf(1.0 / 6.0)),
            SystemSpec::Phi4 { size, m2, lambda } => {
                let phi0 = if *m2 < 0.0 && *lambda > 0.0 {
                    (-m2 / (2.0 * lambda)).sqrt()
                } else {
                    0.0
                };
                vec![phi0; size * size]
            }
            SystemSpec::External { .. } => {
                return Err(PhysicsError::InvalidParameter {
                    name: "start",
                    reason: "an external system has no built-in start configuration; give one"
                        .into(),
                })
            }
        })
    }

    /// Builds a built-in model. The external model is a process and is built by tarn's
    /// process code, so it gives [`PhysicsError::ExternalNotBuiltHere`].
    pub fn build(&self) -> Result<Box<dyn EnergyModel>, PhysicsError> {
        self.validate()?;
        Ok(match self {
            SystemSpec::MullerBrown {} => Box::new(MullerBrown),
            SystemSpec::DoubleWell {} => Box::new(DoubleWell::default()),
            SystemSpec::LennardJones {
                particles,
                dims,
                wall_radius,
                wall_strength,
            } => Box::new(LennardJones::new(
                *particles,
                *dims,
                Wall {
                    radius: wall_radius.unwrap_or_else(|| Wall::default_radius(*particles, *dims)),
                    strength: *wall_strength,
                },
            )?),
            SystemSpec::Phi4 { size, m2, lambda } => Box::new(Phi4::new(*size, *m2, *lambda)?),
            SystemSpec::External { .. } => return Err(PhysicsError::ExternalNotBuiltHere),
        })
    }
}
