//! Checks of the built-in energy models against outside values: finite differences,
//! published stationary points, ASE golden values and exact Gaussian results.

use proptest::prelude::*;
use tarn_physics::models::{
    double_well_reference, DoubleWell, LennardJones, MullerBrown, Phi4, Wall,
};
use tarn_physics::{EnergyModel, SystemSpec};

/// Largest deviation between the model's forces and minus the central-difference
/// gradient, relative to the force scale.
fn fd_force_error(model: &dyn EnergyModel, x: &[f64]) -> f64 {
    let dim = model.dim();
    let mut f = vec![0.0; dim];
    model.energy_and_forces_of(x, &mut f).unwrap();
    let scale = f.iter().fold(1.0f64, |m, v| m.max(v.abs()));
    let mut worst = 0.0f64;
    let mut xp = x.to_vec();
    for k in 0..dim {
        let h = 1e-6 * (1.0 + x[k].abs());
        xp[k] = x[k] + h;
        let ep = model.energy_of(&xp).unwrap();
        xp[k] = x[k] - h;
        let em = model.energy_of(&xp).unwrap();
        xp[k] = x[k];
        let fd = -(ep - em) / (2.0 * h);
        worst = worst.max((fd - f[k]).abs() / scale);
    }
    worst
}

/// A cluster on a jittered square/cubic grid of spacing 1.15, so no pair overlaps.
fn jittered_cluster(n: usize, dims: usize, jitter: &[f64]) -> Vec<f64> {
    let side = (n as f64).powf(1.0 / dims as f64).ceil() as usize;
    let mut x = Vec::with_capacity(n * dims);
    for i in 0..n {
        let mut idx = i;
        for c in 0..dims {
            let g = (idx % side) as f64;
            idx /= side;
            x.push(1.15 * g + 0.2 * jitter[(i * dims + c) % jitter.len()]);
        }
    }
    x
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    #[test]
    fn muller_brown_forces_match_finite_differences(x in -1.5f64..1.2, y in -0.4f64..2.0) {
        prop_assert!(fd_force_error(&MullerBrown, &[x, y]) < 1e-6);
    }

    #[test]
    fn harmonic_forces_match_finite_differences(q in proptest::collection::vec(-3.0f64..3.0, 5), k in 0.1f64..10.0) {
        let model = tarn_physics::models::Harmonic { dim: 5, stiffness: k };
        prop_assert!(fd_force_error(&model, &q) < 1e-6);
    }

    #[test]
    fn double_well_forces_match_finite_differences(x in -2.0f64..2.0, y in -2.0f64..2.0) {
        prop_assert!(fd_force_error(&DoubleWell::default(), &[x, y]) < 1e-6);
    }

    #[test]
    fn lennard_jones_forces_match_finite_differences(
        n in 2usize..14,
        dims in 2usize..4,
        jitter in proptest::collection::vec(-1.0f64..1.0, 42),
        wall_radius in 0.5f64..3.0,
    ) {
        let x = jittered_cluster(n, dims, &jitter);
        // A tight wall radius makes the wall active on the outer particles.
        let model = LennardJones::new(n, dims, Wall { radius: wall_radius, strength: 3.0 }).unwrap();
        prop_assert!(fd_force_error(&model, &x) < 1e-6);
    }

    #[test]
    fn phi4_forces_match_finite_differences(
        size in 2usize..7,
        m2 in -4.0f64..2.0,
        lambda in 0.0f64..8.0,
        field in proptest::collection::vec(-2.0f64..2.0, 36),
    ) {
        let model = Phi4::new(size, m2, lambda).unwrap();
        let x: Vec<f64> = field[..size * size].to_vec();
        prop_assert!(fd_force_error(&model, &x) < 1e-6);
    }

    #[test]
    fn batched_evaluation_equals_one_at_a_time(n in 1usize..150, seed in 0u64..1000) {
        // Batches larger than one chunk run on rayon; the numbers must not change.
        let model = LennardJones::new(5, 3, Wall::default_for(5, 3)).unwrap();
        let mut jit = Vec::new();
        let mut s = seed;
        for _ in 0..15 * n {
            s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            jit.push(((s >> 11) as f64 / (1u64 << 53) as f64) * 2.0 - 1.0);
        }
        let x: Vec<f64> = (0..n).flat_map(|k| jittered_cluster(5, 3, &jit[15 * k..15 * (k + 1)])).collect();
        let mut e = vec![0.0; n];
        let mut f = vec![0.0; n * 15];
        model.evaluate(&x, &mut e, Some(&mut f)).unwrap();
        for k in 0..n {
            let mut fk = vec![0.0; 15];
            let ek = model.energy_and_forces_of(&x[15 * k..15 * (k + 1)], &mut fk).unwrap();
            prop_assert_eq!(ek.to_bits(), e[k].to_bits());
            prop_assert_eq!(&fk[..], &f[15 * k..15 * (k + 1)]);
        }
    }
}

