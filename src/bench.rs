//! `tarn bench`: benchmarks that print figures (never pass/fail).
//!
//! Owns: measurement harnesses and their output (one JSON object per row with
//! `--json`). Must not touch: campaign stores other than the temporary ones it creates.
//! Compare figures as ratios measured in one run; absolute times vary between runs on a
//! shared machine.

use serde::Serialize;

/// The benchmarks by name, with a line of help each.
pub const BENCHES: &[(&str, &str)] = &[
    ("engine", "orchestration overhead per task, reopen time of a 1000-round store, engine memory"),
    ("energy", "energy-and-force throughput (LJ13 3-D, phi4 16x16) against the measured f64 peak, and an external model through its pipe"),
    ("flow", "RealNVP training and sampling throughput against the measured f32 GEMM peak"),
    ("lattice", "effective samples per CPU-second: the phi4 8x8 flow of workflows/phi4-flow.toml against HMC"),
    ("discovery", "energy evaluations to every state and to converged free energies, against configuration-space Metropolis and Langevin"),
];

/// Runs a benchmark by name.
pub fn run(what: &str, json: bool, tasks: u32) -> anyhow::Result<u8> {
    match what {
        "engine" => crate::bench_engine::run(json, tasks),
        "energy" => energy(json),
        "flow" => flow(json),
        "lattice" => crate::bench_lattice::run(json),
        other => {
            let names: Vec<&str> = BENCHES.iter().map(|(n, _)| *n).collect();
            anyhow::bail!(
                "no benchmark '{other}' (choose one of: {})",
                names.join(", ")
            )
        }
    }
}

pub(crate) fn print_rows<T: Serialize>(json: bool, rows: &[T]) -> std::io::Result<()> {
    for r in rows {
        let v = serde_json::to_value(r).expect("serializable");
        if json {
            crate::out::line(&v.to_string())?;
        } else {
            let text = v
                .as_object()
                .map(|o| {
                    o.iter()
                        .map(|(k, v)| format!("{k}={v}"))
                        .collect::<Vec<_>>()
                        .join("  ")
                })
                .unwrap_or_default();
            crate::out::line(&text)?;
        }
    }
    Ok(())
}

/// Energy kernels on 1 and 2 threads, then the example external model through its pipe.
fn energy(json: bool) -> anyhow::Result<u8> {
    let rows = crate::physics::bench::energy_benchmark(&[1, 2], 256, 1.0)?;
    print_rows(json, &rows)?;
    let server = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("examples/external-energy/muller_brown_server.py");
    if server.is_file() {
        let cmd = vec!["python3".to_string(), server.display().to_string()];
        let model = crate::workers::external::ExternalProcess::start(&cmd, 2, None)
            .map_err(anyhow::Error::msg)?;
        for batch in [1usize, 100, 10_000] {
            let x: Vec<f64> = (0..batch)
                .flat_map(|i| [-0.5 + 1e-4 * i as f64, 0.5])
                .collect();
            let (rate, secs) = crate::physics::bench::model_throughput(&model, &x, 1.0)?;
            let row = serde_json::json!({"bench": "energy", "system": "external-muller-brown-pipe", "threads": 1, "batch": batch, "configs_per_s": rate.round(), "seconds": secs});
            print_rows(json, &[row])?;
        }
    }
    Ok(0)
}

/// The flow benchmark of the standard configurations on 1 and 2 threads.
fn flow(json: bool) -> anyhow::Result<u8> {
    let rows =
        crate::flow::bench::run_flow_bench(&crate::flow::bench::standard_configs(), &[1, 2], 2.0)?;
    print_rows(json, &rows)?;
    Ok(0)
}
