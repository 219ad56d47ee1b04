//! The `quench` dedup worker: quench every sample to its local minimum (FIRE), identify
//! the minimum against the catalogue by energy and fingerprint, and thin the samples so
//! that the training set stays balanced between states.
//!
//! The fingerprint is the system's natural one unless the stage names another, e.g.
//! `fingerprint = { kind = "dihedrals", dihedrals = [[4, 6, 8, 14], [6, 8, 14, 16]] }`
//! for a molecule's backbone φ, ψ (degrees, compared with periodic distance). The FIRE
//! step sizes can be set for systems whose units make the defaults too large or small.

use serde::Deserialize;

use super::{Output, Task};
use crate::physics::fingerprint::{Fingerprint, StateTolerance};
use crate::physics::quench::{quench_batch, FireParams, QuenchStatus};
use crate::protocol::Array;

/// Parameters of the `quench` kind (the stage's `params` table).
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct QuenchParams {
    /// FIRE convergence: the largest force component below this.
    pub force_tolerance: f64,
    /// FIRE step limit per sample; unconverged samples get no state (label -1).
    pub max_steps: u64,
    /// Two minima are one state when their energies differ by at most this ...
    pub energy_tolerance: f64,
    /// ... and their fingerprints by at most this (largest component difference).
    pub fingerprint_tolerance: f64,
    /// At most this many samples per state and round go into the training set,
    /// evenly spaced in sample order.
    pub max_per_state: u64,
    /// The state fingerprint; the system's natural one when absent.
    pub fingerprint: Option<Fingerprint>,
    /// FIRE's initial time step.
    pub dt_start: f64,
    /// FIRE's largest time step.
    pub dt_max: f64,
    /// FIRE's largest displacement norm of one step.
    pub max_step: f64,
}

impl QuenchParams {
    /// The FIRE parameters these settings give.
    pub fn fire(&self) -> FireParams {
        FireParams {
            force_tolerance: self.force_tolerance,
            max_steps: self.max_steps,
            dt_start: self.dt_start,
            dt_max: self.dt_max,
            max_step: self.max_step,
            ..FireParams::default()
        }
    }

    /// Checks every setting for configurations of `dim` coordinates, naming the first
    /// bad key, so that `tarn check` refuses a bad stage before the campaign starts.
    pub fn validate(&self, dim: usize) -> Result<(), String> {
        self.fire().validate().map_err(|e| e.to_string())?;
        let tol_ok = |v: f64| v.is_finite() && v >= 0.0;
        if !tol_ok(self.energy_tolerance) {
            return Err("energy_tolerance: must be finite and not negative".into());
        }
        if !tol_ok(self.fingerprint_tolerance) {
            return Err("fingerprint_tolerance: must be finite and not negative".into());
        }
        if let Some(fp) = &self.fingerprint {
            fp.validate(dim).map_err(|e| format!("fingerprint: {e}"))?;
        }
        Ok(())
    }
}

impl Default for QuenchParams {
    fn default() -> Self {
        let tol = StateTolerance::default();
        let fire = FireParams::default();
        QuenchParams {
            force_tolerance: fire.force_tolerance,
            max_steps: fire.max_steps,
            energy_tolerance: tol.energy,
            fingerprint_tolerance: tol.fingerprint,
            max_per_state: 500,
            fingerprint: None,
            dt_start: fire.dt_start,
            dt_max: fire.dt_max,
            max_step: fire.max_step,
        }
    }
}

