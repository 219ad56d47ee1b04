//! Throughput benchmarks of the flow, for `tarn bench flow --json`: training steps
//! (maximum likelihood and reverse KL, each with its Adam update) and sampling, on the
//! issue's configurations, with the machine's float32 GEMM peak measured in the same run
//! so that speeds are compared as fractions of it.
//!
//! FLOP convention: a sample costs 2 x (conditioner weight multiply-accumulates) per
//! pass; a training step counts three passes (forward, weight gradients, input
//! gradients), a sampling draw one. Element-wise work, Adam, gradient reductions and
//! random numbers take time but add no counted FLOPs, so `peak_fraction` is the share
//! of the GEMM peak that the whole step achieves.

use crate::flow::Flow;
use crate::real::matmul;
use crate::spec::{Activation, FlowSpec};
use crate::train::{draw_latent, TrainParams, Trainer};
use crate::workspace::Threading;
use crate::FlowError;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;
use std::time::Instant;
use tarn_physics::{EnergyError, EnergyModel};

/// One benchmark configuration: a flow shape and a batch size.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BenchConfig {
    /// Name used in the `config` key.
    pub name: String,
    /// Flow dimension D.
    pub dim: usize,
    /// Coupling layers L.
    pub layers: usize,
    /// Hidden width H (two hidden layers: D/2 -> H -> H -> D).
    pub hidden: usize,
    /// Batch size B.
    pub batch: usize,
}

/// The configurations of issue 4: small, medium, large (SiLU, float32, Adam).
pub fn standard_configs() -> Vec<BenchConfig> {
    let c = |name: &str, dim, layers, hidden, batch| BenchConfig {
        name: name.into(),
        dim,
        layers,
        hidden,
        batch,
    };
    vec![
        c("small", 2, 8, 64, 1024),
        c("medium", 64, 8, 256, 512),
        c("large", 256, 12, 512, 256),
    ]
}

/// One row of `tarn bench flow --json`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BenchRow {
    /// small, medium or large.
    pub config: String,
    /// ml, kl or sample.
    pub mode: String,
    /// Threads used.
    pub threads: usize,
    /// Samples per second (training: batch rows per second of whole steps).
    pub samples_per_s: f64,
    /// Counted GEMM GFLOP/s (see the module doc).
    pub gflops: f64,
    /// gflops / the float32 GEMM peak measured at this thread count in the same run.
    pub peak_fraction: f64,
    /// The measured peak (GFLOP/s).
    pub peak_gflops: f64,
    /// Batch size.
    pub batch: usize,
    /// Timed repetitions (of the best window).
    pub repeats: usize,
    /// Seconds spent on the row.
    pub seconds: f64,
}

/// Measures the float32 GEMM rate (GFLOP/s) of 2048 x 2048 x 2048 products on
/// `threads` threads for about `seconds`: the machine's practical peak.
pub fn gemm_peak_gflops(threads: usize, seconds: f64) -> Result<f64, FlowError> {
    let n = 2048;
    let a: Vec<f32> = (0..n * n).map(|i| ((i % 7) as f32) * 0.1).collect();
    let b: Vec<f32> = (0..n * n).map(|i| ((i % 5) as f32) * 0.1).collect();
    let mut c = vec![0.0f32; n * n];
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads.max(1))
        .build()
        .map_err(|e| FlowError::Threads(e.to_string()))?;
    pool.install(|| {
        matmul(n, n, n, &a, false, &b, false, &mut c, false, threads);
        let t = Instant::now();
        let mut reps = 0;
        while reps < 2 || t.elapsed().as_secs_f64() < seconds {
            matmul(n, n, n, &a, false, &b, false, &mut c, false, threads);
            reps += 1;
        }
        Ok(2.0 * (n * n * n) as f64 * reps as f64 / t.elapsed().as_secs_f64() / 1e9)
    })
}

/// A standard normal energy, E = |x|^2 / 2: the cheapest energy with forces, so that the
/// reverse-KL benchmark measures the flow.
struct UnitGaussian(usize);

impl EnergyModel for UnitGaussian {
    fn dim(&self) -> usize {
        self.0
    }
    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        for (e, r) in energy.iter_mut().zip(x.chunks_exact(self.0)) {
            *e = 0.5 * r.iter().map(|v| v * v).sum::<f64>();
        }
        if let Some(f) = forces {
            for (o, v) in f.iter_mut().zip(x) {
                *o = -v;
            }
        }
        Ok(())
    }
}

fn time_loop(
    seconds: f64,
    mut f: impl FnMut() -> Result<(), FlowError>,
) -> Result<(usize, f64), FlowError> {
    f()?; // warm-up: page in buffers, settle the thread pool
    let t = Instant::now();
    let mut reps = 0;
    while reps < 3 || t.elapsed().as_secs_f64() < seconds {
        f()?;
        reps += 1;
    }
    Ok((reps, t.elapsed().as_secs_f64()))
}

