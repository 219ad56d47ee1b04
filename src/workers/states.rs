//! What the evaluate kinds share: assigning samples to the catalogue's states by
//! quench, and turning state free-energy estimates into the evaluate outputs.

use crate::physics::fingerprint::{Fingerprint, StateTolerance};
use crate::physics::quench::{quench_batch, FireParams, QuenchStatus};
use crate::physics::{EnergyModel, SystemSpec};
use crate::protocol::Array;
use crate::stats::StateFreeEnergies;

/// Quench and matching settings (the same keys as the `quench` dedup kind). An
/// evaluate stage must identify states the way the dedup stage does: a campaign whose
/// dedup names a `fingerprint` (e.g. dihedrals for a molecule) names the same one here.
#[derive(Debug, Clone)]
pub struct Matching {
    pub force_tolerance: f64,
    pub max_steps: u64,
    pub energy_tolerance: f64,
    pub fingerprint_tolerance: f64,
    /// The state fingerprint; the system's natural one when absent.
    pub fingerprint: Option<Fingerprint>,
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
            fingerprint: None,
        }
    }
}

impl Matching {
    /// Checks the fingerprint against the system's dimension (for `tarn check`).
    pub fn validate(&self, dim: usize) -> Result<(), String> {
        check_fingerprint(self.fingerprint.as_ref(), dim)
    }
}

/// Checks a stage's optional `fingerprint` key against the system's dimension.
pub fn check_fingerprint(fp: Option<&Fingerprint>, dim: usize) -> Result<(), String> {
    match fp {
        Some(fp) => fp.validate(dim).map_err(|e| format!("fingerprint: {e}")),
        None => Ok(()),
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
    m.validate(dim)?;
    let fp = m
        .fingerprint
        .clone()
        .unwrap_or_else(|| Fingerprint::for_system(spec));
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
            fp.assign(q.energies[j], &fp.compute(q.minimum(j)), &known, &tol)
                .map(|s| s as u32)
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_evaluate_fingerprint_is_checked_against_the_system() {
        let fp: Fingerprint = serde_json::from_value(serde_json::json!(
            {"kind": "dihedrals", "dihedrals": [[0, 1, 2, 3]]}
        ))
        .unwrap();
        let m = Matching {
            fingerprint: Some(fp),
            ..Matching::default()
        };
        // Four atoms in 3-D need 12 coordinates.
        assert!(m.validate(12).is_ok());
        let err = m.validate(9).unwrap_err();
        assert!(err.starts_with("fingerprint:"), "{err}");
        assert!(Matching::default().validate(2).is_ok());
    }

    #[test]
    fn evaluate_kinds_take_the_dedup_fingerprint_key() {
        let v =
            serde_json::json!({"fingerprint": {"kind": "dihedrals", "dihedrals": [[0, 1, 2, 30]]}});
        for kind in ["reweight", "mbar", "reweight-bias"] {
            let spec: SystemSpec = serde_json::from_value(
                serde_json::json!({"model": "external", "command": ["x"], "dim": 12}),
            )
            .unwrap();
            let err = crate::workers::check_params(kind, &v, &spec, 12, 1.0).unwrap_err();
            assert!(err.contains("fingerprint"), "{kind}: {err}");
        }
    }
}
