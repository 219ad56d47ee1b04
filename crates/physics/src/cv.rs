//! Collective variables: low-dimensional functions s(x) of a configuration, each with
//! its analytic gradient, for well-tempered metadynamics and for free-energy profiles.
//!
//! Particle-based variables (distance, radius of gyration, coordination) need the
//! particles' spatial dimension; it comes from the variable's own `dims` key when given,
//! and otherwise from the model ([`EnergyModel::particle_dims`]).
//!
//! The mean coordination number is C = (2/N) Σ_{i<j} s(r_ij) with the switching
//! function s(r) = 1 / (1 + (r/r₀)⁶): the rational form (1 − (r/r₀)⁶)/(1 − (r/r₀)¹²)
//! simplified, which is smooth everywhere (no removable singularity at r = r₀). s is 1 at
//! contact, ½ at r₀, and falls as r⁻⁶ beyond. The default r₀ = 1.5 σ lies between the
//! first (1.12 σ) and second (≈ 1.9 σ) neighbour shells of Lennard-Jones clusters.
//!
//! The dihedral angle of four atoms (i, j, k, l) of a molecule in 3-D is in degrees in
//! [−180, 180), with the IUPAC sign: positive when, looking along j → k, the bond j–i
//! turns clockwise onto k–l. Degrees, not radians, because they are what molecular
//! users read and write (φ ≈ −75° for C7eq); the gradient is in degrees per coordinate
//! unit. The variable is periodic: use [`periodic_difference`] to compare two values.
//!
//! [`EnergyModel::particle_dims`]: crate::energy::EnergyModel::particle_dims

use serde::{Deserialize, Serialize};

use crate::error::{require, PhysicsError};

/// One collective variable, as named in a campaign file (`cv = "distance"`, ...).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "cv", rename_all = "kebab-case", deny_unknown_fields)]
pub enum CollectiveVariable {
    /// Coordinate `index` of the configuration.
    Coordinate {
        /// Index into the flat configuration.
        index: usize,
    },
    /// Distance between particles `i` and `j`.
    Distance {
        /// First particle.
        i: usize,
        /// Second particle.
        j: usize,
        /// Spatial dimension of the particles (default: the model's).
        #[serde(default)]
        dims: Option<usize>,
    },
    /// offset + Σ_k `weights[k]` · `x[indices[k]]`.
    Linear {
        /// Indices into the flat configuration.
        indices: Vec<usize>,
        /// One weight per index.
        weights: Vec<f64>,
        /// A constant added to the sum.
        #[serde(default)]
        offset: f64,
    },
    /// Radius of gyration sqrt((1/N) Σ_i |x_i − x_com|²).
    RadiusOfGyration {
        /// Spatial dimension of the particles (default: the model's).
        #[serde(default)]
        dims: Option<usize>,
    },
    /// Mean coordination number (2/N) Σ_{i<j} 1/(1 + (r_ij/r0)⁶).
    Coordination {
        /// Switching distance r₀ (default 1.5).
        #[serde(default = "default_r0")]
        r0: f64,
        /// Spatial dimension of the particles (default: the model's).
        #[serde(default)]
        dims: Option<usize>,
    },
    /// Magnetisation (mean field) (1/V) Σ_x φ_x, for φ⁴.
    Magnetisation {},
    /// Mean square of the coordinates (1/D) Σ_i x_i² (for φ⁴, the site average of φ²).
    MeanSquare {},
    /// Dihedral angle i–j–k–l of atoms in 3-D, in degrees in [−180, 180).
    Dihedral {
        /// First atom.
        i: usize,
        /// Second atom (the axis starts here).
        j: usize,
        /// Third atom (the axis ends here).
        k: usize,
        /// Fourth atom.
        l: usize,
    },
}

fn default_r0() -> f64 {
    1.5
}

impl CollectiveVariable {
    /// A short name for reports and array headers.
    pub fn name(&self) -> String {
        match self {
            CollectiveVariable::Coordinate { index } => format!("x[{index}]"),
            CollectiveVariable::Distance { i, j, .. } => format!("distance({i},{j})"),
            CollectiveVariable::Linear { .. } => "linear".to_string(),
            CollectiveVariable::RadiusOfGyration { .. } => "radius-of-gyration".to_string(),
            CollectiveVariable::Coordination { .. } => "coordination".to_string(),
            CollectiveVariable::Magnetisation {} => "magnetisation".to_string(),
            CollectiveVariable::MeanSquare {} => "mean-square".to_string(),
            CollectiveVariable::Dihedral { i, j, k, l } => format!("dihedral({i},{j},{k},{l})"),
        }
    }