/// Newton's method on the analytic Müller–Brown gradient and Hessian.
fn mb_newton(mut p: [f64; 2]) -> [f64; 2] {
    for _ in 0..50 {
        let (_, g) = MullerBrown::energy_gradient(p[0], p[1]);
        let h = MullerBrown::hessian(p[0], p[1]);
        let det = h[0][0] * h[1][1] - h[0][1] * h[1][0];
        let dx = (h[1][1] * g[0] - h[0][1] * g[1]) / det;
        let dy = (-h[1][0] * g[0] + h[0][0] * g[1]) / det;
        p = [p[0] - dx, p[1] - dy];
    }
    p
}

/// Müller & Brown, Theor. Chim. Acta 53, 75 (1979); values P (two decimals) + R
/// (recomputed from the published parameters, /work/shared/REFERENCES.md).
const MB_POINTS: [(&str, [f64; 2], f64, usize); 5] = [
    ("minimum A", [-0.558224, 1.441726], -146.699517, 0),
    ("minimum B", [0.623499, 0.028038], -108.166724, 0),
    ("minimum C", [-0.050011, 0.466694], -80.767818, 0),
    ("saddle A-C", [-0.822002, 0.624313], -40.664844, 1),
    ("saddle C-B", [0.212487, 0.292988], -72.248940, 1),
];

#[test]
fn muller_brown_stationary_points_match_published_values() {
    for (name, p, e, n_negative) in MB_POINTS {
        // Start 0.03 away so that Newton has real work to do.
        let found = mb_newton([p[0] + 0.03, p[1] - 0.02]);
        let (v, g) = MullerBrown::energy_gradient(found[0], found[1]);
        assert!(
            g[0].abs() < 1e-9 && g[1].abs() < 1e-9,
            "{name}: not stationary"
        );
        assert!(
            (found[0] - p[0]).abs() < 1e-5,
            "{name}: x {} vs {}",
            found[0],
            p[0]
        );
        assert!(
            (found[1] - p[1]).abs() < 1e-5,
            "{name}: y {} vs {}",
            found[1],
            p[1]
        );
        assert!((v - e).abs() < 1e-5, "{name}: energy {v} vs {e}");
        let h = MullerBrown::hessian(found[0], found[1]);
        let tr = h[0][0] + h[1][1];
        let det = h[0][0] * h[1][1] - h[0][1] * h[1][0];
        let disc = (tr * tr / 4.0 - det).sqrt();
        let eig = [tr / 2.0 - disc, tr / 2.0 + disc];
        let negative = eig.iter().filter(|l| **l < 0.0).count();
        assert_eq!(negative, n_negative, "{name}: Hessian eigenvalues {eig:?}");
        if n_negative == 1 {
            // REFERENCES.md: about -751 and -735 (R).
            assert!(eig[0] < -700.0 && eig[0] > -800.0, "{name}: {eig:?}");
        }
    }
}

