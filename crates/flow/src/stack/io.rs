//! The layer stack's weight file: safetensors (8-byte little-endian header length, JSON
//! header, raw little-endian tensor data) with the metadata keys `format` =
//! "tarn-flow-stack", `format_version` = "1", `architecture` = the [`StackSpec`] as JSON
//! (every key written; `hidden` is `null` for the kind's default) and `convention` = a
//! one-line statement of the formulas below. Real tensors are F32 or F64 (the flow's
//! precision), index tensors I64.
//!
//! Layers: the entries of `architecture.layers`, each expanded into `repeat`
//! consecutive coupling layers, numbered k = 0, 1, ... across the whole stack from the
//! latent side. Per layer k:
//!
//! - `layer.{k}.cond_index`, `layer.{k}.trans_index` (I64): the coordinates A (lattice
//!   sites, row-major) that condition and B that are transformed, each sorted. They are
//!   the only record of a `coupling` layer's split (drawn from a seeded permutation), so
//!   readers take them from the file rather than recomputing them;
//! - `layer.{k}.net.{l}.weight` ([n_in · patch, n_out], applied as h @ W + b) and
//!   `.bias` ([n_out]) for l = 0..=len(hidden): linear layer l of the conditioner; every
//!   layer but the last is followed by the entry's `activation` (silu x/(1+e^−x), tanh,
//!   relu). P = the element-wise map's parameters per transformed coordinate.
//!   - `coupling` (dense): patch = 1; the input row is x[A] (n_in = |A| for l = 0) and
//!     the last layer has n_out = |B| · P, read as [|B|, P] row-major (θ of the b-th
//!     entry of B is columns b·P..(b+1)·P).
//!   - `checkerboard` (periodic convolution on the L×L lattice, L = `lattice_side`):
//!     patch = kernel²; the input is a one-channel map (n_in = 1 for l = 0) equal to x on
//!     the sites A and 0 on the others; every linear layer is applied at every site to
//!     that site's kernel×kernel periodic neighbourhood of the previous map, flattened
//!     with row offsets −h..h outer, column offsets −h..h inner and channels innermost
//!     (h = kernel / 2); the last layer gives P channels at every site, of which those
//!     at the sites of B are used.
//!
//! θ of one coordinate: `affine` (P = 2): (raw, t), s = clamp · tanh(raw / clamp),
//! x = z e^s + t in the generative direction. `spline` (P = 3·bins − 1): bins raw
//! widths, bins raw heights, bins − 1 raw interior knot slopes of the interval
//! rational-quadratic spline on [−bound, bound] with identity tails, exactly as in
//! [`crate::spline`] (minimum bin 1e-3 · 2·bound, minimum slope 1e-3, boundary slopes 1).
//!
//! Direction: layer k maps its input u to u' with u'[A] = u[A] and
//! u'[b] = g(u[b]; θ_b(u[A])). Since u[A] passes unchanged, the inverse reads the same
//! conditioner input from u'; log q(x) at temperature factor τ is log N(z; 0, τ I) +
//! Σ_k Σ_b ln |d g⁻¹/d u'_b|, running the layers from the last to layer 0.
//!
//! Reading checks the format, version and architecture (naming the layer whose kind is
//! unknown), bounds sizes by the file's length before allocating, and checks every
//! tensor's presence, dtype, shape and finiteness, the index sets against the
//! architecture, and that there are no extra tensors. A numpy reader written from this
//! description is `examples/flow-weights/load_stack.py`.

use super::{LayerSpec, StackFlow, StackSpec};
use crate::io::{open_weight_file, read_index, read_real, real_bytes, write_safetensors};
use crate::real::Real;
use crate::FlowError;
use safetensors::tensor::Dtype;

/// The value of the `format` metadata key of a layer-stack weight file.
pub const STACK_FORMAT_NAME: &str = "tarn-flow-stack";
/// The `format_version` this build writes and reads.
pub const STACK_FORMAT_VERSION: &str = "1";

const CONVENTION: &str = "generative direction z -> x, layer 0 first: per layer, \
x[trans] = g(z[trans]; theta) with theta = conditioner(z[cond]); affine: g = z * exp(s) + t, \
s = clamp * tanh(raw / clamp), (raw, t) = theta; spline: monotonic rational-quadratic on \
[-bound, bound], identity outside, theta = bins raw widths, bins raw heights, bins - 1 raw \
interior knot slopes (widths and heights 2 bound (1e-3 + (1 - 1e-3 bins) softmax), slopes \
1e-3 + softplus(r + ln(e^0.999 - 1)), boundary slopes 1); latent z ~ N(0, tau I)";

fn bad(m: impl Into<String>) -> FlowError {
    FlowError::Format(m.into())
}

/// Parses the `architecture` metadata, naming the layer entry that cannot be read.
pub(crate) fn parse_architecture(text: &str) -> Result<StackSpec, FlowError> {
    let v: serde_json::Value =
        serde_json::from_str(text).map_err(|e| bad(format!("metadata `architecture`: {e}")))?;
    if let Some(layers) = v.get("layers").and_then(|l| l.as_array()) {
        for (i, l) in layers.iter().enumerate() {
            serde_json::from_value::<LayerSpec>(l.clone()).map_err(|e| {
                bad(format!(
                    "metadata `architecture`: layers[{i}] (kind {}): {e}; this build knows the layer kinds `coupling` and `checkerboard` and the transforms `affine` and `spline`",
                    l.get("kind").map_or("missing".to_string(), |k| k.to_string())
                ))
            })?;
        }
    }
    serde_json::from_value(v).map_err(|e| bad(format!("metadata `architecture`: {e}")))
}

