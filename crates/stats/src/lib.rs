//! tarn's estimators: reweighting, effective sample size, state free energies with
//! bootstrap error bars, histogram profiles, MBAR, metadynamics reweighting.
//!
//! Owns: statistics over arrays of numbers. Must not touch: the store, the engine,
//! files, processes.
