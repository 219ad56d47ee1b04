//! Pooling one quantity's independent estimates from several rounds into one, with an
//! error bar that stays honest when the per-round error bars are too small.
//!
//! The pooled value is the inverse-variance weighted mean. Its standard error is
//! 1/√Σw, scaled up by the Birge ratio R = √(χ²/(n − 1)) when R > 1 (Birge, Phys. Rev.
//! 40, 207, 1932; the same "scale factor" particle-physics averages use): when the
//! rounds scatter more than their own error bars allow — correlated trajectory frames
//! make bootstrap bars too small — the pooled bar grows to match the observed scatter
//! instead of shrinking with every round.

use serde::Serialize;

/// A pooled estimate.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Pooled {
    /// Inverse-variance weighted mean.
    pub value: f64,
    /// Standard error, including the Birge-ratio scale when it exceeds one.
    pub err: f64,
    /// Estimates pooled.
    pub n: usize,
    /// √(χ²/(n − 1)); 1 for a single estimate.
    pub birge_ratio: f64,
}

/// Pools `(value, standard error)` pairs. Pairs with a non-finite value or an error
/// that is not finite and positive are skipped (an exact reference value of 0 ± 0 pools
/// to itself). None when nothing is left.
pub fn pool(estimates: &[(f64, f64)]) -> Option<Pooled> {
    let usable: Vec<(f64, f64)> = estimates
        .iter()
        .copied()
        .filter(|(v, e)| v.is_finite() && e.is_finite() && *e > 0.0)
        .collect();
    if usable.is_empty() {
        return estimates
            .iter()
            .find(|(v, e)| *v == 0.0 && *e == 0.0)
            .map(|_| Pooled {
                value: 0.0,
                err: 0.0,
                n: estimates.len(),
                birge_ratio: 1.0,
            });
    }
    let w_sum: f64 = usable.iter().map(|(_, e)| 1.0 / (e * e)).sum();
    let mean = usable.iter().map(|(v, e)| v / (e * e)).sum::<f64>() / w_sum;
    let n = usable.len();
    let birge = if n > 1 {
        let chi2: f64 = usable.iter().map(|(v, e)| ((v - mean) / e).powi(2)).sum();
        (chi2 / (n - 1) as f64).sqrt()
    } else {
        1.0
    };
    Some(Pooled {
        value: mean,
        err: w_sum.sqrt().recip() * birge.max(1.0),
        n,
        birge_ratio: birge,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn consistent_estimates_pool_to_the_weighted_mean_with_the_textbook_error() {
        // Two estimates 1.0 ± 0.1 and 1.1 ± 0.2: weights 100 and 25.
        let p = pool(&[(1.0, 0.1), (1.1, 0.2)]).unwrap();
        assert!((p.value - (100.0 * 1.0 + 25.0 * 1.1) / 125.0).abs() < 1e-12);
        // chi2 = (0.02/0.1)^2 + (0.08/0.2)^2 = 0.04 + 0.16 = 0.2 < 1: no scaling.
        assert!((p.birge_ratio - 0.2f64.sqrt()).abs() < 1e-12);
        assert!((p.err - 125f64.sqrt().recip()).abs() < 1e-12);
    }

    #[test]
    fn scatter_beyond_the_error_bars_inflates_the_pooled_error() {
        // 0 ± 0.1 and 1 ± 0.1 disagree by 7 sigma: R = sqrt(50), err = 0.0707 * R = 0.5.
        let p = pool(&[(0.0, 0.1), (1.0, 0.1)]).unwrap();
        assert!((p.value - 0.5).abs() < 1e-12);
        assert!((p.err - 0.5).abs() < 1e-12, "{}", p.err);
    }

    #[test]
    fn unusable_pairs_are_skipped_and_an_exact_reference_pools_to_itself() {
        assert_eq!(pool(&[]), None);
        assert_eq!(pool(&[(f64::NAN, 0.1), (1.0, f64::INFINITY)]), None);
        let r = pool(&[(0.0, 0.0), (0.0, 0.0)]).unwrap();
        assert_eq!((r.value, r.err), (0.0, 0.0));
        let p = pool(&[(2.0, 0.5), (f64::NAN, 0.1)]).unwrap();
        assert_eq!((p.value, p.err, p.n), (2.0, 0.5, 1));
    }
}