#[test]
fn lennard_jones_matches_ase_golden_values() {
    // Golden values from crates/physics/golden/ase_lj.py with ASE 3.29.0 (R), rc = 1e3.
    let text = include_str!(concat!(env!("CARGO_MANIFEST_DIR"), "/golden/ase_lj.json"));
    let golden: serde_json::Value = serde_json::from_str(text).unwrap();
    assert_eq!(golden["ase_version"], "3.29.0");
    let cases = golden["cases"].as_array().unwrap();
    assert!(cases.len() >= 10);
    for case in cases {
        let n = case["particles"].as_u64().unwrap() as usize;
        let dims = case["dims"].as_u64().unwrap() as usize;
        let x: Vec<f64> = serde_json::from_value(case["positions"].clone()).unwrap();
        let want_f: Vec<f64> = serde_json::from_value(case["forces"].clone()).unwrap();
        let want_e = case["energy"].as_f64().unwrap();
        let model = LennardJones::new(n, dims, Wall::off()).unwrap();
        let mut f = vec![0.0; n * dims];
        let e = model.energy_and_forces_of(&x, &mut f).unwrap();
        let fscale = want_f.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        assert!(
            (e - want_e).abs() <= 1e-9 * want_e.abs().max(1.0),
            "LJ{n} {dims}-D: {e} vs {want_e}"
        );
        for (a, b) in f.iter().zip(&want_f) {
            assert!(
                (a - b).abs() <= 1e-9 * fscale,
                "LJ{n} {dims}-D force {a} vs {b}"
            );
        }
    }
}

#[test]
fn wall_is_zero_at_compact_minima_and_pushes_inwards() {
    let model = LennardJones::new(38, 3, Wall::default_for(38, 3)).unwrap();
    let plain = LennardJones::new(38, 3, Wall::off()).unwrap();
    let x = tarn_physics::models::lennard_jones::truncated_octahedron_38(1.1);
    assert_eq!(model.energy_of(&x).unwrap(), plain.energy_of(&x).unwrap());
    // One particle far outside: the wall energy is k (d - R)^2 and its force points in.
    let mut y = vec![0.0; 4];
    y[2] = 10.0;
    let two = LennardJones::new(
        2,
        2,
        Wall {
            radius: 2.0,
            strength: 1.0,
        },
    )
    .unwrap();
    let lj = 4.0 * (10f64.powi(-12) - 10f64.powi(-6));
    // Both particles are 5 from the centre of mass: W = 2 (5 - 2)^2 = 18.
    let mut f = vec![0.0; 4];
    let e = two.energy_and_forces_of(&y, &mut f).unwrap();
    assert!((e - (18.0 + lj)).abs() < 1e-12, "{e}");
    assert!(f[2] < 0.0 && f[0] > 0.0);
}

/// Exact free-field results from the lattice momentum sum (derived here): with λ = 0,
/// S = φᵀAφ with A = −Δ + m², whose eigenvalues are m² + Σ_μ 4 sin²(p_μ/2),
/// p_μ = 2πn/L; Z = π^{V/2} det(A)^{-1/2}, and ⟨φ²⟩ = (1/V) Σ_x ⟨φ_x²⟩ = tr(A⁻¹)/(2V).
fn free_field_exact(size: usize, m2: f64) -> (f64, f64) {
    let v = (size * size) as f64;
    let mut log_det = 0.0;
    let mut trace_inv = 0.0;
    for n0 in 0..size {
        for n1 in 0..size {
            let p0 = 2.0 * std::f64::consts::PI * n0 as f64 / size as f64;
            let p1 = 2.0 * std::f64::consts::PI * n1 as f64 / size as f64;
            let ev = m2 + 4.0 * (p0 / 2.0).sin().powi(2) + 4.0 * (p1 / 2.0).sin().powi(2);
            log_det += ev.ln();
            trace_inv += 1.0 / ev;
        }
    }
    (
        0.5 * v * std::f64::consts::PI.ln() - 0.5 * log_det,
        trace_inv / (2.0 * v),
    )
}

/// ln det and trace of the inverse of a symmetric positive-definite matrix, by Cholesky.
fn cholesky_logdet_trace_inv(a: &[f64], n: usize) -> (f64, f64) {
    let mut l = vec![0.0; n * n];
    for i in 0..n {
        for j in 0..=i {
            let mut s = a[i * n + j];
            for k in 0..j {
                s -= l[i * n + k] * l[j * n + k];
            }
            l[i * n + j] = if i == j { s.sqrt() } else { s / l[j * n + j] };
        }
    }
    let log_det = 2.0 * (0..n).map(|i| l[i * n + i].ln()).sum::<f64>();
    // tr(A^-1) = Σ_ij (L^-1)_ij^2.
    let mut trace = 0.0;
    for col in 0..n {
        let mut y = vec![0.0; n];
        for i in 0..n {
            let mut s = if i == col { 1.0 } else { 0.0 };
            for k in 0..i {
                s -= l[i * n + k] * y[k];
            }
            y[i] = s / l[i * n + i];
        }
        trace += y.iter().map(|v| v * v).sum::<f64>();
    }
    (log_det, trace)
}

