//! The crate's error type for everything above a single energy evaluation: building a
//! model from its specification, checking explorer and quench parameters, and energy
//! failures propagated from a model.

use crate::energy::EnergyError;

/// Why a physics call could not produce its numbers. Every message names the parameter
/// or the step so that a worker can pass it on to the user unchanged.
#[derive(Debug, thiserror::Error)]
pub enum PhysicsError {
    /// The energy model failed (an external model died or answered nonsense).
    #[error(transparent)]
    Energy(#[from] EnergyError),
    /// A parameter is outside its valid range.
    #[error("invalid parameter `{name}`: {reason}")]
    InvalidParameter {
        /// The parameter's key as written in a campaign file.
        name: &'static str,
        /// What is wrong with it.
        reason: String,
    },
    /// A start configuration does not have the model's dimension.
    #[error("start configuration has {got} values, the model has dim {dim}")]
    StartShape {
        /// The model's dimension.
        dim: usize,
        /// Values given.
        got: usize,
    },
    /// The energy or the forces became non-finite (for example a too large time step).
    #[error("non-finite energy or force at step {step} of {what}")]
    NonFinite {
        /// Which computation (e.g. `langevin`).
        what: &'static str,
        /// The step at which it happened (0: the start).
        step: u64,
    },
    /// The external model is a process that the engine starts; this crate only speaks
    /// its framing (see [`crate::external`]).
    #[error("the external energy model is started by tarn's process code, not built by SystemSpec::build; use external::ExternalClient over the process's pipes")]
    ExternalNotBuiltHere,
}

/// Returns an [`PhysicsError::InvalidParameter`] unless `ok` holds.
pub(crate) fn require(
    ok: bool,
    name: &'static str,
    reason: impl Into<String>,
) -> Result<(), PhysicsError> {
    if ok {
        Ok(())
    } else {
        Err(PhysicsError::InvalidParameter {
            name,
            reason: reason.into(),
        })
    }
}
