//! Drawing from a trained flow: independent generation with importance weights, and
//! Metropolis Monte Carlo in the latent space that samples the exact Boltzmann
//! distribution of x.
//!
//! Latent Metropolis: the chain moves z' = z + sigma xi (xi standard normal) and accepts
//! with probability min(1, exp(-(u' - u) + (l' - l))), where u = E(f(z)) / (kT tau) and
//! l = log|det df/dz|. The target density of z is exp(-u(f(z))) |det df/dz|, whose image
//! under f is exp(-u(x)): the chain is exact for any flow, and a good flow makes large
//! moves acceptable. sigma is adapted only during burn-in (multiplied by
//! exp(acceptance - target) every `adapt_every` steps, kept within bounds) and then
//! frozen, so the kept part of the chain is a time-homogeneous Markov chain.

use crate::flow::Flow;
use crate::real::Real;
use crate::train::draw_latent;
use crate::workspace::{check_tau, Threading, Workspace};
use crate::FlowError;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};
use tarn_physics::EnergyModel;

/// Independent samples from the flow at one temperature, with what reweighting needs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct Generated {
    /// Configurations, [n, data_dim] row-major.
    pub x: Vec<f64>,
    /// log q(x) under the latent N(0, tau I).
    pub log_q: Vec<f64>,
    /// Reduced energy u = E / (kT tau); +inf where the energy was not finite.
    pub reduced_energy: Vec<f64>,
    /// log w = -u - log q (-inf where u is not finite).
    pub log_weight: Vec<f64>,
    /// Energy evaluations made.
    pub energy_evaluations: u64,
}

/// Draws `n` independent samples at temperature factor `tau` (latent N(0, tau I),
/// energies divided by kT tau) with their log-densities and log importance weights.
#[allow(clippy::too_many_arguments)]
pub fn generate<T: Real>(
    flow: &Flow<T>,
    energy: &dyn EnergyModel,
    n: usize,
    kt: f64,
    tau: f64,
    threads: usize,
    seed: u64,
) -> Result<Generated, FlowError> {
    check_tau(tau)?;
    if !(kt.is_finite() && kt > 0.0) {
        return Err(FlowError::Params(format!("kt must be > 0, got {kt}")));
    }
    let (d, dx) = (flow.dim(), flow.data_dim());
    let block = 4096.min(n.max(1));
    let mut ws = Workspace::new(flow, block, threads, Threading::Auto)?;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = Generated {
        x: vec![0.0; n * dx],
        log_q: vec![0.0; n],
        reduced_energy: vec![0.0; n],
        log_weight: vec![0.0; n],
        energy_evaluations: n as u64,
    };
    let mut z = vec![T::zero(); block * d];
    let norm = -0.5 * d as f64 * (2.0 * std::f64::consts::PI * tau).ln();
    let mut start = 0;
    while start < n {
        let m = block.min(n - start);
        let zb = &mut z[..m * d];
        draw_latent(&mut rng, tau, zb);
        let (ld, e) = (
            &mut out.log_q[start..start + m],
            &mut out.reduced_energy[start..start + m],
        );
        ws.generate_with_energy(
            flow,
            zb,
            energy,
            &mut out.x[start * dx..(start + m) * dx],
            ld,
            e,
        )?;
        for i in 0..m {
            let zz: f64 = zb[i * d..(i + 1) * d]
                .iter()
                .map(|v| v.to64().powi(2))
                .sum();
            let lq = norm - 0.5 * zz / tau - out.log_q[start + i];
            let u = out.reduced_energy[start + i] / (kt * tau);
            let u = if u.is_finite() { u } else { f64::INFINITY };
            out.log_q[start + i] = lq;
            out.reduced_energy[start + i] = u;
            out.log_weight[start + i] = -u - lq;
        }
        start += m;
    }
    Ok(out)
}

/// Settings of latent-space Metropolis (unknown keys refused, all defaulted).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct LatentMcParams {
    /// Independent chains, moved together as one batch.
    pub n_chains: usize,
    /// Steps per chain, burn-in included.
    pub n_steps: usize,
    /// Leading steps during which sigma adapts and nothing is kept.
    pub burn_in: usize,
    /// Keep every `thin`-th state after burn-in.
    pub thin: usize,
    /// Initial proposal scale in latent units.
    pub sigma: f64,
    /// Lower bound of sigma during adaptation.
    pub sigma_min: f64,
    /// Upper bound of sigma during adaptation.
    pub sigma_max: f64,
    /// Acceptance rate that adaptation aims at.
    pub target_acceptance: f64,
    /// Steps between two adaptations of sigma.
    pub adapt_every: usize,
    /// Temperature factor tau: the chain samples exp(-E / (kT tau)).
    pub temperature_factor: f64,
    /// Threads.
    pub threads: usize,
}

