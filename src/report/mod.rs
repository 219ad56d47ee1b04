//! The read side: the tables that `status`, `rounds`, `states` and `export` print, built
//! from the store (or, while a campaign runs, from the tables file it publishes).
//!
//! Owns: the names and meanings of every column and JSON key users read.
//! Must not touch: the engine's control flow; it only reads.

pub mod export;
pub mod html;
pub mod path;
pub mod plots;

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::store::{RoundRecord, StateRecord, Store, StoreError};

/// Everything the read commands print.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Tables {
    pub campaign: String,
    pub rounds: Vec<RoundRow>,
    pub states: Vec<StateRow>,
    pub finished: Option<String>,
}

/// One row of `tarn rounds`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct RoundRow {
    pub round: u32,
    pub new_states: u32,
    pub states: u32,
    pub energy_evals: u64,
    pub cumulative_energy_evals: u64,
    pub cpu_seconds: f64,
    pub wall_seconds: f64,
    pub stages: Vec<crate::store::StageTotals>,
    pub stop: Option<String>,
}

/// One row of `tarn states` (the keys promised in the project's docs).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct StateRow {
    pub id: u32,
    /// Energy of the quenched minimum, in the system's energy unit.
    pub energy: f64,
    pub found_round: u32,
    pub found_stage: String,
    pub found_task: String,
    pub found_walker: u32,
    pub found_seed: u64,
    pub found_sample: u64,
    pub representative: Vec<f64>,
    /// In kT, relative to the most populated state; null until estimated.
    pub free_energy: Option<f64>,
    pub free_energy_err: Option<f64>,
    /// The rounds' estimates pooled (inverse-variance mean, Birge-scaled error; see
    /// [`pooled_free_energies`]); null until estimated.
    #[serde(default)]
    pub pooled_free_energy: Option<f64>,
    #[serde(default)]
    pub pooled_free_energy_err: Option<f64>,
    /// Rounds pooled.
    #[serde(default)]
    pub pooled_rounds: usize,
    /// Energy evaluations spent before the discovery (see DEVELOPERS.md).
    pub cost_to_find: u64,
    pub sightings: u64,
}

impl From<&RoundRecord> for RoundRow {
    fn from(r: &RoundRecord) -> Self {
        RoundRow {
            round: r.round,
            new_states: r.new_states,
            states: r.states_total,
            energy_evals: r.energy_evals,
            cumulative_energy_evals: r.cumulative_energy_evals,
            cpu_seconds: r.cpu_seconds,
            wall_seconds: r.wall_seconds,
            stages: r.stages.clone(),
            stop: r.stop.as_ref().map(|s| s.reason.clone()),
        }
    }
}

impl From<&StateRecord> for StateRow {
    fn from(s: &StateRecord) -> Self {
        let last = s.estimates.last();
        StateRow {
            id: s.id,
            energy: s.energy,
            found_round: s.found.round,
            found_stage: s.found.stage.clone(),
            found_task: s.found.task.clone(),
            found_walker: s.found.walker,
            found_seed: s.found.seed,
            found_sample: s.found.sample_index,
            representative: s.representative.clone(),
            free_energy: last.map(|e| e.free_energy),
            free_energy_err: last.and_then(|e| e.free_energy_err),
            pooled_free_energy: None,
            pooled_free_energy_err: None,
            pooled_rounds: 0,
            cost_to_find: s.found.cost_to_find,
            sightings: s.sightings.values().sum(),
        }
    }
}

/// Builds the tables from the store.
pub fn tables(store: &Store) -> Result<Tables, StoreError> {
    Ok(Tables {
        campaign: store.meta()?.campaign,
        rounds: store.rounds()?.iter().map(RoundRow::from).collect(),
        states: state_rows(&store.states()?),
        finished: store.finished()?.map(|d| d.reason),
    })
}

/// The catalogue's rows, each with its pooled free energy.
fn state_rows(states: &[StateRecord]) -> Vec<StateRow> {
    let pooled = pooled_free_energies(states);
    states
        .iter()
        .zip(pooled)
        .map(|(s, p)| {
            let mut row = StateRow::from(s);
            if let Some(p) = p {
                row.pooled_free_energy = Some(p.value);
                row.pooled_free_energy_err = Some(p.err);
                row.pooled_rounds = p.n;
            }
            row
        })
        .collect()
}