/// Benchmarks one configuration in one mode ("ml", "kl" or "sample") on `threads`
/// threads for about `seconds`, against the given peak.
pub fn bench_one(
    cfg: &BenchConfig,
    mode: &str,
    threads: usize,
    seconds: f64,
    threading: Threading,
    peak_gflops: f64,
) -> Result<BenchRow, FlowError> {
    let mut spec = FlowSpec::new(cfg.dim);
    spec.n_layers = cfg.layers;
    spec.hidden_width = cfg.hidden;
    spec.activation = Activation::Silu;
    let mut flow: Flow<f32> = Flow::new(spec, None, 1)?;
    // Non-zero output layers, so the benchmark does not run an identity flow.
    for (i, p) in flow.params_mut().iter_mut().enumerate() {
        if *p == 0.0 {
            *p = 1e-3 * ((i % 13) as f32 - 6.0);
        }
    }
    let params = TrainParams {
        batch_size: cfg.batch,
        kl_batch_size: cfg.batch,
        threads,
        w_ml: if mode == "kl" { 0.0 } else { 1.0 },
        w_kl: if mode == "kl" { 1.0 } else { 0.0 },
        ..Default::default()
    };
    let mut tr = Trainer::new(&flow, &params, threading)?;
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let energy = UnitGaussian(cfg.dim);
    let macs = flow.weight_macs_per_sample() as f64;
    let (reps, secs, passes) = match mode {
        "ml" => {
            draw_latent(&mut rng, 1.0, &mut tr.xbatch);
            let (r, s) = time_loop(seconds, || {
                tr.step(&mut flow, &params, cfg.batch, None, &mut rng)
                    .map(|_| ())
            })?;
            (r, s, 3.0)
        }
        "kl" => {
            let (r, s) = time_loop(seconds, || {
                tr.step(&mut flow, &params, 0, Some(&energy), &mut rng)
                    .map(|_| ())
            })?;
            (r, s, 3.0)
        }
        "sample" => {
            let mut x = vec![0.0f32; cfg.batch * cfg.dim];
            let mut ld = vec![0.0f64; cfg.batch];
            let (r, s) = time_loop(seconds, || {
                draw_latent(&mut rng, 1.0, &mut tr.zbatch);
                tr.ws.generate(&flow, &tr.zbatch, &mut x, &mut ld)
            })?;
            (r, s, 1.0)
        }
        other => {
            return Err(FlowError::Params(format!(
                "unknown bench mode `{other}` (ml, kl, sample)"
            )))
        }
    };
    let samples_per_s = (reps * cfg.batch) as f64 / secs;
    let gflops = 2.0 * passes * macs * samples_per_s / 1e9;
    Ok(BenchRow {
        config: cfg.name.clone(),
        mode: mode.into(),
        threads,
        samples_per_s,
        gflops,
        peak_fraction: gflops / peak_gflops,
        peak_gflops,
        batch: cfg.batch,
        repeats: reps,
        seconds: secs,
    })
}

/// One row measured as the best of `rounds` alternations of a short GEMM-peak
/// measurement and a short timing of the row (each about `seconds / rounds`). Other work
/// on a shared machine only ever slows a measurement down, so the best of several short
/// windows estimates both rates on a quiet machine, and their ratio compares like with
/// like.
pub fn bench_row_best_of(
    cfg: &BenchConfig,
    mode: &str,
    threads: usize,
    seconds: f64,
    rounds: usize,
) -> Result<BenchRow, FlowError> {
    let rounds = rounds.max(1);
    let slice = seconds / rounds as f64;
    let mut peak = 0.0f64;
    let mut best: Option<BenchRow> = None;
    for _ in 0..rounds {
        peak = peak.max(gemm_peak_gflops(threads, (0.3 * slice).max(0.1))?);
        let row = bench_one(cfg, mode, threads, slice, Threading::Auto, 1.0)?;
        if best
            .as_ref()
            .is_none_or(|b| row.samples_per_s > b.samples_per_s)
        {
            best = Some(row);
        }
    }
    let mut row = best.expect("at least one round");
    row.peak_gflops = peak;
    row.peak_fraction = row.gflops / peak;
    row.seconds = seconds;
    Ok(row)
}

/// The full table: every configuration x mode (ml, kl, sample) x thread count, each
/// row measured by `bench_row_best_of` with 3 rounds in about `seconds_per_row`.
pub fn run_flow_bench(
    configs: &[BenchConfig],
    thread_counts: &[usize],
    seconds_per_row: f64,
) -> Result<Vec<BenchRow>, FlowError> {
    let mut rows = Vec::new();
    for &threads in thread_counts {
        for cfg in configs {
            for mode in ["ml", "kl", "sample"] {
                rows.push(bench_row_best_of(cfg, mode, threads, seconds_per_row, 3)?);
            }
        }
    }
    Ok(rows)
}
