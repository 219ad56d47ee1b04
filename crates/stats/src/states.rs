//! State populations and free energies from weighted samples with state labels.
//!
//! Each sample carries a log weight (from [`crate::logspace::importance_log_weights`],
//! a metadynamics bias or MBAR) and a state label: `Some(id)` for a catalogue state or
//! `None` for a sample that could not be assigned. The population of a state is its
//! share of the total weight, P_s = Σ_{n∈s} w_n / Σ_n w_n (unassigned samples count in
//! the total), and its free energy is F_s = −ln P_s + ln P_ref in kT, relative to the
//! most populated state. Error bars come from a seeded nonparametric bootstrap over
//! the samples; a state with zero weight in a replicate has F = +inf there, which is
//! counted and carried into the interval instead of becoming NaN.

use std::collections::BTreeMap;

use rand::Rng;
use serde::{Deserialize, Serialize};

use crate::bootstrap::{resample_blocks, summarise, BootstrapOptions, Interval};
use crate::error::{check_same_len, Result, StatsError};
use crate::logspace::{checked_total, kish_ess};

/// A sample's state: `Some(id)` for a catalogue state, `None` for unassigned.
pub type StateLabel = Option<u32>;

/// Converts signed labels as stored in `.npy` files (negative = unassigned) to
/// [`StateLabel`]s, refusing ids that do not fit a `u32`.
pub fn labels_from_signed(raw: &[i64]) -> Result<Vec<StateLabel>> {
    raw.iter()
        .enumerate()
        .map(|(index, &v)| {
            if v < 0 {
                Ok(None)
            } else {
                u32::try_from(v)
                    .map(Some)
                    .map_err(|_| StatsError::InvalidValue {
                        what: "labels",
                        index,
                        value: v as f64,
                    })
            }
        })
        .collect()
}

/// One state's population and free energy with bootstrap uncertainty.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StateFreeEnergy {
    /// The catalogue id of the state.
    pub state: u32,
    /// How many samples carry this label (whatever their weight).
    pub n_samples: usize,
    /// The state's share of the total weight, in [0, 1].
    pub population: f64,
    /// Bootstrap standard error of `population`; `None` without replicates.
    pub population_err: Option<f64>,
    /// F_s − F_ref = −ln(P_s/P_ref) in kT; `None` when the state has zero weight
    /// (its free energy is +inf: it was not seen).
    pub free_energy: Option<f64>,
    /// Bootstrap standard error of `free_energy` in kT; `None` when the state has zero
    /// weight in any replicate (the standard error is then infinite) or without
    /// replicates. The reference state has `Some(0.0)`: its free energy is 0 by
    /// definition in every replicate.
    pub free_energy_err: Option<f64>,
    /// Confidence interval of `free_energy` by the chosen method; the upper end is +inf
    /// when more than the tail fraction of replicates had zero weight in this state.
    pub interval: Option<Interval>,
    /// How many replicates had zero weight in this state.
    pub empty_replicates: usize,
}

/// Free energies of all states of one evaluation.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StateFreeEnergies {
    /// The most populated state, whose free energy is 0 (ties go to the smaller id).
    pub reference_state: u32,
    /// One entry per state, sorted by id: the catalogue's states plus any label seen.
    pub states: Vec<StateFreeEnergy>,
    /// Share of the total weight carried by unassigned samples.
    pub unassigned_population: f64,
    /// Number of unassigned samples.
    pub n_unassigned: usize,
    /// Number of samples.
    pub n_samples: usize,
    /// Kish effective sample size of all the weights.
    pub ess: f64,
    /// The bootstrap options used.
    pub bootstrap: BootstrapOptions,
}

