//! Training a layer stack: maximum likelihood on (optionally weighted) samples, the
//! reverse KL with the energy at one or several temperature factors, or their mix;
//! Adam on mini-batches with global gradient-norm clipping, a held-out NLL per epoch
//! and early stopping on it. The settings are the RealNVP trainer's [`TrainParams`].
//!
//! Weighted maximum likelihood: with per-sample weights w_i (e.g. exp(−Δu) for frames
//! drawn at a higher temperature or from a biased explorer), the loss is
//! Σ w_i (−log q(x_i)) / Σ w_i over each batch, which estimates the cross-entropy to the
//! target distribution instead of to the sampling one.
//!
//! Determinism: one ChaCha8 stream seeded by `seed`; each batch is cut into fixed
//! chunks of rows whose gradients are summed in chunk order, so the same seed gives
//! the same bytes at any thread count.

use super::{StackFlow, StackTape};
use crate::real::Real;
use crate::train::{TrainParams, TrainReport};
use crate::workspace::regularise_energy;
use crate::FlowError;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use rayon::prelude::*;
use tarn_physics::EnergyModel;

/// Rows per chunk of a batch (the unit of parallel work and of gradient summation).
const CHUNK: usize = 32;

/// Buffers reused across steps.
struct Scratch<T> {
    tapes: Vec<StackTape<T>>,
    grads: Vec<Vec<T>>,
    g: Vec<T>,
    m: Vec<f64>,
    v: Vec<f64>,
    t: i32,
}

impl<T: Real> Scratch<T> {
    fn new(n_params: usize, max_rows: usize) -> Self {
        let chunks = max_rows.div_ceil(CHUNK);
        Scratch {
            tapes: (0..chunks).map(|_| StackTape::default()).collect(),
            grads: vec![vec![T::zero(); n_params]; chunks],
            g: vec![T::zero(); n_params],
            m: vec![0.0; n_params],
            v: vec![0.0; n_params],
            t: 0,
        }
    }

    /// Sums the first `chunks` chunk gradients into `g` (in chunk order) with weight `w`,
    /// adding to what `g` holds when `add`.
    fn reduce(&mut self, chunks: usize, w: f64, add: bool) {
        let w = T::of(w);
        if !add {
            self.g.fill(T::zero());
        }
        for c in 0..chunks {
            for (a, &b) in self.g.iter_mut().zip(&self.grads[c]) {
                *a += w * b;
            }
        }
    }
}

/// Negative log-likelihood of weighted rows `x` ([n, D]) and, with `grad`, its gradient
/// summed per chunk into the scratch's chunk gradients. Returns Σ w_i nll_i / Σ w_i.
fn nll_pass<T: Real>(
    flow: &StackFlow<T>,
    x: &[f64],
    w: &[f64],
    s: &mut Scratch<T>,
    grad: bool,
) -> f64 {
    let d = flow.dim();
    let n = w.len();
    let wsum: f64 = w.iter().sum();
    let norm = 0.5 * d as f64 * (2.0 * std::f64::consts::PI).ln();
    let chunks = n.div_ceil(CHUNK);
    let parts: Vec<f64> = s.tapes[..chunks]
        .par_iter_mut()
        .zip(s.grads[..chunks].par_iter_mut())
        .enumerate()
        .map(|(c, (tape, gp))| {
            let (a, b) = (c * CHUNK, ((c + 1) * CHUNK).min(n));
            let mut z: Vec<T> = x[a * d..b * d].iter().map(|&v| T::of(v)).collect();
            let mut ld = vec![T::zero(); b - a];
            flow.invert(&mut z, &mut ld, tape, grad);
            let mut loss = 0.0;
            let mut g_ld = vec![T::zero(); b - a];
            for i in 0..b - a {
                let zi = &mut z[i * d..(i + 1) * d];
                let zz: f64 = zi.iter().map(|v| v.to64().powi(2)).sum();
                let wi = w[a + i] / wsum;
                loss += wi * (0.5 * zz + norm - ld[i].to64());
                for v in zi.iter_mut() {
                    *v *= T::of(wi);
                }
                g_ld[i] = T::of(-wi);
            }
            if grad {
                gp.fill(T::zero());
                flow.invert_backward(&mut z, &g_ld, gp, tape);
            }
            loss
        })
        .collect();
    parts.iter().sum()
}

