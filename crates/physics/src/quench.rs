//! Quench: FIRE minimisation (Bitzek, Bitzek, Koskinen, Gumbsch & Moseler, PRL 97,
//! 170201, 2006) of one sample or a whole batch to a local minimum.
//!
//! A batch is quenched in lockstep: every step gathers the still-active samples into one
//! batched energy call, so an external model (a process behind a pipe) answers one
//! request per step, not one per sample. Each sample keeps its own FIRE state (time step,
//! mixing parameter, velocity), so its trajectory is exactly the one a single-sample
//! quench would follow, and results do not depend on batch composition or thread count.
//!
//! The MD part follows the common semi-implicit Euler form of FIRE: the velocity is
//! mixed towards the force direction when power P = F·v > 0 (and reset when P ≤ 0),
//! then v += Δt F and x += Δt v, with the displacement capped at `max_step` in norm.
//! Convergence is the largest force component's absolute value below
//! `force_tolerance`.

use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::energy::EnergyModel;
use crate::error::{require, PhysicsError};

/// FIRE parameters; the defaults are those of Bitzek et al. (N_min = 5, f_inc = 1.1,
/// f_dec = 0.5, α_start = 0.1, f_α = 0.99) with time steps for reduced units.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct FireParams {
    /// Converged when every force component is below this in absolute value.
    pub force_tolerance: f64,
    /// Give up after this many steps (the sample is reported unconverged).
    pub max_steps: u64,
    /// Initial time step.
    pub dt_start: f64,
    /// Largest time step.
    pub dt_max: f64,
    /// Largest displacement norm of one step, which keeps stiff models stable.
    pub max_step: f64,
    /// Steps with P > 0 before the time step may grow.
    pub n_min: u64,
    /// Time-step growth factor.
    pub f_inc: f64,
    /// Time-step shrink factor on P ≤ 0.
    pub f_dec: f64,
    /// Initial velocity-mixing parameter α.
    pub alpha_start: f64,
    /// α decay factor.
    pub f_alpha: f64,
}

impl Default for FireParams {
    fn default() -> Self {
        FireParams {
            force_tolerance: 1e-6,
            max_steps: 20_000,
            dt_start: 0.01,
            dt_max: 0.1,
            max_step: 0.1,
            n_min: 5,
            f_inc: 1.1,
            f_dec: 0.5,
            alpha_start: 0.1,
            f_alpha: 0.99,
        }
    }
}

impl FireParams {
    /// Checks every parameter, naming the first bad one.
    pub fn validate(&self) -> Result<(), PhysicsError> {
        let pos = |v: f64| v.is_finite() && v > 0.0;
        require(
            pos(self.force_tolerance),
            "force_tolerance",
            "must be positive",
        )?;
        require(self.max_steps > 0, "max_steps", "must be positive")?;
        require(pos(self.dt_start), "dt_start", "must be positive")?;
        require(
            pos(self.dt_max) && self.dt_max >= self.dt_start,
            "dt_max",
            "must be at least dt_start",
        )?;
        require(pos(self.max_step), "max_step", "must be positive")?;
        require(
            self.f_inc.is_finite() && self.f_inc >= 1.0,
            "f_inc",
            "must be at least 1",
        )?;
        require(
            pos(self.f_dec) && self.f_dec < 1.0,
            "f_dec",
            "must be in (0, 1)",
        )?;
        require(
            pos(self.alpha_start) && self.alpha_start < 1.0,
            "alpha_start",
            "must be in (0, 1)",
        )?;
        require(
            pos(self.f_alpha) && self.f_alpha <= 1.0,
            "f_alpha",
            "must be in (0, 1]",
        )
    }
}

/// How a sample's quench ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum QuenchStatus {
    /// The largest force component fell below the tolerance.
    Converged,
    /// `max_steps` ran out first.
    MaxSteps,
    /// The energy or a force was not finite (e.g. overlapping particles); the sample's
    /// minimum is its last finite configuration.
    NonFinite,
}

