//! The weight file: a `safetensors` byte string holding every tensor of the flow, with
//! the architecture in the header's `__metadata__`, so that the flow can be rebuilt
//! without tarn (see `examples/flow-weights/load_flow.py (repository root)`).
//!
//! Metadata keys: `format` = "tarn-flow", `format_version` = "1", `architecture` = the
//! `FlowSpec` as JSON, `convention` = a one-line statement of the direction and formulas.
//! Tensors (dtype F32 or F64, row-major):
//! - `coupling.{k}.cond_index`, `coupling.{k}.trans_index` (I64, [|A_k|], [|B_k|]): the
//!   coordinates that condition and that are transformed in coupling layer k;
//! - `coupling.{k}.dense.{l}.weight` ([n_in, n_out]) and `.bias` ([n_out]): dense layer l
//!   of layer k's conditioner, applied as h = act(h_prev @ W + b), no activation on the
//!   last layer, whose output is (raw s, t), each |B_k| wide;
//! - `whitening.mean` ([D]) and `whitening.chol` ([D, D], lower triangular) when the
//!   architecture has `whiten = true`.
//!
//! Reading never panics: every shape, dtype, index set and value is checked against the
//! architecture, and sizes are bounded by the file's own length before anything is
//! allocated.

use crate::flow::{build_layout, Flow, Whitening};
use crate::frame::Frame;
use crate::real::Real;
use crate::spec::{FlowSpec, FrameSpec};
use crate::FlowError;
use safetensors::tensor::{Dtype, SafeTensors, TensorView};

/// The value of the `format` metadata key.
pub const FORMAT_NAME: &str = "tarn-flow";
/// The value of the `format_version` metadata key written by this version.
pub const FORMAT_VERSION: &str = "1";

const CONVENTION: &str =
    "generative direction z -> x: per coupling k, x[B] = z[B] * exp(s) + t with \
(raw, t) = split(MLP(z[A])), s = clamp * tanh(raw / clamp); then y = mean + chol @ w (whitening); \
then the frame; latent z ~ N(0, tau I)";

fn bad(m: impl Into<String>) -> FlowError {
    FlowError::Format(m.into())
}

pub(crate) fn real_bytes<T: Real>(v: &[T]) -> Vec<u8> {
    let mut out = Vec::with_capacity(std::mem::size_of_val(v));
    for &x in v {
        if T::DTYPE_NAME == "F32" {
            out.extend_from_slice(&(x.to64() as f32).to_le_bytes());
        } else {
            out.extend_from_slice(&x.to64().to_le_bytes());
        }
    }
    out
}

impl<T: Real> Flow<T> {
    /// The flow as a safetensors byte string (tensors in this flow's precision).
    pub fn to_safetensors(&self) -> Result<Vec<u8>, FlowError> {
        let dtype = if T::DTYPE_NAME == "F32" {
            Dtype::F32
        } else {
            Dtype::F64
        };
        let mut owned: Vec<(String, Dtype, Vec<usize>, Vec<u8>)> = Vec::new();
        for (k, c) in self.layers.iter().enumerate() {
            let idx = |v: &[usize]| {
                v.iter()
                    .flat_map(|&i| (i as i64).to_le_bytes())
                    .collect::<Vec<u8>>()
            };
            owned.push((
                format!("coupling.{k}.cond_index"),
                Dtype::I64,
                vec![c.cond.len()],
                idx(&c.cond),
            ));
            owned.push((
                format!("coupling.{k}.trans_index"),
                Dtype::I64,
                vec![c.trans.len()],
                idx(&c.trans),
            ));
            for (l, d) in c.dense.iter().enumerate() {
                let w = real_bytes(&self.params[d.w..d.w + d.n_in * d.n_out]);
                let b = real_bytes(&self.params[d.b..d.b + d.n_out]);
                owned.push((
                    format!("coupling.{k}.dense.{l}.weight"),
                    dtype,
                    vec![d.n_in, d.n_out],
                    w,
                ));
                owned.push((
                    format!("coupling.{k}.dense.{l}.bias"),
                    dtype,
                    vec![d.n_out],
                    b,
                ));
            }
        }
        if let Some(w) = &self.whitening {
            let d = self.dim();
            owned.push(("whitening.mean".into(), dtype, vec![d], real_bytes(&w.mean)));
            owned.push((
                "whitening.chol".into(),
                dtype,
                vec![d, d],
                real_bytes(&w.chol),
            ));
        }
        let arch = serde_json::to_string(&self.spec).map_err(|e| bad(e.to_string()))?;
        let meta = [
            ("format", FORMAT_NAME.to_string()),
            ("format_version", FORMAT_VERSION.to_string()),
            ("architecture", arch),
            ("convention", CONVENTION.to_string()),
        ];
        Ok(write_safetensors(owned, &meta))
    }

