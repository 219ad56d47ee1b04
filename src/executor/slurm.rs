//! The Slurm executor: each task is one batch job, submitted with `sbatch --parsable`,
//! watched with `squeue`, and read back with `scontrol` and the files it left in its
//! task directory.
//!
//! # The job script
//! Each attempt directory gets a `job.sh` that `sbatch` runs. Its only variable parts
//! are words tarn quotes itself — every one in single quotes, with a `'` written as
//! `'\''` — so a parameter value can never become shell syntax. A script rather than
//! `sbatch --wrap`: `--wrap` hands a string to `sh -c` as well, so the quoting problem
//! is the same, while a script is kept beside the task's files, shows exactly what ran,
//! and can be resubmitted by hand. The script
//! - runs the worker under `env -i` with tarn's allow-listed environment (the values tarn
//!   itself had), the task's `TARN_*` and thread variables, and Slurm's own `SLURM_*`
//!   variables — the same environment as a local worker plus Slurm's;
//! - writes `tarn-job.end` when the worker exits: its status, its start and end times,
//!   and the CPU time of the worker and its children (bash's `times`, whose second line
//!   is the children's), because without job accounting Slurm reports no CPU time;
//! - exits with the worker's status, so that Slurm's state says how the worker ended.
//!
//! `sbatch` gets `--export=NIL` (nothing from tarn's own environment reaches the job
//! but what the script sets), `--chdir` to the attempt directory, `--output`/`--error`
//! to `stdout.log`/`stderr.log` there, a job name unique to the attempt,
//! `--no-requeue` (tarn's retry policy, not Slurm's requeue, reruns a job lost to a
//! node failure or a preemption), the stage's resources, and the campaign's extra
//! arguments as separate words.
//!
//! # Watching
//! One poller per executor asks `squeue -h -t all -j ID,ID,... -o %i|%T` about every job
//! in flight at once, starting every 0.25 s and backing off by half again each time
//! nothing changed, up to `poll_max_seconds`. A job that reaches an end state is read
//! with `scontrol -o show job ID` (state, reason, `ExitCode=status:signal`, run time).
//! A job Slurm no longer knows (it ended longer ago than `MinJobAge`) is collected from
//! `tarn-job.end` alone.
//!
//! # Stopping
//! At [`StopLevel::Detach`] the executor stops waiting and leaves the job queued or
//! running ([`Exit::Detached`]); at [`StopLevel::Now`] it cancels the job with
//! `scancel` and waits (briefly) for it to end ([`Exit::Cancelled`]). tarn being killed
//! leaves its jobs alone; the engine's job records let a resumed tarn re-attach.

use std::collections::HashMap;
use std::path::Path;
use std::process::Stdio;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use tokio::process::Command;
use tokio::sync::{watch, Notify, Semaphore};

use super::{Exit, Job, OnStart, Outcome, Started, ENV_ALLOW};
use crate::engine::StopLevel;
use crate::spec::SlurmResources;

/// The first pause between two polls of the queue.
const POLL_MIN: Duration = Duration::from_millis(250);
/// The longest a Slurm command may take before tarn gives up on that call.
const COMMAND_LIMIT: Duration = Duration::from_secs(60);
/// How long a cancelled job may take to reach an end state.
const CANCEL_WAIT: Duration = Duration::from_secs(30);
/// How long a job may be missing from `squeue` before tarn believes it is gone (a job
/// just submitted is always listed; a short grace covers a controller restart).
const MISSING_GRACE: Duration = Duration::from_secs(5);
/// Job ids per `squeue` call.
const IDS_PER_QUERY: usize = 400;
/// The file the job script writes when the worker has exited.
pub const END_FILE: &str = "tarn-job.end";
/// The job script's name in the attempt directory.
pub const SCRIPT_FILE: &str = "job.sh";

/// What a batch job asks for and how it is found again.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchRequest {
    /// The job name, unique to the campaign directory and attempt (see
    /// [`job_name`]).
    pub name: String,
    /// The stage's resources over `[executor.slurm]`'s, with the time limit and the
    /// CPUs filled in.
    pub resources: SlurmResources,
    /// An earlier session's job for this very attempt: wait for it, do not submit.
    pub existing: Option<Existing>,
}

