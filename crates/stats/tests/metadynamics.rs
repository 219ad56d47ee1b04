//! Metadynamics reweighting checked against exact quadrature on a 1-D double well.
//!
//! Frames are exact samples of the biased distribution p(x)·exp(−V(x, t)/kT) (drawn by
//! rejection), standing in for a metadynamics run whose bias changes slowly enough to
//! keep each frame at equilibrium, which is the assumption of Tiwary & Parrinello,
//! J. Phys. Chem. B 119, 736, 2015. The exact ΔF comes from Simpson quadrature (exact
//! result, status R).

mod common;

use common::{exact_delta_f, label, rejection_samples, DoubleWell};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use tarn_stats::{
    final_bias_log_weights, reweighting_offset, state_free_energies, tiwary_parrinello_log_weights,
    BootstrapOptions, StateFreeEnergies,
};

const KT: f64 = 1.5;
const GAMMA: f64 = 6.0;
const WELL: DoubleWell = DoubleWell {
    height: 6.0,
    tilt: 1.2,
};

/// The converged well-tempered bias V = −(1 − 1/γ)·U.
fn final_bias(x: f64) -> f64 {
    -(1.0 - 1.0 / GAMMA) * WELL.energy(x)
}

fn delta_f(est: &StateFreeEnergies) -> (f64, f64) {
    // F_B − F_A in kT, whichever state is the reference (its error bar is 0).
    let fa = est.states[0].free_energy.unwrap();
    let fb = est.states[1].free_energy.unwrap();
    let err = est.states[0].free_energy_err.unwrap() + est.states[1].free_energy_err.unwrap();
    (fb - fa, err)
}

fn estimate(x: &[f64], log_w: &[f64], seed: u64) -> (f64, f64) {
    let labels: Vec<Option<u32>> = x.iter().map(|&x| label(x)).collect();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let opts = BootstrapOptions {
        n_replicates: 300,
        ..Default::default()
    };
    delta_f(&state_free_energies(log_w, &labels, &[0, 1], &opts, &mut rng).unwrap())
}

#[test]
fn final_bias_reweighting_of_a_static_bias_recovers_quadrature() {
    let exact = exact_delta_f(|x| WELL.energy(x) / KT);
    let mut rng = ChaCha8Rng::seed_from_u64(100);
    let x = rejection_samples(|x| (WELL.energy(x) + final_bias(x)) / KT, 20_000, &mut rng);
    let bias: Vec<f64> = x.iter().map(|&x| final_bias(x)).collect();
    let lw = final_bias_log_weights(&bias, KT).unwrap();
    let (df, err) = estimate(&x, &lw, 101);
    eprintln!("static bias: ΔF = {df:.4} ± {err:.4} kT, exact {exact:.4}");
    assert!(
        (df - exact).abs() < 3.0 * err,
        "ΔF = {df} ± {err}, exact {exact}"
    );
    // The bias made the barrier crossable: both states are sampled comparably.
    let in_b = x.iter().filter(|&&x| x > 0.0).count() as f64 / x.len() as f64;
    assert!(in_b > 0.2 && in_b < 0.8);
}

#[test]
fn tiwary_parrinello_weights_recover_quadrature_under_a_growing_bias() {
    // The bias grows as V(x, t) = α_t·V_final(x), α_t from 0 to 1 over 200 times with
    // 100 frames each. c(t) from the exact F (here F(s) = U(s) since s = x).
    let exact = exact_delta_f(|x| WELL.energy(x) / KT);
    let grid: Vec<f64> = (0..=3000)
        .map(|i| common::LO + (common::HI - common::LO) * i as f64 / 3000.0)
        .collect();
    let f_grid: Vec<f64> = grid.iter().map(|&s| WELL.energy(s)).collect();
    let mut rng = ChaCha8Rng::seed_from_u64(200);
    let (mut x, mut bias_now, mut offset, mut bias_final) = (vec![], vec![], vec![], vec![]);
    for t in 0..200 {
        let alpha = t as f64 / 199.0;
        let v = |s: f64| alpha * final_bias(s);
        let v_grid: Vec<f64> = grid.iter().map(|&s| v(s)).collect();
        let c = reweighting_offset(&f_grid, &v_grid, KT).unwrap();
        for xi in rejection_samples(|s| (WELL.energy(s) + v(s)) / KT, 100, &mut rng) {
            x.push(xi);
            bias_now.push(v(xi));
            offset.push(c);
            bias_final.push(final_bias(xi));
        }
    }
    let lw_tp = tiwary_parrinello_log_weights(&bias_now, &offset, KT).unwrap();
    let (df_tp, err_tp) = estimate(&x, &lw_tp, 201);
    let lw_final = final_bias_log_weights(&bias_final, KT).unwrap();
    let (df_final, err_final) = estimate(&x, &lw_final, 202);
    eprintln!(
        "growing bias: Tiwary–Parrinello ΔF = {df_tp:.4} ± {err_tp:.4}, final-bias ΔF = \
         {df_final:.4} ± {err_final:.4}, exact {exact:.4} kT"
    );
    assert!(
        (df_tp - exact).abs() < 3.0 * err_tp,
        "TP: {df_tp} ± {err_tp} vs {exact}"
    );
    // The documented limitation: final-bias weights on frames from the filling stage
    // are biased far beyond their error bar.
    assert!(
        (df_final - exact).abs() > 5.0 * err_final,
        "final bias: {df_final} ± {err_final}"
    );
}
