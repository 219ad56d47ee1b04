//! The energy-model interface shared by every numeric kernel (explorers, quench, the
//! flow's reverse-KL training, latent Monte Carlo).
//!
//! Configurations are row-major `[n, dim]` float64 slices in the system's energy unit;
//! forces are minus the gradient of the energy. Batches are the unit of work so that an
//! external model (a process behind a pipe) is called once per batch, not per sample.

/// Why an energy evaluation failed. Built-in models never fail; an external model
/// (a long-running process) can die, answer the wrong size or write garbage.
#[derive(Debug, thiserror::Error)]
pub enum EnergyError {
    #[error("energy model input has {got} values, not a multiple of dim {dim}")]
    Shape { dim: usize, got: usize },
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
}
