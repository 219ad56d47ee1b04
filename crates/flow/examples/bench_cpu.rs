//! The flow benchmark measured per CPU-second instead of per wall-second, for machines
//! shared with other work: `cargo run --release -p tarn-flow --example bench_cpu [seconds]`.
//! For each configuration, mode and thread count it prints samples and counted GFLOP per
//! CPU-second of this process, and the same for the float32 GEMM peak, so that the
//! ratio does not depend on how much of the machine other processes took. Per-thread
//! rates times the thread count estimate the speed on an otherwise idle machine.
use tarn_flow::bench::{bench_one, gemm_peak_gflops, standard_configs};
use tarn_flow::Threading;

/// User + system CPU seconds of this process, from /proc/self/stat (clock ticks of 10 ms).
fn cpu_seconds() -> f64 {
    let stat = std::fs::read_to_string("/proc/self/stat").unwrap_or_default();
    let after = stat.rsplit(')').next().unwrap_or("");
    let f: Vec<&str> = after.split_whitespace().collect();
    let ticks: f64 = f.get(11).and_then(|v| v.parse().ok()).unwrap_or(0.0)
        + f.get(12).and_then(|v| v.parse().ok()).unwrap_or(0.0);
    ticks / 100.0
}

fn main() {
    let secs: f64 = std::env::args()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(1.5);
    for threads in [1, 2] {
        let c0 = cpu_seconds();
        let t0 = std::time::Instant::now();
        let wall_peak = gemm_peak_gflops(threads, secs).unwrap();
        let (cpu, wall) = (cpu_seconds() - c0, t0.elapsed().as_secs_f64());
        // GFLOP done = rate * wall; per CPU-second and thread:
        let peak_cpu = wall_peak * wall / cpu;
        println!("# threads {threads}: GEMM peak {wall_peak:.1} GFLOP/s wall, {peak_cpu:.1} GFLOP per CPU-second (x{threads} = {:.1})", peak_cpu * threads as f64);
        for cfg in standard_configs() {
            for mode in ["ml", "kl", "sample"] {
                let c0 = cpu_seconds();
                let t0 = std::time::Instant::now();
                let row = bench_one(&cfg, mode, threads, secs, Threading::Auto, wall_peak).unwrap();
                let (cpu, wall) = (cpu_seconds() - c0, t0.elapsed().as_secs_f64());
                let per_cpu = row.samples_per_s * wall / cpu;
                let gf_cpu = row.gflops * wall / cpu;
                println!(
                    "{{\"config\":\"{}\",\"mode\":\"{}\",\"threads\":{threads},\"samples_per_cpu_s\":{per_cpu:.0},\"idle_machine_samples_per_s\":{:.0},\"gflops_per_cpu_s\":{gf_cpu:.1},\"peak_fraction_cpu\":{:.3},\"wall_samples_per_s\":{:.0}}}",
                    row.config,
                    row.mode,
                    per_cpu * threads as f64,
                    gf_cpu / peak_cpu,
                    row.samples_per_s
                );
            }
        }
    }
}
