//! Training a flow: maximum likelihood on samples (forward KL) plus the reverse KL with
//! the energy at one or several temperatures, optimised with Adam on mini-batches, with
//! a held-out set and early stopping on its negative log-likelihood.
//!
//! Loss per step: w_ml * mean_batch[-log q(x)] + w_kl * mean_tau mean_z[rho(E(f(z)) /
//! (kT tau)) - log|det df/dz|] with z ~ N(0, tau I): the latent variance is scaled by the
//! temperature factor tau and the energy is divided by it, so one flow learns the whole
//! family exp(-E / (kT tau)) (exact for a Gaussian energy and a linear flow, and a good
//! approximation otherwise). rho is the identity up to the reduced-energy cutoff c and
//! c + ln(1 + u - c) above it (see `regularise_energy`).
//!
//! Warm start: `train` continues from whatever parameters the given flow has, so the
//! previous round's model is passed in as is. Determinism: every random number (the
//! held-out split, batch order, latent draws) comes from one ChaCha8 stream seeded by
//! `seed`; sums run in a fixed order, so the same seed and thread count give the same
//! bytes.

use crate::flow::Flow;
use crate::real::{multiversion, Real};
use crate::workspace::{KlTerm, Threading, Workspace};
use crate::FlowError;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use tarn_physics::EnergyModel;

/// Training settings, as read from a campaign file's retrain stage (unknown keys are
/// refused; every field has a default).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct TrainParams {
    /// Weight of the maximum-likelihood (forward KL) term.
    pub w_ml: f64,
    /// Weight of the reverse-KL term (needs an energy model).
    pub w_kl: f64,
    /// kT in the energy model's unit: reduced energies are E / (kT * tau).
    pub kt: f64,
    /// Temperature factors tau trained against by the reverse-KL term ([1.0] default).
    pub temperature_factors: Vec<f64>,
    /// Reduced-energy cutoff above which energies are regularised logarithmically.
    pub energy_cutoff: f64,
    /// Adam step size.
    pub learning_rate: f64,
    /// When set, the step size falls from `learning_rate` to this value along a half
    /// cosine over the planned steps (max_epochs × steps per epoch); unset: constant.
    pub learning_rate_final: Option<f64>,
    /// Adam's first-moment decay.
    pub adam_beta1: f64,
    /// Adam's second-moment decay.
    pub adam_beta2: f64,
    /// Adam's denominator guard.
    pub adam_eps: f64,
    /// Samples per maximum-likelihood mini-batch.
    pub batch_size: usize,
    /// Latent draws per temperature per reverse-KL mini-batch.
    pub kl_batch_size: usize,
    /// Upper bound on epochs.
    pub max_epochs: usize,
    /// Steps per epoch; 0 means one pass over the training samples (required > 0 when
    /// there are no samples).
    pub steps_per_epoch: usize,
    /// Fraction of the samples held out for early stopping (0 disables early stopping).
    pub held_out_fraction: f64,
    /// Epochs without improvement of the held-out NLL before stopping.
    pub patience: usize,
    /// Global gradient-norm clip (0 disables).
    pub grad_clip: f64,
    /// Threads (results are deterministic at a fixed count).
    pub threads: usize,
}

impl Default for TrainParams {
    fn default() -> Self {
        TrainParams {
            w_ml: 1.0,
            w_kl: 0.0,
            kt: 1.0,
            temperature_factors: vec![1.0],
            energy_cutoff: 1e3,
            learning_rate: 1e-3,
            learning_rate_final: None,
            adam_beta1: 0.9,
            adam_beta2: 0.999,
            adam_eps: 1e-8,
            batch_size: 256,
            kl_batch_size: 256,
            max_epochs: 200,
            steps_per_epoch: 0,
            held_out_fraction: 0.1,
            patience: 20,
            grad_clip: 10.0,
            threads: 1,
        }
    }
}

