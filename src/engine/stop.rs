//! Stop rules: read the store, decide whether the campaign is done.
//!
//! Owns: the meaning of every `[stop]` key. Must not touch: processes, files.
//! A rule is a pure function of what is committed (plus the campaign's accumulated
//! wall time, which is the one rule that cannot be reproduced exactly).
//!
//! Goal rules (`expected_states`, `quiet_rounds`, `coverage`, `stable_rounds`,
//! `pooled_max_error`, `min_ess_fraction`) are checked first and combine with `combine = "any"` (the
//! default) or `"all"`; budgets (`max_rounds`, `max_energy_evals`,
//! `max_wall_seconds`) end the campaign whenever one is spent. The decision carries
//! the figures that met it.

use std::collections::{BTreeMap, BTreeSet};

use crate::protocol::Role;
use crate::spec::StopRules;
use crate::stats::{free_energies_stable, FreeEnergyPoint, StabilityCriterion};
use crate::store::{RoundRecord, StateRecord, StopDecision};

/// Facts the rules read.
pub struct Progress<'a> {
    pub rounds: &'a [RoundRecord],
    pub states: &'a [StateRecord],
    /// The role of each stage by name (to find the evaluate stage's metrics).
    pub evaluate_stage: Option<&'a str>,
}

/// The first rule that holds, as documented in the module doc.
pub fn check(rules: &StopRules, p: &Progress) -> Option<StopDecision> {
    let goals = goal_verdicts(rules, p);
    if !goals.is_empty() {
        let met: Vec<&(String, Result<String, String>)> =
            goals.iter().filter(|(_, v)| v.is_ok()).collect();
        if rules.all && met.len() == goals.len() {
            let names: Vec<&str> = goals.iter().map(|(n, _)| n.as_str()).collect();
            let reasons: Vec<String> = goals.iter().filter_map(|(_, v)| v.clone().ok()).collect();
            return Some(decision(&names.join("+"), reasons.join("; ")));
        }
        if !rules.all {
            if let Some((name, Ok(reason))) = met.first().map(|g| (&g.0, &g.1)) {
                return Some(decision(name, reason.clone()));
            }
        }
    }
    budget_verdict(rules, p)
}

/// Why each configured goal rule does or does not hold (Ok = holds, with its figures).
pub fn goal_verdicts(rules: &StopRules, p: &Progress) -> Vec<(String, Result<String, String>)> {
    let mut out = Vec::new();
    let n_states = p.states.len() as u32;
    if let Some(n) = rules.expected_states {
        let v = if n_states >= n {
            Ok(format!("{n_states} states found, {n} expected"))
        } else {
            Err(format!("{n_states} of {n} expected states found"))
        };
        out.push(("expected_states".into(), v));
    }
    if let Some(k) = rules.quiet_rounds {
        let k = k as usize;
        let quiet = p
            .rounds
            .iter()
            .rev()
            .take_while(|r| r.new_states == 0)
            .count();
        let v = if p.rounds.len() >= k && quiet >= k {
            Ok(format!("no new state in the last {k} rounds"))
        } else {
            Err(format!("{quiet} of {k} quiet rounds"))
        };
        out.push(("quiet_rounds".into(), v));
    }
    if let Some(c) = &rules.coverage {
        let visited: BTreeSet<u32> = p
            .rounds
            .iter()
            .flat_map(|r| r.cv_bins.iter().copied())
            .collect();
        let frac = visited.len() as f64 / f64::from(c.bins);
        let v = if frac >= c.fraction {
            Ok(format!(
                "{} of {} bins of the coverage range visited ({:.1}% ≥ {:.1}%)",
                visited.len(),
                c.bins,
                100.0 * frac,
                100.0 * c.fraction
            ))
        } else {
            Err(format!(
                "{:.1}% of the coverage range visited",
                100.0 * frac
            ))
        };
        out.push(("coverage".into(), v));
    }
    if let Some(s) = &rules.stability {
        out.push(("stable_rounds".into(), stability_verdict(s, p)));
    }
    if let Some(limit) = rules.pooled_max_error {
        out.push(("pooled_max_error".into(), pooled_verdict(limit, p)));
    }
    if let Some(floor) = rules.min_ess_fraction {
        let last = p
            .rounds
            .last()
            .and_then(|r| ess_fraction(r, p.evaluate_stage));
        let v = match last {
            Some(f) if f >= floor => Ok(format!("ESS fraction {f:.3} ≥ {floor}")),
            Some(f) => Err(format!("ESS fraction {f:.3} below {floor}")),
            None => Err("no ESS estimate yet".to_string()),
        };
        out.push(("min_ess_fraction".into(), v));
    }
    out
}

