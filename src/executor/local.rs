//! The local executor: worker processes on this machine, bounded by a semaphore.
//!
//! Each worker gets its own process group, so that a timeout or a cancel ends the
//! worker and everything it started (SIGTERM to the group, a grace period, SIGKILL). On
//! Linux the worker also gets a parent-death signal, so that killing tarn itself (even
//! with SIGKILL) does not leave workers running. The process is reaped with `wait4`, which
//! reports its CPU time.

use std::io::Read;
use std::os::unix::process::CommandExt;
use std::process::{Command, Stdio};
use std::sync::Arc;
use std::time::{Duration, Instant};

use nix::sys::signal::{killpg, Signal};
use nix::unistd::Pid;
use tokio::sync::{oneshot, watch, Semaphore};

use super::{Exit, Job, OnStart, Outcome, Started, ENV_ALLOW};
use crate::engine::StopLevel;

/// Runs jobs as local processes, at most `max_parallel` at a time.
#[derive(Clone)]
pub struct LocalExecutor {
    slots: Arc<Semaphore>,
}

/// The engine's stop level: jobs not yet started do not start once it is raised, and
/// running jobs are ended when it reaches [`StopLevel::Now`].
pub type KillSwitch = watch::Receiver<StopLevel>;

impl LocalExecutor {
    pub fn new(max_parallel: u32) -> Self {
        LocalExecutor {
            slots: Arc::new(Semaphore::new(max_parallel as usize)),
        }
    }

    /// Runs one job to its end (or its timeout, or a kill request). `on_start` is called
    /// once the job has a slot and is about to start.
    pub async fn run(&self, job: Job, mut kill: KillSwitch, on_start: OnStart<'_>) -> Outcome {
        let _slot = self.slots.acquire().await.expect("semaphore never closed");
        if *kill.borrow() > StopLevel::Run {
            return Outcome::bare(Exit::NotStarted);
        }
        if let Err(e) = on_start(Started::Process) {
            return Outcome::bare(Exit::SpawnFailed(e));
        }
        let started = Instant::now();
        let mut child = match spawn(&job) {
            Ok(c) => c,
            Err(e) => {
                return Outcome {
                    wall: started.elapsed(),
                    ..Outcome::bare(Exit::SpawnFailed(format!(
                        "cannot start {}: {e}",
                        job.program.display()
                    )))
                }
            }
        };
        let pid = child.id() as i32;
        let out = drain(
            child.stdout.take().expect("piped"),
            job.dir.join("stdout.log"),
            job.tail_bytes,
            job.log_bytes,
        );
        let err = drain(
            child.stderr.take().expect("piped"),
            job.dir.join("stderr.log"),
            job.tail_bytes,
            job.log_bytes,
        );
        let (tx, mut exited) = oneshot::channel();
        std::thread::spawn(move || {
            let _ = tx.send(wait4(pid));
            // The std Child is dropped without waiting: wait4 has reaped it.
            drop(child);
        });
        let deadline = tokio::time::sleep(job.timeout);
        tokio::pin!(deadline);
        let mut ended_by_us: Option<Exit> = None;
        let mut watching = true;
        let status = loop {
            tokio::select! {
                r = &mut exited => break r.unwrap_or((None, None, Duration::ZERO)),
                _ = &mut deadline, if ended_by_us.is_none() => {
                    ended_by_us = Some(Exit::TimedOut);
                    end_group(pid, job.grace);
                }
                changed = kill.changed(), if watching && ended_by_us.is_none() => {
                    if changed.is_err() {
                        watching = false;
                    } else if *kill.borrow() == StopLevel::Now {
                        ended_by_us = Some(Exit::Cancelled);
                        end_group(pid, job.grace);
                    }
                }
            }
        };
        // The worker is gone; end anything it left behind in its group.
        let _ = killpg(Pid::from_raw(pid), Signal::SIGKILL);
        let (code, signal, cpu) = status;
        // A process that left the group (setsid) may still hold the pipes open: give the
        // readers a moment, then go on with what they have.
        let (stdout_tail, stdout_bytes) = out.recv_timeout(PIPE_GRACE).unwrap_or_default();
        let (stderr_tail, stderr_bytes) = err.recv_timeout(PIPE_GRACE).unwrap_or_default();
        let exit = match (ended_by_us, code, signal) {
            (Some(e), _, _) => e,
            (None, Some(c), _) => Exit::Code(c),
            (None, None, Some(s)) => Exit::Signal(s),
            (None, None, None) => Exit::SpawnFailed("lost track of the process".into()),
        };
        Outcome {
            exit,
            wall: started.elapsed(),
            cpu,
            stdout_tail,
            stderr_tail,
            stdout_bytes,
            stderr_bytes,
            detail: None,
            host: None,
        }
    }
}

