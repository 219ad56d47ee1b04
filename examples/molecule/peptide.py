#!/usr/bin/env python3
"""Capped alanine (ACE-ALA-NME) for tarn: built from internal coordinates, parameterised
with OpenMM's amber14-all.xml in vacuum, and the unit conventions every script in this
directory shares.

Units (stated once, used everywhere in this directory):
  * positions: angstrom (A), flat [n_atoms * 3] per configuration, atom order of the
    topology written by build() (ace-ala-nme.pdb);
  * energies: kJ/mol, the system's energy unit in the campaign file (so kT = R * T
    with R = 0.008314462618 kJ/mol/K, 2.494339 kJ/mol at 300 K);
  * forces: kJ/mol/A (minus the gradient with respect to positions in A).
OpenMM works in nm, so positions are divided by 10 on the way in and forces are divided
by 10 on the way out (kJ/mol/nm -> kJ/mol/A); energies pass unchanged.

To put in your own molecule, replace build_heavy_atoms() (or load your own PDB in
make_modeller()) and the DIHEDRALS table; everything else works on any topology.

Run as a script to (re)build the start structure:
    python3 peptide.py build          # writes ace-ala-nme.pdb and c7eq.npy
"""
import math
import os
import sys

import numpy as np
import openmm
import openmm.app as app
import openmm.unit as unit

HERE = os.path.dirname(os.path.abspath(__file__))
PDB = os.path.join(HERE, "ace-ala-nme.pdb")
R_KJ_PER_MOL_K = 0.008314462618
NM_PER_ANGSTROM = 0.1

# Standard peptide geometry (bond lengths in A, angles in degrees), our own table of
# textbook values; the minimisation afterwards removes their small errors.
BOND = {"C-N": 1.33, "N-CA": 1.46, "CA-C": 1.52, "C=O": 1.23, "CA-CB": 1.53, "CH3-C": 1.52}
ANGLE = {"CA-C-N": 116.0, "C-N-CA": 122.0, "N-CA-C": 111.0, "N-C=O": 123.0, "C-CA-CB": 110.0}
# Dihedral N-C-CA-CB that makes the alpha carbon L (the natural amino acid).
L_CHIRALITY = 122.7


def place(a, b, c, bond, angle_deg, dihedral_deg):
    """Position of atom d with |cd| = bond, angle bcd and dihedral abcd given (degrees)."""
    angle, dihedral = math.radians(angle_deg), math.radians(dihedral_deg)
    bc = c - b
    bc /= np.linalg.norm(bc)
    n = np.cross(b - a, bc)
    n /= np.linalg.norm(n)
    m = np.cross(n, bc)
    d_local = bond * np.array(
        [-math.cos(angle), math.sin(angle) * math.cos(dihedral), math.sin(angle) * math.sin(dihedral)]
    )
    return c + d_local[0] * bc + d_local[1] * m + d_local[2] * n


def build_heavy_atoms(phi, psi, omega=180.0):
    """The ten heavy atoms of ACE-ALA-NME as (residue, atom name, element, position in A)."""
    ch3 = np.array([0.0, 0.0, 0.0])
    c0 = np.array([BOND["CH3-C"], 0.0, 0.0])
    n1 = c0 + BOND["C-N"] * np.array(
        [-math.cos(math.radians(ANGLE["CA-C-N"])), math.sin(math.radians(ANGLE["CA-C-N"])), 0.0]
    )
    ca = place(ch3, c0, n1, BOND["N-CA"], ANGLE["C-N-CA"], omega)
    c1 = place(c0, n1, ca, BOND["CA-C"], ANGLE["N-CA-C"], phi)
    n2 = place(n1, ca, c1, BOND["C-N"], ANGLE["CA-C-N"], psi)
    c2 = place(ca, c1, n2, BOND["N-CA"], ANGLE["C-N-CA"], omega)
    o0 = place(ca, n1, c0, BOND["C=O"], ANGLE["N-C=O"], 0.0)
    o1 = place(c2, n2, c1, BOND["C=O"], ANGLE["N-C=O"], 0.0)
    cb = place(n1, c1, ca, BOND["CA-CB"], ANGLE["C-CA-CB"], L_CHIRALITY)
    return [
        ("ACE", "CH3", "C", ch3), ("ACE", "C", "C", c0), ("ACE", "O", "O", o0),
        ("ALA", "N", "N", n1), ("ALA", "CA", "C", ca), ("ALA", "CB", "C", cb),
        ("ALA", "C", "C", c1), ("ALA", "O", "O", o1),
        ("NME", "N", "N", n2), ("NME", "C", "C", c2),
    ]


def make_modeller(phi, psi):
    """An OpenMM Modeller holding the heavy atoms with hydrogens added by amber14."""
    top = app.Topology()
    chain = top.addChain()
    residues, atoms, positions = {}, [], []
    for res_name, name, element, xyz in build_heavy_atoms(phi, psi):
        if res_name not in residues:
            residues[res_name] = top.addResidue(res_name, chain)
        atoms.append(top.addAtom(name, app.Element.getBySymbol(element), residues[res_name]))
        positions.append(openmm.Vec3(*(xyz * NM_PER_ANGSTROM)))
    by_name = {(a.residue.name, a.name): a for a in atoms}
    for a, b in [(("ACE", "CH3"), ("ACE", "C")), (("ACE", "C"), ("ACE", "O")),
                 (("ACE", "C"), ("ALA", "N")), (("ALA", "N"), ("ALA", "CA")),
                 (("ALA", "CA"), ("ALA", "CB")), (("ALA", "CA"), ("ALA", "C")),
                 (("ALA", "C"), ("ALA", "O")), (("ALA", "C"), ("NME", "N")),
                 (("NME", "N"), ("NME", "C"))]:
        top.addBond(by_name[a], by_name[b])
    modeller = app.Modeller(top, positions * unit.nanometer)
    modeller.addHydrogens(forcefield())
    return modeller