/// Estimates state populations and free energies (kT, relative to the most populated
/// state) with bootstrap error bars.
///
/// `log_w[n]` is sample n's log weight (−inf allowed for zero weight) and `labels[n]`
/// its state. `catalogue` lists states that must be reported even if no sample landed
/// in them (they get `free_energy: None`); labels outside it are reported too. The
/// reference state is fixed from the full sample and kept in every replicate, so each
/// replicate measures the same difference. Randomness comes only from `rng`: the same
/// generator state gives the same numbers.
pub fn state_free_energies<R: Rng + ?Sized>(
    log_w: &[f64],
    labels: &[StateLabel],
    catalogue: &[u32],
    opts: &BootstrapOptions,
    rng: &mut R,
) -> Result<StateFreeEnergies> {
    check_same_len("log_w", log_w.len(), "labels", labels.len())?;
    opts.validate()?;
    checked_total(log_w)?;
    let mut groups = SlotTable::new(labels, catalogue);
    let scaled = groups.scaled_weights(log_w);
    let full = groups.log_slot_weights(&scaled, 0..log_w.len());
    let reference =
        most_populated(&full[..groups.ids.len()]).ok_or(StatsError::InvalidParameter {
            name: "labels",
            reason: "no sample assigned to a state has non-zero weight".into(),
        })?;
    let log_total = crate::logspace::logsumexp(&full);

    let n_states = groups.ids.len();
    let mut f_reps = vec![Vec::with_capacity(opts.n_replicates); n_states];
    let mut p_reps = vec![Vec::with_capacity(opts.n_replicates); n_states];
    let mut indices = vec![0usize; log_w.len()];
    for _ in 0..opts.n_replicates {
        resample_blocks(rng, &mut indices, opts.block);
        let rep = groups.log_slot_weights(&scaled, indices.iter().copied());
        let rep_total = crate::logspace::logsumexp(&rep);
        for s in 0..n_states {
            f_reps[s].push(free_energy_difference(rep[reference], rep[s]));
            p_reps[s].push((rep[s] - rep_total).exp());
        }
    }

    let states = (0..n_states)
        .map(|s| {
            let estimate = free_energy_difference(full[reference], full[s]);
            let unc = summarise(estimate, &mut f_reps[s], opts);
            let population_err =
                (p_reps[s].len() >= 2).then(|| crate::bootstrap::standard_deviation(&p_reps[s]));
            StateFreeEnergy {
                state: groups.ids[s],
                n_samples: groups.counts[s],
                population: (full[s] - log_total).exp(),
                population_err,
                free_energy: estimate.is_finite().then_some(estimate),
                free_energy_err: if s == reference { Some(0.0) } else { unc.err },
                interval: if s == reference {
                    Some(Interval {
                        lower: 0.0,
                        upper: 0.0,
                    })
                } else if !estimate.is_finite() {
                    None
                } else {
                    unc.interval
                },
                empty_replicates: unc.n_infinite,
            }
        })
        .collect();
    Ok(StateFreeEnergies {
        reference_state: groups.ids[reference],
        states,
        unassigned_population: (full[n_states] - log_total).exp(),
        n_unassigned: groups.counts[n_states],
        n_samples: log_w.len(),
        ess: kish_ess(log_w)?,
        bootstrap: *opts,
    })
}

/// Returns ln W_ref − ln W_s, mapping the undefined case (both zero) to +inf: a state
/// with no weight is unseen, whatever the reference did.
fn free_energy_difference(log_w_ref: f64, log_w_state: f64) -> f64 {
    if log_w_state == f64::NEG_INFINITY {
        f64::INFINITY
    } else {
        log_w_ref - log_w_state
    }
}

/// Returns the slot with the largest log weight (first on ties), if any is non-zero.
fn most_populated(log_weights: &[f64]) -> Option<usize> {
    let mut best: Option<usize> = None;
    for (s, &v) in log_weights.iter().enumerate() {
        if v > f64::NEG_INFINITY && best.is_none_or(|b| v > log_weights[b]) {
            best = Some(s);
        }
    }
    best
}

/// Samples grouped by state: slot s < ids.len() is state ids[s], the last slot is
/// "unassigned". Weights are stored scaled by each slot's largest weight, so that sums
/// of a slot never underflow even when the slot is far below the others.
struct SlotTable {
    ids: Vec<u32>,
    slot_of_sample: Vec<usize>,
    counts: Vec<usize>,
    slot_max: Vec<f64>,
}

