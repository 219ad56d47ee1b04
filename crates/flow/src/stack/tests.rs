//! Checks of the layer stack against exact facts: inversion, the log-determinant
//! against a finite-difference Jacobian, gradients against finite differences, and
//! lattice translation symmetry.

use super::*;
use rand::Rng;

fn lattice_spec(side: usize, transform: TransformKind) -> StackSpec {
    StackSpec {
        data_dim: side * side,
        lattice_side: side,
        layers: vec![LayerSpec {
            kind: LayerKind::Checkerboard,
            transform,
            repeat: 4,
            hidden: Some(vec![3, 4]),
            kernel: 3,
            activation: Activation::Tanh,
            clamp: 2.0,
            bins: 5,
            bound: 2.0,
        }],
        permutation_seed: 0,
    }
}

fn dense_spec(d: usize, transform: TransformKind) -> StackSpec {
    StackSpec {
        data_dim: d,
        lattice_side: 0,
        layers: vec![LayerSpec {
            kind: LayerKind::Coupling,
            transform,
            repeat: 3,
            hidden: Some(vec![7, 5]),
            kernel: 3,
            activation: Activation::Silu,
            clamp: 2.0,
            bins: 4,
            bound: 1.5,
        }],
        permutation_seed: 5,
    }
}

/// A flow with every parameter random (a new flow is the identity, which tests nothing).
fn random_flow(spec: StackSpec, seed: u64) -> StackFlow<f64> {
    let mut f = StackFlow::<f64>::new(spec, seed).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(seed + 1);
    for p in f.params_mut() {
        *p = rng.gen_range(-0.4..0.4);
    }
    f
}

fn random_rows(n: usize, d: usize, seed: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..n * d).map(|_| rng.gen_range(-1.5..1.5)).collect()
}

fn specs() -> Vec<StackSpec> {
    vec![
        lattice_spec(4, TransformKind::Affine),
        dense_spec(5, TransformKind::Affine),
        lattice_spec(4, TransformKind::Spline),
        dense_spec(5, TransformKind::Spline),
    ]
}

#[test]
fn inverse_undoes_generation() {
    for spec in specs() {
        let f = random_flow(spec, 3);
        let d = f.dim();
        let z0 = random_rows(6, d, 9);
        let mut x = z0.clone();
        let (mut ldg, mut ldi) = (vec![0.0; 6], vec![0.0; 6]);
        let mut tape = StackTape::default();
        f.generate(&mut x, &mut ldg, &mut tape, false);
        let moved = x
            .iter()
            .zip(&z0)
            .map(|(a, b)| (a - b).abs())
            .fold(0.0, f64::max);
        assert!(
            moved > 0.05,
            "the random flow should move points, moved {moved}"
        );
        f.invert(&mut x, &mut ldi, &mut tape, false);
        for (a, b) in x.iter().zip(&z0) {
            assert!((a - b).abs() < 1e-10, "{a} vs {b}");
        }
        for (a, b) in ldg.iter().zip(&ldi) {
            assert!((a + b).abs() < 1e-10);
        }
        // f32 to 1e-5.
        let f32f = f.to_precision::<f32>();
        let mut x32: Vec<f32> = z0.iter().map(|&v| v as f32).collect();
        let mut ld32 = vec![0.0f32; 6];
        f32f.generate(&mut x32, &mut ld32, &mut StackTape::default(), false);
        f32f.invert(&mut x32, &mut ld32, &mut StackTape::default(), false);
        for (a, b) in x32.iter().zip(&z0) {
            assert!((*a as f64 - b).abs() < 1e-5 * (1.0 + b.abs()), "{a} vs {b}");
        }
    }
}

/// log|det| of a d×d matrix by LU with partial pivoting.
fn log_abs_det(mut a: Vec<f64>, d: usize) -> f64 {
    let mut s = 0.0;
    for c in 0..d {
        let p = (c..d)
            .max_by(|&i, &j| a[i * d + c].abs().partial_cmp(&a[j * d + c].abs()).unwrap())
            .unwrap();
        if p != c {
            for k in 0..d {
                a.swap(c * d + k, p * d + k);
            }
        }
        let piv = a[c * d + c];
        s += piv.abs().ln();
        for r in c + 1..d {
            let m = a[r * d + c] / piv;
            for k in c..d {
                a[r * d + k] -= m * a[c * d + k];
            }
        }
    }
    s
}

