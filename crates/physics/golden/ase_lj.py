"""Golden Lennard-Jones energies and forces for tarn-physics, computed once with ASE.

Run from anywhere:  python3 crates/physics/golden/ase_lj.py
Writes ase_lj.json beside this script. Requires ase (3.29.0 was used) and numpy.

Configurations are random clusters with a minimum pair distance of 0.85 sigma (so that
the energies stay moderate), drawn with a fixed numpy seed. ASE's LennardJones shifts
each pair energy by its value at the cutoff rc; rc = 1e3 makes that shift ~1e-18, i.e.
plain untruncated Lennard-Jones with epsilon = sigma = 1. Two-dimensional clusters are
put in the plane z = 0 and only their x, y force components are kept.
"""
import json
import os

import ase
import numpy as np
from ase import Atoms
from ase.calculators.lj import LennardJones


def random_cluster(rng, n, dims, spacing=1.12, min_dist=0.85):
    """Random positions in a ball of about the cluster's size, rejecting overlaps."""
    radius = spacing * (n ** (1.0 / dims)) * 0.75
    pts = []
    while len(pts) < n:
        p = rng.uniform(-radius, radius, size=dims)
        if all(np.linalg.norm(p - q) >= min_dist for q in pts):
            pts.append(p)
    return np.array(pts)


def evaluate(pos, dims):
    n = pos.shape[0]
    pos3 = np.zeros((n, 3))
    pos3[:, :dims] = pos
    atoms = Atoms(f"Ar{n}", positions=pos3)
    atoms.calc = LennardJones(epsilon=1.0, sigma=1.0, rc=1e3)
    energy = float(atoms.get_potential_energy())
    forces = atoms.get_forces()[:, :dims]
    return energy, forces


def main():
    rng = np.random.default_rng(20261201)
    cases = []
    for n, dims, count in [(7, 2, 4), (7, 3, 3), (13, 3, 4), (20, 2, 3), (38, 3, 3)]:
        for _ in range(count):
            pos = random_cluster(rng, n, dims)
            energy, forces = evaluate(pos, dims)
            cases.append(
                {
                    "particles": n,
                    "dims": dims,
                    "positions": pos.reshape(-1).tolist(),
                    "energy": energy,
                    "forces": forces.reshape(-1).tolist(),
                }
            )
    out = {
        "generator": "crates/physics/golden/ase_lj.py",
        "ase_version": ase.__version__,
        "numpy_version": np.__version__,
        "calculator": "LennardJones(epsilon=1, sigma=1, rc=1e3)",
        "cases": cases,
    }
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "ase_lj.json")
    with open(path, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")
    print(f"wrote {len(cases)} cases to {path} with ASE {ase.__version__}")


if __name__ == "__main__":
    main()
