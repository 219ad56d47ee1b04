//! Worker protocol, version 1: the complete contract between tarn and a worker.
//!
//! Owns: the shapes of `task.json` and `out/result.json`, the input and output arrays of
//! each stage role, and the validation of everything a worker hands back.
//! Must not touch: the store (the engine commits what this module has validated) and
//! processes (the executor runs workers).
//!
//! # How a task runs
//!
//! For every task tarn makes a fresh task directory, writes `task.json` and the input
//! arrays under `in/`, creates an empty `out/`, and starts the worker with its working
//! directory set to the task directory and the environment variable `TARN_TASK` set to
//! the absolute path of `task.json`. The worker writes its arrays under `out/`, then
//! `out/result.json`, and exits with status 0. Anything else — a non-zero exit, a
//! signal, a missing or malformed `result.json`, an array of the wrong shape — is a
//! failed attempt, retried by the campaign's retry policy.
//!
//! The environment of a worker is an allow-list: `PATH`, `HOME`, `LANG`, `LC_ALL`, `TZ`,
//! `TMPDIR`, `PYTHONPATH`, `VIRTUAL_ENV`, `RUST_LOG`, plus `TARN_TASK`, `TARN_TASK_DIR`,
//! `TARN_SEED`, and the thread settings `RAYON_NUM_THREADS`, `OMP_NUM_THREADS`,
//! `OPENBLAS_NUM_THREADS` and `MKL_NUM_THREADS` (all set to the campaign's
//! `threads_per_task`, so that results are reproducible).
//!
//! # `task.json`
//!
//! ```json
//! {
//!   "protocol": 1,
//!   "task_id": "r0002.explore.hot.w001",
//!   "campaign": "ridge-walk",
//!   "round": 2,
//!   "stage": "hot",
//!   "role": "explore",
//!   "kind": "langevin",
//!   "walker": 1,
//!   "walkers": 3,
//!   "seed": 9245118021344501234,
//!   "kT": 10.0,
//!   "threads": 1,
//!   "system": { "model": "muller-brown" },
//!   "params": { "n_steps": 2000 },
//!   "inputs": { "start": "in/start.npy" },
//!   "model": "in/model.safetensors"
//! }
//! ```
//!
//! * `role` is one of `explore`, `dedup`, `retrain`, `evaluate`; `stage` is the stage's
//!   name from the campaign file; `kind` is the built-in kind or `null` for a command.
//! * `seed` is a 64-bit unsigned integer derived from the campaign seed and the task id;
//!   every attempt of a task gets the same seed, so a retried task gives the same result.
//!   (JSON readers that parse numbers as doubles lose the low bits of large integers;
//!   Python's `json` does not.)
//! * `params` is the stage's `params` table from the campaign file, unchanged.
//! * `system` is the campaign's `[system]` table.
//! * `inputs` maps array names to paths relative to the task directory; `model` is the
//!   current flow model or `null` before the first retrain.
//!
//! Input arrays per role (all `.npy`, float64, C order; `dim` is the system's dimension):
//!
//! | role | inputs |
//! | --- | --- |
//! | explore | `start` `[m, dim]`: this walker's start configurations (m ≥ 1) |
//! | dedup | `samples` `[n, dim]` and `energies` `[n]`: every sample of this round's explore stages, in stage then walker then sample order; `catalogue` `[k, dim]` and `catalogue_energies` `[k]`: the known states' minima in id order (k may be 0) |
//! | retrain | `train` `[n, dim]` and `train_energies` `[n]`: the pooled training set of all rounds so far |
//! | evaluate | `samples`, `energies` (this round's, as for dedup), `catalogue`, `catalogue_energies` (after this round's dedup) |
//!
//! # `out/result.json`
//!
//! ```json
//! {
//!   "protocol": 1,
//!   "status": "ok",
//!   "outputs": { "samples": "out/samples.npy", "energies": "out/energies.npy" },
//!   "metrics": { "acceptance": 0.31 },
//!   "energy_evals": 20000,
//!   "model": null
//! }
//! ```
//!
//! * `status` is `"ok"`, or `"failed"` with a `message` string (the attempt then fails
//!   and the message is shown to the user).
//! * `outputs` maps output names to paths relative to the task directory. A path must
//!   stay inside the task directory: absolute paths, `..` components and symbolic links
//!   that lead outside are refused.
//! * `metrics` maps names to finite numbers (or `null`); they appear in `tarn rounds`.
//!   They must not depend on timing: they are part of the campaign's digest.
//! * `energy_evals` is the number of energy evaluations the worker made (a
//!   non-negative integer); it is the campaign's main cost measure.
//! * `model` is the path of a new flow model file (retrain only) or `null`.
//!
//! Output arrays per role (`n` below is the number of input samples):
//!
//! | role | required outputs | optional outputs |
//! | --- | --- | --- |
//! | explore | `samples` `[n, dim]`, `energies` `[n]` (finite) | `log_weights` `[n]` (finite): log importance weights of biased explorers |
//! | dedup | `labels` `[n]`: integers in `-1..k+m`, where `0..k` are the known states in id order, `k..k+m` the new ones, and `-1` a sample assigned to no state (e.g. its quench did not converge); `new_states` `[m, dim]` and `new_energies` `[m]` (finite) | `keep` `[n]` of 0/1: samples chosen for the training set (all kept if absent) |
//! | retrain | `model` (the top-level field) | — |
//! | evaluate | — | `free_energy` `[k]` and `free_energy_err` `[k]` in kT (finite, or NaN for a state not estimated) |
//!
//! Unknown fields in `result.json` are refused, so that a typing mistake in a worker is
//! caught at once rather than silently ignored.

