#!/usr/bin/env python3
"""Re-minimises every state of a tarn catalogue with OpenMM's own minimiser and prints,
per state, tarn's energy, OpenMM's, their difference (kJ/mol) and phi, psi (degrees).

    tarn states alanine --json > states.json
    python3 check_states.py states.json        # a table
    python3 check_states.py states.json --json # the same as JSON, for tests/molecule.rs

The reference is OpenMM 8.6.1 (PyPI), L-BFGS to 1e-4 kJ/mol/nm on the Reference
platform, starting from tarn's minimum (its `representative`, angstrom).
"""
import json
import sys

import numpy as np

import peptide


def main():
    with open(sys.argv[1]) as f:
        states = json.load(f)
    top = peptide.load_topology()
    d = peptide.backbone_dihedrals(top)
    context = peptide.reference_context(peptide.create_system(top))
    rows = []
    for s in states:
        x = np.asarray(s["representative"], dtype=np.float64)
        e_openmm, x_min = peptide.minimise(context, x)
        rows.append({
            "id": s["id"],
            "tarn_energy": s["energy"],
            "openmm_energy": e_openmm,
            "difference": s["energy"] - e_openmm,
            "phi": peptide.dihedral(x, *d["phi"]),
            "psi": peptide.dihedral(x, *d["psi"]),
            "openmm_phi": peptide.dihedral(x_min, *d["phi"]),
            "openmm_psi": peptide.dihedral(x_min, *d["psi"]),
            "found_task": s["found_task"],
        })
    if "--json" in sys.argv:
        print(json.dumps(rows))
        return
    print(f"{'state':>5} {'tarn E':>11} {'OpenMM E':>11} {'diff':>9} {'phi':>7} {'psi':>7}  found by")
    for r in rows:
        print(f"{r['id']:>5} {r['tarn_energy']:11.4f} {r['openmm_energy']:11.4f} "
              f"{r['difference']:9.5f} {r['phi']:7.1f} {r['psi']:7.1f}  {r['found_task']}")


if __name__ == "__main__":
    main()
