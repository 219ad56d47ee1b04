//! tarn: unattended discovery campaigns for metastable states and free energies.
pub use tarn_flow as flow;
pub use tarn_physics as physics;
pub use tarn_stats as stats;
