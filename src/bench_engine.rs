//! The engine benchmark: orchestration overhead per task against a bare spawn of the
//! same worker, the time to reopen a long campaign and reach its first new task, and the
//! engine's peak memory as the campaign grows.
//!
//! All figures come from one run on this machine; compare them as ratios within a run,
//! not as absolute times across days.

use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Instant;

use anyhow::Context;
use serde::Serialize;

use crate::engine::{self, inputs, RunOptions, StopLevel};
use crate::spec::Campaign;

#[derive(Serialize)]
struct Row {
    bench: &'static str,
    #[serde(flatten)]
    figures: serde_json::Value,
}

/// A campaign of `walkers` tasks per round that compute nothing (`hold` explore on the
/// Müller–Brown surface), `rounds` rounds, `parallel` tasks in flight, task directories
/// removed, and `executor_extra` (e.g. `kind = "slurm"` and its table) at the end of the
/// `[executor]` section: the time of a round is the orchestration overhead. Shared with
/// the Slurm executor's overhead test.
pub fn campaign_text(
    name: &str,
    walkers: u32,
    rounds: u32,
    parallel: u32,
    executor_extra: &str,
) -> String {
    format!(
        r#"name = "{name}"
seed = 1
kT = 10.0
[system]
model = "muller-brown"
[start]
points = [[-0.558, 1.442]]
[[explore]]
name = "idle"
kind = "hold"
walkers = {walkers}
restart = "start"
[dedup]
kind = "quench"
[stop]
max_rounds = {rounds}
[executor]
max_parallel = {parallel}
keep_task_dirs = "none"
{executor_extra}
"#
    )
}

/// Runs a campaign in this process (so that this process's peak memory is the engine's).
pub(crate) fn run_in_process(dir: &Path, file: &Path, accept_change: bool) -> anyhow::Result<()> {
    let campaign = Campaign::load(file).map_err(|e| anyhow::anyhow!("{e}"))?;
    let opts = RunOptions {
        state_dir: dir.join("state"),
        accept_change,
        quiet: true,
        exe: std::env::current_exe()?,
    };
    let store = engine::open_for_run(&campaign, file, &opts)?;
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()?;
    let (_tx, rx) = tokio::sync::watch::channel(StopLevel::Run);
    let end = rt.block_on(engine::run(campaign, store, &opts, rx))?;
    anyhow::ensure!(
        matches!(end, engine::RunEnd::Finished(_)),
        "benchmark campaign ended with {end:?}"
    );
    Ok(())
}

/// Peak resident memory of this process so far, in MB (Linux VmHWM).
fn peak_rss_mb() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|v| v.parse::<f64>().ok())
        })
        .map(|kb| kb / 1024.0)
        .unwrap_or(f64::NAN)
}