#[test]
fn log_det_matches_finite_difference_jacobian() {
    for spec in specs() {
        let f = random_flow(spec, 11);
        let d = f.dim();
        let z = random_rows(1, d, 4);
        let mut tape = StackTape::default();
        let gen = |zz: &[f64], tape: &mut StackTape<f64>| {
            let mut x = zz.to_vec();
            let mut ld = vec![0.0];
            f.generate(&mut x, &mut ld, tape, false);
            (x, ld[0])
        };
        let (_, ld) = gen(&z, &mut tape);
        let h = 1e-6;
        let mut jac = vec![0.0; d * d];
        for j in 0..d {
            let (mut zp, mut zm) = (z.clone(), z.clone());
            zp[j] += h;
            zm[j] -= h;
            let (xp, _) = gen(&zp, &mut tape);
            let (xm, _) = gen(&zm, &mut tape);
            for i in 0..d {
                jac[i * d + j] = (xp[i] - xm[i]) / (2.0 * h);
            }
        }
        let fd = log_abs_det(jac, d);
        assert!(
            (fd - ld).abs() < 1e-6,
            "log det {ld} vs finite difference {fd}"
        );
    }
}

/// A scalar loss of a generation pass and its analytic gradient with respect to the
/// parameters and the latent input: L = Σ c·x + Σ a_i ld_i.
fn gen_loss(f: &StackFlow<f64>, z: &[f64], c: &[f64], a: &[f64]) -> f64 {
    let mut x = z.to_vec();
    let mut ld = vec![0.0; a.len()];
    f.generate(&mut x, &mut ld, &mut StackTape::default(), false);
    x.iter().zip(c).map(|(x, c)| x * c).sum::<f64>()
        + ld.iter().zip(a).map(|(l, a)| l * a).sum::<f64>()
}

fn inv_loss(f: &StackFlow<f64>, x: &[f64], c: &[f64], a: &[f64]) -> f64 {
    let mut z = x.to_vec();
    let mut ld = vec![0.0; a.len()];
    f.invert(&mut z, &mut ld, &mut StackTape::default(), false);
    z.iter().zip(c).map(|(x, c)| x * c).sum::<f64>()
        + ld.iter().zip(a).map(|(l, a)| l * a).sum::<f64>()
}

#[test]
fn gradients_match_finite_differences() {
    for spec in specs() {
        for inverse in [false, true] {
            let mut f = random_flow(spec.clone(), 21);
            let d = f.dim();
            let n = 3;
            let x0 = random_rows(n, d, 8);
            let c = random_rows(n, d, 2);
            let a = random_rows(1, n, 6);
            let loss = |f: &StackFlow<f64>, x: &[f64]| {
                if inverse {
                    inv_loss(f, x, &c, &a)
                } else {
                    gen_loss(f, x, &c, &a)
                }
            };
            let mut tape = StackTape::default();
            let mut v = x0.clone();
            let mut ld = vec![0.0; n];
            let mut g = c.clone();
            let mut gp = vec![0.0; f.n_params()];
            if inverse {
                f.invert(&mut v, &mut ld, &mut tape, true);
                f.invert_backward(&mut g, &a, &mut gp, &mut tape);
            } else {
                f.generate(&mut v, &mut ld, &mut tape, true);
                f.generate_backward(&mut g, &a, &mut gp, &mut tape);
            }
            let h = 1e-6;
            let scale = gp.iter().chain(&g).fold(1e-3f64, |m, v| m.max(v.abs()));
            for j in 0..d * n {
                let (mut xp, mut xm) = (x0.clone(), x0.clone());
                xp[j] += h;
                xm[j] -= h;
                let fd = (loss(&f, &xp) - loss(&f, &xm)) / (2.0 * h);
                assert!(
                    (fd - g[j]).abs() < 1e-6 * scale,
                    "input {j}: {} vs {fd}",
                    g[j]
                );
            }
            for j in (0..f.n_params()).step_by(3) {
                let p0 = f.params()[j];
                f.params_mut()[j] = p0 + h;
                let lp = loss(&f, &x0);
                f.params_mut()[j] = p0 - h;
                let lm = loss(&f, &x0);
                f.params_mut()[j] = p0;
                let fd = (lp - lm) / (2.0 * h);
                assert!(
                    (fd - gp[j]).abs() < 1e-6 * scale,
                    "param {j}: {} vs {fd}",
                    gp[j]
                );
            }
        }
    }
}

