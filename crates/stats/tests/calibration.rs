//! Calibration of the state free-energy error bars: over 50 independent seeds of a
//! small double-well evaluation, the nominal 95% bootstrap interval of ΔF must cover
//! the exact ΔF in 90–99% of them.
//!
//! Each seed draws N exact samples from a biased proposal q with known density (an
//! equal mixture of two normals at ±1, while the target puts unequal weight on the
//! wells and has a different shape), reweights them to p ∝ exp(−U) with
//! ln w = −U − ln q — exactly what the evaluate stage does with a flow's samples — and
//! asks [`tarn_stats::state_free_energies`] for ΔF = F_B − F_A with its interval. The
//! exact ΔF comes from Simpson quadrature (exact result, status R). Seeds are 0..50,
//! fixed before the first run. History, for honesty: the first run asserted the
//! percentile interval (then the default), which covered 42/50 here although it
//! covers 94.6% over seeds 0..1000; the default became the standard-error interval
//! (45/50 here, 95.5% over seeds 0..1000), and the 1000-seed test on fresh seeds
//! 1000..2000 was added so that calibration rests on more than one block of 50.

mod common;

use common::{exact_delta_f, label, DoubleWell, Mixture};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use tarn_stats::{
    ess_fraction, importance_log_weights, state_free_energies, BootstrapOptions, Interval,
    IntervalMethod,
};

const WELL: DoubleWell = DoubleWell {
    height: 3.0,
    tilt: 0.5,
};
const PROPOSAL: Mixture = Mixture {
    centers: [-1.0, 1.0],
    sigma: 0.35,
    weight_first: 0.5,
};
const N_SAMPLES: usize = 1000;

/// One seed's evaluation: the ΔF interval by each method and the ESS fraction.
struct Trial {
    percentile: Interval,
    standard_error: Interval,
    ess_fraction: f64,
}

fn trial(seed: u64) -> Trial {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let x: Vec<f64> = (0..N_SAMPLES).map(|_| PROPOSAL.sample(&mut rng)).collect();
    let u: Vec<f64> = x.iter().map(|&x| WELL.energy(x)).collect();
    let log_q: Vec<f64> = x.iter().map(|&x| PROPOSAL.log_density(x)).collect();
    let lw = importance_log_weights(&u, &log_q).unwrap();
    let labels: Vec<Option<u32>> = x.iter().map(|&x| label(x)).collect();
    let interval_for = |method| {
        let opts = BootstrapOptions {
            n_replicates: 400,
            confidence: 0.95,
            method,
            block: 1,
        };
        let mut boot_rng = ChaCha8Rng::seed_from_u64(1_000_000 + seed);
        let est = state_free_energies(&lw, &labels, &[0, 1], &opts, &mut boot_rng).unwrap();
        // ΔF = F_B − F_A: B's interval if A is the reference, else minus A's.
        if est.reference_state == 0 {
            est.states[1].interval.unwrap()
        } else {
            let a = est.states[0].interval.unwrap();
            Interval {
                lower: -a.upper,
                upper: -a.lower,
            }
        }
    };
    Trial {
        percentile: interval_for(IntervalMethod::Percentile),
        standard_error: interval_for(IntervalMethod::StandardError),
        ess_fraction: ess_fraction(&lw).unwrap(),
    }
}

/// Returns the coverage of the exact ΔF by the percentile and the standard-error
/// intervals, and the mean ESS fraction, over the seeds.
fn coverage(seeds: std::ops::Range<u64>) -> (f64, f64, f64) {
    let exact = exact_delta_f(|x| WELL.energy(x));
    let n = (seeds.end - seeds.start) as f64;
    let (mut hit_p, mut hit_se, mut ess) = (0usize, 0usize, 0.0);
    for seed in seeds {
        let t = trial(seed);
        hit_p += usize::from(t.percentile.contains(exact));
        hit_se += usize::from(t.standard_error.contains(exact));
        ess += t.ess_fraction;
    }
    (hit_p as f64 / n, hit_se as f64 / n, ess / n)
}

#[test]
fn nominal_95_percent_interval_covers_exact_delta_f_in_90_to_99_percent_of_50_seeds() {
    // The default interval (standard error) is asserted; the percentile interval is
    // printed beside it. For seeds 0..50 they cover in 45/50 and 42/50: a window of
    // 90–99% at 50 seeds is missed by about 12% of seed blocks even for an exactly
    // calibrated interval (binomial spread ±3%), which is why the 1000-seed test
    // below is the real calibration evidence.
    let exact = exact_delta_f(|x| WELL.energy(x));
    let (cov_p, cov_se, ess) = coverage(0..50);
    eprintln!(
        "calibration over 50 seeds (N = {N_SAMPLES}, exact ΔF = {exact:.4} kT, mean ESS fraction \
         {ess:.3}): standard-error coverage {:.0}% (default), percentile coverage {:.0}%",
        100.0 * cov_se,
        100.0 * cov_p
    );
    assert_eq!(
        BootstrapOptions::default().method,
        IntervalMethod::StandardError
    );
    assert!(
        (0.90..=0.99).contains(&cov_se),
        "standard-error coverage {cov_se}"
    );
    // The proposal really is biased: weights are far from uniform.
    assert!(ess < 0.9, "ESS fraction {ess}");
}

/// The same over 1000 seeds (binomial error ±0.7%), seeds 1000..2000 so that they do
/// not overlap the 50-seed test. Both interval methods must lie within 93–97%. It takes
/// about 4 s in --release and is skipped in unoptimised builds.
#[test]
#[cfg_attr(
    debug_assertions,
    ignore = "about 70 s unoptimised; run with --release"
)]
fn coverage_over_1000_seeds_is_within_two_percent_of_nominal() {
    let (cov_p, cov_se, ess) = coverage(1000..2000);
    eprintln!(
        "calibration over 1000 seeds: standard error {:.1}%, percentile {:.1}%, mean ESS \
         fraction {ess:.3}",
        100.0 * cov_se,
        100.0 * cov_p
    );
    assert!(
        (0.93..=0.97).contains(&cov_se),
        "standard-error coverage {cov_se}"
    );
    assert!(
        (0.93..=0.97).contains(&cov_p),
        "percentile coverage {cov_p}"
    );
}
