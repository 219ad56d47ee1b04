//! Built-in workers around the flow: `realnvp` (retrain), `latent-metropolis` and
//! `generate` (explore). Thin adapters over the flow crate.
//!
//! Parameters of `realnvp` come in two tables, `[retrain.params.flow]` (the
//! architecture: `n_layers`, `hidden_width`, `hidden_layers`, `activation`, `clamp`,
//! `whiten`, `permutation_seed`) and `[retrain.params.train]` (the training settings;
//! `kt` and `threads` come from the campaign). For clusters the flow works in the
//! centre-of-mass frame, so translation is removed exactly.

use serde::Deserialize;

use super::{Output, Task};
use crate::flow::stack::{train::train as train_stack, StackFlow, StackSpec};
use crate::flow::{train, AnyFlow, Flow, FlowSpec, FrameSpec, LatentMcParams, TrainParams};
use crate::physics::SystemSpec;
use crate::protocol::Array;

/// Parameters of the `realnvp` kind.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RetrainParams {
    flow: serde_json::Map<String, serde_json::Value>,
    train: serde_json::Map<String, serde_json::Value>,
}

/// The architecture for this system from the stage's `flow` table.
fn flow_spec(
    system: &SystemSpec,
    dim: usize,
    table: &serde_json::Map<String, serde_json::Value>,
) -> Result<FlowSpec, String> {
    for fixed in ["data_dim", "frame"] {
        if table.contains_key(fixed) {
            return Err(format!(
                "params.flow.{fixed} is set by tarn from the system; remove it"
            ));
        }
    }
    let mut t = table.clone();
    t.insert("data_dim".into(), dim.into());
    let frame = match system.particle_dims() {
        Some(d) => FrameSpec::CentreOfMass {
            n_particles: dim / d,
            spatial_dim: d,
        },
        None => FrameSpec::Identity,
    };
    t.insert(
        "frame".into(),
        serde_json::to_value(frame).map_err(|e| e.to_string())?,
    );
    serde_json::from_value(serde_json::Value::Object(t)).map_err(|e| format!("params.flow: {e}"))
}

/// The layer-stack architecture from a stage's `flow` table that has a `layers` list:
/// tarn sets the dimension and, for lattice systems, the lattice side.
fn stack_spec(
    system: &SystemSpec,
    dim: usize,
    table: &serde_json::Map<String, serde_json::Value>,
) -> Result<StackSpec, String> {
    for fixed in ["data_dim", "lattice_side"] {
        if table.contains_key(fixed) {
            return Err(format!(
                "params.flow.{fixed} is set by tarn from the system; remove it"
            ));
        }
    }
    // Each layer on its own first, so that an error names the entry and key
    // (`flow.layers[1]: unknown field ...`).
    if let Some(layers) = table.get("layers").and_then(|v| v.as_array()) {
        for (i, l) in layers.iter().enumerate() {
            serde_json::from_value::<crate::flow::stack::LayerSpec>(l.clone())
                .map_err(|e| format!("flow.layers[{i}]: {e}"))?;
        }
    }
    let mut t = table.clone();
    t.insert("data_dim".into(), dim.into());
    if let SystemSpec::Phi4 { size, .. } = system {
        t.insert("lattice_side".into(), (*size).into());
    }
    let spec: StackSpec =
        serde_json::from_value(serde_json::Value::Object(t)).map_err(|e| format!("flow: {e}"))?;
    spec.validate().map_err(|e| match e {
        crate::flow::FlowError::Spec(m) if m.starts_with("layers[") => format!("flow.{m}"),
        other => format!("flow: {other}"),
    })?;
    Ok(spec)
}

/// Whether a stage's `flow` table describes a layer stack (it has a `layers` list).
fn is_stack(table: &serde_json::Map<String, serde_json::Value>) -> bool {
    table.contains_key("layers")
}

/// The training settings, with the campaign's kT and the task's thread count.
fn train_params(
    kt: f64,
    threads: u32,
    table: &serde_json::Map<String, serde_json::Value>,
) -> Result<TrainParams, String> {
    for fixed in ["kt", "threads"] {
        if table.contains_key(fixed) {
            return Err(format!("params.train.{fixed} comes from the campaign (kT, executor.threads_per_task); remove it"));
        }
    }
    let mut t = table.clone();
    t.insert("kt".into(), kt.into());
    t.insert("threads".into(), threads.into());
    serde_json::from_value(serde_json::Value::Object(t)).map_err(|e| format!("params.train: {e}"))
}

