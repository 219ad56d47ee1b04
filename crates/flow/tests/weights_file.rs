//! The safetensors weight files: exact round trips, strict refusal of malformed files
//! (never a panic), and an independent numpy re-implementation
//! (examples/flow-weights/load_flow.py, which reads layer-stack files with load_stack.py)
//! reproducing log q from the file alone, for the RealNVP flow and for layer stacks of
//! every layer kind and transform.

mod common;
use common::*;
use proptest::prelude::*;
use tarn_flow::stack::{LayerKind, LayerSpec, StackFlow, StackSpec, StackTape, TransformKind};
use tarn_flow::{Flow, FlowError, FlowSpec, FrameSpec, Threading, Workspace};

fn sample_flow() -> Flow<f32> {
    let mut spec = FlowSpec::new(6);
    spec.n_layers = 3;
    spec.hidden_width = 8;
    spec.whiten = true;
    spec.permutation_seed = 4;
    let data: Vec<f64> = normals(40, 6, 1)
        .iter()
        .enumerate()
        .map(|(i, v)| v * (1.0 + (i % 6) as f64) + 0.5)
        .collect();
    random_flow(spec, Some(&data), 2, 0.3)
}

fn log_q<T: tarn_flow::Real>(flow: &Flow<T>, x: &[T]) -> Vec<f64> {
    let mut ws = Workspace::new(flow, 64, 1, Threading::Batch).unwrap();
    let mut out = vec![0.0; x.len() / flow.data_dim()];
    ws.log_prob(flow, x, 1.0, &mut out).unwrap();
    out
}

/// Rewrites the JSON header of a safetensors byte string, keeping the data.
fn edit_header(bytes: &[u8], f: impl FnOnce(&mut serde_json::Value)) -> Vec<u8> {
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    let mut h: serde_json::Value = serde_json::from_slice(&bytes[8..8 + n]).unwrap();
    f(&mut h);
    let hs = serde_json::to_vec(&h).unwrap();
    let mut out = (hs.len() as u64).to_le_bytes().to_vec();
    out.extend(hs);
    out.extend(&bytes[8 + n..]);
    out
}

fn edit_arch(bytes: &[u8], f: impl FnOnce(&mut serde_json::Value)) -> Vec<u8> {
    edit_header(bytes, |h| {
        let s = h["__metadata__"]["architecture"]
            .as_str()
            .unwrap()
            .to_string();
        let mut a: serde_json::Value = serde_json::from_str(&s).unwrap();
        f(&mut a);
        h["__metadata__"]["architecture"] = serde_json::Value::String(a.to_string());
    })
}

#[test]
fn round_trip_is_exact_in_both_precisions() {
    let flow = sample_flow();
    let bytes = flow.to_safetensors().unwrap();
    let back = Flow::<f32>::from_safetensors(&bytes).unwrap();
    assert_eq!(back, flow);
    assert_eq!(
        back.to_safetensors().unwrap(),
        bytes,
        "same flow, same bytes"
    );
    let x: Vec<f32> = normals(20, 6, 3).iter().map(|&v| v as f32).collect();
    assert_eq!(log_q(&flow, &x), log_q(&back, &x));
    let f64flow: Flow<f64> = random_flow(FlowSpec::new(3), None, 4, 0.2);
    let b64 = f64flow.to_safetensors().unwrap();
    assert_eq!(Flow::<f64>::from_safetensors(&b64).unwrap(), f64flow);
    // An f32 file read into f64 holds exactly the f32 values.
    let wide = Flow::<f64>::from_safetensors(&bytes).unwrap();
    assert!(wide
        .params()
        .iter()
        .zip(flow.params())
        .all(|(a, &b)| *a == b as f64));
}

