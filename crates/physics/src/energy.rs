//! The energy-model interface shared by every numeric kernel (explorers, quench, the
//! flow's reverse-KL training, latent Monte Carlo).
//!
//! Configurations are row-major `[n, dim]` float64 slices in the system's energy unit;
//! forces are minus the gradient of the energy. Batches are the unit of work so that an
//! external model (a process behind a pipe) is called once per batch, not per sample.

/// Why an energy evaluation failed. Built-in models never fail on well-shaped input; an
/// external model (a long-running process) can die, answer the wrong size or write
/// garbage.
#[derive(Debug, thiserror::Error)]
pub enum EnergyError {
    /// The input slice is not a whole number of configurations.
    #[error("energy model input has {got} values, not a multiple of dim {dim}")]
    Shape {
        /// The model's dimension.
        dim: usize,
        /// Length of the input slice.
        got: usize,
    },
    /// An output slice is too short for the batch that was asked for.
    #[error("energy model output `{what}` has room for {got} values, the batch needs {need}")]
    OutputShape {
        /// Which output (`energy` or `forces`).
        what: &'static str,
        /// Values the batch needs.
        need: usize,
        /// Values the slice has room for.
        got: usize,
    },
    /// The external model failed; the message says how (died, wrong size, garbage).
    #[error("external energy model: {0}")]
    External(String),
}

/// A batched energy (and force) function of configurations in `dim` dimensions.
pub trait EnergyModel: Send + Sync {
    /// Number of coordinates of one configuration.
    fn dim(&self) -> usize;

    /// Energies of the `n = x.len() / dim` configurations in `x` into `energy[..n]`,
    /// and, when `forces` is given, minus the gradient into `forces[..n * dim]`.
    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError>;

    /// The spatial dimension of the particles when a configuration is a set of
    /// identical particles whose energy is invariant under translation (a cluster), and
    /// `None` otherwise. Explorers use it to move saved frames into the centre-of-mass
    /// frame, and collective variables use it to find particle coordinates.
    fn particle_dims(&self) -> Option<usize> {
        None
    }

    /// The energy of one configuration; a convenience over [`EnergyModel::evaluate`]
    /// for callers that work one sample at a time.
    fn energy_of(&self, x: &[f64]) -> Result<f64, EnergyError> {
        check_one(self.dim(), x)?;
        let mut e = [0.0];
        self.evaluate(x, &mut e, None)?;
        Ok(e[0])
    }

    /// The energy of one configuration, with its forces written into `forces`.
    fn energy_and_forces_of(&self, x: &[f64], forces: &mut [f64]) -> Result<f64, EnergyError> {
        check_one(self.dim(), x)?;
        let mut e = [0.0];
        self.evaluate(x, &mut e, Some(forces))?;
        Ok(e[0])
    }
}

/// Checks that `x` holds exactly one configuration of `dim` coordinates.
fn check_one(dim: usize, x: &[f64]) -> Result<(), EnergyError> {
    if x.len() != dim {
        return Err(EnergyError::Shape { dim, got: x.len() });
    }
    Ok(())
}

/// Checks the shapes of a batched call and returns the number of configurations, so
/// that every model (built-in or external) rejects a malformed call the same way.
pub fn check_batch(
    dim: usize,
    x: &[f64],
    energy: &[f64],
    forces: Option<&[f64]>,
) -> Result<usize, EnergyError> {
    if dim == 0 || !x.len().is_multiple_of(dim) {
        return Err(EnergyError::Shape { dim, got: x.len() });
    }
    let n = x.len() / dim;
    if energy.len() < n {
        return Err(EnergyError::OutputShape {
            what: "energy",
            need: n,
            got: energy.len(),
        });
    }
    if let Some(f) = forces {
        if f.len() < n * dim {
            return Err(EnergyError::OutputShape {
                what: "forces",
                need: n * dim,
                got: f.len(),
            });
        }
    }
    Ok(n)
}