pub mod npy;

use std::collections::BTreeMap;
use std::path::{Component, Path, PathBuf};

use serde::{Deserialize, Serialize};

pub use npy::Array;

/// The protocol version this build of tarn speaks.
pub const PROTOCOL_VERSION: u32 = 1;

/// The largest output array tarn reads (1 GiB); larger files are refused.
pub const MAX_ARRAY_BYTES: u64 = 1 << 30;

/// The largest `result.json` tarn reads.
pub const MAX_RESULT_BYTES: u64 = 16 << 20;

/// The four stage roles of a round, in the order they run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Role {
    Explore,
    Dedup,
    Retrain,
    Evaluate,
}

impl Role {
    /// The role's name as it appears in task ids, `task.json` and tables.
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Explore => "explore",
            Role::Dedup => "dedup",
            Role::Retrain => "retrain",
            Role::Evaluate => "evaluate",
        }
    }
}

impl std::fmt::Display for Role {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// The contents of `task.json`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct TaskFile {
    pub protocol: u32,
    pub task_id: String,
    pub campaign: String,
    pub round: u32,
    pub stage: String,
    pub role: Role,
    pub kind: Option<String>,
    pub walker: u32,
    pub walkers: u32,
    pub seed: u64,
    #[serde(rename = "kT")]
    pub kt: f64,
    pub threads: u32,
    pub system: serde_json::Value,
    pub params: serde_json::Value,
    pub inputs: BTreeMap<String, String>,
    pub model: Option<String>,
}

impl TaskFile {
    /// Reads `task.json` from `$TARN_TASK`, as a worker does.
    pub fn from_env() -> Result<(TaskFile, PathBuf), String> {
        let path = std::env::var_os("TARN_TASK")
            .map(PathBuf::from)
            .ok_or("TARN_TASK is not set: workers are started by tarn, not by hand")?;
        let text = std::fs::read_to_string(&path)
            .map_err(|e| format!("{}: cannot read: {e}", path.display()))?;
        let task: TaskFile = serde_json::from_str(&text)
            .map_err(|e| format!("{}: malformed task.json: {e}", path.display()))?;
        if task.protocol != PROTOCOL_VERSION {
            return Err(format!(
                "{}: protocol version {} is not the {} this worker speaks",
                path.display(),
                task.protocol,
                PROTOCOL_VERSION
            ));
        }
        let dir = path
            .parent()
            .map(Path::to_path_buf)
            .unwrap_or_else(|| PathBuf::from("."));
        Ok((task, dir))
    }
}

