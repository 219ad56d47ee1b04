//! Pure decision functions behind tarn's stop rules: free-energy stability over recent
//! rounds, coverage of a collective-variable range, and rounds without discovery.
//!
//! The engine keeps the history and the all/any combination; these functions only
//! look at numbers and return a verdict with the figures that decided it, so that the
//! reason for stopping can be stored and printed.

use std::collections::{BTreeMap, BTreeSet};

use serde::{Deserialize, Serialize};

use crate::error::{check_finite, Result, StatsError};
use crate::profile::Bins;

/// One state's free-energy estimate in one round (kT, relative to the reference).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct FreeEnergyPoint {
    /// The estimate; `None` when the state had zero weight that round.
    pub free_energy: Option<f64>,
    /// Its one-standard-error bar; `None` when undefined.
    pub err: Option<f64>,
}

/// The stability criterion: over the last `window` rounds every state's free energy
/// moved by less than `tolerance` and its latest error bar is below `error_tolerance`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct StabilityCriterion {
    /// k ≥ 1: the change is measured over the latest k + 1 estimates (k round-to-round
    /// steps), as max − min of them.
    pub window: usize,
    /// Largest allowed change (kT), strict.
    pub tolerance: f64,
    /// Largest allowed latest error bar (kT), strict.
    pub error_tolerance: f64,
}

/// Why the free energies are not yet stable (the first failing check found, in state
/// id order).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case", tag = "kind")]
pub enum Instability {
    /// Fewer rounds than the window needs.
    TooFewRounds {
        /// Rounds available.
        have: usize,
        /// Rounds needed (window + 1).
        need: usize,
    },
    /// No state has been estimated.
    NoStates,
    /// A state has no finite estimate in a round of the window (it is new, or it was
    /// unseen that round).
    MissingEstimate {
        /// The state.
        state: u32,
        /// Index of the round in the history.
        round: usize,
    },
    /// A state moved by at least the tolerance.
    Changed {
        /// The state.
        state: u32,
        /// max − min of its estimates over the window (kT).
        change: f64,
    },
    /// A state's latest error bar is missing or not below the error tolerance.
    ErrorTooLarge {
        /// The state.
        state: u32,
        /// Its latest error bar, `None` if undefined.
        err: Option<f64>,
    },
}

/// The stability verdict with its figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StabilityReport {
    /// True when every state passed both checks.
    pub stable: bool,
    /// Number of states checked (all states present in any round of the window).
    pub n_states: usize,
    /// Largest change over the window among states with complete estimates (kT).
    pub max_change: Option<f64>,
    /// Largest latest error bar among states that have one (kT).
    pub max_err: Option<f64>,
    /// Why it is not stable; `None` when stable.
    pub reason: Option<Instability>,
}

/// Decides whether every state's free energy is stable over the last rounds.
///
/// `rounds[r]` maps state id to its estimate in round r, oldest first. The states
/// checked are those present in any of the latest `window + 1` rounds; a state missing
/// from a round of the window, or with `free_energy: None` there, is not stable.
pub fn free_energies_stable(
    rounds: &[BTreeMap<u32, FreeEnergyPoint>],
    criterion: &StabilityCriterion,
) -> Result<StabilityReport> {
    validate(criterion)?;
    let need = criterion.window + 1;
    if rounds.len() < need {
        return Ok(StabilityReport {
            stable: false,
            n_states: rounds.last().map_or(0, BTreeMap::len),
            max_change: None,
            max_err: None,
            reason: Some(Instability::TooFewRounds {
                have: rounds.len(),
                need,
            }),
        });
    }
    let first = rounds.len() - need;
    let recent = &rounds[first..];
    let states: BTreeSet<u32> = recent.iter().flat_map(|r| r.keys().copied()).collect();
    let mut reason = states.is_empty().then_some(Instability::NoStates);
    let (mut max_change, mut max_err): (Option<f64>, Option<f64>) = (None, None);
    for &state in &states {
        match state_change(recent, state) {
            Err(offset) => {
                reason.get_or_insert(Instability::MissingEstimate {
                    state,
                    round: first + offset,
                });
            }
            Ok(change) => {
                max_change = Some(max_change.map_or(change, |m| m.max(change)));
                if change >= criterion.tolerance {
                    reason.get_or_insert(Instability::Changed { state, change });
                }
            }
        }
        let err = recent
            .last()
            .and_then(|r| r.get(&state))
            .and_then(|p| p.err);
        if let Some(e) = err {
            max_err = Some(max_err.map_or(e, |m| m.max(e)));
        }
        if !err.is_some_and(|e| e < criterion.error_tolerance) {
            reason.get_or_insert(Instability::ErrorTooLarge { state, err });
        }
    }
    Ok(StabilityReport {
        stable: reason.is_none(),
        n_states: states.len(),
        max_change,
        max_err,
        reason,
    })
}