/// What an earlier session left in the store about this attempt's job.
#[derive(Debug, Clone, PartialEq)]
pub enum Existing {
    /// `sbatch` printed this id.
    Id(String),
    /// tarn was about to run `sbatch` (or had run it and died before recording the id):
    /// look the job up by name; submit only if Slurm has no such job and it never ran.
    Named,
}

/// A job name for an attempt: readable in `squeue`, and unique thanks to a short hash
/// of the attempt directory (two campaigns of the same name in two state directories
/// never share one).
pub fn job_name(campaign: &str, task_id: &str, attempt: u32, dir: &Path) -> String {
    use sha2::{Digest, Sha256};
    let h = hex::encode(&Sha256::digest(dir.display().to_string().as_bytes())[..4]);
    format!("{campaign}.{task_id}.a{attempt}.{h}")
}

/// Runs jobs through Slurm, at most `max_parallel` in the queue at once.
#[derive(Clone)]
pub struct SlurmExecutor {
    slots: Arc<Semaphore>,
    poller: Arc<Poller>,
}

impl SlurmExecutor {
    /// An executor with `max_parallel` jobs in flight and polls at most `poll_max`
    /// apart.
    pub fn new(max_parallel: u32, poll_max: Duration) -> Self {
        SlurmExecutor {
            slots: Arc::new(Semaphore::new(max_parallel as usize)),
            poller: Arc::new(Poller {
                jobs: Mutex::new(HashMap::new()),
                wake: Notify::new(),
                started: Mutex::new(false),
                poll_max: poll_max.max(POLL_MIN),
            }),
        }
    }

    /// Submits the job (or finds an earlier session's), tells the engine its id, waits
    /// for its end state, and reads how it ended.
    pub async fn run(
        &self,
        job: Job,
        mut kill: watch::Receiver<StopLevel>,
        on_start: OnStart<'_>,
    ) -> Outcome {
        let Some(req) = job.batch.clone() else {
            return Outcome::bare(Exit::SpawnFailed(
                "a job without Slurm resources reached the Slurm executor".into(),
            ));
        };
        let _slot = self.slots.acquire().await.expect("semaphore never closed");
        let found = match &req.existing {
            Some(Existing::Id(id)) => Some(id.clone()),
            Some(Existing::Named) => match find_by_name(&req.name).await {
                Ok(id) => id,
                Err(e) => return Outcome::bare(Exit::SpawnFailed(e)),
            },
            None => None,
        };
        let id = match found {
            Some(id) => id,
            None if req.existing.is_some() && job.dir.join("stdout.log").exists() => {
                // The job ran and Slurm has forgotten it: collect what it left.
                return collect(&job, None, None, Instant::now()).await;
            }
            None => {
                if *kill.borrow() > StopLevel::Run {
                    return Outcome::bare(Exit::NotStarted);
                }
                match submit(&job, &req).await {
                    Ok(id) => id,
                    Err(e) => return Outcome::bare(Exit::SpawnFailed(e)),
                }
            }
        };
        if let Err(e) = on_start(Started::Batch { job_id: &id }) {
            let _ = scancel(&id).await;
            return Outcome::bare(Exit::SpawnFailed(e));
        }
        let waited = Instant::now();
        let mut state = self.poller.watch(&id);
        let mut watching = true;
        let end = loop {
            if let Some(s) = state.borrow_and_update().clone() {
                if s.is_end() {
                    break s;
                }
            }
            let level = *kill.borrow();
            if level == StopLevel::Detach {
                self.poller.forget(&id);
                return Outcome::bare(Exit::Detached);
            }
            if level == StopLevel::Now {
                self.poller.forget(&id);
                return cancel_and_collect(&job, &id).await;
            }
            tokio::select! {
                r = state.changed() => if r.is_err() { break JobState::Unknown },
                // A closed stop channel means nobody will ask to stop: wait on the job.
                r = kill.changed(), if watching => if r.is_err() { watching = false },
            }
        };
        self.poller.forget(&id);
        collect(&job, Some(&id), Some(end), waited).await
    }
}

