#!/usr/bin/env python3
"""Reference values for lattice phi^4 on a periodic 8x8 lattice, by hybrid Monte Carlo.

Weight exp(-S) with
    S = sum_x [ sum_mu (phi_{x+mu} - phi_x)^2 + m2 phi_x^2 + lam phi_x^4 ],
mu over the two lattice directions (each link once), m2 = -4, lam = 8.

Observables (V = 64, M = sum_x phi_x):
    <|M|>/V,   <M^2>/V,   <phi^2> = < mean_x phi_x^2 >.

Method: HMC (Duane, Kennedy, Pendleton & Roweth, Phys. Lett. B 195, 216, 1987) with unit
masses, leapfrog and an exact Metropolis test on H = S + p^2/2, vectorised over many
independent chains in numpy. The step size is tuned during burn-in towards an acceptance
of about 0.8 and then frozen; each trajectory draws its step size uniformly within +-10 %
of the tuned value (per chain) with a fixed number of steps, so the trajectory length
(about 1) is jittered, which avoids resonances.

Errors: the autocovariance of each observable is computed per chain (about the grand
mean) and averaged over chains; tau_int comes from Sokal's automatic window (smallest W
with W >= c tau_int(W), c = 6; Madras & Sokal, J. Stat. Phys. 50, 109, 1988; Sokal,
"Monte Carlo methods in statistical mechanics", Cargese lectures 1996). The standard
error is sqrt(2 tau_int var / (chains * trajectories)). As an independent check the
spread of the chain means (std / sqrt(chains)) is reported too: the chains are
independent, so this needs no autocorrelation model.

Checks, both recorded in the JSON:
  * the free field (lam = 0, m2 = 1), where <phi^2> is exact:
    (1/2V) sum_p 1/(m2 + sum_mu 4 sin^2(p_mu/2)), p_mu = 2 pi n/L; for L = 8 this is
    0.1270869988 (computed here from the formula as well);
  * an independent checkerboard Metropolis sampler on the target (m2 = -4, lam = 8):
    its estimates must agree with HMC's within their combined errors.

Usage: OMP_NUM_THREADS=1 python3 phi4_hmc.py [--quick]   (writes phi4_8x8_m2-4_l8.json)
Library: numpy only.
"""
import json
import os
import platform
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "phi4_8x8_m2-4_l8.json")
L = 8
V = L * L
FREE_FIELD_PHI2_L8 = 0.1270869988  # exact, L = 8, m2 = 1, from the formula in free_field_phi2
SOKAL_C = 6.0


# ----------------------------------------------------------------------------- action

def action(phi, m2, lam):
    """S per chain for fields of shape (chains, L, L)."""
    kin = (np.roll(phi, -1, axis=1) - phi) ** 2 + (np.roll(phi, -1, axis=2) - phi) ** 2
    p2 = phi * phi
    return np.sum(kin + m2 * p2 + lam * p2 * p2, axis=(1, 2))


def neighbour_sum(phi):
    """Sum of the four nearest neighbours of every site (periodic)."""
    return (np.roll(phi, 1, axis=1) + np.roll(phi, -1, axis=1)
            + np.roll(phi, 1, axis=2) + np.roll(phi, -1, axis=2))


def grad_action(phi, m2, lam):
    """dS/dphi_x = (8 + 2 m2) phi_x - 2 sum_nb phi + 4 lam phi_x^3."""
    return (8.0 + 2.0 * m2) * phi - 2.0 * neighbour_sum(phi) + 4.0 * lam * phi ** 3


def observables(phi):
    """|M|/V, M^2/V and mean_x phi_x^2 per chain."""
    m = phi.sum(axis=(1, 2))
    return np.abs(m) / V, m * m / V, np.mean(phi * phi, axis=(1, 2))


def free_field_phi2(l, m2):
    """Exact <phi_x^2> of the free field with this action: (1/2V) sum_p 1/(m2 + p_hat^2)."""
    p = 2.0 * np.pi * np.arange(l) / l
    s = 4.0 * np.sin(p / 2.0) ** 2
    return float(np.sum(1.0 / (m2 + s[:, None] + s[None, :])) / (2.0 * l * l))


# ----------------------------------------------------------------------------- HMC

def hmc_trajectory(rng, phi, eps_base, n_steps, m2, lam):
    """One HMC trajectory for every chain; returns (new phi, accepted mask, dH)."""
    chains = phi.shape[0]
    eps = (eps_base * rng.uniform(0.9, 1.1, size=chains))[:, None, None]
    p = rng.standard_normal(phi.shape)
    h0 = action(phi, m2, lam) + 0.5 * np.sum(p * p, axis=(1, 2))
    x = phi.copy()
    g = grad_action(x, m2, lam)
    p = p - 0.5 * eps * g
    for step in range(n_steps):
        x = x + eps * p
        g = grad_action(x, m2, lam)
        if step + 1 < n_steps:
            p = p - eps * g
    p = p - 0.5 * eps * g
    h1 = action(x, m2, lam) + 0.5 * np.sum(p * p, axis=(1, 2))
    dh = h1 - h0
    accept = np.log(rng.uniform(size=chains)) < -dh
    phi = np.where(accept[:, None, None], x, phi)
    return phi, accept, dh


