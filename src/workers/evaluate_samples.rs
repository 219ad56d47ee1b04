//! Evaluate kinds that reweight the round's own explore samples instead of drawing from
//! a flow: `mbar` for walkers at several temperatures (Shirts & Chodera, J. Chem. Phys.
//! 129, 124105, 2008), and `reweight-bias` for biased explorers that hand back log
//! weights (well-tempered metadynamics, reweighted per Tiwary & Parrinello, J. Phys.
//! Chem. B 119, 736, 2015). Samples are assigned to states by quench, as in `reweight`.
//!
//! Trajectory frames are correlated, so both bootstrap in blocks of consecutive frames
//! (the moving-block bootstrap; `bootstrap_block` frames, by default n^(1/3) of the
//! round's n frames). Correlations longer than a block still make the bars too small;
//! the estimate pooled over rounds (`tarn states`, Birge-scaled) shows it when they do.
//! For `mbar` the bootstrap also holds the states' free energies f_k fixed.

use serde::Deserialize;

use super::states::{assign_by_quench, free_energy_arrays, Matching};
use super::{rng, Output, Task};
use crate::stats::{
    default_block_length, kish_ess, state_free_energies, BootstrapOptions, Mbar, MbarOptions,
};

/// Parameters shared by the sample-reweighting kinds.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct SampleParams {
    bootstrap: usize,
    /// Frames per bootstrap block; 0 chooses n^(1/3).
    bootstrap_block: usize,
    force_tolerance: f64,
    max_steps: u64,
    energy_tolerance: f64,
    fingerprint_tolerance: f64,
    /// The state fingerprint, as for the `quench` dedup kind (the same one it names).
    fingerprint: Option<crate::physics::fingerprint::Fingerprint>,
}

impl Default for SampleParams {
    fn default() -> Self {
        let m = Matching::default();
        SampleParams {
            bootstrap: 400,
            bootstrap_block: 0,
            force_tolerance: m.force_tolerance,
            max_steps: m.max_steps,
            energy_tolerance: m.energy_tolerance,
            fingerprint_tolerance: m.fingerprint_tolerance,
            fingerprint: None,
        }
    }
}

/// Checks `mbar` and `reweight-bias` parameters (for `tarn check`).
pub fn check(params: &serde_json::Value, dim: usize) -> Result<(), String> {
    let p: SampleParams = super::params_from(params)?;
    super::states::check_fingerprint(p.fingerprint.as_ref(), dim)
}

/// The `mbar` kind: every explore stage is a thermodynamic state at its declared
/// temperature factor; MBAR combines them and reweights to the campaign's kT.
pub fn mbar(task: &Task) -> Result<Output, String> {
    let p: SampleParams = task.params()?;
    let energies = task.input("energies")?;
    let tau = task.input("sample_temperature_factor")?;
    let kt = task.file.kt;
    let mut levels: Vec<f64> = tau.data.clone();
    levels.sort_by(f64::total_cmp);
    levels.dedup();
    let n = energies.data.len();
    let n_k: Vec<usize> = levels
        .iter()
        .map(|l| tau.data.iter().filter(|t| *t == l).count())
        .collect();
    let mut u_kn = Vec::with_capacity(levels.len() * n);
    for l in &levels {
        u_kn.extend(energies.data.iter().map(|e| e / (kt * l)));
    }
    let m = Mbar::solve(&u_kn, &n_k, &MbarOptions::default()).map_err(|e| format!("MBAR: {e}"))?;
    let target: Vec<f64> = energies.data.iter().map(|e| e / kt).collect();
    let log_w = m
        .target_log_weights(&target)
        .map_err(|e| format!("MBAR: {e}"))?;
    let mut out = estimate(task, &p, &log_w)?;
    out.metrics
        .insert("mbar_states".into(), Some(levels.len() as f64));
    out.metrics
        .insert("mbar_iterations".into(), Some(m.iterations() as f64));
    Ok(out)
}

/// The `reweight-bias` kind: the explore workers' own log weights.
pub fn reweight_bias(task: &Task) -> Result<Output, String> {
    let p: SampleParams = task.params()?;
    if !task.file.inputs.contains_key("sample_log_weight") {
        return Err("the round's explore tasks handed back no log_weights (every explore stage must be a biased or flow sampler, e.g. metadynamics or generate)".into());
    }
    let log_w = task.input("sample_log_weight")?;
    estimate(task, &p, &log_w.data)
}

/// Quench-assigns the round's samples and estimates state free energies with `log_w`.
fn estimate(task: &Task, p: &SampleParams, log_w: &[f64]) -> Result<Output, String> {
    let (spec, model) = task.model()?;
    let samples = task.input("samples")?;
    let catalogue = task.input("catalogue")?;
    let cat_e = task.input("catalogue_energies")?;
    let k = catalogue.rows();
    let matching = Matching {
        force_tolerance: p.force_tolerance,
        max_steps: p.max_steps,
        energy_tolerance: p.energy_tolerance,
        fingerprint_tolerance: p.fingerprint_tolerance,
        fingerprint: p.fingerprint.clone(),
    };
    let (labels, quench_evals) = assign_by_quench(
        &spec,
        model.as_ref(),
        &samples.data,
        &catalogue,
        &cat_e,
        &matching,
    )?;
    let ids: Vec<u32> = (0..k as u32).collect();
    let block = match p.bootstrap_block {
        0 => default_block_length(log_w.len()),
        b => b,
    };
    let opts = BootstrapOptions {
        n_replicates: p.bootstrap,
        block,
        ..BootstrapOptions::default()
    };
    let est = state_free_energies(log_w, &labels, &ids, &opts, &mut rng(task))
        .map_err(|e| format!("free energies: {e}"))?;
    let (f, ferr) = free_energy_arrays(&est, k);
    let mut out = Output {
        energy_evals: quench_evals,
        ..Default::default()
    };
    out.arrays.insert("free_energy".into(), f);
    out.arrays.insert("free_energy_err".into(), ferr);
    let ess = kish_ess(log_w).map_err(|e| format!("ESS: {e}"))?;
    out.metrics.insert("ess".into(), Some(ess));
    out.metrics
        .insert("bootstrap_block".into(), Some(block as f64));
    out.metrics
        .insert("ess_fraction".into(), Some(ess / log_w.len().max(1) as f64));
    out.metrics
        .insert("unassigned_weight".into(), Some(est.unassigned_population));
    Ok(out)
}
