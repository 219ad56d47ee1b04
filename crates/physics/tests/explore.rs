//! Explorer checks against exact results: quadrature populations of the double well,
//! free-field ⟨φ²⟩, BAOAB's exact harmonic ⟨q²⟩ and the configurational temperature,
//! and metadynamics reweighting back to the quadrature populations.

use proptest::prelude::*;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use tarn_physics::cv::CollectiveVariable;
use tarn_physics::explore::{
    langevin_baoab, metadynamics, metropolis, GridAxis, LangevinParams, MetadParams,
    MetropolisParams,
};
use tarn_physics::models::{double_well_reference, DoubleWell, Harmonic, LennardJones, Phi4, Wall};
use tarn_physics::{EnergyError, EnergyModel, PhysicsError};

/// Mean and standard error from `n_blocks` contiguous blocks (weights optional).
fn block_mean(values: &[f64], weights: Option<&[f64]>, n_blocks: usize) -> (f64, f64) {
    let size = values.len() / n_blocks;
    let means: Vec<f64> = (0..n_blocks)
        .map(|b| {
            let r = b * size..(b + 1) * size;
            match weights {
                Some(w) => {
                    let sw: f64 = w[r.clone()].iter().sum();
                    values[r.clone()]
                        .iter()
                        .zip(&w[r])
                        .map(|(v, w)| v * w)
                        .sum::<f64>()
                        / sw
                }
                None => values[r].iter().sum::<f64>() / size as f64,
            }
        })
        .collect();
    let m = means.iter().sum::<f64>() / n_blocks as f64;
    let var = means.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n_blocks - 1) as f64;
    (m, (var / n_blocks as f64).sqrt())
}

#[test]
fn metropolis_reproduces_double_well_quadrature_populations() {
    // Exact reference: 2-D Simpson quadrature of the Boltzmann factor (double_well_reference).
    let reference = double_well_reference(1.0);
    let params = MetropolisParams {
        n_steps: 400_000,
        step_size: 0.6,
        save_stride: 5,
        temperature_factor: 1.0,
    };
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let run = metropolis(&DoubleWell::default(), &[-1.0, 0.0], 1.0, &params, &mut rng).unwrap();
    assert_eq!(run.trajectory.n_evals, 400_001);
    assert!(
        run.acceptance > 0.2 && run.acceptance < 0.8,
        "{}",
        run.acceptance
    );
    let left: Vec<f64> = (0..run.trajectory.n_frames())
        .map(|i| {
            if run.trajectory.frame(i)[0] < reference.x_saddle {
                1.0
            } else {
                0.0
            }
        })
        .collect();
    let (p, err) = block_mean(&left, None, 20);
    eprintln!(
        "metropolis double well: p_left {p} ± {err}, exact {}",
        reference.p_left
    );
    assert!(err < 0.03, "too few crossings: error {err}");
    assert!(
        (p - reference.p_left).abs() < 4.0 * err + 1e-3,
        "p_left {p} ± {err} vs {}",
        reference.p_left
    );
}

#[test]
fn metropolis_reproduces_the_free_field_phi_squared() {
    // REFERENCES.md (R) and the momentum sum: L = 4, m² = 1, λ = 0: <φ²> = 0.1317460317.
    let model = Phi4::new(4, 1.0, 0.0).unwrap();
    let params = MetropolisParams {
        n_steps: 200_000,
        step_size: 0.12,
        save_stride: 4,
        temperature_factor: 1.0,
    };
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let run = metropolis(&model, &[0.0; 16], 1.0, &params, &mut rng).unwrap();
    let phi2: Vec<f64> = (0..run.trajectory.n_frames())
        .map(|i| run.trajectory.frame(i).iter().map(|v| v * v).sum::<f64>() / 16.0)
        .collect();
    let (m, err) = block_mean(&phi2[1000..], None, 20);
    eprintln!("metropolis free field: <phi^2> {m} ± {err}, exact 0.1317460317");
    assert!((m - 0.1317460317).abs() < 4.0 * err, "{m} ± {err}");
    assert!(err < 0.005);
}

