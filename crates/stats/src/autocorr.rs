//! The integrated autocorrelation time of a series, τ_int = ½ + Σ_{t≥1} ρ(t), with
//! Sokal's automatic window (Sokal, Monte Carlo methods in statistical mechanics, 1997:
//! sum up to the first W with W ≥ c τ_int(W), c = 6). With this convention a chain of N
//! correlated values carries about N / (2 τ_int) independent ones, and the standard
//! error of its mean is sqrt(2 τ_int var / N).

use crate::error::{check_finite, Result, StatsError};
use serde::{Deserialize, Serialize};

/// An integrated autocorrelation time.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Autocorrelation {
    /// τ_int.
    pub tau_int: f64,
    /// The summation window W.
    pub window: usize,
    /// Sokal's error estimate of τ_int: τ sqrt(2(2W + 1)/N).
    pub tau_err: f64,
}

/// τ_int of `series` with the automatic window (factor `c`, 6 when unsure). The series
/// must hold at least 10 finite values and not be constant.
pub fn integrated_autocorrelation(series: &[f64], c: f64) -> Result<Autocorrelation> {
    check_finite("series", series)?;
    let n = series.len();
    if n < 10 {
        return Err(StatsError::InvalidParameter {
            name: "series",
            reason: format!("needs at least 10 values, got {n}"),
        });
    }
    let mean = series.iter().sum::<f64>() / n as f64;
    let dev: Vec<f64> = series.iter().map(|v| v - mean).collect();
    let c0 = dev.iter().map(|d| d * d).sum::<f64>() / n as f64;
    if c0 <= 0.0 {
        return Err(StatsError::InvalidParameter {
            name: "series",
            reason: "is constant".into(),
        });
    }
    let mut tau = 0.5;
    let mut window = n / 2;
    for t in 1..n / 2 {
        let ct = dev[..n - t]
            .iter()
            .zip(&dev[t..])
            .map(|(a, b)| a * b)
            .sum::<f64>()
            / n as f64;
        tau += ct / c0;
        if t as f64 >= c * tau {
            window = t;
            break;
        }
    }
    Ok(Autocorrelation {
        tau_int: tau,
        window,
        tau_err: tau * (2.0 * (2 * window + 1) as f64 / n as f64).sqrt(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_distr::{Distribution, StandardNormal};

    #[test]
    fn ar1_series_have_their_exact_autocorrelation_time() {
        // x_t = ρ x_{t−1} + ε_t has ρ(t) = ρ^t, so τ_int = ½ + ρ/(1 − ρ) = (1 + ρ)/(2(1 − ρ))
        // exactly: 4.5 for ρ = 0.8, 0.5 for independent values.
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        for (rho, exact) in [(0.8, 4.5), (0.0, 0.5), (0.95, 19.5)] {
            let mut x = 0.0;
            let s: Vec<f64> = (0..400_000)
                .map(|_| {
                    let e: f64 = StandardNormal.sample(&mut rng);
                    x = rho * x + e;
                    x
                })
                .collect();
            let a = integrated_autocorrelation(&s, 6.0).unwrap();
            assert!(
                (a.tau_int - exact).abs() < 4.0 * a.tau_err + 0.02,
                "rho {rho}: {a:?} vs {exact}"
            );
        }
        assert!(integrated_autocorrelation(&[1.0; 20], 6.0).is_err());
        assert!(integrated_autocorrelation(&[1.0, 2.0], 6.0).is_err());
    }
}