impl Default for LatentMcParams {
    fn default() -> Self {
        LatentMcParams {
            n_chains: 64,
            n_steps: 1000,
            burn_in: 200,
            thin: 10,
            sigma: 0.3,
            sigma_min: 1e-3,
            sigma_max: 3.0,
            target_acceptance: 0.3,
            adapt_every: 10,
            temperature_factor: 1.0,
            threads: 1,
        }
    }
}

impl LatentMcParams {
    /// Checks ranges, naming the offending field.
    pub fn validate(&self) -> Result<(), FlowError> {
        let bad = |m: &str| Err(FlowError::Params(m.into()));
        if self.n_chains == 0 || self.thin == 0 || self.adapt_every == 0 || self.threads == 0 {
            return bad("n_chains, thin, adapt_every and threads must be at least 1");
        }
        if self.burn_in >= self.n_steps {
            return bad("burn_in must be smaller than n_steps");
        }
        if !(self.sigma_min > 0.0
            && self.sigma_min <= self.sigma
            && self.sigma <= self.sigma_max
            && self.sigma_max.is_finite())
        {
            return bad("need 0 < sigma_min <= sigma <= sigma_max < inf");
        }
        if !(self.target_acceptance > 0.0 && self.target_acceptance < 1.0) {
            return bad("target_acceptance must lie in (0, 1)");
        }
        check_tau(self.temperature_factor)
    }
}

/// What a latent Metropolis run produced.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct LatentMcResult {
    /// Kept configurations, [n_kept, data_dim], ordered by step then chain.
    pub x: Vec<f64>,
    /// Reduced energies E / (kT tau) of the kept configurations.
    pub reduced_energy: Vec<f64>,
    /// Chain index of each kept configuration.
    pub chain: Vec<u32>,
    /// Acceptance rate after burn-in.
    pub acceptance_rate: f64,
    /// Acceptance rate during burn-in.
    pub burn_in_acceptance_rate: f64,
    /// The proposal scale used after burn-in.
    pub sigma: f64,
    /// Energy evaluations made (initial states included).
    pub energy_evaluations: u64,
}

/// Runs latent-space Metropolis. Chains start from the rows of `start` (mapped to latent
/// space by the inverse flow; chain c uses row c mod rows) or, without it, from draws of
/// N(0, tau I). Starting states must have finite energies.
pub fn latent_metropolis<T: Real>(
    flow: &Flow<T>,
    energy: &dyn EnergyModel,
    params: &LatentMcParams,
    kt: f64,
    start: Option<&[f64]>,
    seed: u64,
) -> Result<LatentMcResult, FlowError> {
    params.validate()?;
    let mut map = RealNvpMap {
        ws: Workspace::new(flow, params.n_chains, params.threads, Threading::Auto)?,
        flow,
    };
    latent_chain(&mut map, energy, params, kt, start, seed)
}

/// What latent Metropolis needs of a flow: the two directions of its map, the
/// generative one with energies and log|det ∂f/∂z|.
pub(crate) trait LatentMap<T: Real> {
    /// (latent dimension, data dimension).
    fn dims(&self) -> (usize, usize);
    /// z = f⁻¹(x) for the rows of `x`.
    fn to_latent(&mut self, x: &[T], z: &mut [T]) -> Result<(), FlowError>;
    /// x = f(z), log|det ∂f/∂z| and the energies of the rows of `z`.
    fn to_data(
        &mut self,
        z: &[T],
        energy: &dyn EnergyModel,
        x: &mut [f64],
        log_det: &mut [f64],
        e: &mut [f64],
    ) -> Result<(), FlowError>;
}

struct RealNvpMap<'a, T: Real> {
    ws: Workspace<T>,
    flow: &'a Flow<T>,
}

impl<T: Real> LatentMap<T> for RealNvpMap<'_, T> {
    fn dims(&self) -> (usize, usize) {
        (self.flow.dim(), self.flow.data_dim())
    }
    fn to_latent(&mut self, x: &[T], z: &mut [T]) -> Result<(), FlowError> {
        let mut ld = vec![0.0; x.len() / self.flow.data_dim()];
        self.ws.invert(self.flow, x, z, &mut ld)
    }
    fn to_data(
        &mut self,
        z: &[T],
        energy: &dyn EnergyModel,
        x: &mut [f64],
        log_det: &mut [f64],
        e: &mut [f64],
    ) -> Result<(), FlowError> {
        self.ws
            .generate_with_energy(self.flow, z, energy, x, log_det, e)
    }
}