impl TrainParams {
    /// The step size at optimiser step `step` of `planned` (see `learning_rate_final`).
    pub fn learning_rate_at(&self, step: usize, planned: usize) -> f64 {
        match self.learning_rate_final {
            None => self.learning_rate,
            Some(f) => {
                let t = step as f64 / planned.max(1) as f64;
                f + 0.5 * (self.learning_rate - f) * (1.0 + (std::f64::consts::PI * t).cos())
            }
        }
    }

    /// Checks ranges, naming the offending field.
    pub fn validate(&self) -> Result<(), FlowError> {
        let bad = |m: String| Err(FlowError::Params(m));
        let finite_nonneg = |v: f64| v.is_finite() && v >= 0.0;
        if !finite_nonneg(self.w_ml) || !finite_nonneg(self.w_kl) || self.w_ml + self.w_kl == 0.0 {
            return bad(format!(
                "w_ml ({}) and w_kl ({}) must be >= 0 and not both 0",
                self.w_ml, self.w_kl
            ));
        }
        if !(self.kt.is_finite() && self.kt > 0.0) {
            return bad(format!("kt must be > 0, got {}", self.kt));
        }
        if self.temperature_factors.is_empty()
            || self
                .temperature_factors
                .iter()
                .any(|t| !(t.is_finite() && *t > 0.0))
        {
            return bad("temperature_factors must be a non-empty list of positive numbers".into());
        }
        if !self.energy_cutoff.is_finite() {
            return bad("energy_cutoff must be finite".into());
        }
        if !(self.learning_rate.is_finite() && self.learning_rate > 0.0) {
            return bad(format!(
                "learning_rate must be > 0, got {}",
                self.learning_rate
            ));
        }
        if let Some(f) = self.learning_rate_final {
            if !(f.is_finite() && f > 0.0 && f <= self.learning_rate) {
                return bad(format!(
                    "learning_rate_final must be > 0 and at most learning_rate, got {f}"
                ));
            }
        }
        if !(0.0..1.0).contains(&self.adam_beta1)
            || !(0.0..1.0).contains(&self.adam_beta2)
            || self.adam_eps.is_nan()
            || self.adam_eps <= 0.0
        {
            return bad("adam_beta1 and adam_beta2 must lie in [0, 1) and adam_eps be > 0".into());
        }
        if self.batch_size == 0 || self.kl_batch_size == 0 {
            return bad("batch_size and kl_batch_size must be at least 1".into());
        }
        if !(0.0..1.0).contains(&self.held_out_fraction) {
            return bad(format!(
                "held_out_fraction must lie in [0, 1), got {}",
                self.held_out_fraction
            ));
        }
        if !finite_nonneg(self.grad_clip) {
            return bad("grad_clip must be >= 0".into());
        }
        if self.threads == 0 || self.threads > 256 {
            return bad("threads must be between 1 and 256".into());
        }
        Ok(())
    }
}

/// What a training run did.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct TrainReport {
    /// Epochs completed.
    pub epochs_run: usize,
    /// Optimiser steps taken.
    pub steps: usize,
    /// Mean training NLL per epoch (empty when w_ml = 0).
    pub train_nll: Vec<f64>,
    /// Mean reverse-KL loss per epoch, averaged over temperatures (empty when w_kl = 0).
    pub kl_loss: Vec<f64>,
    /// Held-out NLL after each epoch (empty without a held-out set).
    pub heldout_nll: Vec<f64>,
    /// The best held-out NLL; the flow is left with the parameters that reached it.
    pub best_heldout_nll: Option<f64>,
    /// The epoch (0-based) of the best held-out NLL.
    pub best_epoch: Option<usize>,
    /// Whether patience ran out before max_epochs.
    pub stopped_early: bool,
    /// Energy evaluations made (reverse-KL draws).
    pub energy_evaluations: u64,
    /// Draws whose energy or forces were not finite.
    pub nonfinite_energies: u64,
    /// Steps skipped because the gradient was not finite.
    pub skipped_steps: usize,
    /// Training and held-out sample counts.
    pub n_train: usize,
    /// Held-out sample count.
    pub n_heldout: usize,
}

