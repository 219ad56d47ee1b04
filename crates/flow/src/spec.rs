//! The architecture of a flow as data: what the campaign file sets and what the weight
//! file's metadata records, so that a flow can be rebuilt (in Rust or Python) from it.

use crate::FlowError;
use serde::{Deserialize, Serialize};

/// The conditioner's hidden-layer nonlinearity.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Activation {
    /// x * sigmoid(x): smooth, so the flow's Jacobian is smooth (the default).
    #[default]
    Silu,
    /// Hyperbolic tangent.
    Tanh,
    /// max(0, x).
    Relu,
}

/// A fixed linear layer between the data coordinates and the flow's coordinates that
/// removes exact zero modes of the energy, so that the flow's density is proper.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum FrameSpec {
    /// The flow works on the data coordinates as they are.
    #[default]
    Identity,
    /// The data are `n_particles` points in `spatial_dim` dimensions (particle-major:
    /// x0, y0, x1, y1, ...). The flow works on the (n_particles - 1) * spatial_dim
    /// coordinates of an orthonormal (Helmert) basis of the zero-centre-of-mass
    /// subspace: translation is removed exactly; rotation and permutation are not.
    CentreOfMass {
        /// Number of particles N (at least 2).
        n_particles: usize,
        /// Spatial dimension d (at least 1).
        spatial_dim: usize,
    },
}

impl FrameSpec {
    /// The number of flow coordinates for `data_dim` data coordinates.
    pub fn model_dim(&self, data_dim: usize) -> usize {
        match self {
            FrameSpec::Identity => data_dim,
            FrameSpec::CentreOfMass {
                n_particles,
                spatial_dim,
            } => n_particles.saturating_sub(1) * spatial_dim,
        }
    }
}

fn default_layers() -> usize {
    8
}
fn default_width() -> usize {
    64
}
fn default_hidden_layers() -> usize {
    2
}
fn default_clamp() -> f64 {
    3.0
}

/// The architecture of a RealNVP flow. Deserialised from campaign files (unknown keys
/// are refused) and written into the weight file's metadata.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FlowSpec {
    /// Number of data coordinates of one configuration. May be left out of a campaign
    /// file (it then reads as 0) for the adapter to fill in from the system; a flow is
    /// never built with 0.
    #[serde(default)]
    pub data_dim: usize,
    /// The fixed zero-mode frame between data and flow coordinates.
    #[serde(default)]
    pub frame: FrameSpec,
    /// Number of affine coupling layers (8 by default).
    #[serde(default = "default_layers")]
    pub n_layers: usize,
    /// Width H of every hidden layer of the conditioner (64 by default).
    #[serde(default = "default_width")]
    pub hidden_width: usize,
    /// Number of hidden layers of the conditioner (2 by default: D/2 -> H -> H -> D).
    #[serde(default = "default_hidden_layers")]
    pub hidden_layers: usize,
    /// Hidden nonlinearity (SiLU by default).
    #[serde(default)]
    pub activation: Activation,
    /// Log-scales are s = clamp * tanh(raw / clamp), so |s| < clamp (3 by default).
    #[serde(default = "default_clamp")]
    pub clamp: f64,
    /// Whether a fixed whitening layer (mean and Cholesky factor of the covariance of the
    /// initial data, in flow coordinates) sits between the couplings and the data.
    #[serde(default)]
    pub whiten: bool,
    /// Seed of the fixed coordinate permutations used when the dimension exceeds two.
    #[serde(default)]
    pub permutation_seed: u64,
}

impl FlowSpec {
    /// A spec with the defaults for everything but the data dimension.
    pub fn new(data_dim: usize) -> Self {
        FlowSpec {
            data_dim,
            frame: FrameSpec::Identity,
            n_layers: default_layers(),
            hidden_width: default_width(),
            hidden_layers: default_hidden_layers(),
            activation: Activation::Silu,
            clamp: default_clamp(),
            whiten: false,
            permutation_seed: 0,
        }
    }

    /// The number of coordinates the coupling layers act on.
    pub fn model_dim(&self) -> usize {
        self.frame.model_dim(self.data_dim)
    }

    /// Checks the spec for values that cannot make a flow, naming the field.
    pub fn validate(&self) -> Result<(), FlowError> {
        let bad = |m: String| Err(FlowError::Spec(m));
        if let FrameSpec::CentreOfMass {
            n_particles,
            spatial_dim,
        } = self.frame
        {
            if n_particles < 2 || spatial_dim < 1 {
                return bad(format!(
                    "frame.n_particles must be >= 2 and frame.spatial_dim >= 1 (got {n_particles}, {spatial_dim})"
                ));
            }
            if n_particles.checked_mul(spatial_dim) != Some(self.data_dim) {
                return bad(format!(
                    "frame: n_particles * spatial_dim = {} but data_dim = {}",
                    n_particles as u128 * spatial_dim as u128,
                    self.data_dim
                ));
            }
        }
        if self.model_dim() < 2 {
            return bad(format!(
                "data_dim: the flow needs at least 2 coordinates after the frame, got {}",
                self.model_dim()
            ));
        }
        if self.n_layers == 0 {
            return bad("n_layers must be at least 1".into());
        }
        if self.hidden_width == 0 {
            return bad("hidden_width must be at least 1".into());
        }
        if !(self.clamp.is_finite() && self.clamp > 0.0) {
            return bad(format!("clamp must be finite and > 0, got {}", self.clamp));
        }
        if self.model_dim() > 1 << 20 || self.hidden_width > 1 << 16 || self.n_layers > 4096 {
            return bad("dimensions too large".into());
        }
        Ok(())
    }
}