impl SlotTable {
    fn new(labels: &[StateLabel], catalogue: &[u32]) -> Self {
        let mut index: BTreeMap<u32, usize> = BTreeMap::new();
        for id in catalogue
            .iter()
            .copied()
            .chain(labels.iter().flatten().copied())
        {
            index.entry(id).or_insert(0);
        }
        let ids: Vec<u32> = index.keys().copied().collect();
        for (s, slot) in index.values_mut().enumerate() {
            *slot = s;
        }
        let unassigned = ids.len();
        let slot_of_sample: Vec<usize> = labels
            .iter()
            .map(|l| l.map_or(unassigned, |id| index[&id]))
            .collect();
        let mut counts = vec![0usize; ids.len() + 1];
        for &s in &slot_of_sample {
            counts[s] += 1;
        }
        Self {
            ids,
            slot_of_sample,
            counts,
            slot_max: Vec::new(),
        }
    }

    /// Returns exp(ln w_n − max of its slot), and records the slot maxima.
    fn scaled_weights(&mut self, log_w: &[f64]) -> Vec<f64> {
        self.slot_max = vec![f64::NEG_INFINITY; self.ids.len() + 1];
        for (&s, &lw) in self.slot_of_sample.iter().zip(log_w) {
            self.slot_max[s] = self.slot_max[s].max(lw);
        }
        self.slot_of_sample
            .iter()
            .zip(log_w)
            .map(|(&s, &lw)| {
                if lw == f64::NEG_INFINITY {
                    0.0
                } else {
                    (lw - self.slot_max[s]).exp()
                }
            })
            .collect()
    }

