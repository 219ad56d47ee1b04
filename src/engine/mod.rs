//! The engine: one loop that owns the campaign's rounds.
//!
//! Owns: the order of stages and tasks, retries, the commit of results, stop rules,
//! interruption. It is a state machine over the store: nothing it knows lives only in
//! memory, so that a campaign killed at any instant resumes where it stood.
//! Must not touch: worker internals (it sees only the protocol's files) and the numeric
//! core.

pub mod commit;
pub mod inputs;
pub mod monitor;
pub mod snapshot;
pub mod stop;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use tokio::sync::watch;
use tracing::Instrument;

use crate::executor::slurm::{job_name, BatchRequest, Existing};
use crate::executor::{Executor, Exit, Job, OnStart, Outcome, Started};
use crate::protocol::{npy, read_result, Role, TaskFile, PROTOCOL_VERSION};
use crate::spec::{Campaign, KeepDirs, SlurmResources, SpecError, Stage, Worker};
use crate::store::{
    jobs::{JobPhase, JobRecord},
    keys, now_unix, Attempt, Batch, CampaignVersion, Meta, RoundRecord, StageTotals, StopDecision,
    Store, StoreError, TaskStatus, SCHEMA_VERSION,
};
use inputs::{Prepared, TaskRef};
use monitor::{Event, Monitor};

/// How far the user has asked the campaign to stop.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum StopLevel {
    Run,
    /// Start no new task; let running ones finish and commit.
    AfterRunning,
    /// Stop waiting for batch jobs and leave them queued or running (a resumed tarn
    /// re-attaches to them); local workers are not affected.
    Detach,
    /// End running workers now (batch jobs are cancelled).
    Now,
}

/// How a run of the engine ended.
#[derive(Debug, Clone, PartialEq)]
pub enum RunEnd {
    Finished(StopDecision),
    Interrupted,
    Failed(String),
}

/// Why the engine could not run at all.
#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error(transparent)]
    Spec(#[from] SpecError),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("the campaign file changed since campaign '{name}' was created:\n{diff}\nrun again with --accept-change to record the change in the event log and go on with the new file")]
    Changed { name: String, diff: String },
    #[error("campaign '{name}' has no store under {dir}; start it with `tarn run FILE`")]
    Unknown { name: String, dir: String },
    #[error("campaign '{name}' was last run from {base_dir}, which no longer exists (moved?): relative paths in its campaign file resolve from there. Continue it from its new place with `{run}`, naming the campaign file (first run as {file}) where it is now; the same file continues the same campaign")]
    Moved {
        name: String,
        base_dir: String,
        file: String,
        /// The command to type, with `--state` when it is not the default.
        run: String,
    },
    #[error("{0}")]
    Io(String),
}

/// Settings of one engine run.
#[derive(Debug, Clone)]
pub struct RunOptions {
    pub state_dir: PathBuf,
    pub accept_change: bool,
    pub quiet: bool,
    /// The binary that built-in workers are run from (`tarn work KIND`).
    pub exe: PathBuf,
}

/// A campaign's directory under the state directory.
pub fn campaign_dir(state_dir: &Path, name: &str) -> PathBuf {
    state_dir.join(name)
}

/// Opens (or creates) the store for a campaign file and checks that the file did not
/// change, or records the change when the user accepts it.
pub fn open_for_run(
    campaign: &Campaign,
    path: &Path,
    opts: &RunOptions,
) -> Result<Store, EngineError> {
    let dir = campaign_dir(&opts.state_dir, &campaign.name);
    let version = |index| CampaignVersion {
        v: SCHEMA_VERSION,
        index,
        hash: campaign.source_hash.clone(),
        text: campaign.source.clone(),
        path: path.display().to_string(),
        accepted_unix: now_unix(),
    };
    let meta = Meta {
        v: SCHEMA_VERSION,
        campaign: campaign.name.clone(),
        created_unix: now_unix(),
        tarn_version: env!("CARGO_PKG_VERSION").into(),
        base_dir: campaign.base_dir.display().to_string(),
    };
    let (store, created) = Store::open_or_create(&dir, &meta, &version(0))?;
    if created {
        return Ok(store);
    }
    record_move(&store, campaign)?;
    let current = store.current_campaign()?;
    if current.hash != campaign.source_hash {
        if !opts.accept_change {
            return Err(EngineError::Changed {
                name: campaign.name.clone(),
                diff: line_diff(&current.text, &campaign.source),
            });
        }
        let mut b = Batch::default();
        b.put(
            keys::campaign(current.index + 1),
            &version(current.index + 1),
        );
        b.event(
            "campaign_changed",
            format!(
                "campaign file changed from {} to {} (accepted)\n{}",
                &current.hash[..12],
                &campaign.source_hash[..12],
                line_diff(&current.text, &campaign.source)
            ),
        );
        store.apply(b)?;
    }
    Ok(store)
}

