#!/usr/bin/env python3
"""Reference basin free energies of capped alanine (ACE-ALA-NME), vacuum, amber14, 300 K.

The force field is exactly tarn's: examples/molecule/peptide.py (create_system: vacuum,
no cutoff, no constraints; Reference platform), started from examples/molecule/c7eq.npy.

Basins are quench basins: a frame belongs to the minimum that OpenMM's L-BFGS
(LocalEnergyMinimizer) takes it to. A minimum is C7eq, C5 or C7ax when its backbone
dihedrals phi = (4, 6, 8, 14), psi = (6, 8, 14, 16) lie within MATCH_DEG of the values in
examples/molecule/reference_minima.json on the circle and its energy within MATCH_KJ of
the listed one; any other minimum is counted as "other".

Sampling: Langevin dynamics (LangevinMiddleIntegrator, 1 fs as in the example worker,
friction 1/ps, no constraints) at 300, 378, 476 and 600 K, coupled by replica exchange
(temperature swaps between neighbours every 1 ps, velocities rescaled by
sqrt(T_new / T_old); Sugita & Okamoto, Chem. Phys. Lett. 314, 141, 1999), all under one
static bias B(phi) (two von Mises wells of BIAS_KJ at the phi barriers 0 and 120 deg).
Unbiased dynamics enters C7ax far too rarely for the error target (none in 1.5 ns at
300 K, 2-3 entries per ns even at 800-1000 K, measured while writing this script); with
the bias, the 300 K replica crosses every ~100 ps. The frames (one per ps per
temperature, after a discarded burn-in) are combined by MBAR (Shirts & Chodera, J. Chem.
Phys. 129, 124105, 2008; pymbar) with reduced potentials u_k(x) = (E(x) + B(x)) / (R T_k)
for the sampled states and u(x) = E(x) / (R * 300 K) for the unbiased target state (no
samples of its own), so the bias is removed exactly. The 300 K basin probabilities are
the MBAR-weighted fractions; Delta F_b = -kT ln(P_b / P_C7eq). The dynamics stop at
MD_CPU_BUDGET_S of CPU (or MD_WALL_BUDGET_S of wall time on a loaded machine).

Assignment: minimising every frame would cost most of the budget, so a subsample is
minimised ("training"), a (phi, psi) grid rule is built from it (cells of CELL_DEG whose
training frames agree on one basin at least CELL_PURITY of the time, with at least
CELL_MIN frames), every frame in an unsure cell is minimised, and the rule is validated
on a second, independent random subsample of rule-assigned frames that is minimised too
(the agreement is reported; it must reach 99 %).

Errors: a block bootstrap over time (the whole replica-exchange run cut into N_BLOCKS
consecutive blocks, all temperatures of a block kept together, blocks resampled with
replacement, MBAR re-solved per resample). pymbar's own analytic uncertainty (which
treats frames as independent) is reported beside it. The direct estimate from counting
the 300 K frames alone is reported as a cross-check, with the same block bootstrap (its frames reweighted by exp(B / kT)).

Usage: OMP_NUM_THREADS=1 python3 alanine_basins.py [--quick]   (writes alanine_basins.json)
Libraries: openmm (force field and dynamics), pymbar (MBAR), numpy.
"""
import json
import os
import platform
import sys
import time

import numpy as np
import openmm
import openmm.unit as unit

HERE = os.path.dirname(os.path.abspath(__file__))
MOLECULE = os.path.join(HERE, "..", "..", "examples", "molecule")
sys.path.insert(0, MOLECULE)
import peptide  # noqa: E402  (tarn's force field and unit conventions)