/// Adam's state.
#[derive(Debug)]
pub(crate) struct Adam<T> {
    m: Vec<T>,
    v: Vec<T>,
    t: i32,
}

/// Rows per thread per block of a training pass.
const TRAIN_CHUNK_ROWS: usize = 256;

/// Parameters per parallel block of element-wise optimiser work.
const BLOCK: usize = 1 << 14;

impl<T: Real> Adam<T> {
    pub(crate) fn new(n: usize) -> Self {
        Adam {
            m: vec![T::zero(); n],
            v: vec![T::zero(); n],
            t: 0,
        }
    }

    /// One Adam step on `params` with gradient `scale * grad`.
    pub(crate) fn step(
        &mut self,
        ws: &Workspace<T>,
        p: &TrainParams,
        params: &mut [T],
        grad: &[T],
        scale: f64,
    ) {
        self.t += 1;
        let (b1, b2) = (p.adam_beta1, p.adam_beta2);
        let lr_t = p.learning_rate * (1.0 - b2.powi(self.t)).sqrt() / (1.0 - b1.powi(self.t));
        let (b1, b2, lr_t, eps, scale) = (
            T::of(b1),
            T::of(b2),
            T::of(lr_t),
            T::of(p.adam_eps),
            T::of(scale),
        );
        type Block<'a, T> = (((&'a mut [T], &'a [T]), &'a mut [T]), &'a mut [T]);
        let job = |(((pc, gc), mc), vc): Block<'_, T>| {
            adam_block(pc, gc, mc, vc, b1, b2, lr_t, eps, scale)
        };
        let (m, v) = (&mut self.m, &mut self.v);
        ws.install(|| {
            params
                .par_chunks_mut(BLOCK)
                .zip(grad.par_chunks(BLOCK))
                .zip(m.par_chunks_mut(BLOCK))
                .zip(v.par_chunks_mut(BLOCK))
                .for_each(job)
        });
    }
}

multiversion! {
    /// Adam's update of one block: m, v moving averages of g = scale * grad, then
    /// w -= lr_t m / (sqrt(v) + eps) with the bias corrections folded into lr_t.
    fn adam_block<T>(w: &mut [T], grad: &[T], m: &mut [T], v: &mut [T], b1: T, b2: T, lr_t: T, eps: T, scale: T) = adam_block_k;
}

#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn adam_block_k<T: Real>(
    w: &mut [T],
    grad: &[T],
    m: &mut [T],
    v: &mut [T],
    b1: T,
    b2: T,
    lr_t: T,
    eps: T,
    scale: T,
) {
    let one = T::one();
    for (((w, &g), m), v) in w.iter_mut().zip(grad).zip(m.iter_mut()).zip(v.iter_mut()) {
        let g = g * scale;
        *m = b1 * *m + (one - b1) * g;
        *v = b2 * *v + (one - b2) * g * g;
        *w -= lr_t * *m / (v.sqrt() + eps);
    }
}

multiversion! {
    /// `out = a x + b y` (y empty: `out = a x`) and the squared norm of `out`, summed in
    /// 16 fixed lanes so that the loop vectorises and the result is reproducible.
    fn combine_block<T>(out: &mut [T], a: T, x: &[T], b: T, y: &[T]) -> f64 = combine_block_k;
}

