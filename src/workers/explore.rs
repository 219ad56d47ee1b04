//! Built-in explore workers: thin adapters from a task to the physics crate's
//! configuration-space explorers. Each reports its saved frames, their energies and its
//! energy evaluations; metadynamics also reports the collective variables, the bias and
//! log weights for reweighting.

use super::{rng, Output, Task};
use crate::physics::explore::{
    langevin_baoab, metadynamics, metropolis as run_metropolis, LangevinParams, MetadParams,
    MetropolisParams, Trajectory,
};
use crate::protocol::Array;

/// The `hold` kind: the walker stays where it is and reports its start configuration
/// and its energy as its one sample. It exists for testing the engine and measuring
/// its overhead: a real worker through the real protocol that does almost nothing.
pub fn hold(task: &Task) -> Result<Output, String> {
    let (_, model) = task.model()?;
    let start = task.input("start")?;
    let n = start.rows();
    let mut energies = vec![0.0; n];
    model
        .evaluate(&start.data, &mut energies, None)
        .map_err(|e| e.to_string())?;
    let mut out = Output {
        energy_evals: n as u64,
        ..Default::default()
    };
    out.arrays.insert("samples".into(), start);
    out.arrays
        .insert("energies".into(), Array::vector(energies));
    Ok(out)
}

/// The first start configuration of the walker.
fn start_point(task: &Task) -> Result<Vec<f64>, String> {
    let start = task.input("start")?;
    if start.rows() == 0 {
        return Err("in/start.npy holds no configuration".into());
    }
    let dim = start.shape.get(1).copied().unwrap_or(0);
    Ok(start.data[..dim].to_vec())
}

/// The frames and energies of a trajectory as the role's output arrays.
fn trajectory_output(t: &Trajectory) -> Output {
    let mut out = Output {
        energy_evals: t.n_evals,
        ..Default::default()
    };
    out.arrays.insert(
        "samples".into(),
        Array::matrix(t.n_frames(), t.dim, t.frames.clone()),
    );
    out.arrays
        .insert("energies".into(), Array::vector(t.energies.clone()));
    out
}

/// The `metropolis` kind: Metropolis Monte Carlo in configuration space.
pub fn metropolis(task: &Task) -> Result<Output, String> {
    let p: MetropolisParams = task.params()?;
    let (_, model) = task.model()?;
    let x0 = start_point(task)?;
    let run = run_metropolis(model.as_ref(), &x0, task.file.kt, &p, &mut rng(task))
        .map_err(|e| format!("metropolis: {e}"))?;
    let mut out = trajectory_output(&run.trajectory);
    out.metrics
        .insert("acceptance".into(), Some(run.acceptance));
    Ok(out)
}

/// The `langevin` kind: BAOAB Langevin dynamics at a temperature factor.
pub fn langevin(task: &Task) -> Result<Output, String> {
    let p: LangevinParams = task.params()?;
    let (_, model) = task.model()?;
    let x0 = start_point(task)?;
    let run = langevin_baoab(model.as_ref(), &x0, task.file.kt, &p, &mut rng(task))
        .map_err(|e| format!("langevin: {e}"))?;
    Ok(trajectory_output(&run.trajectory))
}

/// The `metadynamics` kind: well-tempered metadynamics along collective variables.
/// Its log weights reweight each frame to the campaign's temperature: the
/// Tiwary–Parrinello weight (V − c(t))/kT_run, plus E·(1/kT_run − 1/kT) when the walker
/// runs at a temperature factor other than 1.
pub fn metadynamics_worker(task: &Task) -> Result<Output, String> {
    let p: MetadParams = task.params()?;
    let (_, model) = task.model()?;
    let x0 = start_point(task)?;
    let run = metadynamics(model.as_ref(), &x0, task.file.kt, &p, &mut rng(task))
        .map_err(|e| format!("metadynamics: {e}"))?;
    let t = &run.trajectory;
    let kt_run = run.reweight_kt;
    let log_w: Vec<f64> = run
        .bias
        .iter()
        .zip(&run.c_t)
        .zip(&t.energies)
        .map(|((v, c), e)| (v - c) / kt_run + e * (1.0 / kt_run - 1.0 / task.file.kt))
        .collect();
    let mut out = trajectory_output(t);
    out.arrays
        .insert("log_weights".into(), Array::vector(log_w));
    out.arrays.insert(
        "cv".into(),
        Array::matrix(t.n_frames(), run.n_cv, run.cv_values.clone()),
    );
    out.arrays
        .insert("bias".into(), Array::vector(run.bias.clone()));
    out.metrics.insert("final_c".into(), Some(run.final_c));
    out.metrics
        .insert("hills".into(), Some(run.final_bias.heights.len() as f64));
    Ok(out)
}
