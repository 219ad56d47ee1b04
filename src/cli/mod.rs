//! The command line: argument parsing, exit codes, and the wiring of each command to
//! the modules that do the work.
//!
//! Owns: option names, help texts, exit codes, what is printed on stdout.
//! Must not touch: the store's layout or the engine's control flow (it calls them).
//!
//! Exit codes: 0 success; 1 campaign error (a worker failed past its retries, a stop
//! rule could not be evaluated); 2 bad input (unreadable or invalid file, unknown
//! campaign, a campaign already running); 3 interrupted (resumable).

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::{Parser, Subcommand};

use crate::engine::{self, snapshot, EngineError, RunEnd, RunOptions};
use crate::report::{self, Tables};
use crate::spec::{self, Campaign};
use crate::store::{Store, StoreError};

/// Exit code: success.
pub const EXIT_OK: u8 = 0;
/// Exit code: the campaign failed (a task past its retries).
pub const EXIT_CAMPAIGN: u8 = 1;
/// Exit code: bad input (file, campaign name, a store in use).
pub const EXIT_INPUT: u8 = 2;
/// Exit code: interrupted; `tarn resume NAME` continues.
pub const EXIT_INTERRUPTED: u8 = 3;

#[derive(Parser, Debug)]
#[command(
    name = "tarn",
    version,
    about = "Discovery campaigns for metastable states and their free energies",
    long_about = "tarn runs unattended discovery campaigns on a system defined by an energy \
function: rounds of explore (find new configurations), dedup (quench to minima and \
identify states), retrain (fit a RealNVP flow to data and energy) and evaluate \
(reweight to the Boltzmann distribution, free energies with error bars). Every round \
is committed to an embedded database, so a campaign killed at any moment resumes \
where it stood.\n\nStart with `tarn new --list`, then `tarn check FILE` and `tarn run FILE`.",
    after_help = "Exit codes: 0 success, 1 campaign error, 2 bad input, 3 interrupted (resumable)."
)]
pub struct Cli {
    /// Directory holding campaign stores (one subdirectory per campaign).
    #[arg(
        long,
        global = true,
        env = "TARN_STATE",
        default_value = crate::out::DEFAULT_STATE,
        value_name = "DIR"
    )]
    pub state: PathBuf,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Write a commented campaign file from a built-in template.
    New {
        /// Template name (see --list).
        template: Option<String>,
        /// Where to write the file (default: TEMPLATE.toml in the current directory).
        #[arg(long, value_name = "FILE")]
        out: Option<PathBuf>,
        /// List the templates.
        #[arg(long)]
        list: bool,
    },
    /// Validate a campaign file and print the resolved plan, including every command
    /// it will run.
    Check {
        /// The campaign file to check.
        file: PathBuf,
        /// Print the plan as one JSON object.
        #[arg(long)]
        json: bool,
    },
    /// Start a campaign, or continue it if its store exists.
    Run {
        /// The campaign file (the same file continues the same campaign).
        file: PathBuf,
        /// Go on although the campaign file changed since the store was created; the
        /// change is recorded in the event log.
        #[arg(long)]
        accept_change: bool,
        /// No progress output.
        #[arg(long, short)]
        quiet: bool,
    },
    /// Continue an interrupted campaign (the campaign file is read from its store).
    Resume {
        /// The campaign's name (its `name` in the campaign file).
        name: String,
        /// No progress output.
        #[arg(long, short)]
        quiet: bool,
    },
    /// Where a campaign stands; works while it runs.
    Status {
        /// The campaign's name (its `name` in the campaign file).
        name: String,
        /// Print one JSON object.
        #[arg(long)]
        json: bool,
    },
    /// Per-round metrics and cost.
    Rounds {
        /// The campaign's name (its `name` in the campaign file).
        name: String,
        /// Print a JSON array, one object per round.
        #[arg(long)]
        json: bool,
    },
    /// The catalogue of states: who found what, when, with which seed, at what cost.
    States {
        /// The campaign's name (its `name` in the campaign file).
        name: String,
        /// Print a JSON array, one object per state.
        #[arg(long)]
        json: bool,
    },
    /// Write samples, energies, states and metrics as .npy, .csv and .json files.
    Export {
        /// The campaign's name (its `name` in the campaign file).
        name: String,
        /// The directory to write the files into (created if missing).
        #[arg(long, value_name = "DIR")]
        out: PathBuf,
    },
    /// Write the campaign report: one self-contained HTML file with plots. The running
    /// engine also refreshes STATE/NAME/report.html after every round.
    Report {
        /// The campaign's name (its `name` in the campaign file).
        name: String,
        /// The HTML file to write.
        #[arg(long, value_name = "FILE.html")]
        out: PathBuf,
    },
    /// The path between two states through the flow's latent space, with the energy
    /// along it; --relax turns it into a minimum-energy path whose highest point
    /// estimates the barrier.
    Path {
        /// The campaign's name (its `name` in the campaign file).
        name: String,
        /// State id to start from (see `tarn states`).
        #[arg(long)]
        from: u32,
        /// State id to end at.
        #[arg(long)]
        to: u32,
        /// Images along the path.
        #[arg(long, default_value_t = 24)]
        images: usize,
        /// Relax the path (climbing-image nudged elastic band).
        #[arg(long)]
        relax: bool,
        /// Print the path as one JSON object.
        #[arg(long)]
        json: bool,
    },
    /// A hash of all scientific content (no times, hosts or durations): equal digests
    /// mean equal results.
    Digest {
        /// The campaign's name (its `name` in the campaign file).
        name: String,
    },
    /// Run a built-in worker on the task named by $TARN_TASK (started by tarn).
    Work {
        /// The worker kind.
        kind: String,
    },
    /// Benchmarks that print figures (one JSON object per row with --json).
    #[command(
        after_help = "Benchmarks:\n  engine  orchestration overhead per task, reopen time, engine memory\n  energy  energy-and-force throughput against the measured f64 peak; an external model through its pipe\n  flow    RealNVP training and sampling throughput against the measured f32 GEMM peak\n  discovery  evaluations to find every state and to converge free energies, tarn against\n          plain Metropolis and Langevin (--system, --seeds, --plots; about 35 min for all)\n\nExamples:\n  tarn bench flow --json\n  tarn bench discovery --system muller-brown --seeds 3 --plots figures/"
    )]
    Bench {
        /// What to measure: engine, energy, flow or discovery.
        what: String,
        /// One JSON object per row instead of key=value lines.
        #[arg(long)]
        json: bool,
        /// Tasks to run in the engine benchmark.
        #[arg(long, default_value_t = 200)]
        tasks: u32,
        /// Discovery benchmark: one system (muller-brown, lj7-surface, phi4-lattice);
        /// all of them when omitted.
        #[arg(long)]
        system: Option<String>,
        /// Discovery benchmark: independent seeds per method.
        #[arg(long, default_value_t = 5)]
        seeds: u32,
        /// Discovery benchmark: write the cost curves as SVG files into this directory.
        #[arg(long, value_name = "DIR")]
        plots: Option<PathBuf>,
        /// Discovery benchmark: scale every baseline budget (e.g. 0.1 for a quick look).
        #[arg(long, default_value_t = 1.0)]
        budget_scale: f64,
    },
}