OUT = os.path.join(HERE, "alanine_basins.json")
R = peptide.R_KJ_PER_MOL_K
PHI, PSI = (4, 6, 8, 14), (6, 8, 14, 16)
BASINS = ["C7eq", "C5", "C7ax"]
OTHER = 3
MATCH_DEG = 10.0
MATCH_KJ = 0.5
MIN_TOL = 1e-3  # kJ/mol/nm, RMS force (OpenMM 8 LocalEnergyMinimizer)
CELL_DEG = 10.0
CELL_PURITY = 0.98
CELL_MIN = 8
N_BLOCKS = 20
N_BOOT = 200
TEMPERATURES = [300.0 * 2.0 ** (k / 3.0) for k in range(4)]  # 300 ... 600 K, ratio 1.26
# Static bias on phi (kJ/mol): two von Mises wells of depth BIAS_KJ and width BIAS_WIDTH_DEG
# at the phi barriers (0 and 120 deg), removed exactly by the reweighting.
BIAS_KJ = 30.0
BIAS_CENTRES_DEG = (0.0, 120.0)
BIAS_WIDTH_DEG = 25.0
MD_CPU_BUDGET_S = 700.0
MD_WALL_BUDGET_S = 1500.0
DT_FS = 1.0
FRICTION_PER_PS = 1.0
STRIDE = 1000  # steps per frame (1 ps) and per swap attempt


# ----------------------------------------------------------------------------- geometry

def dihedrals(frames, quad):
    """Dihedral (degrees, [-180, 180)) of atoms quad for frames (n, 3 * atoms) in A,
    the convention of peptide.dihedral, vectorised."""
    p = frames.reshape(len(frames), -1, 3)
    i, j, k, l = quad
    b0, b1, b2 = p[:, i] - p[:, j], p[:, k] - p[:, j], p[:, l] - p[:, k]
    b1n = b1 / np.linalg.norm(b1, axis=1, keepdims=True)
    v = b0 - np.sum(b0 * b1n, axis=1, keepdims=True) * b1n
    w = b2 - np.sum(b2 * b1n, axis=1, keepdims=True) * b1n
    ang = np.degrees(np.arctan2(np.sum(np.cross(b1n, v) * w, axis=1), np.sum(v * w, axis=1)))
    return (ang + 180.0) % 360.0 - 180.0


def circ_diff(a, b):
    """Absolute difference of angles on the circle (degrees)."""
    return np.abs((a - b + 180.0) % 360.0 - 180.0)


def bias_expression():
    """OpenMM expression of the phi bias (theta in radians)."""
    w2 = float(np.radians(BIAS_WIDTH_DEG) ** 2)
    terms = " + ".join(f"exp((cos(theta - {float(np.radians(c))!r}) - 1) / {w2!r})"
                       for c in BIAS_CENTRES_DEG)
    return f"-{BIAS_KJ!r} * ({terms})"


def bias_of_phi(phi_deg):
    """The same bias in numpy (kJ/mol), for checking the recorded bias energies."""
    w2 = np.radians(BIAS_WIDTH_DEG) ** 2
    t = np.radians(phi_deg)
    return -BIAS_KJ * sum(np.exp((np.cos(t - np.radians(c)) - 1.0) / w2) for c in BIAS_CENTRES_DEG)


def biased_system(topology):
    """tarn's system plus the phi bias in force group 1 (the force field stays in group 0)."""
    system = peptide.create_system(topology)
    for f in system.getForces():
        f.setForceGroup(0)
    bias = openmm.CustomTorsionForce(bias_expression())
    bias.addTorsion(*PHI, [])
    bias.setForceGroup(1)
    system.addForce(bias)
    return system


def load_minima():
    with open(os.path.join(MOLECULE, "reference_minima.json")) as f:
        ref = json.load(f)
    return [(ref[b]["phi"], ref[b]["psi"], ref[b]["energy"]) for b in BASINS]


def classify_minimum(phi, psi, energy, minima):
    """Index of the known minimum matching (phi, psi, energy), or OTHER."""
    for b, (p0, s0, e0) in enumerate(minima):
        if circ_diff(phi, p0) <= MATCH_DEG and circ_diff(psi, s0) <= MATCH_DEG \
                and abs(energy - e0) <= MATCH_KJ:
            return b
    return OTHER