/// Each state's free energy pooled over rounds, relative to the newest round's reference
/// state (the most populated one, F = 0). A round whose reference was another state is
/// shifted onto the newest reference by that round's own estimate of it, with the two
/// error bars combined in quadrature (their covariance is ignored, which overstates
/// the bar). The shifted estimates are combined by [`crate::stats::pool`]: the
/// inverse-variance mean, its error scaled by the Birge ratio when the rounds scatter
/// more than their error bars allow. Rounds are independent draws when each round's
/// evaluation samples afresh (flow generation); for trajectory-based evaluation the
/// Birge scale is what keeps the pooled bar honest.
pub fn pooled_free_energies(states: &[StateRecord]) -> Vec<Option<crate::stats::Pooled>> {
    let mut reference: BTreeMap<u32, u32> = BTreeMap::new();
    for s in states {
        for e in &s.estimates {
            if e.free_energy == 0.0 {
                reference.entry(e.round).or_insert(s.id);
            }
        }
    }
    let Some((_, &current)) = reference.iter().next_back() else {
        return vec![None; states.len()];
    };
    let Some(anchor) = states.iter().find(|s| s.id == current) else {
        return vec![None; states.len()];
    };
    // The newest reference's estimate in each round: (F, error), 0 ± 0 where it was the
    // reference itself.
    let shift: BTreeMap<u32, (f64, f64)> = anchor
        .estimates
        .iter()
        .map(|e| {
            let err = if e.free_energy == 0.0 {
                0.0
            } else {
                e.free_energy_err.unwrap_or(f64::NAN)
            };
            (e.round, (e.free_energy, err))
        })
        .collect();
    states
        .iter()
        .map(|s| {
            let pairs: Vec<(f64, f64)> = s
                .estimates
                .iter()
                .filter_map(|e| {
                    let (f_ref, e_ref) = *shift.get(&e.round)?;
                    if s.id == current {
                        return Some((0.0, 0.0));
                    }
                    let err = e.free_energy_err.unwrap_or(f64::NAN);
                    Some((e.free_energy - f_ref, err.hypot(e_ref)))
                })
                .collect();
            crate::stats::pool(&pairs)
        })
        .collect()
}

/// Formats the rounds table for people.
pub fn rounds_text(t: &Tables) -> String {
    let mut out =
        String::from("round  new  states  energy evals  cumulative    cpu s   wall s  stop\n");
    for r in &t.rounds {
        out.push_str(&format!(
            "{:>5}  {:>3}  {:>6}  {:>12}  {:>10}  {:>7.1}  {:>7.1}  {}\n",
            r.round,
            r.new_states,
            r.states,
            r.energy_evals,
            r.cumulative_energy_evals,
            r.cpu_seconds,
            r.wall_seconds,
            r.stop.as_deref().unwrap_or("")
        ));
        for s in &r.stages {
            let metrics: Vec<String> = s
                .metrics
                .iter()
                .map(|(k, v)| format!("{k}={}", short(*v)))
                .collect();
            out.push_str(&format!(
                "         {:<12} {:>3} tasks {:>8} samples {:>12} evals  {}\n",
                s.name,
                s.tasks,
                s.samples,
                s.energy_evals,
                metrics.join(" ")
            ));
        }
    }
    if t.rounds.is_empty() {
        out.push_str("(no round completed yet)\n");
    }
    out
}

/// Formats the catalogue for people.
pub fn states_text(t: &Tables) -> String {
    let mut out = String::from("state        energy  found in  task                     seed                  cost to find  sightings  F last round [kT]  F pooled [kT]\n");
    for s in &t.states {
        let f = match (s.free_energy, s.free_energy_err) {
            (Some(f), Some(e)) => format!("{f:.3} ± {e:.3}"),
            (Some(f), None) => format!("{f:.3}"),
            _ => "-".into(),
        };
        let pooled = match (s.pooled_free_energy, s.pooled_free_energy_err) {
            (Some(f), Some(e)) => format!("{f:.3} ± {e:.3} ({} rounds)", s.pooled_rounds),
            _ => "-".into(),
        };
        let f = format!("{f:<17}  {pooled}");
        out.push_str(&format!(
            "{:>5}  {:>12.6}  round {:>3}  {:<24} {:<20}  {:>12}  {:>9}  {}\n",
            s.id,
            s.energy,
            s.found_round,
            s.found_task,
            s.found_seed,
            s.cost_to_find,
            s.sightings,
            f
        ));
    }
    if t.states.is_empty() {
        out.push_str("(no state found yet)\n");
    }
    out
}

fn short(v: f64) -> String {
    if v == v.trunc() && v.abs() < 1e9 {
        format!("{v:.0}")
    } else {
        format!("{v:.4}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn state(id: u32, estimates: &[(u32, f64, Option<f64>)]) -> StateRecord {
        StateRecord::for_test(id, estimates)
    }

    #[test]
    fn rounds_with_another_reference_are_shifted_onto_the_newest_one() {
        // Round 1: state 0 is the reference and state 1 sits at +0.4 ± 0.1.
        // Round 2: state 1 is the reference and state 0 sits at +0.2 ± 0.1. The newest
        // reference is state 1, so state 0 pools {−0.4 ± 0.1 (round 1 shifted), +0.2 ± 0.1}.
        let states = [
            state(0, &[(1, 0.0, Some(0.0)), (2, 0.2, Some(0.1))]),
            state(1, &[(1, 0.4, Some(0.1)), (2, 0.0, Some(0.0))]),
        ];
        let p = pooled_free_energies(&states);
        let s0 = p[0].unwrap();
        let s1 = p[1].unwrap();
        assert_eq!((s1.value, s1.err, s1.n), (0.0, 0.0, 2));
        assert_eq!(s0.n, 2);
        assert!((s0.value - (-0.1)).abs() < 1e-12, "{}", s0.value);
        // The two disagree by 0.6 with bars of 0.1: the Birge ratio scales the error
        // to the scatter, |−0.4 − 0.2| / 2 = 0.3.
        assert!((s0.err - 0.3).abs() < 1e-9, "{}", s0.err);
    }

    #[test]
    fn nothing_is_pooled_before_any_estimate() {
        let states = [state(0, &[]), state(1, &[])];
        assert!(pooled_free_energies(&states).iter().all(Option::is_none));
    }
}
