//! `tarn export`: the campaign's samples, energies, states and metrics as files that any
//! analysis tool reads (`.npy`, `.csv`, `.json`).
//!
//! Owns: the export layout. Must not touch: anything but reading the store and writing
//! into the chosen output directory.

use std::io::Write;
use std::path::Path;

use crate::protocol::{npy, Array, Role};
use crate::spec::Campaign;
use crate::store::{keys, Store, TaskStatus};

/// Writes every export file into `out` and returns their names. Each sample row carries
/// the temperature factor its stage sampled at (`params.temperature_factor`, 1 when
/// absent) and, when its explorer handed them back (a flow's `generate`, a biased
/// explorer), its log importance weight to the campaign's kT (empty otherwise; also in
/// `log_weights.npy` as NaN).
pub fn export(store: &Store, campaign: &Campaign, out: &Path) -> anyhow::Result<Vec<String>> {
    let dim = campaign.system.dim;
    let stages = campaign.stages();
    let tau_of = |idx: u16| {
        stages
            .get(idx as usize)
            .and_then(|s| s.params.get("temperature_factor"))
            .and_then(|v| v.as_f64())
            .unwrap_or(1.0)
    };
    std::fs::create_dir_all(out)?;
    let mut files = Vec::new();
    let mut samples = Vec::new();
    let mut energies = Vec::new();
    let mut log_weights = Vec::new();
    let mut prov =
        String::from("round,stage,walker,sample_index,task,state,temperature_factor,log_weight\n");
    let mut n = 0usize;
    for round in store.rounds()? {
        let tasks = store.round_tasks(round.round)?;
        let labels = tasks
            .iter()
            .find(|t| t.role == Role::Dedup && t.status == TaskStatus::Done)
            .map(|t| {
                store.array(
                    &keys::task_suffix(t.round, t.stage_index, t.walker),
                    "labels",
                )
            })
            .transpose()?
            .flatten();
        let mut i_round = 0usize;
        for t in tasks
            .iter()
            .filter(|t| t.role == Role::Explore && t.status == TaskStatus::Done)
        {
            let key = keys::task_suffix(t.round, t.stage_index, t.walker);
            let Some(x) = store.array(&key, "samples")? else {
                continue;
            };
            let e = store
                .array(&key, "energies")?
                .unwrap_or_else(|| Array::vector(vec![f64::NAN; x.rows()]));
            let lw = store
                .array(&key, "log_weights")?
                .filter(|a| a.data.len() == x.rows());
            let tau = tau_of(t.stage_index);
            for i in 0..x.rows() {
                let w = lw.as_ref().map(|a| a.data[i]);
                log_weights.push(w.unwrap_or(f64::NAN));
                let state = labels
                    .as_ref()
                    .and_then(|l| l.data.get(i_round))
                    .map(|v| (*v as i64).to_string())
                    .unwrap_or_default();
                prov.push_str(&format!(
                    "{},{},{},{},{},{},{},{}\n",
                    t.round,
                    t.stage,
                    t.walker,
                    i,
                    t.id,
                    state,
                    tau,
                    w.map(|v| v.to_string()).unwrap_or_default()
                ));
                i_round += 1;
            }
            samples.extend_from_slice(&x.data);
            energies.extend_from_slice(&e.data);
            n += x.rows();
        }
    }
    write(
        out,
        "samples.npy",
        &npy::encode_f64(&Array::matrix(n, dim, samples)),
        &mut files,
    )?;
    write(
        out,
        "energies.npy",
        &npy::encode_f64(&Array::vector(energies)),
        &mut files,
    )?;
    write(
        out,
        "log_weights.npy",
        &npy::encode_f64(&Array::vector(log_weights)),
        &mut files,
    )?;
    write(out, "samples.csv", prov.as_bytes(), &mut files)?;
    let tables = super::tables(store)?;
    let reps: Vec<f64> = tables
        .states
        .iter()
        .flat_map(|s| s.representative.clone())
        .collect();
    write(
        out,
        "states.npy",
        &npy::encode_f64(&Array::matrix(tables.states.len(), dim, reps)),
        &mut files,
    )?;
    write(
        out,
        "states.json",
        &serde_json::to_vec_pretty(&tables.states)?,
        &mut files,
    )?;
    let mut csv = String::from("id,energy,found_round,found_stage,found_task,found_walker,found_seed,found_sample,cost_to_find,sightings,free_energy,free_energy_err\n");
    for s in &tables.states {
        let opt = |v: Option<f64>| v.map(|x| x.to_string()).unwrap_or_default();
        csv.push_str(&format!(
            "{},{},{},{},{},{},{},{},{},{},{},{}\n",
            s.id,
            s.energy,
            s.found_round,
            s.found_stage,
            s.found_task,
            s.found_walker,
            s.found_seed,
            s.found_sample,
            s.cost_to_find,
            s.sightings,
            opt(s.free_energy),
            opt(s.free_energy_err)
        ));
    }
    write(out, "states.csv", csv.as_bytes(), &mut files)?;
    write(
        out,
        "rounds.json",
        &serde_json::to_vec_pretty(&tables.rounds)?,
        &mut files,
    )?;
    let mut csv = String::from("round,new_states,states,energy_evals,cumulative_energy_evals,cpu_seconds,wall_seconds,stop\n");
    for r in &tables.rounds {
        csv.push_str(&format!(
            "{},{},{},{},{},{},{},\"{}\"\n",
            r.round,
            r.new_states,
            r.states,
            r.energy_evals,
            r.cumulative_energy_evals,
            r.cpu_seconds,
            r.wall_seconds,
            r.stop.clone().unwrap_or_default().replace('"', "'")
        ));
    }
    write(out, "rounds.csv", csv.as_bytes(), &mut files)?;
    write(
        out,
        "events.json",
        &serde_json::to_vec_pretty(&store.events()?)?,
        &mut files,
    )?;
    for m in store.models()? {
        let tasks = store.round_tasks(m.round)?;
        if let Some(t) = tasks
            .iter()
            .find(|t| t.role == Role::Retrain && t.status == TaskStatus::Done)
        {
            if let Some(bytes) = store.blob(
                &keys::task_suffix(t.round, t.stage_index, t.walker),
                "model",
            )? {
                write(
                    out,
                    &format!("model-r{:04}.safetensors", m.round),
                    &bytes,
                    &mut files,
                )?;
            }
        }
    }
    Ok(files)
}

fn write(dir: &Path, name: &str, bytes: &[u8], files: &mut Vec<String>) -> anyhow::Result<()> {
    let mut f = std::fs::File::create(dir.join(name))?;
    f.write_all(bytes)?;
    files.push(name.to_string());
    Ok(())
}