#[test]
fn baoab_samples_the_harmonic_well_exactly_and_the_configurational_temperature_is_kt() {
    // Leimkuhler & Matthews 2013: BAOAB's configurational marginal is exact for a
    // harmonic well at any stable step (R here at hω = 0.8); Butler et al., J. Chem.
    // Phys. 109, 6519 (1998): kT = <|∇U|²>/<∇²U> (P).
    let (k, kt, dim) = (4.0, 1.5, 4);
    let model = Harmonic { dim, stiffness: k };
    let params = LangevinParams {
        n_steps: 200_000,
        dt: 0.4,
        friction: 1.0,
        save_stride: 2,
        temperature_factor: 1.0,
    };
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    let run = langevin_baoab(&model, &[0.0; 4], kt, &params, &mut rng).unwrap();
    let t = &run.trajectory;
    let q2: Vec<f64> = (0..t.n_frames())
        .map(|i| t.frame(i).iter().map(|v| v * v).sum::<f64>() / dim as f64)
        .collect();
    let (m, err) = block_mean(&q2, None, 20);
    eprintln!(
        "baoab harmonic h*omega = 0.8: <q^2> {m} ± {err}, exact {}",
        kt / k
    );
    assert!(
        (m - kt / k).abs() < 4.0 * err,
        "<q²> {m} ± {err} vs {}",
        kt / k
    );
    assert!(err < 0.01 * kt / k);
    // |∇U|² = k²|q|², ∇²U = k·dim.
    let grad2: Vec<f64> = q2.iter().map(|v| k * k * v * dim as f64).collect();
    let (g, gerr) = block_mean(&grad2, None, 20);
    let t_conf = g / (k * dim as f64);
    assert!(
        (t_conf - kt).abs() < 4.0 * gerr / (k * dim as f64),
        "T_conf {t_conf}"
    );
}

#[test]
fn baoab_configurational_temperature_on_the_double_well() {
    // Butler et al. 1998 (P): <|∇U|²>/<∇²U> = kT for any smooth U; here at kT = 1 ×
    // temperature factor 2. Also the populations at kT = 2 against quadrature.
    let dw = DoubleWell::default();
    let params = LangevinParams {
        n_steps: 300_000,
        dt: 0.02,
        friction: 2.0,
        save_stride: 5,
        temperature_factor: 2.0,
    };
    let mut rng = ChaCha8Rng::seed_from_u64(4);
    let run = langevin_baoab(&dw, &[1.0, 0.0], 1.0, &params, &mut rng).unwrap();
    let t = &run.trajectory;
    let mut grad2 = Vec::new();
    let mut lap = Vec::new();
    for i in 0..t.n_frames() {
        let q = t.frame(i);
        let (_, g) = dw.energy_gradient(q[0], q[1]);
        grad2.push(g[0] * g[0] + g[1] * g[1]);
        // Laplacian by central differences of the analytic gradient.
        let h = 1e-5;
        let gxp = dw.energy_gradient(q[0] + h, q[1]).1[0];
        let gxm = dw.energy_gradient(q[0] - h, q[1]).1[0];
        let gyp = dw.energy_gradient(q[0], q[1] + h).1[1];
        let gym = dw.energy_gradient(q[0], q[1] - h).1[1];
        lap.push((gxp - gxm + gyp - gym) / (2.0 * h));
    }
    let (g, gerr) = block_mean(&grad2, None, 20);
    let (l, _) = block_mean(&lap, None, 20);
    let t_conf = g / l;
    eprintln!("baoab double well: T_conf {t_conf} ± {}, want 2", gerr / l);
    assert!(
        (t_conf - 2.0).abs() < 4.0 * gerr / l + 0.02,
        "T_conf {t_conf} (±{})",
        gerr / l
    );
    let reference = double_well_reference(2.0);
    let left: Vec<f64> = (0..t.n_frames())
        .map(|i| {
            if t.frame(i)[0] < reference.x_saddle {
                1.0
            } else {
                0.0
            }
        })
        .collect();
    let (p, err) = block_mean(&left, None, 20);
    eprintln!(
        "baoab double well kT=2: p_left {p} ± {err}, exact {}",
        reference.p_left
    );
    assert!(
        (p - reference.p_left).abs() < 4.0 * err + 2e-3,
        "p_left {p} ± {err} vs {}",
        reference.p_left
    );
}