/// A job's state as `squeue` prints it, or `Unknown` once Slurm has no record of it.
#[derive(Debug, Clone, PartialEq, Eq)]
enum JobState {
    Named(String),
    Unknown,
}

impl JobState {
    /// True for the states a job does not leave (Slurm's base end states).
    fn is_end(&self) -> bool {
        match self {
            JobState::Unknown => true,
            JobState::Named(s) => END_STATES.contains(&s.as_str()),
        }
    }
}

/// Slurm's end states (a requeued job goes back to PENDING and is waited for again).
const END_STATES: &[&str] = &[
    "COMPLETED",
    "FAILED",
    "TIMEOUT",
    "CANCELLED",
    "NODE_FAIL",
    "PREEMPTED",
    "OUT_OF_MEMORY",
    "BOOT_FAIL",
    "DEADLINE",
    "REVOKED",
    "SPECIAL_EXIT",
];

/// The shared queue watcher: every job in flight, asked about in one `squeue` call.
struct Poller {
    jobs: Mutex<HashMap<String, Watched>>,
    wake: Notify,
    started: Mutex<bool>,
    poll_max: Duration,
}

struct Watched {
    tx: watch::Sender<Option<JobState>>,
    since: Instant,
    missing_since: Option<Instant>,
}

impl Poller {
    /// Starts watching a job (and the polling task, the first time).
    fn watch(self: &Arc<Self>, id: &str) -> watch::Receiver<Option<JobState>> {
        let (tx, rx) = watch::channel(None);
        self.jobs.lock().expect("poller lock").insert(
            id.to_string(),
            Watched {
                tx,
                since: Instant::now(),
                missing_since: None,
            },
        );
        let mut started = self.started.lock().expect("poller lock");
        if !*started {
            *started = true;
            let me = self.clone();
            tokio::spawn(async move { me.poll_forever().await });
        }
        self.wake.notify_one();
        rx
    }

    fn forget(&self, id: &str) {
        self.jobs.lock().expect("poller lock").remove(id);
    }

    async fn poll_forever(self: Arc<Self>) {
        let mut pause = POLL_MIN;
        loop {
            let ids: Vec<String> = self
                .jobs
                .lock()
                .expect("poller lock")
                .keys()
                .cloned()
                .collect();
            if ids.is_empty() {
                self.wake.notified().await;
                pause = POLL_MIN;
                continue;
            }
            let mut seen: HashMap<String, String> = HashMap::new();
            let mut answered = true;
            for chunk in ids.chunks(IDS_PER_QUERY) {
                match squeue_states(chunk).await {
                    Ok(states) => seen.extend(states),
                    Err(e) => {
                        tracing::warn!(error = %e, "squeue failed; asking again later");
                        answered = false;
                    }
                }
            }
            let changed = answered && self.update(&ids, &seen);
            pause = if changed {
                POLL_MIN
            } else {
                (pause.mul_f64(1.5)).min(self.poll_max)
            };
            tokio::select! {
                _ = tokio::time::sleep(pause) => {}
                _ = self.wake.notified() => { pause = POLL_MIN; }
            }
        }
    }

    /// Publishes what `squeue` said; true when any job's state changed.
    fn update(&self, ids: &[String], seen: &HashMap<String, String>) -> bool {
        let mut jobs = self.jobs.lock().expect("poller lock");
        let mut changed = false;
        for id in ids {
            let Some(w) = jobs.get_mut(id) else { continue };
            let state = match seen.get(id) {
                Some(s) => {
                    w.missing_since = None;
                    JobState::Named(s.clone())
                }
                None => {
                    let since = *w.missing_since.get_or_insert_with(Instant::now);
                    if since.elapsed() < MISSING_GRACE || w.since.elapsed() < MISSING_GRACE {
                        continue;
                    }
                    JobState::Unknown
                }
            };
            changed |= w.tx.send_if_modified(|old| {
                if old.as_ref() == Some(&state) {
                    false
                } else {
                    *old = Some(state.clone());
                    true
                }
            });
        }
        changed
    }
}