    /// The particle dimension this variable uses, given the model's.
    fn particle_dims(&self, model_dims: Option<usize>) -> Option<usize> {
        match self {
            CollectiveVariable::Distance { dims, .. }
            | CollectiveVariable::RadiusOfGyration { dims }
            | CollectiveVariable::Coordination { dims, .. } => dims.or(model_dims),
            _ => None,
        }
    }

    /// Checks that the variable fits configurations of `dim` coordinates of a model
    /// whose particles (if any) have `model_dims` spatial dimensions.
    pub fn validate(&self, dim: usize, model_dims: Option<usize>) -> Result<(), PhysicsError> {
        let needs_particles = |d: Option<usize>| -> Result<usize, PhysicsError> {
            let d = d.ok_or(PhysicsError::InvalidParameter {
                name: "dims",
                reason: format!(
                    "{} needs the particles' dimension: the model has none, give `dims`",
                    self.name()
                ),
            })?;
            require(
                d > 0 && dim.is_multiple_of(d),
                "dims",
                format!("{d} does not divide the dimension {dim}"),
            )?;
            Ok(dim / d)
        };
        match self {
            CollectiveVariable::Coordinate { index } => require(
                *index < dim,
                "index",
                format!("{index} is out of range for dimension {dim}"),
            ),
            CollectiveVariable::Distance { i, j, .. } => {
                let n = needs_particles(self.particle_dims(model_dims))?;
                require(
                    *i < n && *j < n,
                    "i",
                    format!("particles {i} and {j} must be below {n}"),
                )?;
                require(i != j, "j", "must differ from i")
            }
            CollectiveVariable::Linear {
                indices,
                weights,
                offset,
            } => {
                require(!indices.is_empty(), "indices", "must not be empty")?;
                require(
                    indices.len() == weights.len(),
                    "weights",
                    "needs one weight per index",
                )?;
                require(
                    indices.iter().all(|k| *k < dim),
                    "indices",
                    format!("must be below {dim}"),
                )?;
                require(
                    weights.iter().all(|w| w.is_finite()) && offset.is_finite(),
                    "weights",
                    "must be finite",
                )
            }
            CollectiveVariable::RadiusOfGyration { .. } => {
                let n = needs_particles(self.particle_dims(model_dims))?;
                require(n >= 2, "dims", "needs at least two particles")
            }
            CollectiveVariable::Coordination { r0, .. } => {
                let n = needs_particles(self.particle_dims(model_dims))?;
                require(n >= 2, "dims", "needs at least two particles")?;
                require(r0.is_finite() && *r0 > 0.0, "r0", "must be positive")
            }
            CollectiveVariable::Magnetisation {} | CollectiveVariable::MeanSquare {} => Ok(()),
            CollectiveVariable::Dihedral { i, j, k, l } => {
                validate_dihedral([*i, *j, *k, *l], dim, "i")
            }
        }
    }

    /// The value of the variable at `x`.
    pub fn value(&self, x: &[f64], model_dims: Option<usize>) -> f64 {
        let mut g = vec![0.0; x.len()];
        self.value_and_gradient(x, model_dims, &mut g)
    }

    /// The value at `x`, with ∂s/∂x written into `grad` (same length as `x`). Call
    /// [`CollectiveVariable::validate`] first; an unvalidated variable may panic on
    /// out-of-range indices.
    pub fn value_and_gradient(
        &self,
        x: &[f64],
        model_dims: Option<usize>,
        grad: &mut [f64],
    ) -> f64 {
        grad.iter_mut().for_each(|g| *g = 0.0);
        let d = self.particle_dims(model_dims).unwrap_or(1);
        match self {
            CollectiveVariable::Coordinate { index } => {
                grad[*index] = 1.0;
                x[*index]
            }
            CollectiveVariable::Distance { i, j, .. } => {
                let r = (0..d)
                    .map(|c| (x[i * d + c] - x[j * d + c]).powi(2))
                    .sum::<f64>()
                    .sqrt();
                if r > 0.0 {
                    for c in 0..d {
                        let u = (x[i * d + c] - x[j * d + c]) / r;
                        grad[i * d + c] = u;
                        grad[j * d + c] = -u;
                    }
                }
                r
            }
            CollectiveVariable::Linear {
                indices,
                weights,
                offset,
            } => {
                let mut s = *offset;
                for (k, w) in indices.iter().zip(weights) {
                    s += w * x[*k];
                    grad[*k] += w;
                }
                s
            }
            CollectiveVariable::RadiusOfGyration { .. } => radius_of_gyration(x, d, grad),
            CollectiveVariable::Coordination { r0, .. } => coordination(x, d, *r0, grad),
            CollectiveVariable::Magnetisation {} => {
                let v = x.len() as f64;
                grad.iter_mut().for_each(|g| *g = 1.0 / v);
                x.iter().sum::<f64>() / v
            }
            CollectiveVariable::MeanSquare {} => {
                let v = x.len() as f64;
                grad.iter_mut()
                    .zip(x)
                    .for_each(|(g, &xi)| *g = 2.0 * xi / v);
                x.iter().map(|xi| xi * xi).sum::<f64>() / v
            }
            CollectiveVariable::Dihedral { i, j, k, l } => {
                dihedral_and_gradient(x, [*i, *j, *k, *l], grad)
            }
        }
    }