#[test]
fn phi4_free_field_matches_exact_gaussian_results() {
    // REFERENCES.md (R): L = 4, m² = 1: ln Z = -2.8581318146, <φ²> = 0.1317460317;
    // L = 8, m² = 1: ln Z = -11.6228852573, <φ²> = 0.1270869988.
    for (size, want_lnz, want_phi2) in [
        (4, -2.8581318146, 0.1317460317),
        (8, -11.6228852573, 0.1270869988),
    ] {
        let (lnz, phi2) = free_field_exact(size, 1.0);
        assert!((lnz - want_lnz).abs() < 1e-9, "{lnz}");
        assert!((phi2 - want_phi2).abs() < 1e-9, "{phi2}");
        // The model's own quadratic form, read off its forces (F = -2Aφ exactly when
        // λ = 0), must give the same determinant and trace.
        let model = Phi4::new(size, 1.0, 0.0).unwrap();
        let v = size * size;
        let mut a = vec![0.0; v * v];
        let mut unit = vec![0.0; v];
        let mut f = vec![0.0; v];
        for j in 0..v {
            unit[j] = 1.0;
            let s = model.energy_and_forces_of(&unit, &mut f).unwrap();
            assert!(
                (s - (1.0 + 4.0)).abs() < 1e-12,
                "S(e_j) = m² + 2d = 5, got {s}"
            );
            for i in 0..v {
                a[i * v + j] = -0.5 * f[i];
            }
            unit[j] = 0.0;
        }
        let (log_det, trace) = cholesky_logdet_trace_inv(&a, v);
        let lnz_model = 0.5 * v as f64 * std::f64::consts::PI.ln() - 0.5 * log_det;
        assert!(
            (lnz_model - want_lnz).abs() < 1e-9,
            "model ln Z {lnz_model}"
        );
        assert!((trace / (2.0 * v as f64) - want_phi2).abs() < 1e-9);
    }
}

#[test]
fn phi4_action_matches_the_published_form() {
    // S = Σ_x [Σ_μ φ_x(2φ_x − φ_{x+μ} − φ_{x−μ}) + m²φ_x² + λφ_x⁴] (Albergo et al. 2019),
    // evaluated literally here, against the kernel's link form.
    let size = 5;
    let (m2, lambda) = (-4.0, 3.0);
    let phi: Vec<f64> = (0..25).map(|k| ((k * 7 % 11) as f64 - 5.0) / 3.0).collect();
    let at = |r: usize, c: usize| phi[(r % size) * size + (c % size)];
    let mut s = 0.0;
    for r in 0..size {
        for c in 0..size {
            let p = at(r, c);
            s += p * (2.0 * p - at(r, c + 1) - at(r, c + size - 1));
            s += p * (2.0 * p - at(r + 1, c) - at(r + size - 1, c));
            s += m2 * p * p + lambda * p.powi(4);
        }
    }
    let model = Phi4::new(size, m2, lambda).unwrap();
    let e = model.energy_of(&phi).unwrap();
    assert!((e - s).abs() < 1e-10 * s.abs().max(1.0), "{e} vs {s}");
}

