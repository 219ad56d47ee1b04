//! One-dimensional free-energy profiles along a collective variable from reweighted
//! histograms, with bootstrap error bands, and their comparison with a reference.
//!
//! The profile is F(b) = −ln(P_b / Δs) in kT, where P_b is bin b's share of the total
//! weight (samples outside the range count in the total) and Δs the bin width, so that
//! F is minus the log of a probability density and does not depend on the number of
//! bins. The whole profile is then shifted by one constant so that its lowest finite
//! bin is 0; bootstrap replicates are shifted by the same constant, so that the error
//! band of each bin is the uncertainty of that bin's density, not of the alignment.

use rand::Rng;
use serde::{Deserialize, Serialize};

use crate::bootstrap::{resample_indices, summarise, BootstrapOptions};
use crate::error::{check_finite, check_same_len, Result, StatsError};
use crate::logspace::{checked_total, logsumexp};

/// Equal-width bins over [lo, hi).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Bins {
    /// Lower edge of the first bin.
    pub lo: f64,
    /// Upper edge of the last bin (a value equal to it falls in the last bin).
    pub hi: f64,
    /// Number of bins, at least 1.
    pub n_bins: usize,
}

impl Bins {
    /// Builds checked bins, refusing a non-finite or empty range and zero bins.
    pub fn new(lo: f64, hi: f64, n_bins: usize) -> Result<Bins> {
        if !(lo.is_finite() && hi.is_finite() && lo < hi) {
            return Err(StatsError::InvalidParameter {
                name: "range",
                reason: format!("need finite lo < hi, got [{lo}, {hi}]"),
            });
        }
        if n_bins == 0 {
            return Err(StatsError::InvalidParameter {
                name: "n_bins",
                reason: "must be at least 1".into(),
            });
        }
        Ok(Bins { lo, hi, n_bins })
    }

    /// Returns the width of one bin.
    pub fn width(&self) -> f64 {
        (self.hi - self.lo) / self.n_bins as f64
    }

    /// Returns the centre of every bin.
    pub fn centers(&self) -> Vec<f64> {
        (0..self.n_bins)
            .map(|b| self.lo + (b as f64 + 0.5) * self.width())
            .collect()
    }

    /// Returns the bin holding `x`, or None outside [lo, hi] or for NaN.
    pub fn index(&self, x: f64) -> Option<usize> {
        if !(x >= self.lo && x <= self.hi) {
            return None;
        }
        let b = ((x - self.lo) / self.width()).floor() as usize;
        Some(b.min(self.n_bins - 1))
    }
}

/// A free-energy profile with its bootstrap band.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Profile {
    /// The bins used.
    pub bins: Bins,
    /// Bin centres.
    pub centers: Vec<f64>,
    /// F per bin in kT, lowest finite bin 0; `None` for a bin with zero weight.
    pub free_energy: Vec<Option<f64>>,
    /// Bootstrap standard error per bin; `None` where a replicate left the bin empty
    /// or without replicates.
    pub err: Vec<Option<f64>>,
    /// Lower end of the confidence band per bin (chosen interval method).
    pub lower: Vec<Option<f64>>,
    /// Upper end of the band; may be +inf where replicates emptied the bin.
    pub upper: Vec<Option<f64>>,
    /// Number of samples per bin (whatever their weight).
    pub counts: Vec<usize>,
    /// Share of the total weight outside the range.
    pub out_of_range_population: f64,
}

