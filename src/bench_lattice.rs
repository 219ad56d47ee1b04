//! `tarn bench lattice`: what the lattice Boltzmann generator buys against a classical
//! sampler on 8×8 φ⁴ (m² = −4, λ = 8): effective samples per CPU-second of the flow that
//! `workflows/phi4-flow.toml` trains (Kish ESS fraction × samples per CPU-second of
//! generation with energies), against independent samples per CPU-second of HMC
//! (trajectories per CPU-second ÷ 2τ_int of |M|), side by side in one run. The flow's
//! architecture and training settings are read from the shipped workflow, so the
//! benchmark follows it.
//!
//! Owns: this measurement. Must not touch: stores.

use anyhow::Context;
use serde::Serialize;

use crate::flow::stack::{sample::generate, train::train, StackFlow, StackSpec};
use crate::flow::TrainParams;
use crate::physics::explore::{hmc, HmcParams};
use crate::physics::models::Phi4;
use crate::stats::{integrated_autocorrelation, kish_ess};

const WORKFLOW: &str = include_str!("../workflows/phi4-flow.toml");

/// CPU time of the whole process (every thread), in seconds.
fn process_cpu_seconds() -> f64 {
    use nix::sys::resource::{getrusage, UsageWho};
    getrusage(UsageWho::RUSAGE_SELF)
        .map(|u| {
            let t = u.user_time() + u.system_time();
            t.tv_sec() as f64 + t.tv_usec() as f64 * 1e-6
        })
        .unwrap_or(0.0)
}

#[derive(Debug, Serialize)]
struct Row {
    bench: &'static str,
    sampler: &'static str,
    cpu_seconds_setup: f64,
    samples_per_cpu_s: f64,
    ess_fraction_or_inverse_2tau: f64,
    effective_per_cpu_s: f64,
    detail: String,
}

/// The workflow's flow spec, training settings and round count.
fn workflow_settings() -> anyhow::Result<(StackSpec, TrainParams, usize)> {
    let doc: toml::Value = toml::from_str(WORKFLOW).context("workflows/phi4-flow.toml")?;
    let retrain = &doc["retrain"]["params"];
    let mut flow = retrain["flow"].clone();
    let t = flow.as_table_mut().context("retrain.params.flow")?;
    t.insert("data_dim".into(), toml::Value::Integer(64));
    t.insert("lattice_side".into(), toml::Value::Integer(8));
    let spec: StackSpec = flow.try_into().context("retrain.params.flow")?;
    let mut train = retrain["train"].clone();
    let t = train.as_table_mut().context("retrain.params.train")?;
    t.insert("kt".into(), toml::Value::Float(1.0));
    t.insert("threads".into(), toml::Value::Integer(2));
    let tp: TrainParams = train.try_into().context("retrain.params.train")?;
    let rounds = doc["stop"]["max_rounds"].as_integer().unwrap_or(1) as usize;
    Ok((spec, tp, rounds))
}

/// Runs the comparison and prints one row per sampler and a ratio row.
pub fn run(json: bool) -> anyhow::Result<u8> {
    let model = Phi4::new(8, -4.0, 8.0)?;
    let (spec, tp, rounds) = workflow_settings()?;
    let t0 = process_cpu_seconds();
    let mut flow = StackFlow::<f32>::new(spec, 17)?;
    for r in 0..rounds {
        train(&mut flow, &[], None, Some(&model), &tp, 100 + r as u64)?;
    }
    let train_cpu = process_cpu_seconds() - t0;
    let n = 32768;
    let t1 = process_cpu_seconds();
    let g = generate(&flow, &model, n, 1.0, 1.0, 1, 5)?;
    let gen_cpu = process_cpu_seconds() - t1;
    let ess = kish_ess(&g.log_weight)? / n as f64;
    let flow_rate = n as f64 / gen_cpu;
    let flow_row = Row {
        bench: "lattice",
        sampler: "flow (workflows/phi4-flow.toml)",
        cpu_seconds_setup: train_cpu,
        samples_per_cpu_s: flow_rate,
        ess_fraction_or_inverse_2tau: ess,
        effective_per_cpu_s: flow_rate * ess,
        detail: format!("{n} draws on 1 thread, energies included; trained on 2 threads"),
    };
    let params = HmcParams {
        n_trajectories: 40_000,
        n_leapfrog: 8,
        step_size: 0.1258,
    };
    let mut rng = {
        use rand::SeedableRng;
        rand_chacha::ChaCha8Rng::seed_from_u64(9)
    };
    let t2 = process_cpu_seconds();
    let run = hmc(&model, &[0.0; 64], 1.0, &params, &mut rng)?;
    let hmc_cpu = process_cpu_seconds() - t2;
    let abs_m: Vec<f64> = run
        .states
        .chunks(64)
        .skip(1000)
        .map(|x| x.iter().sum::<f64>().abs() / 64.0)
        .collect();
    let ac = integrated_autocorrelation(&abs_m, 6.0)?;
    let hmc_rate = params.n_trajectories as f64 / hmc_cpu;
    let hmc_row = Row {
        bench: "lattice",
        sampler: "HMC (8 leapfrog steps of 0.1258)",
        cpu_seconds_setup: 0.0,
        samples_per_cpu_s: hmc_rate,
        ess_fraction_or_inverse_2tau: 1.0 / (2.0 * ac.tau_int),
        effective_per_cpu_s: hmc_rate / (2.0 * ac.tau_int),
        detail: format!(
            "acceptance {:.3}, tau_int(|M|) = {:.2} ± {:.2} trajectories",
            run.acceptance, ac.tau_int, ac.tau_err
        ),
    };
    let ratio = flow_row.effective_per_cpu_s / hmc_row.effective_per_cpu_s;
    crate::bench::print_rows(json, &[flow_row, hmc_row])?;
    let summary =
        serde_json::json!({"bench": "lattice", "flow_over_hmc_effective_per_cpu_s": ratio});
    crate::bench::print_rows(json, &[summary])?;
    Ok(0)
}
