//! The flow's structure and parameters: coupling layers with their fixed index splits,
//! the conditioner MLPs' flat parameter vector, the optional whitening layer and the
//! zero-mode frame. Passes over batches live in `workspace` and `tape`.
//!
//! Direction convention: the flow f maps latent z to data x (generation). Coupling
//! layer k splits the flow coordinates into a conditioning set A_k and a transformed
//! set B_k and computes x_B = z_B * exp(s(z_A)) + t(z_A), x_A = z_A, with
//! s = clamp * tanh(raw / clamp). After the couplings, whitening maps w to
//! y = mean + L w (L the lower Cholesky factor), and the frame maps y to data x.

use crate::frame::Frame;
use crate::real::Real;
use crate::spec::FlowSpec;
use crate::FlowError;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// One dense layer's place in the flat parameter vector: weight [n_in, n_out] row-major
/// at `w`, bias [n_out] at `b`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Dense {
    pub n_in: usize,
    pub n_out: usize,
    pub w: usize,
    pub b: usize,
}

/// One affine coupling layer: which coordinates condition, which are transformed, and
/// its conditioner's dense layers (the last one outputs raw s then t, each |B| wide).
#[derive(Debug, Clone, PartialEq, Eq)]
pub(crate) struct Coupling {
    pub cond: Vec<usize>,
    pub trans: Vec<usize>,
    pub dense: Vec<Dense>,
}

/// The fixed whitening layer y = mean + L w, with L^{-1} kept for the inverse.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Whitening<T> {
    pub mean: Vec<T>,
    pub chol: Vec<T>,
    pub chol_inv: Vec<T>,
    /// log|det L| = sum_i log L_ii, the log-determinant of w -> y.
    pub log_det: f64,
}

/// A RealNVP normalizing flow in precision `T` (f32 for work, f64 for checks).
#[derive(Debug, Clone, PartialEq)]
pub struct Flow<T: Real> {
    pub(crate) spec: FlowSpec,
    pub(crate) frame: Frame,
    pub(crate) whitening: Option<Whitening<T>>,
    pub(crate) layers: Vec<Coupling>,
    pub(crate) params: Vec<T>,
}

/// Builds the coupling layers' index splits and parameter layout for `spec`: the halves
/// alternate between consecutive layers; above two dimensions every pair of layers uses
/// a fresh fixed random permutation drawn from `spec.permutation_seed`.
pub(crate) fn build_layout(spec: &FlowSpec) -> (Vec<Coupling>, usize) {
    let d = spec.model_dim();
    let mut rng = ChaCha8Rng::seed_from_u64(spec.permutation_seed);
    let mut perm: Vec<usize> = (0..d).collect();
    let mut layers = Vec::with_capacity(spec.n_layers);
    let mut offset = 0;
    for k in 0..spec.n_layers {
        if k % 2 == 0 && d > 2 {
            perm = (0..d).collect();
            perm.shuffle(&mut rng);
        }
        let half = d / 2;
        let (first, second) = perm.split_at(half);
        let (cond, trans) = if k % 2 == 0 {
            (first.to_vec(), second.to_vec())
        } else {
            (second.to_vec(), first.to_vec())
        };
        let mut sizes = vec![cond.len()];
        sizes.extend(std::iter::repeat_n(spec.hidden_width, spec.hidden_layers));
        sizes.push(2 * trans.len());
        let mut dense = Vec::with_capacity(sizes.len() - 1);
        for w in sizes.windows(2) {
            let (n_in, n_out) = (w[0], w[1]);
            dense.push(Dense {
                n_in,
                n_out,
                w: offset,
                b: offset + n_in * n_out,
            });
            offset += n_in * n_out + n_out;
        }
        layers.push(Coupling { cond, trans, dense });
    }
    (layers, offset)
}

impl<T: Real> Flow<T> {
    /// Makes a flow for `spec`, with conditioner weights drawn from `seed` (Glorot-uniform
    /// hidden layers, zero output layers, so the new flow is the identity map composed
    /// with the fixed layers). `init_data` ([n, data_dim] row-major) is required when
    /// `spec.whiten` is set and is used only for the whitening statistics.
    pub fn new(spec: FlowSpec, init_data: Option<&[f64]>, seed: u64) -> Result<Self, FlowError> {
        spec.validate()?;
        let (layers, n_params) = build_layout(&spec);
        let frame = Frame::new(&spec.frame);
        let whitening = if spec.whiten {
            let data = init_data.ok_or_else(|| {
                FlowError::Spec("whiten is set but no initial data was given".into())
            })?;
            Some(Whitening::from_data(&spec, &frame, data)?)
        } else {
            None
        };
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut params = vec![T::zero(); n_params];
        for layer in &layers {
            let last = layer.dense.len() - 1;
            for (l, dn) in layer.dense.iter().enumerate() {
                if l == last {
                    continue;
                }
                let a = (6.0 / (dn.n_in + dn.n_out) as f64).sqrt();
                for p in &mut params[dn.w..dn.w + dn.n_in * dn.n_out] {
                    *p = T::of(rng.gen_range(-a..a));
                }
            }
        }
        Ok(Flow {
            spec,
            frame,
            whitening,
            layers,
            params,
        })
    }

    /// The architecture.
    pub fn spec(&self) -> &FlowSpec {
        &self.spec
    }

    /// Number of flow (latent) coordinates.
    pub fn dim(&self) -> usize {
        self.spec.model_dim()
    }

    /// Number of data coordinates.
    pub fn data_dim(&self) -> usize {
        self.spec.data_dim
    }