#[test]
fn checkerboard_flow_commutes_with_parity_preserving_translations() {
    let side = 6;
    let f = random_flow(lattice_spec(side, TransformKind::Affine), 31);
    let x = random_rows(1, side * side, 12);
    // Shift by (1, 1): parity of every site is kept.
    let shift = |v: &[f64], dr: usize, dc: usize| {
        let mut out = vec![0.0; v.len()];
        for r in 0..side {
            for c in 0..side {
                out[((r + dr) % side) * side + (c + dc) % side] = v[r * side + c];
            }
        }
        out
    };
    let mut tape = StackTape::default();
    let lq = f.log_prob(&x, 1.0, &mut tape)[0];
    for (dr, dc) in [(1, 1), (2, 0), (0, 4), (3, 1)] {
        let lq_s = f.log_prob(&shift(&x, dr, dc), 1.0, &mut tape)[0];
        assert!(
            (lq - lq_s).abs() < 1e-10,
            "shift ({dr}, {dc}): {lq} vs {lq_s}"
        );
    }
    // A parity-changing shift is not a symmetry of a layer stack that starts on one
    // sublattice: the check above is not vacuous.
    let lq_odd = f.log_prob(&shift(&x, 1, 0), 1.0, &mut tape)[0];
    assert!((lq - lq_odd).abs() > 1e-6);
}

#[test]
fn new_flow_is_the_identity_and_bad_specs_are_refused() {
    let f = StackFlow::<f64>::new(lattice_spec(4, TransformKind::Affine), 1).unwrap();
    let x = random_rows(2, 16, 1);
    let mut z = x.clone();
    let mut ld = vec![1.0; 2];
    f.invert(&mut z, &mut ld, &mut StackTape::default(), false);
    assert_eq!(z, x);
    assert_eq!(ld, vec![0.0; 2]);
    let mut bad = lattice_spec(4, TransformKind::Affine);
    bad.lattice_side = 3;
    let e = StackFlow::<f64>::new(bad, 1).unwrap_err().to_string();
    assert!(
        e.contains("layers[0]") && e.contains("lattice_side = 3"),
        "{e}"
    );
    let mut bad = lattice_spec(4, TransformKind::Affine);
    bad.layers[0].kernel = 2;
    let e = StackFlow::<f64>::new(bad, 1).unwrap_err().to_string();
    assert!(e.contains("kernel must be odd"), "{e}");
}

/// A weight file with its JSON header rewritten by `edit`, tensors kept.
fn edit_header(bytes: &[u8], edit: impl Fn(&str) -> String) -> Vec<u8> {
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    let header = String::from_utf8(bytes[8..8 + n].to_vec()).unwrap();
    let mut hb = edit(&header).into_bytes();
    while !hb.len().is_multiple_of(8) {
        hb.push(b' ');
    }
    let mut out = (hb.len() as u64).to_le_bytes().to_vec();
    out.extend(hb);
    out.extend(&bytes[8 + n..]);
    out
}

