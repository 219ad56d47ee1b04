//! MBAR, the multistate Bennett acceptance ratio estimator (Shirts & Chodera,
//! J. Chem. Phys. 129, 124105, 2008), with its asymptotic covariance.
//!
//! Input: u_kn, the reduced potential u_k(x_n) of every sample n (from any state) in
//! every state k, as a row-major K × N slice, and N_k, how many of the N samples were
//! drawn from state k (states with N_k = 0 are targets that were never sampled). The
//! dimensionless free energies f_k solve the self-consistent equations
//!
//!   f_i = −ln Σ_n exp(−u_in) / Σ_k N_k exp(f_k − u_kn).
//!
//! They are found as the minimum of the convex function
//! Φ(f) = Σ_n ln Σ_k N_k exp(f_k − u_kn) − Σ_k N_k f_k, whose gradient vanishes exactly
//! at the self-consistent solution: a few self-consistent iterations start, then
//! Newton steps with a backtracking line search on Φ finish (quadratic convergence;
//! the line search makes it globally convergent because Φ is convex). Everything is in
//! log space. Uncertainties are the asymptotic covariance Θ = Wᵀ(I − W N Wᵀ)⁺ W of the
//! paper, evaluated through the eigen-decomposition of WᵀW so that no N × N matrix is
//! formed (the same algebra pymbar calls "svd-ew").

use serde::{Deserialize, Serialize};

use crate::error::{check_non_empty, Result, StatsError};
use crate::linalg::{matmul, symmetric_eigen, symmetric_pseudo_inverse, transpose};
use crate::logspace::logsumexp;

/// Eigenvalues of the covariance kernel at most this fraction of the largest are
/// treated as zero in the pseudo-inverse (numpy's pinv default used by pymbar).
const PSEUDO_INVERSE_RCOND: f64 = 1e-10;

/// Solver settings for [`Mbar::solve`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct MbarOptions {
    /// Converged when every sampled state's weights sum to one within this
    /// (max_k |Σ_n W_nk − 1|, the relative gradient of Φ).
    pub tolerance: f64,
    /// Upper bound on the number of iterations of both kinds together.
    pub max_iterations: usize,
    /// Self-consistent iterations before Newton takes over. They are cheap and move far
    /// from a poor start (all f = 0); Newton then converges in a handful of steps.
    pub self_consistent_warmup: usize,
}

impl Default for MbarOptions {
    fn default() -> Self {
        Self {
            tolerance: 1e-12,
            max_iterations: 10_000,
            self_consistent_warmup: 10,
        }
    }
}

/// A solved MBAR problem: free energies of every state and what is needed to compute
/// uncertainties, expectations and weights.
#[derive(Debug, Clone)]
pub struct Mbar {
    n_states: usize,
    n_samples: usize,
    n_k: Vec<usize>,
    u_kn: Vec<f64>,
    f_k: Vec<f64>,
    log_denominator: Vec<f64>,
    iterations: usize,
    residual: f64,
}

/// Free-energy differences between all pairs of states, with uncertainties.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FreeEnergyDifferences {
    /// Number of states K.
    pub n_states: usize,
    /// Row-major K×K: delta_f[i*K + j] = f_j − f_i (pymbar's `Delta_f[i, j]`).
    pub delta_f: Vec<f64>,
    /// Row-major K×K one-standard-deviation uncertainties of `delta_f`, from the
    /// asymptotic covariance: sqrt(Θ_ii + Θ_jj − 2Θ_ij).
    pub d_delta_f: Vec<f64>,
}

impl FreeEnergyDifferences {
    /// Returns (f_j − f_i, its uncertainty).
    pub fn get(&self, i: usize, j: usize) -> (f64, f64) {
        let k = self.n_states;
        (self.delta_f[i * k + j], self.d_delta_f[i * k + j])
    }
}

/// Expectations of one observable in every state, with uncertainties.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Expectations {
    /// ⟨A⟩_k for every state k.
    pub mean: Vec<f64>,
    /// One-standard-deviation uncertainty of each mean (asymptotic covariance).
    pub err: Vec<f64>,
}

