//! Energy-and-force throughput benchmarks, for `tarn bench energy`: batches of 3-D LJ13
//! and φ⁴ 16×16 on 1 and 2 threads, as interactions (pairs or sites) per second, as
//! GFLOP/s from a hand count of each kernel's operations, and as a fraction of this
//! machine's f64 peak measured in the same call with an FMA-bound kernel.
//!
//! Figures, not tests: timings vary 10–25% between runs on a shared machine, so every
//! figure is the best of several timing windows, and rows should be compared within
//! one call (ratios), never as absolute times across days.

use std::time::Instant;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::energy::EnergyModel;
use crate::error::{require, PhysicsError};
use crate::models::lennard_jones::icosahedron_13;
use crate::models::{phi4, LennardJones, Phi4, Wall};
use crate::simd::{dispatch_kernel, fma, simd_level};

/// A benchmark case: name, model, batch, interactions per configuration, their unit,
/// flops per interaction.
type Case<'a> = (
    &'static str,
    &'a dyn EnergyModel,
    &'a [f64],
    f64,
    &'static str,
    f64,
);

/// One benchmark row (one JSON object per row in `tarn bench energy --json`).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EnergyBenchRow {
    /// Always "energy".
    pub bench: &'static str,
    /// What was measured: "peak-fma", "lj13-3d", "phi4-16x16", ...
    pub system: String,
    /// Threads of the local rayon pool.
    pub threads: usize,
    /// Configurations per energy call (0 for the peak probe).
    pub batch: usize,
    /// Instruction-set level of the kernels.
    pub simd: &'static str,
    /// Wall seconds measured.
    pub seconds: f64,
    /// Configurations evaluated (energy and forces) per second.
    pub configs_per_sec: f64,
    /// Pair interactions or lattice sites per second.
    pub interactions_per_sec: f64,
    /// "pairs", "sites" or "fma" (the peak probe).
    pub interaction_unit: &'static str,
    /// Floating-point operations per interaction (hand count of the kernel).
    pub flops_per_interaction: f64,
    /// Achieved GFLOP/s by that count.
    pub gflops: f64,
    /// The measured f64 peak at the same thread count, GFLOP/s.
    pub peak_gflops: f64,
    /// gflops / peak_gflops.
    pub fraction_of_peak: f64,
}

/// Independent FMA chains per thread in the peak probe; enough to cover the latency of
/// two FMA pipes with 256- or 512-bit vectors.
const PEAK_CHAINS: usize = 64;

/// `iters` rounds of a = a·b + c on [`PEAK_CHAINS`] independent accumulators; returns
/// their sum so the work cannot be optimised away.
#[inline(always)]
fn peak_lanes<const FMA: bool>(iters: u64, b: f64, c: f64) -> f64 {
    let mut acc = [0.0f64; PEAK_CHAINS];
    for (k, a) in acc.iter_mut().enumerate() {
        *a = k as f64 * 1e-3;
    }
    for _ in 0..iters {
        for a in acc.iter_mut() {
            *a = fma::<FMA>(*a, b, c);
        }
    }
    acc.iter().sum()
}

dispatch_kernel!(fn peak_kernel(iters: u64, b: f64, c: f64) -> f64 => peak_lanes);

/// Builds a rayon pool of `threads` threads.
fn pool(threads: usize) -> Result<rayon::ThreadPool, PhysicsError> {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| PhysicsError::InvalidParameter {
            name: "threads",
            reason: e.to_string(),
        })
}

/// Timing windows per measurement; the best window is reported, which filters out
/// other processes taking the core for part of the time on a shared machine.
const WINDOWS: u32 = 5;

/// The f64 peak in GFLOP/s on `threads` threads: every thread runs the FMA-bound probe
/// (2 flops per fused multiply-add); the best of several windows, about `min_seconds`
/// in total.
pub fn measure_f64_peak(threads: usize, min_seconds: f64) -> Result<f64, PhysicsError> {
    require(threads >= 1, "threads", "must be at least 1")?;
    let pool = pool(threads)?;
    let b = std::hint::black_box(0.999_999_9);
    let c = std::hint::black_box(1e-7);
    let window = min_seconds / WINDOWS as f64;
    // Find an iteration count that fills one window, then measure the windows.
    let mut iters: u64 = 1 << 12;
    loop {
        let t = Instant::now();
        std::hint::black_box(pool.broadcast(|_| peak_kernel(iters, b, c)));
        if t.elapsed().as_secs_f64() >= window {
            break;
        }
        iters *= 2;
    }
    let mut best = 0.0f64;
    for _ in 0..WINDOWS {
        let t = Instant::now();
        std::hint::black_box(pool.broadcast(|_| peak_kernel(iters, b, c)));
        let secs = t.elapsed().as_secs_f64();
        let flops = 2.0 * PEAK_CHAINS as f64 * iters as f64 * threads as f64;
        best = best.max(flops / secs / 1e9);
    }
    Ok(best)
}