/// Checks `realnvp` parameters without training (for `tarn check`).
pub fn check_retrain(
    system: &SystemSpec,
    dim: usize,
    kt: f64,
    params: &serde_json::Value,
) -> Result<(), String> {
    let p: RetrainParams = serde_json::from_value(params.clone()).map_err(|e| e.to_string())?;
    if is_stack(&p.flow) {
        stack_spec(system, dim, &p.flow)?;
    } else {
        flow_spec(system, dim, &p.flow)?
            .validate()
            .map_err(|e| format!("params.flow: {e}"))?;
    }
    train_params(kt, 1, &p.train)?
        .validate()
        .map_err(|e| format!("params.train: {e}"))
}

/// Checks `generate` parameters (for `tarn check`).
pub fn check_generate(params: &serde_json::Value) -> Result<(), String> {
    serde_json::from_value::<GenerateParams>(params.clone())
        .map(|_| ())
        .map_err(|e| e.to_string())
}

/// The task's current flow model, if it was handed one.
pub(super) fn current_model(task: &Task) -> Result<Option<AnyFlow>, String> {
    match &task.file.model {
        Some(rel) => {
            let bytes = std::fs::read(task.dir.join(rel)).map_err(|e| format!("{rel}: {e}"))?;
            AnyFlow::from_safetensors(&bytes)
                .map(Some)
                .map_err(|e| format!("{rel}: {e}"))
        }
        None => Ok(None),
    }
}

/// The `realnvp` kind: fit the flow to the pooled samples (and the energy, with
/// `w_kl > 0`), warm-started from the previous round's model when its architecture
/// is unchanged.
pub fn retrain(task: &Task) -> Result<Output, String> {
    let p: RetrainParams = task.params()?;
    let (system, model) = task.model()?;
    let dim = model.dim();
    let tp = train_params(task.file.kt, task.file.threads, &p.train)?;
    let data = task.input("train")?;
    let previous = current_model(task)?;
    let energy = (tp.w_kl > 0.0).then_some(model.as_ref());
    let (report, trained, warm) = if is_stack(&p.flow) {
        let spec = stack_spec(&system, dim, &p.flow)?;
        let (mut flow, warm) = match previous {
            Some(AnyFlow::Stack(f)) if f.spec() == &spec => (f, true),
            _ => (
                StackFlow::<f32>::new(spec, task.file.seed).map_err(|e| e.to_string())?,
                false,
            ),
        };
        let report = train_stack(&mut flow, &data.data, None, energy, &tp, task.file.seed)
            .map_err(|e| format!("training: {e}"))?;
        (report, AnyFlow::Stack(flow), warm)
    } else {
        let spec = flow_spec(&system, dim, &p.flow)?;
        let (mut flow, warm) = match previous {
            Some(AnyFlow::RealNvp(f)) if f.spec() == &spec => (f, true),
            _ => (
                Flow::<f32>::new(
                    spec,
                    (data.rows() > 0).then_some(&data.data[..]),
                    task.file.seed,
                )
                .map_err(|e| e.to_string())?,
                false,
            ),
        };
        let report = train(&mut flow, &data.data, energy, &tp, task.file.seed)
            .map_err(|e| format!("training: {e}"))?;
        (report, AnyFlow::RealNvp(flow), warm)
    };
    let mut out = Output {
        energy_evals: report.energy_evaluations,
        model: Some(trained.to_safetensors().map_err(|e| e.to_string())?),
        ..Default::default()
    };
    if tp.w_kl > 0.0 {
        steering_ess(task, &trained, model.as_ref(), &tp, &mut out)?;
    }
    let last = |v: &[f64]| v.last().copied();
    out.metrics
        .insert("warm_start".into(), Some(if warm { 1.0 } else { 0.0 }));
    out.metrics
        .insert("epochs".into(), Some(report.epochs_run as f64));
    out.metrics
        .insert("train_nll".into(), last(&report.train_nll));
    out.metrics.insert("kl_loss".into(), last(&report.kl_loss));
    out.metrics
        .insert("heldout_nll".into(), report.best_heldout_nll);
    out.metrics
        .insert("n_train".into(), Some(report.n_train as f64));
    out.metrics.insert(
        "nonfinite_energies".into(),
        Some(report.nonfinite_energies as f64),
    );
    Ok(out)
}

/// Draws per temperature factor for [`steering_ess`].
const STEERING_DRAWS: usize = 1000;