#[test]
fn metadynamics_reweights_back_to_the_quadrature_populations() {
    // Barducci et al. 2008 with Tiwary & Parrinello 2015 reweighting: weights
    // exp((V - c)/kT) recover the unbiased populations (exact reference: quadrature).
    let reference = double_well_reference(1.0);
    let params = MetadParams {
        n_steps: 200_000,
        dt: 0.02,
        friction: 2.0,
        save_stride: 5,
        temperature_factor: 1.0,
        cvs: vec![CollectiveVariable::Coordinate { index: 0 }],
        hill_height: 0.3,
        hill_widths: vec![0.15],
        pace: 100,
        bias_factor: 6.0,
        grid: vec![GridAxis {
            min: -2.5,
            max: 2.5,
            bins: 250,
        }],
        interpolate_bias: false,
    };
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    let run = metadynamics(&DoubleWell::default(), &[1.0, 0.0], 1.0, &params, &mut rng).unwrap();
    assert_eq!(run.final_bias.n_hills(), 2000);
    assert_eq!(run.bias.len(), run.trajectory.n_frames());
    // The recorded bias is the hill sum at the frame's CV value.
    let i = run.bias.len() - 1;
    let s_last = run.cv_values[i];
    let v_recomputed = run.final_bias.value(&[s_last]);
    assert!(v_recomputed >= run.bias[i] - 1e-12);
    assert!((run.final_c - run.final_bias.c_of_t(&run.grid)).abs() < 1e-9);
    // Skip the first 20% (bias still growing), then reweight.
    let skip = run.bias.len() / 5;
    let lw = run.log_weights();
    let lw_max = lw[skip..].iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let w: Vec<f64> = lw[skip..].iter().map(|l| (l - lw_max).exp()).collect();
    let left: Vec<f64> = run.cv_values[skip..]
        .iter()
        .map(|s| if *s < reference.x_saddle { 1.0 } else { 0.0 })
        .collect();
    let (p, err) = block_mean(&left, Some(&w), 10);
    eprintln!(
        "metad reweighted: p_left {p} ± {err}, exact {}",
        reference.p_left
    );
    assert!(
        (p - reference.p_left).abs() < 4.0 * err + 0.01,
        "reweighted p_left {p} ± {err} vs {}",
        reference.p_left
    );
    // The well-tempered free-energy estimate has its minimum in the right well.
    let f = run.final_bias.free_energy_on_grid(&run.grid);
    let argmin = (0..f.len()).min_by(|a, b| f[*a].total_cmp(&f[*b])).unwrap();
    assert!(run.grid[0].centre(argmin) > 0.5);
}

#[test]
fn explorers_are_deterministic_given_the_seed() {
    let model = LennardJones::new(7, 2, Wall::default_for(7, 2)).unwrap();
    let start = tarn_physics::models::lennard_jones::centred_hexagon_7(1.12);
    let p = LangevinParams {
        n_steps: 500,
        ..LangevinParams::default()
    };
    let a = langevin_baoab(&model, &start, 0.3, &p, &mut ChaCha8Rng::seed_from_u64(5)).unwrap();
    let b = langevin_baoab(&model, &start, 0.3, &p, &mut ChaCha8Rng::seed_from_u64(5)).unwrap();
    let c = langevin_baoab(&model, &start, 0.3, &p, &mut ChaCha8Rng::seed_from_u64(6)).unwrap();
    assert_eq!(a, b);
    assert_ne!(a.trajectory.frames, c.trajectory.frames);
    // Saved frames of a cluster are in the centre-of-mass frame.
    for i in 0..a.trajectory.n_frames() {
        let f = a.trajectory.frame(i);
        let cx: f64 = f.iter().step_by(2).sum::<f64>() / 7.0;
        let cy: f64 = f.iter().skip(1).step_by(2).sum::<f64>() / 7.0;
        assert!(cx.abs() < 1e-12 && cy.abs() < 1e-12);
    }
    let mp = MetropolisParams {
        n_steps: 500,
        step_size: 0.05,
        ..MetropolisParams::default()
    };
    let a = metropolis(&model, &start, 0.3, &mp, &mut ChaCha8Rng::seed_from_u64(5)).unwrap();
    let b = metropolis(&model, &start, 0.3, &mp, &mut ChaCha8Rng::seed_from_u64(5)).unwrap();
    assert_eq!(a, b);
}