/// Status a worker reports in `result.json`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ResultStatus {
    Ok,
    Failed,
}

/// The contents of `out/result.json`, as written by a worker.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct ResultFile {
    pub protocol: u32,
    pub status: ResultStatus,
    #[serde(default)]
    pub message: Option<String>,
    #[serde(default)]
    pub outputs: BTreeMap<String, String>,
    #[serde(default)]
    pub metrics: BTreeMap<String, Option<f64>>,
    pub energy_evals: u64,
    #[serde(default)]
    pub model: Option<String>,
}

/// A problem with what a worker handed back, naming the file and the field.
#[derive(Debug, Clone, thiserror::Error, PartialEq)]
#[error("{file}: {field}: {message}")]
pub struct ResultError {
    /// The file, relative to the task directory (e.g. `out/result.json`).
    pub file: String,
    /// The field or array at fault (e.g. `outputs.samples`).
    pub field: String,
    pub message: String,
}

impl ResultError {
    fn new(file: impl Into<String>, field: impl Into<String>, message: impl Into<String>) -> Self {
        ResultError {
            file: file.into(),
            field: field.into(),
            message: message.into(),
        }
    }
}

/// What a role's worker must hand back, given what it was handed.
#[derive(Debug, Clone)]
pub struct Expectation {
    pub role: Role,
    /// The system's dimension.
    pub dim: usize,
    /// Number of input samples (dedup, evaluate).
    pub n_inputs: usize,
    /// Number of known states handed to the worker (dedup, evaluate).
    pub n_known: usize,
}

/// A validated result: arrays read and checked, ready to be committed.
#[derive(Debug, Clone, PartialEq)]
pub struct ValidResult {
    pub arrays: BTreeMap<String, Array>,
    pub metrics: BTreeMap<String, Option<f64>>,
    pub energy_evals: u64,
    /// Bytes of the new model file, if the worker wrote one.
    pub model: Option<Vec<u8>>,
}

/// The name of the result file, relative to the task directory.
pub const RESULT_PATH: &str = "out/result.json";

/// Reads and validates `out/result.json` and every array it names.
pub fn read_result(task_dir: &Path, want: &Expectation) -> Result<ValidResult, ResultError> {
    let result_path = task_dir.join(RESULT_PATH);
    let text = read_limited(&result_path, MAX_RESULT_BYTES)
        .map_err(|m| ResultError::new(RESULT_PATH, "(file)", m))?;
    let parsed: ResultFile = serde_json::from_str(&text).map_err(|e| {
        ResultError::new(
            RESULT_PATH,
            json_field_of(&e),
            format!("malformed JSON: {e}"),
        )
    })?;
    if parsed.protocol != PROTOCOL_VERSION {
        return Err(ResultError::new(
            RESULT_PATH,
            "protocol",
            format!(
                "version {} is not the {PROTOCOL_VERSION} this tarn speaks",
                parsed.protocol
            ),
        ));
    }
    if parsed.status == ResultStatus::Failed {
        let msg = parsed.message.unwrap_or_else(|| "(no message)".into());
        return Err(ResultError::new(
            RESULT_PATH,
            "status",
            format!("the worker reported failure: {msg}"),
        ));
    }
    for (name, value) in &parsed.metrics {
        if let Some(v) = value {
            if !v.is_finite() {
                return Err(ResultError::new(
                    RESULT_PATH,
                    format!("metrics.{name}"),
                    "is not a finite number",
                ));
            }
        }
    }
    let mut arrays = BTreeMap::new();
    for (name, rel) in &parsed.outputs {
        let field = format!("outputs.{name}");
        let path =
            resolve_inside(task_dir, rel).map_err(|m| ResultError::new(RESULT_PATH, &field, m))?;
        let array =
            npy::read_file(&path, MAX_ARRAY_BYTES).map_err(|m| ResultError::new(rel, &field, m))?;
        arrays.insert(name.clone(), (rel.clone(), array));
    }
    let model = match &parsed.model {
        Some(rel) => {
            let path = resolve_inside(task_dir, rel)
                .map_err(|m| ResultError::new(RESULT_PATH, "model", m))?;
            Some(
                std::fs::read(&path)
                    .map_err(|e| ResultError::new(rel, "model", format!("cannot read: {e}")))?,
            )
        }
        None => None,
    };
    check_outputs(want, &arrays, model.is_some())?;
    Ok(ValidResult {
        arrays: arrays.into_iter().map(|(k, (_, a))| (k, a)).collect(),
        metrics: parsed.metrics,
        energy_evals: parsed.energy_evals,
        model,
    })
}