/// The Kish ESS fraction of generation at every temperature factor the flow was trained
/// for (metrics `ess_fraction_at_tau_T`): latent scaling by τ is exact only for
/// volume-preserving flows, so these figures say how far temperature steering can be
/// trusted. The draws are charged to the task.
fn steering_ess(
    task: &Task,
    flow: &AnyFlow,
    model: &dyn crate::physics::EnergyModel,
    tp: &TrainParams,
    out: &mut Output,
) -> Result<(), String> {
    for (i, &tau) in tp.temperature_factors.iter().enumerate() {
        let g = flow
            .generate(
                model,
                STEERING_DRAWS,
                task.file.kt,
                tau,
                task.file.threads as usize,
                task.file.seed ^ (0xA5A5 + i as u64),
            )
            .map_err(|e| format!("generation at temperature factor {tau}: {e}"))?;
        out.energy_evals += g.energy_evaluations;
        let frac = crate::stats::ess_fraction(&g.log_weight).ok();
        out.metrics
            .insert(format!("ess_fraction_at_tau_{tau}"), frac);
    }
    Ok(())
}

/// The `latent-metropolis` kind: Metropolis steps in the flow's latent space, exact for
/// the Boltzmann distribution of x. Before the first model exists it hands back no
/// samples (metric `no_model = 1`): pair it with a configuration-space explorer.
pub fn latent(task: &Task) -> Result<Output, String> {
    let mut p: LatentMcParams = task.params()?;
    p.threads = task.file.threads as usize;
    let (_, model) = task.model()?;
    let dim = model.dim();
    let Some(flow) = current_model(task)? else {
        return Ok(empty(dim));
    };
    let start = task.input("start")?;
    let run = flow
        .latent_metropolis(
            model.as_ref(),
            &p,
            task.file.kt,
            Some(&start.data),
            task.file.seed,
        )
        .map_err(|e| format!("latent Metropolis: {e}"))?;
    let scale = task.file.kt * p.temperature_factor;
    let n = run.reduced_energy.len();
    let mut out = Output {
        energy_evals: run.energy_evaluations,
        ..Default::default()
    };
    out.arrays
        .insert("samples".into(), Array::matrix(n, dim, run.x));
    out.arrays.insert(
        "energies".into(),
        Array::vector(run.reduced_energy.iter().map(|u| u * scale).collect()),
    );
    out.metrics
        .insert("acceptance".into(), Some(run.acceptance_rate));
    out.metrics.insert("sigma".into(), Some(run.sigma));
    Ok(out)
}

fn empty(dim: usize) -> Output {
    let mut out = Output::default();
    out.arrays
        .insert("samples".into(), Array::matrix(0, dim, vec![]));
    out.arrays.insert("energies".into(), Array::vector(vec![]));
    out.metrics.insert("no_model".into(), Some(1.0));
    out
}

/// Parameters of the `generate` kind.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct GenerateParams {
    /// Independent samples to draw.
    n_samples: usize,
    /// Temperature factor of the latent distribution.
    temperature_factor: f64,
}

impl Default for GenerateParams {
    fn default() -> Self {
        GenerateParams {
            n_samples: 1000,
            temperature_factor: 1.0,
        }
    }
}

/// The `generate` kind: independent samples from the flow, with log importance weights
/// to the campaign's temperature (−E/kT − log q). Samples whose energy is not finite
/// are dropped (and counted).
pub fn generate(task: &Task) -> Result<Output, String> {
    let p: GenerateParams = task.params()?;
    let (_, model) = task.model()?;
    let dim = model.dim();
    let Some(flow) = current_model(task)? else {
        return Ok(empty(dim));
    };
    let g = flow
        .generate(
            model.as_ref(),
            p.n_samples,
            task.file.kt,
            p.temperature_factor,
            task.file.threads as usize,
            task.file.seed,
        )
        .map_err(|e| format!("generate: {e}"))?;
    let scale = task.file.kt * p.temperature_factor;
    let (mut xs, mut es, mut lw) = (Vec::new(), Vec::new(), Vec::new());
    let mut dropped = 0u64;
    for i in 0..g.log_q.len() {
        let e = g.reduced_energy[i] * scale;
        if !e.is_finite() {
            dropped += 1;
            continue;
        }
        xs.extend_from_slice(&g.x[i * dim..(i + 1) * dim]);
        es.push(e);
        lw.push(-e / task.file.kt - g.log_q[i]);
    }
    let n = es.len();
    let mut out = Output {
        energy_evals: g.energy_evaluations,
        ..Default::default()
    };
    out.arrays
        .insert("samples".into(), Array::matrix(n, dim, xs));
    out.arrays.insert("energies".into(), Array::vector(es));
    out.arrays.insert("log_weights".into(), Array::vector(lw));
    out.metrics
        .insert("dropped_nonfinite".into(), Some(dropped as f64));
    Ok(out)
}