/// Returns max − min of a state's estimates over the rounds, or the offset of the first
/// round where it has no finite estimate.
fn state_change(
    rounds: &[BTreeMap<u32, FreeEnergyPoint>],
    state: u32,
) -> std::result::Result<f64, usize> {
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    for (offset, round) in rounds.iter().enumerate() {
        match round
            .get(&state)
            .and_then(|p| p.free_energy)
            .filter(|f| f.is_finite())
        {
            Some(f) => {
                lo = lo.min(f);
                hi = hi.max(f);
            }
            None => return Err(offset),
        }
    }
    Ok(hi - lo)
}

fn validate(c: &StabilityCriterion) -> Result<()> {
    if c.window == 0 {
        return Err(StatsError::InvalidParameter {
            name: "window",
            reason: "must be at least 1 round".into(),
        });
    }
    for (name, v) in [
        ("tolerance", c.tolerance),
        ("error_tolerance", c.error_tolerance),
    ] {
        if !(v > 0.0 && v.is_finite()) {
            return Err(StatsError::InvalidParameter {
                name,
                reason: format!("must be positive and finite, got {v}"),
            });
        }
    }
    Ok(())
}

/// Returns the fraction of bins of the range that hold at least `min_count` samples
/// of the collective variable (samples outside the range are ignored).
pub fn visited_bin_fraction(cv: &[f64], bins: &Bins, min_count: usize) -> Result<f64> {
    check_finite("cv", cv)?;
    let bins = Bins::new(bins.lo, bins.hi, bins.n_bins)?;
    let mut counts = vec![0usize; bins.n_bins];
    for &x in cv {
        if let Some(b) = bins.index(x) {
            counts[b] += 1;
        }
    }
    let need = min_count.max(1);
    Ok(counts.iter().filter(|&&c| c >= need).count() as f64 / bins.n_bins as f64)
}

/// Returns how many of the latest rounds found no new state, given the catalogue size
/// after each round (oldest first; the catalogue is empty before round 0).
///
/// A catalogue that shrinks (states merged) counts as "no new state" for that round.
pub fn rounds_without_new_state(catalogue_size_after_round: &[usize]) -> usize {
    let mut count = 0;
    for r in (0..catalogue_size_after_round.len()).rev() {
        let before = if r == 0 {
            0
        } else {
            catalogue_size_after_round[r - 1]
        };
        if catalogue_size_after_round[r] > before {
            break;
        }
        count += 1;
    }
    count
}

#[cfg(test)]
mod tests {
    use super::*;

    fn round(entries: &[(u32, Option<f64>, Option<f64>)]) -> BTreeMap<u32, FreeEnergyPoint> {
        entries
            .iter()
            .map(|&(s, f, e)| {
                (
                    s,
                    FreeEnergyPoint {
                        free_energy: f,
                        err: e,
                    },
                )
            })
            .collect()
    }

    const C: StabilityCriterion = StabilityCriterion {
        window: 2,
        tolerance: 0.1,
        error_tolerance: 0.05,
    };

