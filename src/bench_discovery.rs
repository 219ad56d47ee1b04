//! `tarn bench discovery`: what the adaptive loop buys, in energy evaluations to the
//! answer, against plain configuration-space sampling at the target temperature.
//!
//! For each built-in system and seed it runs (a) tarn's campaign from the system's
//! workflow, in this process, into a temporary store, and (b) the baseline samplers
//! (configuration-space Metropolis and BAOAB Langevin, both from `tarn-physics`) from the
//! same start and with the same seed, interleaved seed by seed. For every run it records
//! the energy evaluations (and CPU seconds) needed to (1) find every known state and (2)
//! bring every state's free energy within [`TOLERANCE_KT`] of the exact value and keep
//! it there to the end of the run.
//!
//! tarn's free energies are the ones `tarn states` reports: each round's estimates pooled
//! over the rounds so far (inverse-variance mean). The baselines' are the state
//! populations of their frames so far, F_s = −ln(n_s/n_0).
//!
//! Accounting, stated so that the comparison can be checked:
//! - tarn is charged every energy evaluation its workers report: explore, the quenches
//!   of deduplication and of evaluation, the reverse-KL term of training, generation.
//! - The baselines are charged only their sampling steps. Their frames are assigned to
//!   states by quench too, but those quenches are not charged (in the baseline's favour).
//! - Baseline tuning is fixed per system and printed: the Metropolis step is set once by
//!   a pilot chain (not charged) to an acceptance near 0.4, common practice for a
//!   low-dimensional random walk; the Langevin step and friction are the workflow's own.
//!   Baselines run in chunks of one checkpoint each; a Langevin chunk starts with fresh
//!   Maxwell–Boltzmann momenta (a velocity refresh, which keeps the distribution exact).
//!
//! Owns: the benchmark harness and its output. Must not touch: stores other than the
//! temporary ones it creates.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::physics::explore::langevin::{langevin_baoab, LangevinParams};
use crate::physics::explore::metropolis::{metropolis, MetropolisParams};
use crate::physics::models::{muller_brown, SystemSpec};
use crate::physics::quench::{quench_batch, FireParams};
use crate::physics::EnergyModel;
use crate::spec::Campaign;
use crate::store::Store;

/// A free energy counts as converged within this many kT of the exact value.
pub const TOLERANCE_KT: f64 = 0.2;

/// Energies of the four lowest minima of the 2-D LJ7 cluster (Dellago, Bolhuis &
/// Chandler, J. Chem. Phys. 108, 9236, 1998; recomputed here to six decimals).
const LJ7_2D_MINIMA: [f64; 4] = [-12.534867, -11.501291, -11.476907, -11.403419];

/// What the benchmark is asked to do.
pub struct Options {
    /// One system by name, or all of them.
    pub system: Option<String>,
    pub seeds: u32,
    pub json: bool,
    /// Directory for the cost-curve SVGs (one per system), if any.
    pub plots: Option<PathBuf>,
    /// Multiplies every baseline budget (for a quick look, e.g. 0.1).
    pub budget_scale: f64,
}

/// A system of the benchmark and its fixed settings.
struct Case {
    name: &'static str,
    workflow: &'static str,
    /// Rounds tarn runs (a fixed number, so that "keeps it there" can be checked).
    rounds: u32,
    /// Extra TOML appended to the workflow (e.g. an evaluate stage).
    extra: &'static str,
    n_states: usize,
    /// Energy evaluations each baseline may spend.
    budget: u64,
    /// Baseline evaluations between two points of its cost curve.
    checkpoint: u64,
    /// Baseline steps between two frames that are assigned to states.
    label_stride: u64,
    langevin_dt: f64,
    langevin_friction: f64,
}

