//! Reweighting of metadynamics trajectories to the unbiased Boltzmann distribution.
//!
//! Convention: the bias V(s, t) is an energy (the unit of kT) added to the potential,
//! positive where it fills wells, so frames are sampled from p(x)·exp(−V/kT) and their
//! weights back to p are exp(+V/kT) times a frame-time normalisation. Two estimators:
//!
//! * [`tiwary_parrinello_log_weights`]: ln w_t = (V(s(x_t), t) − c(t))/kT (Tiwary &
//!   Parrinello, J. Phys. Chem. B 119, 736, 2015). c(t) = kT ln[∫ds e^{−F(s)/kT} /
//!   ∫ds e^{−(F(s)+V(s,t))/kT}] is the reversible work of switching the bias on, which
//!   makes frames taken at different times (under different biases) comparable. It
//!   assumes the bias changes slowly enough that each frame is at equilibrium under the
//!   bias of its time; it applies to every frame of the run after a short transient.
//!   For well-tempered metadynamics with bias factor γ, F is estimated from the bias
//!   itself, F = −γ/(γ−1)·V, which gives [`well_tempered_offset`]; with any other
//!   estimate of F use [`reweighting_offset`].
//! * [`final_bias_log_weights`]: ln w_t = V_final(s(x_t))/kT. Exact for frames sampled
//!   under a static bias equal to V_final (e.g. a run continued with the bias frozen),
//!   and a good approximation for the part of a well-tempered run where the bias has
//!   converged (it then only grows by a uniform offset, which cancels in normalised
//!   weights). Applied to frames from the early, filling stage it is biased; use the
//!   Tiwary–Parrinello weights for those, or discard them.
//!
//! The log weights feed [`crate::states::state_free_energies`] and
//! [`crate::profile::free_energy_profile`]. Bootstrap error bars over frames assume
//! independent frames; for a correlated trajectory, thin it first (keep one frame per
//! correlation time) or the error bars will be too small.

use crate::error::{check_finite, check_non_empty, check_same_len, Result, StatsError};
use crate::logspace::logsumexp;

/// Returns the Tiwary–Parrinello log weights (V_t − c_t)/kT of trajectory frames.
///
/// `bias` is V(s(x_t), t), the bias acting on frame t at its own time, `offset` is c(t)
/// at the same time (from [`well_tempered_offset`] or [`reweighting_offset`]), and `kt`
/// the thermal energy in the same unit.
pub fn tiwary_parrinello_log_weights(bias: &[f64], offset: &[f64], kt: f64) -> Result<Vec<f64>> {
    check_same_len("bias", bias.len(), "offset", offset.len())?;
    check_finite("bias", bias)?;
    check_finite("offset", offset)?;
    check_kt(kt)?;
    Ok(bias.iter().zip(offset).map(|(v, c)| (v - c) / kt).collect())
}

/// Returns the final-bias log weights V_final(s(x_t))/kT (see the module doc for when
/// they apply).
pub fn final_bias_log_weights(final_bias: &[f64], kt: f64) -> Result<Vec<f64>> {
    check_finite("final_bias", final_bias)?;
    check_kt(kt)?;
    Ok(final_bias.iter().map(|v| v / kt).collect())
}

/// Returns c(t) = kT ln[∫ e^{−F/kT} ds / ∫ e^{−(F+V)/kT} ds] from F(s) and V(s, t)
/// tabulated on the same uniform grid of the collective variable (any dimension,
/// flattened; the cell volume cancels).
///
/// The grid must cover where the unbiased distribution has weight. +inf in F marks
/// forbidden cells.
pub fn reweighting_offset(free_energy: &[f64], bias: &[f64], kt: f64) -> Result<f64> {
    check_non_empty("free_energy", free_energy)?;
    check_same_len("free_energy", free_energy.len(), "bias", bias.len())?;
    check_finite("bias", bias)?;
    check_kt(kt)?;
    if let Some(index) = free_energy
        .iter()
        .position(|f| f.is_nan() || *f == f64::NEG_INFINITY)
    {
        return Err(StatsError::InvalidValue {
            what: "free_energy",
            index,
            value: free_energy[index],
        });
    }
    let unbiased: Vec<f64> = free_energy.iter().map(|f| -f / kt).collect();
    let biased: Vec<f64> = free_energy
        .iter()
        .zip(bias)
        .map(|(f, v)| -(f + v) / kt)
        .collect();
    let (num, den) = (logsumexp(&unbiased), logsumexp(&biased));
    if !num.is_finite() || !den.is_finite() {
        return Err(StatsError::InvalidParameter {
            name: "free_energy",
            reason: "every grid cell is forbidden (+inf)".into(),
        });
    }
    Ok(kt * (num - den))
}