/// The outcome of quenching one sample.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QuenchResult {
    /// The final configuration (the local minimum when converged).
    pub minimum: Vec<f64>,
    /// Its energy.
    pub energy: f64,
    /// Its largest absolute force component.
    pub max_force: f64,
    /// How the quench ended.
    pub status: QuenchStatus,
    /// FIRE steps taken.
    pub steps: u64,
    /// Energy-and-force evaluations spent (steps + 1).
    pub n_evals: u64,
}

impl QuenchResult {
    /// Whether the sample reached the force tolerance.
    pub fn converged(&self) -> bool {
        self.status == QuenchStatus::Converged
    }
}

/// The outcome of quenching a batch: flat arrays in the input's order.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QuenchBatch {
    /// Coordinates per configuration.
    pub dim: usize,
    /// Final configurations, `[n, dim]` row-major.
    pub minima: Vec<f64>,
    /// Final energies, `[n]`.
    pub energies: Vec<f64>,
    /// Final largest absolute force components, `[n]`.
    pub max_forces: Vec<f64>,
    /// How each quench ended, `[n]`.
    pub status: Vec<QuenchStatus>,
    /// FIRE steps per sample, `[n]`.
    pub steps: Vec<u64>,
    /// Energy evaluations per sample, `[n]`.
    pub n_evals_each: Vec<u64>,
    /// Total energy evaluations (configurations evaluated) for the whole batch.
    pub n_evals: u64,
}

impl QuenchBatch {
    /// Number of samples.
    pub fn len(&self) -> usize {
        self.energies.len()
    }

    /// Whether the batch is empty.
    pub fn is_empty(&self) -> bool {
        self.energies.is_empty()
    }

    /// The final configuration of sample `i`.
    pub fn minimum(&self, i: usize) -> &[f64] {
        &self.minima[i * self.dim..(i + 1) * self.dim]
    }

    /// Sample `i` as a [`QuenchResult`].
    pub fn result(&self, i: usize) -> QuenchResult {
        QuenchResult {
            minimum: self.minimum(i).to_vec(),
            energy: self.energies[i],
            max_force: self.max_forces[i],
            status: self.status[i],
            steps: self.steps[i],
            n_evals: self.n_evals_each[i],
        }
    }
}

/// One sample's FIRE state.
#[derive(Debug, Clone)]
struct Fire {
    x: Vec<f64>,
    v: Vec<f64>,
    f: Vec<f64>,
    energy: f64,
    dt: f64,
    alpha: f64,
    n_positive: u64,
    steps: u64,
    n_evals: u64,
    status: Option<QuenchStatus>,
    last_good: Option<(Vec<f64>, f64, Vec<f64>)>,
}

/// Largest absolute component of a vector.
fn max_abs(v: &[f64]) -> f64 {
    v.iter().fold(0.0f64, |m, a| m.max(a.abs()))
}

impl Fire {
    fn new(x: &[f64], p: &FireParams) -> Fire {
        Fire {
            x: x.to_vec(),
            v: vec![0.0; x.len()],
            f: vec![0.0; x.len()],
            energy: f64::NAN,
            dt: p.dt_start,
            alpha: p.alpha_start,
            n_positive: 0,
            steps: 0,
            n_evals: 0,
            status: None,
            last_good: None,
        }
    }

    /// Takes the freshly evaluated energy and forces at `x`; decides whether the sample
    /// is done, and otherwise moves it one FIRE step.
    fn advance(&mut self, p: &FireParams) {
        self.n_evals += 1;
        let finite = self.energy.is_finite() && self.f.iter().all(|v| v.is_finite());
        if !finite {
            self.status = Some(QuenchStatus::NonFinite);
            if let Some((x, e, f)) = self.last_good.take() {
                self.x = x;
                self.energy = e;
                self.f = f;
            }
            return;
        }
        if max_abs(&self.f) < p.force_tolerance {
            self.status = Some(QuenchStatus::Converged);
            return;
        }
        if self.steps >= p.max_steps {
            self.status = Some(QuenchStatus::MaxSteps);
            return;
        }
        self.last_good = Some((self.x.clone(), self.energy, self.f.clone()));
        self.step(p);
    }