impl Mbar {
    /// Solves the MBAR equations for u_kn (row-major K × N) and the sample counts N_k.
    ///
    /// Refuses: K = 0, a u_kn whose length is not K · Σ N_k, NaN or −inf energies, and
    /// a sample whose energy is +inf in every sampled state (it could not have been
    /// drawn). +inf elsewhere is a legal zero weight. Returns
    /// [`StatsError::NotConverged`] if the tolerance is not met.
    pub fn solve(u_kn: &[f64], n_k: &[usize], opts: &MbarOptions) -> Result<Mbar> {
        check_non_empty("n_k", n_k)?;
        let n_states = n_k.len();
        let n_samples: usize = n_k.iter().sum();
        if n_samples == 0 {
            return Err(StatsError::Empty {
                what: "samples (every N_k is 0)",
            });
        }
        if u_kn.len() != n_states * n_samples {
            return Err(StatsError::InvalidParameter {
                name: "u_kn",
                reason: format!(
                    "expected K × N = {n_states} × {n_samples} = {} values, got {}",
                    n_states * n_samples,
                    u_kn.len()
                ),
            });
        }
        if let Some(index) = u_kn
            .iter()
            .position(|u| u.is_nan() || *u == f64::NEG_INFINITY)
        {
            return Err(StatsError::InvalidValue {
                what: "u_kn",
                index,
                value: u_kn[index],
            });
        }
        let mut mbar = Mbar {
            n_states,
            n_samples,
            n_k: n_k.to_vec(),
            u_kn: u_kn.to_vec(),
            f_k: vec![0.0; n_states],
            log_denominator: vec![0.0; n_samples],
            iterations: 0,
            residual: f64::INFINITY,
        };
        mbar.check_every_sample_possible()?;
        mbar.iterate(opts)?;
        mbar.fill_unsampled_states();
        let f0 = mbar.f_k[0];
        mbar.f_k.iter_mut().for_each(|f| *f -= f0);
        Ok(mbar)
    }

    /// Returns the dimensionless free energies f_k, shifted so that f_0 = 0.
    pub fn free_energies(&self) -> &[f64] {
        &self.f_k
    }

    /// Returns how many solver iterations were spent.
    pub fn iterations(&self) -> usize {
        self.iterations
    }

    /// Returns the final max_k |Σ_n W_nk − 1| over sampled states.
    pub fn residual(&self) -> f64 {
        self.residual
    }

    /// Returns ln W_n,k: the normalised log weight of each sample in state k, so that
    /// Σ_n W_n,k = 1. Feed these to [`crate::states::state_free_energies`] or
    /// [`crate::profile::free_energy_profile`] to get state or profile free energies
    /// in state k.
    pub fn log_weights(&self, state: usize) -> Result<Vec<f64>> {
        self.check_state(state)?;
        Ok((0..self.n_samples)
            .map(|n| self.f_k[state] - self.u(state, n) - self.log_denominator[n])
            .collect())
    }

    /// Returns unnormalised log weights −u_n − ln Σ_k N_k exp(f_k − u_kn) of every sample
    /// in a new state whose reduced potential is `u_target` (length N), for example the
    /// campaign's temperature when the data come from other temperatures or biases.
    pub fn target_log_weights(&self, u_target: &[f64]) -> Result<Vec<f64>> {
        crate::error::check_same_len("u_target", u_target.len(), "samples", self.n_samples)?;
        if let Some(index) = u_target
            .iter()
            .position(|u| u.is_nan() || *u == f64::NEG_INFINITY)
        {
            return Err(StatsError::InvalidValue {
                what: "u_target",
                index,
                value: u_target[index],
            });
        }
        Ok(u_target
            .iter()
            .zip(&self.log_denominator)
            .map(|(u, d)| -u - d)
            .collect())
    }

    /// Returns f_j − f_i for all pairs with their asymptotic uncertainties (eq. (8)–(12)
    /// of Shirts & Chodera 2008: δ²Δf_ij = Θ_ii + Θ_jj − 2Θ_ij).
    pub fn free_energy_differences(&self) -> FreeEnergyDifferences {
        let k = self.n_states;
        let columns: Vec<Vec<f64>> = (0..k).map(|s| self.weights_of_state(s)).collect();
        let n_diag: Vec<f64> = self.n_k.iter().map(|&n| n as f64).collect();
        let theta = covariance(&columns, &n_diag);
        let mut delta_f = vec![0.0; k * k];
        let mut d_delta_f = vec![0.0; k * k];
        for i in 0..k {
            for j in 0..k {
                delta_f[i * k + j] = self.f_k[j] - self.f_k[i];
                let var = theta[i * k + i] + theta[j * k + j] - 2.0 * theta[i * k + j];
                d_delta_f[i * k + j] = var.max(0.0).sqrt();
            }
        }
        FreeEnergyDifferences {
            n_states: k,
            delta_f,
            d_delta_f,
        }
    }