/// The evaluate stage's ESS fraction in a round.
fn ess_fraction(r: &RoundRecord, evaluate: Option<&str>) -> Option<f64> {
    let name = evaluate?;
    r.stages
        .iter()
        .find(|s| s.name == name)
        .and_then(|s| s.metrics.get("ess_fraction").copied())
}

/// Stability of every state's free energy over the last `rounds` rounds.
fn stability_verdict(s: &crate::spec::Stability, p: &Progress) -> Result<String, String> {
    let mut history: Vec<BTreeMap<u32, FreeEnergyPoint>> = Vec::new();
    for r in p.rounds {
        let mut m = BTreeMap::new();
        for st in p.states {
            if let Some(e) = st.estimates.iter().find(|e| e.round == r.round) {
                m.insert(
                    st.id,
                    FreeEnergyPoint {
                        free_energy: Some(e.free_energy),
                        err: e.free_energy_err,
                    },
                );
            }
        }
        history.push(m);
    }
    let c = StabilityCriterion {
        window: s.rounds as usize,
        tolerance: s.tolerance,
        error_tolerance: s.max_error,
    };
    match free_energies_stable(&history, &c) {
        Ok(rep) if rep.stable => Ok(format!(
            "free energies of {} states moved at most {:.3} kT over {} rounds (tolerance {}), largest error bar {:.3} kT (limit {})",
            rep.n_states, rep.max_change.unwrap_or(0.0), s.rounds, s.tolerance, rep.max_err.unwrap_or(0.0), s.max_error
        )),
        Ok(rep) => Err(format!("not stable: {:?}", rep.reason)),
        Err(e) => Err(format!("stability cannot be judged: {e}")),
    }
}

/// Every state's pooled free energy (`report::pooled_free_energies`: the estimates of
/// all rounds on the newest reference state, inverse-variance mean, error scaled up by
/// the Birge ratio when the rounds disagree) known from at least two rounds with an
/// error bar of at most `limit` kT. Unlike a stability window, rounds that scatter
/// more than their bars allow make the pooled bar grow, so the rule cannot be met by a
/// run whose per-round errors are too small.
fn pooled_verdict(limit: f64, p: &Progress) -> Result<String, String> {
    if p.states.is_empty() {
        return Err("no states yet".into());
    }
    let pooled = crate::report::pooled_free_energies(p.states);
    let mut worst: Option<(u32, f64)> = None;
    for (s, q) in p.states.iter().zip(&pooled) {
        match q {
            None => return Err(format!("state {} has no free-energy estimate yet", s.id)),
            Some(q) if q.n < 2 => {
                return Err(format!(
                    "state {} is estimated in {} round; pooling needs 2",
                    s.id, q.n
                ))
            }
            Some(q) if worst.is_none_or(|(_, e)| q.err > e) => worst = Some((s.id, q.err)),
            Some(_) => {}
        }
    }
    let (id, err) = worst.expect("at least one state");
    if err <= limit {
        Ok(format!(
            "every state's pooled free energy has an error bar ≤ {limit} kT (largest {err:.3} kT, state {id})"
        ))
    } else {
        Err(format!(
            "state {id}'s pooled free energy has an error bar of {err:.3} kT (limit {limit})"
        ))
    }
}

fn budget_verdict(rules: &StopRules, p: &Progress) -> Option<StopDecision> {
    let done = p.rounds.len() as u32;
    let evals: u64 = p.rounds.iter().map(|r| r.energy_evals).sum();
    let wall: f64 = p.rounds.iter().map(|r| r.wall_seconds).sum();
    if done >= rules.max_rounds {
        return Some(decision(
            "max_rounds",
            format!("{done} rounds done, the limit is {}", rules.max_rounds),
        ));
    }
    if let Some(max) = rules.max_energy_evals {
        if evals >= max {
            return Some(decision(
                "max_energy_evals",
                format!("{evals} energy evaluations spent, the budget is {max}"),
            ));
        }
    }
    if let Some(max) = rules.max_wall_seconds {
        if wall >= max {
            return Some(decision(
                "max_wall_seconds",
                format!("{wall:.0} s of rounds run, the budget is {max:.0} s"),
            ));
        }
    }
    None
}

fn decision(rule: &str, reason: String) -> StopDecision {
    StopDecision {
        rule: rule.to_string(),
        reason,
    }
}