/// Remembers the campaign file's directory when `run FILE` names a file in another
/// directory than the store knows (the campaign's folder was moved or copied): relative
/// paths in the file then resolve from the new place, for this run and for `resume`.
fn record_move(store: &Store, campaign: &Campaign) -> Result<(), EngineError> {
    let mut meta = store.meta()?;
    let now = campaign.base_dir.display().to_string();
    if meta.base_dir == now {
        return Ok(());
    }
    let mut b = Batch::default();
    b.event(
        "campaign_moved",
        format!(
            "the campaign file is now read from {now} (was {}); relative paths resolve from there",
            meta.base_dir
        ),
    );
    meta.base_dir = now;
    b.put(keys::meta(), &meta);
    store.apply(b)?;
    Ok(())
}

/// Opens an existing campaign by name and rebuilds its campaign from the stored text.
pub fn open_for_resume(name: &str, opts: &RunOptions) -> Result<(Campaign, Store), EngineError> {
    let dir = campaign_dir(&opts.state_dir, name);
    if !Store::exists(&dir) {
        return Err(EngineError::Unknown {
            name: name.into(),
            dir: opts.state_dir.display().to_string(),
        });
    }
    let store = Store::open(&dir)?;
    let meta = store.meta()?;
    let current = store.current_campaign()?;
    if !Path::new(&meta.base_dir).is_dir() {
        return Err(EngineError::Moved {
            name: name.into(),
            base_dir: meta.base_dir,
            file: current.path,
            run: crate::out::tarn_line(&opts.state_dir, &["run", "FILE"]),
        });
    }
    let shown = format!("{} (as stored)", current.path);
    let campaign = Campaign::parse(&shown, &current.text, Path::new(&meta.base_dir))?;
    campaign.check_programs(&shown)?;
    Ok((campaign, store))
}

/// A short line-by-line difference between two texts.
pub fn line_diff(old: &str, new: &str) -> String {
    let a: Vec<&str> = old.lines().collect();
    let b: Vec<&str> = new.lines().collect();
    // Longest common subsequence table; campaign files are short.
    let mut lcs = vec![vec![0u32; b.len() + 1]; a.len() + 1];
    for i in (0..a.len()).rev() {
        for j in (0..b.len()).rev() {
            lcs[i][j] = if a[i] == b[j] {
                lcs[i + 1][j + 1] + 1
            } else {
                lcs[i + 1][j].max(lcs[i][j + 1])
            };
        }
    }
    let (mut i, mut j, mut out) = (0, 0, Vec::new());
    while i < a.len() || j < b.len() {
        if i < a.len() && j < b.len() && a[i] == b[j] {
            i += 1;
            j += 1;
        } else if i < a.len() && (j == b.len() || lcs[i + 1][j] >= lcs[i][j + 1]) {
            out.push(format!("  - {:>4} | {}", i + 1, a[i]));
            i += 1;
        } else {
            out.push(format!("  + {:>4} | {}", j + 1, b[j]));
            j += 1;
        }
    }
    out.join("\n")
}

/// What every task of the run shares.
struct Ctx {
    campaign: Campaign,
    store: Store,
    executor: Executor,
    monitor: Monitor,
    level: watch::Receiver<StopLevel>,
    exe: PathBuf,
    dir: PathBuf,
    /// The state directory as the user gave it, for the commands hints print.
    state_dir: PathBuf,
}

/// Runs the campaign until a stop rule holds, a task fails past its retries, or the
/// user interrupts. `level` is raised by the signal handler. With a batch executor the
/// signals are translated first (see [`batch_stop_levels`]): jobs on a cluster are
/// never cancelled without the user's explicit answer.
pub async fn run(
    campaign: Campaign,
    store: Store,
    opts: &RunOptions,
    signals: watch::Receiver<StopLevel>,
) -> Result<RunEnd, EngineError> {
    let executor = Executor::for_spec(&campaign.executor);
    let (batch_tx, level) = if executor.is_batch() {
        let (tx, rx) = watch::channel(StopLevel::Run);
        (Some(tx), rx)
    } else {
        (None, signals.clone())
    };
    let dir = store.dir().to_path_buf();
    let rounds = store.rounds()?;
    let snap = snapshot::Snapshot {
        campaign: campaign.name.clone(),
        pid: std::process::id(),
        host: crate::store::host_name(),
        started_unix: now_unix(),
        max_rounds: campaign.stop.max_rounds,
        rounds_done: rounds.len() as u32,
        states: store.states()?.len() as u32,
        energy_evals: rounds.iter().map(|r| r.energy_evals).sum(),
        ..Default::default()
    };
    let ctx = Arc::new(Ctx {
        executor,
        monitor: Monitor::new(dir.clone(), snap, opts.quiet),
        campaign,
        store,
        level,
        exe: opts.exe.clone(),
        dir,
        state_dir: opts.state_dir.clone(),
    });
    let run_id = uuid::Uuid::new_v4();
    ctx.store.log_event(
        "started",
        format!("engine run {run_id} started (pid {})", std::process::id()),
    )?;
    let watcher = if let Some(tx) = batch_tx {
        tokio::spawn(batch_stop_levels(ctx.clone(), signals, tx))
    } else {
        let ctx = ctx.clone();
        let mut level = ctx.level.clone();
        tokio::spawn(async move {
            while level.changed().await.is_ok() {
                let now = *level.borrow();
                if now > StopLevel::Run {
                    ctx.monitor.emit(Event::StopRequested {
                        hard: now == StopLevel::Now,
                    });
                }
            }
        })
    };
    let end = round_loop(&ctx).await;
    watcher.abort();
    let end = match end {
        Ok(e) => e,
        Err(e) => {
            ctx.monitor.emit(Event::Failed {
                message: e.to_string(),
            });
            return Err(e);
        }
    };
    match &end {
        RunEnd::Finished(d) => ctx.monitor.emit(Event::Finished {
            reason: d.reason.clone(),
        }),
        RunEnd::Interrupted => {
            ctx.store
                .log_event("interrupted", "stopped by the user or a signal; resumable")?;
            ctx.monitor.emit(Event::Interrupted);
        }
        RunEnd::Failed(m) => {
            ctx.store.log_event("failed", m.clone())?;
            ctx.monitor.emit(Event::Failed { message: m.clone() });
        }
    }
    write_tables(&ctx);
    Ok(end)
}