class Quencher:
    """OpenMM L-BFGS minimisation of frames; counts its work."""

    def __init__(self, system, minima):
        self.context = peptide.reference_context(system)
        self.minima = minima
        self.count = 0
        self.cpu = 0.0
        self.others = []

    def label(self, frame):
        t0 = time.process_time()
        self.context.setPositions(peptide.to_openmm(frame))
        openmm.LocalEnergyMinimizer.minimize(self.context, MIN_TOL, 0)
        state = self.context.getState(getEnergy=True, getPositions=True)
        x = state.getPositions(asNumpy=True).value_in_unit(unit.angstrom).reshape(1, -1)
        e = state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
        phi, psi = dihedrals(x, PHI)[0], dihedrals(x, PSI)[0]
        b = classify_minimum(phi, psi, e, self.minima)
        if b == OTHER:
            self.others.append((round(float(phi), 1), round(float(psi), 1), round(float(e), 3)))
        self.count += 1
        self.cpu += time.process_time() - t0
        return b


# ----------------------------------------------------------------------------- sampling

def replica_exchange(system, start, seed, n_burn, n_frames_max):
    """Temperature replica exchange on the biased system; stops after n_frames_max frames
    or when the CPU or wall budget of the dynamics is spent.

    Returns frames[k] (n, 66) in A at TEMPERATURES[k], energies[k] (force field, kJ/mol),
    biases[k] (kJ/mol) and the swap statistics."""
    n_frames = n_frames_max
    cpu0, wall0 = time.process_time(), time.time()
    k_n = len(TEMPERATURES)
    rng = np.random.default_rng(seed)
    contexts, integrators = [], []
    for k, t in enumerate(TEMPERATURES):
        integ = openmm.LangevinMiddleIntegrator(t * unit.kelvin, FRICTION_PER_PS / unit.picosecond,
                                                DT_FS * unit.femtosecond)
        integ.setRandomNumberSeed(seed * 100 + k + 1)
        ctx = peptide.reference_context(system, integ)
        ctx.setPositions(peptide.to_openmm(start))
        ctx.setVelocitiesToTemperature(t * unit.kelvin, seed * 100 + k + 1)
        contexts.append(ctx)
        integrators.append(integ)
    # temp_of[r] = index of the temperature replica r currently runs at.
    temp_of = np.arange(k_n)
    n_atoms = system.getNumParticles()
    frames = np.zeros((k_n, n_frames, 3 * n_atoms))
    energies = np.zeros((k_n, n_frames))
    biases = np.zeros((k_n, n_frames))
    replica_at = np.zeros((k_n, n_frames), dtype=np.int64)
    tries = np.zeros(k_n - 1)
    accepts = np.zeros(k_n - 1)
    # Round trips: a replica goes from the lowest to the highest temperature and back.
    last_end = np.full(k_n, -1)  # -1 none, 0 lowest, 1 highest
    round_trips = 0
    n_done = 0
    for cycle in range(n_burn + n_frames):
        if cycle >= n_burn and (time.process_time() - cpu0 > MD_CPU_BUDGET_S
                                or time.time() - wall0 > MD_WALL_BUDGET_S):
            break
        e_r = np.empty(k_n)  # force field
        b_r = np.empty(k_n)  # bias
        x_r = []
        for r in range(k_n):
            integrators[r].step(STRIDE)
            st = contexts[r].getState(getEnergy=True, getPositions=cycle >= n_burn, groups={0})
            e_r[r] = st.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
            b_r[r] = contexts[r].getState(getEnergy=True, groups={1}).getPotentialEnergy(
            ).value_in_unit(unit.kilojoule_per_mole)
            if cycle >= n_burn:
                x_r.append(st.getPositions(asNumpy=True).value_in_unit(unit.angstrom).reshape(-1))
        u_r = e_r + b_r  # the potential the dynamics samples
        if cycle >= n_burn:
            i = cycle - n_burn
            n_done = i + 1
            for r in range(k_n):
                frames[temp_of[r], i] = x_r[r]
                energies[temp_of[r], i] = e_r[r]
                biases[temp_of[r], i] = b_r[r]
                replica_at[temp_of[r], i] = r
            for r in range(k_n):
                end = 0 if temp_of[r] == 0 else (1 if temp_of[r] == k_n - 1 else -1)
                if end == 0 and last_end[r] == 1:
                    round_trips += 1
                if end >= 0:
                    last_end[r] = end
        # Swap attempts between neighbours, even pairs on even cycles, odd on odd.
        rep_at = np.argsort(temp_of)  # replica at each temperature
        for k in range(cycle % 2, k_n - 1, 2):
            a, b = rep_at[k], rep_at[k + 1]
            beta_a, beta_b = 1.0 / (R * TEMPERATURES[k]), 1.0 / (R * TEMPERATURES[k + 1])
            log_acc = (beta_a - beta_b) * (u_r[a] - u_r[b])
            tries[k] += 1
            if np.log(rng.uniform()) < log_acc:
                accepts[k] += 1
                temp_of[a], temp_of[b] = k + 1, k
                for rep, kk_old, kk_new in ((a, k, k + 1), (b, k + 1, k)):
                    integrators[rep].setTemperature(TEMPERATURES[kk_new] * unit.kelvin)
                    v = contexts[rep].getState(getVelocities=True).getVelocities(asNumpy=True)
                    contexts[rep].setVelocities(
                        v * np.sqrt(TEMPERATURES[kk_new] / TEMPERATURES[kk_old]))
    return (frames[:, :n_done], energies[:, :n_done], biases[:, :n_done],
            {"swap_acceptance": (accepts / np.maximum(tries, 1)).tolist(),
             "swap_attempts": tries.tolist(), "round_trips": round_trips,
             "replica_at": replica_at[:, :n_done]})