/// Returns the well-tempered c(t) = kT ln[∫ e^{γV/((γ−1)kT)} ds / ∫ e^{V/((γ−1)kT)} ds]
/// from the bias V(s, t) on a uniform grid and the bias factor γ > 1 (Tiwary &
/// Parrinello 2015): [`reweighting_offset`] with F = −γ/(γ−1)·V.
pub fn well_tempered_offset(bias: &[f64], kt: f64, bias_factor: f64) -> Result<f64> {
    check_non_empty("bias", bias)?;
    check_finite("bias", bias)?;
    check_kt(kt)?;
    if !(bias_factor > 1.0 && bias_factor.is_finite()) {
        return Err(StatsError::InvalidParameter {
            name: "bias_factor",
            reason: format!("must be finite and above 1, got {bias_factor}"),
        });
    }
    let g = bias_factor;
    let num: Vec<f64> = bias.iter().map(|v| g * v / ((g - 1.0) * kt)).collect();
    let den: Vec<f64> = bias.iter().map(|v| v / ((g - 1.0) * kt)).collect();
    Ok(kt * (logsumexp(&num) - logsumexp(&den)))
}

fn check_kt(kt: f64) -> Result<()> {
    if kt > 0.0 && kt.is_finite() {
        Ok(())
    } else {
        Err(StatsError::InvalidParameter {
            name: "kt",
            reason: format!("must be positive and finite, got {kt}"),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn constant_bias_offset_is_the_constant() {
        // A uniform bias b shifts every energy by b: c = b exactly, for both formulas.
        let bias = vec![2.5; 50];
        let f: Vec<f64> = (0..50).map(|i| (i as f64 / 10.0 - 2.5).powi(2)).collect();
        assert!((reweighting_offset(&f, &bias, 0.7).unwrap() - 2.5).abs() < 1e-12);
        assert!((well_tempered_offset(&bias, 0.7, 6.0).unwrap() - 2.5).abs() < 1e-12);
    }

    #[test]
    fn well_tempered_offset_equals_general_offset_for_converged_bias() {
        // With the converged well-tempered shape V = −(1 − 1/γ)F + b the two formulas
        // are the same integral.
        let (kt, g) = (1.3, 8.0);
        let f: Vec<f64> = (0..400)
            .map(|i| {
                let s = -2.0 + 4.0 * i as f64 / 399.0;
                4.0 * (s * s - 1.0).powi(2) + 0.5 * s
            })
            .collect();
        let v: Vec<f64> = f.iter().map(|f| -(1.0 - 1.0 / g) * f + 3.0).collect();
        let a = reweighting_offset(&f, &v, kt).unwrap();
        let b = well_tempered_offset(&v, kt, g).unwrap();
        assert!((a - b).abs() < 1e-10, "{a} vs {b}");
    }

    #[test]
    fn weights_and_refusals() {
        let w = tiwary_parrinello_log_weights(&[3.0, 1.0], &[1.0, 1.0], 2.0).unwrap();
        assert_eq!(w, vec![1.0, 0.0]);
        assert_eq!(final_bias_log_weights(&[2.0], 0.5).unwrap(), vec![4.0]);
        assert!(tiwary_parrinello_log_weights(&[1.0], &[], 1.0).is_err());
        assert!(final_bias_log_weights(&[1.0], 0.0).is_err());
        assert!(final_bias_log_weights(&[f64::NAN], 1.0).is_err());
        assert!(well_tempered_offset(&[1.0], 1.0, 1.0).is_err());
        assert!(reweighting_offset(&[f64::INFINITY], &[0.0], 1.0).is_err());
    }
}
