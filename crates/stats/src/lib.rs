//! tarn's estimators: reweighting, effective sample size, state free energies with
//! bootstrap error bars, histogram profiles, MBAR, metadynamics reweighting, and the
//! pure decision functions that stop rules use.
//!
//! Owns: statistics over arrays of numbers. Must not touch: the store, the engine,
//! files, processes. All randomness comes from a generator passed in by the caller.

pub mod autocorr;
pub mod bootstrap;
pub mod error;
mod linalg;
pub mod logspace;
pub mod mbar;
pub mod metad;
pub mod pool;
pub mod profile;
pub mod states;
pub mod stop;

pub use autocorr::{integrated_autocorrelation, Autocorrelation};
pub use bootstrap::{
    default_block_length, standard_normal_quantile, BootstrapOptions, Interval, IntervalMethod,
};
pub use error::{Result, StatsError};
pub use logspace::{
    ess_fraction, importance_log_weights, kish_ess, log_partition_estimate, logsumexp,
    normalised_log_weights, weighted_mean, LogZEstimate, WeightedMean,
};
pub use mbar::{Expectations, FreeEnergyDifferences, Mbar, MbarOptions};
pub use metad::{
    final_bias_log_weights, reweighting_offset, tiwary_parrinello_log_weights, well_tempered_offset,
};
pub use pool::{pool, Pooled};
pub use profile::{
    compare_profiles, free_energy_profile, reference_profile, Alignment, Bins, Profile,
    ProfileComparison,
};
pub use states::{
    labels_from_signed, state_free_energies, StateFreeEnergies, StateFreeEnergy, StateLabel,
};
pub use stop::{
    free_energies_stable, rounds_without_new_state, visited_bin_fraction, FreeEnergyPoint,
    Instability, StabilityCriterion, StabilityReport,
};
