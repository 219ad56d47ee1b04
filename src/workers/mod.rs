//! The built-in workers (`tarn work KIND`): thin adapters that read a task through the
//! worker protocol, call the numeric core, and write the result.
//!
//! Owns: the mapping from `task.json` parameters to numeric-core calls, and the output
//! arrays of each kind. Must not touch: the store or the engine; a built-in worker is
//! a process like any user's worker and sees only its task directory.

pub mod dedup;
pub mod evaluate;
pub mod evaluate_samples;
pub mod explore;
pub mod external;
pub mod flow;
pub mod states;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use serde::de::DeserializeOwned;

use crate::physics::{EnergyModel, SystemSpec};
use crate::protocol::{npy, Array, ResultFile, ResultStatus, TaskFile, PROTOCOL_VERSION};

/// What a worker hands back before it is written to `out/result.json`.
#[derive(Default)]
pub struct Output {
    pub arrays: BTreeMap<String, Array>,
    pub metrics: BTreeMap<String, Option<f64>>,
    pub energy_evals: u64,
    pub model: Option<Vec<u8>>,
}

/// A worker's view of its task.
pub struct Task {
    pub file: TaskFile,
    pub dir: PathBuf,
}

impl Task {
    /// Reads an input array named in `task.json`.
    pub fn input(&self, name: &str) -> Result<Array, String> {
        let rel = self
            .file
            .inputs
            .get(name)
            .ok_or_else(|| format!("task.json names no input '{name}'"))?;
        npy::read_file(&self.dir.join(rel), crate::protocol::MAX_ARRAY_BYTES)
            .map_err(|e| format!("{rel}: {e}"))
    }

    /// The stage parameters as a typed struct; unknown keys are refused by the struct.
    pub fn params<T: DeserializeOwned>(&self) -> Result<T, String> {
        let value = match &self.file.params {
            serde_json::Value::Null => serde_json::json!({}),
            v => v.clone(),
        };
        serde_json::from_value(value)
            .map_err(|e| format!("stage '{}' params: {e}", self.file.stage))
    }

    /// The system's built-in energy model.
    pub fn model(&self) -> Result<(SystemSpec, Box<dyn EnergyModel>), String> {
        let spec: SystemSpec =
            serde_json::from_value(self.file.system.clone()).map_err(|e| format!("system: {e}"))?;
        let model: Box<dyn EnergyModel> =
            match &spec {
                SystemSpec::External { command, dim } => Box::new(
                    external::ExternalProcess::start(command, *dim, spec.particle_dims())?,
                ),
                _ => spec.build().map_err(|e| format!("system: {e}"))?,
            };
        Ok((spec, model))
    }
}

/// Reads a stage's params, naming the key a bad value sits under (e.g. `n_steps:
/// invalid type: string "lots", expected u64`).
pub(crate) fn params_from<T: DeserializeOwned>(v: &serde_json::Value) -> Result<T, String> {
    serde_path_to_error::deserialize(v.clone()).map_err(|e| {
        let path = e.path().to_string();
        let inner = e.into_inner().to_string();
        // An unknown key names itself already.
        if path.is_empty() || path == "." || inner.starts_with("unknown field") {
            inner
        } else {
            format!("{path}: {inner}")
        }
    })
}