    /// Reads a flow from a safetensors byte string written by `to_safetensors` (in either
    /// precision), checking everything against the recorded architecture.
    pub fn from_safetensors(bytes: &[u8]) -> Result<Self, FlowError> {
        let (st, arch) = open_weight_file(bytes, FORMAT_NAME, FORMAT_VERSION)?;
        let spec: FlowSpec = serde_json::from_str(&arch)
            .map_err(|e| bad(format!("metadata `architecture`: {e}")))?;
        // `validate` multiplies the frame's sizes unchecked; refuse a product that
        // overflows before it does.
        if let FrameSpec::CentreOfMass {
            n_particles,
            spatial_dim,
        } = spec.frame
        {
            if n_particles.checked_mul(spatial_dim).is_none() {
                return Err(bad(format!(
                    "metadata `architecture`: frame.n_particles * frame.spatial_dim = {n_particles} * {spatial_dim} overflows"
                )));
            }
        }
        spec.validate()
            .map_err(|e| bad(format!("metadata `architecture`: {e}")))?;
        check_size_bound(&spec, bytes.len())?;
        let (mut layers, n_params) = build_layout(&spec);
        let mut expected: usize =
            2 * layers.len() + layers.iter().map(|c| 2 * c.dense.len()).sum::<usize>();
        let mut params = vec![T::zero(); n_params];
        let d = spec.model_dim();
        for (k, c) in layers.iter_mut().enumerate() {
            let cond = read_index(&st, &format!("coupling.{k}.cond_index"), c.cond.len(), d)?;
            let trans = read_index(&st, &format!("coupling.{k}.trans_index"), c.trans.len(), d)?;
            let mut seen = vec![false; d];
            for &i in cond.iter().chain(&trans) {
                if std::mem::replace(&mut seen[i], true) {
                    return Err(bad(format!(
                        "coupling.{k}: coordinate {i} appears twice in the index sets"
                    )));
                }
            }
            c.cond = cond;
            c.trans = trans;
            for (l, dn) in c.dense.iter().enumerate() {
                let w = read_real::<T>(
                    &st,
                    &format!("coupling.{k}.dense.{l}.weight"),
                    &[dn.n_in, dn.n_out],
                )?;
                let b = read_real::<T>(&st, &format!("coupling.{k}.dense.{l}.bias"), &[dn.n_out])?;
                params[dn.w..dn.w + w.len()].copy_from_slice(&w);
                params[dn.b..dn.b + b.len()].copy_from_slice(&b);
            }
        }
        let whitening = if spec.whiten {
            expected += 2;
            // Read in this flow's precision, so that the checks below hold for the
            // values the flow will use (an f64 diagonal of 1e-60 is 0 in f32).
            let mean = read_real::<T>(&st, "whitening.mean", &[d])?;
            let chol = read_real::<T>(&st, "whitening.chol", &[d, d])?;
            for i in 0..d {
                let diag = chol[i * d + i].to64();
                if diag.is_nan() || diag <= 0.0 {
                    return Err(bad(format!("whitening.chol[{i},{i}] must be > 0")));
                }
                if (i + 1..d).any(|j| chol[i * d + j].to64() != 0.0) {
                    return Err(bad("whitening.chol must be lower triangular"));
                }
            }
            let w = Whitening::from_parts(mean, chol);
            if w.chol_inv.iter().any(|v| !v.to64().is_finite()) {
                return Err(bad(format!(
                    "whitening.chol is too close to singular for {} precision",
                    T::DTYPE_NAME
                )));
            }
            Some(w)
        } else {
            None
        };
        if st.len() != expected {
            let names: Vec<String> = st.names().into_iter().map(str::to_string).collect();
            return Err(bad(format!(
                "file has {} tensors, the architecture has {expected} ({names:?})",
                st.len()
            )));
        }
        Ok(Flow {
            frame: Frame::new(&spec.frame),
            spec,
            whitening,
            layers,
            params,
        })
    }
}

