//! tarn's flow: a RealNVP normalizing flow (a Boltzmann generator) and the samplers
//! built on it.
//!
//! Owns: flow architecture, training, latent-space Metropolis, generation, weight files'
//! byte format. Must not touch: the store, the engine, tokio, task directories.