async fn round_loop(ctx: &Arc<Ctx>) -> Result<RunEnd, EngineError> {
    loop {
        let rounds = ctx.store.rounds()?;
        let states = ctx.store.states()?;
        let decision = stop::check(
            &ctx.campaign.stop,
            &stop::Progress {
                rounds: &rounds,
                states: &states,
                evaluate_stage: stop::evaluate_stage(&ctx.campaign),
            },
        );
        if let Some(d) = decision {
            if ctx.store.finished()?.as_ref() != Some(&d) {
                let mut b = Batch::default();
                Store::put_finished(&mut b, Some(&d));
                b.event("stopped", d.reason.clone());
                ctx.store.apply(b)?;
            }
            return Ok(RunEnd::Finished(d));
        }
        if ctx.store.finished()?.is_some() {
            // The rules were extended by an accepted change: the campaign goes on.
            let mut b = Batch::default();
            Store::put_finished(&mut b, None);
            b.event("extended", "the stop rules no longer hold; continuing");
            ctx.store.apply(b)?;
        }
        let round = rounds.last().map(|r| r.round + 1).unwrap_or(1);
        let span = tracing::info_span!("round", round);
        match run_round(ctx, round).instrument(span).await? {
            RunEnd::Finished(_) => {}
            other => return Ok(other),
        }
    }
}

/// Runs every stage of a round, then records the round.
async fn run_round(ctx: &Arc<Ctx>, round: u32) -> Result<RunEnd, EngineError> {
    let started = Instant::now();
    let stages: Vec<(u16, Stage)> = ctx
        .campaign
        .stages()
        .into_iter()
        .cloned()
        .enumerate()
        .map(|(i, s)| (i as u16, s))
        .collect();
    let total: u32 = stages.iter().map(|(_, s)| s.walkers).sum();
    ctx.monitor.emit(Event::RoundStarted {
        round,
        tasks: total,
    });
    let explore: Vec<&(u16, Stage)> = stages
        .iter()
        .filter(|(_, s)| s.role == Role::Explore)
        .collect();
    let explore_tasks: u32 = explore.iter().map(|(_, s)| s.walkers).sum();
    let names: Vec<&str> = explore.iter().map(|(_, s)| s.name.as_str()).collect();
    ctx.monitor.emit(Event::StageStarted {
        round,
        stage: names.join("+"),
        tasks: explore_tasks,
    });
    let mut set = tokio::task::JoinSet::new();
    let mut order = 0usize;
    for (idx, stage) in &explore {
        for w in 0..stage.walkers {
            let task = TaskRef::new(&ctx.campaign, round, *idx, stage, w);
            let ctx = ctx.clone();
            let stage = stage.clone();
            let position = order;
            order += 1;
            set.spawn(async move { (position, run_task(&ctx, &stage, &task).await) });
        }
    }
    // Tasks finish in any order; the round's outcome is read in task order, so that the
    // message a user sees does not depend on which worker failed first.
    let mut ends: Vec<Option<RunEnd>> = vec![None; order];
    while let Some(joined) = set.join_next().await {
        let (position, r) = joined.map_err(|e| EngineError::Io(format!("task panicked: {e}")))?;
        ends[position] = Some(r?);
    }
    let end = ends
        .into_iter()
        .flatten()
        .fold(RunEnd::Finished(placeholder()), worse);
    if end != RunEnd::Finished(placeholder()) {
        return Ok(end);
    }
    for (idx, stage) in stages.iter().filter(|(_, s)| s.role != Role::Explore) {
        ctx.monitor.emit(Event::StageStarted {
            round,
            stage: stage.name.clone(),
            tasks: 1,
        });
        let task = TaskRef::new(&ctx.campaign, round, *idx, stage, 0);
        match run_task(ctx, stage, &task).await? {
            RunEnd::Finished(_) => {}
            other => return Ok(other),
        }
    }
    finish_round(ctx, round, started.elapsed())?;
    Ok(RunEnd::Finished(placeholder()))
}

/// The "nothing went wrong" value of a task or round (a finished task).
fn placeholder() -> StopDecision {
    StopDecision {
        rule: String::new(),
        reason: String::new(),
    }
}

/// Combines two task ends: a failure beats an interruption beats success.
fn worse(a: RunEnd, b: RunEnd) -> RunEnd {
    match (&a, &b) {
        (RunEnd::Failed(_), _) => a,
        (_, RunEnd::Failed(_)) => b,
        (RunEnd::Interrupted, _) => a,
        _ => b,
    }
}