/// An error at the command line's edge, with its exit code.
pub struct Failure {
    pub code: u8,
    pub message: String,
}

impl Failure {
    fn input(m: impl std::fmt::Display) -> Self {
        Failure {
            code: EXIT_INPUT,
            message: m.to_string(),
        }
    }
}

impl Failure {
    /// The reader closed stdout: a normal end, exit 0, nothing more to say.
    fn stdout_closed() -> Self {
        Failure {
            code: EXIT_OK,
            message: String::new(),
        }
    }
}

impl From<std::io::Error> for Failure {
    /// A failed write to stdout.
    fn from(e: std::io::Error) -> Self {
        if crate::out::is_closed(&e) {
            Failure::stdout_closed()
        } else {
            Failure::input(format!("cannot write to stdout: {e}"))
        }
    }
}

/// `println!` to stdout through `crate::out`, returning from the command quietly with
/// exit 0 when the reader has closed the pipe.
macro_rules! outln {
    ($($arg:tt)*) => {
        crate::out::line(&format!($($arg)*))?
    };
}

impl From<EngineError> for Failure {
    fn from(e: EngineError) -> Self {
        Failure::input(e)
    }
}

impl From<StoreError> for Failure {
    fn from(e: StoreError) -> Self {
        Failure::input(e)
    }
}

impl From<anyhow::Error> for Failure {
    fn from(e: anyhow::Error) -> Self {
        Failure {
            code: EXIT_CAMPAIGN,
            message: format!("{e:#}"),
        }
    }
}

