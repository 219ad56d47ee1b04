//! Worker protocol, version 1: the complete contract between tarn and a worker.
//!
//! Owns: the shapes of `task.json` and `out/result.json`, the input and output arrays of
//! each stage role, and the validation of everything a worker hands back.
//! Must not touch: the store (the engine commits what this module has validated) and
//! processes (the executor runs workers).
//!
//! The specification below is `docs/worker-protocol.md`, included here.
//!
#![doc = include_str!("../../docs/worker-protocol.md")]

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

/// The most metrics one `result.json` may report: they are stored with the task, summed
/// into the round's table and printed by `tarn rounds` (900,000 of them once made a run
/// take 35 s and 695 MB and every `tarn rounds` print a 9.9 MB line).
pub const MAX_METRICS: usize = 1000;

/// The longest metric name, in bytes.
pub const MAX_METRIC_NAME_BYTES: usize = 128;

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
    if let Some(message) = reported_failure(&text) {
        return Err(ResultError::new(
            RESULT_PATH,
            "status",
            format!("the worker reported failure: {message}"),
        ));
    }
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
        // Read by `reported_failure` above; kept for a result it could not probe.
        return Err(ResultError::new(
            RESULT_PATH,
            "status",
            "the worker reported failure: (no message)",
        ));
    }
    check_metric_limits(&parsed.metrics)?;
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
            let size = std::fs::metadata(&path).map(|m| m.len()).unwrap_or(0);
            if size > MAX_ARRAY_BYTES {
                return Err(ResultError::new(
                    rel,
                    "model",
                    format!("file of {size} bytes exceeds the limit of {MAX_ARRAY_BYTES}"),
                ));
            }
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

/// The worker's message when `result.json` says `"status": "failed"`. A failed result
/// needs only `status` and `message`, so this is read before the strict parse (which
/// would refuse it for a missing `energy_evals` and lose the message).
fn reported_failure(text: &str) -> Option<String> {
    #[derive(Deserialize)]
    struct Probe {
        status: Option<serde_json::Value>,
        message: Option<serde_json::Value>,
    }
    let probe: Probe = serde_json::from_str(text).ok()?;
    if probe.status? != "failed" {
        return None;
    }
    Some(match probe.message {
        Some(serde_json::Value::String(m)) => m,
        Some(other) => other.to_string(),
        None => "(no message)".into(),
    })
}