# ----------------------------------------------------------------------------- assignment

def cell_index(phi, psi):
    n = int(round(360.0 / CELL_DEG))
    i = np.floor((phi + 180.0) / CELL_DEG).astype(int) % n
    j = np.floor((psi + 180.0) / CELL_DEG).astype(int) % n
    return i * n + j


def build_cell_rule(cells, labels):
    """Per cell: the majority label if the cell has >= CELL_MIN training frames agreeing
    at least CELL_PURITY of the time, else -1 (unsure)."""
    n_cells = int(round(360.0 / CELL_DEG)) ** 2
    counts = np.zeros((n_cells, OTHER + 1))
    np.add.at(counts, (cells, labels), 1)
    total = counts.sum(axis=1)
    best = counts.argmax(axis=1)
    sure = (total >= CELL_MIN) & (counts.max(axis=1) >= CELL_PURITY * np.maximum(total, 1))
    return np.where(sure, best, -1)


def assign_all(frames_flat, phi, psi, quencher, rng, n_train, n_valid):
    """Labels for every frame (see the module doc) and the rule's validation figures."""
    n = len(frames_flat)
    labels = np.full(n, -1)
    how = np.full(n, "", dtype=object)
    train = rng.choice(n, size=min(n_train, n), replace=False)
    for i in train:
        labels[i] = quencher.label(frames_flat[i])
        how[i] = "minimised (training)"
    cells = cell_index(phi, psi)
    rule = build_cell_rule(cells[train], labels[train])
    rule_label = rule[cells]
    # Validation on rule-assigned frames not in the training set.
    candidates = np.flatnonzero((rule_label >= 0) & (labels < 0))
    valid = rng.choice(candidates, size=min(n_valid, len(candidates)), replace=False)
    agree = 0
    confusion = np.zeros((OTHER + 1, OTHER + 1), dtype=int)  # [rule, minimised]
    for i in valid:
        labels[i] = quencher.label(frames_flat[i])
        how[i] = "minimised (validation)"
        confusion[rule_label[i], labels[i]] += 1
        agree += int(labels[i] == rule_label[i])
    # Everything in an unsure cell is minimised; the rest takes the rule.
    unsure = np.flatnonzero((rule_label < 0) & (labels < 0))
    for i in unsure:
        labels[i] = quencher.label(frames_flat[i])
        how[i] = "minimised (unsure cell)"
    rest = labels < 0
    labels[rest] = rule_label[rest]
    how[rest] = "cell rule"
    validation = {
        "n_validation": int(len(valid)),
        "agreement": agree / max(len(valid), 1),
        "confusion_rule_vs_minimised": confusion.tolist(),
        "confusion_order": BASINS + ["other"],
    }
    return labels, how, validation, int(len(train)), int(len(unsure))


