//! Log-space weight arithmetic: logsumexp, normalised log weights, importance weights,
//! the Kish effective sample size and the importance-sampling estimate of ln Z.
//!
//! Importance weights of a flow's samples span hundreds of orders of magnitude, so
//! everything here works on ln w and never exponentiates without first subtracting the
//! maximum. A log weight of -inf is a legal zero weight (for example a sample with
//! infinite energy); NaN and +inf are refused by the checked functions.

use serde::{Deserialize, Serialize};

use crate::error::{
    check_finite, check_log_weights, check_non_empty, check_same_len, Result, StatsError,
};

/// Returns ln Σ exp(v) computed stably by factoring out the maximum.
///
/// An empty slice or one whose entries are all -inf gives -inf (the log of a zero sum),
/// a +inf entry gives +inf, and a NaN entry gives NaN: this is the unchecked building
/// block, and callers that need validation use the checked functions of this module.
pub fn logsumexp(values: &[f64]) -> f64 {
    let max = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if values.iter().any(|v| v.is_nan()) {
        return f64::NAN;
    }
    if max.is_infinite() {
        return max;
    }
    let sum: f64 = values.iter().map(|v| (v - max).exp()).sum();
    max + sum.ln()
}

/// Returns ln w − ln Σ w, the log weights normalised so that their weights sum to one.
///
/// Fails if a log weight is NaN or +inf, if the slice is empty, or if every weight is
/// zero, because no normalisation exists then.
pub fn normalised_log_weights(log_w: &[f64]) -> Result<Vec<f64>> {
    let total = checked_total(log_w)?;
    Ok(log_w.iter().map(|v| v - total).collect())
}

/// Returns the importance log weights ln w = −u(x) − ln q(x) of samples drawn from q.
///
/// `reduced_energy` is u = U/kT of each sample under the target and `log_q` the
/// sampler's log density of the same sample. An infinite energy (+inf) gives a zero
/// weight (-inf); a NaN energy, a -inf energy or a non-finite ln q is refused, since
/// such a sample cannot have been drawn from q or is not a valid configuration.
pub fn importance_log_weights(reduced_energy: &[f64], log_q: &[f64]) -> Result<Vec<f64>> {
    check_same_len("reduced_energy", reduced_energy.len(), "log_q", log_q.len())?;
    check_finite("log_q", log_q)?;
    if let Some(index) = reduced_energy
        .iter()
        .position(|u| u.is_nan() || *u == f64::NEG_INFINITY)
    {
        return Err(StatsError::InvalidValue {
            what: "reduced_energy",
            index,
            value: reduced_energy[index],
        });
    }
    Ok(reduced_energy
        .iter()
        .zip(log_q)
        .map(|(u, lq)| -u - lq)
        .collect())
}

/// Returns the Kish effective sample size (Σw)²/Σw² (Kish, Survey Sampling, 1965).
///
/// Computed in log space as exp(2·lse(ln w) − lse(2 ln w)), so that it is exact for
/// weights that would overflow or underflow. It lies between 1 and the number of
/// samples with non-zero weight.
pub fn kish_ess(log_w: &[f64]) -> Result<f64> {
    let total = checked_total(log_w)?;
    let doubled: Vec<f64> = log_w.iter().map(|v| 2.0 * v).collect();
    Ok((2.0 * total - logsumexp(&doubled)).exp())
}

/// Returns the Kish effective sample size divided by the number of samples, in (0, 1].
///
/// This is the figure a stop rule compares with a floor: 1 for a perfect sampler, near
/// 1/N when one sample carries all the weight.
pub fn ess_fraction(log_w: &[f64]) -> Result<f64> {
    Ok(kish_ess(log_w)? / log_w.len() as f64)
}

/// The importance-sampling estimate of ln Z with its delta-method standard error.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct LogZEstimate {
    /// ln Z ≈ lse(ln w) − ln N, where w = exp(−u − ln q) and Z = ∫ exp(−u) dx.
    pub log_z: f64,
    /// One standard error of `log_z` by the delta method: sqrt((N/ESS − 1)/(N − 1)).
    /// `None` for a single sample, where no variance can be estimated.
    pub log_z_err: Option<f64>,
    /// The Kish effective sample size of the weights.
    pub ess: f64,
    /// The number of samples, including those of zero weight.
    pub n_samples: usize,
}

/// Estimates ln Z from importance log weights ln w = −u − ln q of N samples from q.
///
/// The estimate is ln( (1/N) Σ w ). Its error bar is the delta method applied to the
/// sample mean of w: var(ln Ẑ) ≈ s²_w / (N w̄²), where s²_w is the unbiased sample
/// variance; written with the Kish ESS this is (N/ESS − 1)/(N − 1), which needs no
/// exponentiation of the raw weights. The delta method is asymptotic: when the ESS is
/// a handful of samples the weights' variance is itself poorly known and the error bar
/// is optimistic, which is why the ESS is reported beside it.
pub fn log_partition_estimate(log_w: &[f64]) -> Result<LogZEstimate> {
    let total = checked_total(log_w)?;
    let n = log_w.len();
    let ess = kish_ess(log_w)?;
    let log_z_err = if n > 1 {
        let nf = n as f64;
        Some(((nf / ess - 1.0).max(0.0) / (nf - 1.0)).sqrt())
    } else {
        None
    };
    Ok(LogZEstimate {
        log_z: total - (n as f64).ln(),
        log_z_err,
        ess,
        n_samples: n,
    })
}

