//! Samplers checked against exact Gaussian results: latent Metropolis through a random
//! (untrained, strongly non-linear) flow must still sample exp(-E/kT) exactly, because
//! the acceptance includes the log-determinant; generation's importance weights must
//! give the exact partition function and moments.

mod common;
use common::*;
use tarn_flow::{generate, latent_metropolis, Flow, FlowSpec, LatentMcParams};

fn random_2d_flow() -> Flow<f32> {
    let mut spec = FlowSpec::new(2);
    spec.n_layers = 4;
    spec.hidden_width = 16;
    random_flow(spec, None, 3, 0.35)
}

#[test]
fn latent_metropolis_samples_the_exact_boltzmann_distribution() {
    // E = k/2 |x - c|^2 with kT = 0.5 and temperature factor 1.5: <x> = c, var = kT tau / k.
    let energy = Gaussian {
        dim: 2,
        k: 2.0,
        centre: 0.7,
    };
    let flow = random_2d_flow();
    let params = LatentMcParams {
        n_chains: 256,
        n_steps: 1500,
        burn_in: 200,
        thin: 4,
        sigma: 0.5,
        temperature_factor: 1.5,
        threads: 2,
        ..Default::default()
    };
    let r = latent_metropolis(&flow, &energy, &params, 0.5, None, 1).unwrap();
    let n = r.reduced_energy.len();
    assert_eq!(n, 256 * (1300 / 4));
    assert_eq!(r.energy_evaluations, 256 * 1501);
    let var_exact = 0.5 * 1.5 / 2.0;
    for a in 0..2 {
        let mean = (0..n).map(|i| r.x[2 * i + a]).sum::<f64>() / n as f64;
        let var = (0..n).map(|i| (r.x[2 * i + a] - mean).powi(2)).sum::<f64>() / n as f64;
        eprintln!(
            "coordinate {a}: mean {mean:.4} (exact 0.7), variance {var:.4} (exact {var_exact:.4})"
        );
        assert!((mean - 0.7).abs() < 0.015);
        assert!((var / var_exact - 1.0).abs() < 0.03);
    }
    // Reduced energies are E / (kT tau) of the kept states: <u> = D/2 exactly.
    let mean_u = r.reduced_energy.iter().sum::<f64>() / n as f64;
    assert!((mean_u - 1.0).abs() < 0.03, "<u> = {mean_u}, exact 1");
    assert!(
        r.acceptance_rate > 0.1 && r.acceptance_rate < 0.6,
        "acceptance {}",
        r.acceptance_rate
    );
    eprintln!("acceptance {:.3}, sigma {:.3}", r.acceptance_rate, r.sigma);
}

#[test]
fn sigma_adapts_only_in_burn_in_and_within_bounds() {
    let energy = Gaussian {
        dim: 2,
        k: 1.0,
        centre: 0.0,
    };
    let flow = random_2d_flow();
    let p = LatentMcParams {
        n_chains: 64,
        n_steps: 600,
        burn_in: 400,
        sigma: 2.9,
        sigma_max: 3.0,
        target_acceptance: 0.5,
        ..Default::default()
    };
    let r = latent_metropolis(&flow, &energy, &p, 1.0, None, 2).unwrap();
    assert!(
        r.sigma < 2.0 && r.sigma >= p.sigma_min,
        "sigma {} should shrink towards 50% acceptance",
        r.sigma
    );
    assert!(
        (r.acceptance_rate - 0.5).abs() < 0.1,
        "acceptance after burn-in {}",
        r.acceptance_rate
    );
    let fixed = LatentMcParams {
        sigma: 0.4,
        sigma_min: 0.4,
        sigma_max: 0.4,
        ..p.clone()
    };
    assert_eq!(
        latent_metropolis(&flow, &energy, &fixed, 1.0, None, 2)
            .unwrap()
            .sigma,
        0.4
    );
    // Chains may start from given configurations; bad ones are refused.
    let start = [0.1, 0.2, -0.3, 0.4];
    let r = latent_metropolis(&flow, &energy, &p, 1.0, Some(&start), 3).unwrap();
    assert!(!r.x.is_empty());
    assert!(latent_metropolis(&flow, &energy, &p, 1.0, Some(&[0.1, 0.2, 0.3]), 3).is_err());
    assert!(latent_metropolis(&flow, &energy, &p, 1.0, Some(&[f64::NAN, 0.2]), 3).is_err());
    let bad = LatentMcParams { burn_in: 700, ..p };
    assert!(latent_metropolis(&flow, &energy, &bad, 1.0, None, 3).is_err());
}

#[test]
fn generation_weights_give_exact_partition_function_and_moments() {
    let (k, kt, tau) = (3.0, 0.8, 1.3);
    let energy = Gaussian {
        dim: 2,
        k,
        centre: -0.4,
    };
    let flow = random_2d_flow();
    let g = generate(&flow, &energy, 100_000, kt, tau, 2, 4).unwrap();
    assert_eq!(g.energy_evaluations, 100_000);
    for i in 0..10 {
        assert!((g.log_weight[i] - (-g.reduced_energy[i] - g.log_q[i])).abs() < 1e-12);
    }
    let m = g
        .log_weight
        .iter()
        .cloned()
        .fold(f64::NEG_INFINITY, f64::max);
    let w: Vec<f64> = g.log_weight.iter().map(|l| (l - m).exp()).collect();
    let sw: f64 = w.iter().sum();
    let ln_z = m + (sw / w.len() as f64).ln();
    let exact = (2.0 * std::f64::consts::PI * kt * tau / k).ln();
    let mean_x = (0..w.len()).map(|i| w[i] * g.x[2 * i]).sum::<f64>() / sw;
    let ess = sw * sw / w.iter().map(|v| v * v).sum::<f64>();
    eprintln!("ln Z {ln_z:.4} exact {exact:.4}; <x> {mean_x:.4} exact -0.4; ESS {ess:.0}");
    assert!((ln_z - exact).abs() < 0.03);
    assert!((mean_x + 0.4).abs() < 0.03);
    // Same seed, same samples.
    let again = generate(&flow, &energy, 1000, kt, tau, 2, 4).unwrap();
    assert_eq!(&again.x[..], &g.x[..2000]);
    assert!(generate(&flow, &energy, 10, kt, 0.0, 1, 4).is_err());
}
