#!/usr/bin/env python3
"""Golden values for tests/molecule.rs: the three vacuum minima of ACE-ALA-NME found by
OpenMM's own minimiser (L-BFGS, Reference platform), independently of tarn.

Each state is built from internal coordinates at a (phi, psi) inside its basin and
minimised by OpenMM; the minimised energy (kJ/mol) and phi, psi (degrees) are written
to reference_minima.json. Library: openmm 8.6.1 (PyPI), amber14-all.xml.

    python3 reference_minima.py            # rewrites reference_minima.json
    python3 reference_minima.py --check    # recomputes and compares with the file
"""
import json
import os
import sys

import peptide

# Start points inside each basin (degrees); the minimiser moves them to the minimum.
STARTS = {"C7eq": (-75.0, 54.0), "C5": (-152.0, 160.0), "C7ax": (61.0, -42.0)}
OUT = os.path.join(peptide.HERE, "reference_minima.json")


def compute():
    """{name: {energy, phi, psi}} from fresh builds and OpenMM minimisations."""
    top = peptide.load_topology()
    d = peptide.backbone_dihedrals(top)
    out = {}
    for name, (phi0, psi0) in STARTS.items():
        _, e, x = peptide.build_minimised(phi0, psi0)
        out[name] = {
            "energy": round(e, 4),
            "phi": round(peptide.dihedral(x, *d["phi"]), 2),
            "psi": round(peptide.dihedral(x, *d["psi"]), 2),
        }
    return out


def main():
    values = compute()
    if "--check" in sys.argv:
        with open(OUT) as f:
            stored = json.load(f)
        for name, v in values.items():
            s = stored[name]
            if abs(s["energy"] - v["energy"]) > 1e-3:
                sys.exit(f"{name}: stored {s} but recomputed {v}")
        print("reference_minima.json agrees with a fresh OpenMM minimisation")
        return
    meta = {"library": "openmm " + peptide.openmm.__version__, "force_field": "amber14-all.xml",
            "units": "energy kJ/mol, angles degrees"}
    with open(OUT, "w") as f:
        json.dump({"_source": meta, **values}, f, indent=2)
        f.write("\n")
    print(json.dumps(values, indent=2))


if __name__ == "__main__":
    main()