    /// Values of the variable for every configuration of a `[n, dim]` batch, after
    /// checking that it fits (so that bad indices are an error, not a panic).
    pub fn values(
        &self,
        x: &[f64],
        dim: usize,
        model_dims: Option<usize>,
    ) -> Result<Vec<f64>, PhysicsError> {
        self.validate(dim, model_dims)?;
        if !x.len().is_multiple_of(dim) {
            return Err(PhysicsError::StartShape { dim, got: x.len() });
        }
        let mut g = vec![0.0; dim];
        Ok(x.chunks(dim)
            .map(|xi| self.value_and_gradient(xi, model_dims, &mut g))
            .collect())
    }
}

/// Radius of gyration and its gradient (x_i − x_com)/(N R_g); the centre-of-mass terms
/// cancel because the deviations sum to zero.
fn radius_of_gyration(x: &[f64], d: usize, grad: &mut [f64]) -> f64 {
    let n = x.len() / d;
    let mut com = vec![0.0; d];
    for p in x.chunks(d) {
        for c in 0..d {
            com[c] += p[c] / n as f64;
        }
    }
    let mut sum = 0.0;
    for p in x.chunks(d) {
        for c in 0..d {
            sum += (p[c] - com[c]).powi(2);
        }
    }
    let rg = (sum / n as f64).sqrt();
    if rg > 0.0 {
        for (i, p) in x.chunks(d).enumerate() {
            for c in 0..d {
                grad[i * d + c] = (p[c] - com[c]) / (n as f64 * rg);
            }
        }
    }
    rg
}

/// Mean coordination (2/N) Σ_{i<j} 1/(1 + (r/r0)⁶) and its gradient.
fn coordination(x: &[f64], d: usize, r0: f64, grad: &mut [f64]) -> f64 {
    let n = x.len() / d;
    let scale = 2.0 / n as f64;
    let mut total = 0.0;
    for i in 0..n {
        for j in (i + 1)..n {
            let r2: f64 = (0..d).map(|c| (x[i * d + c] - x[j * d + c]).powi(2)).sum();
            let q2 = r2 / (r0 * r0);
            let q6 = q2 * q2 * q2;
            let s = 1.0 / (1.0 + q6);
            total += s;
            // ds/dr2 = -3 q⁴ / r0² · s², so ∂s/∂x_i = 2 (x_i − x_j) ds/dr2.
            let ds_dr2 = -3.0 * q2 * q2 / (r0 * r0) * s * s;
            for c in 0..d {
                let g = scale * 2.0 * (x[i * d + c] - x[j * d + c]) * ds_dr2;
                grad[i * d + c] += g;
                grad[j * d + c] -= g;
            }
        }
    }
    scale * total
}

/// Checks that four atoms name a dihedral of configurations of `dim` coordinates in 3-D:
/// `dim` a multiple of 3, every index an atom, and four different atoms. `key` is the
/// campaign-file key the atoms came from, for the message.
pub fn validate_dihedral(
    atoms: [usize; 4],
    dim: usize,
    key: &'static str,
) -> Result<(), PhysicsError> {
    require(
        dim > 0 && dim.is_multiple_of(3),
        "dim",
        format!("a dihedral needs atoms in 3-D, but dimension {dim} is not a multiple of 3"),
    )?;
    let n = dim / 3;
    require(
        atoms.iter().all(|a| *a < n),
        key,
        format!("atoms {atoms:?} must be below the {n} atoms of dimension {dim}"),
    )?;
    let distinct = (0..4).all(|p| (p + 1..4).all(|q| atoms[p] != atoms[q]));
    require(
        distinct,
        "j",
        format!("atoms {atoms:?} must be four different atoms"),
    )
}

