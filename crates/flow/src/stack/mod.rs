//! The layer stack: a normalizing flow built from a list of coupling layers of
//! different kinds — dense-conditioned couplings over a coordinate split, and
//! checkerboard couplings with periodic convolutional conditioners for lattice fields —
//! each with an affine or a rational-quadratic spline element-wise map.
//!
//! Direction: f maps latent z to data x; layer 0 acts first on z. log q(x) at
//! temperature factor τ is log N(z; 0, τ I) − log|det ∂f/∂z|.
//!
//! Checkerboard layers (Albergo, Kanwar & Shanahan, Phys. Rev. D 100, 034515, 2019)
//! split the sites of an L×L periodic lattice by parity (row + column), alternating
//! from one layer to the next. Their conditioner is a stack of k×k periodic
//! convolutions whose input is the field on the conditioning sites (zero elsewhere), so
//! the layer commutes with every lattice translation that preserves parity.
//!
//! Owns: the stack's spec, its parameters, batched passes and their gradients. Must not
//! touch: files, the store, processes.

mod coupling;
pub mod io;
mod net;
pub mod sample;
pub mod train;

use crate::real::Real;
use crate::spec::Activation;
use crate::spline::SplineShape;
use crate::FlowError;
use coupling::{Coupling, CouplingTape, Transform};
use net::NetShape;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

/// Which coordinates a layer spec's couplings split.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum LayerKind {
    /// Halves of a fixed random permutation of the coordinates, alternating; a dense
    /// network conditions one half on the other.
    Coupling,
    /// The two parities of an L×L periodic lattice, alternating; a periodic
    /// convolutional network conditions one sublattice on the other.
    Checkerboard,
}

/// The element-wise map of a layer spec's couplings.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum TransformKind {
    /// y = x e^s + t, |s| < clamp.
    #[default]
    Affine,
    /// A monotonic rational-quadratic spline with `bins` bins on [−bound, bound] and
    /// identity tails (Durkan, Bekasov, Murray & Papamakarios, NeurIPS 2019).
    Spline,
}

fn one() -> usize {
    1
}
fn three() -> usize {
    3
}
fn default_clamp() -> f64 {
    3.0
}
fn default_bins() -> usize {
    8
}
fn default_bound() -> f64 {
    4.0
}

/// One entry of the `layers` list: `repeat` coupling layers of one kind.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LayerSpec {
    /// How the coordinates are split.
    pub kind: LayerKind,
    /// The element-wise map.
    #[serde(default)]
    pub transform: TransformKind,
    /// Number of consecutive layers of this spec (the split alternates between them).
    #[serde(default = "one")]
    pub repeat: usize,
    /// Hidden widths (dense) or channels (convolution) of the conditioner; default
    /// [64, 64] for `coupling`, [16, 16] for `checkerboard`.
    #[serde(default)]
    pub hidden: Option<Vec<usize>>,
    /// Convolution kernel size (odd), for `checkerboard`.
    #[serde(default = "three")]
    pub kernel: usize,
    /// Hidden nonlinearity.
    #[serde(default)]
    pub activation: Activation,
    /// Bound on the affine log-scale.
    #[serde(default = "default_clamp")]
    pub clamp: f64,
    /// Spline bins, for `transform = "spline"`.
    #[serde(default = "default_bins")]
    pub bins: usize,
    /// Spline interval half-width B, for `transform = "spline"`.
    #[serde(default = "default_bound")]
    pub bound: f64,
}

/// A stack's architecture: what the campaign file's `layers` list and tarn's system
/// information give, and what the weight file records.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StackSpec {
    /// Coordinates of one configuration.
    #[serde(default)]
    pub data_dim: usize,
    /// Side L when the coordinates are an L×L periodic lattice (site = row · L + col);
    /// 0 otherwise. Checkerboard layers need it.
    #[serde(default)]
    pub lattice_side: usize,
    /// The layers, from the latent side.
    pub layers: Vec<LayerSpec>,
    /// Seed of the fixed permutations of `coupling` layers.
    #[serde(default)]
    pub permutation_seed: u64,
}