/// Builds the reweighted histogram profile F(s) of a collective variable `cv` with
/// log weights `log_w`, with bootstrap error bands.
///
/// NaN values of the collective variable are refused; values outside the range count
/// in the normalisation but in no bin.
pub fn free_energy_profile<R: Rng + ?Sized>(
    cv: &[f64],
    log_w: &[f64],
    bins: &Bins,
    opts: &BootstrapOptions,
    rng: &mut R,
) -> Result<Profile> {
    check_same_len("cv", cv.len(), "log_w", log_w.len())?;
    check_finite("cv", cv)?;
    opts.validate()?;
    let bins = Bins::new(bins.lo, bins.hi, bins.n_bins)?;
    checked_total(log_w)?;
    let slot: Vec<usize> = cv
        .iter()
        .map(|&x| bins.index(x).unwrap_or(bins.n_bins))
        .collect();
    let n_slots = bins.n_bins + 1;
    let mut slot_max = vec![f64::NEG_INFINITY; n_slots];
    for (&s, &lw) in slot.iter().zip(log_w) {
        slot_max[s] = slot_max[s].max(lw);
    }
    let scaled: Vec<f64> = slot
        .iter()
        .zip(log_w)
        .map(|(&s, &lw)| {
            if lw == f64::NEG_INFINITY {
                0.0
            } else {
                (lw - slot_max[s]).exp()
            }
        })
        .collect();
    let log_density = |draws: &mut dyn Iterator<Item = usize>| -> Vec<f64> {
        let mut acc = vec![0.0; n_slots];
        for i in draws {
            acc[slot[i]] += scaled[i];
        }
        let log_w_slot: Vec<f64> = acc
            .iter()
            .zip(&slot_max)
            .map(|(&a, &m)| {
                if a > 0.0 {
                    m + a.ln()
                } else {
                    f64::NEG_INFINITY
                }
            })
            .collect();
        let total = logsumexp(&log_w_slot);
        log_w_slot.iter().map(|l| l - total).collect()
    };
    let full = log_density(&mut (0..cv.len()));
    let ln_width = bins.width().ln();
    let raw: Vec<f64> = full[..bins.n_bins].iter().map(|lp| ln_width - lp).collect();
    let shift = raw
        .iter()
        .copied()
        .filter(|f| f.is_finite())
        .fold(f64::INFINITY, f64::min);

    let mut reps = vec![Vec::with_capacity(opts.n_replicates); bins.n_bins];
    let mut indices = vec![0usize; cv.len()];
    for _ in 0..opts.n_replicates {
        resample_indices(rng, &mut indices);
        let rep = log_density(&mut indices.iter().copied());
        for b in 0..bins.n_bins {
            reps[b].push(ln_width - rep[b] - shift);
        }
    }
    let mut profile = Profile {
        bins,
        centers: bins.centers(),
        free_energy: Vec::with_capacity(bins.n_bins),
        err: Vec::with_capacity(bins.n_bins),
        lower: Vec::with_capacity(bins.n_bins),
        upper: Vec::with_capacity(bins.n_bins),
        counts: vec![0; bins.n_bins],
        out_of_range_population: full[bins.n_bins].exp(),
    };
    for &s in &slot {
        if s < bins.n_bins {
            profile.counts[s] += 1;
        }
    }
    for b in 0..bins.n_bins {
        let estimate = raw[b] - shift;
        let finite = estimate.is_finite();
        let unc = summarise(estimate, &mut reps[b], opts);
        profile.free_energy.push(finite.then_some(estimate));
        profile.err.push(unc.err.filter(|_| finite));
        profile
            .lower
            .push(unc.interval.filter(|_| finite).map(|i| i.lower));
        profile
            .upper
            .push(unc.interval.filter(|_| finite).map(|i| i.upper));
    }
    Ok(profile)
}

/// How two profiles, each defined up to an additive constant, are put on one scale.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Alignment {
    /// Both shifted so that their minimum over the compared bins is 0. Simple, but the
    /// comparison then inherits the noise of the single lowest bin.
    Minimum,
    /// The estimate shifted by c = Σ_b p_b (F_ref − F_est) / Σ_b p_b with
    /// p_b ∝ exp(−F_ref,b): the Boltzmann-weighted mean difference is zero. This is the
    /// least-squares shift with Boltzmann weights, dominated by the well-sampled low
    /// bins, and the recommended choice.
    BoltzmannMean,
}

/// The difference between an estimated and a reference profile over common bins.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ProfileComparison {
    /// Root-mean-square difference over the compared bins (each bin counts once), kT.
    pub rms: f64,
    /// RMS difference with Boltzmann weights of the reference, kT.
    pub boltzmann_rms: f64,
    /// Largest absolute difference over the compared bins, kT.
    pub max_abs: f64,
    /// Number of bins compared: both finite, and the reference within the cutoff.
    pub n_compared: usize,
    /// The constant added to the estimate to align it with the reference, kT.
    pub shift: f64,
}