/// A model that fails after a number of calls, like an external process dying.
struct Failing {
    left: std::sync::atomic::AtomicUsize,
}

impl EnergyModel for Failing {
    fn dim(&self) -> usize {
        2
    }
    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        if self.left.fetch_sub(1, std::sync::atomic::Ordering::SeqCst) == 0 {
            return Err(EnergyError::External("peer died".into()));
        }
        let n = x.len() / 2;
        energy[..n].iter_mut().for_each(|e| *e = 0.0);
        if let Some(f) = forces {
            f.iter_mut().for_each(|v| *v = 0.0);
        }
        Ok(())
    }
}

#[test]
fn energy_errors_and_bad_parameters_propagate() {
    let m = Failing { left: 10.into() };
    let err = metropolis(
        &m,
        &[0.0, 0.0],
        1.0,
        &MetropolisParams::default(),
        &mut ChaCha8Rng::seed_from_u64(0),
    );
    assert!(matches!(
        err,
        Err(PhysicsError::Energy(EnergyError::External(_)))
    ));
    let m = Failing { left: 10.into() };
    let err = langevin_baoab(
        &m,
        &[0.0, 0.0],
        1.0,
        &LangevinParams::default(),
        &mut ChaCha8Rng::seed_from_u64(0),
    );
    assert!(err.unwrap_err().to_string().contains("peer died"));
    let bad = MetadParams {
        cvs: vec![CollectiveVariable::Coordinate { index: 0 }],
        ..MetadParams::default()
    };
    let err = metadynamics(
        &DoubleWell::default(),
        &[0.0, 0.0],
        1.0,
        &bad,
        &mut ChaCha8Rng::seed_from_u64(0),
    );
    assert!(err.unwrap_err().to_string().contains("hill_widths"));
    // Overlapping particles give a non-finite energy, reported rather than integrated.
    let lj = LennardJones::new(2, 2, Wall::default_for(2, 2)).unwrap();
    let err = langevin_baoab(
        &lj,
        &[0.0; 4],
        1.0,
        &LangevinParams::default(),
        &mut ChaCha8Rng::seed_from_u64(0),
    );
    assert!(
        matches!(err, Err(PhysicsError::NonFinite { step: 0, .. })),
        "{err:?}"
    );
    // Unknown keys in parameter tables are refused.
    let e = serde_json::from_str::<MetropolisParams>("{\"steps\": 3}")
        .unwrap_err()
        .to_string();
    assert!(e.contains("steps"), "{e}");
}

fn cv_fd_error(cv: &CollectiveVariable, x: &[f64], pd: Option<usize>) -> f64 {
    let mut g = vec![0.0; x.len()];
    cv.value_and_gradient(x, pd, &mut g);
    let mut xp = x.to_vec();
    let mut worst = 0.0f64;
    for k in 0..x.len() {
        let h = 1e-6;
        xp[k] = x[k] + h;
        let a = cv.value(&xp, pd);
        xp[k] = x[k] - h;
        let b = cv.value(&xp, pd);
        xp[k] = x[k];
        worst = worst.max(((a - b) / (2.0 * h) - g[k]).abs());
    }
    worst
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(32))]

    #[test]
    fn cv_gradients_match_finite_differences(x in proptest::collection::vec(-2.0f64..2.0, 12)) {
        let cvs = [
            CollectiveVariable::Coordinate { index: 5 },
            CollectiveVariable::Distance { i: 0, j: 3, dims: None },
            CollectiveVariable::Linear { indices: vec![0, 4, 11], weights: vec![1.0, -0.5, 2.0], offset: 0.3 },
            CollectiveVariable::RadiusOfGyration { dims: None },
            CollectiveVariable::Coordination { r0: 1.5, dims: None },
            CollectiveVariable::Magnetisation {},
            CollectiveVariable::MeanSquare {},
        ];
        for pd in [Some(2), Some(3)] {
            for cv in &cvs {
                cv.validate(12, pd).unwrap();
                prop_assert!(cv_fd_error(cv, &x, pd) < 1e-6, "{:?}", cv);
            }
        }
    }
}

