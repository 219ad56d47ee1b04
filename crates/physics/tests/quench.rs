//! Quench and fingerprint checks: FIRE lands on published minima, and fingerprints
//! identify states independently of translation, rotation and permutation.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tarn_physics::fingerprint::{
    assign, same_state, sorted_pair_distances, Fingerprint, StateTolerance,
};
use tarn_physics::models::lennard_jones::{
    centred_hexagon_7, icosahedron_13, pentagonal_bipyramid_7, truncated_octahedron_38,
};
use tarn_physics::models::{LennardJones, MullerBrown, Phi4, Wall};
use tarn_physics::quench::{quench, quench_batch, FireParams, QuenchStatus};
use tarn_physics::{EnergyModel, SystemSpec};

fn perturbed(x: &[f64], amount: f64, seed: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    x.iter()
        .map(|v| v + rng.gen_range(-amount..amount))
        .collect()
}

#[test]
fn fire_finds_the_muller_brown_minima() {
    // Müller & Brown 1979, values P + R (REFERENCES.md).
    let minima = [
        ([-0.558224, 1.441726], -146.699517),
        ([0.623499, 0.028038], -108.166724),
        ([-0.050011, 0.466694], -80.767818),
    ];
    for (p, e) in minima {
        let start = [p[0] + 0.05, p[1] - 0.04];
        let r = quench(&MullerBrown, &start, &FireParams::default()).unwrap();
        assert!(r.converged(), "{r:?}");
        assert!(
            (r.minimum[0] - p[0]).abs() < 1e-5 && (r.minimum[1] - p[1]).abs() < 1e-5,
            "{r:?}"
        );
        assert!((r.energy - e).abs() < 1e-5, "{} vs {e}", r.energy);
        assert_eq!(r.n_evals, r.steps + 1);
    }
}

#[test]
fn fire_finds_the_lj7_lj13_lj38_global_minima() {
    // Wales & Doye, J. Phys. Chem. A 101, 5111 (1997), Cambridge Cluster Database
    // (P + R): LJ7 -16.505384, LJ13 -44.326801, LJ38 -173.928427. The default wall is on
    // and must not change these energies.
    let cases = [
        (7, pentagonal_bipyramid_7(1.1), -16.505384),
        (13, icosahedron_13(1.1), -44.326801),
        (38, truncated_octahedron_38(1.1), -173.928427),
    ];
    for (n, x, want) in cases {
        assert_eq!(x.len(), 3 * n);
        let model = LennardJones::new(n, 3, Wall::default_for(n, 3)).unwrap();
        let start = perturbed(&x, 0.05, n as u64);
        let r = quench(&model, &start, &FireParams::default()).unwrap();
        assert!(r.converged(), "LJ{n}: {r:?}");
        assert!(
            (r.energy - want).abs() < 1e-5,
            "LJ{n}: {} vs {want}",
            r.energy
        );
    }
}

/// A random 2-D cluster of seven particles in a disc, no pair closer than 0.9.
fn random_disc_cluster(rng: &mut ChaCha8Rng) -> Vec<f64> {
    let mut pts: Vec<[f64; 2]> = Vec::new();
    while pts.len() < 7 {
        let p = [rng.gen_range(-1.8..1.8), rng.gen_range(-1.8..1.8)];
        if p[0] * p[0] + p[1] * p[1] > 1.8 * 1.8 {
            continue;
        }
        if pts
            .iter()
            .all(|q| (p[0] - q[0]).powi(2) + (p[1] - q[1]).powi(2) > 0.81)
        {
            pts.push(p);
        }
    }
    pts.concat()
}

#[test]
fn quenching_random_2d_lj7_starts_finds_the_four_lowest_minima() {
    // Dellago, Bolhuis & Chandler, J. Chem. Phys. 108, 9236 (1998): two decimals (M);
    // six-decimal values R (REFERENCES.md).
    let want = [-12.534867, -11.501291, -11.476907, -11.403419];
    let model = LennardJones::new(7, 2, Wall::default_for(7, 2)).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let n = 200;
    let starts: Vec<f64> = (0..n).flat_map(|_| random_disc_cluster(&mut rng)).collect();
    let batch = quench_batch(&model, &starts, &FireParams::default()).unwrap();
    let fp = Fingerprint::PairDistances { dims: 2 };
    let tol = StateTolerance::default();
    let mut known: Vec<(f64, Vec<f64>)> = Vec::new();
    for i in 0..n {
        if batch.status[i] != QuenchStatus::Converged {
            continue;
        }
        let f = fp.compute(batch.minimum(i));
        if assign(batch.energies[i], &f, &known, &tol).is_none() {
            known.push((batch.energies[i], f));
        }
    }
    for w in want {
        assert!(
            known.iter().any(|(e, _)| (e - w).abs() < 1e-5),
            "minimum {w} not found among {:?}",
            known.iter().map(|k| k.0).collect::<Vec<_>>()
        );
    }
    // The hexagon with a centre is the lowest minimum found.
    let lowest = known.iter().map(|k| k.0).fold(f64::INFINITY, f64::min);
    assert!((lowest - want[0]).abs() < 1e-5);
    // And it is the quench of the ideal centred hexagon.
    let r = quench(
        &model,
        &perturbed(&centred_hexagon_7(1.1), 0.05, 1),
        &FireParams::default(),
    )
    .unwrap();
    assert!((r.energy - want[0]).abs() < 1e-5);
}