def forcefield():
    """amber14-all.xml, shipped with OpenMM."""
    return app.ForceField("amber14-all.xml")


def create_system(topology):
    """Vacuum, no cutoff, no constraints, flexible water irrelevant: every bond moves."""
    return forcefield().createSystem(topology, nonbondedMethod=app.NoCutoff, constraints=None,
                                     rigidWater=False, removeCMMotion=False)


def reference_context(system, integrator=None):
    """A context on the Reference platform (fastest for 22 atoms; see README)."""
    integrator = integrator or openmm.VerletIntegrator(0.001)
    return openmm.Context(system, integrator, openmm.Platform.getPlatformByName("Reference"))


def to_openmm(x_angstrom):
    """Flat positions in A -> an [n_atoms, 3] array in nm, as OpenMM wants."""
    return np.asarray(x_angstrom, dtype=np.float64).reshape(-1, 3) * NM_PER_ANGSTROM


def energy_and_forces(context, x_angstrom):
    """Energy (kJ/mol) and flat forces (kJ/mol/A) of one configuration (flat, A).

    OpenMM's internal units are kJ/mol and nm; values are read in those units directly.
    The State's own copy into a numpy buffer (`_getVectorAsNumpy`, what its public
    `getForces(asNumpy=True)` calls) is used when present, because the public method's
    unit bookkeeping costs more than the energy evaluation of a molecule this small.
    """
    context.setPositions(to_openmm(x_angstrom))
    state = context.getState(getEnergy=True, getForces=True)
    if hasattr(state, "_getVectorAsNumpy"):
        f = np.empty((len(x_angstrom) // 3, 3))
        state._getVectorAsNumpy(openmm.State.Forces, f)  # kJ/mol/nm
    else:
        f = state.getForces(asNumpy=True)._value  # kJ/mol/nm
    return state.getPotentialEnergy()._value, f.reshape(-1) * NM_PER_ANGSTROM


def energy_only(context, x_angstrom):
    """Energy (kJ/mol) of one configuration (flat, A)."""
    context.setPositions(to_openmm(x_angstrom))
    return context.getState(getEnergy=True).getPotentialEnergy()._value


def minimise(context, x_angstrom, tolerance=1e-4):
    """OpenMM's own L-BFGS minimisation (tolerance in kJ/mol/nm); returns (E, x in A)."""
    context.setPositions(to_openmm(x_angstrom))
    openmm.LocalEnergyMinimizer.minimize(context, tolerance, 0)
    state = context.getState(getEnergy=True, getPositions=True)
    x = state.getPositions(asNumpy=True).value_in_unit(unit.angstrom)
    return state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole), np.asarray(x).reshape(-1)


def load_topology(path=PDB):
    """The topology of the built molecule (atom order = coordinate order)."""
    return app.PDBFile(path).topology


def atom_index(topology, residue, name):
    """Index of the atom `name` of residue `residue` (by residue name)."""
    for a in topology.atoms():
        if a.residue.name == residue and a.name == name:
            return a.index
    raise KeyError(f"{residue}:{name}")


def backbone_dihedrals(topology):
    """The (phi, psi) atom quadruples: C(ACE)-N-CA-C and N-CA-C-N(NME)."""
    c0 = atom_index(topology, "ACE", "C")
    n1, ca, c1 = (atom_index(topology, "ALA", k) for k in ("N", "CA", "C"))
    n2 = atom_index(topology, "NME", "N")
    return {"phi": (c0, n1, ca, c1), "psi": (n1, ca, c1, n2)}


def dihedral(x_angstrom, i, j, k, l):
    """The dihedral angle i-j-k-l in degrees, in [-180, 180) (IUPAC sign convention)."""
    p = np.asarray(x_angstrom).reshape(-1, 3)
    b0, b1, b2 = p[i] - p[j], p[k] - p[j], p[l] - p[k]
    b1n = b1 / np.linalg.norm(b1)
    v = b0 - np.dot(b0, b1n) * b1n
    w = b2 - np.dot(b2, b1n) * b1n
    ang = math.degrees(math.atan2(np.dot(np.cross(b1n, v), w), np.dot(v, w)))
    return (ang + 180.0) % 360.0 - 180.0


def build_minimised(phi, psi):
    """Builds ACE-ALA-NME at (phi, psi), minimises it; returns (modeller, E, x in A)."""
    modeller = make_modeller(phi, psi)
    context = reference_context(create_system(modeller.topology))
    x0 = np.asarray(modeller.positions.value_in_unit(unit.angstrom)).reshape(-1)
    e, x = minimise(context, x0)
    return modeller, e, x


def main(argv):
    if argv[1:] != ["build"]:
        sys.exit("usage: peptide.py build")
    modeller, e, x = build_minimised(-75.0, 54.0)
    with open(PDB, "w") as f:
        app.PDBFile.writeFile(modeller.topology, x.reshape(-1, 3) * unit.angstrom, f)
    np.save(os.path.join(HERE, "c7eq.npy"), x.reshape(1, -1))
    top = modeller.topology
    d = backbone_dihedrals(top)
    print(f"C7eq: E = {e:.4f} kJ/mol, phi = {dihedral(x, *d['phi']):.2f}, psi = "
          f"{dihedral(x, *d['psi']):.2f}; {top.getNumAtoms()} atoms; phi atoms {d['phi']}, "
          f"psi atoms {d['psi']}")


if __name__ == "__main__":
    main(sys.argv)