/// Parses a weight file's tensors and checks its `format` and `format_version` metadata;
/// returns the tensors and the `architecture` text.
pub(crate) fn open_weight_file<'a>(
    bytes: &'a [u8],
    format: &str,
    version: &str,
) -> Result<(SafeTensors<'a>, String), FlowError> {
    let st =
        SafeTensors::deserialize(bytes).map_err(|e| bad(format!("not a safetensors file: {e}")))?;
    let (_, header) =
        SafeTensors::read_metadata(bytes).map_err(|e| bad(format!("unreadable header: {e}")))?;
    let meta = header
        .metadata()
        .as_ref()
        .ok_or_else(|| bad("no __metadata__ in the header"))?;
    let get = |k: &str| {
        meta.get(k)
            .ok_or_else(|| bad(format!("metadata key `{k}` is missing")))
    };
    if get("format")? != format {
        return Err(bad(format!(
            "metadata `format` is `{}`, not `{format}`",
            get("format")?
        )));
    }
    if get("format_version")? != version {
        return Err(bad(format!(
            "format_version `{}` is not supported (this build reads `{version}`)",
            get("format_version")?
        )));
    }
    Ok((st, get("architecture")?.clone()))
}

/// Lays out a safetensors byte string deterministically: tensors sorted by name, data
/// in that order, the header's keys in that order (the crate's own serialiser takes the
/// metadata as a `HashMap`, whose random order would make equal flows differ in bytes),
/// and the header padded with spaces to a multiple of 8 bytes.
pub(crate) fn write_safetensors(
    mut tensors: Vec<(String, Dtype, Vec<usize>, Vec<u8>)>,
    meta: &[(&str, String)],
) -> Vec<u8> {
    tensors.sort_by(|a, b| a.0.cmp(&b.0));
    let mut header = serde_json::Map::new();
    let meta_obj: serde_json::Map<String, serde_json::Value> = meta
        .iter()
        .map(|(k, v)| (k.to_string(), serde_json::Value::String(v.clone())))
        .collect();
    header.insert("__metadata__".into(), serde_json::Value::Object(meta_obj));
    let mut offset = 0usize;
    for (name, dtype, shape, data) in &tensors {
        let dt = match dtype {
            Dtype::F32 => "F32",
            Dtype::F64 => "F64",
            _ => "I64",
        };
        header.insert(
            name.clone(),
            serde_json::json!({"dtype": dt, "shape": shape, "data_offsets": [offset, offset + data.len()]}),
        );
        offset += data.len();
    }
    let mut hbytes =
        serde_json::to_vec(&serde_json::Value::Object(header)).expect("a JSON map serialises");
    while !hbytes.len().is_multiple_of(8) {
        hbytes.push(b' ');
    }
    let mut out = Vec::with_capacity(8 + hbytes.len() + offset);
    out.extend_from_slice(&(hbytes.len() as u64).to_le_bytes());
    out.extend_from_slice(&hbytes);
    for (_, _, _, data) in &tensors {
        out.extend_from_slice(data);
    }
    out
}

/// Refuses architectures whose tensors could not fit in a file of `len` bytes, before
/// anything of that size is allocated (each parameter needs at least 4 bytes and each
/// coupling index 8).
fn check_size_bound(spec: &FlowSpec, len: usize) -> Result<(), FlowError> {
    let d = spec.model_dim() as u128;
    let h = spec.hidden_width as u128;
    let nh = spec.hidden_layers as u128;
    let a = d / 2; // both halves have at least d / 2 coordinates
    let per_layer_params = if nh == 0 {
        a * 2 * a + 2 * a
    } else {
        a * h + (nh - 1) * (h * h + h) + h + h * 2 * a + 2 * a
    };
    let need = spec.n_layers as u128 * (4 * per_layer_params + 8 * d);
    if need > len as u128 {
        return Err(bad(format!(
            "architecture needs at least {need} bytes of tensors but the file has {len}"
        )));
    }
    Ok(())
}

fn tensor<'a>(
    st: &'a SafeTensors<'a>,
    name: &str,
    shape: &[usize],
) -> Result<TensorView<'a>, FlowError> {
    let t = st
        .tensor(name)
        .map_err(|_| bad(format!("tensor `{name}` is missing")))?;
    if t.shape() != shape {
        return Err(bad(format!(
            "tensor `{name}` has shape {:?}, expected {shape:?}",
            t.shape()
        )));
    }
    Ok(t)
}

pub(crate) fn read_index(
    st: &SafeTensors<'_>,
    name: &str,
    len: usize,
    dim: usize,
) -> Result<Vec<usize>, FlowError> {
    let t = tensor(st, name, &[len])?;
    if t.dtype() != Dtype::I64 {
        return Err(bad(format!(
            "tensor `{name}` has dtype {:?}, expected I64",
            t.dtype()
        )));
    }
    t.data()
        .chunks_exact(8)
        .map(|b| {
            let v = i64::from_le_bytes(b.try_into().expect("chunks of 8"));
            if v < 0 || v as u64 >= dim as u64 {
                Err(bad(format!(
                    "tensor `{name}` holds index {v} outside 0..{dim}"
                )))
            } else {
                Ok(v as usize)
            }
        })
        .collect()
}