/// Checks a built-in kind's parameters without running it, so that `tarn check` (and
/// `tarn run` before its first task) catches a mistyped or out-of-range key before a
/// campaign starts, instead of after a worker's retries.
pub fn check_params(
    kind: &str,
    params: &serde_json::Value,
    system: &SystemSpec,
    dim: usize,
    kt: f64,
) -> Result<(), String> {
    use crate::flow::LatentMcParams;
    use crate::physics::explore::{LangevinParams, MetadParams, MetropolisParams};
    let v = match params {
        serde_json::Value::Null => serde_json::json!({}),
        other => other.clone(),
    };
    match kind {
        "hold" => match v.as_object() {
            Some(o) if o.is_empty() => Ok(()),
            _ => Err("the hold kind takes no params".into()),
        },
        "metropolis" => params_from::<MetropolisParams>(&v).map(|_| ()),
        "langevin" => params_from::<LangevinParams>(&v)?
            .validate()
            .map_err(|e| e.to_string()),
        "metadynamics" => params_from::<MetadParams>(&v)?
            .validate(dim, system.particle_dims())
            .map_err(|e| e.to_string()),
        "latent-metropolis" => params_from::<LatentMcParams>(&v)?
            .validate()
            .map_err(|e| e.to_string()),
        "generate" => flow::check_generate(&v),
        "quench" => params_from::<dedup::QuenchParams>(&v)?.validate(dim),
        "realnvp" | "flow" => flow::check_retrain(system, dim, kt, &v),
        "reweight" => evaluate::check(&v, dim),
        "mbar" | "reweight-bias" => evaluate_samples::check(&v, dim),
        other => Err(format!("'{other}' is not a built-in kind")),
    }
}

/// Entry point of `tarn work KIND`.
pub fn main(kind: &str) -> ExitCode {
    let (file, dir) = match TaskFile::from_env() {
        Ok(v) => v,
        Err(e) => {
            eprintln!("tarn work {kind}: {e}");
            return ExitCode::from(2);
        }
    };
    // RAYON_NUM_THREADS, set by the engine from threads_per_task, sizes rayon's pool.
    let task = Task { file, dir };
    let result = match kind {
        "hold" => explore::hold(&task),
        "metropolis" => explore::metropolis(&task),
        "langevin" => explore::langevin(&task),
        "metadynamics" => explore::metadynamics_worker(&task),
        "latent-metropolis" => flow::latent(&task),
        "generate" => flow::generate(&task),
        "quench" => dedup::quench(&task),
        "realnvp" | "flow" => flow::retrain(&task),
        "reweight" => evaluate::reweight(&task),
        "mbar" => evaluate_samples::mbar(&task),
        "reweight-bias" => evaluate_samples::reweight_bias(&task),
        other => Err(format!(
            "'{other}' is not a built-in worker kind this build provides"
        )),
    };
    match result.and_then(|out| write_result(&task.dir, out)) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("tarn work {kind} ({}): {e}", task.file.task_id);
            ExitCode::from(1)
        }
    }
}

/// Writes the output arrays and `out/result.json` (the result file last, so that a
/// worker killed midway leaves no result that looks complete).
pub fn write_result(dir: &Path, out: Output) -> Result<(), String> {
    let mut outputs = BTreeMap::new();
    for (name, array) in &out.arrays {
        let rel = format!("out/{name}.npy");
        npy::write_file_atomic(&dir.join(&rel), &npy::encode_f64(array))
            .map_err(|e| format!("{rel}: {e}"))?;
        outputs.insert(name.clone(), rel);
    }
    let model = match &out.model {
        Some(bytes) => {
            let rel = "out/model.safetensors".to_string();
            npy::write_file_atomic(&dir.join(&rel), bytes).map_err(|e| format!("{rel}: {e}"))?;
            Some(rel)
        }
        None => None,
    };
    let result = ResultFile {
        protocol: PROTOCOL_VERSION,
        status: ResultStatus::Ok,
        message: None,
        outputs,
        metrics: out.metrics,
        energy_evals: out.energy_evals,
        model,
    };
    let text = serde_json::to_vec_pretty(&result).map_err(|e| e.to_string())?;
    npy::write_file_atomic(&dir.join(crate::protocol::RESULT_PATH), &text)
        .map_err(|e| format!("out/result.json: {e}"))
}

/// A seeded generator for a task (ChaCha8, portable across machines).
pub fn rng(task: &Task) -> rand_chacha::ChaCha8Rng {
    use rand::SeedableRng;
    rand_chacha::ChaCha8Rng::seed_from_u64(task.file.seed)
}