/// Aggregates a finished round into its record, checks the stop rules, commits both.
fn finish_round(ctx: &Ctx, round: u32, wall: Duration) -> Result<(), EngineError> {
    let tasks = ctx.store.round_tasks(round)?;
    let states = ctx.store.states()?;
    let mut stages = Vec::new();
    for stage in ctx.campaign.stages() {
        let mine: Vec<_> = tasks.iter().filter(|t| t.stage == stage.name).collect();
        let mut totals = StageTotals {
            name: stage.name.clone(),
            tasks: mine.len() as u32,
            ..Default::default()
        };
        let mut sums: BTreeMap<String, (f64, u32)> = BTreeMap::new();
        for t in &mine {
            totals.energy_evals += t.energy_evals;
            totals.samples += t
                .arrays
                .get("samples")
                .and_then(|s| s.first())
                .copied()
                .unwrap_or(0) as u64;
            for a in &t.attempts {
                totals.cpu_seconds += a.cpu_seconds;
                totals.wall_seconds += a.wall_seconds;
            }
            for (k, v) in &t.metrics {
                if let Some(v) = v {
                    let e = sums.entry(k.clone()).or_default();
                    e.0 += v;
                    e.1 += 1;
                }
            }
        }
        totals.metrics = sums
            .into_iter()
            .map(|(k, (s, n))| (k, s / f64::from(n)))
            .collect();
        stages.push(totals);
    }
    let mut rounds = ctx.store.rounds()?;
    let previous: u64 = rounds.iter().map(|r| r.energy_evals).sum();
    let energy_evals: u64 = stages.iter().map(|s| s.energy_evals).sum();
    let new_states = states.iter().filter(|s| s.found.round == round).count() as u32;
    let mut rec = RoundRecord {
        v: SCHEMA_VERSION,
        round,
        cpu_seconds: stages.iter().map(|s| s.cpu_seconds).sum(),
        stages,
        new_states,
        states_total: states.len() as u32,
        energy_evals,
        cumulative_energy_evals: previous + energy_evals,
        wall_seconds: wall.as_secs_f64(),
        finished_unix: now_unix(),
        stop: None,
        cv_bins: coverage_bins(ctx, round)?,
    };
    rounds.push(rec.clone());
    rec.stop = stop::check(
        &ctx.campaign.stop,
        &stop::Progress {
            rounds: &rounds,
            states: &states,
            evaluate_stage: stop::evaluate_stage(&ctx.campaign),
        },
    );
    let mut b = Batch::default();
    b.put(keys::round(round), &rec);
    b.event(
        "round_done",
        format!(
            "round {round}: {new_states} new states, {} in all",
            states.len()
        ),
    );
    if let Some(d) = &rec.stop {
        Store::put_finished(&mut b, Some(d));
        b.event("stopped", d.reason.clone());
    }
    ctx.store.apply(b)?;
    ctx.monitor.emit(Event::RoundDone {
        round,
        new_states,
        states: states.len() as u32,
        energy_evals,
        cumulative_energy_evals: rec.cumulative_energy_evals,
    });
    write_tables(ctx);
    Ok(())
}

/// The bins of the coverage rule's collective variable that this round's explore
/// samples visited (empty without a coverage rule).
fn coverage_bins(ctx: &Ctx, round: u32) -> Result<Vec<u32>, EngineError> {
    let Some(c) = &ctx.campaign.stop.coverage else {
        return Ok(Vec::new());
    };
    let (x, _, _) = inputs::round_samples(&ctx.store, &ctx.campaign, round)?;
    let spec: crate::physics::models::SystemSpec =
        serde_json::from_value(ctx.campaign.system.table.clone())
            .map_err(|e| EngineError::Io(format!("system: {e}")))?;
    let values =
        c.cv.values(&x.data, ctx.campaign.system.dim, spec.particle_dims())
            .map_err(|e| EngineError::Io(format!("stop.coverage.cv: {e}")))?;
    let width = (c.max - c.min) / f64::from(c.bins);
    let bins: std::collections::BTreeSet<u32> = values
        .iter()
        .filter(|v| v.is_finite() && **v >= c.min && **v < c.max)
        .map(|v| (((v - c.min) / width) as u32).min(c.bins - 1))
        .collect();
    Ok(bins.into_iter().collect())
}

/// Publishes the read side's tables so that `rounds` and `states` work while running,
/// and refreshes the campaign report (`report.html`, written then renamed).
fn write_tables(ctx: &Ctx) {
    // write_report writes a temporary file and renames it, so a browser never sees a
    // half-written page.
    if let Err(e) = crate::report::html::write_report(&ctx.store, &ctx.dir.join("report.html")) {
        tracing::warn!(error = %e, "cannot refresh report.html");
    }
    let tables = crate::report::tables(&ctx.store);
    match tables {
        Ok(t) => {
            if let Err(e) = snapshot::write_json(&snapshot::tables_path(&ctx.dir), &t) {
                tracing::warn!(error = %e, "cannot write tables.json");
            }
        }
        Err(e) => tracing::warn!(error = %e, "cannot build tables.json"),
    }
}