/// Refuses more than [`MAX_METRICS`] metrics or a name longer than
/// [`MAX_METRIC_NAME_BYTES`].
fn check_metric_limits(metrics: &BTreeMap<String, Option<f64>>) -> Result<(), ResultError> {
    if metrics.len() > MAX_METRICS {
        return Err(ResultError::new(
            RESULT_PATH,
            "metrics",
            format!(
                "{} metrics exceed the limit of {MAX_METRICS} per result",
                metrics.len()
            ),
        ));
    }
    if let Some(name) = metrics.keys().find(|n| n.len() > MAX_METRIC_NAME_BYTES) {
        let shown: String = name.chars().take(32).collect();
        return Err(ResultError::new(
            RESULT_PATH,
            "metrics",
            format!(
                "a name of {} bytes (`{}...`) exceeds the limit of {MAX_METRIC_NAME_BYTES} bytes",
                name.len(),
                shown.escape_debug()
            ),
        ));
    }
    Ok(())
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
    if !meta.file_type().is_file() {
        // A FIFO or device would block or stream forever when opened.
        return Err("is not a regular file; tarn reads only plain files the worker wrote".into());
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
        Role::Explore => &["samples", "energies", "log_weights", "cv", "bias"],
        Role::Dedup => &["labels", "new_states", "new_energies", "keep"],
        Role::Retrain => &[],
        Role::Evaluate => &[
            "free_energy",
            "free_energy_err",
            "profile",
            "profile_reference",
        ],
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
            for name in ["log_weights", "bias"] {
                if let Some((p, a)) = get(name) {
                    check_vector(p, name, a, n)?;
                    check_finite(p, name, a)?;
                }
            }
            if let Some((cp, cv)) = get("cv") {
                let cols = cv.shape.get(1).copied().unwrap_or(0);
                check_matrix(cp, "cv", cv, Some(n), cols)?;
                check_finite(cp, "cv", cv)?;
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
            if let Some((pp, prof)) = get("profile") {
                let bins = check_matrix(pp, "profile", prof, None, 3)?;
                if let Some((rp, r)) = get("profile_reference") {
                    check_vector(rp, "profile_reference", r, bins)?;
                }
            }
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

#[cfg(test)]
mod tests {
    use super::*;

    fn explore() -> Expectation {
        Expectation {
            role: Role::Explore,
            dim: 2,
            n_inputs: 0,
            n_known: 0,
        }
    }

    /// Validates `result` written as `out/result.json` of a fresh task directory, with
    /// a valid explore output of one sample.
    fn validate(result: &str) -> Result<ValidResult, ResultError> {
        let dir = tempfile::tempdir().expect("temp dir");
        std::fs::create_dir(dir.path().join("out")).expect("out");
        let samples = Array::matrix(1, 2, vec![0.5, 1.5]);
        let energies = Array::vector(vec![-1.0]);
        std::fs::write(dir.path().join("out/s.npy"), npy::encode_f64(&samples)).expect("write");
        std::fs::write(dir.path().join("out/e.npy"), npy::encode_f64(&energies)).expect("write");
        std::fs::write(dir.path().join(RESULT_PATH), result).expect("write");
        read_result(dir.path(), &explore())
    }

    fn ok_with_metrics(metrics: &serde_json::Map<String, serde_json::Value>) -> String {
        serde_json::json!({
            "protocol": 1, "status": "ok", "energy_evals": 1, "metrics": metrics,
            "outputs": {"samples": "out/s.npy", "energies": "out/e.npy"},
        })
        .to_string()
    }

    #[test]
    fn a_failed_result_needs_only_status_and_message() {
        let e = validate(r#"{"status": "failed", "message": "no convergence in 50 steps"}"#)
            .unwrap_err();
        assert_eq!(
            e.to_string(),
            "out/result.json: status: the worker reported failure: no convergence in 50 steps"
        );
        let e = validate(r#"{"protocol": 1, "status": "failed"}"#).unwrap_err();
        assert_eq!(
            e.to_string(),
            "out/result.json: status: the worker reported failure: (no message)"
        );
    }

    #[test]
    fn an_ok_result_still_needs_its_energy_evals() {
        let text = r#"{"protocol": 1, "status": "ok", "outputs": {"samples": "out/s.npy", "energies": "out/e.npy"}}"#;
        let e = validate(text).unwrap_err();
        assert_eq!(e.field, "energy_evals", "{e}");
    }

    #[test]
    fn metrics_are_capped_in_number_and_name_length() {
        let many: serde_json::Map<_, _> = (0..=MAX_METRICS)
            .map(|i| (format!("m{i}"), serde_json::json!(1.0)))
            .collect();
        let e = validate(&ok_with_metrics(&many)).unwrap_err();
        assert_eq!(
            e.to_string(),
            "out/result.json: metrics: 1001 metrics exceed the limit of 1000 per result"
        );
        let at_cap: serde_json::Map<_, _> = many.into_iter().take(MAX_METRICS).collect();
        assert_eq!(
            validate(&ok_with_metrics(&at_cap)).unwrap().metrics.len(),
            1000
        );

        let long = "x".repeat(MAX_METRIC_NAME_BYTES + 1);
        let one: serde_json::Map<_, _> = [(long, serde_json::json!(2.0))].into_iter().collect();
        let e = validate(&ok_with_metrics(&one)).unwrap_err();
        assert!(
            e.to_string()
                .ends_with("a name of 129 bytes (`xxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxx...`) exceeds the limit of 128 bytes"),
            "{e}"
        );
        let name = "y".repeat(MAX_METRIC_NAME_BYTES);
        let one: serde_json::Map<_, _> = [(name, serde_json::json!(2.0))].into_iter().collect();
        assert!(validate(&ok_with_metrics(&one)).is_ok());
    }
}