/// The binary's entry point.
pub fn main() -> ExitCode {
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Work { ref kind } => return crate::workers::main(kind),
        _ => dispatch(&cli),
    };
    match result {
        Ok(code) => ExitCode::from(code),
        Err(f) => {
            if !f.message.is_empty() {
                // A failure message may quote a worker's stderr or result.json.
                eprintln!("tarn: {}", crate::out::visible(&f.message));
            }
            ExitCode::from(f.code)
        }
    }
}

fn dispatch(cli: &Cli) -> Result<u8, Failure> {
    match &cli.command {
        Command::New {
            template,
            out,
            list,
        } => cmd_new(template.as_deref(), out.as_deref(), *list),
        Command::Check { file, json } => cmd_check(file, *json),
        Command::Run {
            file,
            accept_change,
            quiet,
        } => {
            let campaign = Campaign::load(file).map_err(Failure::input)?;
            campaign
                .check_programs(&file.display().to_string())
                .map_err(Failure::input)?;
            let opts = run_options(cli, *accept_change, *quiet)?;
            prepare_state(&opts.state_dir, &campaign.name)?;
            let store = engine::open_for_run(&campaign, file, &opts)?;
            run_engine(campaign, store, &opts, &file.display().to_string())
        }
        Command::Resume { name, quiet } => {
            let opts = run_options(cli, false, *quiet)?;
            let (campaign, store) = engine::open_for_resume(name, &opts)?;
            let file = store.current_campaign()?.path;
            prepare_state(&opts.state_dir, name)?;
            run_engine(campaign, store, &opts, &file)
        }
        Command::Status { name, json } => cmd_status(&cli.state, name, *json),
        Command::Rounds { name, json } => {
            let t = read_tables(&cli.state, name)?;
            print_or_json(*json, &t.rounds, || report::rounds_text(&t))
        }
        Command::States { name, json } => {
            let t = read_tables(&cli.state, name)?;
            print_or_json(*json, &t.states, || report::states_text(&t))
        }
        Command::Export { name, out } => {
            let store = open_store(&cli.state, name)?;
            let current = store.current_campaign()?;
            let meta = store.meta()?;
            let c = Campaign::parse(&current.path, &current.text, Path::new(&meta.base_dir))
                .map_err(Failure::input)?;
            let files = report::export::export(&store, &c, out)?;
            outln!(
                "wrote {} files to {}: {}",
                files.len(),
                out.display(),
                files.join(", ")
            );
            Ok(EXIT_OK)
        }
        Command::Report { name, out } => {
            let dir = engine::campaign_dir(&cli.state, name);
            match Store::open_read_only(&dir) {
                Ok(store) => report::html::write_report(&store, out)?,
                Err(StoreError::Locked { .. }) => {
                    let live = dir.join("report.html");
                    std::fs::copy(&live, out).map_err(|e| {
                        Failure::input(format!("the campaign is running and {} cannot be copied ({e}); it appears after the first round", live.display()))
                    })?;
                    eprintln!("campaign {name} is running: copied the report it published after its last round");
                }
                Err(e) => return Err(e.into()),
            }
            outln!("wrote {}", out.display());
            Ok(EXIT_OK)
        }
        Command::Path {
            name,
            from,
            to,
            images,
            relax,
            json,
        } => {
            let store = open_store(&cli.state, name)?;
            let p = report::path::latent_path(&store, *from, *to, *images, *relax)
                .map_err(|e| Failure::input(format!("{e:#}")))?;
            print_or_json(*json, &p, || report::path::path_text(&p))
        }
        Command::Digest { name } => {
            let store = open_store(&cli.state, name)?;
            outln!("{}", store.digest()?);
            Ok(EXIT_OK)
        }
        Command::Bench {
            what,
            json,
            tasks,
            system,
            seeds,
            plots,
            budget_scale,
        } => {
            let result = if what == "discovery" {
                crate::bench_discovery::run(&crate::bench_discovery::Options {
                    system: system.clone(),
                    seeds: *seeds,
                    json: *json,
                    plots: plots.clone(),
                    budget_scale: *budget_scale,
                })
            } else {
                crate::bench::run(what, *json, *tasks)
            };
            result.map_err(|e| {
                if crate::out::chain_is_closed(&e) {
                    Failure::stdout_closed()
                } else {
                    Failure::input(format!("{e:#}"))
                }
            })
        }
        Command::Work { .. } => unreachable!("handled in main"),
    }
}