    /// Number of trainable parameters.
    pub fn n_params(&self) -> usize {
        self.params.len()
    }

    /// The flat parameter vector (layout: per coupling layer, per dense layer, weight
    /// [n_in, n_out] row-major then bias).
    pub fn params(&self) -> &[T] {
        &self.params
    }

    /// Mutable access to the flat parameter vector (for optimisers and tests).
    pub fn params_mut(&mut self) -> &mut [T] {
        &mut self.params
    }

    /// The log-determinant of the fixed layers in the generative direction (whitening;
    /// the frame contributes zero).
    pub fn fixed_log_det(&self) -> f64 {
        self.whitening.as_ref().map_or(0.0, |w| w.log_det)
    }

    /// Multiply-accumulate count of the conditioners' weights per sample and pass: the
    /// basis of the benchmark's FLOP figures (2 flops per multiply-accumulate).
    pub fn weight_macs_per_sample(&self) -> usize {
        self.layers
            .iter()
            .flat_map(|l| l.dense.iter())
            .map(|d| d.n_in * d.n_out)
            .sum()
    }

    /// The same flow converted to precision `U`.
    pub fn to_precision<U: Real>(&self) -> Flow<U> {
        let cv = |v: &[T]| v.iter().map(|x| U::of(x.to64())).collect::<Vec<U>>();
        Flow {
            spec: self.spec.clone(),
            frame: self.frame.clone(),
            whitening: self
                .whitening
                .as_ref()
                .map(|w| Whitening::from_parts(cv(&w.mean), cv(&w.chol))),
            layers: self.layers.clone(),
            params: cv(&self.params),
        }
    }
}

impl<T: Real> Whitening<T> {
    /// Mean and Cholesky factor of the covariance of `data` in flow coordinates, with a
    /// shrinkage of 1e-3 times the mean variance added to the diagonal so that fewer
    /// samples than dimensions still give a well-conditioned, invertible layer.
    pub(crate) fn from_data(
        spec: &FlowSpec,
        frame: &Frame,
        data: &[f64],
    ) -> Result<Self, FlowError> {
        let (dx, d) = (spec.data_dim, spec.model_dim());
        if !data.len().is_multiple_of(dx) || data.len() / dx < 2 {
            return Err(FlowError::Spec(format!(
                "whitening needs at least 2 initial samples of {dx} values, got {} values",
                data.len()
            )));
        }
        if data.iter().any(|v| !v.is_finite()) {
            return Err(FlowError::Spec(
                "whitening data contain non-finite values".into(),
            ));
        }
        let n = data.len() / dx;
        let mut y = vec![0.0f64; n * d];
        frame.to_model(n, data, &mut y);
        let mut mean = vec![0.0; d];
        for r in y.chunks_exact(d) {
            for (m, v) in mean.iter_mut().zip(r) {
                *m += v / n as f64;
            }
        }
        let mut cov = vec![0.0; d * d];
        for r in y.chunks_exact(d) {
            for i in 0..d {
                let di = r[i] - mean[i];
                for j in 0..=i {
                    cov[i * d + j] += di * (r[j] - mean[j]) / (n - 1) as f64;
                }
            }
        }
        let mean_var = (0..d).map(|i| cov[i * d + i]).sum::<f64>() / d as f64;
        let shrink = 1e-3 * mean_var + 1e-300;
        for i in 0..d {
            cov[i * d + i] += shrink;
        }
        let chol = cholesky_lower(d, &cov).ok_or_else(|| {
            FlowError::Spec(
                "whitening: covariance is not positive definite (constant data?)".into(),
            )
        })?;
        let cv = |v: &[f64]| v.iter().map(|&x| T::of(x)).collect::<Vec<T>>();
        Ok(Whitening::from_parts(cv(&mean), cv(&chol)))
    }

    /// The layer for a given mean and lower Cholesky factor (already in precision T):
    /// the inverse and log-determinant are derived from the stored factor itself, so a
    /// flow read back from a file is bit-identical to the one written.
    pub(crate) fn from_parts(mean: Vec<T>, chol: Vec<T>) -> Self {
        let d = mean.len();
        let c64: Vec<f64> = chol.iter().map(|v| v.to64()).collect();
        let inv = invert_lower(d, &c64);
        Whitening {
            mean,
            chol,
            chol_inv: inv.iter().map(|&x| T::of(x)).collect(),
            log_det: (0..d).map(|i| c64[i * d + i].ln()).sum(),
        }
    }
}

/// Lower Cholesky factor of the symmetric matrix whose lower triangle is in `a`, or
/// `None` if it is not positive definite.
pub(crate) fn cholesky_lower(d: usize, a: &[f64]) -> Option<Vec<f64>> {
    let mut l = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..=i {
            let mut s = a[i * d + j];
            for k in 0..j {
                s -= l[i * d + k] * l[j * d + k];
            }
            if i == j {
                if !(s > 0.0 && s.is_finite()) {
                    return None;
                }
                l[i * d + i] = s.sqrt();
            } else {
                l[i * d + j] = s / l[j * d + j];
            }
        }
    }
    Some(l)
}

/// Inverse of a lower-triangular matrix with positive diagonal (forward substitution).
pub(crate) fn invert_lower(d: usize, l: &[f64]) -> Vec<f64> {
    let mut inv = vec![0.0; d * d];
    for c in 0..d {
        for i in c..d {
            let mut s = if i == c { 1.0 } else { 0.0 };
            for k in c..i {
                s -= l[i * d + k] * inv[k * d + c];
            }
            inv[i * d + c] = s / l[i * d + i];
        }
    }
    inv
}