fn cases() -> Vec<Case> {
    vec![
        Case {
            name: "muller-brown",
            workflow: include_str!("../workflows/muller-brown-flow.toml"),
            rounds: 6,
            extra: "",
            n_states: 3,
            budget: 200_000_000,
            checkpoint: 2_000_000,
            label_stride: 200,
            langevin_dt: 0.002,
            langevin_friction: 5.0,
        },
        Case {
            name: "lj7-surface",
            workflow: include_str!("../workflows/lj7-surface-flow.toml"),
            rounds: 5,
            extra: "",
            n_states: 4,
            budget: 100_000_000,
            checkpoint: 1_000_000,
            label_stride: 500,
            langevin_dt: 0.005,
            langevin_friction: 1.0,
        },
        Case {
            name: "phi4-lattice",
            workflow: include_str!("../workflows/phi4-lattice.toml"),
            rounds: 5,
            extra: "\n[evaluate]\nkind = \"reweight-bias\"\n",
            n_states: 2,
            budget: 20_000_000,
            checkpoint: 200_000,
            label_stride: 100,
            langevin_dt: 0.01,
            langevin_friction: 1.0,
        },
    ]
}

/// The known state a minimum belongs to, by system: Müller–Brown and LJ7 by the
/// minimum's energy, φ⁴ by the sign of the quenched field's magnetisation.
fn label(case: &Case, minimum: &[f64], energy: f64) -> Option<usize> {
    match case.name {
        "muller-brown" => muller_brown::basin_of_energy(energy, 1e-3),
        "lj7-surface" => LJ7_2D_MINIMA.iter().position(|m| (energy - m).abs() < 5e-3),
        _ => {
            let m = minimum.iter().sum::<f64>() / minimum.len() as f64;
            if m > 0.5 {
                Some(0)
            } else if m < -0.5 {
                Some(1)
            } else {
                None
            }
        }
    }
}

/// Exact free energies F_s − F_0 (kT) of the known states, where the benchmark has them:
/// quadrature for Müller–Brown, the ± symmetry of φ⁴ (ΔF = 0 exactly). None for LJ7
/// (a 14-dimensional integral; only discovery is measured there).
fn exact_free_energies(case: &Case, kt: f64) -> anyhow::Result<Option<Vec<f64>>> {
    Ok(match case.name {
        "muller-brown" => Some(muller_brown::basin_free_energies(kt, 0.005)?.to_vec()),
        "phi4-lattice" => Some(vec![0.0, 0.0]),
        _ => None,
    })
}

/// One run's answer.
#[derive(Debug, Clone, Serialize)]
struct RunRow {
    bench: &'static str,
    system: &'static str,
    method: String,
    seed: u64,
    /// Energy evaluations until every known state had been seen (None: never).
    evals_to_all_states: Option<u64>,
    cpu_s_to_all_states: Option<f64>,
    /// Energy evaluations until every free energy was within tolerance for good.
    evals_to_free_energies: Option<u64>,
    cpu_s_to_free_energies: Option<f64>,
    final_error_kt: Option<f64>,
    states_found: usize,
    evals_spent: u64,
    /// tarn only: the pooled free-energy error after each round (kT; null while a state
    /// has no estimate).
    #[serde(skip_serializing_if = "Vec::is_empty")]
    error_by_round: Vec<Option<f64>>,
    #[serde(skip)]
    curve: Vec<(u64, f64)>,
}

/// Runs the benchmark and prints a row per run and a summary per system and method.
pub fn run(opts: &Options) -> anyhow::Result<u8> {
    let all = cases();
    let chosen: Vec<&Case> = match &opts.system {
        None => all.iter().collect(),
        Some(n) => match all.iter().find(|c| c.name == n) {
            Some(c) => vec![c],
            None => bail!(
                "no system '{n}' in the discovery benchmark (choose: {})",
                all.iter().map(|c| c.name).collect::<Vec<_>>().join(", ")
            ),
        },
    };
    if opts.seeds == 0 {
        bail!("--seeds must be at least 1");
    }
    for case in chosen {
        run_case(case, opts)?;
    }
    Ok(0)
}

