//! What each task is handed: its id, seed, input arrays and expectations, computed from
//! the store alone so that a resumed task gets exactly what it got the first time.
//!
//! Owns: task identity (ids, seeds, keys) and the assembly of input arrays.
//! Must not touch: processes, the terminal.

use std::collections::BTreeMap;

use sha2::{Digest, Sha256};

use crate::protocol::{Array, Expectation, Role};
use crate::spec::{Campaign, Restart, Stage};
use crate::store::{keys, Store, StoreError, TaskStatus};

/// A task's identity: where it sits in the campaign.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TaskRef {
    pub round: u32,
    pub stage_index: u16,
    pub walker: u32,
    pub id: String,
    pub seed: u64,
}

impl TaskRef {
    /// The task of `stage` (at position `stage_index` of the round) for `walker`.
    pub fn new(
        campaign: &Campaign,
        round: u32,
        stage_index: u16,
        stage: &Stage,
        walker: u32,
    ) -> Self {
        let id = format!("r{round:04}.{}.w{walker:03}", stage.name);
        TaskRef {
            round,
            stage_index,
            walker,
            seed: task_seed(campaign.seed, &id),
            id,
        }
    }

    /// The 10-byte key suffix of this task.
    pub fn key(&self) -> [u8; 10] {
        keys::task_suffix(self.round, self.stage_index, self.walker)
    }
}

/// A task's seed: the first 8 bytes of SHA-256 over the campaign seed and the task id.
/// Every attempt of a task uses it, so retries and resumes reproduce the same result.
pub fn task_seed(campaign_seed: u64, task_id: &str) -> u64 {
    let mut h = Sha256::new();
    h.update(b"tarn task seed v1\0");
    h.update(campaign_seed.to_be_bytes());
    h.update(task_id.as_bytes());
    let d = h.finalize();
    u64::from_be_bytes(d[..8].try_into().expect("8 bytes"))
}

/// Everything a task needs besides its identity.
pub struct Prepared {
    pub inputs: BTreeMap<String, Array>,
    pub model: Option<Vec<u8>>,
    pub expect: Expectation,
    /// For dedup and evaluate: where each input sample came from.
    pub provenance: Vec<Origin>,
}

/// Where one of the round's samples came from.
#[derive(Debug, Clone)]
pub struct Origin {
    pub stage_index: u16,
    pub walker: u32,
    pub sample_index: u64,
}

/// The round's explore samples in stage, walker, sample order, with their origins.
pub fn round_samples(
    store: &Store,
    campaign: &Campaign,
    round: u32,
) -> Result<(Array, Array, Vec<Origin>), StoreError> {
    let dim = campaign.system.dim;
    let mut xs = Vec::new();
    let mut es = Vec::new();
    let mut origins = Vec::new();
    for t in store.round_tasks(round)? {
        if t.role != Role::Explore || t.status != TaskStatus::Done {
            continue;
        }
        let key = keys::task_suffix(t.round, t.stage_index, t.walker);
        let s = store
            .array(&key, "samples")?
            .unwrap_or_else(|| Array::matrix(0, dim, vec![]));
        let e = store
            .array(&key, "energies")?
            .unwrap_or_else(|| Array::vector(vec![]));
        for i in 0..s.rows() {
            origins.push(Origin {
                stage_index: t.stage_index,
                walker: t.walker,
                sample_index: i as u64,
            });
        }
        xs.extend_from_slice(&s.data);
        es.extend_from_slice(&e.data);
    }
    let n = origins.len();
    Ok((Array::matrix(n, dim, xs), Array::vector(es), origins))
}

/// For each of the round's samples: the temperature factor its stage declared
/// (`params.temperature_factor`, 1 when absent) and, when every explore task of the
/// round handed back `log_weights`, those log weights.
fn sample_weights(
    store: &Store,
    campaign: &Campaign,
    round: u32,
    origins: &[Origin],
) -> Result<(Array, Option<Array>), StoreError> {
    let stages = campaign.stages();
    let tau_of = |idx: u16| {
        stages
            .get(idx as usize)
            .and_then(|s| s.params.get("temperature_factor"))
            .and_then(|v| v.as_f64())
            .unwrap_or(1.0)
    };
    let tau: Vec<f64> = origins.iter().map(|o| tau_of(o.stage_index)).collect();
    let mut log_w = Vec::with_capacity(origins.len());
    let mut complete = true;
    for t in store.round_tasks(round)? {
        if t.role != Role::Explore || t.status != TaskStatus::Done {
            continue;
        }
        match store.array(
            &keys::task_suffix(t.round, t.stage_index, t.walker),
            "log_weights",
        )? {
            Some(a) => log_w.extend_from_slice(&a.data),
            None => complete = false,
        }
    }
    let log_w = (complete && log_w.len() == origins.len()).then(|| Array::vector(log_w));
    Ok((Array::vector(tau), log_w))
}

/// The catalogue's minima and energies in id order.
pub fn catalogue(store: &Store, dim: usize) -> Result<(Array, Array), StoreError> {
    let states = store.states()?;
    let mut xs = Vec::with_capacity(states.len() * dim);
    let mut es = Vec::with_capacity(states.len());
    for s in &states {
        xs.extend_from_slice(&s.representative);
        es.push(s.energy);
    }
    Ok((Array::matrix(states.len(), dim, xs), Array::vector(es)))
}