/// Configurations per second of `model` on the batch `x` (energy and forces): the best
/// of several windows of repeated calls, about `min_seconds` in total; returns (rate,
/// seconds spent). Works for any model, including an external one.
pub fn model_throughput(
    model: &dyn EnergyModel,
    x: &[f64],
    min_seconds: f64,
) -> Result<(f64, f64), PhysicsError> {
    let dim = model.dim();
    let n = x.len() / dim.max(1);
    require(
        n > 0 && x.len() == n * dim,
        "batch",
        "must hold at least one whole configuration",
    )?;
    let mut e = vec![0.0; n];
    let mut f = vec![0.0; n * dim];
    model.evaluate(x, &mut e, Some(&mut f))?; // Warm-up (page faults, thread start).
    let window = min_seconds / WINDOWS as f64;
    let start = Instant::now();
    let mut best = 0.0f64;
    for _ in 0..WINDOWS {
        let t = Instant::now();
        let mut calls = 0u64;
        loop {
            model.evaluate(x, &mut e, Some(&mut f))?;
            calls += 1;
            let secs = t.elapsed().as_secs_f64();
            if secs >= window {
                best = best.max(calls as f64 * n as f64 / secs);
                break;
            }
        }
    }
    std::hint::black_box(&e);
    Ok((best, start.elapsed().as_secs_f64()))
}

/// A batch of `n` perturbed LJ13 icosahedra.
fn lj13_batch(n: usize, rng: &mut ChaCha8Rng) -> Vec<f64> {
    let ico = icosahedron_13(1.1);
    (0..n)
        .flat_map(|_| {
            ico.iter()
                .map(|v| v + rng.gen_range(-0.05..0.05))
                .collect::<Vec<_>>()
        })
        .collect()
}

/// A batch of `n` random φ⁴ fields near the ordered state.
fn phi4_batch(n: usize, dim: usize, rng: &mut ChaCha8Rng) -> Vec<f64> {
    (0..n * dim)
        .map(|_| 0.6 + rng.gen_range(-0.5..0.5))
        .collect()
}

/// The energy benchmark rows: the peak probe, LJ13 3-D and φ⁴ 16×16 (m² = −4, λ = 3),
/// each on every thread count in `threads`, each measured for at least `min_seconds`
/// with batches of `batch` configurations.
pub fn energy_benchmark(
    threads: &[usize],
    batch: usize,
    min_seconds: f64,
) -> Result<Vec<EnergyBenchRow>, PhysicsError> {
    require(batch >= 1, "batch", "must be at least 1")?;
    let simd = simd_level().name();
    let mut rng = ChaCha8Rng::seed_from_u64(2026);
    let lj = LennardJones::new(13, 3, Wall::default_for(13, 3))?;
    let lj_x = lj13_batch(batch, &mut rng);
    let phi = Phi4::new(16, -4.0, 3.0)?;
    let phi_x = phi4_batch(batch, 256, &mut rng);
    let mut rows = Vec::new();
    for &t in threads {
        let peak_before = measure_f64_peak(t, min_seconds)?;
        let mut measured = Vec::new();
        let cases: [Case; 2] = [
            (
                "lj13-3d",
                &lj,
                &lj_x,
                lj.pairs() as f64,
                "pairs",
                lj.flops_per_config() / lj.pairs() as f64,
            ),
            (
                "phi4-16x16",
                &phi,
                &phi_x,
                256.0,
                "sites",
                phi4::FLOPS_PER_SITE,
            ),
        ];
        for (name, model, x, per_config, unit, flops) in cases {
            let (rate, secs) = pool(t)?.install(|| model_throughput(model, x, min_seconds))?;
            measured.push((name, rate, secs, per_config, unit, flops));
        }
        // The machine is shared: the peak is measured before and after the kernels and
        // the better value kept, like the kernels' own best windows.
        let peak = peak_before.max(measure_f64_peak(t, min_seconds)?);
        rows.push(EnergyBenchRow {
            bench: "energy",
            system: "peak-fma".into(),
            threads: t,
            batch: 0,
            simd,
            seconds: min_seconds,
            configs_per_sec: 0.0,
            interactions_per_sec: peak * 1e9 / 2.0,
            interaction_unit: "fma",
            flops_per_interaction: 2.0,
            gflops: peak,
            peak_gflops: peak,
            fraction_of_peak: 1.0,
        });
        for (name, rate, secs, per_config, unit, flops) in measured {
            let inter = rate * per_config;
            let gflops = inter * flops / 1e9;
            rows.push(EnergyBenchRow {
                bench: "energy",
                system: name.into(),
                threads: t,
                batch,
                simd,
                seconds: secs,
                configs_per_sec: rate,
                interactions_per_sec: inter,
                interaction_unit: unit,
                flops_per_interaction: flops,
                gflops,
                peak_gflops: peak,
                fraction_of_peak: gflops / peak,
            });
        }
    }
    Ok(rows)
}