fn run_case(case: &Case, opts: &Options) -> anyhow::Result<()> {
    let tmp = tempdir(case.name)?;
    let base = write_campaign(case, &tmp, 0)?;
    let campaign = Campaign::load(&base).map_err(|e| anyhow::anyhow!("{e}"))?;
    let spec: SystemSpec = serde_json::from_value(campaign.system.table.clone())?;
    let model = spec.build()?;
    let start = campaign.start.data[..campaign.start.shape[1]].to_vec();
    let exact = exact_free_energies(case, campaign.kt)?;
    let step = tune_metropolis_step(model.as_ref(), &start, campaign.kt)?;
    let budget = ((case.budget as f64) * opts.budget_scale).max(case.checkpoint as f64) as u64;
    let settings = serde_json::json!({
        "bench": "discovery-settings", "system": case.name, "kT": campaign.kt,
        "tarn_rounds": case.rounds, "baseline_budget": budget,
        "metropolis_step": step, "langevin_dt": case.langevin_dt,
        "langevin_friction": case.langevin_friction, "tolerance_kt": TOLERANCE_KT,
        "exact_free_energies": exact,
    });
    crate::bench::print_rows(opts.json, &[settings])?;
    let mut rows: Vec<RunRow> = Vec::new();
    for s in 0..opts.seeds {
        let seed = campaign.seed + s as u64;
        let row = run_tarn(case, &tmp, seed, exact.as_deref())?;
        crate::bench::print_rows(opts.json, std::slice::from_ref(&row))?;
        rows.push(row);
        for method in ["metropolis", "langevin"] {
            let b = Baseline {
                case,
                model: model.as_ref(),
                start: &start,
                kt: campaign.kt,
                exact: exact.as_deref(),
                budget,
                step,
            };
            let row = b.run(method, seed)?;
            crate::bench::print_rows(opts.json, std::slice::from_ref(&row))?;
            rows.push(row);
        }
    }
    let summary = summarise(case, &rows, budget);
    crate::bench::print_rows(opts.json, &summary)?;
    if opts.plots.is_some() && exact.is_none() {
        eprintln!(
            "{}: no exact free energies, so no cost curve to draw (discovery only)",
            case.name
        );
    } else if let Some(dir) = &opts.plots {
        std::fs::create_dir_all(dir).with_context(|| format!("{}", dir.display()))?;
        let file = dir.join(format!("discovery-{}.svg", case.name));
        plot_curves(case, &rows, &file)?;
        eprintln!("cost curves written to {}", file.display());
    }
    let _ = std::fs::remove_dir_all(&tmp);
    Ok(())
}

fn tempdir(name: &str) -> anyhow::Result<PathBuf> {
    let dir = std::env::temp_dir().join(format!(
        "tarn-bench-discovery-{name}-{}",
        std::process::id()
    ));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir)?;
    Ok(dir)
}

/// The workflow with its seed set, its stop rules replaced by a fixed number of rounds,
/// and the case's extra stages; written to `dir/seed-N.toml`.
fn write_campaign(case: &Case, dir: &Path, seed: u64) -> anyhow::Result<PathBuf> {
    let text = format!("{}{}", case.workflow, case.extra);
    let mut doc: toml_edit::DocumentMut = text.parse().context("workflow")?;
    if seed != 0 {
        doc["seed"] = toml_edit::value(seed as i64);
    }
    doc["name"] = toml_edit::value(format!("bench-{}-{seed}", case.name));
    let mut stop = toml_edit::Table::new();
    stop["max_rounds"] = toml_edit::value(case.rounds as i64);
    doc["stop"] = toml_edit::Item::Table(stop);
    let file = dir.join(format!("seed-{seed}.toml"));
    std::fs::write(&file, doc.to_string())?;
    Ok(file)
}

