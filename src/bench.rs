//! `tarn bench`: benchmarks that print figures (never pass/fail).
//!
//! Owns: measurement harnesses. Must not touch: campaign stores other than the temporary
//! ones it creates.

/// Runs a benchmark by name.
pub fn run(what: &str, json: bool, tasks: u32) -> anyhow::Result<u8> {
    match what {
        "engine" => crate::bench_engine::run(json, tasks),
        other => anyhow::bail!("no benchmark '{other}' (choose: engine)"),
    }
}