/// Compares an estimated profile with a reference on the same bins.
///
/// Only bins where both are finite count, and, if `cutoff` is given, where the
/// reference is at most `cutoff` kT above its lowest compared bin (high bins are rarely
/// sampled and noisy by nature). Fails if the lengths differ or no bin qualifies.
pub fn compare_profiles(
    estimate: &[Option<f64>],
    reference: &[f64],
    alignment: Alignment,
    cutoff: Option<f64>,
) -> Result<ProfileComparison> {
    check_same_len("estimate", estimate.len(), "reference", reference.len())?;
    let both: Vec<(f64, f64)> = estimate
        .iter()
        .zip(reference)
        .filter_map(|(e, &r)| e.filter(|e| e.is_finite() && r.is_finite()).map(|e| (e, r)))
        .collect();
    let ref_min = both.iter().map(|p| p.1).fold(f64::INFINITY, f64::min);
    let pairs: Vec<(f64, f64)> = both
        .into_iter()
        .filter(|&(_, r)| cutoff.is_none_or(|c| r - ref_min <= c))
        .collect();
    if pairs.is_empty() {
        return Err(StatsError::Empty {
            what: "bins where both profiles are finite",
        });
    }
    let boltzmann: Vec<f64> = pairs.iter().map(|&(_, r)| (-(r - ref_min)).exp()).collect();
    let z: f64 = boltzmann.iter().sum();
    let shift = match alignment {
        Alignment::Minimum => {
            let est_min = pairs.iter().map(|p| p.0).fold(f64::INFINITY, f64::min);
            ref_min - est_min
        }
        Alignment::BoltzmannMean => {
            pairs
                .iter()
                .zip(&boltzmann)
                .map(|(&(e, r), p)| p * (r - e))
                .sum::<f64>()
                / z
        }
    };
    let diffs: Vec<f64> = pairs.iter().map(|&(e, r)| e + shift - r).collect();
    let n = diffs.len() as f64;
    Ok(ProfileComparison {
        rms: (diffs.iter().map(|d| d * d).sum::<f64>() / n).sqrt(),
        boltzmann_rms: (diffs
            .iter()
            .zip(&boltzmann)
            .map(|(d, p)| p * d * d)
            .sum::<f64>()
            / z)
            .sqrt(),
        max_abs: diffs.iter().fold(0.0, |m, d| m.max(d.abs())),
        n_compared: diffs.len(),
        shift,
    })
}

