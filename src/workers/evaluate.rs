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

use super::states::{assign_by_quench, free_energy_arrays, Matching};
use super::{rng, Output, Task};
use crate::flow::AnyFlow;
use crate::physics::cv::CollectiveVariable;
use crate::physics::{EnergyModel, SystemSpec};
use crate::protocol::Array;
use crate::stats::{
    compare_profiles, free_energy_profile, log_partition_estimate, reference_profile,
    state_free_energies, weighted_mean, Alignment, Bins, BootstrapOptions,
};

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
    /// The state fingerprint, as for the `quench` dedup kind (the same one it names).
    fingerprint: Option<crate::physics::fingerprint::Fingerprint>,
    /// A 1-D free-energy profile along a collective variable (optional).
    profile: Option<ProfileParams>,
    /// Reweighted expectation values to report (metrics `mean_NAME`, `mean_NAME_err`).
    observables: Vec<ObservableParams>,
    /// Whether to assign samples to states by quench and estimate state free energies
    /// (false: only ESS, ln Z, observables and the profile, at no quench cost).
    assign_states: bool,
    /// The effective-sample floor: below it, ln Z's error, the observables and the state
    /// free energies are not reported (metric `not_estimated = 1`), since an estimate
    /// from a handful of effective samples is not an estimate whatever its error bar says.
    min_ess: f64,
}

/// `observables = [{ name = "abs_m", cv = { cv = "magnetisation" }, abs = true }]`: the
/// reweighted mean of scale · (|cv| if abs else cv)^power.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct ObservableParams {
    name: String,
    cv: CollectiveVariable,
    #[serde(default)]
    abs: bool,
    #[serde(default = "one_i32")]
    power: i32,
    #[serde(default = "one_f64")]
    scale: f64,
}

fn one_i32() -> i32 {
    1
}
fn one_f64() -> f64 {
    1.0
}

impl ObservableParams {
    fn check(&self, dim: usize) -> Result<(), String> {
        let ok = !self.name.is_empty()
            && self.name.len() <= 40
            && self
                .name
                .bytes()
                .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'_');
        if !ok {
            return Err(format!(
                "observables: name `{}` must be 1-40 characters of a-z, 0-9 and _",
                self.name
            ));
        }
        if !(1..=8).contains(&self.power) || !self.scale.is_finite() {
            return Err(format!(
                "observables.{}: power must be 1..=8 and scale finite",
                self.name
            ));
        }
        self.cv
            .validate(dim, None)
            .map_err(|e| format!("observables.{}.cv: {e}", self.name))
    }

    fn values(&self, xs: &[f64], model: &dyn EnergyModel) -> Result<Vec<f64>, String> {
        let cv = self
            .cv
            .values(xs, model.dim(), model.particle_dims())
            .map_err(|e| format!("observables.{}.cv: {e}", self.name))?;
        Ok(cv
            .into_iter()
            .map(|v| self.scale * if self.abs { v.abs() } else { v }.powi(self.power))
            .collect())
    }
}

/// `profile = { cv = { cv = "coordinate", index = 0 }, min = -1.5, max = 1.5, bins = 40 }`
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct ProfileParams {
    cv: CollectiveVariable,
    min: f64,
    max: f64,
    bins: usize,
}

impl Default for ReweightParams {
    fn default() -> Self {
        let m = Matching::default();
        ReweightParams {
            n_samples: 2000,
            bootstrap: 400,
            force_tolerance: m.force_tolerance,
            max_steps: m.max_steps,
            energy_tolerance: m.energy_tolerance,
            fingerprint_tolerance: m.fingerprint_tolerance,
            fingerprint: None,
            profile: None,
            observables: Vec::new(),
            assign_states: true,
            min_ess: 20.0,
        }
    }
}