/// Runs one task to commit, with retries; `Finished` means committed.
async fn run_task(ctx: &Arc<Ctx>, stage: &Stage, task: &TaskRef) -> Result<RunEnd, EngineError> {
    let span = tracing::info_span!("task", id = %task.id);
    run_task_inner(ctx, stage, task).instrument(span).await
}

async fn run_task_inner(
    ctx: &Arc<Ctx>,
    stage: &Stage,
    task: &TaskRef,
) -> Result<RunEnd, EngineError> {
    let existing = ctx.store.task(task.round, task.stage_index, task.walker)?;
    if existing
        .as_ref()
        .is_some_and(|t| t.status == TaskStatus::Done)
    {
        ctx.monitor.emit(Event::TaskDone {
            id: task.id.clone(),
            energy_evals: 0,
            skipped: true,
        });
        return Ok(RunEnd::Finished(placeholder()));
    }
    let mut attempts = existing.map(|t| t.attempts).unwrap_or_default();
    let policy = &ctx.campaign.executor.retry;
    let mut last_error = String::new();
    // An attempt an earlier session left on the batch system: wait for it first.
    let mut left_behind = ctx
        .store
        .job(task.round, task.stage_index, task.walker)?
        .filter(|_| ctx.executor.is_batch());
    for this_session in 1..=policy.attempts {
        let reattach = left_behind.take();
        if reattach.is_none() && *ctx.level.borrow() > StopLevel::Run {
            return Ok(RunEnd::Interrupted);
        }
        let number = reattach
            .as_ref()
            .map(|j| j.attempt)
            .unwrap_or(attempts.len() as u32 + 1);
        let prepared = inputs::prepare(&ctx.store, &ctx.campaign, stage, task)?;
        let attempt_dir = ctx
            .dir
            .join("tasks")
            .join(format!("r{:04}", task.round))
            .join(format!("{}.w{:03}", stage.name, task.walker))
            .join(format!("a{number}"));
        // A re-attached job runs in its directory as it is; never rewrite it.
        if reattach.is_none() || !attempt_dir.join("task.json").is_file() {
            write_task_dir(&ctx.campaign, stage, task, &prepared, &attempt_dir).map_err(|e| {
                EngineError::Io(format!(
                    "{}: cannot prepare the task directory: {e}",
                    attempt_dir.display()
                ))
            })?;
        }
        let started_unix = reattach
            .as_ref()
            .map(|j| j.submitted_unix)
            .unwrap_or_else(now_unix);
        let mut job = make_job(ctx, stage, task, &attempt_dir, number);
        if let Some(b) = job.batch.as_mut() {
            match &reattach {
                Some(j) => {
                    b.existing = Some(match (j.phase, &j.job_id) {
                        (JobPhase::Submitted, Some(id)) => Existing::Id(id.clone()),
                        _ => Existing::Named,
                    });
                }
                None => {
                    // Before sbatch runs, so that a tarn killed in between finds the job
                    // by its name.
                    let rec = JobRecord::new(
                        &task.id,
                        number,
                        JobPhase::Submitting,
                        None,
                        &b.name,
                        &job.dir.display().to_string(),
                    );
                    ctx.store
                        .put_job(task.round, task.stage_index, task.walker, &rec)?;
                }
            }
        }
        let batch_name = job.batch.as_ref().map(|b| b.name.clone());
        let job_dir = job.dir.display().to_string();
        let on_start: OnStart = Box::new(|started| {
            if let (Started::Batch { job_id }, Some(name)) = (started, &batch_name) {
                let mut rec = JobRecord::new(
                    &task.id,
                    number,
                    JobPhase::Submitted,
                    Some(job_id.to_string()),
                    name,
                    &job_dir,
                );
                rec.submitted_unix = started_unix;
                ctx.store
                    .put_job(task.round, task.stage_index, task.walker, &rec)
                    .map_err(|e| format!("cannot record Slurm job {job_id}: {e}"))?;
                tracing::info!(task = %task.id, job_id, "submitted to Slurm");
            }
            ctx.monitor.emit(Event::TaskStarted {
                id: task.id.clone(),
                attempt: number,
            });
            Ok(())
        });
        let outcome = ctx.executor.run(job, ctx.level.clone(), on_start).await;
        let mut attempt = attempt_of(number, &outcome, started_unix);
        let failure = match &outcome.exit {
            Exit::NotStarted => {
                if ctx.executor.is_batch() {
                    let mut b = Batch::default();
                    b.remove_job(task.round, task.stage_index, task.walker);
                    ctx.store.apply(b)?;
                }
                remove_attempt_dir(&attempt_dir);
                return Ok(RunEnd::Interrupted);
            }
            // The job stays on the cluster, its record in the store: resume re-attaches.
            Exit::Detached => return Ok(RunEnd::Interrupted),
            Exit::Cancelled => {
                attempt.outcome = "cancelled".into();
                record_attempt(
                    ctx,
                    stage,
                    task,
                    &attempts,
                    attempt,
                    TaskStatus::Pending,
                    None,
                )?;
                return Ok(RunEnd::Interrupted);
            }
            Exit::Code(0) => match read_result(&attempt_dir, &prepared.expect) {
                Ok(valid) => {
                    attempt.energy_evals = valid.energy_evals;
                    let mut all = attempts.clone();
                    all.push(attempt.clone());
                    match commit::build(
                        &ctx.store,
                        &ctx.campaign,
                        stage,
                        task,
                        &prepared,
                        &valid,
                        all,
                    ) {
                        Ok(mut batch) => {
                            batch.remove_job(task.round, task.stage_index, task.walker);
                            ctx.store.apply(batch)?;
                            ctx.monitor.emit(Event::TaskDone {
                                id: task.id.clone(),
                                energy_evals: valid.energy_evals,
                                skipped: false,
                            });
                            if ctx.campaign.executor.keep_task_dirs != KeepDirs::All {
                                remove_attempt_dir(&attempt_dir);
                            }
                            return Ok(RunEnd::Finished(placeholder()));
                        }
                        Err(commit::CommitError::Store(e)) => return Err(e.into()),
                        Err(commit::CommitError::Result(e)) => {
                            attempt.outcome = "invalid".into();
                            e.to_string()
                        }
                    }
                }
                Err(e) => {
                    attempt.outcome = "invalid".into();
                    e.to_string()
                }
            },
            other => describe_exit(
                other,
                &outcome,
                stage
                    .timeout
                    .unwrap_or(ctx.campaign.executor.timeout)
                    .as_secs_f64(),
            ),
        };
        last_error = format!("task {}: {failure}", task.id);
        attempt.error = Some(failure.clone());
        let final_attempt = this_session == policy.attempts;
        let status = if final_attempt {
            TaskStatus::Failed
        } else {
            TaskStatus::Pending
        };
        record_attempt(
            ctx,
            stage,
            task,
            &attempts,
            attempt.clone(),
            status,
            Some(&last_error),
        )?;
        attempts.push(attempt);
        if ctx.campaign.executor.keep_task_dirs == KeepDirs::None {
            remove_attempt_dir(&attempt_dir);
        }
        let delay = (!final_attempt).then(|| policy.delay(number + 1, task.seed));
        ctx.monitor.emit(Event::AttemptFailed {
            id: task.id.clone(),
            attempt: number,
            error: failure,
            retry_in: delay.map(|d| d.as_secs_f64()),
        });
        if let Some(d) = delay {
            let mut level = ctx.level.clone();
            tokio::select! {
                _ = tokio::time::sleep(d) => {}
                _ = level.wait_for(|l| *l > StopLevel::Run) => return Ok(RunEnd::Interrupted),
            }
        }
    }
    Ok(RunEnd::Failed(format!(
        "{last_error}\n(the task failed {} attempts)",
        policy.attempts
    )))
}