#[test]
fn cv_values_are_what_they_say() {
    let x = [0.0, 0.0, 3.0, 4.0];
    let d = CollectiveVariable::Distance {
        i: 0,
        j: 1,
        dims: Some(2),
    };
    assert!((d.value(&x, None) - 5.0).abs() < 1e-15);
    let rg = CollectiveVariable::RadiusOfGyration { dims: Some(2) };
    assert!((rg.value(&x, None) - 2.5).abs() < 1e-15);
    // (0 + 0 + 9 + 16) / 4.
    let ms = CollectiveVariable::MeanSquare {};
    assert!((ms.value(&x, None) - 6.25).abs() < 1e-15);
    // Two particles at r0: each has s = 1/2, mean coordination (2/N)·(1/2) = 1/2.
    let c = CollectiveVariable::Coordination {
        r0: 5.0,
        dims: Some(2),
    };
    assert!((c.value(&x, None) - 0.5).abs() < 1e-15);
    assert!(d.validate(4, None).is_ok());
    assert_eq!(
        d.values(&[0.0, 0.0, 3.0, 4.0, 0.0, 0.0, 0.0, 1.0], 4, None)
            .unwrap(),
        vec![5.0, 1.0]
    );
    let out_of_range = CollectiveVariable::Coordinate { index: 9 };
    assert!(out_of_range
        .values(&x, 4, None)
        .unwrap_err()
        .to_string()
        .contains("index"));
    let needs = CollectiveVariable::Distance {
        i: 0,
        j: 1,
        dims: None,
    };
    assert!(needs
        .validate(4, None)
        .unwrap_err()
        .to_string()
        .contains("dims"));
    let parsed: CollectiveVariable = toml::from_str("cv = \"coordination\"\ndims = 2\n").unwrap();
    assert_eq!(
        parsed,
        CollectiveVariable::Coordination {
            r0: 1.5,
            dims: Some(2)
        }
    );
}

#[test]
fn interpolated_bias_matches_the_exact_hill_sum_in_one_and_two_cvs() {
    use tarn_physics::explore::InterpolatedBias;
    use tarn_physics::models::MullerBrown;
    // Two CVs (x and y of Müller–Brown) at high temperature so that hills spread out.
    let params = MetadParams {
        n_steps: 20_000,
        dt: 0.001,
        friction: 10.0,
        save_stride: 10,
        temperature_factor: 1.0,
        cvs: vec![
            CollectiveVariable::Coordinate { index: 0 },
            CollectiveVariable::Coordinate { index: 1 },
        ],
        hill_height: 2.0,
        hill_widths: vec![0.1, 0.1],
        pace: 50,
        bias_factor: 8.0,
        grid: vec![
            GridAxis {
                min: -1.8,
                max: 1.3,
                bins: 124,
            },
            GridAxis {
                min: -0.6,
                max: 2.2,
                bins: 112,
            },
        ],
        interpolate_bias: true,
    };
    let run = metadynamics(
        &MullerBrown,
        &[-0.55, 1.44],
        10.0,
        &params,
        &mut ChaCha8Rng::seed_from_u64(3),
    )
    .unwrap();
    let bias = &run.final_bias;
    let v_max = bias.heights.iter().sum::<f64>().max(1.0);
    let interp = InterpolatedBias::new(bias, &params.grid);
    let mut rng = ChaCha8Rng::seed_from_u64(4);
    let mut worst = 0.0f64;
    for _ in 0..2000 {
        use rand::Rng;
        let s = [rng.gen_range(-1.7..1.2), rng.gen_range(-0.5..2.1)];
        let mut g_exact = [0.0; 2];
        let mut g_grid = [0.0; 2];
        let v_exact = bias.value_and_gradient(&s, &mut g_exact);
        let v_grid = interp.value_and_gradient(&s, &mut g_grid).unwrap();
        worst = worst.max((v_exact - v_grid).abs());
        let g_scale = g_exact[0].abs().max(g_exact[1].abs()).max(1.0);
        assert!(
            (g_exact[0] - g_grid[0]).abs() < 1e-2 * g_scale
                && (g_exact[1] - g_grid[1]).abs() < 1e-2 * g_scale
        );
    }
    eprintln!("2-CV interpolated bias: worst |ΔV| {worst:.2e} of bias scale {v_max:.1}");
    // Absolute error in energy units (kT = 10 here; hill heights up to 2).
    assert!(worst < 1e-2, "{worst}");
    // Outside the node range the interpolation declines and the exact sum is used.
    assert!(interp
        .value_and_gradient(&[5.0, 0.0], &mut [0.0; 2])
        .is_none());
}