/// The latent Metropolis chain over any [`LatentMap`] (see [`latent_metropolis`]).
pub(crate) fn latent_chain<T: Real>(
    map: &mut dyn LatentMap<T>,
    energy: &dyn EnergyModel,
    params: &LatentMcParams,
    kt: f64,
    start: Option<&[f64]>,
    seed: u64,
) -> Result<LatentMcResult, FlowError> {
    params.validate()?;
    if !(kt.is_finite() && kt > 0.0) {
        return Err(FlowError::Params(format!("kt must be > 0, got {kt}")));
    }
    let ((d, dx), nc) = (map.dims(), params.n_chains);
    let beta = 1.0 / (kt * params.temperature_factor);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut z = vec![T::zero(); nc * d];
    match start {
        Some(s) => {
            if s.is_empty() || s.len() % dx != 0 || s.iter().any(|v| !v.is_finite()) {
                return Err(FlowError::Params(format!(
                    "start configurations must be a non-empty finite [rows, {dx}] array, got {} values",
                    s.len()
                )));
            }
            let rows = s.len() / dx;
            let s_t: Vec<T> = (0..nc)
                .flat_map(|c| {
                    s[(c % rows) * dx..(c % rows + 1) * dx]
                        .iter()
                        .map(|&v| T::of(v))
                })
                .collect();
            map.to_latent(&s_t, &mut z)?;
        }
        None => draw_latent(&mut rng, params.temperature_factor, &mut z),
    }
    let (mut x, mut ld, mut e) = (vec![0.0; nc * dx], vec![0.0; nc], vec![0.0; nc]);
    map.to_data(&z, energy, &mut x, &mut ld, &mut e)?;
    let mut u: Vec<f64> = e.iter().map(|v| v * beta).collect();
    if let Some(c) = u.iter().position(|v| !v.is_finite()) {
        return Err(FlowError::Params(format!(
            "chain {c} starts at a configuration with non-finite energy"
        )));
    }
    let mut out = LatentMcResult {
        energy_evaluations: nc as u64,
        ..Default::default()
    };
    let (mut zp, mut xp, mut ldp, mut ep) = (z.clone(), x.clone(), ld.clone(), e.clone());
    let mut sigma = params.sigma;
    let (mut acc_burn, mut acc_main, mut window) = (0u64, 0u64, 0u64);
    for step in 0..params.n_steps {
        for (p, &c) in zp.iter_mut().zip(&z) {
            *p = c + T::of(sigma * rng.sample::<f64, _>(rand_distr::StandardNormal));
        }
        map.to_data(&zp, energy, &mut xp, &mut ldp, &mut ep)?;
        out.energy_evaluations += nc as u64;
        let mut accepted = 0u64;
        for c in 0..nc {
            let up = ep[c] * beta;
            let log_a = -(up - u[c]) + (ldp[c] - ld[c]);
            let uni: f64 = rng.gen();
            if up.is_finite() && log_a.is_finite() && uni.ln() < log_a {
                z[c * d..(c + 1) * d].copy_from_slice(&zp[c * d..(c + 1) * d]);
                x[c * dx..(c + 1) * dx].copy_from_slice(&xp[c * dx..(c + 1) * dx]);
                u[c] = up;
                ld[c] = ldp[c];
                accepted += 1;
            }
        }
        if step < params.burn_in {
            acc_burn += accepted;
            window += accepted;
            if (step + 1) % params.adapt_every == 0 {
                let rate = window as f64 / (nc * params.adapt_every) as f64;
                sigma = (sigma * (rate - params.target_acceptance).exp())
                    .clamp(params.sigma_min, params.sigma_max);
                window = 0;
            }
        } else {
            acc_main += accepted;
            if (step - params.burn_in) % params.thin == params.thin - 1 {
                out.x.extend_from_slice(&x);
                out.reduced_energy.extend_from_slice(&u);
                out.chain.extend(0..nc as u32);
            }
        }
    }
    out.sigma = sigma;
    out.burn_in_acceptance_rate = acc_burn as f64 / (nc * params.burn_in).max(1) as f64;
    out.acceptance_rate = acc_main as f64 / (nc * (params.n_steps - params.burn_in)) as f64;
    Ok(out)
}