#[test]
fn batched_quench_equals_one_at_a_time() {
    let model = LennardJones::new(7, 2, Wall::default_for(7, 2)).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let starts: Vec<f64> = (0..12)
        .flat_map(|_| random_disc_cluster(&mut rng))
        .collect();
    let batch = quench_batch(&model, &starts, &FireParams::default()).unwrap();
    assert_eq!(batch.n_evals, batch.n_evals_each.iter().sum::<u64>());
    for i in 0..12 {
        let one = quench(
            &model,
            &starts[i * 14..(i + 1) * 14],
            &FireParams::default(),
        )
        .unwrap();
        assert_eq!(one, batch.result(i));
    }
}

#[test]
fn phi4_quench_reaches_the_uniform_ordered_minimum() {
    // For m² < 0 the uniform field φ = ±sqrt(-m²/2λ) minimises every site's
    // m²φ² + λφ⁴ with zero gradient energy, so S_min = -V m⁴/(4λ) (exact).
    let (size, m2, lambda) = (6, -4.0, 3.0);
    let model = Phi4::new(size, m2, lambda).unwrap();
    let v = (size * size) as f64;
    let want = -v * m2 * m2 / (4.0 * lambda);
    let phi0 = (-m2 / (2.0 * lambda)).sqrt();
    let fp = Fingerprint::Magnetisation {};
    for sign in [1.0, -1.0] {
        let start: Vec<f64> = perturbed(&vec![sign * phi0; size * size], 0.4, 11);
        let r = quench(&model, &start, &FireParams::default()).unwrap();
        assert!(r.converged());
        assert!((r.energy - want).abs() < 1e-8, "{} vs {want}", r.energy);
        let f = fp.compute(&r.minimum);
        assert_eq!(f[0], sign);
        assert!((f[1] - phi0).abs() < 1e-6);
    }
}

/// Rotates a 3-D configuration about the z axis, then x, translates, and reverses the
/// particle order.
fn moved(x: &[f64], a: f64, b: f64, shift: [f64; 3]) -> Vec<f64> {
    let mut out = Vec::new();
    for p in x.chunks(3).rev() {
        let (s, c) = a.sin_cos();
        let q = [c * p[0] - s * p[1], s * p[0] + c * p[1], p[2]];
        let (s, c) = b.sin_cos();
        let r = [q[0], c * q[1] - s * q[2], s * q[1] + c * q[2]];
        out.extend([r[0] + shift[0], r[1] + shift[1], r[2] + shift[2]]);
    }
    out
}

#[test]
fn pair_distance_fingerprint_ignores_rigid_motion_and_permutation() {
    let model = LennardJones::new(13, 3, Wall::default_for(13, 3)).unwrap();
    let ico = quench(
        &model,
        &perturbed(&icosahedron_13(1.1), 0.05, 2),
        &FireParams::default(),
    )
    .unwrap();
    let other = moved(&ico.minimum, 0.7, -1.3, [3.0, -2.0, 0.5]);
    let e_other = model.energy_of(&other).unwrap();
    let fp = Fingerprint::for_system(&SystemSpec::LennardJones {
        particles: 13,
        dims: 3,
        wall_radius: None,
        wall_strength: 1.0,
    });
    let tol = StateTolerance::default();
    let a = fp.compute(&ico.minimum);
    let b = fp.compute(&other);
    assert_eq!(a.len(), 78);
    assert!(same_state(ico.energy, &a, e_other, &b, &tol));
    // A different minimum (a random start quenched elsewhere) is not the same state.
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let start: Vec<f64> = (0..39).map(|_| rng.gen_range(-1.6..1.6)).collect();
    let far = quench(&model, &start, &FireParams::default()).unwrap();
    if (far.energy - ico.energy).abs() > 1e-3 {
        let c = fp.compute(&far.minimum);
        assert!(!same_state(ico.energy, &a, far.energy, &c, &tol));
        let known = vec![(ico.energy, a.clone()), (far.energy, c.clone())];
        assert_eq!(assign(e_other, &b, &known, &tol), Some(0));
        assert_eq!(assign(far.energy, &c, &known, &tol), Some(1));
    } else {
        panic!("the random start should not quench to the icosahedron");
    }
    assert_eq!(sorted_pair_distances(&[0.0, 0.0, 3.0, 4.0], 2), vec![5.0]);
}

#[test]
fn assign_prefers_the_closest_match_and_reports_new_states() {
    let tol = StateTolerance {
        energy: 0.1,
        fingerprint: 0.5,
    };
    let known = vec![
        (1.0, vec![0.0, 0.0]),
        (1.05, vec![0.3, 0.0]),
        (5.0, vec![0.0, 0.0]),
    ];
    assert_eq!(assign(1.02, &[0.25, 0.0], &known, &tol), Some(1));
    assert_eq!(assign(1.02, &[0.05, 0.0], &known, &tol), Some(0));
    assert_eq!(assign(3.0, &[0.0, 0.0], &known, &tol), None);
    assert_eq!(assign(1.0, &[0.0, 0.0, 0.0], &known, &tol), None);
}

#[test]
fn quench_reports_bad_parameters_and_shapes() {
    let p = FireParams {
        dt_start: -1.0,
        ..FireParams::default()
    };
    let err = quench(&MullerBrown, &[0.0, 0.0], &p)
        .unwrap_err()
        .to_string();
    assert!(err.contains("dt_start"), "{err}");
    let err = quench(&MullerBrown, &[0.0, 0.0, 1.0], &FireParams::default())
        .unwrap_err()
        .to_string();
    assert!(err.contains("dim 2"), "{err}");
    // Overlapping particles give a non-finite energy: reported, not a panic.
    let model = LennardJones::new(2, 2, Wall::off()).unwrap();
    let r = quench(&model, &[0.0, 0.0, 0.0, 0.0], &FireParams::default()).unwrap();
    assert_eq!(r.status, QuenchStatus::NonFinite);
}
