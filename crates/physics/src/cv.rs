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
            CollectiveVariable::Magnetisation {} => Ok(()),
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