/// Reverse-KL loss mean_z[ρ(u(f(z))) − log|det ∂f/∂z|] at temperature factor `tau`
/// for latent rows `z`, and its gradient in the chunk gradients. Returns (loss,
/// rows with a non-finite energy or force).
fn kl_pass<T: Real>(
    flow: &StackFlow<T>,
    z: &[f64],
    energy: &dyn EnergyModel,
    kt: f64,
    tau: f64,
    cutoff: f64,
    s: &mut Scratch<T>,
) -> Result<(f64, u64), FlowError> {
    let d = flow.dim();
    let n = z.len() / d;
    let chunks = n.div_ceil(CHUNK);
    let gen: Vec<(Vec<T>, Vec<T>)> = s.tapes[..chunks]
        .par_iter_mut()
        .enumerate()
        .map(|(c, tape)| {
            let (a, b) = (c * CHUNK, ((c + 1) * CHUNK).min(n));
            let mut x: Vec<T> = z[a * d..b * d].iter().map(|&v| T::of(v)).collect();
            let mut ld = vec![T::zero(); b - a];
            flow.generate(&mut x, &mut ld, tape, true);
            (x, ld)
        })
        .collect();
    let x: Vec<f64> = gen
        .iter()
        .flat_map(|(x, _)| x.iter().map(|v| v.to64()))
        .collect();
    let mut e = vec![0.0; n];
    let mut f = vec![0.0; n * d];
    energy.evaluate(&x, &mut e, Some(&mut f))?;
    let beta = 1.0 / (kt * tau);
    let mut loss = 0.0;
    let mut bad = 0u64;
    let mut n_ok = 0usize;
    let mut g_x = vec![0.0; n * d];
    for i in 0..n {
        let u = e[i] * beta;
        let fi = &f[i * d..(i + 1) * d];
        if !u.is_finite() || fi.iter().any(|v| !v.is_finite()) {
            bad += 1;
            continue;
        }
        let (rho, drho) = regularise_energy(u, cutoff);
        let ld = gen[i / CHUNK].1[i % CHUNK].to64();
        loss += rho - ld;
        n_ok += 1;
        for (g, &fv) in g_x[i * d..(i + 1) * d].iter_mut().zip(fi) {
            *g = -drho * fv * beta / n as f64;
        }
    }
    s.tapes[..chunks]
        .par_iter_mut()
        .zip(s.grads[..chunks].par_iter_mut())
        .enumerate()
        .for_each(|(c, (tape, gp))| {
            let (a, b) = (c * CHUNK, ((c + 1) * CHUNK).min(n));
            let mut g: Vec<T> = g_x[a * d..b * d].iter().map(|&v| T::of(v)).collect();
            let g_ld = vec![T::of(-1.0 / n as f64); b - a];
            gp.fill(T::zero());
            flow.generate_backward(&mut g, &g_ld, gp, tape);
        });
    Ok((loss / n_ok.max(1) as f64, bad))
}

/// One Adam step with the gradient in `s.g`, clipped to a global norm of `clip` (0: no
/// clip). Returns false (and changes nothing) when the gradient is not finite.
fn adam_step<T: Real>(params: &mut [T], p: &TrainParams, lr: f64, s: &mut Scratch<T>) -> bool {
    let norm = s.g.iter().map(|v| v.to64().powi(2)).sum::<f64>().sqrt();
    if !norm.is_finite() {
        return false;
    }
    let scale = if p.grad_clip > 0.0 && norm > p.grad_clip {
        p.grad_clip / norm
    } else {
        1.0
    };
    s.t += 1;
    let (b1, b2) = (p.adam_beta1, p.adam_beta2);
    let lr_t = lr * (1.0 - b2.powi(s.t)).sqrt() / (1.0 - b1.powi(s.t));
    for (((w, g), m), v) in params.iter_mut().zip(&s.g).zip(&mut s.m).zip(&mut s.v) {
        let g = g.to64() * scale;
        *m = b1 * *m + (1.0 - b1) * g;
        *v = b2 * *v + (1.0 - b2) * g * g;
        *w = T::of(w.to64() - lr_t * *m / (v.sqrt() + p.adam_eps));
    }
    true
}