#[inline(always)]
fn combine_block_k<T: Real>(out: &mut [T], a: T, x: &[T], b: T, y: &[T]) -> f64 {
    let mut lanes = [T::zero(); 16];
    if y.is_empty() {
        for (oc, xc) in out.chunks_mut(16).zip(x.chunks(16)) {
            for ((o, &u), l) in oc.iter_mut().zip(xc).zip(lanes.iter_mut()) {
                *o = a * u;
                *l += *o * *o;
            }
        }
    } else {
        for ((oc, xc), yc) in out.chunks_mut(16).zip(x.chunks(16)).zip(y.chunks(16)) {
            for (((o, &u), &w), l) in oc.iter_mut().zip(xc).zip(yc).zip(lanes.iter_mut()) {
                *o = a * u + b * w;
                *l += *o * *o;
            }
        }
    }
    lanes.iter().map(|l| l.to64()).sum()
}

/// `out = a * x + b * y` element-wise and the squared norm of `out` (summed per fixed
/// block, blocks in order).
pub(crate) fn combine<T: Real>(
    ws: &Workspace<T>,
    out: &mut [T],
    a: f64,
    x: &[T],
    b: f64,
    y: Option<&[T]>,
) -> f64 {
    let (a, b) = (T::of(a), T::of(b));
    ws.install(|| {
        let parts: Vec<f64> = out
            .par_chunks_mut(BLOCK)
            .enumerate()
            .map(|(i, o)| {
                let off = i * BLOCK;
                let len = o.len();
                let ys = y.map_or(&[][..], |y| &y[off..off + len]);
                combine_block(o, a, &x[off..off + len], b, ys)
            })
            .collect();
        parts.iter().sum()
    })
}

/// Draws `out.len()` values from N(0, tau).
pub(crate) fn draw_latent<T: Real>(rng: &mut ChaCha8Rng, tau: f64, out: &mut [T]) {
    let sd = tau.sqrt();
    for v in out.iter_mut() {
        *v = T::of(sd * rng.sample::<f64, _>(StandardNormal));
    }
}

/// One optimiser's worth of buffers for a flow: the workspace, Adam state, gradients
/// and batch buffers, so that a step allocates nothing.
pub(crate) struct Trainer<T: Real> {
    pub ws: Workspace<T>,
    pub adam: Adam<T>,
    g_ml: Vec<T>,
    g_kl: Vec<T>,
    g_sum: Vec<T>,
    g_tot: Vec<T>,
    pub xbatch: Vec<T>,
    pub zbatch: Vec<T>,
}

/// What one step measured.
#[derive(Debug, Default, Clone, Copy)]
pub(crate) struct StepStats {
    pub nll: f64,
    pub kl: f64,
    pub evals: u64,
    pub nonfinite: u64,
    pub skipped: bool,
}

impl<T: Real> Trainer<T> {
    pub(crate) fn new(
        flow: &Flow<T>,
        p: &TrainParams,
        threading: Threading,
    ) -> Result<Self, FlowError> {
        // Training passes keep a tape per layer; blocks of at most TRAIN_CHUNK_ROWS rows
        // per thread keep it near the core's cache (measured 20-30% faster for the small
        // configuration than one 512-row chunk); gradients accumulate over blocks.
        let rows = p
            .batch_size
            .max(p.kl_batch_size)
            .min(TRAIN_CHUNK_ROWS * p.threads);
        let np = flow.n_params();
        Ok(Trainer {
            ws: Workspace::new(flow, rows, p.threads, threading)?,
            adam: Adam::new(np),
            g_ml: vec![T::zero(); np],
            g_kl: vec![T::zero(); np],
            g_sum: vec![T::zero(); np],
            g_tot: vec![T::zero(); np],
            xbatch: vec![T::zero(); p.batch_size * flow.data_dim()],
            zbatch: vec![T::zero(); p.kl_batch_size * flow.dim()],
        })
    }

