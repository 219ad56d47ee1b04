//! What the evaluate kinds share: assigning samples to the catalogue's states by
//! quench, and turning state free-energy estimates into the evaluate outputs.

use crate::physics::fingerprint::{assign, Fingerprint, StateTolerance};
use crate::physics::quench::{quench_batch, FireParams, QuenchStatus};
use crate::physics::{EnergyModel, SystemSpec};
use crate::protocol::Array;
use crate::stats::StateFreeEnergies;

/// Quench and matching settings (the same keys as the `quench` dedup kind).
#[derive(Debug, Clone, Copy)]
pub struct Matching {
    pub force_tolerance: f64,
    pub max_steps: u64,
    pub energy_tolerance: f64,
    pub fingerprint_tolerance: f64,
}

impl Default for Matching {
    fn default() -> Self {
        let tol = StateTolerance::default();
        let fire = FireParams::default();
        Matching {
            force_tolerance: fire.force_tolerance,
            max_steps: fire.max_steps,
            energy_tolerance: tol.energy,
            fingerprint_tolerance: tol.fingerprint,
        }
    }
}

/// The catalogue state of each configuration of `xs` (`[n, dim]`): quench to the local
/// minimum, then match energy and fingerprint. `None` when the quench does not converge
/// or the minimum is not in the catalogue. Returns the labels and the energy evaluations.
pub fn assign_by_quench(
    spec: &SystemSpec,
    model: &dyn EnergyModel,
    xs: &[f64],
    catalogue: &Array,
    catalogue_energies: &Array,
    m: &Matching,
) -> Result<(Vec<Option<u32>>, u64), String> {
    let dim = model.dim();
    let fire = FireParams {
        force_tolerance: m.force_tolerance,
        max_steps: m.max_steps,
        ..FireParams::default()
    };
    let q = quench_batch(model, xs, &fire).map_err(|e| format!("quench: {e}"))?;
    let fp = Fingerprint::for_system(spec);
    let known: Vec<(f64, Vec<f64>)> = (0..catalogue.rows())
        .map(|i| {
            (
                catalogue_energies.data[i],
                fp.compute(&catalogue.data[i * dim..(i + 1) * dim]),
            )
        })
        .collect();
    let tol = StateTolerance {
        energy: m.energy_tolerance,
        fingerprint: m.fingerprint_tolerance,
    };
    let labels = (0..q.len())
        .map(|j| {
            if q.status[j] != QuenchStatus::Converged {
                return None;
            }
            assign(q.energies[j], &fp.compute(q.minimum(j)), &known, &tol).map(|s| s as u32)
        })
        .collect();
    Ok((labels, q.n_evals))
}

/// The `free_energy` and `free_energy_err` arrays for `k` catalogue states (NaN for a
/// state not estimated).
pub fn free_energy_arrays(est: &StateFreeEnergies, k: usize) -> (Array, Array) {
    let mut f = vec![f64::NAN; k];
    let mut ferr = vec![f64::NAN; k];
    for s in &est.states {
        let i = s.state as usize;
        if i < k {
            f[i] = s.free_energy.unwrap_or(f64::NAN);
            ferr[i] = s.free_energy_err.unwrap_or(f64::NAN);
        }
    }
    (Array::vector(f), Array::vector(ferr))
}