    /// One FIRE step from the current forces (Bitzek et al. 2006, with Euler MD).
    fn step(&mut self, p: &FireParams) {
        let power: f64 = self.f.iter().zip(&self.v).map(|(f, v)| f * v).sum();
        if power > 0.0 {
            let v_norm = self.v.iter().map(|v| v * v).sum::<f64>().sqrt();
            let f_norm = self.f.iter().map(|f| f * f).sum::<f64>().sqrt();
            let mix = self.alpha * v_norm / f_norm;
            for (v, f) in self.v.iter_mut().zip(&self.f) {
                *v = (1.0 - self.alpha) * *v + mix * f;
            }
            if self.n_positive > p.n_min {
                self.dt = (self.dt * p.f_inc).min(p.dt_max);
                self.alpha *= p.f_alpha;
            }
            self.n_positive += 1;
        } else {
            self.v.iter_mut().for_each(|v| *v = 0.0);
            self.alpha = p.alpha_start;
            self.dt *= p.f_dec;
            self.n_positive = 0;
        }
        for (v, f) in self.v.iter_mut().zip(&self.f) {
            *v += self.dt * f;
        }
        let step_norm = self.dt * self.v.iter().map(|v| v * v).sum::<f64>().sqrt();
        let scale = if step_norm > p.max_step {
            p.max_step / step_norm
        } else {
            1.0
        };
        for (x, v) in self.x.iter_mut().zip(&self.v) {
            *x += scale * self.dt * v;
        }
        self.steps += 1;
    }
}

/// Quenches one configuration to its local minimum with FIRE.
pub fn quench(
    model: &dyn EnergyModel,
    x0: &[f64],
    params: &FireParams,
) -> Result<QuenchResult, PhysicsError> {
    Ok(quench_batch(model, x0, params)?.result(0))
}

/// Quenches every configuration of a `[n, dim]` batch in lockstep (one batched energy
/// call per step over the samples still moving). Per-sample results do not depend on
/// the batch they were quenched in.
pub fn quench_batch(
    model: &dyn EnergyModel,
    x: &[f64],
    params: &FireParams,
) -> Result<QuenchBatch, PhysicsError> {
    params.validate()?;
    let dim = model.dim();
    if dim == 0 || !x.len().is_multiple_of(dim) {
        return Err(PhysicsError::StartShape { dim, got: x.len() });
    }
    let n = x.len() / dim;
    let mut states: Vec<Fire> = x.chunks(dim).map(|xi| Fire::new(xi, params)).collect();
    let mut active: Vec<usize> = (0..n).collect();
    let mut xs = Vec::with_capacity(n * dim);
    let mut es = vec![0.0; n];
    let mut fs = vec![0.0; n * dim];
    let mut n_evals = 0u64;
    while !active.is_empty() {
        xs.clear();
        for &i in &active {
            xs.extend_from_slice(&states[i].x);
        }
        let m = active.len();
        model.evaluate(&xs, &mut es[..m], Some(&mut fs[..m * dim]))?;
        n_evals += m as u64;
        for (k, &i) in active.iter().enumerate() {
            let s = &mut states[i];
            s.energy = es[k];
            s.f.copy_from_slice(&fs[k * dim..(k + 1) * dim]);
        }
        // Each sample's update touches only its own state, so the parallel map is
        // deterministic.
        let mut moving: Vec<&mut Fire> = states.iter_mut().filter(|s| s.status.is_none()).collect();
        moving
            .par_iter_mut()
            .with_min_len(64)
            .for_each(|s| s.advance(params));
        active.retain(|&i| states[i].status.is_none());
    }
    let mut out = QuenchBatch {
        dim,
        minima: Vec::with_capacity(n * dim),
        energies: Vec::with_capacity(n),
        max_forces: Vec::with_capacity(n),
        status: Vec::with_capacity(n),
        steps: Vec::with_capacity(n),
        n_evals_each: Vec::with_capacity(n),
        n_evals,
    };
    for s in states {
        out.minima.extend_from_slice(&s.x);
        out.energies.push(s.energy);
        out.max_forces.push(max_abs(&s.f));
        out.status.push(s.status.unwrap_or(QuenchStatus::MaxSteps));
        out.steps.push(s.steps);
        out.n_evals_each.push(s.n_evals);
    }
    Ok(out)
}