/// Runs tarn's own loop for one seed and reads its answer back from the store.
fn run_tarn(case: &Case, dir: &Path, seed: u64, exact: Option<&[f64]>) -> anyhow::Result<RunRow> {
    let file = write_campaign(case, dir, seed)?;
    let state = dir.join(format!("state-{seed}"));
    crate::bench_engine::run_in_process(&state, &file, false)?;
    let campaign = Campaign::load(&file).map_err(|e| anyhow::anyhow!("{e}"))?;
    let store = Store::open(&crate::engine::campaign_dir(
        &state.join("state"),
        &campaign.name,
    ))?;
    let rounds = store.rounds()?;
    let states = store.states()?;
    let mut found: Vec<Option<u64>> = vec![None; case.n_states];
    let mut found_round: Vec<u32> = vec![0; case.n_states];
    for s in &states {
        if let Some(l) = label(case, &s.representative, s.energy) {
            let c = s.found.cost_to_find;
            if found[l].is_none_or(|f| c < f) {
                found[l] = Some(c);
                found_round[l] = s.found.round;
            }
        }
    }
    let cpu_to = |round: u32| -> f64 {
        rounds
            .iter()
            .filter(|r| r.round <= round)
            .map(|r| r.cpu_seconds)
            .sum()
    };
    let all_found = found.iter().all(|f| f.is_some());
    let evals_to_all = all_found.then(|| found.iter().flatten().copied().max().unwrap_or(0));
    let cpu_to_all = all_found.then(|| cpu_to(*found_round.iter().max().unwrap_or(&0)));
    let mut curve = Vec::new();
    if let Some(exact) = exact {
        for r in &rounds {
            let f = pooled_by_label(case, &states, r.round);
            curve.push((r.cumulative_energy_evals, error_of(&f, exact)));
        }
    }
    let conv = converged_at(&curve);
    let conv_round = conv.map(|i| rounds[i].round);
    Ok(RunRow {
        bench: "discovery",
        system: case.name,
        method: "tarn".into(),
        seed,
        evals_to_all_states: evals_to_all,
        cpu_s_to_all_states: cpu_to_all,
        evals_to_free_energies: conv.map(|i| curve[i].0),
        cpu_s_to_free_energies: conv_round.map(cpu_to),
        final_error_kt: curve.last().map(|c| c.1).filter(|e| e.is_finite()),
        states_found: found.iter().flatten().count(),
        evals_spent: rounds
            .last()
            .map(|r| r.cumulative_energy_evals)
            .unwrap_or(0),
        error_by_round: curve
            .iter()
            .map(|c| c.1.is_finite().then(|| (c.1 * 1000.0).round() / 1000.0))
            .collect(),
        curve,
    })
}

/// tarn's answer after `round`: each known state's free energy pooled over the rounds
/// so far, exactly as `tarn states` reports it (the first catalogue state of a label).
fn pooled_by_label(
    case: &Case,
    states: &[crate::store::StateRecord],
    round: u32,
) -> Vec<Option<f64>> {
    let upto: Vec<crate::store::StateRecord> = states
        .iter()
        .map(|s| {
            let mut s = s.clone();
            s.estimates.retain(|e| e.round <= round);
            s
        })
        .collect();
    let pooled = crate::report::pooled_free_energies(&upto);
    let mut out = vec![None; case.n_states];
    for (s, p) in upto.iter().zip(pooled) {
        if let (Some(l), Some(p)) = (label(case, &s.representative, s.energy), p) {
            out[l].get_or_insert(p.value);
        }
    }
    out
}

/// The largest |(F_s − F_0) − exact_s| over the states; infinite when a state has no
/// estimate.
fn error_of(f: &[Option<f64>], exact: &[f64]) -> f64 {
    let Some(f0) = f[0] else {
        return f64::INFINITY;
    };
    f.iter()
        .zip(exact)
        .map(|(fs, ex)| fs.map_or(f64::INFINITY, |v| (v - f0 - ex).abs()))
        .fold(0.0, f64::max)
}

