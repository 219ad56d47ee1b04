//! Turning a validated worker result into one atomic store batch: the task's record and
//! arrays, and what they change in the catalogue, models and metrics.
//!
//! Owns: the meaning of each role's outputs for the campaign's records.
//! Must not touch: processes, the terminal.

use std::collections::BTreeMap;

use sha2::{Digest, Sha256};

use super::inputs::{Prepared, TaskRef};
use crate::protocol::{ResultError, Role, ValidResult, RESULT_PATH};
use crate::spec::{Campaign, Stage};
use crate::store::{
    keys, Attempt, Batch, Estimate, ModelRecord, Sighting, StateRecord, Store, StoreError,
    TaskRecord, TaskStatus, SCHEMA_VERSION,
};

/// Why a result could not be committed.
#[derive(Debug, thiserror::Error)]
pub enum CommitError {
    #[error(transparent)]
    Result(#[from] ResultError),
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// The task record of `task`, with its attempts so far.
pub fn task_record(
    stage: &Stage,
    task: &TaskRef,
    status: TaskStatus,
    attempts: Vec<Attempt>,
) -> TaskRecord {
    TaskRecord {
        v: SCHEMA_VERSION,
        id: task.id.clone(),
        round: task.round,
        stage: stage.name.clone(),
        stage_index: task.stage_index,
        role: stage.role,
        kind: stage.worker.kind().map(String::from),
        walker: task.walker,
        seed: task.seed,
        status,
        attempts,
        metrics: BTreeMap::new(),
        energy_evals: 0,
        arrays: BTreeMap::new(),
        model_sha256: None,
    }
}

/// Builds the batch that commits a successful task.
pub fn build(
    store: &Store,
    campaign: &Campaign,
    stage: &Stage,
    task: &TaskRef,
    prepared: &Prepared,
    result: &ValidResult,
    attempts: Vec<Attempt>,
) -> Result<Batch, CommitError> {
    let mut b = Batch::default();
    let key = task.key();
    let mut rec = task_record(stage, task, TaskStatus::Done, attempts);
    rec.metrics = result.metrics.clone();
    rec.energy_evals = result.energy_evals;
    for (name, array) in &result.arrays {
        b.put_array(&key, name, array);
        rec.arrays.insert(name.clone(), array.shape.clone());
    }
    match stage.role {
        Role::Explore => {}
        Role::Dedup => catalogue_changes(store, campaign, task, prepared, result, &mut b)?,
        Role::Retrain => {
            let bytes = result
                .model
                .as_ref()
                .expect("validated: retrain has a model");
            let sha = hex::encode(Sha256::digest(bytes));
            b.put_blob(&key, "model", bytes);
            b.put(
                keys::model(task.round),
                &ModelRecord {
                    v: SCHEMA_VERSION,
                    round: task.round,
                    task: task.id.clone(),
                    sha256: sha.clone(),
                    bytes: bytes.len() as u64,
                },
            );
            rec.model_sha256 = Some(sha);
        }
        Role::Evaluate => free_energy_changes(store, task, result, &mut b)?,
    }
    b.event(
        "task_done",
        format!(
            "{} committed ({} energy evaluations)",
            task.id, result.energy_evals
        ),
    );
    b.put(keys::task(task.round, task.stage_index, task.walker), &rec);
    Ok(b)
}

/// New states and sightings from a dedup result.
fn catalogue_changes(
    store: &Store,
    campaign: &Campaign,
    task: &TaskRef,
    prepared: &Prepared,
    result: &ValidResult,
    b: &mut Batch,
) -> Result<(), CommitError> {
    let labels = &result.arrays["labels"];
    let new_states = &result.arrays["new_states"];
    let new_energies = &result.arrays["new_energies"];
    let dim = campaign.system.dim;
    let known = prepared.expect.n_known;
    let m = new_states.rows();
    let mut first: Vec<Option<usize>> = vec![None; m];
    let mut counts: BTreeMap<usize, u64> = BTreeMap::new();
    for (i, l) in labels.data.iter().enumerate() {
        if *l < 0.0 {
            continue;
        }
        let l = *l as usize;
        *counts.entry(l).or_default() += 1;
        if l >= known && first[l - known].is_none() {
            first[l - known] = Some(i);
        }
    }
    if let Some(j) = first.iter().position(Option::is_none) {
        return Err(ResultError {
            file: RESULT_PATH.into(),
            field: "outputs.labels".into(),
            message: format!(
                "new state {j} (label {}) is the label of no sample",
                known + j
            ),
        }
        .into());
    }
    let mut states = store.states()?;
    for (id, n) in &counts {
        if let Some(s) = states.get_mut(*id) {
            *s.sightings.entry(task.round).or_default() += n;
            b.put(keys::state(s.id), s);
        }
    }
    let tasks = store.round_tasks(task.round)?;
    let earlier: u64 = store
        .rounds()?
        .iter()
        .filter(|r| r.round < task.round)
        .map(|r| r.energy_evals)
        .sum();
    for (j, i) in first.iter().enumerate() {
        let i = i.expect("checked above");
        let origin = &prepared.provenance[i];
        let finder = tasks
            .iter()
            .find(|t| {
                t.role == Role::Explore
                    && t.stage_index == origin.stage_index
                    && t.walker == origin.walker
            })
            .expect("provenance names a committed explore task");
        let before: u64 = tasks
            .iter()
            .filter(|t| {
                t.role == Role::Explore
                    && (t.stage_index, t.walker) <= (origin.stage_index, origin.walker)
            })
            .map(|t| t.energy_evals)
            .sum();
        let id = (known + j) as u32;
        let rec = StateRecord {
            v: SCHEMA_VERSION,
            id,
            energy: new_energies.data[j],
            representative: new_states.data[j * dim..(j + 1) * dim].to_vec(),
            found: Sighting {
                round: task.round,
                stage: finder.stage.clone(),
                task: finder.id.clone(),
                walker: finder.walker,
                seed: finder.seed,
                sample_index: origin.sample_index,
                cost_to_find: earlier + before,
            },
            sightings: BTreeMap::from([(
                task.round,
                counts.get(&(known + j)).copied().unwrap_or(0),
            )]),
            estimates: Vec::new(),
        };
        b.put(keys::state(id), &rec);
        b.event(
            "state_found",
            format!(
                "state {id} (E = {:.6}) first seen by {} sample {}",
                rec.energy, finder.id, origin.sample_index
            ),
        );
    }
    Ok(())
}

/// Free-energy estimates from an evaluate result.
fn free_energy_changes(
    store: &Store,
    task: &TaskRef,
    result: &ValidResult,
    b: &mut Batch,
) -> Result<(), CommitError> {
    let Some(f) = result.arrays.get("free_energy") else {
        return Ok(());
    };
    let err = result.arrays.get("free_energy_err");
    for (i, mut s) in store.states()?.into_iter().enumerate() {
        let Some(&value) = f.data.get(i) else { break };
        if value.is_nan() {
            continue;
        }
        let e = err
            .and_then(|a| a.data.get(i).copied())
            .filter(|v| v.is_finite());
        s.estimates.retain(|x| x.round != task.round);
        s.estimates.push(Estimate {
            round: task.round,
            free_energy: value,
            free_energy_err: e,
        });
        b.put(keys::state(s.id), &s);
    }
    Ok(())
}
