//! An isotropic harmonic well U = ½ k |q|², the exactly solvable model used to check
//! integrators (⟨q²⟩ = kT/k per coordinate) and estimators. Not a campaign system.

use super::par_each;
use crate::energy::{EnergyError, EnergyModel};

/// U(q) = ½ · stiffness · Σ_i q_i² in `dim` coordinates.
#[derive(Debug, Clone, Copy)]
pub struct Harmonic {
    /// Number of coordinates.
    pub dim: usize,
    /// Spring constant k.
    pub stiffness: f64,
}

impl EnergyModel for Harmonic {
    fn dim(&self) -> usize {
        self.dim
    }

    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        let k = self.stiffness;
        par_each(self.dim, x, energy, forces, |q, f| {
            if let Some(f) = f {
                for (fi, qi) in f.iter_mut().zip(q) {
                    *fi = -k * qi;
                }
            }
            0.5 * k * q.iter().map(|v| v * v).sum::<f64>()
        })
    }
}