# ----------------------------------------------------------------------------- estimates

def mbar_basin_free_energies(energies, biases, labels, mbar_cls, initial_f_k=None):
    """MBAR over the biased temperatures plus the unbiased 300 K target (no samples of its
    own); 300 K basin probabilities and Delta F (kT) vs C7eq.

    energies, biases, labels: (K, n) per temperature. Returns (P[4], dF[3], mbar)."""
    k_n, n = energies.shape
    e = energies.reshape(-1)
    b = biases.reshape(-1)
    betas = 1.0 / (R * np.array(TEMPERATURES))
    u_kn = np.vstack([betas[:, None] * (e + b)[None, :], betas[0] * e[None, :]])
    n_k = np.append(np.full(k_n, n), 0)
    mbar = mbar_cls(u_kn, n_k, initial_f_k=initial_f_k)
    w = mbar.weights()[:, -1]  # weights of every sample in the unbiased 300 K state
    lab = labels.reshape(-1)
    p = np.array([w[lab == b].sum() for b in range(OTHER + 1)])
    with np.errstate(divide="ignore"):
        df = -np.log(p[:3] / p[0])
    return p, df, mbar


def analytic_mbar_error(mbar, energies, labels):
    """pymbar's own uncertainty of Delta F: basin-restricted 300 K states as perturbations
    (u = beta E inside the basin, +inf outside); frames treated as independent."""
    e = energies.reshape(-1)
    lab = labels.reshape(-1)
    beta = 1.0 / (R * TEMPERATURES[0])
    if any(not np.any(lab == b) for b in range(3)):
        return np.full(3, np.nan), np.full(3, np.nan)
    u_ln = np.array([np.where(lab == b, beta * e, np.inf) for b in range(3)])
    try:
        r = mbar.compute_perturbed_free_energies(u_ln)
    except np.linalg.LinAlgError:
        return np.full(3, np.nan), np.full(3, np.nan)
    return np.array(r["Delta_f"])[0], np.array(r["dDelta_f"])[0]


def direct_counts(labels300, biases300):
    """The 300 K replica alone: its frames reweighted by exp(B / kT) to remove the bias.

    Returns (raw counts, Delta F in kT)."""
    c = np.array([(labels300 == b).sum() for b in range(OTHER + 1)])
    w = np.exp((biases300 - biases300.max()) / (R * TEMPERATURES[0]))
    p = np.array([w[labels300 == b].sum() for b in range(OTHER + 1)])
    with np.errstate(divide="ignore"):
        df = -np.log(p[:3] / p[0])
    return c, df


def block_bootstrap(energies, biases, labels, rng, mbar_cls, f_k):
    """Block bootstrap over time of the MBAR and the direct estimates."""
    k_n, n = energies.shape
    edges = np.linspace(0, n, N_BLOCKS + 1).astype(int)
    blocks = [np.arange(edges[i], edges[i + 1]) for i in range(N_BLOCKS)]
    mb, dc = [], []
    for _ in range(N_BOOT):
        pick = rng.integers(0, N_BLOCKS, size=N_BLOCKS)
        idx = np.concatenate([blocks[i] for i in pick])
        _, df, _ = mbar_basin_free_energies(energies[:, idx], biases[:, idx], labels[:, idx],
                                            mbar_cls, f_k)
        mb.append(df)
        dc.append(direct_counts(labels[0, idx], biases[0, idx])[1])
    mb, dc = np.array(mb), np.array(dc)
    finite = np.all(np.isfinite(dc), axis=1)
    return mb.std(axis=0, ddof=1), (dc[finite].std(axis=0, ddof=1) if finite.sum() > 2
                                    else np.full(3, np.nan)), int((~finite).sum())