    /// One optimiser step: ML on `xbatch[..n_ml rows]` (if n_ml > 0 and w_ml > 0) plus
    /// the reverse KL at every temperature (if an energy is given and w_kl > 0).
    pub(crate) fn step(
        &mut self,
        flow: &mut Flow<T>,
        p: &TrainParams,
        n_ml: usize,
        energy: Option<&dyn EnergyModel>,
        rng: &mut ChaCha8Rng,
    ) -> Result<StepStats, FlowError> {
        let mut st = StepStats::default();
        let use_ml = n_ml > 0 && p.w_ml > 0.0;
        if use_ml {
            let dx = flow.data_dim();
            st.nll = self
                .ws
                .nll_grad(flow, &self.xbatch[..n_ml * dx], &mut self.g_ml, None)?;
        }
        let mut have_kl = false;
        if let (Some(e), true) = (energy, p.w_kl > 0.0) {
            let nt = p.temperature_factors.len() as f64;
            for (i, &tau) in p.temperature_factors.iter().enumerate() {
                draw_latent(rng, tau, &mut self.zbatch);
                let term = KlTerm {
                    beta: 1.0 / (p.kt * tau),
                    temperature_factor: tau,
                    cutoff: p.energy_cutoff,
                };
                let s = self
                    .ws
                    .kl_grad(flow, &self.zbatch, e, &term, &mut self.g_kl, None)?;
                st.kl += s.loss / nt;
                st.evals += s.n_evaluations as u64;
                st.nonfinite += s.n_nonfinite as u64;
                if i == 0 {
                    std::mem::swap(&mut self.g_sum, &mut self.g_kl);
                } else {
                    combine(
                        &self.ws,
                        &mut self.g_tot,
                        1.0,
                        &self.g_sum,
                        1.0,
                        Some(&self.g_kl),
                    );
                    std::mem::swap(&mut self.g_sum, &mut self.g_tot);
                }
            }
            have_kl = true;
        }
        let kl_w = p.w_kl / p.temperature_factors.len() as f64;
        let norm2 = match (use_ml, have_kl) {
            (true, true) => combine(
                &self.ws,
                &mut self.g_tot,
                p.w_ml,
                &self.g_ml,
                kl_w,
                Some(&self.g_sum),
            ),
            (true, false) => combine(&self.ws, &mut self.g_tot, p.w_ml, &self.g_ml, 0.0, None),
            (false, true) => combine(&self.ws, &mut self.g_tot, kl_w, &self.g_sum, 0.0, None),
            (false, false) => {
                return Err(FlowError::Params(
                    "a training step has neither samples nor an energy".into(),
                ))
            }
        };
        let norm = norm2.sqrt();
        if !norm.is_finite() {
            st.skipped = true;
            return Ok(st);
        }
        let scale = if p.grad_clip > 0.0 && norm > p.grad_clip {
            p.grad_clip / norm
        } else {
            1.0
        };
        self.adam
            .step(&self.ws, p, &mut flow.params, &self.g_tot, scale);
        Ok(st)
    }
}

