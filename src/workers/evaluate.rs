//! The `reweight` evaluate worker: draw independent samples from the current flow,
//! reweight them to the Boltzmann distribution at the campaign's kT, assign each to a
//! state, and estimate state free energies with bootstrap error bars.
//!
//! States are assigned by quench (FIRE to the local minimum, then the catalogue's
//! energy-and-fingerprint match), not by the nearest catalogue entry: a basin is the set
//! of points that flow downhill to its minimum, so quenching is the definition itself,
//! while nearness to a minimum is not (a point near the barrier can be closer to the
//! wrong minimum). Samples whose quench does not converge, or that land in a minimum
//! the catalogue does not hold, count as unassigned; their weight share is reported.

use serde::Deserialize;

use super::{rng, Output, Task};
use crate::flow::{generate, Flow};
use crate::physics::fingerprint::{assign, Fingerprint, StateTolerance};
use crate::physics::quench::{quench_batch, FireParams, QuenchStatus};
use crate::protocol::Array;
use crate::stats::{log_partition_estimate, state_free_energies, BootstrapOptions};

/// Parameters of the `reweight` kind.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct ReweightParams {
    /// Independent samples drawn from the flow.
    n_samples: usize,
    /// Bootstrap replicates for the error bars.
    bootstrap: usize,
    /// Quench and state-matching settings, as for the `quench` dedup kind.
    force_tolerance: f64,
    max_steps: u64,
    energy_tolerance: f64,
    fingerprint_tolerance: f64,
}

impl Default for ReweightParams {
    fn default() -> Self {
        let tol = StateTolerance::default();
        let fire = FireParams::default();
        ReweightParams {
            n_samples: 2000,
            bootstrap: 400,
            force_tolerance: fire.force_tolerance,
            max_steps: fire.max_steps,
            energy_tolerance: tol.energy,
            fingerprint_tolerance: tol.fingerprint,
        }
    }
}

/// Runs the `reweight` kind.
pub fn reweight(task: &Task) -> Result<Output, String> {
    let p: ReweightParams = task.params()?;
    let (spec, model) = task.model()?;
    let dim = model.dim();
    let catalogue = task.input("catalogue")?;
    let cat_e = task.input("catalogue_energies")?;
    let k = catalogue.rows();
    let mut out = Output::default();
    let Some(rel) = &task.file.model else {
        out.metrics.insert("no_model".into(), Some(1.0));
        return Ok(out);
    };
    let bytes = std::fs::read(task.dir.join(rel)).map_err(|e| format!("{rel}: {e}"))?;
    let flow = Flow::<f32>::from_safetensors(&bytes).map_err(|e| format!("{rel}: {e}"))?;
    let g = generate(
        &flow,
        model.as_ref(),
        p.n_samples,
        task.file.kt,
        1.0,
        task.file.threads as usize,
        task.file.seed,
    )
    .map_err(|e| format!("generate: {e}"))?;
    let finite: Vec<usize> = (0..g.log_weight.len())
        .filter(|&i| g.log_weight[i].is_finite())
        .collect();
    let xs: Vec<f64> = finite
        .iter()
        .flat_map(|&i| g.x[i * dim..(i + 1) * dim].iter().copied())
        .collect();
    let fire = FireParams {
        force_tolerance: p.force_tolerance,
        max_steps: p.max_steps,
        ..FireParams::default()
    };
    let q = quench_batch(model.as_ref(), &xs, &fire).map_err(|e| format!("quench: {e}"))?;
    let fp = Fingerprint::for_system(&spec);
    let known: Vec<(f64, Vec<f64>)> = (0..k)
        .map(|i| {
            (
                cat_e.data[i],
                fp.compute(&catalogue.data[i * dim..(i + 1) * dim]),
            )
        })
        .collect();
    let tol = StateTolerance {
        energy: p.energy_tolerance,
        fingerprint: p.fingerprint_tolerance,
    };
    let mut labels = vec![None; g.log_weight.len()];
    for (j, &i) in finite.iter().enumerate() {
        if q.status[j] == QuenchStatus::Converged {
            labels[i] =
                assign(q.energies[j], &fp.compute(q.minimum(j)), &known, &tol).map(|s| s as u32);
        }
    }
    let ids: Vec<u32> = (0..k as u32).collect();
    let opts = BootstrapOptions {
        n_replicates: p.bootstrap,
        ..BootstrapOptions::default()
    };
    let est = state_free_energies(&g.log_weight, &labels, &ids, &opts, &mut rng(task))
        .map_err(|e| format!("free energies: {e}"))?;
    let logz = log_partition_estimate(&g.log_weight).map_err(|e| format!("ln Z: {e}"))?;
    let mut f = vec![f64::NAN; k];
    let mut ferr = vec![f64::NAN; k];
    for s in &est.states {
        let i = s.state as usize;
        if i < k {
            f[i] = s.free_energy.unwrap_or(f64::NAN);
            ferr[i] = s.free_energy_err.unwrap_or(f64::NAN);
        }
    }
    out.energy_evals = g.energy_evaluations + q.n_evals;
    out.arrays.insert("free_energy".into(), Array::vector(f));
    out.arrays
        .insert("free_energy_err".into(), Array::vector(ferr));
    let n = g.log_weight.len() as f64;
    out.metrics.insert("ess".into(), Some(est.ess));
    out.metrics.insert("ess_fraction".into(), Some(est.ess / n));
    out.metrics.insert("log_z".into(), Some(logz.log_z));
    out.metrics.insert("log_z_err".into(), logz.log_z_err);
    out.metrics
        .insert("unassigned_weight".into(), Some(est.unassigned_population));
    out.metrics.insert(
        "reference_state".into(),
        Some(f64::from(est.reference_state)),
    );
    Ok(out)
}