impl StackSpec {
    /// Checks the spec, naming the offending entry.
    pub fn validate(&self) -> Result<(), FlowError> {
        self.build().map(|_| ())
    }

    /// The concrete coupling layers.
    fn build(&self) -> Result<Vec<Coupling>, FlowError> {
        let bad = |m: String| Err(FlowError::Spec(m));
        let d = self.data_dim;
        if d < 2 {
            return bad(format!("data_dim must be at least 2, got {d}"));
        }
        if self.layers.is_empty() {
            return bad("layers: at least one layer is needed".into());
        }
        let mut out = Vec::new();
        let (mut n_dense, mut n_check) = (0usize, 0usize);
        for (li, spec) in self.layers.iter().enumerate() {
            let at = |m: &str| FlowError::Spec(format!("layers[{li}]: {m}"));
            if spec.repeat == 0 || spec.repeat > 256 {
                return Err(at("repeat must be between 1 and 256"));
            }
            if !(spec.clamp.is_finite() && spec.clamp > 0.0) {
                return Err(at("clamp must be a positive number"));
            }
            let transform = match spec.transform {
                TransformKind::Affine => Transform::Affine { clamp: spec.clamp },
                TransformKind::Spline => {
                    let shape = SplineShape {
                        bins: spec.bins,
                        bound: spec.bound,
                        circular: false,
                    };
                    shape.validate().map_err(|e| at(&e))?;
                    Transform::Spline(shape)
                }
            };
            let p = transform.n_params();
            let hidden = spec.hidden.clone().unwrap_or_else(|| match spec.kind {
                LayerKind::Coupling => vec![64, 64],
                LayerKind::Checkerboard => vec![16, 16],
            });
            if hidden.iter().any(|&h| h == 0 || h > 4096) {
                return Err(at("hidden sizes must be between 1 and 4096"));
            }
            for _ in 0..spec.repeat {
                let layer = match spec.kind {
                    LayerKind::Coupling => {
                        let (cond_idx, trans_idx) = self.dense_split(n_dense);
                        n_dense += 1;
                        let mut sizes = vec![cond_idx.len()];
                        sizes.extend(&hidden);
                        sizes.push(trans_idx.len() * p);
                        Coupling {
                            cond_idx,
                            trans_idx,
                            net: NetShape {
                                sizes,
                                activation: spec.activation,
                                conv: None,
                            },
                            transform: transform.clone(),
                        }
                    }
                    LayerKind::Checkerboard => {
                        let l = self.lattice_side;
                        if l < 2 || l * l != d {
                            return Err(at(&format!(
                                "checkerboard layers need a square lattice: lattice_side = {l} but data_dim = {d}"
                            )));
                        }
                        if !l.is_multiple_of(2) {
                            return Err(at(&format!(
                                "checkerboard layers need an even lattice side, got {l}"
                            )));
                        }
                        if spec.kernel % 2 == 0 || spec.kernel > l + 1 {
                            return Err(at(&format!(
                                "kernel must be odd and at most the lattice side + 1, got {}",
                                spec.kernel
                            )));
                        }
                        let parity = n_check % 2;
                        n_check += 1;
                        let (mut cond_idx, mut trans_idx) = (Vec::new(), Vec::new());
                        for s in 0..d {
                            if (s / l + s % l) % 2 == parity {
                                trans_idx.push(s);
                            } else {
                                cond_idx.push(s);
                            }
                        }
                        let mut sizes = vec![1];
                        sizes.extend(&hidden);
                        sizes.push(p);
                        Coupling {
                            cond_idx,
                            trans_idx,
                            net: NetShape {
                                sizes,
                                activation: spec.activation,
                                conv: Some((l, spec.kernel)),
                            },
                            transform: transform.clone(),
                        }
                    }
                };
                out.push(layer);
            }
        }
        Ok(out)
    }