/// Returns the exact reference profile of a one-dimensional density known up to a
/// constant, exp(−u(s)), averaged over each bin by Simpson's rule with
/// `points_per_bin` (even, ≥ 2) sub-intervals: F_b = −ln((1/Δs) ∫_bin e^{−u} ds),
/// shifted so the lowest bin is 0. Bins whose integral underflows are +inf.
pub fn reference_profile(
    u: impl Fn(f64) -> f64,
    bins: &Bins,
    points_per_bin: usize,
) -> Result<Vec<f64>> {
    let bins = Bins::new(bins.lo, bins.hi, bins.n_bins)?;
    let m = points_per_bin.max(2).next_multiple_of(2);
    let h = bins.width() / m as f64;
    // Log-space Simpson: ln Σ c_i e^{−u_i}, then the bin mean.
    let raw: Vec<f64> = (0..bins.n_bins)
        .map(|b| {
            let a = bins.lo + b as f64 * bins.width();
            let terms: Vec<f64> = (0..=m)
                .map(|i| {
                    let c: f64 = if i == 0 || i == m {
                        1.0
                    } else if i % 2 == 1 {
                        4.0
                    } else {
                        2.0
                    };
                    c.ln() - u(a + i as f64 * h)
                })
                .collect();
            -(logsumexp(&terms) + (h / 3.0).ln() - bins.width().ln())
        })
        .collect();
    let min = raw
        .iter()
        .copied()
        .filter(|f| f.is_finite())
        .fold(f64::INFINITY, f64::min);
    Ok(raw.iter().map(|f| f - min).collect())
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, Normal};

    #[test]
    fn bins_index_edges() {
        let b = Bins::new(0.0, 1.0, 4).unwrap();
        let cases = [
            (-0.1, None),
            (0.0, Some(0)),
            (0.2499, Some(0)),
            (0.25, Some(1)),
            (1.0, Some(3)),
            (1.01, None),
            (f64::NAN, None),
        ];
        for (x, want) in cases {
            assert_eq!(b.index(x), want, "x = {x}");
        }
        assert!(Bins::new(1.0, 1.0, 3).is_err());
        assert!(Bins::new(0.0, 1.0, 0).is_err());
        assert!(Bins::new(0.0, f64::INFINITY, 3).is_err());
    }

    #[test]
    fn reweighted_gaussian_profile_matches_exact_parabola() {
        // Samples from N(0, 1) reweighted to N(0.5, 0.8²) (log w = ln p − ln q) give the
        // profile (s − 0.5)²/(2·0.64) up to a constant; compared with the Simpson
        // reference of the same target, the Boltzmann-aligned RMS is at noise level,
        // and the band covers the reference in most bins.
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let q = Normal::new(0.0, 1.0).unwrap();
        let x: Vec<f64> = (0..40_000).map(|_| q.sample(&mut rng)).collect();
        let target = |s: f64| (s - 0.5).powi(2) / (2.0 * 0.64);
        let lw: Vec<f64> = x.iter().map(|&s| -target(s) + 0.5 * s * s).collect();
        let bins = Bins::new(-1.5, 2.5, 20).unwrap();
        let opts = BootstrapOptions {
            n_replicates: 200,
            ..Default::default()
        };
        let p = free_energy_profile(&x, &lw, &bins, &opts, &mut rng).unwrap();
        let reference = reference_profile(target, &bins, 16).unwrap();
        let cmp = compare_profiles(
            &p.free_energy,
            &reference,
            Alignment::BoltzmannMean,
            Some(4.0),
        )
        .unwrap();
        assert!(cmp.boltzmann_rms < 0.05, "{cmp:?}");
        assert!(cmp.n_compared >= 15);
        let covered = (0..bins.n_bins)
            .filter(|&b| {
                let (lo, hi) = (p.lower[b].unwrap(), p.upper[b].unwrap());
                let r = reference[b] - cmp.shift;
                lo <= r && r <= hi
            })
            .count();
        assert!(
            covered >= 15,
            "band covers the reference in {covered}/20 bins"
        );
        assert!(p.counts.iter().sum::<usize>() as f64 / 40_000.0 > 0.85);
        assert!(p.out_of_range_population > 0.0 && p.out_of_range_population < 0.1);
    }

    #[test]
    fn empty_bins_are_none_and_alignment_is_exact() {
        let cv = [0.1, 0.1, 0.6];
        let lw = [0.0, 0.0, 0.0];
        let bins = Bins::new(0.0, 1.0, 4).unwrap();
        let opts = BootstrapOptions {
            n_replicates: 0,
            ..Default::default()
        };
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let p = free_energy_profile(&cv, &lw, &bins, &opts, &mut rng).unwrap();
        assert_eq!(p.free_energy[0], Some(0.0));
        assert_eq!(p.free_energy[1], None);
        assert!((p.free_energy[2].unwrap() - 2f64.ln()).abs() < 1e-12);
        assert_eq!(p.err[0], None);
        // Shifted copies compare with zero RMS under both alignments.
        let est = [Some(1.0), None, Some(3.0), Some(2.0)];
        let reference = [0.0, 5.0, 2.0, 1.0];
        for a in [Alignment::Minimum, Alignment::BoltzmannMean] {
            let c = compare_profiles(&est, &reference, a, None).unwrap();
            assert!(c.rms < 1e-12 && c.max_abs < 1e-12, "{a:?}: {c:?}");
            assert!((c.shift + 1.0).abs() < 1e-12);
            assert_eq!(c.n_compared, 3);
        }
        // Cutoff 1.5 keeps only reference bins within 1.5 of the lowest.
        let c = compare_profiles(&est, &reference, Alignment::Minimum, Some(1.5)).unwrap();
        assert_eq!(c.n_compared, 2);
        assert!(compare_profiles(&[None], &[0.0], Alignment::Minimum, None).is_err());
    }

    #[test]
    fn reference_profile_of_linear_potential_is_exact() {
        // u(s) = s on [0, 2] with 2 bins: bin means of e^{−s} are (1 − e^{−1}) and
        // e^{−1}(1 − e^{−1}), so F_1 − F_0 = 1 exactly.
        let bins = Bins::new(0.0, 2.0, 2).unwrap();
        let r = reference_profile(|s| s, &bins, 64).unwrap();
        assert!(r[0].abs() < 1e-15);
        assert!((r[1] - 1.0).abs() < 1e-9, "{}", r[1]);
    }
}