    /// Returns ⟨A⟩_k = Σ_n W_nk A_n in every state k with its asymptotic uncertainty.
    ///
    /// The uncertainty follows section IV of the paper: the observable is treated as an
    /// extra (unsampled) state with weights A'_n W_nk / ⟨A'⟩_k, where A' = A − min A + ε
    /// is made positive, and δ²⟨A⟩_k = ⟨A'⟩_k² (Θ_AA + Θ_kk − 2Θ_Ak) from the augmented
    /// covariance. The shift does not change the result; ε = 4·machine-ε·|min A|
    /// mirrors pymbar 4 so that the two agree to round-off.
    pub fn expectations(&self, a_n: &[f64]) -> Result<Expectations> {
        crate::error::check_same_len("a_n", a_n.len(), "samples", self.n_samples)?;
        crate::error::check_finite("a_n", a_n)?;
        let k = self.n_states;
        let a_min = a_n.iter().copied().fold(f64::INFINITY, f64::min);
        let offset = a_min - 4.0 * f64::EPSILON * a_min.abs();
        let shifted: Vec<f64> = a_n.iter().map(|a| a - offset).collect();
        let mut columns: Vec<Vec<f64>> = (0..k).map(|s| self.weights_of_state(s)).collect();
        let mut means_shifted = Vec::with_capacity(k);
        for s in 0..k {
            let col: Vec<f64> = columns[s]
                .iter()
                .zip(&shifted)
                .map(|(w, a)| w * a)
                .collect();
            let mean: f64 = col.iter().sum();
            means_shifted.push(mean);
            columns.push(
                col.iter()
                    .map(|c| if mean > 0.0 { c / mean } else { 0.0 })
                    .collect(),
            );
        }
        let mut n_diag: Vec<f64> = self.n_k.iter().map(|&n| n as f64).collect();
        n_diag.extend(std::iter::repeat_n(0.0, k));
        let theta = covariance(&columns, &n_diag);
        let m = 2 * k;
        let err = (0..k)
            .map(|s| {
                let a = k + s;
                let var = theta[a * m + a] + theta[s * m + s] - 2.0 * theta[a * m + s];
                means_shifted[s] * var.max(0.0).sqrt()
            })
            .collect();
        Ok(Expectations {
            mean: means_shifted.iter().map(|m| m + offset).collect(),
            err,
        })
    }

    /// Returns u_k(x_n).
    fn u(&self, k: usize, n: usize) -> f64 {
        self.u_kn[k * self.n_samples + n]
    }

    /// Returns W_nk for all n (normalised weights of state k).
    fn weights_of_state(&self, k: usize) -> Vec<f64> {
        (0..self.n_samples)
            .map(|n| (self.f_k[k] - self.u(k, n) - self.log_denominator[n]).exp())
            .collect()
    }

    fn check_state(&self, state: usize) -> Result<()> {
        if state < self.n_states {
            Ok(())
        } else {
            Err(StatsError::InvalidParameter {
                name: "state",
                reason: format!(
                    "{state} is not below the number of states {}",
                    self.n_states
                ),
            })
        }
    }

    fn sampled_states(&self) -> Vec<usize> {
        (0..self.n_states).filter(|&k| self.n_k[k] > 0).collect()
    }

    /// Refuses a sample that has infinite energy in every sampled state.
    fn check_every_sample_possible(&self) -> Result<()> {
        let sampled = self.sampled_states();
        for n in 0..self.n_samples {
            if sampled.iter().all(|&k| self.u(k, n) == f64::INFINITY) {
                return Err(StatsError::InvalidParameter {
                    name: "u_kn",
                    reason: format!("sample {n} has infinite energy in every sampled state"),
                });
            }
        }
        Ok(())
    }