/// Removes an attempt's directory and the task and round directories above it when
/// they are left empty.
fn remove_attempt_dir(dir: &Path) {
    let _ = std::fs::remove_dir_all(dir);
    let mut up = dir.parent();
    for _ in 0..2 {
        match up {
            Some(p) if std::fs::remove_dir(p).is_ok() => up = p.parent(),
            _ => break,
        }
    }
}

/// Stores a failed or cancelled attempt without touching anything committed.
fn record_attempt(
    ctx: &Ctx,
    stage: &Stage,
    task: &TaskRef,
    prior: &[crate::store::Attempt],
    attempt: Attempt,
    status: TaskStatus,
    message: Option<&str>,
) -> Result<(), EngineError> {
    let mut all = prior.to_vec();
    all.push(attempt);
    let rec = commit::task_record(stage, task, status, all);
    let mut b = Batch::default();
    b.put(keys::task(task.round, task.stage_index, task.walker), &rec);
    b.remove_job(task.round, task.stage_index, task.walker);
    b.event(
        if status == TaskStatus::Failed {
            "task_failed"
        } else {
            "attempt_failed"
        },
        message.unwrap_or("attempt cancelled").to_string(),
    );
    ctx.store.apply(b)?;
    Ok(())
}

fn attempt_of(number: u32, o: &Outcome, started_unix: f64) -> Attempt {
    Attempt {
        number,
        outcome: match &o.exit {
            Exit::Code(0) => "ok",
            Exit::Code(_) => "exit",
            Exit::Signal(_) => "signal",
            Exit::TimedOut => "timeout",
            Exit::Cancelled | Exit::NotStarted | Exit::Detached => "cancelled",
            Exit::SpawnFailed(_) => "spawn",
            Exit::Ended(state) => return_outcome_of_state(state),
        }
        .into(),
        exit_code: match o.exit {
            Exit::Code(c) => Some(c),
            _ => None,
        },
        signal: match o.exit {
            Exit::Signal(s) => Some(s),
            _ => None,
        },
        error: None,
        stdout_tail: o.stdout_tail.clone(),
        stderr_tail: o.stderr_tail.clone(),
        wall_seconds: o.wall.as_secs_f64(),
        cpu_seconds: o.cpu.as_secs_f64(),
        energy_evals: 0,
        host: o.host.clone().unwrap_or_else(crate::store::host_name),
        started_unix,
    }
}