/// The name of the campaign's evaluate stage, if it has one.
pub fn evaluate_stage(c: &crate::spec::Campaign) -> Option<&str> {
    c.stages()
        .into_iter()
        .find(|s| s.role == Role::Evaluate)
        .map(|s| s.name.as_str())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spec::Stability;
    use crate::store::StageTotals;

    fn round(n: u32, new: u32, evals: u64) -> RoundRecord {
        let mut eval = StageTotals {
            name: "evaluate".into(),
            ..Default::default()
        };
        eval.metrics
            .insert("ess_fraction".into(), 0.1 * f64::from(n));
        RoundRecord {
            v: 1,
            round: n,
            stages: vec![eval],
            new_states: new,
            states_total: 0,
            energy_evals: evals,
            cumulative_energy_evals: 0,
            cpu_seconds: 0.0,
            wall_seconds: 10.0,
            finished_unix: 0.0,
            stop: None,
            cv_bins: vec![n, n + 10],
        }
    }

    fn state(id: u32, estimates: &[(u32, f64, f64)]) -> StateRecord {
        let with_errors: Vec<(u32, f64, Option<f64>)> =
            estimates.iter().map(|&(r, f, e)| (r, f, Some(e))).collect();
        StateRecord::for_test(id, &with_errors)
    }

    fn rules() -> StopRules {
        StopRules {
            max_rounds: 5,
            max_energy_evals: None,
            max_wall_seconds: None,
            expected_states: None,
            quiet_rounds: None,
            all: false,
            stability: None,
            pooled_max_error: None,
            min_ess_fraction: None,
            coverage: None,
        }
    }

    #[test]
    fn pooled_error_rule_needs_two_rounds_and_punishes_scatter() {
        let rs: Vec<_> = (1..=2).map(|i| round(i, 0, 100)).collect();
        let verdict = |limit: f64, states: &[StateRecord]| {
            let p = Progress {
                rounds: &rs,
                states,
                evaluate_stage: None,
            };
            pooled_verdict(limit, &p)
        };
        let reference = state(0, &[(1, 0.0, 0.0), (2, 0.0, 0.0)]);
        // 1.0 ± 0.1 and 1.05 ± 0.1 agree: pooled error 0.1 / sqrt(2) = 0.0707 kT.
        let agree = [
            reference.clone(),
            state(1, &[(1, 1.0, 0.1), (2, 1.05, 0.1)]),
        ];
        let ok = verdict(0.08, &agree).unwrap();
        assert!(ok.contains("largest 0.071 kT, state 1"), "{ok}");
        assert!(verdict(0.05, &agree)
            .unwrap_err()
            .contains("0.071 kT (limit 0.05)"));
        // Bars of 0.01 kT but estimates 1 kT apart: the Birge ratio (70.7) makes the
        // pooled bar 0.5 kT, so small per-round bars alone cannot meet the rule.
        let scatter = [
            reference.clone(),
            state(1, &[(1, 1.0, 0.01), (2, 2.0, 0.01)]),
        ];
        assert!(verdict(0.1, &scatter).unwrap_err().contains("0.500 kT"));
        let fresh = [reference.clone(), state(1, &[(2, 1.0, 0.01)])];
        assert!(verdict(1.0, &fresh)
            .unwrap_err()
            .contains("pooling needs 2"));
        let unknown = [reference, state(1, &[])];
        assert!(verdict(1.0, &unknown)
            .unwrap_err()
            .contains("no free-energy estimate"));
        assert!(verdict(1.0, &[]).is_err());
        // Through check(): the rule's name is the decision's.
        let rules = StopRules {
            pooled_max_error: Some(0.08),
            ..rules()
        };
        let p = Progress {
            rounds: &rs,
            states: &agree,
            evaluate_stage: None,
        };
        assert_eq!(check(&rules, &p).unwrap().rule, "pooled_max_error");
    }

    #[test]
    fn each_rule_fires_at_its_threshold_and_not_before() {
        let rs: Vec<_> = (1..=3).map(|i| round(i, u32::from(i == 1), 100)).collect();
        let one = vec![state(0, &[])];
        let two = vec![state(0, &[]), state(1, &[])];
        let table: Vec<(StopRules, usize, &[StateRecord], Option<&str>)> = vec![
            (rules(), 3, &one, None),
            (
                StopRules {
                    max_rounds: 3,
                    ..rules()
                },
                3,
                &one,
                Some("max_rounds"),
            ),
            (
                StopRules {
                    max_energy_evals: Some(300),
                    ..rules()
                },
                3,
                &one,
                Some("max_energy_evals"),
            ),
            (
                StopRules {
                    max_energy_evals: Some(301),
                    ..rules()
                },
                3,
                &one,
                None,
            ),
            (
                StopRules {
                    max_wall_seconds: Some(30.0),
                    ..rules()
                },
                3,
                &one,
                Some("max_wall_seconds"),
            ),
            (
                StopRules {
                    expected_states: Some(2),
                    ..rules()
                },
                3,
                &one,
                None,
            ),
            (
                StopRules {
                    expected_states: Some(2),
                    ..rules()
                },
                3,
                &two,
                Some("expected_states"),
            ),
            (
                StopRules {
                    quiet_rounds: Some(2),
                    ..rules()
                },
                3,
                &one,
                Some("quiet_rounds"),
            ),
            (
                StopRules {
                    quiet_rounds: Some(3),
                    ..rules()
                },
                3,
                &one,
                None,
            ),
            (
                StopRules {
                    quiet_rounds: Some(2),
                    ..rules()
                },
                2,
                &one,
                None,
            ),
            (
                StopRules {
                    min_ess_fraction: Some(0.3),
                    ..rules()
                },
                2,
                &one,
                None,
            ),
            (
                StopRules {
                    min_ess_fraction: Some(0.3),
                    ..rules()
                },
                3,
                &one,
                Some("min_ess_fraction"),
            ),
            (
                StopRules {
                    expected_states: Some(2),
                    quiet_rounds: Some(2),
                    all: true,
                    ..rules()
                },
                3,
                &one,
                None,
            ),
            (
                StopRules {
                    expected_states: Some(2),
                    quiet_rounds: Some(2),
                    all: true,
                    ..rules()
                },
                3,
                &two,
                Some("expected_states+quiet_rounds"),
            ),
        ];
        for (i, (r, n, states, want)) in table.into_iter().enumerate() {
            let got = check(
                &r,
                &Progress {
                    rounds: &rs[..n],
                    states,
                    evaluate_stage: Some("evaluate"),
                },
            );
            assert_eq!(got.map(|d| d.rule), want.map(String::from), "row {i}");
        }
    }

    #[test]
    fn coverage_counts_distinct_bins_over_all_rounds() {
        let rs: Vec<_> = (1..=3).map(|i| round(i, 0, 1)).collect();
        let cv: crate::physics::cv::CollectiveVariable =
            serde_json::from_value(serde_json::json!({"cv": "coordinate", "index": 0})).unwrap();
        let cov = |fraction| crate::spec::Coverage {
            cv: cv.clone(),
            min: 0.0,
            max: 1.0,
            bins: 10,
            fraction,
        };
        let states: Vec<StateRecord> = vec![];
        let p = Progress {
            rounds: &rs,
            states: &states,
            evaluate_stage: None,
        };
        // Bins 1, 2, 3, 11, 12, 13: six distinct.
        assert!(check(
            &StopRules {
                coverage: Some(cov(0.6)),
                ..rules()
            },
            &p
        )
        .is_some());
        assert!(check(
            &StopRules {
                coverage: Some(cov(0.7)),
                ..rules()
            },
            &p
        )
        .is_none());
    }

    #[test]
    fn stability_needs_every_state_to_hold_still_with_small_error_bars() {
        let rs: Vec<_> = (1..=4).map(|i| round(i, 0, 1)).collect();
        let stab = Some(Stability {
            rounds: 2,
            tolerance: 0.1,
            max_error: 0.1,
        });
        let steady = vec![
            state(
                0,
                &[(1, 0.0, 0.0), (2, 0.0, 0.0), (3, 0.0, 0.0), (4, 0.0, 0.0)],
            ),
            state(
                1,
                &[
                    (1, 2.0, 0.05),
                    (2, 1.2, 0.05),
                    (3, 1.25, 0.05),
                    (4, 1.22, 0.05),
                ],
            ),
        ];
        let p = Progress {
            rounds: &rs,
            states: &steady,
            evaluate_stage: None,
        };
        let d = check(
            &StopRules {
                stability: stab.clone(),
                ..rules()
            },
            &p,
        )
        .expect("stable over rounds 2-4");
        assert!(d.reason.contains("moved at most 0.050 kT"), "{}", d.reason);
        let moving = vec![state(1, &[(2, 1.2, 0.05), (3, 1.4, 0.05), (4, 1.22, 0.05)])];
        let p = Progress {
            rounds: &rs,
            states: &moving,
            evaluate_stage: None,
        };
        assert!(check(
            &StopRules {
                stability: stab.clone(),
                ..rules()
            },
            &p
        )
        .is_none());
        let noisy = vec![state(1, &[(2, 1.2, 0.5), (3, 1.2, 0.5), (4, 1.2, 0.5)])];
        let p = Progress {
            rounds: &rs,
            states: &noisy,
            evaluate_stage: None,
        };
        assert!(check(
            &StopRules {
                stability: stab,
                ..rules()
            },
            &p
        )
        .is_none());
    }
}