    /// Recomputes ln D_n = ln Σ_k N_k exp(f_k − u_kn) over sampled states, and returns
    /// Φ(f), the per-state weight sums Σ_n N_k W_nk and, if asked, the Hessian
    /// (reduced to the sampled states, row-major S×S).
    fn evaluate(&mut self, sampled: &[usize], want_hessian: bool) -> Evaluation {
        let s = sampled.len();
        let log_n: Vec<f64> = sampled.iter().map(|&k| (self.n_k[k] as f64).ln()).collect();
        let mut sums = vec![0.0; s];
        let mut hessian = if want_hessian {
            vec![0.0; s * s]
        } else {
            Vec::new()
        };
        let mut a = vec![0.0; s];
        let mut phi = 0.0;
        for n in 0..self.n_samples {
            for (j, &k) in sampled.iter().enumerate() {
                a[j] = log_n[j] + self.f_k[k] - self.u(k, n);
            }
            let d = logsumexp(&a);
            self.log_denominator[n] = d;
            phi += d;
            for j in 0..s {
                a[j] = (a[j] - d).exp();
                sums[j] += a[j];
            }
            if want_hessian {
                for i in 0..s {
                    for j in 0..s {
                        hessian[i * s + j] -= a[i] * a[j];
                    }
                }
            }
        }
        for (j, &k) in sampled.iter().enumerate() {
            phi -= self.n_k[k] as f64 * self.f_k[k];
            if want_hessian {
                hessian[j * s + j] += sums[j];
            }
        }
        let residual = sampled
            .iter()
            .enumerate()
            .map(|(j, &k)| (sums[j] / self.n_k[k] as f64 - 1.0).abs())
            .fold(0.0, f64::max);
        Evaluation {
            phi,
            sums,
            hessian,
            residual,
        }
    }

    /// Runs self-consistent warm-up iterations, then Newton steps with line search.
    ///
    /// Gives up early, with [`StatsError::NotConverged`], when the residual has not
    /// improved for `STAGNATION_LIMIT` iterations: that is the round-off floor of the
    /// data, and more passes over them would only cost time.
    fn iterate(&mut self, opts: &MbarOptions) -> Result<()> {
        const STAGNATION_LIMIT: usize = 50;
        let sampled = self.sampled_states();
        let mut eval = self.evaluate(&sampled, false);
        let (mut best, mut best_at) = (f64::INFINITY, 0usize);
        while self.iterations < opts.max_iterations {
            self.residual = eval.residual;
            if eval.residual <= opts.tolerance {
                return Ok(());
            }
            if eval.residual < best {
                (best, best_at) = (eval.residual, self.iterations);
            } else if self.iterations - best_at >= STAGNATION_LIMIT {
                break;
            }
            self.iterations += 1;
            if self.iterations <= opts.self_consistent_warmup {
                self.self_consistent_step(&sampled, &eval);
                eval = self.evaluate(&sampled, false);
                continue;
            }
            let with_h = self.evaluate(&sampled, true);
            eval = match self.newton_step(&sampled, &with_h) {
                Some(next) => next,
                None => {
                    self.self_consistent_step(&sampled, &with_h);
                    self.evaluate(&sampled, false)
                }
            };
        }
        self.residual = eval.residual;
        if eval.residual <= opts.tolerance {
            return Ok(());
        }
        Err(StatsError::NotConverged {
            solver: "MBAR",
            iterations: self.iterations,
            residual: eval.residual,
        })
    }

    /// f_k ← f_k + ln(N_k / Σ_n N_k W_nk): the self-consistent update written with the
    /// sums the last evaluation produced, shifted so the first sampled state stays 0.
    fn self_consistent_step(&mut self, sampled: &[usize], eval: &Evaluation) {
        for (j, &k) in sampled.iter().enumerate() {
            self.f_k[k] += (self.n_k[k] as f64).ln() - eval.sums[j].ln();
        }
        let f0 = self.f_k[sampled[0]];
        sampled.iter().for_each(|&k| self.f_k[k] -= f0);
    }