#[test]
fn malformed_files_are_clear_errors() {
    let bytes = sample_flow().to_safetensors().unwrap();
    let msg = |b: &[u8]| match Flow::<f32>::from_safetensors(b) {
        Err(FlowError::Format(m)) => m,
        other => panic!("expected a format error, got {other:?}"),
    };
    assert!(msg(&bytes[..5]).contains("not a safetensors file"));
    assert!(msg(&bytes[..bytes.len() - 3]).contains("not a safetensors file"));
    assert!(msg(b"").contains("not a safetensors"));
    let m = msg(&edit_header(&bytes, |h| {
        h["__metadata__"]["format"] = "other".into()
    }));
    assert!(m.contains("format"), "{m}");
    let m = msg(&edit_header(&bytes, |h| {
        h["__metadata__"]["format_version"] = "9".into()
    }));
    assert!(m.contains("format_version `9`"), "{m}");
    let m = msg(&edit_header(&bytes, |h| {
        h["__metadata__"]
            .as_object_mut()
            .unwrap()
            .remove("architecture");
    }));
    assert!(m.contains("`architecture` is missing"), "{m}");
    let m = msg(&edit_arch(&bytes, |a| a["hidden_width"] = 9.into()));
    assert!(m.contains("shape") || m.contains("bytes"), "{m}");
    let m = msg(&edit_arch(&bytes, |a| a["surprise"] = 1.into()));
    assert!(m.contains("unknown field"), "{m}");
    let m = msg(&edit_arch(&bytes, |a| {
        a["n_layers"] = 4000.into();
        a["hidden_width"] = 60000.into();
    }));
    assert!(
        m.contains("bytes of tensors"),
        "huge architecture must be refused before allocating: {m}"
    );
    // The same file without one tensor (rebuilt, so that the offsets stay valid).
    let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let (_, header) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let kept: Vec<_> = st
        .tensors()
        .into_iter()
        .filter(|(n, _)| n != "coupling.1.dense.0.bias")
        .collect();
    let without = safetensors::serialize(kept, header.metadata().clone()).unwrap();
    let m = msg(&without);
    assert!(
        m.contains("coupling.1.dense.0.bias") && m.contains("missing"),
        "{m}"
    );
    // A NaN weight.
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    let h: serde_json::Value = serde_json::from_slice(&bytes[8..8 + n]).unwrap();
    let off = h["coupling.0.dense.1.weight"]["data_offsets"][0]
        .as_u64()
        .unwrap() as usize;
    let mut nan = bytes.clone();
    nan[8 + n + off..8 + n + off + 4].copy_from_slice(&f32::NAN.to_le_bytes());
    assert!(msg(&nan).contains("non-finite"));
    // An index out of range and a duplicated index.
    let ioff = h["coupling.0.cond_index"]["data_offsets"][0]
        .as_u64()
        .unwrap() as usize;
    let mut oob = bytes.clone();
    oob[8 + n + ioff..8 + n + ioff + 8].copy_from_slice(&99i64.to_le_bytes());
    assert!(msg(&oob).contains("outside"));
    let toff = h["coupling.0.trans_index"]["data_offsets"][0]
        .as_u64()
        .unwrap() as usize;
    let mut dup = bytes.clone();
    let first: [u8; 8] = bytes[8 + n + ioff..8 + n + ioff + 8].try_into().unwrap();
    dup[8 + n + toff..8 + n + toff + 8].copy_from_slice(&first);
    assert!(msg(&dup).contains("twice"));
    // Whitening with a non-positive diagonal.
    let coff = h["whitening.chol"]["data_offsets"][0].as_u64().unwrap() as usize;
    let mut neg = bytes.clone();
    neg[8 + n + coff..8 + n + coff + 4].copy_from_slice(&(-1.0f32).to_le_bytes());
    assert!(msg(&neg).contains("whitening.chol"));
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]
    /// Random corruption anywhere in the file gives an error or a valid flow, never a panic.
    #[test]
    fn corrupted_bytes_never_panic(pos in 0usize..4000, val in any::<u8>(), cut in 0usize..4000) {
        let mut bytes = sample_flow().to_safetensors().unwrap();
        let p = pos % bytes.len();
        bytes[p] = val;
        let c = cut % (bytes.len() + 1);
        let _ = Flow::<f32>::from_safetensors(&bytes[..c.max(p + 1).min(bytes.len())]);
    }
}