/// Runs the `quench` kind.
pub fn quench(task: &Task) -> Result<Output, String> {
    let p: QuenchParams = task.params()?;
    let (spec, model) = task.model()?;
    let dim = model.dim();
    let samples = task.input("samples")?;
    let catalogue = task.input("catalogue")?;
    let cat_energies = task.input("catalogue_energies")?;
    p.validate(dim)?;
    let fire = p.fire();
    let tol = StateTolerance {
        energy: p.energy_tolerance,
        fingerprint: p.fingerprint_tolerance,
    };
    let fp = p
        .fingerprint
        .clone()
        .unwrap_or_else(|| Fingerprint::for_system(&spec));
    let n = samples.rows();
    let batch =
        quench_batch(model.as_ref(), &samples.data, &fire).map_err(|e| format!("quench: {e}"))?;
    let mut known: Vec<(f64, Vec<f64>)> = (0..catalogue.rows())
        .map(|i| {
            (
                cat_energies.data[i],
                fp.compute(&catalogue.data[i * dim..(i + 1) * dim]),
            )
        })
        .collect();
    let n_known = known.len();
    let mut labels = Vec::with_capacity(n);
    let mut new_states = Vec::new();
    let mut new_energies = Vec::new();
    let mut unconverged = 0u64;
    for i in 0..n {
        if batch.status[i] != QuenchStatus::Converged {
            unconverged += 1;
            labels.push(-1.0);
            continue;
        }
        let x = batch.minimum(i);
        let e = batch.energies[i];
        let f = fp.compute(x);
        let label = match fp.assign(e, &f, &known, &tol) {
            Some(k) => k,
            None => {
                known.push((e, f));
                new_states.extend_from_slice(x);
                new_energies.push(e);
                known.len() - 1
            }
        };
        labels.push(label as f64);
    }
    let keep = thin(&labels, p.max_per_state);
    let kept = keep.iter().filter(|k| **k == 1.0).count();
    let m = new_energies.len();
    let mut out = Output {
        energy_evals: batch.n_evals,
        ..Default::default()
    };
    out.arrays.insert("labels".into(), Array::vector(labels));
    out.arrays
        .insert("new_states".into(), Array::matrix(m, dim, new_states));
    out.arrays
        .insert("new_energies".into(), Array::vector(new_energies));
    out.arrays.insert("keep".into(), Array::vector(keep));
    out.metrics.insert("new_states".into(), Some(m as f64));
    out.metrics
        .insert("known_states".into(), Some(n_known as f64));
    out.metrics
        .insert("unconverged".into(), Some(unconverged as f64));
    out.metrics.insert("kept".into(), Some(kept as f64));
    out.metrics
        .insert("thinned".into(), Some((n - kept) as f64));
    Ok(out)
}

/// Marks at most `max` samples per state for the training set, evenly spaced in sample
/// order; unassigned samples (label -1) are not kept.
fn thin(labels: &[f64], max: u64) -> Vec<f64> {
    let mut counts = std::collections::BTreeMap::<i64, u64>::new();
    for l in labels {
        *counts.entry(*l as i64).or_default() += 1;
    }
    let mut seen = std::collections::BTreeMap::<i64, u64>::new();
    labels
        .iter()
        .map(|l| {
            let l = *l as i64;
            if l < 0 {
                return 0.0;
            }
            let total = counts[&l];
            let i = seen.entry(l).or_default();
            let idx = *i;
            *i += 1;
            // Keep sample idx when it is the first to reach the next multiple of
            // total/max: an even spread of exactly min(total, max) samples.
            let keep = if total <= max {
                true
            } else {
                (idx * max) / total != ((idx + 1) * max) / total
            };
            if keep {
                1.0
            } else {
                0.0
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::{thin, QuenchParams};

    fn params(v: serde_json::Value) -> Result<QuenchParams, String> {
        serde_json::from_value(v).map_err(|e| e.to_string())
    }

    #[test]
    fn fingerprint_and_fire_settings_are_read_and_validated() {
        let p = params(serde_json::json!({
            "fingerprint": {"kind": "dihedrals", "dihedrals": [[4, 6, 8, 14], [6, 8, 14, 16]]},
            "dt_start": 0.002, "dt_max": 0.02, "max_step": 0.05, "force_tolerance": 1e-3
        }))
        .unwrap();
        assert!(p.validate(66).is_ok());
        assert_eq!(p.fire().dt_max, 0.02);
        let err = p.validate(30).unwrap_err();
        assert!(
            err.starts_with("fingerprint:") && err.contains("below the 10 atoms"),
            "{err}"
        );
        let bad_dt = params(serde_json::json!({"dt_start": 0.5, "dt_max": 0.1})).unwrap();
        assert!(bad_dt.validate(2).unwrap_err().contains("dt_max"));
        let bad_tol = params(serde_json::json!({"fingerprint_tolerance": -1.0})).unwrap();
        assert!(bad_tol
            .validate(2)
            .unwrap_err()
            .contains("fingerprint_tolerance"));
        let typo =
            params(serde_json::json!({"fingerprint": {"kind": "dihedral", "dihedrals": []}}));
        assert!(typo.unwrap_err().contains("dihedral"));
        assert!(params(serde_json::json!({"fingerprints": 1})).is_err());
    }

    #[test]
    fn thinning_keeps_exactly_the_cap_per_state_and_drops_unassigned() {
        let mut labels = vec![0.0; 10];
        labels.extend(vec![1.0; 3]);
        labels.push(-1.0);
        let keep = thin(&labels, 4);
        assert_eq!(keep[..10].iter().sum::<f64>(), 4.0);
        assert_eq!(keep[10..13].iter().sum::<f64>(), 3.0);
        assert_eq!(keep[13], 0.0);
    }
}