    /// Tries a Newton step (pseudo-inverse of the Hessian, which is singular along the
    /// all-ones direction) with backtracking on Φ; returns the new evaluation, or None
    /// if no step length decreased Φ or the residual (round-off floor reached).
    fn newton_step(&mut self, sampled: &[usize], eval: &Evaluation) -> Option<Evaluation> {
        let s = sampled.len();
        let grad: Vec<f64> = sampled
            .iter()
            .enumerate()
            .map(|(j, &k)| eval.sums[j] - self.n_k[k] as f64)
            .collect();
        let h_inv = symmetric_pseudo_inverse(&eval.hessian, s, 1e-14);
        let step: Vec<f64> = (0..s)
            .map(|i| -(0..s).map(|j| h_inv[i * s + j] * grad[j]).sum::<f64>())
            .collect();
        let slope: f64 = grad.iter().zip(&step).map(|(g, d)| g * d).sum();
        let start: Vec<f64> = self.f_k.clone();
        let mut t = 1.0;
        for _ in 0..40 {
            for (j, &k) in sampled.iter().enumerate() {
                self.f_k[k] = start[k] + t * step[j];
            }
            let next = self.evaluate(sampled, false);
            let armijo = next.phi <= eval.phi + 1e-4 * t * slope;
            let round_off =
                next.phi <= eval.phi + 1e-13 * eval.phi.abs() && next.residual < eval.residual;
            if armijo || round_off {
                let f0 = self.f_k[sampled[0]];
                sampled.iter().for_each(|&k| self.f_k[k] -= f0);
                return Some(self.evaluate(sampled, false));
            }
            t *= 0.5;
        }
        self.f_k = start;
        None
    }

    /// f_k = −ln Σ_n exp(−u_kn − ln D_n) for states with N_k = 0 (eq. (11) of the paper).
    fn fill_unsampled_states(&mut self) {
        let mut terms = vec![0.0; self.n_samples];
        for k in (0..self.n_states).filter(|&k| self.n_k[k] == 0) {
            for (n, t) in terms.iter_mut().enumerate() {
                *t = -self.u(k, n) - self.log_denominator[n];
            }
            self.f_k[k] = -logsumexp(&terms);
        }
    }
}

/// Φ, weight sums, optional Hessian and residual at the current f.
struct Evaluation {
    phi: f64,
    sums: Vec<f64>,
    hessian: Vec<f64>,
    residual: f64,
}

