//! Executors run one worker command in one task directory and report how it ended.
//!
//! Owns: starting processes, their environment, their output tails, timeouts and
//! cancellation, wall and CPU time. Must not touch: the store, the protocol's files,
//! the campaign file. The engine decides what runs; an executor only runs it.
//!
//! `local` is the one implementation in this build; a cluster executor implements the
//! same [`Job`] → [`Outcome`] contract.

pub mod local;

use std::path::PathBuf;
use std::time::Duration;

pub use local::LocalExecutor;

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
}

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
}