/// The first point of a cost curve from which every later point is within tolerance,
/// provided at least one later point confirms it ("and keeps it there").
fn converged_at(curve: &[(u64, f64)]) -> Option<usize> {
    let mut first = None;
    for (i, (_, e)) in curve.iter().enumerate() {
        if *e <= TOLERANCE_KT {
            first.get_or_insert(i);
        } else {
            first = None;
        }
    }
    first.filter(|&i| i + 1 < curve.len())
}

/// Sets the Metropolis step once per system by a pilot chain from the start, aiming at
/// an acceptance near 0.4. The pilot's evaluations are not charged to the baseline.
fn tune_metropolis_step(model: &dyn EnergyModel, start: &[f64], kt: f64) -> anyhow::Result<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(0x7475_6e65);
    let mut step = 0.05;
    for _ in 0..12 {
        let p = MetropolisParams {
            n_steps: 4000,
            step_size: step,
            save_stride: 4000,
            temperature_factor: 1.0,
        };
        let run = metropolis(model, start, kt, &p, &mut rng)?;
        step *= (run.acceptance / 0.4).clamp(0.5, 2.0);
    }
    Ok(step)
}

/// A baseline sampler run at the campaign's temperature.
struct Baseline<'a> {
    case: &'a Case,
    model: &'a dyn EnergyModel,
    start: &'a [f64],
    kt: f64,
    exact: Option<&'a [f64]>,
    budget: u64,
    step: f64,
}

impl Baseline<'_> {
    fn run(&self, method: &str, seed: u64) -> anyhow::Result<RunRow> {
        let case = self.case;
        let salt = if method == "metropolis" {
            0x6d65
        } else {
            0x6c61
        };
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ salt);
        let mut x = self.start.to_vec();
        let mut counts = vec![0u64; case.n_states];
        let mut found: Vec<Option<(u64, f64)>> = vec![None; case.n_states];
        let mut evals = 0u64;
        let mut cpu = 0.0f64;
        let mut curve = Vec::new();
        let mut cpu_at = Vec::new();
        let fire = FireParams::default();
        while evals < self.budget {
            let t0 = thread_cpu_seconds();
            let traj = match method {
                "metropolis" => {
                    let p = MetropolisParams {
                        n_steps: case.checkpoint,
                        step_size: self.step,
                        save_stride: case.label_stride,
                        temperature_factor: 1.0,
                    };
                    metropolis(self.model, &x, self.kt, &p, &mut rng)?.trajectory
                }
                _ => {
                    let p = LangevinParams {
                        n_steps: case.checkpoint,
                        dt: case.langevin_dt,
                        friction: case.langevin_friction,
                        save_stride: case.label_stride,
                        temperature_factor: 1.0,
                    };
                    langevin_baoab(self.model, &x, self.kt, &p, &mut rng)?.trajectory
                }
            };
            cpu += thread_cpu_seconds() - t0;
            let q = quench_batch(self.model, &traj.frames, &fire)?;
            for i in 0..traj.n_frames() {
                if let Some(l) = label(case, q.minimum(i), q.energies[i]) {
                    counts[l] += 1;
                    if found[l].is_none() {
                        let at = evals + (i as u64 + 1) * case.label_stride;
                        found[l] = Some((at, cpu));
                    }
                }
            }
            evals += traj.n_evals;
            x = traj.final_config;
            if let Some(exact) = self.exact {
                let f: Vec<Option<f64>> = counts
                    .iter()
                    .map(|&n| (n > 0).then(|| -(n as f64).ln()))
                    .collect();
                curve.push((evals, error_of(&f, exact)));
                cpu_at.push(cpu);
            }
        }
        let all = found.iter().all(|f| f.is_some());
        let conv = converged_at(&curve);
        Ok(RunRow {
            bench: "discovery",
            system: case.name,
            method: method.into(),
            seed,
            evals_to_all_states: all
                .then(|| found.iter().flatten().map(|f| f.0).max().unwrap_or(0)),
            cpu_s_to_all_states: all
                .then(|| found.iter().flatten().map(|f| f.1).fold(0.0, f64::max)),
            evals_to_free_energies: conv.map(|i| curve[i].0),
            cpu_s_to_free_energies: conv.map(|i| cpu_at[i]),
            final_error_kt: curve.last().map(|c| c.1).filter(|e| e.is_finite()),
            states_found: found.iter().flatten().count(),
            evals_spent: evals,
            error_by_round: Vec::new(),
            curve,
        })
    }
}