/// The newest model written in a round up to `round`, as bytes.
pub fn model_up_to(store: &Store, round: u32) -> Result<Option<Vec<u8>>, StoreError> {
    let Some(m) = store.models()?.into_iter().rev().find(|m| m.round <= round) else {
        return Ok(None);
    };
    let retrain = store
        .round_tasks(m.round)?
        .into_iter()
        .find(|t| t.role == Role::Retrain && t.status == TaskStatus::Done);
    match retrain {
        Some(t) => store.blob(
            &keys::task_suffix(t.round, t.stage_index, t.walker),
            "model",
        ),
        None => Ok(None),
    }
}

/// Assembles the inputs of a task.
pub fn prepare(
    store: &Store,
    campaign: &Campaign,
    stage: &Stage,
    task: &TaskRef,
) -> Result<Prepared, StoreError> {
    let dim = campaign.system.dim;
    let mut inputs = BTreeMap::new();
    let mut provenance = Vec::new();
    let mut n_inputs = 0;
    let mut n_known = 0;
    let model;
    match stage.role {
        Role::Explore => {
            inputs.insert("start".into(), explore_start(store, campaign, stage, task)?);
            model = model_up_to(store, task.round.saturating_sub(1))?;
        }
        Role::Dedup | Role::Evaluate => {
            let (x, e, origins) = round_samples(store, campaign, task.round)?;
            let (cx, ce) = catalogue(store, dim)?;
            n_inputs = x.rows();
            n_known = cx.rows();
            inputs.insert("samples".into(), x);
            inputs.insert("energies".into(), e);
            inputs.insert("catalogue".into(), cx);
            inputs.insert("catalogue_energies".into(), ce);
            if stage.role == Role::Evaluate {
                let (tau, log_w) = sample_weights(store, campaign, task.round, &origins)?;
                inputs.insert("sample_temperature_factor".into(), tau);
                if let Some(lw) = log_w {
                    inputs.insert("sample_log_weight".into(), lw);
                }
            }
            provenance = origins;
            model = if stage.role == Role::Evaluate {
                model_up_to(store, task.round)?
            } else {
                None
            };
        }
        Role::Retrain => {
            let (x, e) = training_pool(store, campaign, task.round, stage.pool_limit)?;
            n_inputs = x.rows();
            inputs.insert("train".into(), x);
            inputs.insert("train_energies".into(), e);
            model = model_up_to(store, task.round.saturating_sub(1))?;
        }
    }
    Ok(Prepared {
        inputs,
        model,
        expect: Expectation {
            role: stage.role,
            dim,
            n_inputs,
            n_known,
        },
        provenance,
    })
}

/// The start configurations of an explore walker (one row).
fn explore_start(
    store: &Store,
    campaign: &Campaign,
    stage: &Stage,
    task: &TaskRef,
) -> Result<Array, StoreError> {
    let dim = campaign.system.dim;
    let from_start = || {
        let m = campaign.start.rows();
        let row = task.walker as usize % m;
        Array::matrix(
            1,
            dim,
            campaign.start.data[row * dim..(row + 1) * dim].to_vec(),
        )
    };
    if task.round <= 1 {
        return Ok(from_start());
    }
    match stage.restart {
        Restart::Start => Ok(from_start()),
        Restart::States => {
            let states = store.states()?;
            if states.is_empty() {
                return Ok(from_start());
            }
            let s = &states[task.walker as usize % states.len()];
            Ok(Array::matrix(1, dim, s.representative.clone()))
        }
        Restart::Last => {
            let prev = keys::task_suffix(task.round - 1, task.stage_index, task.walker);
            match store.array(&prev, "samples")? {
                Some(a) if a.rows() > 0 => {
                    let last = a.rows() - 1;
                    Ok(Array::matrix(
                        1,
                        dim,
                        a.data[last * dim..(last + 1) * dim].to_vec(),
                    ))
                }
                _ => Ok(from_start()),
            }
        }
    }
}

/// The pooled training set: kept samples of all rounds up to `round`, the newest first
/// up to `limit`, returned in chronological order.
fn training_pool(
    store: &Store,
    campaign: &Campaign,
    round: u32,
    limit: u64,
) -> Result<(Array, Array), StoreError> {
    let dim = campaign.system.dim;
    let mut chunks: Vec<(Vec<f64>, Vec<f64>)> = Vec::new();
    let mut total = 0u64;
    for r in (1..=round).rev() {
        if total >= limit {
            break;
        }
        let (x, e, _) = round_samples(store, campaign, r)?;
        let keep = store
            .round_tasks(r)?
            .into_iter()
            .find(|t| t.role == Role::Dedup && t.status == TaskStatus::Done)
            .map(|t| store.array(&keys::task_suffix(t.round, t.stage_index, t.walker), "keep"))
            .transpose()?
            .flatten();
        let mut rx = Vec::new();
        let mut re = Vec::new();
        for i in (0..x.rows()).rev() {
            if total >= limit {
                break;
            }
            if keep
                .as_ref()
                .is_some_and(|k| k.data.get(i).copied() == Some(0.0))
            {
                continue;
            }
            rx.push(x.data[i * dim..(i + 1) * dim].to_vec());
            re.push(e.data[i]);
            total += 1;
        }
        chunks.push((
            rx.into_iter().rev().flatten().collect(),
            re.into_iter().rev().collect(),
        ));
    }
    let mut xs = Vec::new();
    let mut es = Vec::new();
    for (x, e) in chunks.into_iter().rev() {
        xs.extend(x);
        es.extend(e);
    }
    let n = es.len();
    Ok((Array::matrix(n, dim, xs), Array::vector(es)))
}