#[test]
fn double_well_reference_is_converged_and_consistent() {
    let r = double_well_reference(1.0);
    // Cross-check the 2-D quadrature against the y-integral done analytically:
    // ∫ exp(-κ(x) y²/2) dy = sqrt(2π/κ(x)), leaving a 1-D Simpson integral in x.
    let dw = DoubleWell::default();
    let side = |lo: f64, hi: f64| {
        let n = 20000;
        let h = (hi - lo) / n as f64;
        (0..=n)
            .map(|i| {
                let x = lo + i as f64 * h;
                let w = if i == 0 || i == n {
                    1.0
                } else if i % 2 == 1 {
                    4.0
                } else {
                    2.0
                };
                let kappa = dw.kappa0 + dw.kappa1 * (dw.sharpness * x).tanh();
                let (u0, _) = dw.energy_gradient(x, 0.0);
                w * h / 3.0 * (-u0).exp() * (2.0 * std::f64::consts::PI / kappa).sqrt()
            })
            .sum::<f64>()
    };
    let zl = side(-4.0, r.x_saddle);
    let zr = side(r.x_saddle, 4.0);
    assert!(
        (r.p_left - zl / (zl + zr)).abs() < 1e-9,
        "{} vs {}",
        r.p_left,
        zl / (zl + zr)
    );
    assert!((r.ln_z - (zl + zr).ln()).abs() < 1e-9);
    assert!((r.p_left + r.p_right - 1.0).abs() < 1e-12);
    // The design promises: a barrier of several kT and unequal wells.
    assert!(
        r.e_saddle - r.e_left > 3.5 && r.e_saddle - r.e_right > 5.0,
        "{r:?}"
    );
    assert!((r.e_left - r.e_right - 2.0).abs() < 0.1);
    assert!(r.delta_f < -0.5 && r.delta_f > -2.0, "{r:?}");
}

#[test]
fn system_spec_parses_validates_and_builds() {
    let lj: SystemSpec =
        toml::from_str("model = \"lennard-jones\"\nparticles = 7\ndims = 2\n").unwrap();
    assert_eq!(lj.dim(), 14);
    let m = lj.build().unwrap();
    assert_eq!(m.dim(), 14);
    assert_eq!(m.particle_dims(), Some(2));
    let phi: SystemSpec =
        toml::from_str("model = \"phi4\"\nsize = 8\nm2 = -4.0\nlambda = 3.0\n").unwrap();
    assert_eq!(phi.build().unwrap().dim(), 64);
    let mb: SystemSpec = toml::from_str("model = \"muller-brown\"").unwrap();
    assert_eq!(mb.build().unwrap().dim(), 2);
    let dw: SystemSpec = toml::from_str("model = \"double-well\"").unwrap();
    assert_eq!(dw.dim(), 2);
    let ext: SystemSpec =
        toml::from_str("model = \"external\"\ncommand = [\"python3\", \"e.py\"]\ndim = 2\n")
            .unwrap();
    assert_eq!(ext.dim(), 2);
    let err = ext.build().err().unwrap().to_string();
    assert!(err.contains("external energy model"), "{err}");
    // Unknown keys and bad values are refused with the key's name.
    let bad = toml::from_str::<SystemSpec>(
        "model = \"lennard-jones\"\nparticles = 7\ndims = 2\nradius = 3\n",
    );
    assert!(bad.unwrap_err().to_string().contains("radius"));
    let bad = toml::from_str::<SystemSpec>("model = \"muller-brown\"\nscale = 2\n");
    assert!(
        bad.is_err(),
        "unknown key on a parameterless model must be refused"
    );
    let bad: SystemSpec =
        toml::from_str("model = \"lennard-jones\"\nparticles = 7\ndims = 4\n").unwrap();
    assert!(bad.build().err().unwrap().to_string().contains("`dims`"));
}

#[test]
fn default_starts_have_the_right_size_and_finite_energy() {
    let specs = [
        "model = \"muller-brown\"",
        "model = \"double-well\"",
        "model = \"lennard-jones\"\nparticles = 7\ndims = 2",
        "model = \"lennard-jones\"\nparticles = 38\ndims = 3",
        "model = \"lennard-jones\"\nparticles = 2\ndims = 3",
        "model = \"phi4\"\nsize = 8\nm2 = -4.0\nlambda = 3.0",
    ];
    for text in specs {
        let spec: SystemSpec = toml::from_str(text).unwrap();
        let x = spec.default_start().unwrap();
        assert_eq!(x.len(), spec.dim(), "{text}");
        let e = spec.build().unwrap().energy_of(&x).unwrap();
        assert!(e.is_finite(), "{text}: {e}");
        if spec.particle_dims().is_some() {
            // A compact lattice patch is bound: every pair at least a neighbour apart.
            assert!(e < 0.0, "{text}: {e}");
        }
    }
    let dw = DoubleWell::default();
    let r = double_well_reference(1.0);
    assert!((dw.saddle_x() - r.x_saddle).abs() < 1e-15);
    assert!((dw.right_minimum_x() - r.right_minimum[0]).abs() < 1e-15);
}