/// Wraps an angle in degrees into [−180, 180).
pub fn wrap_degrees(a: f64) -> f64 {
    (a + 180.0).rem_euclid(360.0) - 180.0
}

/// The signed difference a − b of two angles in degrees, taken the short way round the
/// circle, in [−180, 180): 179° and −179° are 2° apart, not 358°.
pub fn periodic_difference(a: f64, b: f64) -> f64 {
    wrap_degrees(a - b)
}

/// The position of atom `a` of a flat 3-D configuration.
fn atom(x: &[f64], a: usize) -> [f64; 3] {
    [x[3 * a], x[3 * a + 1], x[3 * a + 2]]
}

fn sub(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}

fn cross(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}

fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

/// The dihedral angle of atoms `atoms` = (i, j, k, l) of a flat 3-D configuration, in
/// degrees in [−180, 180) (IUPAC sign). Collinear atoms give 0 (the angle is undefined
/// there).
pub fn dihedral_degrees(x: &[f64], atoms: [usize; 4]) -> f64 {
    let [i, j, k, l] = atoms.map(|a| atom(x, a));
    let (f, g, h) = (sub(i, j), sub(j, k), sub(l, k));
    let (a, b) = (cross(f, g), cross(h, g));
    let g_norm = dot(g, g).sqrt();
    // sin φ ∝ |g| g·(a × b)/|g|², cos φ ∝ a·b; atan2 needs no normalisation.
    let sin = dot(cross(b, a), g) / g_norm.max(f64::MIN_POSITIVE);
    let cos = dot(a, b);
    wrap_degrees(sin.atan2(cos).to_degrees())
}

/// The dihedral (degrees) and its gradient (degrees per coordinate unit) added into
/// `grad` at the four atoms, by the closed form of Blondel & Karplus (J. Comput. Chem.
/// 17, 1132, 1996), which has no singularity at φ = 0 or 180°. `grad` must be zero
/// outside the four atoms (the caller clears it).
fn dihedral_and_gradient(x: &[f64], atoms: [usize; 4], grad: &mut [f64]) -> f64 {
    let phi = dihedral_degrees(x, atoms);
    let [i, j, k, l] = atoms.map(|a| atom(x, a));
    let (f, g, h) = (sub(i, j), sub(j, k), sub(l, k));
    let (a, b) = (cross(f, g), cross(h, g));
    let (aa, bb, g_norm) = (dot(a, a), dot(b, b), dot(g, g).sqrt());
    if aa == 0.0 || bb == 0.0 || g_norm == 0.0 {
        return phi;
    }
    let deg = 180.0 / std::f64::consts::PI;
    let (fg, hg) = (dot(f, g), dot(h, g));
    for c in 0..3 {
        let da = a[c] / aa;
        let db = b[c] / bb;
        let gi = -g_norm * da;
        let gl = g_norm * db;
        let gj = g_norm * da + fg / g_norm * da - hg / g_norm * db;
        let gk = -g_norm * db - fg / g_norm * da + hg / g_norm * db;
        for (atom_idx, v) in [
            (atoms[0], gi),
            (atoms[1], gj),
            (atoms[2], gk),
            (atoms[3], gl),
        ] {
            grad[3 * atom_idx + c] += deg * v;
        }
    }
    phi
}

/// Four atoms i = (1,0,0), j = 0, k = (0,0,1), l = (cos t, sin t, 1): the dihedral is
/// t by construction (looking along +z from j to k, i must turn by t to cover l). A test
/// fixture shared with the fingerprint tests.
#[cfg(test)]
pub(crate) fn four_atoms_with_dihedral(t_deg: f64) -> Vec<f64> {
    let t = t_deg.to_radians();
    vec![
        1.0,
        0.0,
        0.0,
        0.0,
        0.0,
        0.0,
        0.0,
        0.0,
        1.0,
        t.cos(),
        t.sin(),
        1.0,
    ]
}

#[cfg(test)]
mod tests {
    use super::*;

    fn geometry(t_deg: f64) -> Vec<f64> {
        four_atoms_with_dihedral(t_deg)
    }

