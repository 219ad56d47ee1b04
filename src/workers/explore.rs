//! Built-in explore workers: configuration-space samplers over the system's energy.

use super::{Output, Task};
use crate::protocol::Array;

/// The `hold` kind: the walker stays where it is and reports its start configuration
/// and its energy as its one sample. It exists for testing the engine and measuring
/// its overhead: a real worker through the real protocol that does almost nothing.
pub fn hold(task: &Task) -> Result<Output, String> {
    let (_, model) = task.model()?;
    let start = task.input("start")?;
    let n = start.rows();
    let mut energies = vec![0.0; n];
    model
        .evaluate(&start.data, &mut energies, None)
        .map_err(|e| e.to_string())?;
    let mut out = Output {
        energy_evals: n as u64,
        ..Default::default()
    };
    out.arrays.insert("samples".into(), start);
    out.arrays
        .insert("energies".into(), Array::vector(energies));
    Ok(out)
}

/// The `metropolis` kind (see the physics crate's explorers).
pub fn metropolis(_task: &Task) -> Result<Output, String> {
    Err("metropolis is not wired in this build yet".into())
}

/// The `langevin` kind (see the physics crate's explorers).
pub fn langevin(_task: &Task) -> Result<Output, String> {
    Err("langevin is not wired in this build yet".into())
}