    /// The split of dense coupling number `k`: pairs of layers share a fixed random
    /// permutation (identity for two coordinates) and swap its halves.
    fn dense_split(&self, k: usize) -> (Vec<usize>, Vec<usize>) {
        let d = self.data_dim;
        let mut perm: Vec<usize> = (0..d).collect();
        if d > 2 {
            let mut rng = ChaCha8Rng::seed_from_u64(
                self.permutation_seed ^ (k as u64 / 2).wrapping_mul(0x9E37_79B9_7F4A_7C15),
            );
            perm.shuffle(&mut rng);
        }
        let half = d / 2;
        let (mut a, mut b) = (perm[..half].to_vec(), perm[half..].to_vec());
        if k % 2 == 1 {
            std::mem::swap(&mut a, &mut b);
        }
        a.sort_unstable();
        b.sort_unstable();
        (a, b)
    }
}

/// A flow made of a stack of coupling layers.
#[derive(Debug, Clone)]
pub struct StackFlow<T: Real> {
    spec: StackSpec,
    layers: Vec<Coupling>,
    offsets: Vec<usize>,
    params: Vec<T>,
}

/// Scratch for batched passes: the state before and after every layer, and one
/// layer's buffers.
#[derive(Debug, Default)]
pub struct StackTape<T> {
    states: Vec<Vec<T>>,
    layer: CouplingTape<T>,
    ld: Vec<T>,
}

impl<T: Real> StackFlow<T> {
    /// A new flow: hidden weights drawn from `seed`, output layers zero (the identity).
    pub fn new(spec: StackSpec, seed: u64) -> Result<Self, FlowError> {
        let mut flow = Self::new_zeroed(spec)?;
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        for (k, l) in flow.layers.iter().enumerate() {
            let (a, b) = (flow.offsets[k], flow.offsets[k + 1]);
            l.net.init(&mut rng, &mut flow.params[a..b]);
        }
        Ok(flow)
    }

    /// The architecture with every parameter zero.
    fn new_zeroed(spec: StackSpec) -> Result<Self, FlowError> {
        let layers = spec.build()?;
        let mut offsets = vec![0];
        for l in &layers {
            offsets.push(offsets.last().unwrap() + l.n_params());
        }
        let params = vec![T::zero(); *offsets.last().unwrap()];
        Ok(StackFlow {
            spec,
            layers,
            offsets,
            params,
        })
    }

    /// The architecture.
    pub fn spec(&self) -> &StackSpec {
        &self.spec
    }

    /// Coordinates of one configuration (data and latent alike).
    pub fn dim(&self) -> usize {
        self.spec.data_dim
    }

    /// Number of trainable parameters.
    pub fn n_params(&self) -> usize {
        self.params.len()
    }

    /// The flat parameter vector.
    pub fn params(&self) -> &[T] {
        &self.params
    }

    /// The flat parameter vector, for optimisers.
    pub fn params_mut(&mut self) -> &mut [T] {
        &mut self.params
    }

    /// The same flow in another precision.
    pub fn to_precision<U: Real>(&self) -> StackFlow<U> {
        StackFlow {
            spec: self.spec.clone(),
            layers: self.layers.clone(),
            offsets: self.offsets.clone(),
            params: self.params.iter().map(|v| U::of(v.to64())).collect(),
        }
    }

    fn layer_params(&self, k: usize) -> &[T] {
        &self.params[self.offsets[k]..self.offsets[k + 1]]
    }