def run_hmc(seed, chains, n_burn, n_prod, m2, lam, traj_len=1.0, target_acc=0.8):
    """Burn-in with step-size tuning, then production with the step size frozen.

    Returns a dict with the per-trajectory observables (shape (n_prod, chains) each) and
    the sampler's settings and statistics."""
    rng = np.random.default_rng(seed)
    phi = 0.1 * rng.standard_normal((chains, L, L))
    eps = 0.1
    n_steps = max(1, int(round(traj_len / eps)))
    t0 = time.process_time()
    for i in range(n_burn):
        phi, acc, _ = hmc_trajectory(rng, phi, eps, n_steps, m2, lam)
        # Robbins-Monro on log eps during the first 80 % of burn-in; keep eps * n ~ traj_len.
        if i < 0.8 * n_burn:
            eps *= np.exp(0.5 * (acc.mean() - target_acc) / np.sqrt(1.0 + i / 20.0))
            n_steps = max(1, int(round(traj_len / eps)))
    t_burn = time.process_time() - t0
    obs = np.empty((3, n_prod, chains))
    acc_sum = 0.0
    dh_exp = 0.0
    t0 = time.process_time()
    for i in range(n_prod):
        phi, acc, dh = hmc_trajectory(rng, phi, eps, n_steps, m2, lam)
        acc_sum += acc.mean()
        dh_exp += np.mean(np.exp(-np.clip(dh, -50, 50)))
        obs[0, i], obs[1, i], obs[2, i] = observables(phi)
    t_prod = time.process_time() - t0
    return {
        "obs": obs,
        "eps": float(eps),
        "n_leapfrog": n_steps,
        "acceptance": acc_sum / n_prod,
        "mean_exp_minus_dH": dh_exp / n_prod,
        "cpu_s_burn": t_burn,
        "cpu_s_prod": t_prod,
    }


# ----------------------------------------------------------------------------- Metropolis

def checkerboard_metropolis(seed, chains, n_burn, n_prod, m2, lam, delta=None,
                            target_acc=0.5):
    """Local Metropolis, even then odd sublattice, proposals phi + delta * U(-1, 1).

    delta is tuned during the first half of burn-in towards target_acc, then frozen.
    Returns the per-sweep observables (shape (3, n_prod, chains)) and the settings."""
    rng = np.random.default_rng(seed)
    phi = 0.1 * rng.standard_normal((chains, L, L))
    parity = (np.add.outer(np.arange(L), np.arange(L)) % 2).astype(bool)
    masks = [~parity, parity]
    delta = 1.0 if delta is None else delta

    def sweep(phi, delta):
        accepted = 0.0
        for mask in masks:
            nb = neighbour_sum(phi)
            new = phi + delta * rng.uniform(-1.0, 1.0, size=phi.shape)
            # Local action of a site given its neighbours (constants dropped).
            def local(f):
                f2 = f * f
                return (4.0 + m2) * f2 - 2.0 * f * nb + lam * f2 * f2
            ds = local(new) - local(phi)
            ok = (np.log(rng.uniform(size=phi.shape)) < -ds) & mask
            phi = np.where(ok, new, phi)
            accepted += ok.sum() / (mask.sum() * phi.shape[0])
        return phi, accepted / 2.0

    for i in range(n_burn):
        phi, acc = sweep(phi, delta)
        if i < n_burn // 2:
            delta *= np.exp(0.5 * (acc - target_acc) / np.sqrt(1.0 + i / 20.0))
    obs = np.empty((3, n_prod, chains))
    acc_sum = 0.0
    t0 = time.process_time()
    for i in range(n_prod):
        phi, acc = sweep(phi, delta)
        acc_sum += acc
        obs[0, i], obs[1, i], obs[2, i] = observables(phi)
    return {"obs": obs, "delta": float(delta), "acceptance": acc_sum / n_prod,
            "cpu_s_prod": time.process_time() - t0}


# ----------------------------------------------------------------------------- errors

def autocovariance(x):
    """Autocovariance C(t), t = 0..n-1, of the series x (n, chains) about the grand mean,
    averaged over chains (FFT, zero-padded, unbiased by 1/n per lag as in Sokal)."""
    n, chains = x.shape
    d = x - x.mean()
    size = 1 << (2 * n - 1).bit_length()
    f = np.fft.rfft(d, n=size, axis=0)
    acf = np.fft.irfft(f * np.conj(f), n=size, axis=0)[:n]
    return acf.mean(axis=1) / n


