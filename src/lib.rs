//! tarn: unattended discovery campaigns for metastable states and free energies.
//!
//! The crate is the engine side; the numeric core lives in the workspace crates
//! re-exported here (`physics`, `flow`, `stats`), which know nothing of this side.

pub mod bench;
mod bench_discovery;
pub mod bench_engine;
mod bench_lattice;
pub mod cli;
pub mod engine;
pub mod executor;
pub mod out;
pub mod protocol;
pub mod report;
pub mod spec;
pub mod store;
pub mod workers;

pub use tarn_flow as flow;
pub use tarn_physics as physics;
pub use tarn_stats as stats;