/// Runs a Slurm command with an argument array and a time limit; its stdout on success.
async fn slurm_command(program: &str, args: &[String]) -> Result<String, String> {
    let mut cmd = Command::new(program);
    cmd.args(args)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .kill_on_drop(true);
    let out = match tokio::time::timeout(COMMAND_LIMIT, cmd.output()).await {
        Err(_) => return Err(format!("{program} did not answer within {COMMAND_LIMIT:?}")),
        Ok(Err(e)) => return Err(format!("cannot run {program}: {e}")),
        Ok(Ok(o)) => o,
    };
    if out.status.success() {
        Ok(String::from_utf8_lossy(&out.stdout).into_owned())
    } else {
        let err = String::from_utf8_lossy(&out.stderr);
        Err(format!(
            "{program} failed ({}): {}",
            out.status,
            err.trim().lines().last().unwrap_or("")
        ))
    }
}

/// The states of the given jobs that Slurm still knows.
async fn squeue_states(ids: &[String]) -> Result<HashMap<String, String>, String> {
    let args = vec![
        "-h".to_string(),
        "-t".into(),
        "all".into(),
        "-j".into(),
        ids.join(","),
        "-o".into(),
        "%i|%T".into(),
    ];
    match slurm_command("squeue", &args).await {
        Ok(text) => Ok(parse_squeue(&text)),
        // Every id unknown: squeue refuses the whole list.
        Err(e) if e.contains("Invalid job id") => Ok(HashMap::new()),
        Err(e) => Err(e),
    }
}

/// `ID|STATE` lines into a map.
fn parse_squeue(text: &str) -> HashMap<String, String> {
    text.lines()
        .filter_map(|l| l.trim().split_once('|'))
        .map(|(id, st)| (id.trim().to_string(), st.trim().to_string()))
        .collect()
}

/// The id of a job with this name, if Slurm has one.
async fn find_by_name(name: &str) -> Result<Option<String>, String> {
    let args = vec![
        "-h".to_string(),
        "-t".into(),
        "all".into(),
        format!("--name={name}"),
        "-o".into(),
        "%i".into(),
    ];
    let text = slurm_command("squeue", &args).await?;
    Ok(text
        .split_whitespace()
        .filter_map(|id| id.parse::<u64>().ok())
        .max()
        .map(|id| id.to_string()))
}

/// `scancel ID` (Slurm answers 0 for an unknown id too).
async fn scancel(id: &str) -> Result<(), String> {
    slurm_command("scancel", &[id.to_string()])
        .await
        .map(|_| ())
}

/// Writes the job script and submits it; the job id.
async fn submit(job: &Job, req: &BatchRequest) -> Result<String, String> {
    let script = job_script(job);
    let path = job.dir.join(SCRIPT_FILE);
    write_executable(&path, &script)
        .map_err(|e| format!("cannot write {}: {e}", path.display()))?;
    let args = sbatch_args(job, req, &path);
    let out = slurm_command("sbatch", &args)
        .await
        .map_err(|e| format!("Slurm refused the job: {e}"))?;
    parse_job_id(&out).ok_or_else(|| format!("sbatch printed no job id: {:?}", out.trim()))
}

fn write_executable(path: &Path, text: &str) -> std::io::Result<()> {
    use std::os::unix::fs::PermissionsExt;
    std::fs::write(path, text)?;
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(0o755))
}

/// The id from `sbatch --parsable` output (`ID` or `ID;CLUSTER`).
fn parse_job_id(out: &str) -> Option<String> {
    let first = out.lines().map(str::trim).find(|l| !l.is_empty())?;
    let id = first.split(';').next()?.trim();
    (!id.is_empty() && id.chars().all(|c| c.is_ascii_digit() || c == '_')).then(|| id.to_string())
}

/// The `sbatch` argument array for a job.
pub fn sbatch_args(job: &Job, req: &BatchRequest, script: &Path) -> Vec<String> {
    let r = &req.resources;
    let mut a = vec![
        "--parsable".to_string(),
        format!("--job-name={}", req.name),
        format!("--chdir={}", job.dir.display()),
        // Relative to --chdir, so that no '%' in the directory is read as a pattern.
        "--output=stdout.log".into(),
        "--error=stderr.log".into(),
        "--export=NIL".into(),
        "--nodes=1".into(),
        "--ntasks=1".into(),
        // tarn's retry policy decides what runs again after a node failure or a
        // preemption, not Slurm's requeue (a campaign's sbatch_args may say --requeue).
        "--no-requeue".into(),
    ];
    a.extend(resource_args(r));
    a.push(script.display().to_string());
    a
}