/// A sentence for a worker that did not exit cleanly, with the end of its stderr.
fn describe_exit(exit: &Exit, o: &Outcome, timeout: f64) -> String {
    let last = o
        .stderr_tail
        .lines()
        .rev()
        .find(|l| !l.trim().is_empty())
        .map(|l| format!("; its stderr ends: {}", l.trim()))
        .unwrap_or_default();
    if let Some(d) = &o.detail {
        return format!("{d}{last}");
    }
    match exit {
        Exit::Code(c) => format!("the worker exited with status {c}{last}"),
        Exit::Signal(s) => format!("the worker was killed by signal {s}{last}"),
        Exit::TimedOut => format!(
            "the worker ran past its timeout of {} s; its process group was ended{last}",
            (timeout * 1000.0).round() / 1000.0
        ),
        Exit::SpawnFailed(m) => m.clone(),
        Exit::Ended(state) => format!("the batch system ended the job (state {state}){last}"),
        Exit::Cancelled | Exit::NotStarted | Exit::Detached => "cancelled".into(),
    }
}

/// The attempt outcome of a job a batch system ended: `slurm_` and the state in lower
/// case (`slurm_cancelled`, `slurm_node_fail`, ...).
fn return_outcome_of_state(state: &str) -> &'static str {
    match state {
        "CANCELLED" => "slurm_cancelled",
        "NODE_FAIL" => "slurm_node_fail",
        "PREEMPTED" => "slurm_preempted",
        "OUT_OF_MEMORY" => "slurm_out_of_memory",
        "BOOT_FAIL" => "slurm_boot_fail",
        "DEADLINE" => "slurm_deadline",
        "UNKNOWN" => "slurm_lost",
        _ => "slurm_ended",
    }
}

/// Writes `task.json` and the input arrays into a fresh attempt directory.
pub fn write_task_dir(
    campaign: &Campaign,
    stage: &Stage,
    task: &TaskRef,
    prepared: &Prepared,
    dir: &Path,
) -> std::io::Result<()> {
    if dir.exists() {
        std::fs::remove_dir_all(dir)?;
    }
    std::fs::create_dir_all(dir.join("in"))?;
    std::fs::create_dir_all(dir.join("out"))?;
    let mut rel = BTreeMap::new();
    for (name, array) in &prepared.inputs {
        let path = format!("in/{name}.npy");
        std::fs::write(dir.join(&path), npy::encode_f64(array))?;
        rel.insert(name.clone(), path);
    }
    let model = match &prepared.model {
        Some(bytes) => {
            std::fs::write(dir.join("in/model.safetensors"), bytes)?;
            Some("in/model.safetensors".to_string())
        }
        None => None,
    };
    let file = TaskFile {
        protocol: PROTOCOL_VERSION,
        task_id: task.id.clone(),
        campaign: campaign.name.clone(),
        round: task.round,
        stage: stage.name.clone(),
        role: stage.role,
        kind: stage.worker.kind().map(String::from),
        walker: task.walker,
        walkers: stage.walkers,
        seed: task.seed,
        kt: campaign.kt,
        threads: campaign.executor.threads_per_task,
        system: campaign.system.table.clone(),
        params: stage.params.clone(),
        inputs: rel,
        model,
    };
    std::fs::write(
        dir.join("task.json"),
        serde_json::to_vec_pretty(&file).map_err(std::io::Error::other)?,
    )
}

/// The process to start for a task (attempt `number`), with its Slurm request when the
/// campaign runs on Slurm.
fn make_job(ctx: &Ctx, stage: &Stage, task: &TaskRef, dir: &Path, number: u32) -> Job {
    let (program, args) = resolve_command(&stage.worker, &ctx.exe, &ctx.campaign.base_dir);
    let threads = ctx.campaign.executor.threads_per_task.to_string();
    let abs_dir = dir.canonicalize().unwrap_or_else(|_| dir.to_path_buf());
    let mut env = vec![
        (
            "TARN_TASK".to_string(),
            abs_dir.join("task.json").display().to_string(),
        ),
        ("TARN_TASK_DIR".to_string(), abs_dir.display().to_string()),
        ("TARN_SEED".to_string(), task.seed.to_string()),
    ];
    for k in [
        "RAYON_NUM_THREADS",
        "OMP_NUM_THREADS",
        "OPENBLAS_NUM_THREADS",
        "MKL_NUM_THREADS",
    ] {
        env.push((k.to_string(), threads.clone()));
    }
    let timeout = stage.timeout.unwrap_or(ctx.campaign.executor.timeout);
    let batch = stage_resources(&ctx.campaign, stage).map(|resources| BatchRequest {
        name: job_name(&ctx.campaign.name, &task.id, number, &abs_dir),
        resources,
        existing: None,
    });
    Job {
        id: task.id.clone(),
        program,
        args,
        dir: abs_dir,
        env,
        timeout,
        grace: Duration::from_secs(5),
        tail_bytes: 4096,
        log_bytes: 64 << 20,
        batch,
    }
}