/// A self-normalised importance-sampling estimate of an expectation.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct WeightedMean {
    /// Σ w_i a_i / Σ w_i.
    pub mean: f64,
    /// One standard error by the delta method: sqrt(Σ w̃_i² (a_i − mean)²) with the
    /// normalised weights w̃ (for equal weights, the sample standard deviation over √N).
    pub err: f64,
    /// The Kish effective sample size of the weights.
    pub ess: f64,
}

/// The reweighted mean of `values` under importance log weights `log_w`, with its
/// delta-method standard error (Owen, Monte Carlo theory, methods and examples, 2013,
/// ch. 9: the variance of the ratio estimator). Like every asymptotic error bar it is
/// optimistic when the ESS is a handful of samples: report the ESS beside it.
pub fn weighted_mean(values: &[f64], log_w: &[f64]) -> Result<WeightedMean> {
    let w = normalised_log_weights(log_w)?;
    if values.len() != log_w.len() {
        return Err(StatsError::LengthMismatch {
            left: "values",
            left_len: values.len(),
            right: "log_w",
            right_len: log_w.len(),
        });
    }
    crate::error::check_finite("values", values)?;
    let w: Vec<f64> = w.iter().map(|l| l.exp()).collect();
    let mean: f64 = w.iter().zip(values).map(|(w, a)| w * a).sum();
    let var: f64 = w
        .iter()
        .zip(values)
        .map(|(w, a)| w * w * (a - mean).powi(2))
        .sum();
    Ok(WeightedMean {
        mean,
        err: var.sqrt(),
        ess: kish_ess(log_w)?,
    })
}

