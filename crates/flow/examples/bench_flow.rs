//! Prints the flow benchmark table as JSON lines, then the peak resident memory:
//! `cargo run --release -p tarn-flow --example bench_flow [seconds] [config|all] [auto|batch|gemm] [mode|all] [threads]`.
use tarn_flow::bench::{bench_one, bench_row_best_of, gemm_peak_gflops, standard_configs};
use tarn_flow::Threading;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let secs: f64 = args.get(1).and_then(|s| s.parse().ok()).unwrap_or(1.0);
    let only = args.get(2).cloned();
    let only_mode = args.get(4).cloned();
    let only_threads: Option<usize> = args.get(5).and_then(|s| s.parse().ok());
    let threading = match args.get(3).map(String::as_str) {
        Some("batch") => Threading::Batch,
        Some("gemm") => Threading::Gemm,
        _ => Threading::Auto,
    };
    for threads in [1, 2] {
        if only_threads.is_some_and(|t| t != threads) {
            continue;
        }
        for cfg in standard_configs() {
            if only.as_deref().is_some_and(|o| o != "all" && o != cfg.name) {
                continue;
            }
            for mode in ["ml", "kl", "sample"] {
                if only_mode
                    .as_deref()
                    .is_some_and(|m| m != "all" && m != mode)
                {
                    continue;
                }
                let row = if threading == Threading::Auto {
                    bench_row_best_of(&cfg, mode, threads, secs, 3).unwrap()
                } else {
                    let peak = gemm_peak_gflops(threads, 0.3).unwrap();
                    bench_one(&cfg, mode, threads, secs, threading, peak).unwrap()
                };
                println!("{}", serde_json::to_string(&row).unwrap());
            }
        }
    }
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    for line in status.lines().filter(|l| l.starts_with("VmHWM")) {
        println!("# peak resident memory: {line}");
    }
}
