//! Job records: which attempt of a task is out on a batch system, under which job id.
//!
//! Owns: the `j` keys (one per task, the same big-endian round, stage, walker suffix as
//! the task's own key) and their records. A record is written before tarn waits for a
//! job, in two steps — `submitting` (before `sbatch` runs, with the job's name) and then
//! `submitted` (with the id `sbatch` printed) — and removed in the same atomic batch that
//! records how the attempt ended. So a tarn killed at any instant finds, on resume,
//! every job it may have left behind: by id, or by name if it died between `sbatch`
//! printing the id and the record of it. Must not touch: processes.

use serde::{Deserialize, Serialize};

use super::{Batch, Store, StoreError, SCHEMA_VERSION};

/// Key prefix of job records.
const PREFIX: u8 = b'j';

/// The job-record key of a task.
pub fn key(round: u32, stage: u16, walker: u32) -> Vec<u8> {
    let mut k = vec![PREFIX];
    k.extend_from_slice(&super::keys::task_suffix(round, stage, walker));
    k
}

/// Where a job submission stands.
#[derive(Debug, Clone, Copy, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum JobPhase {
    /// `sbatch` was about to run; the job may or may not exist (look it up by name).
    Submitting,
    /// `sbatch` printed the job id.
    Submitted,
}

/// One attempt of a task handed to a batch system.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct JobRecord {
    pub v: u32,
    pub task_id: String,
    /// The attempt number; its directory is `.../aN/`.
    pub attempt: u32,
    pub phase: JobPhase,
    /// The batch system's job id, once known.
    pub job_id: Option<String>,
    /// The job name tarn gave it (unique to this campaign directory and attempt).
    pub job_name: String,
    /// The attempt directory the job runs in (absolute).
    pub dir: String,
    pub submitted_unix: f64,
    /// The host tarn submitted from.
    pub host: String,
}

impl JobRecord {
    /// A record in phase `phase`, stamped now, on this host.
    pub fn new(
        task_id: &str,
        attempt: u32,
        phase: JobPhase,
        job_id: Option<String>,
        job_name: &str,
        dir: &str,
    ) -> JobRecord {
        JobRecord {
            v: SCHEMA_VERSION,
            task_id: task_id.into(),
            attempt,
            phase,
            job_id,
            job_name: job_name.into(),
            dir: dir.into(),
            submitted_unix: super::now_unix(),
            host: super::host_name(),
        }
    }
}

impl Batch {
    /// Removes a task's job record in this batch (a no-op when there is none).
    pub fn remove_job(&mut self, round: u32, stage: u16, walker: u32) {
        self.inner.remove(key(round, stage, walker));
    }
}

impl Store {
    /// The job record of a task, if one of its attempts is out on a batch system.
    pub fn job(
        &self,
        round: u32,
        stage: u16,
        walker: u32,
    ) -> Result<Option<JobRecord>, StoreError> {
        self.get(&key(round, stage, walker))
    }

    /// Every job record, in task order.
    pub fn jobs(&self) -> Result<Vec<JobRecord>, StoreError> {
        self.scan(&[PREFIX])
    }

    /// Writes a task's job record on its own, flushed before this returns (so that the
    /// job is known before tarn waits for it).
    pub fn put_job(
        &self,
        round: u32,
        stage: u16,
        walker: u32,
        rec: &JobRecord,
    ) -> Result<(), StoreError> {
        let mut b = Batch::default();
        b.put(key(round, stage, walker), rec);
        self.apply(b)
    }
}
