//! tarn's flow: a RealNVP normalizing flow (a Boltzmann generator) and the samplers
//! built on it.
//!
//! Owns: flow architecture, training, latent-space Metropolis, generation, weight files'
//! byte format. Must not touch: the store, the engine, tokio, task directories.

#![warn(missing_docs)]

mod any;
pub mod bench;
mod flow;
mod frame;
mod fused;
pub mod internal;
mod io;
mod real;
mod sample;
mod spec;
pub mod spline;
pub mod stack;
mod tape;
mod team;
mod train;
mod workspace;

pub use any::AnyFlow;
pub use flow::Flow;
pub use io::{FORMAT_NAME, FORMAT_VERSION};
pub use real::{exp_f32, Real};
pub use sample::{generate, latent_metropolis, Generated, LatentMcParams, LatentMcResult};
pub use spec::{Activation, FlowSpec, FrameSpec};
pub use train::{train, TrainParams, TrainReport};
pub use workspace::{regularise_energy, KlStats, KlTerm, Threading, Workspace};

use tarn_physics::EnergyError;

/// Everything that can go wrong in the flow crate, with a message naming the cause.
#[derive(Debug, thiserror::Error)]
pub enum FlowError {
    /// The architecture cannot make a flow.
    #[error("invalid flow architecture: {0}")]
    Spec(String),
    /// An input slice has the wrong length.
    #[error(
        "shape mismatch in {what}: expected a multiple of or exactly {expected} values, got {got}"
    )]
    Shape {
        /// Which argument.
        what: &'static str,
        /// The expected length (or row length).
        expected: usize,
        /// The length given.
        got: usize,
    },
    /// Training or sampling parameters out of range.
    #[error("invalid parameters: {0}")]
    Params(String),
    /// A weight file that cannot be read.
    #[error("weight file: {0}")]
    Format(String),
    /// The energy model failed.
    #[error("energy model: {0}")]
    Energy(#[from] EnergyError),
    /// The thread pool could not be built.
    #[error("thread pool: {0}")]
    Threads(String),
    /// Training produced non-finite parameters or losses.
    #[error("training diverged: {0}")]
    Diverged(String),
}