pub(crate) fn read_real<T: Real>(
    st: &SafeTensors<'_>,
    name: &str,
    shape: &[usize],
) -> Result<Vec<T>, FlowError> {
    let t = tensor(st, name, shape)?;
    let vals: Vec<f64> = match t.dtype() {
        Dtype::F32 => t
            .data()
            .chunks_exact(4)
            .map(|b| f32::from_le_bytes(b.try_into().expect("4")) as f64)
            .collect(),
        Dtype::F64 => t
            .data()
            .chunks_exact(8)
            .map(|b| f64::from_le_bytes(b.try_into().expect("8")))
            .collect(),
        other => {
            return Err(bad(format!(
                "tensor `{name}` has dtype {other:?}, expected F32 or F64"
            )))
        }
    };
    if let Some(i) = vals.iter().position(|v| !v.is_finite()) {
        return Err(bad(format!(
            "tensor `{name}` holds a non-finite value at flat index {i}"
        )));
    }
    // A finite f64 beyond the range of f32 becomes infinite in an f32 flow.
    let out: Vec<T> = vals.into_iter().map(T::of).collect();
    if let Some(i) = out.iter().position(|v| !v.to64().is_finite()) {
        return Err(bad(format!(
            "tensor `{name}` holds a non-finite value at flat index {i} in {} precision",
            T::DTYPE_NAME
        )));
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    //! Regressions found by fuzzing `Flow::from_safetensors` (fuzz/fuzz_targets/flow_weights.rs).

    use super::*;

    /// A small whitened f64 flow on two coordinates (identity frame).
    fn whitened_f64() -> Flow<f64> {
        let mut spec = FlowSpec::new(2);
        spec.n_layers = 1;
        spec.hidden_width = 2;
        spec.hidden_layers = 1;
        spec.whiten = true;
        let data: Vec<f64> = (0..20)
            .map(|i| ((i * 7 % 5) as f64) + 0.1 * i as f64)
            .collect();
        Flow::new(spec, Some(&data), 3).unwrap()
    }

    /// Rewrites the `architecture` metadata of a weight file, keeping its tensors.
    fn with_architecture(bytes: &[u8], arch: &str) -> Vec<u8> {
        let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
        let mut h: serde_json::Value = serde_json::from_slice(&bytes[8..8 + n]).unwrap();
        h["__metadata__"]["architecture"] = serde_json::Value::String(arch.into());
        let hs = serde_json::to_vec(&h).unwrap();
        let mut out = (hs.len() as u64).to_le_bytes().to_vec();
        out.extend(hs);
        out.extend(&bytes[8 + n..]);
        out
    }

    #[test]
    fn f64_weights_beyond_the_f32_range_are_refused_by_an_f32_reader() {
        let mut flow = whitened_f64();
        flow.params[0] = 1e300;
        let bytes = flow.to_safetensors().unwrap();
        assert!(Flow::<f64>::from_safetensors(&bytes).is_ok());
        let err = Flow::<f32>::from_safetensors(&bytes)
            .unwrap_err()
            .to_string();
        assert!(
            err.contains("non-finite value") && err.contains("F32"),
            "{err}"
        );
    }

    #[test]
    fn a_whitening_factor_that_overflows_or_vanishes_in_f32_is_refused() {
        // 1e300 overflows f32, 1e-60 is 0 in f32, and 1e-40 is a subnormal f32 whose
        // inverse overflows.
        for diag in [1e300, 1e-60, 1e-40] {
            let mut flow = whitened_f64();
            let w = flow.whitening.as_mut().unwrap();
            w.chol[0] = diag;
            let bytes = flow.to_safetensors().unwrap();
            let err = Flow::<f32>::from_safetensors(&bytes)
                .unwrap_err()
                .to_string();
            assert!(err.contains("whitening.chol"), "diagonal {diag}: {err}");
        }
    }

    #[test]
    fn a_frame_whose_size_overflows_is_refused_without_a_panic() {
        let bytes = whitened_f64().to_safetensors().unwrap();
        let arch = format!(
            r#"{{"data_dim":0,"frame":{{"kind":"centre_of_mass","n_particles":{},"spatial_dim":{}}},"n_layers":1,"hidden_width":2,"hidden_layers":1}}"#,
            1u64 << 33,
            1u64 << 31
        );
        let err = Flow::<f32>::from_safetensors(&with_architecture(&bytes, &arch))
            .unwrap_err()
            .to_string();
        assert!(err.contains("architecture"), "{err}");
    }
}
