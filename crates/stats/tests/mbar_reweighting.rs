//! MBAR used the way tarn's evaluate stage uses it for multi-temperature data: exact
//! samples of a double well at three temperatures, reweighted to a fourth temperature
//! that was never sampled, then state free energies. Checked against Simpson
//! quadrature (exact result, status R).

mod common;

use common::{exact_delta_f, label, rejection_samples, DoubleWell};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use tarn_stats::{state_free_energies, BootstrapOptions, Mbar, MbarOptions};

const WELL: DoubleWell = DoubleWell {
    height: 4.0,
    tilt: 0.8,
};

#[test]
fn multi_temperature_mbar_reweights_to_an_unsampled_temperature() {
    let temperatures = [0.8, 1.6, 3.2];
    let target = 1.1;
    let n_each = 4000;
    let mut rng = ChaCha8Rng::seed_from_u64(300);
    let x: Vec<f64> = temperatures
        .iter()
        .flat_map(|&t| rejection_samples(|x| WELL.energy(x) / t, n_each, &mut rng))
        .collect();
    let u_kn: Vec<f64> = temperatures
        .iter()
        .flat_map(|&t| x.iter().map(move |&x| WELL.energy(x) / t))
        .collect();
    let mbar = Mbar::solve(&u_kn, &[n_each; 3], &MbarOptions::default()).unwrap();

    // ln Z(T) = −f: check the sampled temperatures' free energies against quadrature.
    let d = mbar.free_energy_differences();
    let ln_z =
        |t: f64| common::simpson(|x| WELL.energy(x) / t, common::LO, common::HI, 40_000).ln();
    for j in 1..3 {
        let exact = -(ln_z(temperatures[j]) - ln_z(temperatures[0]));
        let (df, err) = d.get(0, j);
        assert!(
            (df - exact).abs() < 3.0 * err,
            "f_{j} − f_0 = {df} ± {err}, exact {exact}"
        );
    }

    // Reweight to the unsampled target temperature and estimate ΔF_AB there.
    let u_target: Vec<f64> = x.iter().map(|&x| WELL.energy(x) / target).collect();
    let lw = mbar.target_log_weights(&u_target).unwrap();
    let labels: Vec<Option<u32>> = x.iter().map(|&x| label(x)).collect();
    let mut boot = ChaCha8Rng::seed_from_u64(301);
    let est = state_free_energies(
        &lw,
        &labels,
        &[0, 1],
        &BootstrapOptions::default(),
        &mut boot,
    )
    .unwrap();
    let exact = exact_delta_f(|x| WELL.energy(x) / target);
    let fb = &est.states[1];
    assert_eq!(est.reference_state, 0);
    let (df, err) = (fb.free_energy.unwrap(), fb.free_energy_err.unwrap());
    eprintln!(
        "MBAR at kT = {target}: ΔF = {df:.4} ± {err:.4} kT, exact {exact:.4}; {} iterations, ESS {:.0}",
        mbar.iterations(),
        est.ess
    );
    assert!(
        (df - exact).abs() < 3.0 * err,
        "ΔF = {df} ± {err}, exact {exact}"
    );
}
