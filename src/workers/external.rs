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
            Some(c) => c.evaluate(x, energy, forces),
            None => Err(EnergyError::External(
                "the energy program was already stopped".into(),
            )),
        }
    }

    fn particle_dims(&self) -> Option<usize> {
        self.client.as_ref().and_then(|c| c.particle_dims())
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
