//! The shipped campaigns against values from outside the project: published minima
//! and exact quadrature. Each runs a workflow from `workflows/` through `tarn run`.

mod common;

use common::{repo, Env};

fn run_workflow(env: &Env, file: &str) {
    let path = repo().join("workflows").join(file);
    env.tarn(&["run", path.to_str().unwrap(), "--quiet"])
        .code(0);
}

fn energies(env: &Env, name: &str) -> Vec<f64> {
    let states = env.json(&["states", name]);
    let mut e: Vec<f64> = states
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["energy"].as_f64().unwrap())
        .collect();
    e.sort_by(f64::total_cmp);
    e
}

fn assert_minima(found: &[f64], want: &[f64], tol: f64) {
    for w in want {
        assert!(
            found.iter().any(|e| (e - w).abs() < tol),
            "minimum {w} not among {found:?}"
        );
    }
}

/// Müller–Brown minima A, B, C: −146.699517, −108.166724, −80.767818 (Müller & Brown,
/// Theor. Chim. Acta 53, 75, 1979; recomputed from the published parameters —
/// REFERENCES.md status P + R).
const MULLER_BROWN_MINIMA: [f64; 3] = [-146.699517, -108.166724, -80.767818];

#[test]
fn hot_langevin_on_muller_brown_finds_the_three_published_minima() {
    let env = Env::new();
    run_workflow(&env, "muller-brown.toml");
    let e = energies(&env, "ridge-tracer");
    assert_eq!(e.len(), 3, "{e:?}");
    assert_minima(&e, &MULLER_BROWN_MINIMA, 1e-5);
}

#[test]
fn hot_langevin_on_the_2d_lj7_cluster_finds_the_four_lowest_minima() {
    // Dellago, Bolhuis & Chandler, J. Chem. Phys. 108, 9236 (1998) quote two decimals;
    // these six-decimal values are recomputed (REFERENCES.md status R).
    let env = Env::new();
    run_workflow(&env, "lj7-surface.toml");
    let e = energies(&env, "surface-seven");
    assert_minima(&e, &[-12.534867, -11.501291, -11.476907, -11.403419], 1e-4);
    let states = env.json(&["states", "surface-seven"]);
    for s in states.as_array().unwrap() {
        assert!(
            s["found_task"].as_str().unwrap().contains(".hot.w"),
            "who found it: {s}"
        );
        assert!(s["cost_to_find"].as_u64().unwrap() > 0);
    }
}

#[test]
fn the_boltzmann_generator_loop_finds_the_rearranged_lj7_minima_from_the_hexagon() {
    let env = Env::new();
    run_workflow(&env, "lj7-surface-flow.toml");
    let e = energies(&env, "surface-seven-flow");
    // Dellago, Bolhuis & Chandler 1998 (two decimals); six decimals recomputed (R).
    assert_minima(&e, &[-12.534867, -11.501291, -11.476907, -11.403419], 1e-4);
    let states = env.json(&["states", "surface-seven-flow"]);
    for s in states.as_array().unwrap() {
        let energy = s["energy"].as_f64().unwrap();
        let stage = s["found_stage"].as_str().unwrap();
        eprintln!(
            "E = {energy:.6} found by {} in round {}",
            s["found_task"], s["found_round"]
        );
        if (energy + 12.534867).abs() > 1e-3 {
            assert_eq!(
                stage, "latent",
                "the cold local walkers cannot rearrange the hexagon"
            );
        }
    }
}

#[test]
fn latent_metropolis_with_retraining_discovers_the_other_two_muller_brown_basins() {
    let env = Env::new();
    run_workflow(&env, "muller-brown-flow.toml");
    let states = env.json(&["states", "ridge-flow"]);
    let e = energies(&env, "ridge-flow");
    assert_minima(&e, &MULLER_BROWN_MINIMA, 1e-5);
    // The walkers start in basin A only; B and C must be found by the latent chains.
    for s in states.as_array().unwrap() {
        let energy = s["energy"].as_f64().unwrap();
        if (energy - MULLER_BROWN_MINIMA[0]).abs() > 1e-3 {
            assert_eq!(
                s["found_stage"], "latent",
                "basin at {energy} found by {}",
                s["found_task"]
            );
        }
    }
}

#[test]
fn the_flow_corrects_a_wrong_start_ratio_on_the_double_well() {
    let env = Env::new();
    run_workflow(&env, "double-well.toml");
    // Exact populations by 2-D Simpson quadrature of exp(−U/kT) over the half-planes
    // left and right of the saddle (tarn_physics::models::double_well_reference).
    let exact = tarn::physics::models::double_well_reference(1.0);
    let want = -exact.delta_f; // F_left − F_right in kT
    let states = env.json(&["states", "toggle-switch"]);
    let left = states
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["representative"][0].as_f64().unwrap() < 0.0)
        .expect("left well found");
    let rounds = env.json(&["rounds", "toggle-switch"]);
    let stop = rounds.as_array().unwrap().last().unwrap()["stop"]
        .as_str()
        .unwrap()
        .to_string();
    assert!(
        stop.contains("free energies of 2 states moved at most"),
        "it should stop on stability: {stop}"
    );
    let f = left["free_energy"].as_f64().expect("left well estimated");
    let err = left["free_energy_err"].as_f64().expect("with an error bar");
    eprintln!("double well: F_left − F_right = {f:.4} ± {err:.4} kT, exact {want:.4}");
    // ln Z by importance sampling against the quadrature's ln Z, and the reweighted
    // profile along x against the exact marginal (both from the last evaluation).
    let last = rounds.as_array().unwrap().last().unwrap();
    let metrics = &last["stages"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["name"] == "evaluate")
        .unwrap()["metrics"];
    let (log_z, log_z_err) = (
        metrics["log_z"].as_f64().unwrap(),
        metrics["log_z_err"].as_f64().unwrap(),
    );
    eprintln!("double well: ln Z = {log_z:.4} ± {log_z_err:.4}, exact {:.4}; profile Boltzmann-weighted RMS {} kT", exact.ln_z, metrics["profile_boltzmann_rms"]);
    assert!(
        (log_z - exact.ln_z).abs() < 4.0 * log_z_err + 0.01,
        "ln Z {log_z} ± {log_z_err} vs {}",
        exact.ln_z
    );
    assert!(metrics["profile_boltzmann_rms"].as_f64().unwrap() < 0.2);
    assert!((f - want).abs() < 0.1, "{f} vs exact {want}");
    assert!(
        (f - want).abs() < 4.0 * err + 0.02,
        "{f} ± {err} vs exact {want}"
    );
}