#[test]
fn metadynamics_with_an_interpolated_bias_also_reweights_to_quadrature() {
    let reference = double_well_reference(1.0);
    let params = MetadParams {
        n_steps: 200_000,
        dt: 0.02,
        friction: 2.0,
        save_stride: 5,
        temperature_factor: 1.0,
        cvs: vec![CollectiveVariable::Coordinate { index: 0 }],
        hill_height: 0.3,
        hill_widths: vec![0.15],
        pace: 100,
        bias_factor: 6.0,
        grid: vec![GridAxis {
            min: -2.5,
            max: 2.5,
            bins: 250,
        }],
        interpolate_bias: true,
    };
    let t = std::time::Instant::now();
    let run = metadynamics(
        &DoubleWell::default(),
        &[1.0, 0.0],
        1.0,
        &params,
        &mut ChaCha8Rng::seed_from_u64(12),
    )
    .unwrap();
    let secs = t.elapsed().as_secs_f64();
    let skip = run.bias.len() / 5;
    let lw = run.log_weights();
    let lw_max = lw[skip..].iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let w: Vec<f64> = lw[skip..].iter().map(|l| (l - lw_max).exp()).collect();
    let left: Vec<f64> = run.cv_values[skip..]
        .iter()
        .map(|s| if *s < reference.x_saddle { 1.0 } else { 0.0 })
        .collect();
    let (p, err) = block_mean(&left, Some(&w), 10);
    eprintln!(
        "metad (interpolated bias, {secs:.2}s): p_left {p} ± {err}, exact {}",
        reference.p_left
    );
    assert!(
        (p - reference.p_left).abs() < 4.0 * err + 0.01,
        "{p} ± {err}"
    );
}

/// HMC on the free lattice field (λ = 0), whose ⟨φ²⟩ is exact:
/// (1/2V) Σ_p 1/(m² + Σ_μ 4 sin²(p_μ/2)) = 0.1317460317 for L = 4, m² = 1
/// (REFERENCES.md, status R). The error bar is from batch means of 200 trajectories.
#[test]
fn hmc_samples_the_free_field_exactly() {
    use tarn_physics::explore::{hmc, HmcParams};
    use tarn_physics::models::Phi4;
    let model = Phi4::new(4, 1.0, 0.0).unwrap();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
    let params = HmcParams {
        n_trajectories: 40_000,
        n_leapfrog: 5,
        step_size: 0.3,
    };
    let run = hmc(&model, &[0.0; 16], 1.0, &params, &mut rng).unwrap();
    assert!(run.acceptance > 0.5, "acceptance {}", run.acceptance);
    let phi2: Vec<f64> = run
        .states
        .chunks(16)
        .skip(1000)
        .map(|x| x.iter().map(|v| v * v).sum::<f64>() / 16.0)
        .collect();
    let batch = 200;
    let means: Vec<f64> = phi2
        .chunks_exact(batch)
        .map(|c| c.iter().sum::<f64>() / batch as f64)
        .collect();
    let nb = means.len() as f64;
    let mean = means.iter().sum::<f64>() / nb;
    let var = means.iter().map(|m| (m - mean).powi(2)).sum::<f64>() / (nb - 1.0);
    let err = (var / nb).sqrt();
    let exact = 0.1317460317;
    assert!(
        (mean - exact).abs() < 4.0 * err,
        "{mean} ± {err} vs {exact}"
    );
    assert!(err < 0.002, "error {err}");
}