/// Returns Θ = Wᵀ(I − W N Wᵀ)⁺ W for weight columns W (each of length N) and the
/// diagonal N (zeros for unsampled or augmented columns), as a row-major M×M matrix.
///
/// With WᵀW = V S² Vᵀ (eigen-decomposition of the small Gram matrix), Θ = V S (I − S Vᵀ N
/// V S)⁺ S Vᵀ, which equals the N × N formula without forming it (Shirts & Chodera
/// 2008, appendix D).
fn covariance(columns: &[Vec<f64>], n_diag: &[f64]) -> Vec<f64> {
    let m = columns.len();
    let mut gram = vec![0.0; m * m];
    for i in 0..m {
        for j in i..m {
            let g: f64 = columns[i].iter().zip(&columns[j]).map(|(a, b)| a * b).sum();
            gram[i * m + j] = g;
            gram[j * m + i] = g;
        }
    }
    let eig = symmetric_eigen(&gram, m);
    let sigma: Vec<f64> = eig.values.iter().map(|v| v.max(0.0).sqrt()).collect();
    // vs = V S (columns of V scaled by the singular values).
    let mut vs = eig.vectors.clone();
    for r in 0..m {
        for c in 0..m {
            vs[r * m + c] *= sigma[c];
        }
    }
    let vs_t = transpose(&vs, m, m);
    // kernel = I − (V S)ᵀ N (V S).
    let mut n_vs = vs.clone();
    for r in 0..m {
        for c in 0..m {
            n_vs[r * m + c] *= n_diag[r];
        }
    }
    let mut kernel = matmul(&vs_t, &n_vs, m, m, m);
    for v in kernel.iter_mut() {
        *v = -*v;
    }
    for i in 0..m {
        kernel[i * m + i] += 1.0;
    }
    let pinv = symmetric_pseudo_inverse(&kernel, m, PSEUDO_INVERSE_RCOND);
    matmul(&matmul(&vs, &pinv, m, m, m), &vs_t, m, m, m)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, Normal};

    /// Harmonic states u_k = K_k x²/2 with exact samples; returns (u_kn, N_k).
    fn harmonic(springs: &[f64], n_each: usize, seed: u64) -> (Vec<f64>, Vec<usize>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut x = Vec::new();
        for &k in springs {
            let d = Normal::new(0.0, 1.0 / k.sqrt()).unwrap();
            x.extend((0..n_each).map(|_| d.sample(&mut rng)));
        }
        let u: Vec<f64> = springs
            .iter()
            .flat_map(|&k| x.iter().map(move |x| 0.5 * k * x * x))
            .collect();
        (u, vec![n_each; springs.len()])
    }

    #[test]
    fn single_state_is_trivial() {
        let (u, n) = harmonic(&[2.0], 100, 1);
        let m = Mbar::solve(&u, &n, &MbarOptions::default()).unwrap();
        assert_eq!(m.free_energies(), &[0.0]);
        let d = m.free_energy_differences();
        assert_eq!(d.get(0, 0), (0.0, 0.0));
    }

    #[test]
    fn unsampled_target_state_matches_exact() {
        // Samples from K = 1 and K = 4, target K = 2 never sampled: f_2 − f_0 =
        // ½ ln 2 exactly (Gaussian integral), recovered within 4 standard errors.
        let (mut u, mut n) = harmonic(&[1.0, 4.0], 5000, 2);
        let x_u: Vec<f64> = u[..10_000].iter().map(|u0| 2.0 * u0).collect();
        u.extend(x_u);
        n.push(0);
        let m = Mbar::solve(&u, &n, &MbarOptions::default()).unwrap();
        let d = m.free_energy_differences();
        let (df, err) = d.get(0, 2);
        assert!((df - 0.5 * 2f64.ln()).abs() < 4.0 * err, "{df} ± {err}");
        assert!(err > 0.0 && err < 0.05);
    }

    #[test]
    fn refuses_bad_input() {
        let o = MbarOptions::default();
        assert!(matches!(
            Mbar::solve(&[], &[], &o),
            Err(StatsError::Empty { .. })
        ));
        assert!(matches!(
            Mbar::solve(&[0.0; 3], &[1, 1], &o),
            Err(StatsError::InvalidParameter { name: "u_kn", .. })
        ));
        assert!(matches!(
            Mbar::solve(&[0.0, f64::NAN], &[2], &o),
            Err(StatsError::InvalidValue { index: 1, .. })
        ));
        assert!(matches!(
            Mbar::solve(&[f64::INFINITY, 0.0, f64::INFINITY, 0.0], &[1, 1], &o),
            Err(StatsError::InvalidParameter { .. })
        ));
        let (u, n) = harmonic(&[1.0, 2.0], 10, 3);
        let m = Mbar::solve(&u, &n, &o).unwrap();
        assert!(m.log_weights(2).is_err());
        assert!(m.expectations(&[1.0]).is_err());
    }

    #[test]
    fn unreachable_tolerance_reports_not_converged() {
        // A tolerance below round-off cannot be met: the solver must stop (stagnation
        // or the iteration cap) and say so, with the residual it reached.
        let (u, n) = harmonic(&[1.0, 3.0], 500, 5);
        let o = MbarOptions {
            tolerance: 0.0,
            max_iterations: 200,
            ..Default::default()
        };
        match Mbar::solve(&u, &n, &o) {
            Err(StatsError::NotConverged {
                iterations,
                residual,
                ..
            }) => {
                assert!(iterations <= 200);
                assert!(residual < 1e-12, "residual {residual}");
            }
            other => panic!("expected NotConverged, got {other:?}"),
        }
    }

    #[test]
    fn far_apart_states_converge_from_zero_start() {
        // Spring constants a factor 1e6 apart: f differs by ½ ln 1e6 ≈ 6.9 per step and
        // the wide state's samples have reduced energies up to ~1e13 in the stiffest
        // state, so log-space arithmetic and the Newton finish are both exercised.
        let springs = [1.0, 1e6, 1e12];
        let (u, n) = harmonic(&springs, 2000, 4);
        let m = Mbar::solve(&u, &n, &MbarOptions::default()).unwrap();
        let d = m.free_energy_differences();
        for j in 1..3 {
            let exact = 0.5 * (springs[j] / springs[0]).ln();
            let (df, err) = d.get(0, j);
            assert!(
                (df - exact).abs() < 5.0 * err,
                "state {j}: {df} ± {err} vs {exact}"
            );
        }
        assert!(m.residual() <= 1e-12);
    }
}