/// CPU time of the calling thread, in seconds.
fn thread_cpu_seconds() -> f64 {
    use nix::sys::resource::{getrusage, UsageWho};
    getrusage(UsageWho::RUSAGE_THREAD)
        .map(|u| {
            let t = u.user_time() + u.system_time();
            t.tv_sec() as f64 + t.tv_usec() as f64 * 1e-6
        })
        .unwrap_or(0.0)
}

/// Median and spread of one figure over seeds; a run that never got there counts as
/// infinitely expensive, so the median is honest about failures.
#[derive(Debug, Serialize)]
struct Spread {
    median: Option<f64>,
    min: Option<f64>,
    max: Option<f64>,
    reached: usize,
    never: usize,
}

fn spread(values: &[Option<f64>]) -> Spread {
    let mut v: Vec<f64> = values.iter().map(|x| x.unwrap_or(f64::INFINITY)).collect();
    v.sort_by(f64::total_cmp);
    let n = v.len();
    let median = if n == 0 {
        f64::NAN
    } else if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    };
    let finite = |x: f64| x.is_finite().then_some(x);
    let reached = values.iter().flatten().count();
    Spread {
        median: finite(median),
        min: v.first().copied().and_then(finite),
        max: values.iter().flatten().copied().reduce(f64::max),
        reached,
        never: n - reached,
    }
}

/// Reads one figure of a run.
type Figure = fn(&RunRow) -> Option<f64>;

/// Per method: medians and spreads over seeds, and the ratio of each baseline's median
/// to tarn's. Where a baseline's median run never got there, the ratio is a lower bound
/// (its budget over tarn's median), marked as such.
fn summarise(case: &Case, rows: &[RunRow], budget: u64) -> Vec<serde_json::Value> {
    let of = |m: &str, f: Figure| -> Spread {
        let v: Vec<Option<f64>> = rows.iter().filter(|r| r.method == m).map(f).collect();
        spread(&v)
    };
    let goals: [(&str, Figure); 4] = [
        ("evals_to_all_states", |r| {
            r.evals_to_all_states.map(|v| v as f64)
        }),
        ("cpu_s_to_all_states", |r| r.cpu_s_to_all_states),
        ("evals_to_free_energies", |r| {
            r.evals_to_free_energies.map(|v| v as f64)
        }),
        ("cpu_s_to_free_energies", |r| r.cpu_s_to_free_energies),
    ];
    let mut out = Vec::new();
    for method in ["tarn", "metropolis", "langevin"] {
        let mut row = serde_json::json!({"bench": "discovery-summary", "system": case.name, "method": method});
        for (name, f) in goals {
            let s = of(method, f);
            if method != "tarn" && name.starts_with("evals") {
                let t = of("tarn", f);
                let (ratio, bound) = match (s.median, t.median) {
                    (Some(b), Some(t)) => (Some(b / t), false),
                    (None, Some(t)) if s.never > 0 => (Some(budget as f64 / t), true),
                    _ => (None, false),
                };
                row[format!("ratio_{name}")] =
                    serde_json::json!(ratio.map(|r| (r * 10.0).round() / 10.0));
                row[format!("ratio_{name}_is_lower_bound")] = serde_json::json!(bound);
            }
            row[name] = serde_json::to_value(&s).expect("serializable");
        }
        out.push(row);
    }
    out
}