def tau_int_sokal(c_t, c=SOKAL_C):
    """Integrated autocorrelation time with Sokal's automatic window.

    Returns (tau_int, window W)."""
    rho = c_t / c_t[0]
    taus = 0.5 + np.cumsum(rho[1:])
    for w in range(1, len(taus) + 1):
        if w >= c * taus[w - 1]:
            return float(taus[w - 1]), w
    return float(taus[-1]), len(taus)


def analyse(series, name):
    """Mean, tau_int (chains combined and per chain) and standard errors of one observable.

    series: (n, chains)."""
    n, chains = series.shape
    c_t = autocovariance(series)
    tau, w = tau_int_sokal(c_t)
    var = c_t[0]
    se = float(np.sqrt(2.0 * tau * var / (n * chains)))
    # Madras-Sokal variance of tau: 2(2W+1)/N tau^2, with N the total number of samples.
    tau_err = float(tau * np.sqrt(2.0 * (2 * w + 1) / (n * chains)))
    per_chain = []
    for k in range(chains):
        ck = autocovariance(series[:, k:k + 1])
        per_chain.append(tau_int_sokal(ck)[0])
    per_chain = np.array(per_chain)
    chain_means = series.mean(axis=0)
    return {
        "name": name,
        "mean": float(series.mean()),
        "stderr": se,
        "stderr_from_chain_means": float(chain_means.std(ddof=1) / np.sqrt(chains)),
        "variance": float(var),
        "tau_int": tau,
        "tau_int_err": tau_err,
        "window": w,
        "tau_int_per_chain_mean": float(per_chain.mean()),
        "tau_int_per_chain_std": float(per_chain.std(ddof=1)),
        "n_per_chain": n,
        "chains": chains,
    }


def summarise(obs):
    names = ["abs_M_over_V", "M2_over_V", "phi2"]
    return {name: analyse(obs[i], name) for i, name in enumerate(names)}


# ----------------------------------------------------------------------------- main