    /// Maps latent rows `z` ([n, D]) to data rows in place; `log_det[i]` receives
    /// log|det ∂f/∂z| of row i. With `keep`, the tape keeps every layer's input for a
    /// backward pass.
    pub fn generate(&self, z: &mut [T], log_det: &mut [T], tape: &mut StackTape<T>, keep: bool) {
        let d = self.dim();
        log_det.fill(T::zero());
        if keep {
            tape.states.resize(self.layers.len(), Vec::new());
        }
        for (k, layer) in self.layers.iter().enumerate() {
            if keep {
                tape.states[k].clear();
                tape.states[k].extend_from_slice(z);
            }
            layer.apply(self.layer_params(k), z, d, log_det, false, &mut tape.layer);
        }
    }

    /// Maps data rows `x` ([n, D]) to latent rows in place; `log_det[i]` receives
    /// log|det ∂z/∂x| of row i (= −log|det ∂f/∂z|). With `keep`, the tape keeps every
    /// layer's input.
    pub fn invert(&self, x: &mut [T], log_det: &mut [T], tape: &mut StackTape<T>, keep: bool) {
        let d = self.dim();
        log_det.fill(T::zero());
        if keep {
            tape.states.resize(self.layers.len(), Vec::new());
        }
        for (k, layer) in self.layers.iter().enumerate().rev() {
            if keep {
                tape.states[k].clear();
                tape.states[k].extend_from_slice(x);
            }
            layer.apply(self.layer_params(k), x, d, log_det, true, &mut tape.layer);
        }
    }

    /// Backward pass of the last [`StackFlow::generate`] with `keep`: `g` holds dL/dx
    /// on entry and dL/dz on return; `g_ld[i]` is dL/d(log|det ∂f/∂z| of row i);
    /// dL/dparams is added into `g_params`.
    pub fn generate_backward(
        &self,
        g: &mut [T],
        g_ld: &[T],
        g_params: &mut [T],
        tape: &mut StackTape<T>,
    ) {
        let d = self.dim();
        for (k, layer) in self.layers.iter().enumerate().rev() {
            let (o0, o1) = (self.offsets[k], self.offsets[k + 1]);
            layer.backward(
                self.layer_params(k),
                &tape.states[k],
                d,
                g,
                g_ld,
                false,
                &mut g_params[o0..o1],
                &mut tape.layer,
            );
        }
    }

    /// Backward pass of the last [`StackFlow::invert`] with `keep`: `g` holds dL/dz on
    /// entry and dL/dx on return; `g_ld[i]` is dL/d(log|det ∂z/∂x| of row i).
    pub fn invert_backward(
        &self,
        g: &mut [T],
        g_ld: &[T],
        g_params: &mut [T],
        tape: &mut StackTape<T>,
    ) {
        let d = self.dim();
        for (k, layer) in self.layers.iter().enumerate() {
            let (o0, o1) = (self.offsets[k], self.offsets[k + 1]);
            layer.backward(
                self.layer_params(k),
                &tape.states[k],
                d,
                g,
                g_ld,
                true,
                &mut g_params[o0..o1],
                &mut tape.layer,
            );
        }
    }

    /// log q(x) of each row of `x` ([n, D], f64) at temperature factor `tau`.
    pub fn log_prob(&self, x: &[f64], tau: f64, tape: &mut StackTape<T>) -> Vec<f64> {
        let d = self.dim();
        let n = x.len() / d;
        let mut z: Vec<T> = x.iter().map(|&v| T::of(v)).collect();
        tape.ld.resize(n, T::zero());
        let mut ld = std::mem::take(&mut tape.ld);
        self.invert(&mut z, &mut ld, tape, false);
        let norm = -0.5 * d as f64 * (2.0 * std::f64::consts::PI * tau).ln();
        let out = z
            .chunks(d)
            .zip(&ld)
            .map(|(row, l)| {
                let zz: f64 = row.iter().map(|v| v.to64().powi(2)).sum();
                norm - 0.5 * zz / tau + l.to64()
            })
            .collect();
        tape.ld = ld;
        out
    }
}

#[cfg(test)]
mod tests;