/// The `sbatch` arguments that carry a job's resources, in the order tarn passes them
/// (the campaign's own `sbatch_args` last, so that they override).
pub fn resource_args(r: &SlurmResources) -> Vec<String> {
    let mut a = Vec::new();
    if let Some(m) = r.time_limit_minutes {
        a.push(format!("--time={m}"));
    }
    if let Some(c) = r.cpus {
        a.push(format!("--cpus-per-task={c}"));
    }
    if let Some(p) = &r.partition {
        a.push(format!("--partition={p}"));
    }
    if let Some(m) = &r.memory {
        a.push(format!("--mem={m}"));
    }
    a.extend(r.sbatch_args.iter().cloned());
    a
}

/// A word in single quotes, safe in any position of a shell command.
pub fn quote(word: &str) -> String {
    format!("'{}'", word.replace('\'', r"'\''"))
}

/// The batch script of a job (see the module doc).
pub fn job_script(job: &Job) -> String {
    let mut env_words = Vec::new();
    for key in ENV_ALLOW {
        if let Some(v) = std::env::var_os(key) {
            env_words.push(quote(&format!("{key}={}", v.to_string_lossy())));
        }
    }
    for (k, v) in &job.env {
        env_words.push(quote(&format!("{k}={v}")));
    }
    let program = job.program.display().to_string();
    // `env` would read a program path holding '=' as one more variable: go through sh.
    let mut command = Vec::new();
    if program.contains('=') {
        command.push(quote("/bin/sh"));
        command.push(quote("-c"));
        command.push(quote(r#"exec "$0" "$@""#));
    }
    command.push(quote(&program));
    command.extend(job.args.iter().map(|a| quote(a)));
    format!(
        r#"#!/bin/bash
# Written by tarn for task {id}: the worker run as a Slurm batch job.
# Every variable part is one single-quoted word; nothing here is built from a shell
# string.
cd {dir} || exit 111
slurm_env=()
for v in $(compgen -e); do
  case "$v" in SLURM_*|SLURMD_*) slurm_env+=("$v=${{!v}}") ;; esac
done
start=$EPOCHREALTIME
/usr/bin/env -i "${{slurm_env[@]}}" \
  {env} \
  {command} </dev/null
status=$?
end=$EPOCHREALTIME
# `times` in this shell, not in a subshell: its second line is the worker's CPU time.
{{ printf 'status=%s\nstart=%s\nend=%s\nnode=%s\n' "$status" "$start" "$end" "${{SLURMD_NODENAME:-$(hostname)}}"; times; }} > {end_file}.tmp
mv -f {end_file}.tmp {end_file}
exit "$status"
"#,
        id = job.id.replace('\n', " "),
        dir = quote(&job.dir.display().to_string()),
        env = env_words.join(" \\\n  "),
        command = command.join(" "),
        end_file = END_FILE,
    )
}

/// What the job script recorded when the worker exited.
#[derive(Debug, Clone, PartialEq)]
struct EndRecord {
    status: i32,
    /// The node the worker ran on.
    node: Option<String>,
    wall: Option<Duration>,
    cpu: Duration,
}

/// Reads `tarn-job.end`; `None` when the worker never finished (or the file is bad).
fn read_end_file(dir: &Path) -> Option<EndRecord> {
    let text = std::fs::read_to_string(dir.join(END_FILE)).ok()?;
    parse_end_file(&text)
}

fn parse_end_file(text: &str) -> Option<EndRecord> {
    let field = |k: &str| {
        text.lines()
            .find_map(|l| l.strip_prefix(k).and_then(|r| r.strip_prefix('=')))
            .map(str::trim)
    };
    let status: i32 = field("status")?.parse().ok()?;
    let secs = |s: &str| s.replace(',', ".").parse::<f64>().ok();
    let wall = match (field("start").and_then(secs), field("end").and_then(secs)) {
        (Some(a), Some(b)) if b >= a => Some(Duration::from_secs_f64(b - a)),
        _ => None,
    };
    // bash's `times`: the shell's user and system time, then its children's.
    let cpu = text
        .lines()
        .rev()
        .find(|l| !l.contains('='))
        .map(|c| c.split_whitespace().filter_map(parse_times).sum())
        .unwrap_or_default();
    let node = field("node").filter(|n| !n.is_empty()).map(String::from);
    Some(EndRecord {
        status,
        node,
        wall,
        cpu,
    })
}

/// One figure of bash's `times`, e.g. `1m2.345s`.
fn parse_times(s: &str) -> Option<Duration> {
    let s = s.strip_suffix('s')?.replace(',', ".");
    let (m, rest) = s.split_once('m')?;
    let v = m.parse::<f64>().ok()? * 60.0 + rest.parse::<f64>().ok()?;
    (v.is_finite() && v >= 0.0).then(|| Duration::from_secs_f64(v))
}

/// What `scontrol -o show job` says about an ended job.
#[derive(Debug, Clone, Default, PartialEq)]
struct JobRecordView {
    state: String,
    reason: String,
    exit_status: Option<i32>,
    exit_signal: Option<i32>,
    run_time: Option<Duration>,
    time_limit: String,
}

async fn scontrol_show(id: &str) -> Option<JobRecordView> {
    let args = vec![
        "-o".to_string(),
        "show".into(),
        "job".into(),
        id.to_string(),
    ];
    let text = slurm_command("scontrol", &args).await.ok()?;
    let view = parse_scontrol(&text);
    (!view.state.is_empty()).then_some(view)
}

/// Picks the fields tarn reads from a one-line `scontrol` job record. Only the first
/// occurrence of each key counts; the keys read come before any path in the record.
fn parse_scontrol(text: &str) -> JobRecordView {
    let line = text.lines().next().unwrap_or("");
    let get = |key: &str| {
        line.split(' ')
            .find_map(|w| w.strip_prefix(key).and_then(|r| r.strip_prefix('=')))
            .unwrap_or("")
            .to_string()
    };
    let (status, signal) = match get("ExitCode").split_once(':') {
        Some((a, b)) => (a.parse().ok(), b.parse().ok()),
        None => (None, None),
    };
    JobRecordView {
        state: get("JobState"),
        reason: get("Reason"),
        exit_status: status,
        exit_signal: signal,
        run_time: slurm_duration(&get("RunTime")),
        time_limit: get("TimeLimit"),
    }
}

/// `[D-]HH:MM:SS` as Slurm prints run times.
fn slurm_duration(s: &str) -> Option<Duration> {
    let (days, rest) = match s.split_once('-') {
        Some((d, r)) => (d.parse::<u64>().ok()?, r),
        None => (0, s),
    };
    let p: Vec<u64> = rest
        .split(':')
        .map(|x| x.parse().ok())
        .collect::<Option<_>>()?;
    let secs = match p.as_slice() {
        [h, m, s] => h * 3600 + m * 60 + s,
        [m, s] => m * 60 + s,
        _ => return None,
    };
    Some(Duration::from_secs(days * 86400 + secs))
}

/// Reads how an ended job went: Slurm's record (if it still has one), the end file,
/// and the output tails.
async fn collect(job: &Job, id: Option<&str>, state: Option<JobState>, waited: Instant) -> Outcome {
    let view = match id {
        Some(id) => scontrol_show(id).await,
        None => None,
    };
    let end = read_end_file(&job.dir);
    let (stdout_tail, stdout_bytes) = tail(&job.dir.join("stdout.log"), job.tail_bytes);
    let (stderr_tail, stderr_bytes) = tail(&job.dir.join("stderr.log"), job.tail_bytes);
    let state_name = view.as_ref().map(|v| v.state.clone()).or(match state {
        Some(JobState::Named(s)) => Some(s),
        _ => None,
    });
    let (exit, detail) = classify(
        id.unwrap_or("?"),
        state_name.as_deref(),
        view.as_ref(),
        end.as_ref(),
    );
    let wall = end
        .as_ref()
        .and_then(|e| e.wall)
        .or(view.as_ref().and_then(|v| v.run_time))
        .unwrap_or_else(|| waited.elapsed());
    Outcome {
        exit,
        wall,
        host: end.as_ref().and_then(|e| e.node.clone()),
        cpu: end.map(|e| e.cpu).unwrap_or_default(),
        stdout_tail,
        stderr_tail,
        stdout_bytes,
        stderr_bytes,
        detail,
    }
}

/// Maps a job's end to tarn's [`Exit`], with a sentence when Slurm's state says more
/// than an exit status.
fn classify(
    id: &str,
    state: Option<&str>,
    view: Option<&JobRecordView>,
    end: Option<&EndRecord>,
) -> (Exit, Option<String>) {
    let reason = view
        .map(|v| v.reason.as_str())
        .filter(|r| !r.is_empty() && *r != "None")
        .map(|r| format!(", reason {r}"))
        .unwrap_or_default();
    // The worker's own status, decoded as bash reports a signal death (128 + signal).
    let worker_exit = |status: i32| match status {
        129..=192 => Exit::Signal(status - 128),
        s => Exit::Code(s),
    };
    match state {
        Some("COMPLETED") => (end.map(|e| worker_exit(e.status)).unwrap_or(Exit::Code(0)), None),
        Some("FAILED") => {
            let exit = match (end, view) {
                (Some(e), _) => worker_exit(e.status),
                (None, Some(v)) if v.exit_signal.unwrap_or(0) != 0 => {
                    Exit::Signal(v.exit_signal.unwrap_or(0))
                }
                (None, Some(v)) => Exit::Code(v.exit_status.unwrap_or(1)),
                (None, None) => Exit::Code(1),
            };
            (exit, None)
        }
        Some("TIMEOUT") => {
            let limit = view
                .map(|v| v.time_limit.as_str())
                .filter(|l| !l.is_empty())
                .map(|l| format!("its time limit of {l}"))
                .unwrap_or_else(|| "its time limit".into());
            (
                Exit::TimedOut,
                Some(format!(
                    "the Slurm job {id} ran past {limit} and was ended by Slurm (state TIMEOUT)"
                )),
            )
        }
        Some(s @ ("CANCELLED" | "NODE_FAIL" | "PREEMPTED" | "OUT_OF_MEMORY" | "BOOT_FAIL"
        | "DEADLINE" | "REVOKED" | "SPECIAL_EXIT")) => {
            let what = match s {
                "CANCELLED" => "was cancelled outside tarn (scancel, or an administrator)",
                "NODE_FAIL" => "was lost with its node",
                "PREEMPTED" => "was preempted",
                "OUT_OF_MEMORY" => "ran out of memory (raise `memory` in its slurm table)",
                "BOOT_FAIL" => "could not start: its node failed to boot",
                "DEADLINE" => "missed its deadline",
                _ => "was ended by Slurm",
            };
            (
                Exit::Ended(s.to_string()),
                Some(format!("the Slurm job {id} {what} (state {s}{reason})")),
            )
        }
        _ => match end {
            // Slurm has forgotten the job, but the worker finished and said how.
            Some(e) => (worker_exit(e.status), None),
            None => (
                Exit::Ended("UNKNOWN".into()),
                Some(format!(
                    "the Slurm job {id} is no longer known to Slurm and left no exit record in its task directory"
                )),
            ),
        },
    }
}

/// Cancels a job tarn was asked to end now, waits (briefly) for its end, collects it.
async fn cancel_and_collect(job: &Job, id: &str) -> Outcome {
    let t = Instant::now();
    let _ = scancel(id).await;
    while t.elapsed() < CANCEL_WAIT {
        match squeue_states(&[id.to_string()]).await {
            Ok(s) if s.get(id).is_none_or(|st| END_STATES.contains(&st.as_str())) => break,
            _ => tokio::time::sleep(POLL_MIN).await,
        }
    }
    let mut out = collect(job, Some(id), None, t).await;
    out.exit = Exit::Cancelled;
    out.detail = Some(format!("the Slurm job {id} was cancelled by tarn"));
    out
}

/// The last `limit` bytes of a file as text, and the file's size.
fn tail(path: &Path, limit: usize) -> (String, u64) {
    use std::io::{Read, Seek, SeekFrom};
    let Ok(mut f) = std::fs::File::open(path) else {
        return (String::new(), 0);
    };
    let size = f.metadata().map(|m| m.len()).unwrap_or(0);
    let from = size.saturating_sub(limit as u64);
    if f.seek(SeekFrom::Start(from)).is_err() {
        return (String::new(), size);
    }
    let mut buf = Vec::with_capacity(limit.min(size as usize));
    let _ = f.take(limit as u64).read_to_end(&mut buf);
    (String::from_utf8_lossy(&buf).into_owned(), size)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quoting_survives_every_shell_metacharacter() {
        let nasty = "a'b\"c$(rm -rf /)`x`;|&<>*?\\\n\t ";
        let script = format!("printf '%s' {}", quote(nasty));
        let out = std::process::Command::new("/bin/bash")
            .args(["-c", &script])
            .output()
            .unwrap();
        assert_eq!(String::from_utf8_lossy(&out.stdout), nasty);
    }

    #[test]
    fn job_ids_and_queue_lines_parse() {
        assert_eq!(parse_job_id("123\n").as_deref(), Some("123"));
        assert_eq!(parse_job_id("77;cluster\n").as_deref(), Some("77"));
        assert_eq!(parse_job_id("sbatch: error\n"), None);
        let m = parse_squeue("12|RUNNING\n13|COMPLETED\n");
        assert_eq!(m["12"], "RUNNING");
        assert_eq!(m["13"], "COMPLETED");
    }

    #[test]
    fn scontrol_fields_and_end_states_map_to_exits() {
        // A line as Slurm 22.05 prints it for `exit 3` (shortened).
        let v = parse_scontrol("JobId=1 JobName=j.sh JobState=FAILED Reason=NonZeroExitCode Dependency=(null) ExitCode=3:0 RunTime=00:01:27 TimeLimit=00:01:00 WorkDir=/a b");
        assert_eq!(v.state, "FAILED");
        assert_eq!((v.exit_status, v.exit_signal), (Some(3), Some(0)));
        assert_eq!(v.run_time, Some(Duration::from_secs(87)));
        assert_eq!(
            classify("1", Some("FAILED"), Some(&v), None).0,
            Exit::Code(3)
        );
        let killed = JobRecordView {
            exit_status: Some(0),
            exit_signal: Some(9),
            ..v.clone()
        };
        assert_eq!(
            classify("1", Some("FAILED"), Some(&killed), None).0,
            Exit::Signal(9)
        );
        assert_eq!(
            classify("1", Some("TIMEOUT"), Some(&v), None).0,
            Exit::TimedOut
        );
        let (e, d) = classify("1", Some("CANCELLED"), Some(&v), None);
        assert_eq!(e, Exit::Ended("CANCELLED".into()));
        assert!(d.unwrap().contains("cancelled outside tarn"));
        let end = EndRecord {
            status: 137,
            node: None,
            wall: None,
            cpu: Duration::ZERO,
        };
        assert_eq!(classify("1", None, None, Some(&end)).0, Exit::Signal(9));
        assert_eq!(
            classify("1", None, None, None).0,
            Exit::Ended("UNKNOWN".into())
        );
    }

    #[test]
    fn the_end_file_gives_status_wall_and_cpu() {
        let e = parse_end_file(
            "status=0\nstart=100.25\nend=101.75\nnode=n17\n0m0.010s 0m0.000s\n1m0.500s 0m0.250s\n",
        )
        .unwrap();
        assert_eq!(e.status, 0);
        assert_eq!(e.node.as_deref(), Some("n17"));
        assert_eq!(e.wall, Some(Duration::from_millis(1500)));
        assert_eq!(e.cpu, Duration::from_millis(60_750));
        assert_eq!(
            slurm_duration("1-00:00:05"),
            Some(Duration::from_secs(86405))
        );
    }
}
