//! The status snapshot: a small JSON file the running engine rewrites (temporary file,
//! then rename) so that `tarn status` works while sled's lock keeps the store closed to
//! other processes.
//!
//! Owns: `STATE/NAME/status.json` and `STATE/NAME/tables.json`. Must not touch: the store.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// What the engine is doing, as far as another process needs to know.
#[derive(Debug, Clone, Serialize, Deserialize, Default, PartialEq)]
pub struct Snapshot {
    pub campaign: String,
    pub pid: u32,
    pub host: String,
    /// `running`, `interrupted`, `failed`, `finished`.
    pub phase: String,
    pub started_unix: f64,
    pub updated_unix: f64,
    pub round: u32,
    pub max_rounds: u32,
    pub stage: String,
    pub tasks_running: Vec<String>,
    pub tasks_done_this_round: u32,
    pub tasks_this_round: u32,
    pub rounds_done: u32,
    pub states: u32,
    pub energy_evals: u64,
    pub message: String,
}

/// Path of the snapshot file.
pub fn path(dir: &Path) -> PathBuf {
    dir.join("status.json")
}

/// Path of the tables file (rounds and states as the read commands print them).
pub fn tables_path(dir: &Path) -> PathBuf {
    dir.join("tables.json")
}

/// Writes `value` as JSON to `path` atomically (temporary file, then rename).
pub fn write_json<T: Serialize>(path: &Path, value: &T) -> std::io::Result<()> {
    let tmp = path.with_extension("json.tmp");
    std::fs::write(
        &tmp,
        serde_json::to_vec_pretty(value).map_err(std::io::Error::other)?,
    )?;
    std::fs::rename(tmp, path)
}

/// Reads the snapshot, if there is one.
pub fn read(dir: &Path) -> Option<Snapshot> {
    let text = std::fs::read_to_string(path(dir)).ok()?;
    serde_json::from_str(&text).ok()
}

/// Whether a process with this pid exists on this machine.
pub fn pid_alive(pid: u32) -> bool {
    pid != 0 && nix::sys::signal::kill(nix::unistd::Pid::from_raw(pid as i32), None).is_ok()
}

/// " (pid N on HOST, running round R)" for messages about a locked store, or "".
pub fn holder_text(dir: &Path) -> String {
    match read(dir) {
        Some(s) if s.phase == "running" => format!(
            " (pid {} on {}, running round {}{})",
            s.pid,
            s.host,
            s.round,
            if pid_alive(s.pid) {
                ""
            } else {
                "; that pid is not alive here"
            }
        ),
        _ => String::new(),
    }
}
