//! A trained flow of either family, read from its weight file by the file's `format`:
//! the RealNVP flow (`tarn-flow`) or the layer stack (`tarn-flow-stack`). The workers
//! hold an [`AnyFlow`] so that every sampler serves both.

use crate::sample::{Generated, LatentMcParams, LatentMcResult};
use crate::stack::io::STACK_FORMAT_NAME;
use crate::stack::StackFlow;
use crate::{Flow, FlowError, FORMAT_NAME};
use safetensors::SafeTensors;
use tarn_physics::EnergyModel;

/// A flow of either family, in f32.
#[derive(Debug, Clone)]
pub enum AnyFlow {
    /// The RealNVP flow.
    RealNvp(Flow<f32>),
    /// The layer stack.
    Stack(StackFlow<f32>),
}

impl AnyFlow {
    /// Reads a weight file of either family, dispatching on its `format` metadata.
    pub fn from_safetensors(bytes: &[u8]) -> Result<Self, FlowError> {
        let (_, header) = SafeTensors::read_metadata(bytes)
            .map_err(|e| FlowError::Format(format!("not a safetensors file: {e}")))?;
        let format = header
            .metadata()
            .as_ref()
            .and_then(|m| m.get("format").cloned())
            .ok_or_else(|| FlowError::Format("metadata key `format` is missing".into()))?;
        match format.as_str() {
            f if f == FORMAT_NAME => Flow::from_safetensors(bytes).map(AnyFlow::RealNvp),
            f if f == STACK_FORMAT_NAME => StackFlow::from_safetensors(bytes).map(AnyFlow::Stack),
            other => Err(FlowError::Format(format!(
                "metadata `format` is `{other}`; this build reads `{FORMAT_NAME}` and `{STACK_FORMAT_NAME}`"
            ))),
        }
    }

    /// The weight file.
    pub fn to_safetensors(&self) -> Result<Vec<u8>, FlowError> {
        match self {
            AnyFlow::RealNvp(f) => f.to_safetensors(),
            AnyFlow::Stack(f) => f.to_safetensors(),
        }
    }

    /// Coordinates of one configuration.
    pub fn data_dim(&self) -> usize {
        match self {
            AnyFlow::RealNvp(f) => f.data_dim(),
            AnyFlow::Stack(f) => f.dim(),
        }
    }

    /// Independent draws at temperature factor `tau` (see [`crate::generate`]).
    pub fn generate(
        &self,
        energy: &dyn EnergyModel,
        n: usize,
        kt: f64,
        tau: f64,
        threads: usize,
        seed: u64,
    ) -> Result<Generated, FlowError> {
        match self {
            AnyFlow::RealNvp(f) => crate::generate(f, energy, n, kt, tau, threads, seed),
            AnyFlow::Stack(f) => {
                crate::stack::sample::generate(f, energy, n, kt, tau, threads, seed)
            }
        }
    }

    /// Latent-space Metropolis (see [`crate::latent_metropolis`]).
    pub fn latent_metropolis(
        &self,
        energy: &dyn EnergyModel,
        params: &LatentMcParams,
        kt: f64,
        start: Option<&[f64]>,
        seed: u64,
    ) -> Result<LatentMcResult, FlowError> {
        match self {
            AnyFlow::RealNvp(f) => crate::latent_metropolis(f, energy, params, kt, start, seed),
            AnyFlow::Stack(f) => {
                crate::stack::sample::latent_metropolis(f, energy, params, kt, start, seed)
            }
        }
    }
}
