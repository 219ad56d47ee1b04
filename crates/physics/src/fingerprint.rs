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
//! - Molecules: chosen dihedral angles in degrees (e.g. the backbone φ, ψ), which do not
//!   change under translation and rotation and tell conformers apart.
//!
//! Two fingerprints are compared by their largest absolute difference (L∞ distance);
//! for dihedral fingerprints each difference is taken the short way round the circle
//! (179° and −179° are 2° apart). Fingerprints of different lengths never match.

use serde::{Deserialize, Serialize};

use crate::cv::{dihedral_degrees, periodic_difference, validate_dihedral};
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
    /// Dihedral angles (degrees) of atoms in 3-D, one per quadruple (i, j, k, l),
    /// compared with periodic distance.
    Dihedrals {
        /// The atom quadruples, e.g. `[[4, 6, 8, 14], [6, 8, 14, 16]]` for φ and ψ.
        dihedrals: Vec<[usize; 4]>,
    },
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
            Fingerprint::Dihedrals { dihedrals } => {
                require(
                    !dihedrals.is_empty(),
                    "dihedrals",
                    "needs at least one dihedral",
                )?;
                dihedrals
                    .iter()
                    .try_for_each(|d| validate_dihedral(*d, dim, "dihedrals"))
            }
            _ => require(dim > 0, "dim", "must be positive"),
        }
    }

    /// The distance between two fingerprints of this kind: L∞, with periodic
    /// differences for dihedrals; infinite when their lengths differ.
    pub fn distance(&self, a: &[f64], b: &[f64]) -> f64 {
        match self {
            Fingerprint::Dihedrals { .. } => periodic_fingerprint_distance(a, b),
            _ => fingerprint_distance(a, b),
        }
    }

    /// The index of the known state that a minimum belongs to, or `None` for a new
    /// state, as [`assign`] but with this kind's distance.
    pub fn assign(
        &self,
        energy: f64,
        fingerprint: &[f64],
        known: &[(f64, Vec<f64>)],
        tol: &StateTolerance,
    ) -> Option<usize> {
        assign_by(energy, fingerprint, known, tol, |a, b| self.distance(a, b))
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
            Fingerprint::Dihedrals { dihedrals } => {
                dihedrals.iter().map(|d| dihedral_degrees(x, *d)).collect()
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

/// L∞ distance between two fingerprints of angles in degrees, each difference taken the
/// short way round the circle; infinite when their lengths differ.
pub fn periodic_fingerprint_distance(a: &[f64], b: &[f64]) -> f64 {
    if a.len() != b.len() {
        return f64::INFINITY;
    }
    a.iter()
        .zip(b)
        .fold(0.0f64, |m, (x, y)| m.max(periodic_difference(*x, *y).abs()))
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
    assign_by(energy, fingerprint, known, tol, fingerprint_distance)
}

/// [`assign`] with the fingerprint distance given, so that every kind of fingerprint
/// shares one rule for choosing among several matches.
fn assign_by(
    energy: f64,
    fingerprint: &[f64],
    known: &[(f64, Vec<f64>)],
    tol: &StateTolerance,
    distance: impl Fn(&[f64], &[f64]) -> f64,
) -> Option<usize> {
    let mut best: Option<(usize, f64, f64)> = None;
    for (k, (e, fp)) in known.iter().enumerate() {
        let d = distance(fingerprint, fp);
        let de = (energy - e).abs();
        if de > tol.energy || d > tol.fingerprint {
            continue;
        }
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

#[cfg(test)]
mod tests {
    use super::*;

    /// A 3-D configuration of four atoms whose dihedral 0-1-2-3 is `t` degrees.
    fn four_atoms(t_deg: f64) -> Vec<f64> {
        crate::cv::four_atoms_with_dihedral(t_deg)
    }

    #[test]
    fn dihedral_fingerprints_match_across_the_seam() {
        let fp = Fingerprint::Dihedrals {
            dihedrals: vec![[0, 1, 2, 3], [3, 2, 1, 0]],
        };
        fp.validate(12).unwrap();
        let a = fp.compute(&four_atoms(179.0));
        let b = fp.compute(&four_atoms(-179.0));
        assert!((a[0] - 179.0).abs() < 1e-9 && (b[0] + 179.0).abs() < 1e-9);
        assert!((fp.distance(&a, &b) - 2.0).abs() < 1e-9);
        // The plain L∞ distance would call them 358° apart and two states.
        assert!(fingerprint_distance(&a, &b) > 357.0);
        let tol = StateTolerance {
            energy: 0.1,
            fingerprint: 5.0,
        };
        let known = vec![(-1.0, a.clone()), (-1.0, fp.compute(&four_atoms(60.0)))];
        assert_eq!(fp.assign(-1.02, &b, &known, &tol), Some(0));
        assert_eq!(
            fp.assign(-1.02, &fp.compute(&four_atoms(57.0)), &known, &tol),
            Some(1)
        );
        assert_eq!(
            fp.assign(-1.02, &fp.compute(&four_atoms(-60.0)), &known, &tol),
            None
        );
        // Same angles but an energy outside the tolerance is another state.
        assert_eq!(fp.assign(-1.5, &b, &known, &tol), None);
    }

    #[test]
    fn dihedral_fingerprint_validation() {
        let empty = Fingerprint::Dihedrals { dihedrals: vec![] };
        assert!(empty
            .validate(12)
            .unwrap_err()
            .to_string()
            .contains("at least one"));
        let out = Fingerprint::Dihedrals {
            dihedrals: vec![[0, 1, 2, 7]],
        };
        assert!(out
            .validate(12)
            .unwrap_err()
            .to_string()
            .contains("below the 4 atoms"));
        assert!(Fingerprint::Dihedrals {
            dihedrals: vec![[0, 1, 2, 3]]
        }
        .validate(11)
        .is_err());
    }
}
