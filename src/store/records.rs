//! The records tarn keeps in a campaign's store, each a versioned JSON value.
//!
//! Owns: the persisted shapes. A change to any of them bumps [`SCHEMA_VERSION`]; a
//! store written by another schema is refused, never rewritten silently.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::protocol::Role;

/// The schema version of every record this build writes.
pub const SCHEMA_VERSION: u32 = 1;

/// Facts about the campaign fixed when its store was created.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Meta {
    pub v: u32,
    pub campaign: String,
    pub created_unix: f64,
    pub tarn_version: String,
    /// Directory that the campaign file's relative paths are resolved against.
    pub base_dir: String,
}

/// One version of the campaign file; the first is the one the store was created with,
/// later ones were accepted explicitly with `--accept-change`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct CampaignVersion {
    pub v: u32,
    pub index: u32,
    pub hash: String,
    pub text: String,
    /// The path the file was read from (not part of the digest).
    pub path: String,
    pub accepted_unix: f64,
}

/// How a task stands.
#[derive(Debug, Clone, Copy, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum TaskStatus {
    /// Attempted but not committed yet (an attempt failed or tarn was stopped).
    Pending,
    /// Failed past its retries; `resume` tries it again.
    Failed,
    /// Committed: outputs are in the store.
    Done,
}

/// How one attempt of a task ended.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Attempt {
    pub number: u32,
    /// `ok`, `exit`, `signal`, `timeout`, `cancelled`, `spawn`, `invalid`.
    pub outcome: String,
    pub exit_code: Option<i32>,
    pub signal: Option<i32>,
    /// What went wrong, for a failed attempt.
    pub error: Option<String>,
    pub stdout_tail: String,
    pub stderr_tail: String,
    pub wall_seconds: f64,
    pub cpu_seconds: f64,
    pub energy_evals: u64,
    pub host: String,
    pub started_unix: f64,
}

/// A task: one worker invocation of a stage, with every attempt.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct TaskRecord {
    pub v: u32,
    pub id: String,
    pub round: u32,
    pub stage: String,
    pub stage_index: u16,
    pub role: Role,
    pub kind: Option<String>,
    pub walker: u32,
    pub seed: u64,
    pub status: TaskStatus,
    pub attempts: Vec<Attempt>,
    /// Set when done: metrics and energy evaluations of the committed attempt.
    pub metrics: BTreeMap<String, Option<f64>>,
    pub energy_evals: u64,
    /// Names and shapes of the committed output arrays.
    pub arrays: BTreeMap<String, Vec<usize>>,
    /// SHA-256 of the model file the task wrote, if any.
    pub model_sha256: Option<String>,
}

/// Where a state was first seen.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Sighting {
    pub round: u32,
    pub stage: String,
    pub task: String,
    pub walker: u32,
    pub seed: u64,
    /// Index of the sample within its task's output.
    pub sample_index: u64,
    /// Energy evaluations of the campaign before the discovering task, plus the
    /// discovering task's own (see `DEVELOPERS.md`, "cost to find").
    pub cost_to_find: u64,
}

/// One free-energy estimate of a state.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Estimate {
    pub round: u32,
    pub free_energy: f64,
    pub free_energy_err: Option<f64>,
}

/// A metastable state in the catalogue.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct StateRecord {
    pub v: u32,
    pub id: u32,
    /// Energy of the quenched minimum, in the system's energy unit.
    pub energy: f64,
    /// The minimum's coordinates.
    pub representative: Vec<f64>,
    pub found: Sighting,
    /// Sightings per round.
    pub sightings: BTreeMap<u32, u64>,
    /// Free-energy estimates in kT, newest last.
    pub estimates: Vec<Estimate>,
}

#[cfg(test)]
impl StateRecord {
    /// A state for unit tests: found in round 1, with `(round, F, error)` estimates.
    pub(crate) fn for_test(id: u32, estimates: &[(u32, f64, Option<f64>)]) -> StateRecord {
        StateRecord {
            v: SCHEMA_VERSION,
            id,
            energy: -1.0,
            representative: vec![0.0],
            found: Sighting {
                round: 1,
                stage: "s".into(),
                task: "t".into(),
                walker: 0,
                seed: 0,
                sample_index: 0,
                cost_to_find: 0,
            },
            sightings: BTreeMap::new(),
            estimates: estimates
                .iter()
                .map(|&(round, free_energy, free_energy_err)| Estimate {
                    round,
                    free_energy,
                    free_energy_err,
                })
                .collect(),
        }
    }
}

/// A stage's totals within a round.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq, Default)]
#[serde(deny_unknown_fields)]
pub struct StageTotals {
    pub name: String,
    pub tasks: u32,
    pub samples: u64,
    pub energy_evals: u64,
    pub cpu_seconds: f64,
    pub wall_seconds: f64,
    /// Worker metrics, averaged over the stage's tasks.
    pub metrics: BTreeMap<String, f64>,
}

/// Why a campaign stopped.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct StopDecision {
    /// The rule's key in the campaign file, e.g. `max_rounds`.
    pub rule: String,
    /// A sentence for people.
    pub reason: String,
}

/// A completed round.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct RoundRecord {
    pub v: u32,
    pub round: u32,
    pub stages: Vec<StageTotals>,
    pub new_states: u32,
    pub states_total: u32,
    pub energy_evals: u64,
    /// Energy evaluations of the campaign up to and including this round.
    pub cumulative_energy_evals: u64,
    pub cpu_seconds: f64,
    pub wall_seconds: f64,
    pub finished_unix: f64,
    /// Set on the round after which the campaign stopped.
    pub stop: Option<StopDecision>,
    /// Bins of the coverage rule's collective variable visited by this round's samples
    /// (sorted, unique); empty without a coverage rule.
    #[serde(default)]
    pub cv_bins: Vec<u32>,
}

/// A flow model written by a retrain task.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct ModelRecord {
    pub v: u32,
    pub round: u32,
    pub task: String,
    pub sha256: String,
    pub bytes: u64,
}

/// One entry of the append-only event log.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct EventRecord {
    pub v: u32,
    pub seq: u64,
    pub unix: f64,
    /// e.g. `started`, `task_done`, `attempt_failed`, `round_done`, `stopped`,
    /// `interrupted`, `campaign_changed`.
    pub kind: String,
    pub message: String,
    pub pid: u32,
    pub host: String,
}
