//! The lattice Boltzmann generator against an independent sampler: the shipped
//! `workflows/phi4-flow.toml` (8×8 φ⁴, m² = −4, λ = 8) must reach a Kish effective
//! sample size of at least 20 % of its draws in its last round, and its reweighted
//! ⟨|M|⟩/V, ⟨M²⟩/V and ⟨φ²⟩ must agree within three combined standard errors with the
//! HMC reference of `tests/reference/phi4_hmc.py` (leapfrog HMC with exact Metropolis
//! acceptance, errors from Sokal's automatic-window integrated autocorrelation time;
//! its output is committed as `tests/reference/phi4_8x8_m2-4_l8.json`), whose errors
//! must be at most a third of tarn's so that the comparison tests tarn.

mod common;

use common::{repo, Env};

#[test]
fn phi4_flow_reaches_its_ess_and_matches_the_hmc_reference() {
    let env = Env::new();
    let path = repo().join("workflows/phi4-flow.toml");
    env.tarn(&["run", path.to_str().unwrap(), "--quiet"])
        .code(0);
    let rounds = env.json(&["rounds", "lattice-glass"]);
    let last = rounds.as_array().unwrap().last().unwrap();
    let eval = last["stages"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["name"] == "evaluate")
        .expect("an evaluate stage");
    let m = &eval["metrics"];
    let ess_fraction = m["ess_fraction"].as_f64().unwrap();
    eprintln!("last round: {m}");
    assert!(
        ess_fraction >= 0.20,
        "Kish ESS fraction {ess_fraction} < 0.20"
    );
    let reference: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(repo().join("tests/reference/phi4_8x8_m2-4_l8.json")).unwrap(),
    )
    .unwrap();
    let stats = &reference["hmc"]["statistics"];
    for (ours, theirs) in [
        ("abs_m", "abs_M_over_V"),
        ("m2_v", "M2_over_V"),
        ("phi2", "phi2"),
    ] {
        let (t, te) = (
            m[format!("mean_{ours}")].as_f64().unwrap(),
            m[format!("mean_{ours}_err")].as_f64().unwrap(),
        );
        let (r, re) = (
            stats[theirs]["mean"].as_f64().unwrap(),
            stats[theirs]["stderr"].as_f64().unwrap(),
        );
        let combined = (te * te + re * re).sqrt();
        eprintln!(
            "{ours}: tarn {t:.5} ± {te:.5}, HMC {r:.5} ± {re:.5}, z = {:.2}",
            (t - r) / combined
        );
        assert!(
            re <= te / 3.0,
            "{ours}: the reference's error {re} is not a third of tarn's {te}"
        );
        assert!(
            (t - r).abs() <= 3.0 * combined,
            "{ours}: tarn {t} ± {te} vs HMC {r} ± {re}"
        );
    }
}