    #[test]
    fn dihedral_of_known_geometries() {
        // Exact by construction: cis 0°, ±90°, ±60°, 120°, and trans at the −180 end.
        for t in [0.0, 90.0, -90.0, 60.0, -60.0, 120.0, -150.0] {
            let got = dihedral_degrees(&geometry(t), [0, 1, 2, 3]);
            assert!((got - t).abs() < 1e-12, "built {t}, got {got}");
        }
        let trans = dihedral_degrees(&geometry(180.0), [0, 1, 2, 3]);
        assert!((trans + 180.0).abs() < 1e-9, "{trans}");
        // Reversing the order of the atoms keeps the angle; a mirror image flips its sign.
        let x = geometry(70.0);
        assert!((dihedral_degrees(&x, [3, 2, 1, 0]) - 70.0).abs() < 1e-12);
        let mirror: Vec<f64> = x.chunks(3).flat_map(|p| [p[0], -p[1], p[2]]).collect();
        assert!((dihedral_degrees(&mirror, [0, 1, 2, 3]) + 70.0).abs() < 1e-12);
        // Translation and rotation do not change it (rotate 90° about x, shift).
        let moved: Vec<f64> = x
            .chunks(3)
            .flat_map(|p| [p[0] + 3.0, -p[2] - 1.0, p[1] + 0.5])
            .collect();
        assert!((dihedral_degrees(&moved, [0, 1, 2, 3]) - 70.0).abs() < 1e-12);
    }

    #[test]
    fn periodic_difference_crosses_the_seam() {
        assert!((periodic_difference(179.0, -179.0) + 2.0).abs() < 1e-12);
        assert!((periodic_difference(-179.0, 179.0) - 2.0).abs() < 1e-12);
        assert!((periodic_difference(10.0, -10.0) - 20.0).abs() < 1e-12);
        assert_eq!(wrap_degrees(180.0), -180.0);
        assert_eq!(wrap_degrees(-180.0), -180.0);
        assert!((wrap_degrees(540.0 + 30.0) - (-150.0)).abs() < 1e-12);
        assert!((wrap_degrees(-725.0) - (-5.0)).abs() < 1e-12);
    }

    #[test]
    fn dihedral_gradient_matches_finite_differences() {
        let cv = CollectiveVariable::Dihedral {
            i: 0,
            j: 1,
            k: 3,
            l: 4,
        };
        // Five atoms (one unused), a generic geometry, and one near cis and near trans.
        let mut generic = vec![
            0.3, -1.1, 0.2, 0.0, 0.0, 0.0, 9.0, 9.0, 9.0, 0.1, 0.2, 1.4, 1.2, 0.7, 1.9,
        ];
        let mut near_trans = generic.clone();
        near_trans[12..15].copy_from_slice(&[-0.9, -1.3, 1.5]);
        for x in [&mut generic, &mut near_trans] {
            cv.validate(x.len(), None).unwrap();
            let mut g = vec![0.0; x.len()];
            let v = cv.value_and_gradient(x, None, &mut g);
            let h = 1e-6;
            for c in 0..x.len() {
                let x0 = x[c];
                x[c] = x0 + h;
                let up = cv.value(x, None);
                x[c] = x0 - h;
                let down = cv.value(x, None);
                x[c] = x0;
                let fd = periodic_difference(up, down) / (2.0 * h);
                assert!(
                    (fd - g[c]).abs() < 1e-5 * (1.0 + fd.abs()),
                    "value {v}, coord {c}: fd {fd}, analytic {}",
                    g[c]
                );
            }
            assert_eq!(&g[6..9], &[0.0, 0.0, 0.0]);
        }
    }

    #[test]
    fn dihedral_validation_names_the_problem() {
        let ok = CollectiveVariable::Dihedral {
            i: 0,
            j: 1,
            k: 2,
            l: 3,
        };
        assert!(ok.validate(12, None).is_ok());
        assert!(ok
            .validate(10, None)
            .unwrap_err()
            .to_string()
            .contains("multiple of 3"));
        let out = CollectiveVariable::Dihedral {
            i: 0,
            j: 1,
            k: 2,
            l: 4,
        };
        assert!(out
            .validate(12, None)
            .unwrap_err()
            .to_string()
            .contains("below the 4 atoms"));
        let same = CollectiveVariable::Dihedral {
            i: 0,
            j: 1,
            k: 1,
            l: 3,
        };
        assert!(same
            .validate(12, None)
            .unwrap_err()
            .to_string()
            .contains("different"));
    }
}
