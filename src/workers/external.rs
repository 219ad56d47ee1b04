//! The process side of an external energy model: start the user's program once per
//! worker, talk to it through the physics crate's framing over its pipes, and end it
//! when the worker is done.

use std::process::{Child, ChildStdin, ChildStdout, Command, Stdio};
use std::time::{Duration, Instant};

use crate::physics::external::ExternalClient;
use crate::physics::{EnergyError, EnergyModel};

/// A running external energy program, usable as an energy model.
pub struct ExternalProcess {
    client: Option<ExternalClient<ChildStdout, ChildStdin>>,
    child: Child,
    dim: usize,
    /// Where the program's standard error lands (the task's `stderr.log`), named in
    /// errors: a program that died says why there, not on the pipe.
    stderr_log: Option<std::path::PathBuf>,
}

impl ExternalProcess {
    /// Starts `command` (an argument array, never a shell line) for configurations of
    /// `dim` coordinates. Its standard error goes to the worker's, so that it lands in
    /// the task's `stderr.log`.
    pub fn start(
        command: &[String],
        dim: usize,
        particle_dims: Option<usize>,
    ) -> Result<Self, String> {
        let (program, args) = command.split_first().ok_or("system.command is empty")?;
        let mut child = Command::new(program)
            .args(args)
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::inherit())
            .spawn()
            .map_err(|e| format!("cannot start the energy program {program}: {e}"))?;
        let stdin = child.stdin.take().expect("piped");
        let stdout = child.stdout.take().expect("piped");
        let client = ExternalClient::new(stdout, stdin, dim).with_particle_dims(particle_dims);
        Ok(ExternalProcess {
            client: Some(client),
            child,
            dim,
            stderr_log: std::env::var_os("TARN_TASK_DIR")
                .map(|d| std::path::PathBuf::from(d).join("stderr.log")),
        })
    }
}

impl EnergyModel for ExternalProcess {
    fn dim(&self) -> usize {
        self.dim
    }

    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        match &self.client {
            Some(c) => c
                .evaluate(x, energy, forces)
                .map_err(|e| with_stderr_log(e, self.stderr_log.as_deref())),
            None => Err(EnergyError::External(
                "the energy program was already stopped".into(),
            )),
        }
    }

    fn particle_dims(&self) -> Option<usize> {
        self.client.as_ref().and_then(|c| c.particle_dims())
    }
}

/// Names the program's stderr log in an error of the program itself (a closed pipe,
/// bad framing, a reported failure), where its own words about the cause are.
fn with_stderr_log(e: EnergyError, log: Option<&std::path::Path>) -> EnergyError {
    match (e, log) {
        (EnergyError::External(m), Some(log)) => EnergyError::External(format!(
            "{m}; the energy program's standard error is in {}",
            log.display()
        )),
        (e, _) => e,
    }
}

impl Drop for ExternalProcess {
    /// Closes the program's input (its signal to exit), waits up to 5 s, then kills it.
    fn drop(&mut self) {
        if let Some(c) = self.client.take() {
            drop(c.into_inner());
        }
        let t = Instant::now();
        while t.elapsed() < Duration::from_secs(5) {
            if let Ok(Some(_)) = self.child.try_wait() {
                return;
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
