//! tarn's physics: energy models, configuration-space explorers, quench and state
//! fingerprints.
//!
//! Owns: the numbers. Every function takes slices and returns numbers; nothing here
//! knows about tokio, sled, files, task directories or the worker protocol.
//! Must not touch: the store, the engine, the file system, processes.

#![warn(missing_docs)]

pub mod bench;
pub mod cv;
pub mod energy;
pub mod error;
pub mod explore;
pub mod external;
pub mod fingerprint;
pub mod models;
pub mod path;
pub mod quench;
pub mod simd;

pub use energy::{check_batch, EnergyError, EnergyModel};
pub use error::PhysicsError;
pub use models::SystemSpec;