/// Starts the process in its own group with an allow-listed environment.
fn spawn(job: &Job) -> std::io::Result<std::process::Child> {
    let mut cmd = Command::new(&job.program);
    cmd.args(&job.args)
        .current_dir(&job.dir)
        .env_clear()
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .process_group(0);
    for key in ENV_ALLOW {
        if let Some(v) = std::env::var_os(key) {
            cmd.env(key, v);
        }
    }
    for (k, v) in &job.env {
        cmd.env(k, v);
    }
    // SAFETY: the closure runs in the child between fork and exec and calls only
    // prctl(2), which is async-signal-safe.
    #[cfg(target_os = "linux")]
    unsafe {
        cmd.pre_exec(|| {
            nix::sys::prctl::set_pdeathsig(Signal::SIGKILL).map_err(std::io::Error::from)?;
            Ok(())
        });
    }
    cmd.spawn()
}

/// Waits for the process and returns its exit code or signal, and its CPU time.
fn wait4(pid: i32) -> (Option<i32>, Option<i32>, Duration) {
    let mut status: nix::libc::c_int = 0;
    let mut usage = std::mem::MaybeUninit::<nix::libc::rusage>::zeroed();
    loop {
        // SAFETY: wait4 writes into the two out-pointers, both valid for writes.
        let r = unsafe { nix::libc::wait4(pid, &mut status, 0, usage.as_mut_ptr()) };
        if r == pid {
            break;
        }
        if r == -1 && std::io::Error::last_os_error().raw_os_error() == Some(nix::libc::EINTR) {
            continue;
        }
        return (None, None, Duration::ZERO);
    }
    // SAFETY: wait4 succeeded and filled `usage`.
    let usage = unsafe { usage.assume_init() };
    let tv = |t: nix::libc::timeval| Duration::new(t.tv_sec as u64, (t.tv_usec as u32) * 1000);
    let cpu = tv(usage.ru_utime) + tv(usage.ru_stime);
    if nix::libc::WIFEXITED(status) {
        (Some(nix::libc::WEXITSTATUS(status)), None, cpu)
    } else if nix::libc::WIFSIGNALED(status) {
        (None, Some(nix::libc::WTERMSIG(status)), cpu)
    } else {
        (None, None, cpu)
    }
}

/// Sends SIGTERM to the group, then SIGKILL after the grace period, off the runtime.
fn end_group(pid: i32, grace: Duration) {
    let group = Pid::from_raw(pid);
    let _ = killpg(group, Signal::SIGTERM);
    std::thread::spawn(move || {
        std::thread::sleep(grace);
        let _ = killpg(group, Signal::SIGKILL);
    });
}

/// Reads a pipe to its end on a thread: keeps the last `tail` bytes in memory and the
/// first `log_limit` bytes in a log file, and counts everything.
fn drain(
    mut pipe: impl Read + Send + 'static,
    log_path: std::path::PathBuf,
    tail: usize,
    log_limit: u64,
) -> std::sync::mpsc::Receiver<(String, u64)> {
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        use std::io::Write;
        let mut log = std::fs::File::create(&log_path).ok();
        let mut kept: std::collections::VecDeque<u8> = std::collections::VecDeque::new();
        let mut total = 0u64;
        let mut buf = [0u8; 16 * 1024];
        loop {
            let n = match pipe.read(&mut buf) {
                Ok(0) | Err(_) => break,
                Ok(n) => n,
            };
            if let Some(f) = log.as_mut() {
                let room = log_limit.saturating_sub(total) as usize;
                let _ = f.write_all(&buf[..n.min(room)]);
            }
            total += n as u64;
            kept.extend(&buf[..n]);
            if kept.len() > tail {
                let excess = kept.len() - tail;
                kept.drain(..excess);
            }
        }
        let bytes: Vec<u8> = kept.into_iter().collect();
        let _ = tx.send((String::from_utf8_lossy(&bytes).into_owned(), total));
    });
    rx
}

/// How long output readers may take after the worker's group was ended.
const PIPE_GRACE: Duration = Duration::from_secs(2);