/// Validates log weights and returns lse(ln w), refusing an all-zero weight set.
pub(crate) fn checked_total(log_w: &[f64]) -> Result<f64> {
    check_non_empty("log_w", log_w)?;
    check_log_weights("log_w", log_w)?;
    let total = logsumexp(log_w);
    if total == f64::NEG_INFINITY {
        return Err(StatsError::ZeroTotalWeight { n: log_w.len() });
    }
    Ok(total)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn logsumexp_handles_extremes() {
        assert_eq!(logsumexp(&[]), f64::NEG_INFINITY);
        assert_eq!(
            logsumexp(&[f64::NEG_INFINITY, f64::NEG_INFINITY]),
            f64::NEG_INFINITY
        );
        assert_eq!(logsumexp(&[f64::NEG_INFINITY, 3.0]), 3.0);
        assert_eq!(logsumexp(&[1.0, f64::INFINITY]), f64::INFINITY);
        assert!(logsumexp(&[1.0, f64::NAN]).is_nan());
        // Values whose exponentials overflow a double: ln(2 e^1000) = 1000 + ln 2.
        let v = logsumexp(&[1000.0, 1000.0]);
        assert!((v - (1000.0 + 2f64.ln())).abs() < 1e-12);
        let v = logsumexp(&[-1000.0, -1000.0, -1000.0]);
        assert!((v - (-1000.0 + 3f64.ln())).abs() < 1e-12);
    }

    #[test]
    fn ess_of_equal_and_degenerate_weights() {
        // Equal weights: ESS = N exactly.
        let equal = vec![-7.5; 40];
        assert!((kish_ess(&equal).unwrap() - 40.0).abs() < 1e-9);
        assert!((ess_fraction(&equal).unwrap() - 1.0).abs() < 1e-12);
        // One sample with all the weight (the others zero): ESS = 1.
        let mut one = vec![f64::NEG_INFINITY; 10];
        one[3] = 500.0;
        assert!((kish_ess(&one).unwrap() - 1.0).abs() < 1e-12);
        // Two weights 1 and 3: (4)^2/(1+9) = 1.6.
        let two = [0.0, 3f64.ln()];
        assert!((kish_ess(&two).unwrap() - 1.6).abs() < 1e-12);
    }

    #[test]
    fn refuses_bad_weights() {
        assert_eq!(kish_ess(&[]), Err(StatsError::Empty { what: "log_w" }));
        assert!(matches!(
            kish_ess(&[0.0, f64::NAN]),
            Err(StatsError::InvalidValue { index: 1, .. })
        ));
        assert!(matches!(
            normalised_log_weights(&[f64::INFINITY]),
            Err(StatsError::InvalidValue { index: 0, .. })
        ));
        assert_eq!(
            normalised_log_weights(&[f64::NEG_INFINITY; 3]),
            Err(StatsError::ZeroTotalWeight { n: 3 })
        );
        assert!(matches!(
            importance_log_weights(&[1.0], &[0.0, 1.0]),
            Err(StatsError::LengthMismatch { .. })
        ));
        assert!(matches!(
            importance_log_weights(&[f64::NAN], &[0.0]),
            Err(StatsError::InvalidValue {
                what: "reduced_energy",
                ..
            })
        ));
        // An infinite energy is a legal zero weight.
        let lw = importance_log_weights(&[f64::INFINITY, 1.0], &[0.0, -0.5]).unwrap();
        assert_eq!(lw[0], f64::NEG_INFINITY);
        assert!((lw[1] - (-0.5)).abs() < 1e-15);
    }

    #[test]
    fn log_z_of_uniform_proposal_on_exact_integral() {
        // Exact check: Z = ∫_0^1 e^{-x} dx = 1 − e^{-1}, estimated from a uniform grid
        // of "samples" with q = 1 (midpoint rule, error O(1/N²)).
        let n = 10_000;
        let u: Vec<f64> = (0..n).map(|i| (i as f64 + 0.5) / n as f64).collect();
        let lw = importance_log_weights(&u, &vec![0.0; n]).unwrap();
        let est = log_partition_estimate(&lw).unwrap();
        let exact = (1.0 - (-1.0f64).exp()).ln();
        assert!(
            (est.log_z - exact).abs() < 1e-8,
            "{} vs {}",
            est.log_z,
            exact
        );
        // The weights e^{-x} on [0,1]: ESS/N = (∫e^{-x})² / ∫e^{-2x}.
        let frac = (1.0 - (-1.0f64).exp()).powi(2) / ((1.0 - (-2.0f64).exp()) / 2.0);
        assert!((est.ess / n as f64 - frac).abs() < 1e-6);
        let expected_err = ((1.0 / frac - 1.0) / (n as f64 - 1.0)).sqrt();
        assert!((est.log_z_err.unwrap() - expected_err).abs() < 1e-6);
    }

    proptest! {
        #[test]
        fn logsumexp_is_shift_equivariant_and_bounded(
            values in proptest::collection::vec(-700.0f64..700.0, 1..50),
            shift in -300.0f64..300.0,
        ) {
            let base = logsumexp(&values);
            let shifted: Vec<f64> = values.iter().map(|v| v + shift).collect();
            prop_assert!((logsumexp(&shifted) - base - shift).abs() < 1e-9 * (1.0 + base.abs()));
            let max = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            prop_assert!(base >= max - 1e-12);
            prop_assert!(base <= max + (values.len() as f64).ln() + 1e-12);
        }

        #[test]
        fn ess_between_one_and_n(values in proptest::collection::vec(-50.0f64..50.0, 1..80)) {
            let ess = kish_ess(&values).unwrap();
            prop_assert!(ess >= 1.0 - 1e-9);
            prop_assert!(ess <= values.len() as f64 + 1e-9);
            let norm = normalised_log_weights(&values).unwrap();
            prop_assert!(logsumexp(&norm).abs() < 1e-12);
        }
    }

    #[test]
    fn weighted_mean_is_the_sample_mean_for_equal_weights() {
        let a = [1.0, 2.0, 4.0, 7.0];
        let m = weighted_mean(&a, &[0.3; 4]).unwrap();
        assert!((m.mean - 3.5).abs() < 1e-12);
        // Plug-in variance Σ (a - 3.5)² / 16 = 21 / 16.
        assert!((m.err - (21.0f64 / 16.0).sqrt()).abs() < 1e-12);
        assert!((m.ess - 4.0).abs() < 1e-12);
        assert!(weighted_mean(&a, &[0.0; 3]).is_err());
        assert!(weighted_mean(&[1.0, f64::NAN], &[0.0; 2]).is_err());
    }

    #[test]
    fn weighted_mean_reweights_a_gaussian_to_its_shifted_target() {
        // Draws from N(0, 1) reweighted to N(1, 1): w = exp(x - 1/2); exact mean 1 and
        // E[x²] = 2. The error bar must cover the exact value (|z| < 4 at this seed).
        use rand::SeedableRng;
        use rand_distr::{Distribution, StandardNormal};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let x: Vec<f64> = (0..20000)
            .map(|_| StandardNormal.sample(&mut rng))
            .collect();
        let lw: Vec<f64> = x.iter().map(|v| v - 0.5).collect();
        let m = weighted_mean(&x, &lw).unwrap();
        assert!(((m.mean - 1.0) / m.err).abs() < 4.0, "{m:?}");
        assert!(m.err < 0.03 && m.err > 0.005, "{m:?}");
        let x2: Vec<f64> = x.iter().map(|v| v * v).collect();
        let m2 = weighted_mean(&x2, &lw).unwrap();
        assert!(((m2.mean - 2.0) / m2.err).abs() < 4.0, "{m2:?}");
    }
}