fn run_options(cli: &Cli, accept_change: bool, quiet: bool) -> Result<RunOptions, Failure> {
    let exe = std::env::current_exe()
        .map_err(|e| Failure::input(format!("cannot find the tarn binary: {e}")))?;
    Ok(RunOptions {
        state_dir: cli.state.clone(),
        accept_change,
        quiet,
        exe,
    })
}

/// Creates the campaign directory and starts logging into it.
fn prepare_state(state: &Path, name: &str) -> Result<(), Failure> {
    let dir = engine::campaign_dir(state, name);
    std::fs::create_dir_all(&dir)
        .map_err(|e| Failure::input(format!("cannot create {}: {e}", dir.display())))?;
    init_logging(&dir.join("tarn.log"));
    Ok(())
}

fn init_logging(file: &Path) {
    use tracing_subscriber::prelude::*;
    use tracing_subscriber::{fmt, EnvFilter};
    let Ok(f) = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(file)
    else {
        return;
    };
    let file_layer = fmt::layer()
        .with_ansi(false)
        .with_writer(std::sync::Mutex::new(f))
        .with_filter(EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info")));
    let stderr_layer = std::env::var_os("RUST_LOG").map(|_| {
        fmt::layer()
            .with_writer(std::io::stderr)
            .with_filter(EnvFilter::from_default_env())
    });
    let _ = tracing_subscriber::registry()
        .with(file_layer)
        .with(stderr_layer)
        .try_init();
}

/// Runs the engine to its end and turns the end into an exit code and the hint of what
/// to type next. `file` is the campaign file as the user named it (for `run`) or as the
/// store recorded it (for `resume`).
fn run_engine(
    campaign: Campaign,
    store: Store,
    opts: &RunOptions,
    file: &str,
) -> Result<u8, Failure> {
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .map_err(|e| Failure::input(format!("cannot start the runtime: {e}")))?;
    let name = campaign.name.clone();
    let end = rt.block_on(async {
        let level = engine::install_signals();
        engine::run(campaign, store, opts, level).await
    });
    rt.shutdown_timeout(std::time::Duration::from_secs(1));
    match end {
        Ok(RunEnd::Finished(d)) => {
            if !opts.quiet {
                let tarn = |cmd: &str| crate::out::tarn_line(&opts.state_dir, &[cmd, &name]);
                outln!("campaign {name} finished: {}", d.reason);
                outln!("see `{}` and `{}`", tarn("states"), tarn("rounds"));
            }
            Ok(EXIT_OK)
        }
        Ok(RunEnd::Interrupted) => Err(Failure {
            code: EXIT_INTERRUPTED,
            message: format!(
                "campaign {name} interrupted; everything committed is kept. Continue with `{}`",
                crate::out::tarn_line(&opts.state_dir, &["resume", &name])
            ),
        }),
        Ok(RunEnd::Failed(m)) => Err(Failure {
            code: EXIT_CAMPAIGN,
            message: format!("{m}\n{}", after_failure_hint(&opts.state_dir, &name, file)),
        }),
        Err(e) => Err(Failure {
            code: EXIT_CAMPAIGN,
            message: e.to_string(),
        }),
    }
}

/// What to type after a task failed past its retries. `resume` reruns the campaign file
/// stored in the campaign, so it helps when the fix is in the worker's own files; a fix
/// in the campaign file needs `run FILE --accept-change`, which records the new file.
fn after_failure_hint(state_dir: &Path, name: &str, file: &str) -> String {
    format!(
        "fix the worker, then continue with `{}`; if you fix the campaign file instead, continue with `{}` (resume reruns the campaign file as stored)",
        crate::out::tarn_line(state_dir, &["resume", name]),
        crate::out::tarn_line(state_dir, &["run", file, "--accept-change"]),
    )
}

fn open_store(state: &Path, name: &str) -> Result<Store, Failure> {
    let dir = engine::campaign_dir(state, name);
    if !Store::exists(&dir) {
        return Err(Failure::input(format!(
            "no campaign '{name}' under {}",
            state.display()
        )));
    }
    Ok(Store::open_read_only(&dir)?)
}

/// The read tables: from the store when it is free, from the running engine's published
/// tables when it is locked.
fn read_tables(state: &Path, name: &str) -> Result<Tables, Failure> {
    let dir = engine::campaign_dir(state, name);
    if !Store::exists(&dir) {
        return Err(Failure::input(format!(
            "no campaign '{name}' under {}",
            state.display()
        )));
    }
    match Store::open_read_only(&dir) {
        Ok(store) => Ok(report::tables(&store)?),
        Err(StoreError::Locked { .. }) => {
            let text = std::fs::read_to_string(snapshot::tables_path(&dir)).map_err(|_| Failure::input("the campaign is running and has not published its tables yet; try again after its first round"))?;
            serde_json::from_str(&text).map_err(|e| Failure::input(format!("tables.json: {e}")))
        }
        Err(e) => Err(e.into()),
    }
}

fn print_or_json<T: serde::Serialize>(
    json: bool,
    value: &T,
    text: impl FnOnce() -> String,
) -> Result<u8, Failure> {
    if json {
        outln!(
            "{}",
            serde_json::to_string_pretty(value).expect("serializable")
        );
    } else {
        // Tables quote metric names and messages that workers chose.
        crate::out::write(&crate::out::visible(&text()))?;
    }
    Ok(EXIT_OK)
}

fn cmd_status(state: &Path, name: &str, json: bool) -> Result<u8, Failure> {
    let dir = engine::campaign_dir(state, name);
    if !Store::exists(&dir) {
        return Err(Failure::input(format!(
            "no campaign '{name}' under {}",
            state.display()
        )));
    }
    let snap = snapshot::read(&dir);
    let (running, tables) = match Store::open_read_only(&dir) {
        Ok(store) => (false, Some(report::tables(&store)?)),
        Err(StoreError::Locked { .. }) => (true, None),
        Err(e) => return Err(e.into()),
    };
    let phase = match (&snap, running) {
        (Some(s), true) => format!("running (pid {} on {})", s.pid, s.host),
        (_, true) => "running".to_string(),
        (_, false) => match tables.as_ref().and_then(|t| t.finished.clone()) {
            Some(reason) => format!("finished: {reason}"),
            None => match snap.as_ref().map(|s| s.phase.as_str()) {
                Some("failed") => format!(
                    "failed: {} (resumable)",
                    snap.as_ref().map(|s| s.message.clone()).unwrap_or_default()
                ),
                Some("running") => "stopped without a clean exit (killed?); resumable".to_string(),
                Some(p) => format!("{p}; resumable"),
                None => "not started".to_string(),
            },
        },
    };
    let (rounds_done, states, evals) = match &tables {
        Some(t) => (
            t.rounds.len() as u32,
            t.states.len() as u32,
            t.rounds.iter().map(|r| r.energy_evals).sum::<u64>(),
        ),
        None => snap
            .as_ref()
            .map(|s| (s.rounds_done, s.states, s.energy_evals))
            .unwrap_or((0, 0, 0)),
    };
    if json {
        let v = serde_json::json!({
            "campaign": name, "running": running, "phase": phase, "rounds_done": rounds_done,
            "states": states, "energy_evals": evals,
            "round": snap.as_ref().map(|s| s.round), "stage": snap.as_ref().map(|s| s.stage.clone()),
            "tasks_running": snap.as_ref().map(|s| s.tasks_running.clone()).unwrap_or_default(),
            "updated_unix": snap.as_ref().map(|s| s.updated_unix),
        });
        outln!("{}", serde_json::to_string_pretty(&v).expect("json"));
        return Ok(EXIT_OK);
    }
    // The phase and the running tasks quote a worker's failure message.
    let phase = crate::out::visible(&phase);
    outln!("campaign {name}: {phase}");
    outln!("  rounds done: {rounds_done}   states: {states}   energy evaluations: {evals}");
    if let (true, Some(s)) = (running, &snap) {
        outln!(
            "  now: round {} of at most {}, stage {} ({}/{} tasks of the round done)",
            s.round,
            s.max_rounds,
            s.stage,
            s.tasks_done_this_round,
            s.tasks_this_round
        );
        if !s.tasks_running.is_empty() {
            outln!(
                "  running: {}",
                crate::out::visible(&s.tasks_running.join(", "))
            );
        }
        outln!(
            "  {}",
            last_update_line(crate::store::now_unix(), s.updated_unix)
        );
    }
    Ok(EXIT_OK)
}

/// The campaign's goal rules and budgets as `key = value` phrases, for the plan.
fn stop_rule_lines(r: &spec::StopRules) -> (Vec<String>, Vec<String>) {
    let mut goals = Vec::new();
    if let Some(v) = r.expected_states {
        goals.push(format!("expected_states = {v}"));
    }
    if let Some(v) = r.quiet_rounds {
        goals.push(format!("quiet_rounds = {v}"));
    }
    if let Some(c) = &r.coverage {
        goals.push(format!(
            "coverage of {:.0}% of [{}, {}] in {} bins",
            100.0 * c.fraction,
            c.min,
            c.max,
            c.bins
        ));
    }
    if let Some(s) = &r.stability {
        goals.push(format!(
            "stable_rounds = {} (moves under {} kT, error bars under {} kT)",
            s.rounds, s.tolerance, s.max_error
        ));
    }
    if let Some(v) = r.pooled_max_error {
        goals.push(format!("pooled_max_error = {v} kT"));
    }
    if let Some(v) = r.min_ess_fraction {
        goals.push(format!("min_ess_fraction = {v}"));
    }
    let mut budgets = vec![format!("max_rounds = {}", r.max_rounds)];
    if let Some(v) = r.max_energy_evals {
        budgets.push(format!("max_energy_evals = {v}"));
    }
    if let Some(v) = r.max_wall_seconds {
        budgets.push(format!("max_wall_seconds = {v}"));
    }
    (goals, budgets)
}

/// How long ago the runner last wrote its snapshot, honest about a clock that moved
/// back since (the age would be negative).
fn last_update_line(now_unix: f64, updated_unix: f64) -> String {
    let age = now_unix - updated_unix;
    if age >= 0.0 {
        format!("last update {age:.0} s ago")
    } else {
        format!(
            "last update just now (this machine's clock reads {:.0} s before the update's time stamp)",
            -age
        )
    }
}

fn cmd_check(file: &Path, json: bool) -> Result<u8, Failure> {
    let c = Campaign::load(file).map_err(Failure::input)?;
    c.check_programs(&file.display().to_string())
        .map_err(Failure::input)?;
    let exe = std::env::current_exe().unwrap_or_else(|_| PathBuf::from("tarn"));
    let commands: Vec<serde_json::Value> = c
        .stages()
        .iter()
        .map(|s| {
            let (p, a) = engine::resolve_command(&s.worker, &exe, &c.base_dir);
            let mut argv = vec![p.display().to_string()];
            argv.extend(a);
            let slurm = engine::stage_resources(&c, s)
                .map(|r| crate::executor::slurm::resource_args(&r));
            serde_json::json!({"stage": s.name, "role": s.role, "walkers": s.walkers, "argv": argv, "sbatch_resources": slurm})
        })
        .collect();
    if json {
        let v = serde_json::json!({
            "name": c.name, "seed": c.seed, "kT": c.kt, "system": c.system.table, "dim": c.system.dim,
            "start_configurations": c.start.rows(), "commands": commands,
            "max_rounds": c.stop.max_rounds, "file_hash": c.source_hash,
        });
        outln!("{}", serde_json::to_string_pretty(&v).expect("json"));
        return Ok(EXIT_OK);
    }
    outln!("{}: campaign '{}' is valid", file.display(), c.name);
    outln!(
        "  system      {}   kT = {}   seed = {}",
        c.system.label,
        c.kt,
        c.seed
    );
    outln!("  start       {} configuration(s)", c.start.rows());
    outln!("  each round:");
    for s in c.stages() {
        let what = match &s.worker {
            spec::Worker::Builtin(k) => format!("built-in '{k}'"),
            spec::Worker::Command(_) => "command".to_string(),
        };
        let fan = if s.role == crate::protocol::Role::Explore {
            format!(" x {} walkers", s.walkers)
        } else {
            String::new()
        };
        outln!("    {:<9} {:<14} {what}{fan}", s.role.as_str(), s.name);
    }
    let (goals, budgets) = stop_rule_lines(&c.stop);
    if goals.is_empty() {
        outln!("  stops when  a budget is spent");
    } else {
        let join = if c.stop.all { " and " } else { " or " };
        outln!("  stops when  {}", goals.join(join));
    }
    outln!(
        "  budgets     {} (any one spent also stops it)",
        budgets.join(", ")
    );
    let e = &c.executor;
    outln!(
        "  executor    {}: {} tasks at a time, timeout {:.0} s, {} attempt(s) per task, {} thread(s) per task",
        e.kind, e.max_parallel, e.timeout.as_secs_f64(), e.retry.attempts, e.threads_per_task
    );
    if e.slurm.is_some() {
        outln!("  each task is one Slurm job asking for:");
        for cmd in &commands {
            let args: Vec<&str> = cmd["sbatch_resources"]
                .as_array()
                .into_iter()
                .flatten()
                .filter_map(|v| v.as_str())
                .collect();
            outln!(
                "    {:<14} {}",
                cmd["stage"].as_str().unwrap_or(""),
                args.join(" ")
            );
        }
    }
    outln!("  commands it will run (never through a shell; shell-quoted here, so that a pasted line runs the same arguments):");
    for cmd in &commands {
        let argv: Vec<String> = cmd["argv"]
            .as_array()
            .into_iter()
            .flatten()
            .filter_map(|v| v.as_str().map(String::from))
            .collect();
        outln!(
            "    {:<14} {}",
            cmd["stage"].as_str().unwrap_or(""),
            crate::out::shell_line(&argv)
        );
    }
    if let Some(argv) = external_program(&c) {
        outln!("    {:<14} {}", "energy", crate::out::shell_line(&argv));
        outln!("                   (the external energy program: each worker that needs energies starts it in its task directory)");
    }
    Ok(EXIT_OK)
}

/// The external energy program's argument array (`system.command`), resolved as the
/// workers receive it, when the system is an external model.
fn external_program(c: &Campaign) -> Option<Vec<String>> {
    let argv: Vec<String> = c
        .system
        .table
        .get("command")?
        .as_array()?
        .iter()
        .filter_map(|v| v.as_str().map(String::from))
        .collect();
    (!argv.is_empty()).then_some(argv)
}

fn cmd_new(template: Option<&str>, out: Option<&Path>, list: bool) -> Result<u8, Failure> {
    let all = spec::templates::TEMPLATES;
    if list || template.is_none() {
        outln!("templates (write one with `tarn new NAME`):");
        for t in all {
            outln!("  {:<18} {}", t.name, t.summary);
        }
        return Ok(EXIT_OK);
    }
    let name = template.expect("checked");
    let Some(t) = all.iter().find(|t| t.name == name) else {
        let names: Vec<&str> = all.iter().map(|t| t.name).collect();
        return Err(Failure::input(format!(
            "no template '{name}' (choose one of: {})",
            names.join(", ")
        )));
    };
    let path = out
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from(format!("{name}.toml")));
    if path.exists() {
        return Err(Failure::input(format!(
            "{} exists; choose another --out or remove it",
            path.display()
        )));
    }
    std::fs::write(&path, t.text)
        .map_err(|e| Failure::input(format!("cannot write {}: {e}", path.display())))?;
    outln!(
        "wrote {}; check it with `tarn check {}`",
        path.display(),
        path.display()
    );
    Ok(EXIT_OK)
}

