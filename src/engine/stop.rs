//! Stop rules: read the store, decide whether the campaign is done.
//!
//! Owns: the meaning of every `[stop]` key. Must not touch: processes, files.
//! A rule is a pure function of what is committed (plus the campaign's accumulated
//! wall time, which is the one rule that cannot be reproduced exactly).

use crate::spec::StopRules;
use crate::store::{RoundRecord, StopDecision};

/// Facts the rules read.
pub struct Progress<'a> {
    pub rounds: &'a [RoundRecord],
    pub states: u32,
}

/// The first rule that holds, in the order the rules are documented.
pub fn check(rules: &StopRules, p: &Progress) -> Option<StopDecision> {
    let done = p.rounds.len() as u32;
    let evals: u64 = p.rounds.iter().map(|r| r.energy_evals).sum();
    let wall: f64 = p.rounds.iter().map(|r| r.wall_seconds).sum();
    if let Some(n) = rules.expected_states {
        if p.states >= n {
            return Some(decision(
                "expected_states",
                format!("{} states found, {n} expected", p.states),
            ));
        }
    }
    if let Some(k) = rules.quiet_rounds {
        let k = k as usize;
        if p.rounds.len() >= k
            && p.rounds[p.rounds.len() - k..]
                .iter()
                .all(|r| r.new_states == 0)
        {
            return Some(decision(
                "quiet_rounds",
                format!("no new state in the last {k} rounds"),
            ));
        }
    }
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

#[cfg(test)]
mod tests {
    use super::*;

    fn round(n: u32, new: u32, evals: u64) -> RoundRecord {
        RoundRecord {
            v: 1,
            round: n,
            stages: vec![],
            new_states: new,
            states_total: 0,
            energy_evals: evals,
            cumulative_energy_evals: 0,
            cpu_seconds: 0.0,
            wall_seconds: 10.0,
            finished_unix: 0.0,
            stop: None,
        }
    }

    fn rules() -> StopRules {
        StopRules {
            max_rounds: 5,
            max_energy_evals: None,
            max_wall_seconds: None,
            expected_states: None,
            quiet_rounds: None,
        }
    }

    #[test]
    fn each_rule_fires_at_its_threshold_and_not_before() {
        let rs: Vec<_> = (1..=3).map(|i| round(i, u32::from(i == 1), 100)).collect();
        let table: Vec<(StopRules, usize, u32, Option<&str>)> = vec![
            (rules(), 3, 1, None),
            (
                StopRules {
                    max_rounds: 3,
                    ..rules()
                },
                3,
                1,
                Some("max_rounds"),
            ),
            (
                StopRules {
                    max_energy_evals: Some(300),
                    ..rules()
                },
                3,
                1,
                Some("max_energy_evals"),
            ),
            (
                StopRules {
                    max_energy_evals: Some(301),
                    ..rules()
                },
                3,
                1,
                None,
            ),
            (
                StopRules {
                    max_wall_seconds: Some(30.0),
                    ..rules()
                },
                3,
                1,
                Some("max_wall_seconds"),
            ),
            (
                StopRules {
                    expected_states: Some(2),
                    ..rules()
                },
                3,
                1,
                None,
            ),
            (
                StopRules {
                    expected_states: Some(2),
                    ..rules()
                },
                3,
                2,
                Some("expected_states"),
            ),
            (
                StopRules {
                    quiet_rounds: Some(2),
                    ..rules()
                },
                3,
                1,
                Some("quiet_rounds"),
            ),
            (
                StopRules {
                    quiet_rounds: Some(3),
                    ..rules()
                },
                3,
                1,
                None,
            ),
            (
                StopRules {
                    quiet_rounds: Some(2),
                    ..rules()
                },
                2,
                1,
                None,
            ),
        ];
        for (i, (r, n, states, want)) in table.into_iter().enumerate() {
            let got = check(
                &r,
                &Progress {
                    rounds: &rs[..n],
                    states,
                },
            );
            assert_eq!(got.map(|d| d.rule), want.map(String::from), "row {i}");
        }
    }
}
