//! Hybrid (Hamiltonian) Monte Carlo (Duane, Kennedy, Pendleton & Roweth, Phys. Lett. B
//! 195, 216, 1987): unit-mass momenta drawn afresh each trajectory, `n_leapfrog`
//! leapfrog steps of size `step_size`, and an exact Metropolis test on the change of
//! H = U/kT + p²/2, so that the chain samples exp(−U/kT) exactly for any step. The
//! classical reference sampler of the lattice benchmarks.

use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

use crate::energy::EnergyModel;
use crate::error::{require, PhysicsError};

/// Settings of an HMC chain.
#[derive(Debug, Clone, PartialEq)]
pub struct HmcParams {
    /// Trajectories.
    pub n_trajectories: u64,
    /// Leapfrog steps per trajectory.
    pub n_leapfrog: u32,
    /// Leapfrog step size (in units where the reduced energy is U/kT).
    pub step_size: f64,
}

/// A finished HMC chain: the state after every trajectory.
#[derive(Debug, Clone, PartialEq)]
pub struct HmcRun {
    /// States after each trajectory, [n_trajectories, dim].
    pub states: Vec<f64>,
    /// Fraction of trajectories accepted.
    pub acceptance: f64,
    /// Energy-and-force evaluations made.
    pub energy_evaluations: u64,
}

/// Runs HMC from `x0` on exp(−U/kT).
pub fn hmc(
    model: &dyn EnergyModel,
    x0: &[f64],
    kt: f64,
    params: &HmcParams,
    rng: &mut ChaCha8Rng,
) -> Result<HmcRun, PhysicsError> {
    require(kt.is_finite() && kt > 0.0, "kt", "must be positive")?;
    require(
        params.step_size.is_finite() && params.step_size > 0.0,
        "step_size",
        "must be positive",
    )?;
    require(params.n_leapfrog >= 1, "n_leapfrog", "must be at least 1")?;
    let d = model.dim();
    require(x0.len() == d, "x0", "must have the model's dimension")?;
    let mut x = x0.to_vec();
    let mut f = vec![0.0; d];
    let mut u = model.energy_and_forces_of(&x, &mut f)? / kt;
    require(u.is_finite(), "x0", "must have a finite energy")?;
    let (mut xn, mut fnew, mut p) = (vec![0.0; d], vec![0.0; d], vec![0.0; d]);
    let h = params.step_size;
    let mut out = HmcRun {
        states: Vec::with_capacity(params.n_trajectories as usize * d),
        acceptance: 0.0,
        energy_evaluations: 1,
    };
    let mut accepted = 0u64;
    for _ in 0..params.n_trajectories {
        for v in p.iter_mut() {
            *v = rng.sample(StandardNormal);
        }
        let k0: f64 = p.iter().map(|v| v * v).sum::<f64>() / 2.0;
        xn.copy_from_slice(&x);
        fnew.copy_from_slice(&f);
        let mut un = u;
        for _ in 0..params.n_leapfrog {
            for ((pi, xi), fi) in p.iter_mut().zip(xn.iter_mut()).zip(&fnew) {
                *pi += 0.5 * h * fi / kt;
                *xi += h * *pi;
            }
            un = model.energy_and_forces_of(&xn, &mut fnew)? / kt;
            out.energy_evaluations += 1;
            for (pi, fi) in p.iter_mut().zip(&fnew) {
                *pi += 0.5 * h * fi / kt;
            }
        }
        let k1: f64 = p.iter().map(|v| v * v).sum::<f64>() / 2.0;
        let dh = (un + k1) - (u + k0);
        if dh.is_finite() && rng.gen::<f64>().ln() < -dh {
            x.copy_from_slice(&xn);
            f.copy_from_slice(&fnew);
            u = un;
            accepted += 1;
        }
        out.states.extend_from_slice(&x);
    }
    out.acceptance = accepted as f64 / params.n_trajectories.max(1) as f64;
    Ok(out)
}
