//! State fingerprints: a short vector per quenched minimum that, together with the
//! minimum's energy, says which state (basin) a sample belongs to.
//!
//! - Clusters: the sorted list of all pair distances, invariant to translation,
//!   rotation, reflection and permutation of identical particles.
//! - Low-dimensional models (Müller–Brown, the double well) and external models: the
//!   minimum's coordinates.
//! - φ⁴: the sign of the magnetisation (mean field) and its magnitude, `[sign, |m|]`,
//!   so the two ordered states differ by 2 in the first entry.
//!
//! Two fingerprints are compared by their largest absolute difference (L∞ distance);
//! fingerprints of different lengths never match.

use serde::{Deserialize, Serialize};

use crate::error::{require, PhysicsError};
use crate::models::SystemSpec;

/// Which fingerprint a system uses; chosen per system by [`Fingerprint::for_system`]
/// or named in a campaign file (`kind = "pair-distances"`, ...).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case", deny_unknown_fields)]
pub enum Fingerprint {
    /// Sorted pair distances of particles in `dims` dimensions.
    PairDistances {
        /// Spatial dimension of the particles.
        dims: usize,
    },
    /// The coordinates themselves.
    Coordinates {},
    /// `[sign(m), |m|]` with m the mean of all coordinates.
    Magnetisation {},
}

impl Fingerprint {
    /// The natural fingerprint of a system: pair distances for clusters, the
    /// magnetisation for φ⁴, coordinates otherwise.
    pub fn for_system(spec: &SystemSpec) -> Fingerprint {
        match spec {
            SystemSpec::LennardJones { dims, .. } => Fingerprint::PairDistances { dims: *dims },
            SystemSpec::Phi4 { .. } => Fingerprint::Magnetisation {},
            _ => Fingerprint::Coordinates {},
        }
    }

    /// Checks that the fingerprint fits configurations of `dim` coordinates.
    pub fn validate(&self, dim: usize) -> Result<(), PhysicsError> {
        match self {
            Fingerprint::PairDistances { dims } => require(
                *dims > 0 && dim.is_multiple_of(*dims) && dim / dims >= 2,
                "dims",
                format!(
                    "pair distances need at least two particles of {dims} coordinates in dim {dim}"
                ),
            ),
            _ => require(dim > 0, "dim", "must be positive"),
        }
    }

    /// The fingerprint of one configuration.
    pub fn compute(&self, x: &[f64]) -> Vec<f64> {
        match self {
            Fingerprint::PairDistances { dims } => sorted_pair_distances(x, *dims),
            Fingerprint::Coordinates {} => x.to_vec(),
            Fingerprint::Magnetisation {} => {
                let m = if x.is_empty() {
                    0.0
                } else {
                    x.iter().sum::<f64>() / x.len() as f64
                };
                let sign = if m > 0.0 {
                    1.0
                } else if m < 0.0 {
                    -1.0
                } else {
                    0.0
                };
                vec![sign, m.abs()]
            }
        }
    }

    /// Fingerprints of every configuration of a `[n, dim]` batch.
    pub fn compute_batch(&self, x: &[f64], dim: usize) -> Vec<Vec<f64>> {
        x.chunks(dim.max(1)).map(|xi| self.compute(xi)).collect()
    }
}

/// All pair distances of the particles of `x` (in `dims` dimensions), ascending.
pub fn sorted_pair_distances(x: &[f64], dims: usize) -> Vec<f64> {
    let n = x.len() / dims.max(1);
    let mut d = Vec::with_capacity(n * n.saturating_sub(1) / 2);
    for i in 0..n {
        for j in (i + 1)..n {
            let r2: f64 = (0..dims)
                .map(|c| (x[i * dims + c] - x[j * dims + c]).powi(2))
                .sum();
            d.push(r2.sqrt());
        }
    }
    d.sort_by(f64::total_cmp);
    d
}

/// Tolerances that decide when two minima are the same state.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StateTolerance {
    /// Largest energy difference of the same state.
    pub energy: f64,
    /// Largest L∞ fingerprint distance of the same state.
    pub fingerprint: f64,
}

impl Default for StateTolerance {
    /// 1e-3 in energy and 1e-2 in fingerprint: well above quench noise at a force
    /// tolerance of 1e-6, well below the gaps between the built-in systems' minima
    /// (the closest pair, 2-D LJ7's −11.501291 and −11.476907, is 0.024 apart).
    fn default() -> Self {
        StateTolerance {
            energy: 1e-3,
            fingerprint: 1e-2,
        }
    }
}

/// L∞ distance between two fingerprints; infinite when their lengths differ.
pub fn fingerprint_distance(a: &[f64], b: &[f64]) -> f64 {
    if a.len() != b.len() {
        return f64::INFINITY;
    }
    a.iter()
        .zip(b)
        .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()))
}

/// Whether two minima (energy, fingerprint) are the same state within `tol`.
pub fn same_state(
    energy_a: f64,
    fp_a: &[f64],
    energy_b: f64,
    fp_b: &[f64],
    tol: &StateTolerance,
) -> bool {
    (energy_a - energy_b).abs() <= tol.energy && fingerprint_distance(fp_a, fp_b) <= tol.fingerprint
}

/// The index of the known state that a minimum belongs to, or `None` for a new state.
/// When several known states match, the one with the smallest fingerprint distance wins
/// (ties: the smallest energy difference, then the lowest index), so the answer does not
/// depend on tolerance-sized overlaps in the order states were found.
pub fn assign(
    energy: f64,
    fingerprint: &[f64],
    known: &[(f64, Vec<f64>)],
    tol: &StateTolerance,
) -> Option<usize> {
    let mut best: Option<(usize, f64, f64)> = None;
    for (k, (e, fp)) in known.iter().enumerate() {
        if !same_state(energy, fingerprint, *e, fp, tol) {
            continue;
        }
        let d = fingerprint_distance(fingerprint, fp);
        let de = (energy - e).abs();
        let better = match best {
            None => true,
            Some((_, bd, bde)) => d < bd || (d == bd && de < bde),
        };
        if better {
            best = Some((k, d, de));
        }
    }
    best.map(|(k, _, _)| k)
}