/// Whether `python3` with numpy can be run (the numpy checks are skipped otherwise).
fn have_numpy() -> bool {
    std::process::Command::new("python3")
        .args(["-c", "import numpy"])
        .status()
        .map(|s| s.success())
        .unwrap_or(false)
}

/// A fresh temporary directory for one test's files.
fn temp_dir(tag: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!("tarn-flow-py-{tag}-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// Writes the rows of `x` (`dim` columns) as CSV with round-trip precision.
fn write_points(path: &std::path::Path, x: &[f64], dim: usize) {
    let csv: String = x
        .chunks(dim)
        .map(|r| {
            r.iter()
                .map(|v| format!("{v:.17e}"))
                .collect::<Vec<_>>()
                .join(",")
                + "\n"
        })
        .collect();
    std::fs::write(path, csv).unwrap();
}

/// Runs examples/flow-weights/load_flow.py on a weight file and a points file and
/// returns the log q it prints, one per row.
fn python_log_q(flow: &std::path::Path, points: &std::path::Path, tau: f64) -> Vec<f64> {
    let script = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../../examples/flow-weights/load_flow.py"
    );
    let out = std::process::Command::new("python3")
        .arg(script)
        .arg(flow)
        .arg(points)
        .arg(format!("{tau:.17e}"))
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout)
        .unwrap()
        .lines()
        .map(|l| l.parse().unwrap())
        .collect()
}

#[test]
fn numpy_loader_reproduces_log_q() {
    if !have_numpy() {
        eprintln!(
            "SKIPPED: python3 with numpy is not available (pip install numpy to run this check)"
        );
        return;
    }
    let dir = temp_dir("realnvp");
    let mut cases: Vec<(Flow<f64>, usize)> = Vec::new();
    cases.push((sample_flow().to_precision(), 6));
    let mut com = FlowSpec::new(8);
    com.frame = FrameSpec::CentreOfMass {
        n_particles: 4,
        spatial_dim: 2,
    };
    com.activation = tarn_flow::Activation::Tanh;
    com.n_layers = 3;
    com.hidden_width = 8;
    cases.push((random_flow(com, None, 6, 0.3), 8));
    for (i, (flow, dx)) in cases.into_iter().enumerate() {
        let path = dir.join(format!("flow{i}.safetensors"));
        std::fs::write(&path, flow.to_safetensors().unwrap()).unwrap();
        let x = normals(5, dx, 7 + i as u64);
        let pts = dir.join(format!("points{i}.csv"));
        write_points(&pts, &x, dx);
        let py = python_log_q(&path, &pts, 1.0);
        let rust = log_q(&flow, &x);
        assert_eq!(py.len(), rust.len());
        for (a, b) in py.iter().zip(&rust) {
            assert!(
                (a - b).abs() < 1e-9 * (1.0 + b.abs()),
                "numpy {a} vs rust {b}"
            );
        }
        eprintln!(
            "case {i}: numpy loader agrees with Rust on {} points",
            rust.len()
        );
    }
    std::fs::remove_dir_all(&dir).ok();
}

/// One layer-stack spec entry with every key given.
#[allow(clippy::too_many_arguments)]
fn stack_layer(
    kind: LayerKind,
    transform: TransformKind,
    repeat: usize,
    hidden: Vec<usize>,
    kernel: usize,
    activation: tarn_flow::Activation,
    clamp: f64,
    bins: usize,
    bound: f64,
) -> LayerSpec {
    LayerSpec {
        kind,
        transform,
        repeat,
        hidden: Some(hidden),
        kernel,
        activation,
        clamp,
        bins,
        bound,
    }
}

/// A stack flow with every parameter drawn uniformly from ±`scale` (a new flow's output
/// layers are zero, i.e. the identity, which would test nothing).
fn random_stack(spec: StackSpec, seed: u64, scale: f64) -> StackFlow<f64> {
    use rand::{Rng, SeedableRng};
    let mut flow = StackFlow::<f64>::new(spec, seed).unwrap();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed ^ 0x5eed);
    for p in flow.params_mut() {
        *p = rng.gen_range(-scale..scale);
    }
    flow
}