    #[test]
    fn stability_table() {
        let steady = |f: f64| round(&[(0, Some(0.0), Some(0.0)), (1, Some(f), Some(0.02))]);
        struct Case {
            name: &'static str,
            rounds: Vec<BTreeMap<u32, FreeEnergyPoint>>,
            stable: bool,
            reason: Option<Instability>,
        }
        let cases = vec![
            Case {
                name: "too few rounds",
                rounds: vec![steady(1.0), steady(1.0)],
                stable: false,
                reason: Some(Instability::TooFewRounds { have: 2, need: 3 }),
            },
            Case {
                name: "steady within tolerance",
                rounds: vec![steady(5.0), steady(1.0), steady(1.05), steady(0.96)],
                stable: true,
                reason: None,
            },
            Case {
                name: "moved by the tolerance exactly (strict)",
                rounds: vec![steady(1.0), steady(1.1), steady(1.05)],
                stable: false,
                reason: Some(Instability::Changed {
                    state: 1,
                    change: 1.1 - 1.0,
                }),
            },
            Case {
                name: "new state in the window",
                rounds: vec![
                    steady(1.0),
                    steady(1.0),
                    round(&[
                        (0, Some(0.0), Some(0.0)),
                        (1, Some(1.0), Some(0.01)),
                        (2, Some(3.0), Some(0.01)),
                    ]),
                ],
                stable: false,
                reason: Some(Instability::MissingEstimate { state: 2, round: 0 }),
            },
            Case {
                name: "unseen in a round",
                rounds: vec![
                    steady(1.0),
                    round(&[(0, Some(0.0), Some(0.0)), (1, None, None)]),
                    steady(1.0),
                ],
                stable: false,
                reason: Some(Instability::MissingEstimate { state: 1, round: 1 }),
            },
            Case {
                name: "error bar too large",
                rounds: vec![
                    steady(1.0),
                    steady(1.0),
                    round(&[(0, Some(0.0), Some(0.0)), (1, Some(1.0), Some(0.05))]),
                ],
                stable: false,
                reason: Some(Instability::ErrorTooLarge {
                    state: 1,
                    err: Some(0.05),
                }),
            },
            Case {
                name: "error bar undefined",
                rounds: vec![
                    steady(1.0),
                    steady(1.0),
                    round(&[(0, Some(0.0), Some(0.0)), (1, Some(1.0), None)]),
                ],
                stable: false,
                reason: Some(Instability::ErrorTooLarge {
                    state: 1,
                    err: None,
                }),
            },
            Case {
                name: "no states",
                rounds: vec![round(&[]); 3],
                stable: false,
                reason: Some(Instability::NoStates),
            },
        ];
        for case in cases {
            let r = free_energies_stable(&case.rounds, &C).unwrap();
            assert_eq!(r.stable, case.stable, "{}", case.name);
            assert_eq!(r.reason, case.reason, "{}", case.name);
        }
        let r = free_energies_stable(&[steady(5.0), steady(1.0), steady(1.05), steady(0.96)], &C)
            .unwrap();
        assert_eq!(r.n_states, 2);
        assert!((r.max_change.unwrap() - 0.09).abs() < 1e-12);
        assert_eq!(r.max_err, Some(0.02));
    }

    #[test]
    fn stability_refuses_bad_criteria() {
        for c in [
            StabilityCriterion { window: 0, ..C },
            StabilityCriterion {
                tolerance: 0.0,
                ..C
            },
            StabilityCriterion {
                error_tolerance: f64::NAN,
                ..C
            },
        ] {
            assert!(free_energies_stable(&[], &c).is_err());
        }
    }

    #[test]
    fn coverage_table() {
        let bins = Bins::new(0.0, 1.0, 4).unwrap();
        let cases: [(&[f64], usize, f64); 5] = [
            (&[], 1, 0.0),
            (&[0.1, 0.1, 0.9], 1, 0.5),
            (&[0.1, 0.1, 0.9], 2, 0.25),
            (&[0.1, 0.3, 0.6, 1.0, 5.0, -1.0], 1, 1.0),
            (&[0.1], 0, 0.25),
        ];
        for (cv, min_count, want) in cases {
            assert_eq!(
                visited_bin_fraction(cv, &bins, min_count).unwrap(),
                want,
                "{cv:?} {min_count}"
            );
        }
        assert!(visited_bin_fraction(&[f64::NAN], &bins, 1).is_err());
    }

    #[test]
    fn discovery_table() {
        let cases: [(&[usize], usize); 6] = [
            (&[], 0),
            (&[3], 0),
            (&[0], 1),
            (&[2, 3, 3, 3], 2),
            (&[2, 3, 4], 0),
            (&[2, 5, 4, 4], 2),
        ];
        for (sizes, want) in cases {
            assert_eq!(rounds_without_new_state(sizes), want, "{sizes:?}");
        }
    }
}