/// Time of `n` sequential spawns of `tarn work hold` on one prepared task directory.
fn bare_spawns(task_dir: &Path, n: u32) -> anyhow::Result<f64> {
    let exe = std::env::current_exe()?;
    let t = Instant::now();
    for _ in 0..n {
        let status = Command::new(&exe)
            .args(["work", "hold"])
            .current_dir(task_dir)
            .env("TARN_TASK", task_dir.join("task.json"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status()?;
        anyhow::ensure!(status.success(), "bare worker failed");
    }
    Ok(t.elapsed().as_secs_f64())
}

/// A task directory exactly like the engine's first task of the campaign, for the bare
/// spawns.
fn prepare_bare_task(tmp: &Path, file: &Path, store: &crate::store::Store) -> anyhow::Result<()> {
    let c = Campaign::load(file).map_err(|e| anyhow::anyhow!("{e}"))?;
    let stage = &c.explore[0];
    let tref = inputs::TaskRef::new(&c, 1, 0, stage, 0);
    let prepared = inputs::prepare(store, &c, stage, &tref)?;
    // The engine's own task-directory writer, so that the bare spawns see exactly what a
    // worker sees.
    engine::write_task_dir(&c, stage, &tref, &prepared, &tmp.join("bare"))?;
    Ok(())
}

/// Runs the engine benchmark.
pub fn run(json: bool, tasks: u32) -> anyhow::Result<u8> {
    let tmp = std::env::temp_dir().join(format!("tarn-bench-{}", std::process::id()));
    std::fs::create_dir_all(&tmp)?;
    let result = measure(&tmp, tasks, json);
    let _ = std::fs::remove_dir_all(&tmp);
    result
}

fn emit(json: bool, row: Row) -> std::io::Result<()> {
    if json {
        crate::out::line(&serde_json::to_string(&row).expect("json"))
    } else {
        crate::out::line(&format!("{:<10} {}", row.bench, row.figures))
    }
}

fn measure(tmp: &Path, tasks: u32, json: bool) -> anyhow::Result<u8> {
    // 1. Overhead per task, one task at a time, against the same worker spawned bare;
    // three alternations, the best of each, because the machine may be shared.
    let mut best_engine = f64::INFINITY;
    let mut best_bare = f64::INFINITY;
    for rep in 0..3 {
        let name = format!("overhead{rep}");
        let file = tmp.join(format!("{name}.toml"));
        std::fs::write(&file, campaign_text(&name, tasks, 1, 1, ""))?;
        let t = Instant::now();
        run_in_process(tmp, &file, false)?;
        let engine_total = t.elapsed().as_secs_f64();
        let store = crate::store::Store::open(&tmp.join("state").join(&name)).context("reopen")?;
        let dedup_wall: f64 = store
            .round_tasks(1)?
            .iter()
            .filter(|t| t.role == crate::protocol::Role::Dedup)
            .flat_map(|t| t.attempts.iter().map(|a| a.wall_seconds))
            .sum();
        best_engine = best_engine.min(engine_total - dedup_wall);
        if rep == 0 {
            prepare_bare_task(tmp, &file, &store)?;
        }
        drop(store);
        best_bare = best_bare.min(bare_spawns(&tmp.join("bare"), tasks)?);
    }
    let per_task = best_engine / f64::from(tasks) * 1e3;
    let per_spawn = best_bare / f64::from(tasks) * 1e3;
    emit(
        json,
        Row {
            bench: "overhead",
            figures: serde_json::json!({
                "tasks": tasks, "max_parallel": 1, "repeats": 3,
                "engine_ms_per_task": round3(per_task), "bare_spawn_ms": round3(per_spawn),
                "overhead_ms_per_task": round3(per_task - per_spawn),
                "note": "best of 3 alternations; engine time excludes the round's one dedup task and includes task directories, task.json, inputs, validation and the durable commit"
            }),
        },
    )?;

    // 2. A long campaign: memory at 200 and at 1000 rounds, then the reopen time.
    let file = tmp.join("long.toml");
    std::fs::write(&file, campaign_text("long", 1, 200, 1, ""))?;
    let t = Instant::now();
    run_in_process(tmp, &file, false)?;
    let rss_200 = peak_rss_mb();
    std::fs::write(&file, campaign_text("long", 1, 1000, 1, ""))?;
    run_in_process(tmp, &file, true)?;
    let build = t.elapsed().as_secs_f64();
    let rss_1000 = peak_rss_mb();
    let opts = RunOptions {
        state_dir: tmp.join("state"),
        accept_change: false,
        quiet: true,
        exe: std::env::current_exe()?,
    };
    let t = Instant::now();
    let (campaign, store) = engine::open_for_resume("long", &opts)?;
    let rounds = store.rounds()?;
    let next = rounds.last().map(|r| r.round + 1).unwrap_or(1);
    let _ = store.states()?;
    let stage = &campaign.explore[0];
    let tref = inputs::TaskRef::new(&campaign, next, 0, stage, 0);
    let _ = store.task(next, 0, 0)?;
    let _ = inputs::prepare(&store, &campaign, stage, &tref)?;
    let reopen = t.elapsed().as_secs_f64();
    emit(
        json,
        Row {
            bench: "reopen",
            figures: serde_json::json!({
                "rounds": rounds.len(), "reopen_to_first_task_s": round3(reopen),
                "store_mb": round3(store.size_on_disk() as f64 / 1e6), "build_s": round3(build),
            }),
        },
    )?;
    emit(
        json,
        Row {
            bench: "memory",
            figures: serde_json::json!({
                "peak_rss_mb_after_200_rounds": round3(rss_200),
                "peak_rss_mb_after_1000_rounds": round3(rss_1000),
                "sled_cache_cap_mb": crate::store::CACHE_BYTES / (1 << 20),
            }),
        },
    )?;
    Ok(0)
}

fn round3(v: f64) -> f64 {
    (v * 1000.0).round() / 1000.0
}