/// Trains `flow` in place from its current parameters on `data` ([n, data_dim] f64,
/// may be empty when only the reverse KL is used) and/or `energy`, and returns what
/// happened. With a held-out set the flow ends with the best held-out parameters.
pub fn train<T: Real>(
    flow: &mut Flow<T>,
    data: &[f64],
    energy: Option<&dyn EnergyModel>,
    params: &TrainParams,
    seed: u64,
) -> Result<TrainReport, FlowError> {
    params.validate()?;
    let dx = flow.data_dim();
    if !data.len().is_multiple_of(dx) {
        return Err(FlowError::Shape {
            what: "training data",
            expected: dx,
            got: data.len(),
        });
    }
    if data.iter().any(|v| !v.is_finite()) {
        return Err(FlowError::Params(
            "training data contain non-finite values".into(),
        ));
    }
    if let Some(e) = energy {
        if e.dim() != dx {
            return Err(FlowError::Spec(format!(
                "energy model has dim {} but the flow's data_dim is {dx}",
                e.dim()
            )));
        }
    }
    let n = data.len() / dx;
    let use_ml = params.w_ml > 0.0 && n > 0;
    let use_kl = params.w_kl > 0.0 && energy.is_some();
    if !use_ml && !use_kl {
        return Err(FlowError::Params(
            "nothing to train on: w_ml needs samples, w_kl needs an energy model".into(),
        ));
    }
    if !use_ml && params.steps_per_epoch == 0 {
        return Err(FlowError::Params(
            "steps_per_epoch must be > 0 when training without samples".into(),
        ));
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut order: Vec<usize> = (0..n).collect();
    order.shuffle(&mut rng);
    let n_held = if n >= 2 {
        ((params.held_out_fraction * n as f64).round() as usize).min(n - 1)
    } else {
        0
    };
    let (held, train_idx) = order.split_at(n_held);
    let mut train_idx = train_idx.to_vec();
    let held_x: Vec<T> = held
        .iter()
        .flat_map(|&i| data[i * dx..(i + 1) * dx].iter().map(|&v| T::of(v)))
        .collect();
    let mut tr = Trainer::new(flow, params, Threading::Auto)?;
    let steps_per_epoch = if params.steps_per_epoch > 0 {
        params.steps_per_epoch
    } else {
        train_idx.len().div_ceil(params.batch_size)
    };
    let mut report = TrainReport {
        n_train: train_idx.len(),
        n_heldout: n_held,
        ..Default::default()
    };
    let mut best_params: Option<Vec<T>> = None;
    let mut wait = 0;
    let mut cursor = train_idx.len();
    let mut held_lq = vec![0.0; n_held];
    let mut p_step = params.clone();
    let planned = params.max_epochs * steps_per_epoch;
    for epoch in 0..params.max_epochs {
        let (mut nll_sum, mut kl_sum, mut counted) = (0.0, 0.0, 0usize);
        for s in 0..steps_per_epoch {
            p_step.learning_rate = params.learning_rate_at(epoch * steps_per_epoch + s, planned);
            let mut n_ml = 0;
            if use_ml {
                while n_ml < params.batch_size.min(train_idx.len()) {
                    if cursor >= train_idx.len() {
                        train_idx.shuffle(&mut rng);
                        cursor = 0;
                    }
                    let i = train_idx[cursor];
                    cursor += 1;
                    for (o, &v) in tr.xbatch[n_ml * dx..(n_ml + 1) * dx]
                        .iter_mut()
                        .zip(&data[i * dx..(i + 1) * dx])
                    {
                        *o = T::of(v);
                    }
                    n_ml += 1;
                }
            }
            let st = tr.step(
                flow,
                &p_step,
                n_ml,
                if use_kl { energy } else { None },
                &mut rng,
            )?;
            report.energy_evaluations += st.evals;
            report.nonfinite_energies += st.nonfinite;
            if st.skipped {
                report.skipped_steps += 1;
                continue;
            }
            report.steps += 1;
            nll_sum += st.nll;
            kl_sum += st.kl;
            counted += 1;
        }
        if flow.params.iter().any(|v| !v.is_finite()) {
            return Err(FlowError::Diverged(format!(
                "non-finite parameters after epoch {epoch}"
            )));
        }
        let c = counted.max(1) as f64;
        if use_ml {
            report.train_nll.push(nll_sum / c);
        }
        if use_kl {
            report.kl_loss.push(kl_sum / c);
        }
        report.epochs_run = epoch + 1;
        if n_held > 0 {
            tr.ws.log_prob(flow, &held_x, 1.0, &mut held_lq)?;
            let h = -held_lq.iter().sum::<f64>() / n_held as f64;
            report.heldout_nll.push(h);
            if report.best_heldout_nll.is_none_or(|b| h < b) {
                report.best_heldout_nll = Some(h);
                report.best_epoch = Some(epoch);
                best_params = Some(flow.params.clone());
                wait = 0;
            } else {
                wait += 1;
                if wait >= params.patience {
                    report.stopped_early = true;
                    break;
                }
            }
        }
    }
    if let Some(b) = best_params {
        flow.params = b;
    }
    Ok(report)
}