def main():
    quick = "--quick" in sys.argv
    wall0, cpu0 = time.time(), time.process_time()
    chains = 128
    seeds = {"free_field_hmc": 20261204, "target_hmc": 20261205, "target_metropolis": 20261206}

    # 1. The free field against its exact <phi^2>.
    exact = free_field_phi2(L, 1.0)
    assert abs(exact - FREE_FIELD_PHI2_L8) < 1e-9, exact
    ff_burn, ff_prod = (200, 1000) if quick else (500, 4000)
    ff = run_hmc(seeds["free_field_hmc"], chains, ff_burn, ff_prod, m2=1.0, lam=0.0)
    ff_stats = summarise(ff["obs"])["phi2"]
    z = (ff_stats["mean"] - exact) / ff_stats["stderr"]
    free_field = {
        "m2": 1.0, "lam": 0.0, "L": L,
        "exact_phi2": exact,
        "exact_phi2_source": "(1/2V) sum_p 1/(m2 + sum_mu 4 sin^2(p_mu/2)), p_mu = 2 pi n/L, "
                             "computed here (0.1270869988 to 10 digits)",
        "hmc_phi2": ff_stats,
        "z_score": float(z),
        "passed": bool(abs(z) < 3.0),
        "pass_rule": "|mean - exact| < 3 standard errors",
        "seed": seeds["free_field_hmc"], "chains": chains,
        "n_burn": ff_burn, "n_trajectories": ff_prod,
        "step_size": ff["eps"], "n_leapfrog": ff["n_leapfrog"],
        "acceptance": ff["acceptance"], "mean_exp_minus_dH": ff["mean_exp_minus_dH"],
    }
    print(f"free field: <phi^2> = {ff_stats['mean']:.6f} +- {ff_stats['stderr']:.6f} "
          f"(exact {exact:.10f}, z = {z:.2f}); eps {ff['eps']:.4f} x {ff['n_leapfrog']}, "
          f"acc {ff['acceptance']:.3f}", flush=True)
    if not free_field["passed"]:
        sys.exit("free-field check failed")

    # 2. The target.
    m2, lam = -4.0, 8.0
    burn, prod = (300, 2000) if quick else (1000, 30000)
    hmc = run_hmc(seeds["target_hmc"], chains, burn, prod, m2, lam)
    stats = summarise(hmc["obs"])
    n_lf = hmc["n_leapfrog"]
    # Cost: one gradient per leapfrog step (the last step's gradient is reused).
    grad_per_traj = n_lf
    cpu_per_traj_chain = hmc["cpu_s_prod"] / (prod * chains)
    tau_m = stats["abs_M_over_V"]["tau_int"]
    for name, s in stats.items():
        print(f"HMC {name}: {s['mean']:.6f} +- {s['stderr']:.6f} (chain means: "
              f"{s['stderr_from_chain_means']:.6f}), tau_int {s['tau_int']:.3f} "
              f"+- {s['tau_int_err']:.3f} (W = {s['window']})", flush=True)
    print(f"HMC eps {hmc['eps']:.4f} x {n_lf}, acceptance {hmc['acceptance']:.3f}, "
          f"<exp(-dH)> {hmc['mean_exp_minus_dH']:.4f}, prod cpu {hmc['cpu_s_prod']:.1f} s",
          flush=True)

    # 3. Checkerboard Metropolis cross-check.
    mburn, mprod = (300, 2000) if quick else (1000, 20000)
    met = checkerboard_metropolis(seeds["target_metropolis"], chains, mburn, mprod, m2, lam)
    mstats = summarise(met["obs"])
    agreement = {}
    for name in stats:
        a, b = stats[name], mstats[name]
        comb = float(np.hypot(a["stderr"], b["stderr"]))
        zz = (a["mean"] - b["mean"]) / comb
        agreement[name] = {"difference": a["mean"] - b["mean"], "combined_stderr": comb,
                           "z": float(zz), "agree_within_3_sigma": bool(abs(zz) < 3.0)}
        print(f"Metropolis {name}: {b['mean']:.6f} +- {b['stderr']:.6f}, tau_int (sweeps) "
              f"{b['tau_int']:.2f}; HMC - Metropolis = {a['mean'] - b['mean']:.6f} (z = {zz:.2f})",
              flush=True)

    result = {
        "_about": "lattice phi^4, periodic 8x8, weight exp(-S), S = sum_x [sum_mu "
                  "(phi_{x+mu}-phi_x)^2 + m2 phi_x^2 + lam phi_x^4]; written by "
                  "tests/reference/phi4_hmc.py" + (" (QUICK RUN, not a reference)" if quick else ""),
        "lattice": {"L": L, "V": V, "m2": m2, "lam": lam},
        "observables_definition": {
            "abs_M_over_V": "<|M|>/V, M = sum_x phi_x",
            "M2_over_V": "<M^2>/V",
            "phi2": "<mean_x phi_x^2>",
        },
        "estimates": {k: {"mean": v["mean"], "stderr": v["stderr"]} for k, v in stats.items()},
        "hmc": {
            "seed": seeds["target_hmc"], "chains": chains,
            "n_burn_discarded": burn, "n_trajectories_per_chain": prod,
            "step_size": hmc["eps"], "step_size_jitter": "uniform +-10 % per chain and trajectory",
            "n_leapfrog": n_lf, "trajectory_length": hmc["eps"] * n_lf,
            "acceptance": hmc["acceptance"], "mean_exp_minus_dH": hmc["mean_exp_minus_dH"],
            "statistics": stats,
            "tau_int_abs_M_trajectories": tau_m,
            "tau_int_abs_M_gradient_evaluations": tau_m * grad_per_traj,
            "gradient_evaluations_per_trajectory": grad_per_traj,
            "cost_per_independent_sample_gradient_evaluations": 2.0 * tau_m * grad_per_traj,
            "cost_per_independent_sample_cpu_s_per_chain": 2.0 * tau_m * cpu_per_traj_chain,
            "cpu_s_burn": hmc["cpu_s_burn"], "cpu_s_production": hmc["cpu_s_prod"],
            "error_method": "autocovariance per chain about the grand mean, averaged over "
                            "chains; Sokal automatic window c = 6; stderr = sqrt(2 tau var / N)",
        },
        "free_field_check": free_field,
        "metropolis_cross_check": {
            "seed": seeds["target_metropolis"], "chains": chains,
            "n_burn_discarded": mburn, "n_sweeps_per_chain": mprod,
            "proposal_half_width": met["delta"], "acceptance": met["acceptance"],
            "statistics": mstats, "agreement_with_hmc": agreement,
            "all_agree": bool(all(v["agree_within_3_sigma"] for v in agreement.values())),
        },
        "versions": {"numpy": np.__version__, "python": platform.python_version()},
        "omp_num_threads": os.environ.get("OMP_NUM_THREADS"),
        "run_time_s": {"wall": time.time() - wall0, "cpu": time.process_time() - cpu0},
    }
    out = OUT if not quick else OUT.replace(".json", ".quick.json")
    with open(out, "w") as f:
        json.dump(result, f, indent=2)
        f.write("\n")
    print(f"wrote {out}; cpu {result['run_time_s']['cpu']:.1f} s, wall {result['run_time_s']['wall']:.1f} s")


if __name__ == "__main__":
    main()