    /// Returns ln Σ w per slot over the drawn sample indices (repeats count again).
    fn log_slot_weights(&self, scaled: &[f64], draws: impl Iterator<Item = usize>) -> Vec<f64> {
        let mut acc = vec![0.0f64; self.ids.len() + 1];
        for i in draws {
            acc[self.slot_of_sample[i]] += scaled[i];
        }
        acc.iter()
            .zip(&self.slot_max)
            .map(|(&a, &m)| {
                if a > 0.0 {
                    m + a.ln()
                } else {
                    f64::NEG_INFINITY
                }
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    fn opts(n: usize) -> BootstrapOptions {
        BootstrapOptions {
            n_replicates: n,
            method: crate::IntervalMethod::Percentile,
            ..Default::default()
        }
    }

    #[test]
    fn exact_populations_from_known_weights() {
        // Weights 1, 1, 2 in state 0; 4 in state 7; 2 unassigned: total 10.
        let w = [1.0f64, 1.0, 2.0, 4.0, 2.0];
        let lw: Vec<f64> = w.iter().map(|v| v.ln()).collect();
        let labels = [Some(0), Some(0), Some(0), Some(7), None];
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let r = state_free_energies(&lw, &labels, &[3], &opts(0), &mut rng).unwrap();
        assert_eq!(r.reference_state, 0);
        assert!((r.unassigned_population - 0.2).abs() < 1e-15);
        assert_eq!(r.n_unassigned, 1);
        let ids: Vec<u32> = r.states.iter().map(|s| s.state).collect();
        assert_eq!(ids, vec![0, 3, 7]);
        assert!((r.states[0].population - 0.4).abs() < 1e-15);
        assert_eq!(r.states[0].free_energy, Some(0.0));
        // The catalogue state 3 was never seen: reported as None, not NaN.
        assert_eq!(r.states[1].free_energy, None);
        assert_eq!(r.states[1].population, 0.0);
        assert!((r.states[2].free_energy.unwrap() - 0.0).abs() < 1e-15);
        // Ties (4 = 4) go to the smaller id.
        assert_eq!(r.states[2].population, r.states[0].population);
    }

    #[test]
    fn deterministic_for_a_seed_and_rare_state_is_handled() {
        // 200 samples of state 0 and a single sample of state 1: many replicates miss
        // state 1 entirely (probability (1 − 1/201)^201 ≈ 0.37), so its standard error
        // is undefined (None) and the percentile upper end is +inf.
        let mut lw = vec![0.0; 201];
        lw[200] = 0.5;
        let mut labels = vec![Some(0); 201];
        labels[200] = Some(1);
        let run = |seed| {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            state_free_energies(&lw, &labels, &[], &opts(200), &mut rng).unwrap()
        };
        let a = run(5);
        assert_eq!(a, run(5));
        assert_ne!(a, run(6));
        let rare = &a.states[1];
        let expected = 200f64.ln() - 0.5;
        assert!((rare.free_energy.unwrap() - expected).abs() < 1e-12);
        assert!(rare.empty_replicates > 40 && rare.empty_replicates < 110);
        assert_eq!(rare.free_energy_err, None);
        let iv = rare.interval.unwrap();
        assert_eq!(iv.upper, f64::INFINITY);
        assert!(iv.lower.is_finite() && iv.lower < expected);
        // The reference state has F = 0 exactly, so a zero error bar.
        assert_eq!(a.states[0].free_energy, Some(0.0));
        assert_eq!(a.states[0].free_energy_err, Some(0.0));
    }

    #[test]
    fn far_apart_weights_do_not_underflow() {
        // State 1's weights are e^{-800} relative to state 0: a shared shift would
        // underflow them to zero; per-state scaling keeps F = 800 + ln(2/1).
        let lw = [0.0, -800.0, -800.0];
        let labels = [Some(0), Some(1), Some(1)];
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let r = state_free_energies(&lw, &labels, &[], &opts(0), &mut rng).unwrap();
        let f = r.states[1].free_energy.unwrap();
        assert!((f - (800.0 - 2f64.ln())).abs() < 1e-10, "{f}");
    }

    #[test]
    fn refuses_bad_input() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        assert!(matches!(
            state_free_energies(&[0.0], &[Some(0), None], &[], &opts(0), &mut rng),
            Err(StatsError::LengthMismatch { .. })
        ));
        assert!(matches!(
            state_free_energies(&[0.0, 1.0], &[None, None], &[], &opts(0), &mut rng),
            Err(StatsError::InvalidParameter { name: "labels", .. })
        ));
        assert_eq!(
            labels_from_signed(&[-1, 0, 4]).unwrap(),
            vec![None, Some(0), Some(4)]
        );
        assert!(labels_from_signed(&[1 << 40]).is_err());
    }

    #[test]
    fn bootstrap_error_matches_binomial_theory() {
        // Equal weights, 3000 samples, 1000 in state 1 and 2000 in state 0, so
        // F_1 = ln 2. For a binomial share p1 (p0 = 1 − p1) the delta method gives
        // var(ln(p0/p1)) = 1/(N p0 p1) = 1/(3000 · 2/9) = 0.0015, se ≈ 0.0387 (exact
        // algebra), and se(p1) = sqrt(p0 p1 / N).
        let n = 3000;
        let lw = vec![0.0; n];
        let labels: Vec<StateLabel> = (0..n).map(|i| Some(u32::from(i % 3 == 0))).collect();
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        let r = state_free_energies(&lw, &labels, &[], &opts(2000), &mut rng).unwrap();
        let s1 = &r.states[1];
        assert!((s1.free_energy.unwrap() - 2f64.ln()).abs() < 1e-12);
        let se = s1.free_energy_err.unwrap();
        assert!((se - 0.0015f64.sqrt()).abs() < 0.003, "bootstrap se {se}");
        let pe = s1.population_err.unwrap();
        let exact = ((1.0 / 3.0) * (2.0 / 3.0) / n as f64).sqrt();
        assert!(
            (pe - exact).abs() < 0.1 * exact,
            "population se {pe} vs {exact}"
        );
    }
}