/// The program and arguments of a worker. Built-in kinds run this binary as
/// `tarn work KIND`. For a command, a program or argument that names an existing file
/// relative to the campaign file's directory is passed as an absolute path (workers run
/// in their task directory); everything else is passed unchanged, never through a shell.
/// What each Slurm job of `stage` asks for (None unless the executor is Slurm): the
/// stage's `slurm` table over `[executor.slurm]`, with the time limit falling back to
/// the task's timeout (rounded up to whole minutes, Slurm's unit) and the CPUs to
/// `executor.threads_per_task`.
pub fn stage_resources(campaign: &Campaign, stage: &Stage) -> Option<SlurmResources> {
    let s = campaign.executor.slurm.as_ref()?;
    let base = &s.defaults;
    let mut resources = stage
        .slurm
        .as_ref()
        .map_or_else(|| base.clone(), |r| r.over(base));
    let timeout = stage.timeout.unwrap_or(campaign.executor.timeout);
    resources.time_limit_minutes = resources
        .time_limit_minutes
        .or(Some(timeout.as_secs().div_ceil(60).max(1)));
    resources.cpus = resources.cpus.or(Some(campaign.executor.threads_per_task));
    Some(resources)
}

pub fn resolve_command(worker: &Worker, exe: &Path, base: &Path) -> (PathBuf, Vec<String>) {
    match worker {
        Worker::Builtin(kind) => (exe.to_path_buf(), vec!["work".into(), kind.clone()]),
        Worker::Command(cmd) => {
            let fix = |a: &str| {
                let p = Path::new(a);
                if p.is_relative() && !a.starts_with('-') && base.join(p).is_file() {
                    base.join(p).display().to_string()
                } else {
                    a.to_string()
                }
            };
            let program = if cmd[0].contains('/') {
                fix(&cmd[0])
            } else {
                cmd[0].clone()
            };
            (
                PathBuf::from(program),
                cmd[1..].iter().map(|a| fix(a)).collect(),
            )
        }
    }
}

/// Turns the signal handler's levels into the batch executor's: a cluster job is
/// cancelled only when the user says so on a terminal. The first Ctrl-C on a terminal
/// stops new submissions and asks whether to cancel the jobs in flight (yes: cancel
/// them, [`StopLevel::Now`]; anything else: leave them, [`StopLevel::Detach`]). Without
/// a terminal, and for a second Ctrl-C or SIGTERM, the jobs are left to Slurm and tarn
/// exits resumable; `tarn resume` waits for them.
async fn batch_stop_levels(
    ctx: Arc<Ctx>,
    mut signals: watch::Receiver<StopLevel>,
    tx: watch::Sender<StopLevel>,
) {
    use std::io::IsTerminal;
    let tx = Arc::new(tx);
    let interactive = std::io::stdin().is_terminal() && std::io::stderr().is_terminal();
    let mut asked = false;
    while signals.changed().await.is_ok() {
        let raw = *signals.borrow();
        let in_flight = ctx.store.jobs().map(|j| j.len()).unwrap_or(0);
        let name = ctx.campaign.name.clone();
        let resume = crate::out::tarn_line(&ctx.state_dir, &["resume", &name]);
        if raw == StopLevel::AfterRunning && interactive && !asked {
            asked = true;
            tx.send_replace(StopLevel::AfterRunning);
            ctx.monitor.ask(&format!(
                "interrupt: no new jobs will be submitted. Cancel the {in_flight} Slurm job(s) of campaign {name} that are queued or running? [y/N] (N leaves them; `{resume}` waits for them)"
            ));
            let tx = tx.clone();
            let ctx = ctx.clone();
            tokio::spawn(async move {
                let answer = tokio::task::spawn_blocking(|| {
                    let mut line = String::new();
                    std::io::stdin().read_line(&mut line).map(|_| line)
                })
                .await;
                let yes = matches!(answer, Ok(Ok(l)) if l.trim().eq_ignore_ascii_case("y") || l.trim().eq_ignore_ascii_case("yes"));
                let level = if yes {
                    StopLevel::Now
                } else {
                    StopLevel::Detach
                };
                if *tx.borrow() < level {
                    ctx.monitor.ask(if yes {
                        "cancelling the Slurm jobs (scancel), then stopping"
                    } else {
                        "leaving the Slurm jobs queued or running; stopping"
                    });
                    tx.send_replace(level);
                }
            });
        } else if *tx.borrow() < StopLevel::Detach {
            ctx.monitor.line(&format!(
                "interrupt: leaving {in_flight} Slurm job(s) queued or running and stopping; `{resume}` waits for them"
            ));
            tx.send_replace(StopLevel::Detach);
        }
    }
}

/// Installs the signal handlers: the first Ctrl-C asks to stop after running tasks, the
/// second (or SIGTERM, as a batch system sends at its time limit) ends them now.
/// The engine tells the user through its monitor (see [`run`]), so that the message sits
/// above the progress view and lands in the status snapshot.
pub fn install_signals() -> watch::Receiver<StopLevel> {
    let (tx, rx) = watch::channel(StopLevel::Run);
    tokio::spawn(async move {
        let mut term =
            tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()).ok();
        loop {
            let hard = tokio::select! {
                r = tokio::signal::ctrl_c() => { if r.is_err() { return; } *tx.borrow() >= StopLevel::AfterRunning }
                _ = async { match term.as_mut() { Some(t) => { t.recv().await; } None => std::future::pending::<()>().await } } => true,
            };
            let level = if hard {
                StopLevel::Now
            } else {
                StopLevel::AfterRunning
            };
            let _ = tx.send(level);
        }
    });
    rx
}