#[test]
fn weight_file_round_trips_and_refuses_unknown_layers_and_damage() {
    for spec in specs() {
        let f = random_flow(spec, 41);
        let bytes = f.to_safetensors().unwrap();
        assert_eq!(
            bytes,
            f.to_safetensors().unwrap(),
            "bytes are deterministic"
        );
        let g = StackFlow::<f64>::from_safetensors(&bytes).unwrap();
        let x = random_rows(3, f.dim(), 2);
        let (a, b) = (
            f.log_prob(&x, 1.0, &mut StackTape::default()),
            g.log_prob(&x, 1.0, &mut StackTape::default()),
        );
        assert_eq!(a, b);
        // An f32 reader of an f64 file agrees to f32 precision.
        let h = StackFlow::<f32>::from_safetensors(&bytes).unwrap();
        let c = h.log_prob(&x, 1.0, &mut StackTape::default());
        for (u, v) in a.iter().zip(&c) {
            assert!((u - v).abs() < 1e-4 * (1.0 + u.abs()), "{u} vs {v}");
        }
        // Truncated files and flipped header bytes are refused, never a panic.
        for cut in [8, bytes.len() / 2, bytes.len() - 1] {
            assert!(StackFlow::<f32>::from_safetensors(&bytes[..cut]).is_err());
        }
    }
    // A layer kind this build does not know: refused, naming the layer.
    let f = random_flow(lattice_spec(4, TransformKind::Affine), 1);
    let bytes = f.to_safetensors().unwrap();
    let out = edit_header(&bytes, |h| h.replace("checkerboard", "hexagonal"));
    let e = StackFlow::<f32>::from_safetensors(&out)
        .unwrap_err()
        .to_string();
    assert!(e.contains("layers[0]") && e.contains("hexagonal"), "{e}");
    // The RealNVP reader refuses a stack file by its format name.
    let e = crate::Flow::<f32>::from_safetensors(&bytes)
        .unwrap_err()
        .to_string();
    assert!(e.contains("tarn-flow-stack"), "{e}");
}

#[test]
fn density_integrates_to_one() {
    // q on a 2-D grid, by quadrature, for strongly non-identity flows: any constant
    // error in a log-determinant shows up here even where a finite-difference Jacobian
    // of one point would agree.
    // The grids resolve each flow's sharpest features (splines make narrow peaks with
    // their identity tails keeping the mass near the interval; affine maps spread it).
    for (transform, scale, (lo, hi, n)) in [
        (TransformKind::Affine, 0.5, (-30.0, 30.0, 3000)),
        (TransformKind::Spline, 1.0, (-6.0, 6.0, 3000)),
    ] {
        let mut spec = dense_spec(2, transform);
        spec.layers[0].repeat = 2;
        let mut f = StackFlow::<f64>::new(spec, 3).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        for p in f.params_mut() {
            *p = rng.gen_range(-scale..scale);
        }
        let h = (hi - lo) / n as f64;
        let mut pts = Vec::with_capacity(2 * n * n);
        for i in 0..n {
            for j in 0..n {
                pts.push(lo + (i as f64 + 0.5) * h);
                pts.push(lo + (j as f64 + 0.5) * h);
            }
        }
        let lq = f.log_prob(&pts, 1.0, &mut StackTape::default());
        let total: f64 = lq.iter().map(|l| l.exp()).sum::<f64>() * h * h;
        assert!(
            (total - 1.0).abs() < 1e-2,
            "{transform:?}: integral {total}"
        );
    }
}

#[test]
fn an_architecture_too_large_for_its_file_is_refused_before_allocating() {
    // Four layers of 4096-channel 5x5 convolutions on a 4x4 lattice would need about
    // 1.7e9 parameters; the file is a few kilobytes.
    let f = random_flow(lattice_spec(4, TransformKind::Affine), 1);
    let bytes = f.to_safetensors().unwrap();
    let out = edit_header(&bytes, |h| {
        let huge = h
            .replace("\\\"hidden\\\":[3,4]", "\\\"hidden\\\":[4096,4096]")
            .replace("\\\"kernel\\\":3", "\\\"kernel\\\":5");
        assert_ne!(huge, h, "the architecture text was found");
        huge
    });
    let e = StackFlow::<f32>::from_safetensors(&out)
        .unwrap_err()
        .to_string();
    assert!(e.contains("parameters, more than a file of"), "{e}");
}
