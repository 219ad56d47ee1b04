//! Drawing from a layer stack: independent draws with what reweighting needs, and
//! latent-space Metropolis.

use super::{StackFlow, StackTape};
use crate::real::Real;
use crate::sample::{latent_chain, Generated, LatentMap, LatentMcParams, LatentMcResult};
use crate::FlowError;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use rayon::prelude::*;
use tarn_physics::EnergyModel;

/// Rows per parallel chunk of generation.
const CHUNK: usize = 256;

/// Draws `n` samples at temperature factor `tau` (latent N(0, τ I), energies divided by
/// kT τ) with log q_τ(x), u and log w = −u − log q; `threads` threads; the result
/// depends only on `seed` (latent draws come from one stream, in order).
pub fn generate<T: Real>(
    flow: &StackFlow<T>,
    energy: &dyn EnergyModel,
    n: usize,
    kt: f64,
    tau: f64,
    threads: usize,
    seed: u64,
) -> Result<Generated, FlowError> {
    crate::workspace::check_tau(tau)?;
    if !(kt.is_finite() && kt > 0.0) {
        return Err(FlowError::Params(format!("kt must be > 0, got {kt}")));
    }
    let d = flow.dim();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let sd = tau.sqrt();
    let z: Vec<f64> = (0..n * d)
        .map(|_| sd * rng.sample::<f64, _>(StandardNormal))
        .collect();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads.max(1))
        .build()
        .map_err(|e| FlowError::Threads(e.to_string()))?;
    let norm = -0.5 * d as f64 * (2.0 * std::f64::consts::PI * tau).ln();
    let parts: Vec<(Vec<f64>, Vec<f64>)> = pool.install(|| {
        z.par_chunks(CHUNK * d)
            .map(|zc| {
                let m = zc.len() / d;
                let mut x: Vec<T> = zc.iter().map(|&v| T::of(v)).collect();
                let mut ld = vec![T::zero(); m];
                flow.generate(&mut x, &mut ld, &mut StackTape::default(), false);
                let lq = zc
                    .chunks(d)
                    .zip(&ld)
                    .map(|(row, l)| {
                        let zz: f64 = row.iter().map(|v| v * v).sum();
                        norm - 0.5 * zz / tau - l.to64()
                    })
                    .collect();
                (x.iter().map(|v| v.to64()).collect(), lq)
            })
            .collect()
    });
    let mut out = Generated {
        energy_evaluations: n as u64,
        ..Default::default()
    };
    for (x, lq) in parts {
        out.x.extend(x);
        out.log_q.extend(lq);
    }
    let mut e = vec![0.0; n];
    energy.evaluate(&out.x, &mut e, None)?;
    for (ei, lq) in e.iter().zip(&out.log_q) {
        let u = ei / (kt * tau);
        let u = if u.is_finite() { u } else { f64::INFINITY };
        out.reduced_energy.push(u);
        out.log_weight.push(-u - lq);
    }
    Ok(out)
}

/// The stack's two directions for latent Metropolis.
struct StackMap<'a, T: Real> {
    flow: &'a StackFlow<T>,
    tape: StackTape<T>,
}

impl<T: Real> LatentMap<T> for StackMap<'_, T> {
    fn dims(&self) -> (usize, usize) {
        (self.flow.dim(), self.flow.dim())
    }
    fn to_latent(&mut self, x: &[T], z: &mut [T]) -> Result<(), FlowError> {
        z.copy_from_slice(x);
        let mut ld = vec![T::zero(); x.len() / self.flow.dim()];
        self.flow.invert(z, &mut ld, &mut self.tape, false);
        Ok(())
    }
    fn to_data(
        &mut self,
        z: &[T],
        energy: &dyn EnergyModel,
        x: &mut [f64],
        log_det: &mut [f64],
        e: &mut [f64],
    ) -> Result<(), FlowError> {
        let mut xt = z.to_vec();
        let mut ld = vec![T::zero(); log_det.len()];
        self.flow.generate(&mut xt, &mut ld, &mut self.tape, false);
        for (o, v) in x.iter_mut().zip(&xt) {
            *o = v.to64();
        }
        for (o, v) in log_det.iter_mut().zip(&ld) {
            *o = v.to64();
        }
        energy.evaluate(x, e, None)?;
        Ok(())
    }
}

/// Latent-space Metropolis through a layer stack: exact for exp(−u(x)) whatever the
/// flow (see [`crate::latent_metropolis`], which this shares its chain with).
pub fn latent_metropolis<T: Real>(
    flow: &StackFlow<T>,
    energy: &dyn EnergyModel,
    params: &LatentMcParams,
    kt: f64,
    start: Option<&[f64]>,
    seed: u64,
) -> Result<LatentMcResult, FlowError> {
    let mut map = StackMap {
        flow,
        tape: StackTape::default(),
    };
    latent_chain(&mut map, energy, params, kt, start, seed)
}