/// Picks the JSON field name out of a serde error message where it names one.
fn json_field_of(e: &serde_json::Error) -> String {
    let text = e.to_string();
    for marker in ["unknown field `", "missing field `", "invalid type"] {
        if let Some(pos) = text.find(marker) {
            if marker.starts_with("invalid") {
                break;
            }
            let rest = &text[pos + marker.len()..];
            if let Some(end) = rest.find('`') {
                return rest[..end].to_string();
            }
        }
    }
    format!("line {} column {}", e.line(), e.column())
}

fn read_limited(path: &Path, max: u64) -> Result<String, String> {
    let meta = std::fs::symlink_metadata(path).map_err(|e| format!("cannot read: {e}"))?;
    if meta.file_type().is_symlink() {
        return Err("is a symbolic link; tarn reads only plain files the worker wrote".into());
    }
    if meta.len() > max {
        return Err(format!(
            "file of {} bytes exceeds the limit of {max}",
            meta.len()
        ));
    }
    std::fs::read_to_string(path).map_err(|e| format!("cannot read: {e}"))
}

/// Resolves a worker-given relative path, refusing anything that leaves the task
/// directory: absolute paths, `..`, and symbolic links whose target is outside.
pub fn resolve_inside(task_dir: &Path, rel: &str) -> Result<PathBuf, String> {
    let p = Path::new(rel);
    if rel.is_empty() {
        return Err("path is empty".into());
    }
    if p.is_absolute() {
        return Err(format!(
            "path '{rel}' is absolute; paths must be relative to the task directory"
        ));
    }
    if p.components().any(|c| matches!(c, Component::ParentDir)) {
        return Err(format!(
            "path '{rel}' leaves the task directory (contains '..')"
        ));
    }
    let joined = task_dir.join(p);
    let real = joined
        .canonicalize()
        .map_err(|e| format!("path '{rel}' cannot be opened: {e}"))?;
    let root = task_dir
        .canonicalize()
        .map_err(|e| format!("task directory cannot be opened: {e}"))?;
    if !real.starts_with(&root) {
        return Err(format!(
            "path '{rel}' resolves to {} outside the task directory",
            real.display()
        ));
    }
    if !real.is_file() {
        return Err(format!("path '{rel}' is not a regular file"));
    }
    Ok(real)
}

