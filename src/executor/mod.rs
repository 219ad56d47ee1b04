//! Executors run one worker command in one task directory and report how it ended.
//!
//! Owns: starting processes, their environment, their output tails, timeouts and
//! cancellation, wall and CPU time. Must not touch: the store, the protocol's files,
//! the campaign file. The engine decides what runs; an executor only runs it.
//!
//! Two implementations share the [`Job`] → [`Outcome`] contract: `local` (processes on
//! this machine) and `slurm` (one batch job per task, see [`slurm`]). [`Executor`] is
//! the one the engine holds. Both call the engine back once a job is under way
//! ([`Started`]), so that a batch job's id is in the store before tarn waits for it.

pub mod local;
pub mod slurm;

use std::path::PathBuf;
use std::time::Duration;

pub use local::LocalExecutor;
pub use slurm::SlurmExecutor;

use crate::engine::StopLevel;
use crate::spec::ExecutorSpec;

/// Environment variables passed through to workers (everything else is dropped).
pub const ENV_ALLOW: &[&str] = &[
    "PATH",
    "HOME",
    "LANG",
    "LC_ALL",
    "TZ",
    "TMPDIR",
    "PYTHONPATH",
    "VIRTUAL_ENV",
    "RUST_LOG",
    "RUST_BACKTRACE",
];

/// One process to run.
#[derive(Debug, Clone)]
pub struct Job {
    /// A readable id for messages (the task id).
    pub id: String,
    pub program: PathBuf,
    pub args: Vec<String>,
    /// The task directory: the working directory of the process.
    pub dir: PathBuf,
    /// Extra environment variables (TARN_*, thread counts), added to the allow-list.
    pub env: Vec<(String, String)>,
    pub timeout: Duration,
    /// Time between SIGTERM and SIGKILL when a job is ended.
    pub grace: Duration,
    /// Bytes of stdout and of stderr kept in memory (the tail).
    pub tail_bytes: usize,
    /// Bytes of stdout and of stderr written to `stdout.log` / `stderr.log` in the task
    /// directory; the rest is counted and dropped.
    pub log_bytes: u64,
    /// What a batch job asks for; `None` for a local process.
    pub batch: Option<slurm::BatchRequest>,
}

/// How a job got under way, told to the engine before the executor waits for it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Started<'a> {
    /// A local process is about to start.
    Process,
    /// The batch system accepted the job (or an earlier session's job was found) under
    /// this id.
    Batch { job_id: &'a str },
}

/// The engine's callback for [`Started`]; an error stops the job (a batch job is
/// cancelled) and becomes [`Exit::SpawnFailed`].
pub type OnStart<'a> = Box<dyn FnOnce(Started<'_>) -> Result<(), String> + Send + 'a>;

/// How a process ended.
#[derive(Debug, Clone, PartialEq)]
pub enum Exit {
    /// Exited with this status code.
    Code(i32),
    /// Killed by this signal (not by tarn).
    Signal(i32),
    /// Ran past its timeout and was ended by tarn.
    TimedOut,
    /// Ended by tarn because the user asked to stop now.
    Cancelled,
    /// Never started: the user asked to stop before a slot was free.
    NotStarted,
    /// Could not be started.
    SpawnFailed(String),
    /// tarn stopped waiting and left the job to the batch system (the user chose not to
    /// cancel it); a resumed tarn re-attaches to it.
    Detached,
    /// The batch system ended the job for a reason of its own: the Slurm state, e.g.
    /// `CANCELLED` (by someone else), `NODE_FAIL`, `PREEMPTED`, `OUT_OF_MEMORY`, or
    /// `UNKNOWN` when Slurm forgot the job and it left no exit record.
    Ended(String),
}

/// What an executor reports back.
#[derive(Debug, Clone)]
pub struct Outcome {
    pub exit: Exit,
    pub wall: Duration,
    /// User plus system CPU time of the process and the children it waited for.
    pub cpu: Duration,
    pub stdout_tail: String,
    pub stderr_tail: String,
    pub stdout_bytes: u64,
    pub stderr_bytes: u64,
    /// The executor's own sentence about how the job ended, when it knows more than the
    /// exit status says (a batch system's state and reason).
    pub detail: Option<String>,
    /// The host the job ran on, when it is not this one (a batch job's node).
    pub host: Option<String>,
}

impl Outcome {
    /// An outcome with no output, no time and no detail.
    pub fn bare(exit: Exit) -> Outcome {
        Outcome {
            exit,
            wall: Duration::ZERO,
            cpu: Duration::ZERO,
            stdout_tail: String::new(),
            stderr_tail: String::new(),
            stdout_bytes: 0,
            stderr_bytes: 0,
            detail: None,
            host: None,
        }
    }
}

/// The executor a campaign runs with.
#[derive(Clone)]
pub enum Executor {
    Local(LocalExecutor),
    Slurm(SlurmExecutor),
}

impl Executor {
    /// The executor `spec` describes, with its parallelism bound.
    pub fn for_spec(spec: &ExecutorSpec) -> Executor {
        match &spec.slurm {
            Some(s) => Executor::Slurm(SlurmExecutor::new(spec.max_parallel, s.poll_max)),
            None => Executor::Local(LocalExecutor::new(spec.max_parallel)),
        }
    }

    /// True when jobs live outside tarn (a batch system) and survive it.
    pub fn is_batch(&self) -> bool {
        matches!(self, Executor::Slurm(_))
    }

    /// Runs one job to its end (or until the stop level says otherwise). `on_start` is
    /// called once, when the job is under way and before the executor waits for it.
    pub async fn run(
        &self,
        job: Job,
        kill: watch::Receiver<StopLevel>,
        on_start: OnStart<'_>,
    ) -> Outcome {
        match self {
            Executor::Local(l) => l.run(job, kill, on_start).await,
            Executor::Slurm(s) => s.run(job, kill, on_start).await,
        }
    }
}

use tokio::sync::watch;