/// The cost curves of one system: free-energy error against cumulative energy
/// evaluations, one line per run, coloured by method, with the tolerance marked.
fn plot_curves(case: &Case, rows: &[RunRow], file: &Path) -> anyhow::Result<()> {
    use plotters::prelude::*;
    let cap = 5.0;
    let lines: Vec<(&str, Vec<(f64, f64)>)> = rows
        .iter()
        .filter(|r| !r.curve.is_empty())
        .map(|r| {
            let pts = r
                .curve
                .iter()
                .map(|&(n, e)| ((n.max(1) as f64).log10(), e.min(cap)))
                .collect();
            (r.method.as_str(), pts)
        })
        .collect();
    if lines.is_empty() {
        bail!(
            "{}: no exact free energies, so no cost curve to draw",
            case.name
        );
    }
    let xmax = lines
        .iter()
        .flat_map(|(_, p)| p.iter().map(|q| q.0))
        .fold(0.0, f64::max)
        .ceil();
    let xmin = lines
        .iter()
        .flat_map(|(_, p)| p.iter().map(|q| q.0))
        .fold(f64::INFINITY, f64::min)
        .floor();
    let root = SVGBackend::new(file, (760, 460)).into_drawing_area();
    root.fill(&WHITE)?;
    let mut chart = ChartBuilder::on(&root)
        .caption(
            format!("{}: free-energy error against cost", case.name),
            ("sans-serif", 18),
        )
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(56)
        .build_cartesian_2d(xmin..xmax, 0.0..cap)?;
    chart
        .configure_mesh()
        .x_desc("log10 energy evaluations")
        .y_desc("max |F - F exact| [kT] (capped)")
        .draw()?;
    let colour = |m: &str| match m {
        "tarn" => RGBColor(20, 110, 160),
        "metropolis" => RGBColor(200, 120, 30),
        _ => RGBColor(90, 150, 60),
    };
    let mut labelled = std::collections::BTreeSet::new();
    for (method, pts) in &lines {
        let c = colour(method);
        let series = chart.draw_series(LineSeries::new(pts.clone(), c.stroke_width(2)))?;
        if labelled.insert(*method) {
            series.label(*method).legend(move |(x, y)| {
                PathElement::new(vec![(x, y), (x + 18, y)], c.stroke_width(2))
            });
        }
    }
    chart.draw_series(LineSeries::new(
        vec![(xmin, TOLERANCE_KT), (xmax, TOLERANCE_KT)],
        BLACK.mix(0.5),
    ))?;
    chart
        .configure_series_labels()
        .background_style(WHITE.mix(0.8))
        .border_style(BLACK.mix(0.3))
        .draw()?;
    root.present()?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn converged_needs_a_confirming_later_point_and_resets_on_a_relapse() {
        let c = |e: &[f64]| -> Vec<(u64, f64)> {
            e.iter()
                .enumerate()
                .map(|(i, &v)| (i as u64 * 10, v))
                .collect()
        };
        assert_eq!(converged_at(&c(&[1.0, 0.1, 0.1])), Some(1));
        assert_eq!(converged_at(&c(&[1.0, 0.1, 0.5, 0.1, 0.1])), Some(3));
        assert_eq!(converged_at(&c(&[1.0, 1.0, 0.1])), None);
        assert_eq!(converged_at(&c(&[])), None);
    }

    #[test]
    fn the_error_is_infinite_until_every_state_has_an_estimate() {
        let exact = [0.0, 1.0, 2.0];
        assert!(error_of(&[Some(0.5), None, Some(2.5)], &exact).is_infinite());
        let e = error_of(&[Some(0.5), Some(1.6), Some(2.4)], &exact);
        assert!((e - 0.1).abs() < 1e-12, "{e}");
    }

    #[test]
    fn the_median_counts_failed_runs_as_infinitely_expensive() {
        let s = spread(&[Some(1.0), None, None]);
        assert_eq!(s.median, None);
        assert_eq!((s.reached, s.never), (1, 2));
        let s = spread(&[Some(3.0), Some(1.0), None]);
        assert_eq!(s.median, Some(3.0));
        assert_eq!(s.max, Some(3.0));
    }
}