/// Trains `flow` in place on `data` ([n, D], may be empty) with per-sample `weights`
/// (None: all equal) and/or the reverse KL with `energy`. With a held-out set, the flow
/// ends with the parameters of the best held-out NLL.
pub fn train<T: Real>(
    flow: &mut StackFlow<T>,
    data: &[f64],
    weights: Option<&[f64]>,
    energy: Option<&dyn EnergyModel>,
    p: &TrainParams,
    seed: u64,
) -> Result<TrainReport, FlowError> {
    p.validate()?;
    let d = flow.dim();
    if !data.len().is_multiple_of(d) {
        return Err(FlowError::Shape {
            what: "training data",
            expected: d,
            got: data.len(),
        });
    }
    let n = data.len() / d;
    let w_all: Vec<f64> = match weights {
        Some(w) if w.len() != n => {
            return Err(FlowError::Shape {
                what: "sample weights",
                expected: n,
                got: w.len(),
            })
        }
        Some(w)
            if w.iter().any(|v| !(v.is_finite() && *v >= 0.0)) || w.iter().sum::<f64>() <= 0.0 =>
        {
            return Err(FlowError::Params(
                "sample weights must be finite, non-negative and not all zero".into(),
            ))
        }
        Some(w) => w.to_vec(),
        None => vec![1.0; n],
    };
    let use_ml = n > 0 && p.w_ml > 0.0;
    let use_kl = energy.is_some() && p.w_kl > 0.0;
    if !use_ml && !use_kl {
        return Err(FlowError::Params(
            "training needs samples (with w_ml > 0) or an energy (with w_kl > 0)".into(),
        ));
    }
    if let Some(e) = energy {
        if e.dim() != d {
            return Err(FlowError::Shape {
                what: "energy model dimension",
                expected: d,
                got: e.dim(),
            });
        }
    }
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(p.threads)
        .build()
        .map_err(|e| FlowError::Threads(e.to_string()))?;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    // Held-out split.
    let mut order: Vec<usize> = (0..n).collect();
    order.shuffle(&mut rng);
    let n_held = if use_ml && n >= 10 {
        ((n as f64) * p.held_out_fraction).round() as usize
    } else {
        0
    };
    let (held, train_idx) = order.split_at(n_held);
    let pick = |idx: &[usize]| -> (Vec<f64>, Vec<f64>) {
        let mut x = Vec::with_capacity(idx.len() * d);
        let mut w = Vec::with_capacity(idx.len());
        for &i in idx {
            x.extend_from_slice(&data[i * d..(i + 1) * d]);
            w.push(w_all[i]);
        }
        (x, w)
    };
    let (x_held, w_held) = pick(held);
    let mut train_idx = train_idx.to_vec();
    let steps = if p.steps_per_epoch > 0 {
        p.steps_per_epoch
    } else if use_ml {
        train_idx.len().div_ceil(p.batch_size).max(1)
    } else {
        return Err(FlowError::Params(
            "steps_per_epoch must be > 0 when training on the energy alone".into(),
        ));
    };
    let mut report = TrainReport {
        n_train: train_idx.len(),
        n_heldout: n_held,
        ..Default::default()
    };
    let rows = p.batch_size.max(p.kl_batch_size).max(n_held);
    let mut s = Scratch::<T>::new(flow.n_params(), rows);
    let mut best: Option<(f64, Vec<T>)> = None;
    let mut since_best = 0;
    let mut cursor = train_idx.len();
    let planned = p.max_epochs * steps;
    pool.install(|| -> Result<(), FlowError> {
        for epoch in 0..p.max_epochs {
            let (mut nll_sum, mut kl_sum) = (0.0, 0.0);
            for step in 0..steps {
                let mut have = false;
                if use_ml {
                    let mut idx = Vec::with_capacity(p.batch_size);
                    while idx.len() < p.batch_size.min(train_idx.len()) {
                        if cursor >= train_idx.len() {
                            train_idx.shuffle(&mut rng);
                            cursor = 0;
                        }
                        idx.push(train_idx[cursor]);
                        cursor += 1;
                    }
                    let (xb, wb) = pick(&idx);
                    nll_sum += nll_pass(flow, &xb, &wb, &mut s, true);
                    s.reduce(idx.len().div_ceil(CHUNK), p.w_ml, false);
                    have = true;
                }
                if let (true, Some(e)) = (use_kl, energy) {
                    let nt = p.temperature_factors.len() as f64;
                    for &tau in &p.temperature_factors {
                        let sd = tau.sqrt();
                        let z: Vec<f64> = (0..p.kl_batch_size * d)
                            .map(|_| sd * rng.sample::<f64, _>(StandardNormal))
                            .collect();
                        let (loss, bad) = kl_pass(flow, &z, e, p.kt, tau, p.energy_cutoff, &mut s)?;
                        kl_sum += loss / nt;
                        report.energy_evaluations += p.kl_batch_size as u64;
                        report.nonfinite_energies += bad;
                        s.reduce(p.kl_batch_size.div_ceil(CHUNK), p.w_kl / nt, have);
                        have = true;
                    }
                }
                let lr = p.learning_rate_at(epoch * steps + step, planned);
                if !adam_step(&mut flow.params, p, lr, &mut s) {
                    report.skipped_steps += 1;
                }
                report.steps += 1;
            }
            if use_ml {
                report.train_nll.push(nll_sum / steps as f64);
            }
            if use_kl {
                report.kl_loss.push(kl_sum / steps as f64);
            }
            report.epochs_run = epoch + 1;
            if n_held > 0 {
                let h = nll_pass(flow, &x_held, &w_held, &mut s, false);
                if !h.is_finite() {
                    return Err(FlowError::Diverged(format!(
                        "held-out NLL is {h} after epoch {epoch}"
                    )));
                }
                report.heldout_nll.push(h);
                if best.as_ref().is_none_or(|(b, _)| h < *b) {
                    best = Some((h, flow.params.clone()));
                    report.best_epoch = Some(epoch);
                    since_best = 0;
                } else {
                    since_best += 1;
                    if since_best >= p.patience {
                        report.stopped_early = true;
                        break;
                    }
                }
            }
        }
        Ok(())
    })?;
    if let Some((h, params)) = best {
        flow.params = params;
        report.best_heldout_nll = Some(h);
    }
    if flow.params.iter().any(|v| !v.is_finite()) {
        return Err(FlowError::Diverged(
            "non-finite parameters after training".into(),
        ));
    }
    Ok(report)
}