/// Exact basin free energies of Müller–Brown at `kt` by quadrature (F_s − F_A in kT, in
/// the order of `MULLER_BROWN_MINIMA`); see the library function for the method.
fn muller_brown_basin_free_energies(kt: f64, h: f64) -> [f64; 3] {
    tarn::physics::models::muller_brown::basin_free_energies(kt, h).unwrap()
}

#[test]
fn flow_reweighted_muller_brown_basin_free_energies_match_quadrature() {
    let exact = muller_brown_basin_free_energies(10.0, 0.005);
    let coarse = muller_brown_basin_free_energies(10.0, 0.01);
    eprintln!("Müller–Brown basins at kT = 10 by quadrature: h=0.005 {exact:?}, h=0.01 {coarse:?}");
    for (a, b) in exact.iter().zip(coarse) {
        assert!(
            (a - b).abs() < 0.01,
            "quadrature not converged: {exact:?} vs {coarse:?}"
        );
    }
    let env = Env::new();
    run_workflow(&env, "muller-brown-flow.toml");
    let states = env.json(&["states", "ridge-flow"]);
    let rounds = env.json(&["rounds", "ridge-flow"]);
    let stop = rounds.as_array().unwrap().last().unwrap()["stop"]
        .as_str()
        .unwrap()
        .to_string();
    assert!(
        stop.contains("free energies of 3 states moved at most"),
        "it should stop on stability: {stop}"
    );
    for s in states.as_array().unwrap() {
        let energy = s["energy"].as_f64().unwrap();
        let b = MULLER_BROWN_MINIMA
            .iter()
            .position(|m| (energy - m).abs() < 1e-3)
            .unwrap();
        let f = s["free_energy"].as_f64().unwrap();
        let err = s["free_energy_err"].as_f64().unwrap();
        eprintln!(
            "basin {b}: {f:.3} ± {err:.3} kT, quadrature {:.3}",
            exact[b]
        );
        assert!(
            (f - exact[b]).abs() < 3.0 * err + 0.05,
            "basin {b}: {f} ± {err} vs {}",
            exact[b]
        );
        // The estimate pooled over the rounds (inverse-variance mean, Birge-scaled error)
        // must agree too.
        let pf = s["pooled_free_energy"].as_f64().unwrap();
        let pe = s["pooled_free_energy_err"].as_f64().unwrap();
        let n = s["pooled_rounds"].as_u64().unwrap();
        eprintln!("basin {b}: pooled over {n} rounds {pf:.3} ± {pe:.3} kT");
        assert!(
            (pf - exact[b]).abs() < 3.0 * pe + 0.05,
            "basin {b}: pooled {pf} ± {pe} vs {}",
            exact[b]
        );
        if b > 0 {
            assert!(n >= 2, "basin {b}: only {n} rounds pooled");
        }
    }
}

#[test]
fn the_relaxed_latent_path_from_a_to_c_finds_the_published_saddle() {
    let env = Env::new();
    run_workflow(&env, "muller-brown-flow.toml");
    let states = env.json(&["states", "ridge-flow"]);
    let id_of = |e: f64| {
        states
            .as_array()
            .unwrap()
            .iter()
            .find(|s| (s["energy"].as_f64().unwrap() - e).abs() < 1e-3)
            .unwrap()["id"]
            .as_u64()
            .unwrap()
            .to_string()
    };
    let (a, c) = (id_of(MULLER_BROWN_MINIMA[0]), id_of(MULLER_BROWN_MINIMA[2]));
    let p = env.json(&[
        "path",
        "ridge-flow",
        "--from",
        &a,
        "--to",
        &c,
        "--images",
        "16",
        "--relax",
    ]);
    let saddle = p["saddle_energy"].as_f64().unwrap();
    let latent = p["highest"].as_f64().unwrap();
    // The A–C saddle of Müller–Brown: E = −40.664844 at (−0.822002, 0.624313)
    // (Müller & Brown 1979; recomputed, REFERENCES.md P + R).
    eprintln!("A→C: highest point of the flow's path {latent:.4}, relaxed saddle {saddle:.6}");
    assert!(
        ((saddle + 40.664844) / 40.664844).abs() < 0.01,
        "saddle {saddle}"
    );
    assert_eq!(p["relax_converged"], true);
}