/// Checks the arrays a worker produced against what its role requires.
fn check_outputs(
    want: &Expectation,
    arrays: &BTreeMap<String, (String, Array)>,
    has_model: bool,
) -> Result<(), ResultError> {
    let get = |name: &str| arrays.get(name);
    let missing = |name: &str| {
        ResultError::new(
            RESULT_PATH,
            format!("outputs.{name}"),
            format!("is required of a {} worker and is missing", want.role),
        )
    };
    let allowed: &[&str] = match want.role {
        Role::Explore => &["samples", "energies", "log_weights"],
        Role::Dedup => &["labels", "new_states", "new_energies", "keep"],
        Role::Retrain => &[],
        Role::Evaluate => &["free_energy", "free_energy_err"],
    };
    if let Some(extra) = arrays.keys().find(|k| !allowed.contains(&k.as_str())) {
        return Err(ResultError::new(
            RESULT_PATH,
            format!("outputs.{extra}"),
            format!(
                "is not an output of a {} worker (expected one of: {})",
                want.role,
                allowed.join(", ")
            ),
        ));
    }
    match want.role {
        Role::Explore => {
            let (sp, samples) = get("samples").ok_or_else(|| missing("samples"))?;
            let n = check_matrix(sp, "samples", samples, None, want.dim)?;
            check_finite(sp, "samples", samples)?;
            let (ep, energies) = get("energies").ok_or_else(|| missing("energies"))?;
            check_vector(ep, "energies", energies, n)?;
            check_finite(ep, "energies", energies)?;
            if let Some((lp, lw)) = get("log_weights") {
                check_vector(lp, "log_weights", lw, n)?;
                check_finite(lp, "log_weights", lw)?;
            }
        }
        Role::Dedup => {
            let (np, new_states) = get("new_states").ok_or_else(|| missing("new_states"))?;
            let m = check_matrix(np, "new_states", new_states, None, want.dim)?;
            check_finite(np, "new_states", new_states)?;
            let (ep, new_e) = get("new_energies").ok_or_else(|| missing("new_energies"))?;
            check_vector(ep, "new_energies", new_e, m)?;
            check_finite(ep, "new_energies", new_e)?;
            let (lp, labels) = get("labels").ok_or_else(|| missing("labels"))?;
            check_vector(lp, "labels", labels, want.n_inputs)?;
            let limit = want.n_known + m;
            if let Some((i, v)) = labels
                .data
                .iter()
                .enumerate()
                .find(|(_, v)| !(v.fract() == 0.0 && **v >= -1.0 && **v < limit as f64))
            {
                return Err(ResultError::new(
                    lp,
                    "labels",
                    format!(
                        "entry {i} is {v}; labels must be whole numbers from -1 (no state) to {} ({} known + {m} new states)",
                        limit as i64 - 1,
                        want.n_known
                    ),
                ));
            }
            if let Some((kp, keep)) = get("keep") {
                check_vector(kp, "keep", keep, want.n_inputs)?;
                if let Some(i) = keep.data.iter().position(|v| *v != 0.0 && *v != 1.0) {
                    return Err(ResultError::new(
                        kp,
                        "keep",
                        format!("entry {i} is neither 0 nor 1"),
                    ));
                }
            }
        }
        Role::Retrain => {
            if !has_model {
                return Err(ResultError::new(
                    RESULT_PATH,
                    "model",
                    "a retrain worker must name the model file it wrote",
                ));
            }
        }
        Role::Evaluate => {
            for name in ["free_energy", "free_energy_err"] {
                if let Some((p, a)) = get(name) {
                    check_vector(p, name, a, want.n_known)?;
                    if let Some(i) = a.data.iter().position(|v| v.is_infinite()) {
                        return Err(ResultError::new(
                            p,
                            name,
                            format!("entry {i} is infinite; use NaN for a state not estimated"),
                        ));
                    }
                }
            }
        }
    }
    Ok(())
}

fn check_matrix(
    file: &str,
    name: &str,
    a: &Array,
    rows: Option<usize>,
    cols: usize,
) -> Result<usize, ResultError> {
    let ok = a.shape.len() == 2 && a.shape[1] == cols && rows.is_none_or(|r| a.shape[0] == r);
    if !ok {
        let want_rows = rows.map(|r| r.to_string()).unwrap_or_else(|| "n".into());
        return Err(ResultError::new(
            file,
            name,
            format!(
                "array has shape {:?}, expected [{want_rows}, {cols}]",
                a.shape
            ),
        ));
    }
    Ok(a.shape[0])
}

fn check_vector(file: &str, name: &str, a: &Array, len: usize) -> Result<(), ResultError> {
    if a.shape != [len] {
        return Err(ResultError::new(
            file,
            name,
            format!("array has shape {:?}, expected [{len}]", a.shape),
        ));
    }
    Ok(())
}

fn check_finite(file: &str, name: &str, a: &Array) -> Result<(), ResultError> {
    if let Some(i) = a.data.iter().position(|v| !v.is_finite()) {
        let cols = if a.shape.len() == 2 {
            a.shape[1].max(1)
        } else {
            1
        };
        return Err(ResultError::new(
            file,
            name,
            format!(
                "holds a non-finite value ({}) at row {}; finite values are required",
                a.data[i],
                i / cols
            ),
        ));
    }
    Ok(())
}
