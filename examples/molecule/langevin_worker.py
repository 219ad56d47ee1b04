#!/usr/bin/env python3
"""A user-written explore worker for tarn: OpenMM Langevin dynamics of a molecule at a
temperature taken from the campaign file, returning frames through tarn's worker
protocol, version 1 (docs/worker-protocol.md).

    command = ["python3", "langevin_worker.py", "ace-ala-nme.pdb"]

Parameters (the stage's `params` table):
  temperature_factor  the walker's temperature is T = temperature_factor * kT / R, with
                      kT the campaign's (kJ/mol) and R = 0.008314462618 kJ/mol/K
                      (default 1)
  n_steps             integration steps (default 20000)
  dt_fs               time step in femtoseconds (default 1; no constraints, so the
                      hydrogens' bond vibrations need a short step)
  friction_per_ps     Langevin friction in 1/ps (default 1)
  save_stride         save a frame every this many steps (default 500)
  superpose           if true, each frame is moved rigidly onto the start structure
                      (centre at the origin, then the rotation of least RMSD, Kabsch
                      1976); the energy does not change, but the frames lose the free
                      rotation and drift that a flow would otherwise have to learn
                      (default false)

Output: `samples` [n, 3 * atoms] in angstrom and `energies` [n] in kJ/mol (units of
peptide.py). Every random number comes from the task's seed, so a retried task gives
the same frames. The force field and platform are those of energy_server.py, so the
frames' energies are the energies tarn's quench sees.
"""
import json
import os
import sys

import numpy as np
import openmm
import openmm.unit as unit

import peptide


def superpose(x, reference):
    """Frame x (flat, A) moved rigidly onto the reference: both centred, then rotated by
    the proper rotation of least RMSD (Kabsch, Acta Cryst. A32, 922, 1976)."""
    p = x.reshape(-1, 3) - x.reshape(-1, 3).mean(axis=0)
    q = reference.reshape(-1, 3) - reference.reshape(-1, 3).mean(axis=0)
    u, _, vt = np.linalg.svd(p.T @ q)
    d = np.sign(np.linalg.det(u @ vt))
    rotation = u @ np.diag([1.0, 1.0, d]) @ vt
    return (p @ rotation).reshape(-1)


def run(task, pdb_path):
    """The frames and energies of one walker, and the number of force evaluations."""
    params = task.get("params") or {}
    factor = float(params.get("temperature_factor", 1.0))
    n_steps = int(params.get("n_steps", 20000))
    dt_fs = float(params.get("dt_fs", 1.0))
    friction = float(params.get("friction_per_ps", 1.0))
    stride = int(params.get("save_stride", 500))
    align = bool(params.get("superpose", False))
    if n_steps < 1 or stride < 1 or dt_fs <= 0 or friction <= 0 or factor <= 0:
        raise ValueError("n_steps, save_stride, dt_fs, friction_per_ps and temperature_factor "
                         "must be positive")
    temperature = factor * float(task["kT"]) / peptide.R_KJ_PER_MOL_K
    topology = peptide.load_topology(pdb_path)
    integrator = openmm.LangevinMiddleIntegrator(
        temperature * unit.kelvin, friction / unit.picosecond, dt_fs * unit.femtosecond)
    # OpenMM takes a 31-bit seed; 0 would mean "pick one at random", so avoid it.
    seed = int(task["seed"]) % (2**31 - 1) + 1
    integrator.setRandomNumberSeed(seed)
    context = peptide.reference_context(peptide.create_system(topology), integrator)
    start = np.load(task["inputs"]["start"])
    context.setPositions(peptide.to_openmm(start[0]))
    context.setVelocitiesToTemperature(temperature * unit.kelvin, seed)
    frames, energies = [], []
    for _ in range(n_steps // stride):
        integrator.step(stride)
        state = context.getState(getPositions=True, getEnergy=True)
        frame = state.getPositions(asNumpy=True).value_in_unit(unit.angstrom).reshape(-1)
        frames.append(superpose(frame, start[0]) if align else frame)
        energies.append(state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole))
    # One force evaluation per step (LangevinMiddle reuses the last step's forces).
    evals = (n_steps // stride) * stride
    return np.array(frames), np.array(energies), evals, temperature


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: langevin_worker.py MOLECULE.pdb (run by tarn, with $TARN_TASK set)")
    with open(os.environ["TARN_TASK"]) as f:
        task = json.load(f)
    if task["protocol"] != 1:
        sys.exit(f"protocol {task['protocol']} is not supported by this worker")
    frames, energies, evals, temperature = run(task, sys.argv[1])
    os.makedirs("out", exist_ok=True)
    np.save("out/samples.npy", frames.astype(np.float64))
    np.save("out/energies.npy", energies.astype(np.float64))
    phi, psi = peptide.backbone_dihedrals(peptide.load_topology(sys.argv[1])).values()
    positive_phi = float(np.mean([peptide.dihedral(x, *phi) > 0 for x in frames]))
    result = {
        "protocol": 1,
        "status": "ok",
        "outputs": {"samples": "out/samples.npy", "energies": "out/energies.npy"},
        "metrics": {"temperature_K": temperature, "fraction_phi_positive": positive_phi},
        "energy_evals": evals,
        "model": None,
    }
    # The result file last, through a temporary name and a rename.
    with open("out/result.json.tmp", "w") as f:
        json.dump(result, f)
    os.replace("out/result.json.tmp", "out/result.json")


if __name__ == "__main__":
    main()