def sokal_tau(x, c=6.0):
    """Integrated autocorrelation time of a series (Sokal's automatic window)."""
    d = x - x.mean()
    n = len(d)
    if d.var() == 0:
        return float("nan")
    size = 1 << (2 * n - 1).bit_length()
    f = np.fft.rfft(d, n=size)
    acf = np.fft.irfft(f * np.conj(f), n=size)[:n]
    rho = acf / acf[0]
    taus = 0.5 + np.cumsum(rho[1:])
    for w in range(1, len(taus) + 1):
        if w >= c * taus[w - 1]:
            return float(taus[w - 1])
    return float(taus[-1])


# ----------------------------------------------------------------------------- main

def main():
    quick = "--quick" in sys.argv
    import pymbar
    from pymbar import MBAR

    wall0, cpu0 = time.time(), time.process_time()
    seeds = {"replica_exchange": 8301, "assignment": 8302, "bootstrap": 8303}
    n_burn, n_frames = (50, 300) if quick else (200, 40000)
    n_train, n_valid = (600, 300) if quick else (3000, 1500)

    topology = peptide.load_topology()
    system = peptide.create_system(topology)
    sampling_system = biased_system(topology)
    start = np.load(os.path.join(MOLECULE, "c7eq.npy"))[0]
    minima = load_minima()

    t0 = time.process_time()
    frames, energies, biases, rex = replica_exchange(sampling_system, start,
                                                     seeds["replica_exchange"], n_burn, n_frames)
    cpu_md = time.process_time() - t0
    n_frames = energies.shape[1]
    print(f"replica exchange: {len(TEMPERATURES)} x {n_frames} ps (+{n_burn} ps burn-in), "
          f"cpu {cpu_md:.0f} s, swap acceptance {np.round(rex['swap_acceptance'], 3)}, "
          f"round trips {rex['round_trips']}", flush=True)

    k_n = len(TEMPERATURES)
    flat = frames.reshape(k_n * n_frames, -1)
    phi, psi = dihedrals(flat, PHI), dihedrals(flat, PSI)
    # The vectorised dihedral agrees with peptide.dihedral.
    for i in (0, len(flat) // 2, len(flat) - 1):
        assert abs(circ_diff(phi[i], peptide.dihedral(flat[i], *PHI))) < 1e-6
        assert abs(circ_diff(psi[i], peptide.dihedral(flat[i], *PSI))) < 1e-6
    # The recorded bias is the bias formula at the frame's phi.
    bias_check = float(np.max(np.abs(bias_of_phi(phi) - biases.reshape(-1))))
    assert bias_check < 1e-6, bias_check

    t0 = time.process_time()
    quencher = Quencher(system, minima)
    rng = np.random.default_rng(seeds["assignment"])
    labels, how, validation, n_train_done, n_unsure = assign_all(flat, phi, psi, quencher, rng,
                                                                 n_train, n_valid)
    cpu_assign = time.process_time() - t0
    del frames, flat
    labels = labels.reshape(k_n, n_frames)
    how = how.reshape(k_n, n_frames)
    print(f"assignment: {quencher.count} minimisations ({quencher.cpu:.0f} s cpu), rule "
          f"validation agreement {validation['agreement']:.4f} on {validation['n_validation']}, "
          f"unsure-cell frames {n_unsure}", flush=True)

    t0 = time.process_time()
    p, df, mbar = mbar_basin_free_energies(energies, biases, labels, MBAR)
    df_an, ddf_an = analytic_mbar_error(mbar, energies, labels)
    f_k = mbar.f_k.copy()
    c300, df_direct = direct_counts(labels[0], biases[0])
    w300 = np.exp((biases[0] - biases[0].max()) / (R * TEMPERATURES[0]))
    kish300 = float(w300.sum() ** 2 / (w300 ** 2).sum() / len(w300))
    boot_rng = np.random.default_rng(seeds["bootstrap"])
    se_mbar, se_direct, n_degenerate = block_bootstrap(energies, biases, labels, boot_rng, MBAR,
                                                       f_k)
    cpu_mbar = time.process_time() - t0

    kt300 = R * TEMPERATURES[0]
    per_temp = []
    for k, t in enumerate(TEMPERATURES):
        counts = [int((labels[k] == b).sum()) for b in range(OTHER + 1)]
        per_temp.append({
            "T_K": t, "frames": n_frames,
            "counts": dict(zip(BASINS + ["other"], counts)),
            "mean_energy_kJ_mol": float(energies[k].mean()),
            "std_energy_kJ_mol": float(energies[k].std()),
            "tau_int_frames_C7ax_indicator": sokal_tau((labels[k] == 2).astype(float)),
            "tau_int_frames_C5_indicator": sokal_tau((labels[k] == 1).astype(float)),
            "how_assigned": {h: int((how[k] == h).sum()) for h in sorted(set(how[k]))},
        })
    estimates = {}
    for b in (1, 2):
        estimates[BASINS[b]] = {
            "dF_kT": float(df[b]), "stderr_kT": float(se_mbar[b]),
            "dF_kJ_mol": float(df[b] * kt300), "stderr_kJ_mol": float(se_mbar[b] * kt300),
            "pymbar_analytic_dF_kT": float(df_an[b]),
            "pymbar_analytic_stderr_kT_frames_independent": float(ddf_an[b]),
            "direct_300K_only_dF_kT": float(df_direct[b]),
            "direct_300K_only_stderr_kT": float(se_direct[b]),
        }
    for b in (1, 2):
        e = estimates[BASINS[b]]
        print(f"{BASINS[b]}: MBAR dF = {e['dF_kT']:.4f} +- {e['stderr_kT']:.4f} kT "
              f"(pymbar analytic {e['pymbar_analytic_dF_kT']:.4f} +- "
              f"{e['pymbar_analytic_stderr_kT_frames_independent']:.4f}); direct 300 K "
              f"{e['direct_300K_only_dF_kT']:.4f} +- {e['direct_300K_only_stderr_kT']:.4f}",
              flush=True)
    print(f"300 K probabilities {np.round(p, 5)}; others seen: {len(quencher.others)}", flush=True)

    others = {}
    for o in quencher.others:
        key = f"phi {o[0]:.0f}, psi {o[1]:.0f}, E {o[2]:.1f}"
        others[key] = others.get(key, 0) + 1
    result = {
        "_about": "basin free energies of ACE-ALA-NME (vacuum, amber14-all.xml, 300 K) "
                  "relative to C7eq, quench basins; written by tests/reference/alanine_basins.py"
                  + (" (QUICK RUN, not a reference)" if quick else ""),
        "force_field": "examples/molecule/peptide.py create_system: amber14-all.xml, vacuum, "
                       "NoCutoff, no constraints; OpenMM Reference platform",
        "units": "dF in kT at 300 K (kT = R * 300 K = %.10f kJ/mol) and kJ/mol" % kt300,
        "estimates": estimates,
        "probabilities_300K_mbar": dict(zip(BASINS + ["other"], p.tolist())),
        "direct_300K_only": "the 300 K replica's frames alone, counted with weights "
                            "exp(B(phi) / kT) that remove the bias",
        "direct_300K_raw_counts": dict(zip(BASINS + ["other"], c300.tolist())),
        "direct_300K_kish_fraction": kish300,
        "error_method": f"block bootstrap over time: {N_BLOCKS} consecutive blocks of the "
                        f"replica-exchange run (all temperatures together), {N_BOOT} resamples, "
                        "MBAR re-solved per resample; direct estimate with the same blocks "
                        f"({n_degenerate} resamples with a zero count dropped)",
        "sampling": {
            "method": "temperature replica exchange of Langevin trajectories under a static "
                      "bias on phi, MBAR over the temperatures with the unbiased 300 K state "
                      "as the target",
            "temperatures_K": TEMPERATURES,
            "bias": {"on": "phi = atoms (4, 6, 8, 14)",
                     "openmm_expression": bias_expression(),
                     "depth_kJ_mol": BIAS_KJ, "centres_deg": list(BIAS_CENTRES_DEG),
                     "width_deg": BIAS_WIDTH_DEG,
                     "why": "unbiased dynamics enters C7ax too rarely (measured while "
                            "preparing: none in 1.5 ns at 300 K, 2-3 entries per ns even "
                            "at 800-1000 K); the static bias lowers the phi barriers and "
                            "MBAR removes it exactly",
                     "max_abs_difference_recorded_vs_formula": bias_check},
            "md_budget": {"cpu_s": MD_CPU_BUDGET_S, "wall_s": MD_WALL_BUDGET_S,
                          "rule": "production stops at whichever is spent first"},
            "integrator": "LangevinMiddleIntegrator",
            "timestep_fs": DT_FS, "friction_per_ps": FRICTION_PER_PS,
            "constraints": None, "platform": "Reference",
            "start": "examples/molecule/c7eq.npy (all replicas)",
            "burn_in_ps_per_replica": n_burn * STRIDE * DT_FS / 1000.0,
            "production_ps_per_replica": n_frames * STRIDE * DT_FS / 1000.0,
            "frame_and_swap_interval_ps": STRIDE * DT_FS / 1000.0,
            "swap_acceptance": rex["swap_acceptance"],
            "round_trips_lowest_highest": rex["round_trips"],
            "per_temperature": per_temp,
            "seeds": seeds,
            "openmm_seeds": "integrator and velocity seed 100 * replica_exchange_seed + k + 1 "
                            "for temperature index k",
        },
        "assignment": {
            "minimiser": "openmm.LocalEnergyMinimizer, tolerance %g kJ/mol/nm, no iteration cap"
                         % MIN_TOL,
            "match": f"minimum's phi and psi within {MATCH_DEG} deg of "
                     f"examples/molecule/reference_minima.json and energy within {MATCH_KJ} kJ/mol",
            "rule": f"(phi, psi) cells of {CELL_DEG} deg labelled from the training "
                    f"minimisations when >= {CELL_MIN} frames and purity >= {CELL_PURITY}; frames "
                    "in other cells minimised",
            "n_minimised": quencher.count,
            "n_minimised_training": n_train_done,
            "n_minimised_unsure_cells": n_unsure,
            "rule_validation": validation,
            "rule_validation_passed": bool(validation["agreement"] >= 0.99),
            "unassigned_minima_seen": others,
            "unassigned_frames_total": int((labels == OTHER).sum()),
        },
        "versions": {"openmm": openmm.__version__, "pymbar": pymbar.__version__,
                     "numpy": np.__version__, "python": platform.python_version()},
        "omp_num_threads": os.environ.get("OMP_NUM_THREADS"),
        "run_time_s": {"wall": time.time() - wall0, "cpu": time.process_time() - cpu0,
                       "cpu_dynamics": cpu_md, "cpu_assignment": cpu_assign,
                       "cpu_mbar_and_bootstrap": cpu_mbar},
    }
    out = OUT if not quick else OUT.replace(".json", ".quick.json")
    with open(out, "w") as f:
        json.dump(result, f, indent=2)
        f.write("\n")
    print(f"wrote {out}; cpu {result['run_time_s']['cpu']:.0f} s, wall "
          f"{result['run_time_s']['wall']:.0f} s", flush=True)


if __name__ == "__main__":
    main()