#[cfg(test)]
mod tests {
    /// Walks clap's command tree: every option and positional argument of every
    /// subcommand must have a help line.
    #[test]
    fn every_option_and_positional_argument_has_help() {
        use clap::CommandFactory;
        fn walk(cmd: &clap::Command, path: &str, missing: &mut Vec<String>) {
            for arg in cmd.get_arguments() {
                let builtin = matches!(arg.get_id().as_str(), "help" | "version");
                if !builtin && arg.get_help().is_none() && arg.get_long_help().is_none() {
                    missing.push(format!("{path} <{}>", arg.get_id()));
                }
            }
            for sub in cmd.get_subcommands() {
                walk(sub, &format!("{path} {}", sub.get_name()), missing);
            }
        }
        let mut missing = Vec::new();
        walk(&super::Cli::command(), "tarn", &mut missing);
        assert!(missing.is_empty(), "arguments without help: {missing:?}");
        // The walk sees the subcommands' arguments (a broken walk would pass).
        let root = super::Cli::command();
        let check = root.find_subcommand("check").expect("check");
        assert!(check.get_arguments().any(|a| a.get_id() == "file"));
    }

    #[test]
    fn a_clock_that_moved_back_gives_no_negative_age() {
        assert_eq!(super::last_update_line(100.4, 90.0), "last update 10 s ago");
        let back = super::last_update_line(90.0, 130.0);
        assert!(
            back.starts_with("last update just now") && back.contains("40 s before"),
            "{back}"
        );
    }
}