/// Checks `reweight` parameters (for `tarn check`).
pub fn check(params: &serde_json::Value, dim: usize) -> Result<(), String> {
    let p: ReweightParams = super::params_from(params)?;
    for o in &p.observables {
        o.check(dim)?;
    }
    if !(p.min_ess.is_finite() && p.min_ess >= 1.0) {
        return Err(format!("min_ess must be at least 1, got {}", p.min_ess));
    }
    super::states::check_fingerprint(p.fingerprint.as_ref(), dim)
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
    let flow = AnyFlow::from_safetensors(&bytes).map_err(|e| format!("{rel}: {e}"))?;
    let g = flow
        .generate(
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
    let opts = BootstrapOptions {
        n_replicates: p.bootstrap,
        ..BootstrapOptions::default()
    };
    let n = g.log_weight.len() as f64;
    let logz = log_partition_estimate(&g.log_weight).map_err(|e| format!("ln Z: {e}"))?;
    out.energy_evals = g.energy_evaluations;
    out.metrics.insert("ess".into(), Some(logz.ess));
    out.metrics
        .insert("ess_fraction".into(), Some(logz.ess / n));
    out.metrics.insert("log_z".into(), Some(logz.log_z));
    let fin_w: Vec<f64> = finite.iter().map(|&i| g.log_weight[i]).collect();
    if logz.ess < p.min_ess {
        // Below the floor nothing reweighted is an estimate: no error bar (the delta
        // method's ±1 at ESS = 1 is its ceiling, not an error), no observables, no state
        // free energies; the metric says why.
        out.metrics.insert("log_z_err".into(), None);
        out.metrics.insert("not_estimated".into(), Some(1.0));
        return Ok(out);
    }
    out.metrics.insert("log_z_err".into(), logz.log_z_err);
    observables(&p, model.as_ref(), &xs, &fin_w, &mut out)?;
    if p.assign_states {
        let matching = Matching {
            force_tolerance: p.force_tolerance,
            max_steps: p.max_steps,
            energy_tolerance: p.energy_tolerance,
            fingerprint_tolerance: p.fingerprint_tolerance,
            fingerprint: p.fingerprint.clone(),
        };
        let (assigned, quench_evals) =
            assign_by_quench(&spec, model.as_ref(), &xs, &catalogue, &cat_e, &matching)?;
        let mut labels = vec![None; g.log_weight.len()];
        for (j, &i) in finite.iter().enumerate() {
            labels[i] = assigned[j];
        }
        let ids: Vec<u32> = (0..k as u32).collect();
        let est = state_free_energies(&g.log_weight, &labels, &ids, &opts, &mut rng(task))
            .map_err(|e| format!("free energies: {e}"))?;
        let (f, ferr) = free_energy_arrays(&est, k);
        out.energy_evals += quench_evals;
        out.arrays.insert("free_energy".into(), f);
        out.arrays.insert("free_energy_err".into(), ferr);
        out.metrics
            .insert("unassigned_weight".into(), Some(est.unassigned_population));
        out.metrics.insert(
            "reference_state".into(),
            Some(f64::from(est.reference_state)),
        );
    }
    if let Some(pp) = &p.profile {
        profile(
            task,
            &spec,
            model.as_ref(),
            pp,
            &xs,
            &fin_w,
            &opts,
            &mut out,
        )?;
    }
    Ok(out)
}

/// The reweighted means of the stage's observables with delta-method errors.
fn observables(
    p: &ReweightParams,
    model: &dyn EnergyModel,
    xs: &[f64],
    log_w: &[f64],
    out: &mut Output,
) -> Result<(), String> {
    for o in &p.observables {
        let m = weighted_mean(&o.values(xs, model)?, log_w)
            .map_err(|e| format!("observables.{}: {e}", o.name))?;
        out.metrics.insert(format!("mean_{}", o.name), Some(m.mean));
        out.metrics
            .insert(format!("mean_{}_err", o.name), Some(m.err));
    }
    Ok(())
}

/// The reweighted 1-D profile with bootstrap errors, and for the built-in 2-D models
/// with a coordinate variable the exact profile by quadrature and the RMS difference.
#[allow(clippy::too_many_arguments)]
fn profile(
    task: &Task,
    spec: &SystemSpec,
    model: &dyn EnergyModel,
    pp: &ProfileParams,
    xs: &[f64],
    log_w: &[f64],
    opts: &BootstrapOptions,
    out: &mut Output,
) -> Result<(), String> {
    let dim = model.dim();
    let bins = Bins::new(pp.min, pp.max, pp.bins).map_err(|e| format!("params.profile: {e}"))?;
    let cv = pp
        .cv
        .values(xs, dim, model.particle_dims())
        .map_err(|e| format!("params.profile.cv: {e}"))?;
    // Its own random stream, so that adding a profile leaves the state free energies'
    // bootstrap replicates as they were.
    let mut r = {
        use rand::SeedableRng;
        rand_chacha::ChaCha8Rng::seed_from_u64(task.file.seed ^ 0x9E37_79B9_7F4A_7C15)
    };
    let prof = free_energy_profile(&cv, log_w, &bins, opts, &mut r)
        .map_err(|e| format!("profile: {e}"))?;
    let mut rows = Vec::with_capacity(pp.bins * 3);
    for b in 0..pp.bins {
        rows.push(prof.centers[b]);
        rows.push(prof.free_energy[b].unwrap_or(f64::NAN));
        rows.push(prof.err[b].unwrap_or(f64::NAN));
    }
    out.arrays
        .insert("profile".into(), Array::matrix(pp.bins, 3, rows));
    if let (Some(axis), 2) = (coordinate_index(&pp.cv), dim) {
        if let Some(reference) = exact_profile_2d(spec, model, axis, task.file.kt, &bins)? {
            let cmp = compare_profiles(
                &prof.free_energy,
                &reference,
                Alignment::BoltzmannMean,
                Some(10.0),
            )
            .map_err(|e| format!("profile: {e}"))?;
            out.metrics.insert("profile_rms".into(), Some(cmp.rms));
            out.metrics
                .insert("profile_boltzmann_rms".into(), Some(cmp.boltzmann_rms));
            out.arrays
                .insert("profile_reference".into(), Array::vector(reference));
        }
    }
    Ok(())
}

fn coordinate_index(cv: &CollectiveVariable) -> Option<usize> {
    match cv {
        CollectiveVariable::Coordinate { index } => Some(*index),
        _ => None,
    }
}

/// F(s) = −ln ∫ exp(−U/kT) dy of a built-in 2-D model, bin-averaged by Simpson's rule,
/// with the other coordinate integrated by the trapezoid rule over a range that holds
/// all of the model's low-energy region. `None` for models without a known range.
fn exact_profile_2d(
    spec: &SystemSpec,
    model: &dyn EnergyModel,
    axis: usize,
    kt: f64,
    bins: &Bins,
) -> Result<Option<Vec<f64>>, String> {
    let (lo, hi) = match (spec, axis) {
        (SystemSpec::MullerBrown { .. }, 0) => (-0.8, 2.6),
        (SystemSpec::MullerBrown { .. }, _) => (-2.2, 1.6),
        (SystemSpec::DoubleWell { .. }, 0) => (-6.0, 6.0),
        (SystemSpec::DoubleWell { .. }, _) => (-3.0, 3.0),
        _ => return Ok(None),
    };
    let n = 4001;
    let h = (hi - lo) / (n - 1) as f64;
    let u = |s: f64| -> f64 {
        let mut pts = Vec::with_capacity(2 * n);
        for k in 0..n {
            let other = lo + k as f64 * h;
            if axis == 0 {
                pts.extend_from_slice(&[s, other]);
            } else {
                pts.extend_from_slice(&[other, s]);
            }
        }
        let mut e = vec![0.0; n];
        if model.evaluate(&pts, &mut e, None).is_err() {
            return f64::INFINITY;
        }
        let m = e.iter().fold(f64::INFINITY, |a, b| a.min(*b)) / kt;
        let sum: f64 = e
            .iter()
            .enumerate()
            .map(|(k, v)| {
                let w = if k == 0 || k == n - 1 { 0.5 } else { 1.0 };
                w * (-(v / kt) + m).exp()
            })
            .sum();
        m - (sum * h).ln()
    };
    let r = reference_profile(u, bins, 8).map_err(|e| format!("reference profile: {e}"))?;
    Ok(Some(r))
}