/// The stack flows of the numpy check: each layer kind with each transform, alone, and
/// all four in one stack on a lattice (dense couplings on lattice coordinates too).
fn stack_cases() -> Vec<(&'static str, StackFlow<f64>)> {
    use tarn_flow::Activation::{Relu, Silu, Tanh};
    use LayerKind::{Checkerboard, Coupling};
    use TransformKind::{Affine, Spline};
    let dense = |transform, d: usize, seed: u64| StackSpec {
        data_dim: d,
        lattice_side: 0,
        layers: vec![stack_layer(
            Coupling,
            transform,
            4,
            vec![9, 6],
            3,
            Silu,
            2.0,
            5,
            2.0,
        )],
        permutation_seed: seed,
    };
    let lattice = |layers, side: usize| StackSpec {
        data_dim: side * side,
        lattice_side: side,
        layers,
        permutation_seed: 3,
    };
    let mixed = vec![
        stack_layer(Coupling, Spline, 1, vec![7], 3, Tanh, 3.0, 6, 2.5),
        stack_layer(Checkerboard, Affine, 2, vec![4, 3], 3, Silu, 1.5, 8, 4.0),
        stack_layer(Checkerboard, Spline, 2, vec![3], 5, Relu, 3.0, 4, 1.5),
        stack_layer(Coupling, Affine, 2, vec![5, 5], 3, Silu, 2.5, 8, 4.0),
    ];
    vec![
        (
            "coupling + affine",
            random_stack(dense(Affine, 7, 11), 1, 0.5),
        ),
        (
            "coupling + spline",
            random_stack(dense(Spline, 6, 12), 2, 0.6),
        ),
        (
            "checkerboard + affine",
            random_stack(
                lattice(
                    vec![stack_layer(
                        Checkerboard,
                        Affine,
                        3,
                        vec![4, 4],
                        3,
                        Tanh,
                        2.0,
                        8,
                        4.0,
                    )],
                    4,
                ),
                3,
                0.5,
            ),
        ),
        (
            "checkerboard + spline",
            random_stack(
                lattice(
                    vec![stack_layer(
                        Checkerboard,
                        Spline,
                        3,
                        vec![5],
                        3,
                        Silu,
                        2.0,
                        6,
                        1.8,
                    )],
                    6,
                ),
                4,
                0.6,
            ),
        ),
        ("mixed stack", random_stack(lattice(mixed, 4), 5, 0.5)),
    ]
}

#[test]
fn numpy_loader_reproduces_stack_log_q() {
    if !have_numpy() {
        eprintln!(
            "SKIPPED: python3 with numpy is not available (pip install numpy to run this check)"
        );
        return;
    }
    let dir = temp_dir("stack");
    for (i, (name, flow)) in stack_cases().into_iter().enumerate() {
        let d = flow.dim();
        let path = dir.join(format!("stack{i}.safetensors"));
        std::fs::write(&path, flow.to_safetensors().unwrap()).unwrap();
        // Spread 1.5 puts some coordinates outside the spline ranges (identity tails).
        let x: Vec<f64> = normals(6, d, 20 + i as u64)
            .iter()
            .map(|v| 1.5 * v)
            .collect();
        let pts = dir.join(format!("stack_points{i}.csv"));
        write_points(&pts, &x, d);
        for tau in [1.0, 0.7] {
            let py = python_log_q(&path, &pts, tau);
            let rust = flow.log_prob(&x, tau, &mut StackTape::default());
            assert_eq!(py.len(), rust.len(), "{name}");
            let mut worst = 0.0f64;
            for (a, b) in py.iter().zip(&rust) {
                assert!(b.is_finite(), "{name}: rust log q {b}");
                let rel = (a - b).abs() / b.abs().max(1.0);
                assert!(rel < 1e-8, "{name}, tau {tau}: numpy {a} vs rust {b}");
                worst = worst.max(rel);
            }
            eprintln!(
                "{name} (D = {d}, {} layers, tau {tau}): numpy agrees with Rust on {} points, worst relative difference {worst:.1e}",
                flow.spec().layers.iter().map(|l| l.repeat).sum::<usize>(),
                rust.len()
            );
        }
    }
    std::fs::remove_dir_all(&dir).ok();
}