impl<T: Real> StackFlow<T> {
    /// The flow as a safetensors byte string (tensors in this flow's precision).
    pub fn to_safetensors(&self) -> Result<Vec<u8>, FlowError> {
        let dtype = if T::DTYPE_NAME == "F32" {
            Dtype::F32
        } else {
            Dtype::F64
        };
        let idx = |v: &[usize]| {
            v.iter()
                .flat_map(|&i| (i as i64).to_le_bytes())
                .collect::<Vec<u8>>()
        };
        let mut owned = Vec::new();
        for (k, layer) in self.layers.iter().enumerate() {
            owned.push((
                format!("layer.{k}.cond_index"),
                Dtype::I64,
                vec![layer.cond_idx.len()],
                idx(&layer.cond_idx),
            ));
            owned.push((
                format!("layer.{k}.trans_index"),
                Dtype::I64,
                vec![layer.trans_idx.len()],
                idx(&layer.trans_idx),
            ));
            let mut off = self.offsets[k];
            for (l, (n_in, n_out)) in layer.net.linear_shapes().into_iter().enumerate() {
                owned.push((
                    format!("layer.{k}.net.{l}.weight"),
                    dtype,
                    vec![n_in, n_out],
                    real_bytes(&self.params[off..off + n_in * n_out]),
                ));
                off += n_in * n_out;
                owned.push((
                    format!("layer.{k}.net.{l}.bias"),
                    dtype,
                    vec![n_out],
                    real_bytes(&self.params[off..off + n_out]),
                ));
                off += n_out;
            }
        }
        let arch = serde_json::to_string(&self.spec).map_err(|e| bad(e.to_string()))?;
        let meta = [
            ("format", STACK_FORMAT_NAME.to_string()),
            ("format_version", STACK_FORMAT_VERSION.to_string()),
            ("architecture", arch),
            ("convention", CONVENTION.to_string()),
        ];
        Ok(write_safetensors(owned, &meta))
    }

    /// Reads a flow written by [`StackFlow::to_safetensors`] (either precision).
    pub fn from_safetensors(bytes: &[u8]) -> Result<Self, FlowError> {
        let (st, arch) = open_weight_file(bytes, STACK_FORMAT_NAME, STACK_FORMAT_VERSION)?;
        let spec = parse_architecture(&arch)?;
        // Index tensors alone take 8 bytes per coordinate per layer.
        let layer_count: u128 = spec.layers.iter().map(|l| l.repeat as u128).sum();
        if (spec.data_dim as u128) * 8 * layer_count.max(1) > bytes.len() as u128 {
            return Err(bad(format!(
                "architecture has {} coordinates in {layer_count} layers, more than a file of {} bytes can hold",
                spec.data_dim,
                bytes.len()
            )));
        }
        // Parameters take at least 4 bytes each: bound their count before allocating.
        let layers = spec
            .build()
            .map_err(|e| bad(format!("metadata `architecture`: {e}")))?;
        let n_params: u128 = layers.iter().map(|l| l.net.n_params_u128()).sum();
        if n_params * 4 > bytes.len() as u128 {
            return Err(bad(format!(
                "architecture needs {n_params} parameters, more than a file of {} bytes can hold",
                bytes.len()
            )));
        }
        let shell = StackFlow::<T>::new_zeroed(spec)
            .map_err(|e| bad(format!("metadata `architecture`: {e}")))?;
        let mut flow = shell;
        let mut expected = 0usize;
        let d = flow.dim();
        for k in 0..flow.layers.len() {
            let layer = &flow.layers[k];
            let cond = read_index(
                &st,
                &format!("layer.{k}.cond_index"),
                layer.cond_idx.len(),
                d,
            )?;
            let trans = read_index(
                &st,
                &format!("layer.{k}.trans_index"),
                layer.trans_idx.len(),
                d,
            )?;
            if cond != layer.cond_idx || trans != layer.trans_idx {
                return Err(bad(format!(
                    "layer.{k}: the index sets differ from those the architecture defines"
                )));
            }
            expected += 2;
            let mut off = flow.offsets[k];
            for (l, (n_in, n_out)) in layer.net.linear_shapes().into_iter().enumerate() {
                let w = read_real::<T>(&st, &format!("layer.{k}.net.{l}.weight"), &[n_in, n_out])?;
                let b = read_real::<T>(&st, &format!("layer.{k}.net.{l}.bias"), &[n_out])?;
                flow.params[off..off + w.len()].copy_from_slice(&w);
                off += w.len();
                flow.params[off..off + b.len()].copy_from_slice(&b);
                off += b.len();
                expected += 2;
            }
        }
        if st.len() != expected {
            let names: Vec<String> = st.names().into_iter().map(str::to_string).collect();
            return Err(bad(format!(
                "file has {} tensors, the architecture has {expected} ({names:?})",
                st.len()
            )));
        }
        Ok(flow)
    }
}
