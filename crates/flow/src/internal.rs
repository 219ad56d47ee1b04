//! Internal coordinates of a molecule: a Z-matrix built from its bond graph, and the
//! bijection between Cartesian coordinates (N atoms in 3-D, row-major x0, y0, z0, x1, ..)
//! and 3N-6 internal coordinates (bond lengths, angles, torsions) plus the 6 rigid-body
//! coordinates, with the log-Jacobian and its hand-derived reverse-mode gradient.
//!
//! Owns: the Z-matrix rule, the internal-coordinate layout, the canonical frame, the
//! Jacobian convention, and two pure text helpers (PDB `CONECT` records, element
//! columns) plus bond perception from covalent radii. Reads no files.
//!
//! # The Z-matrix rule
//!
//! 1. **Root**: a centre of the bond graph (an atom of minimal eccentricity, i.e. whose
//!    farthest atom is the fewest bonds away); ties go to the higher degree, then the
//!    lower index. For N >= 3 a centre is never a leaf, so the root has at least two
//!    neighbours. A shallow tree keeps the chains of placements short.
//! 2. **Tree**: breadth-first search from the root, neighbours in ascending index,
//!    gives each other atom a parent (a bonded atom one step nearer the root).
//! 3. **Placement order**: breadth-first over that tree, the children of each atom
//!    sorted by decreasing subtree size (ties: lower index). The main chain therefore
//!    comes first and carries the "real" torsions; side groups follow.
//! 4. **References** of the atom i at placement position p (j = its parent):
//!    - p = 0: the root, at the origin of the canonical frame;
//!    - p = 1: bond to the root (placed on +z);
//!    - p = 2: bond to the root, angle with the atom at p = 1 (placed in the xz-plane,
//!      x > 0);
//!    - p >= 3: bond i-j, angle i-j-k, torsion i-j-k-l, where k = the parent of j (or,
//!      when j is the root, the atom at p = 1), and l is, in this order of preference:
//!      the first-placed other child of j (a *sibling* torsion: for a methyl group only
//!      the first hydrogen carries the rotor, the others sit near +-120 deg from it);
//!      else the parent of k; else (k is the root) the first-placed child of the root
//!      other than j. Every reference triple j, k, l is thus a bonded path or a branch,
//!      never three atoms without a bond angle between them.
//!
//! Rings are accepted: the Z-matrix follows the breadth-first spanning tree, and a
//! ring-closing bond is not one of the coordinates (its length is a function of the
//! others; [`ZMatrix::ring_closures`] lists those bonds). The map remains a bijection
//! between configurations modulo rigid motions and internal coordinates on their
//! domain; a flow must learn ring closure as a correlation. Atoms without bonds and
//! disconnected graphs are refused. The map is singular where a reference triple is
//! collinear (a bond angle of 180 deg, as in alkynes or nitriles): torsions are
//! undefined there.
//!
//! # Layout
//!
//! For N atoms the 3N-6 internal coordinates are, in placement order: the N-1 bond
//! lengths (ångström), the N-2 angles (radians, in (0, pi)), the N-3 torsions (radians,
//! in (-pi, pi], IUPAC sign: positive when, looking along j -> k, the bond j-i turns
//! clockwise onto k-l; the same as `tarn_physics::cv::dihedral_degrees` in radians).
//! [`ZMatrix::kind`] and [`ZMatrix::circular_mask`] say which are torsions (circular).
//!
//! # Rigid-body coordinates and the Jacobian
//!
//! The 6 external coordinates ([`RigidBody`]) are the root's position t and the ZYZ
//! Euler angles (alpha, beta, gamma) with x = t + Rz(alpha) Ry(beta) Rz(gamma) y, where y
//! is the configuration in the **canonical frame**: root at the origin, the first bond
//! along +z, the atom at p = 2 in the xz-plane with x > 0. (alpha, beta) is the direction
//! of the first bond, gamma the rotation about it.
//!
//! The canonical frame leaves 3N-6 free Cartesian coordinates (z of atom p = 1, x and z
//! of atom p = 2, all three of the others). The map from internal coordinates to them is
//! block-triangular, so
//!
//! |det J_canonical| = r_2 * prod_{p >= 3} r_p^2 sin(theta_p):
//!
//! the atom at p = 1 contributes 1 (z = r_1), the atom at p = 2 the polar-coordinate
//! factor r_2 of its half-plane, and every later atom the spherical volume element
//! about its references. [`ZMatrix::to_cartesian`] returns ln of that and
//! [`ZMatrix::to_internal`] minus it.
//!
//! Including the rigid-body coordinates, the full 3N x 3N map (t, alpha, beta, gamma, q)
//! -> x has |det| = sin(beta) * r_1^2 * r_2^2 sin(theta_2) * prod_{p >= 3} r_p^2 sin(theta_p)
//! (the first bond in spherical coordinates, the atom at p = 2 in cylindrical ones about
//! it). So, for a density on internal coordinates that represents a rotation- and
//! translation-invariant Cartesian density (a Boltzmann density exp(-u)), the volume
//! factor is the canonical one times exp([`ZMatrix::orientation_log_jacobian`]) =
//! r_1^2 r_2 sin(theta_2):
//!
//! p(q) ∝ exp(-u(x(q))) |det J_canonical(q)| r_1^2 r_2 sin(theta_2),
//!
//! and a flow density q(q) on internal coordinates, with the rigid-body coordinates drawn
//! uniformly (volume V, orientations 8 pi^2), gives the Cartesian density
//! ln q_x(x) = ln q(q) - ln|det J_canonical| - orientation_log_jacobian - ln(8 pi^2 V).
//! Importance weights against exp(-u) are therefore
//! ln w = -u(x(q)) + ln|det J_canonical(q)| + orientation_log_jacobian(q) - ln q(q)
//! (up to a constant). The canonical log-det alone is the density on the canonical slice,
//! which is *not* the rotation marginal: do not reweight with it alone.

use crate::real::Real;

/// Everything that can go wrong when building or applying internal coordinates.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum InternalError {
    /// Internal coordinates need at least three atoms.
    #[error("internal coordinates need at least 3 atoms, got {n_atoms}")]
    TooFewAtoms {
        /// Number of atoms given.
        n_atoms: usize,
    },
    /// A bond names an atom that does not exist.
    #[error("bond ({a}, {b}) names atom {atom}, but there are only {n_atoms} atoms")]
    AtomOutOfRange {
        /// First atom of the bond.
        a: usize,
        /// Second atom of the bond.
        b: usize,
        /// The offending atom.
        atom: usize,
        /// Number of atoms.
        n_atoms: usize,
    },
    /// A bond from an atom to itself.
    #[error("bond from atom {atom} to itself")]
    SelfBond {
        /// The atom.
        atom: usize,
    },
    /// An atom with no bond cannot be placed by a Z-matrix.
    #[error("atom {atom} has no bonds")]
    NoBonds {
        /// The atom.
        atom: usize,
    },
    /// The bond graph is not connected.
    #[error("atom {atom} is not connected to atom {reference} through bonds (the bond graph has more than one component)")]
    Disconnected {
        /// An atom in another component.
        atom: usize,
        /// An atom of the component it is not connected to.
        reference: usize,
    },
    /// A slice has the wrong length.
    #[error("shape mismatch in {what}: expected {expected} values, got {got}")]
    Shape {
        /// Which argument.
        what: &'static str,
        /// Expected length.
        expected: usize,
        /// Given length.
        got: usize,
    },
    /// A malformed PDB record.
    #[error("PDB line {line}: {message}: {text:?}")]
    Pdb {
        /// 1-based line number.
        line: usize,
        /// What is wrong.
        message: String,
        /// The line's text.
        text: String,
    },
    /// An element without a tabulated covalent radius.
    #[error("atom {atom}: no covalent radius for element {element:?}")]
    UnknownElement {
        /// 0-based atom index.
        atom: usize,
        /// The element symbol.
        element: String,
    },
}

/// What an internal coordinate measures.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CoordinateKind {
    /// A bond length i-j (ångström).
    Bond,
    /// An angle i-j-k (radians, in (0, pi)).
    Angle,
    /// A torsion i-j-k-l (radians, in (-pi, pi]; circular).
    Torsion,
}

/// The six rigid-body coordinates: x = translation + Rz(alpha) Ry(beta) Rz(gamma) y with
/// y in the canonical frame.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct RigidBody {
    /// Position of the root atom.
    pub translation: [f64; 3],
    /// ZYZ Euler angles (alpha, beta, gamma) in radians: (alpha, beta) the direction of
    /// the first bond (azimuth, polar angle), gamma the rotation about it.
    pub euler_zyz: [f64; 3],
}

impl RigidBody {
    /// The rotation matrix Rz(alpha) Ry(beta) Rz(gamma), row-major.
    pub fn rotation(&self) -> [[f64; 3]; 3] {
        let [a, b, g] = self.euler_zyz;
        let (sa, ca) = a.sin_cos();
        let (sb, cb) = b.sin_cos();
        let (sg, cg) = g.sin_cos();
        [
            [ca * cb * cg - sa * sg, -ca * cb * sg - sa * cg, ca * sb],
            [sa * cb * cg + ca * sg, -sa * cb * sg + ca * cg, sa * sb],
            [-sb * cg, sb * sg, cb],
        ]
    }

    /// The six numbers (translation, then alpha, beta, gamma).
    pub fn to_array(&self) -> [f64; 6] {
        let [x, y, z] = self.translation;
        let [a, b, g] = self.euler_zyz;
        [x, y, z, a, b, g]
    }

    /// From six numbers (translation, then alpha, beta, gamma).
    pub fn from_array(v: [f64; 6]) -> Self {
        RigidBody {
            translation: [v[0], v[1], v[2]],
            euler_zyz: [v[3], v[4], v[5]],
        }
    }
}

/// The result of [`ZMatrix::to_internal`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct InternalOf {
    /// ln|det| of the Cartesian (canonical frame) -> internal map: minus the value
    /// [`ZMatrix::to_cartesian`] returns for the same internal coordinates.
    pub log_det: f64,
    /// The rigid-body coordinates of the configuration.
    pub rigid: RigidBody,
}

/// A Z-matrix over a molecule's bond graph (see the module documentation for the rule).
#[derive(Debug, Clone, PartialEq)]
pub struct ZMatrix {
    n_atoms: usize,
    /// Atom placed at each position; `order[0]` is the root.
    order: Vec<usize>,
    /// Per position p: [i, j, k, l]; only the first min(p + 1, 4) entries are meaningful.
    refs: Vec<[usize; 4]>,
    /// Bonds of the graph not in the spanning tree, (min, max), sorted.
    ring_closures: Vec<(usize, usize)>,
}

type V3 = [f64; 3];

fn sub(a: V3, b: V3) -> V3 {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}
fn add(a: V3, b: V3) -> V3 {
    [a[0] + b[0], a[1] + b[1], a[2] + b[2]]
}
fn scale(a: V3, s: f64) -> V3 {
    [a[0] * s, a[1] * s, a[2] * s]
}
fn dot(a: V3, b: V3) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}
fn cross(a: V3, b: V3) -> V3 {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}
fn norm(a: V3) -> f64 {
    dot(a, a).sqrt()
}
fn atom(x: &[f64], a: usize) -> V3 {
    [x[3 * a], x[3 * a + 1], x[3 * a + 2]]
}
fn set_atom(x: &mut [f64], a: usize, v: V3) {
    x[3 * a..3 * a + 3].copy_from_slice(&v);
}
fn mat_vec(m: &[[f64; 3]; 3], v: V3) -> V3 {
    [dot(m[0], v), dot(m[1], v), dot(m[2], v)]
}
fn mat_t_vec(m: &[[f64; 3]; 3], v: V3) -> V3 {
    [
        m[0][0] * v[0] + m[1][0] * v[1] + m[2][0] * v[2],
        m[0][1] * v[0] + m[1][1] * v[1] + m[2][1] * v[2],
        m[0][2] * v[0] + m[1][2] * v[1] + m[2][2] * v[2],
    ]
}

/// The angle at `j` between `i` and `k`, radians in [0, pi].
fn bond_angle(i: V3, j: V3, k: V3) -> f64 {
    let (a, b) = (sub(i, j), sub(k, j));
    norm(cross(a, b)).atan2(dot(a, b))
}

/// The IUPAC torsion i-j-k-l in radians, (-pi, pi].
fn torsion(i: V3, j: V3, k: V3, l: V3) -> f64 {
    // Normals of the planes (i, j, k) and (j, k, l); the sign from the axis j -> k.
    let (b1, b2, b3) = (sub(j, i), sub(k, j), sub(l, k));
    let (n1, n2) = (cross(b1, b2), cross(b2, b3));
    let y = dot(cross(n1, n2), b2) / norm(b2).max(f64::MIN_POSITIVE);
    let t = y.atan2(dot(n1, n2));
    if t <= -std::f64::consts::PI {
        t + 2.0 * std::f64::consts::PI
    } else {
        t
    }
}

/// The NeRF frame of a placement (Parsons et al., J. Comput. Chem. 26, 1063, 2005):
/// unit vector bc along k -> j and unit normal n of the plane (l, k, j).
struct Frame3 {
    u_len: f64,
    w_len: f64,
    bc: V3,
    n: V3,
    ab: V3,
}

impl Frame3 {
    fn new(pj: V3, pk: V3, pl: V3) -> Self {
        let u = sub(pj, pk);
        let u_len = norm(u);
        let bc = scale(u, 1.0 / u_len);
        let ab = sub(pk, pl);
        let w = cross(ab, bc);
        let w_len = norm(w);
        let n = scale(w, 1.0 / w_len);
        Frame3 {
            u_len,
            w_len,
            bc,
            n,
            ab,
        }
    }

    /// Local offset coefficients (a, b, c) with i - j = a bc + b (n x bc) + c n.
    fn coefficients(r: f64, theta: f64, phi: f64) -> (f64, f64, f64) {
        let (st, ct) = theta.sin_cos();
        let (sp, cp) = phi.sin_cos();
        (-r * ct, r * st * cp, r * st * sp)
    }

    fn offset(&self, a: f64, b: f64, c: f64) -> V3 {
        let m2 = cross(self.n, self.bc);
        add(add(scale(self.bc, a), scale(m2, b)), scale(self.n, c))
    }
}

impl ZMatrix {
    /// Builds the Z-matrix of a molecule of `n_atoms` atoms from its bonds (0-based atom
    /// pairs, in any order, duplicates allowed). Refuses fewer than 3 atoms, bonds to
    /// missing atoms or to the atom itself, atoms without bonds and disconnected graphs,
    /// naming the atom.
    pub fn from_bonds(n_atoms: usize, bonds: &[(usize, usize)]) -> Result<Self, InternalError> {
        if n_atoms < 3 {
            return Err(InternalError::TooFewAtoms { n_atoms });
        }
        let adj = adjacency(n_atoms, bonds)?;
        if let Some(atom) = adj.iter().position(|nb| nb.is_empty()) {
            return Err(InternalError::NoBonds { atom });
        }
        let dist0 = bfs_distances(&adj, 0);
        if let Some(atom) = dist0.iter().position(|d| d.is_none()) {
            return Err(InternalError::Disconnected { atom, reference: 0 });
        }
        let root = graph_centre(&adj);
        let parent = bfs_parents(&adj, root);
        let order = placement_order(&parent, root);
        let refs = references(&order, &parent);
        let ring_closures = non_tree_bonds(&adj, &parent);
        Ok(ZMatrix {
            n_atoms,
            order,
            refs,
            ring_closures,
        })
    }

    /// Number of atoms N.
    pub fn n_atoms(&self) -> usize {
        self.n_atoms
    }

    /// Number of internal coordinates, 3N - 6.
    pub fn n_internal(&self) -> usize {
        3 * self.n_atoms - 6
    }

    /// The root atom (at the origin of the canonical frame).
    pub fn root(&self) -> usize {
        self.order[0]
    }

    /// The atoms in placement order.
    pub fn order(&self) -> &[usize] {
        &self.order
    }

    /// Bonds of the graph that the spanning tree does not contain (one per independent
    /// ring), as (min, max) pairs: not constrained by the internal coordinates.
    pub fn ring_closures(&self) -> &[(usize, usize)] {
        &self.ring_closures
    }

    /// Placement position and kind of internal coordinate `idx`.
    fn locate(&self, idx: usize) -> Option<(usize, CoordinateKind)> {
        let n = self.n_atoms;
        if idx < n - 1 {
            Some((idx + 1, CoordinateKind::Bond))
        } else if idx < 2 * n - 3 {
            Some((idx - (n - 1) + 2, CoordinateKind::Angle))
        } else if idx < 3 * n - 6 {
            Some((idx - (2 * n - 3) + 3, CoordinateKind::Torsion))
        } else {
            None
        }
    }

    /// What internal coordinate `idx` measures (`None` out of range).
    pub fn kind(&self, idx: usize) -> Option<CoordinateKind> {
        self.locate(idx).map(|(_, k)| k)
    }

    /// Whether internal coordinate `idx` is a torsion (a circular variable on
    /// (-pi, pi]).
    pub fn is_circular(&self, idx: usize) -> bool {
        self.kind(idx) == Some(CoordinateKind::Torsion)
    }

    /// One flag per internal coordinate: true for torsions.
    pub fn circular_mask(&self) -> Vec<bool> {
        (0..self.n_internal())
            .map(|i| self.is_circular(i))
            .collect()
    }

    /// The atoms of internal coordinate `idx`: (i, j) for a bond, (i, j, k) for the
    /// angle at j, (i, j, k, l) for a torsion; `None` out of range.
    pub fn atoms_of(&self, idx: usize) -> Option<&[usize]> {
        let (p, kind) = self.locate(idx)?;
        let len = match kind {
            CoordinateKind::Bond => 2,
            CoordinateKind::Angle => 3,
            CoordinateKind::Torsion => 4,
        };
        Some(&self.refs[p][..len])
    }

    /// Index of the bond length of the atom at placement position p >= 1.
    fn bond_index(&self, p: usize) -> usize {
        p - 1
    }
    fn angle_index(&self, p: usize) -> usize {
        self.n_atoms - 1 + p - 2
    }
    fn torsion_index(&self, p: usize) -> usize {
        2 * self.n_atoms - 3 + p - 3
    }

    fn check(&self, what: &'static str, expected: usize, got: usize) -> Result<(), InternalError> {
        if expected == got {
            Ok(())
        } else {
            Err(InternalError::Shape {
                what,
                expected,
                got,
            })
        }
    }

    /// ln|det J_canonical| = ln r_2 + sum_{p >= 3} (2 ln r_p + ln sin theta_p) of the
    /// internal -> canonical-frame Cartesian map (absolute values inside the logs).
    pub fn log_det_canonical(&self, q: &[f64]) -> f64 {
        let mut s = q[self.bond_index(2)].abs().ln();
        for p in 3..self.n_atoms {
            let r = q[self.bond_index(p)];
            let th = q[self.angle_index(p)];
            s += 2.0 * r.abs().ln() + th.sin().abs().ln();
        }
        s
    }

    /// ln(r_1^2 r_2 sin theta_2): what the rigid-body coordinates add to the volume
    /// element beyond the canonical frame, so that ln|det J_canonical| + this is the
    /// log-volume of internal coordinates under a rotation-invariant Cartesian density
    /// (see the module documentation).
    pub fn orientation_log_jacobian(&self, q: &[f64]) -> f64 {
        let (r1, r2, th2) = (
            q[self.bond_index(1)],
            q[self.bond_index(2)],
            q[self.angle_index(2)],
        );
        2.0 * r1.abs().ln() + r2.abs().ln() + th2.sin().abs().ln()
    }

    /// Adds `coef` times the gradient of [`Self::orientation_log_jacobian`] into `g_q`.
    pub fn orientation_log_jacobian_vjp(&self, q: &[f64], coef: f64, g_q: &mut [f64]) {
        let (b1, b2, a2) = (self.bond_index(1), self.bond_index(2), self.angle_index(2));
        g_q[b1] += coef * 2.0 / q[b1];
        g_q[b2] += coef / q[b2];
        g_q[a2] += coef * q[a2].cos() / q[a2].sin();
    }

    /// Internal coordinates `q` (3N-6) and rigid-body coordinates of the configuration
    /// `x` (3N), with ln|det| of the canonical-frame Cartesian -> internal map.
    pub fn to_internal(&self, x: &[f64], q: &mut [f64]) -> Result<InternalOf, InternalError> {
        self.check("to_internal x", 3 * self.n_atoms, x.len())?;
        self.check("to_internal q", self.n_internal(), q.len())?;
        for p in 1..self.n_atoms {
            let [i, j, k, l] = self.refs[p];
            let (pi, pj) = (atom(x, i), atom(x, j));
            q[self.bond_index(p)] = norm(sub(pi, pj));
            if p >= 2 {
                q[self.angle_index(p)] = bond_angle(pi, pj, atom(x, k));
            }
            if p >= 3 {
                q[self.torsion_index(p)] = torsion(pi, pj, atom(x, k), atom(x, l));
            }
        }
        Ok(InternalOf {
            log_det: -self.log_det_canonical(q),
            rigid: self.rigid_body(x),
        })
    }

    /// The rigid-body coordinates of `x` (length 3N, unchecked by this private helper).
    fn rigid_body(&self, x: &[f64]) -> RigidBody {
        let t = atom(x, self.order[0]);
        let u = sub(atom(x, self.order[1]), t);
        let beta = norm([u[0], u[1], 0.0]).atan2(u[2]);
        let alpha = u[1].atan2(u[0]);
        let partial = RigidBody {
            translation: t,
            euler_zyz: [alpha, beta, 0.0],
        };
        let w = mat_t_vec(&partial.rotation(), sub(atom(x, self.order[2]), t));
        RigidBody {
            translation: t,
            euler_zyz: [alpha, beta, w[1].atan2(w[0])],
        }
    }

    /// Places all atoms in the canonical frame from `q`; returns ln|det J_canonical|.
    fn place_canonical(&self, q: &[f64], x: &mut [f64]) -> f64 {
        let (root, a1, a2) = (self.order[0], self.order[1], self.order[2]);
        set_atom(x, root, [0.0; 3]);
        set_atom(x, a1, [0.0, 0.0, q[self.bond_index(1)]]);
        let (r2, th2) = (q[self.bond_index(2)], q[self.angle_index(2)]);
        set_atom(x, a2, [r2 * th2.sin(), 0.0, r2 * th2.cos()]);
        for p in 3..self.n_atoms {
            let [i, j, k, l] = self.refs[p];
            let pj = atom(x, j);
            let f = Frame3::new(pj, atom(x, k), atom(x, l));
            let (a, b, c) = Frame3::coefficients(
                q[self.bond_index(p)],
                q[self.angle_index(p)],
                q[self.torsion_index(p)],
            );
            set_atom(x, i, add(pj, f.offset(a, b, c)));
        }
        self.log_det_canonical(q)
    }

    /// Cartesian coordinates `x` (3N) in the canonical frame from internal coordinates
    /// `q` (3N-6); returns ln|det J_canonical| (see the module documentation).
    pub fn to_cartesian(&self, q: &[f64], x: &mut [f64]) -> Result<f64, InternalError> {
        self.check("to_cartesian q", self.n_internal(), q.len())?;
        self.check("to_cartesian x", 3 * self.n_atoms, x.len())?;
        Ok(self.place_canonical(q, x))
    }

    /// As [`Self::to_cartesian`], then moved by the rigid-body coordinates `rigid`
    /// (x = t + R y). The returned log-det is the canonical one (rotation and
    /// translation have unit determinant).
    pub fn to_cartesian_in(
        &self,
        q: &[f64],
        rigid: &RigidBody,
        x: &mut [f64],
    ) -> Result<f64, InternalError> {
        let log_det = self.to_cartesian(q, x)?;
        let rot = rigid.rotation();
        for a in 0..self.n_atoms {
            set_atom(x, a, add(rigid.translation, mat_vec(&rot, atom(x, a))));
        }
        Ok(log_det)
    }

    /// Reverse-mode gradient of [`Self::to_cartesian`]: given g_x = dL/dx (3N, canonical
    /// frame) and g_log_det = dL/d(ln|det J_canonical|), writes dL/dq (3N-6) into `g_q`.
    /// Hand-derived through each NeRF placement.
    pub fn to_cartesian_vjp(
        &self,
        q: &[f64],
        g_x: &[f64],
        g_log_det: f64,
        g_q: &mut [f64],
    ) -> Result<(), InternalError> {
        self.check("to_cartesian_vjp q", self.n_internal(), q.len())?;
        self.check("to_cartesian_vjp g_x", 3 * self.n_atoms, g_x.len())?;
        self.check("to_cartesian_vjp g_q", self.n_internal(), g_q.len())?;
        let mut x = vec![0.0; 3 * self.n_atoms];
        self.place_canonical(q, &mut x);
        let mut g_pos = g_x.to_vec();
        self.backward(q, &x, &mut g_pos, g_log_det, g_q);
        Ok(())
    }

    /// As [`Self::to_cartesian_vjp`] for x = [`Self::to_cartesian_in`]`(q, rigid)`:
    /// g_x is the gradient with respect to the moved configuration.
    pub fn to_cartesian_vjp_in(
        &self,
        q: &[f64],
        rigid: &RigidBody,
        g_x: &[f64],
        g_log_det: f64,
        g_q: &mut [f64],
    ) -> Result<(), InternalError> {
        self.check("to_cartesian_vjp_in g_x", 3 * self.n_atoms, g_x.len())?;
        let rot = rigid.rotation();
        let mut g_y = vec![0.0; 3 * self.n_atoms];
        for a in 0..self.n_atoms {
            set_atom(&mut g_y, a, mat_t_vec(&rot, atom(g_x, a)));
        }
        self.to_cartesian_vjp(q, &g_y, g_log_det, g_q)
    }

    /// The backward pass over placements in reverse order. `g_pos` holds dL/dx on entry
    /// and is consumed (references accumulate the gradients of the atoms they place).
    fn backward(&self, q: &[f64], x: &[f64], g_pos: &mut [f64], g_ld: f64, g_q: &mut [f64]) {
        for p in (3..self.n_atoms).rev() {
            let [i, j, k, l] = self.refs[p];
            let (bi, ai, ti) = (
                self.bond_index(p),
                self.angle_index(p),
                self.torsion_index(p),
            );
            let (r, th, ph) = (q[bi], q[ai], q[ti]);
            let (pj, pk, pl) = (atom(x, j), atom(x, k), atom(x, l));
            let f = Frame3::new(pj, pk, pl);
            let g = atom(g_pos, i);
            let (st, ct) = th.sin_cos();
            let (sp, cp) = ph.sin_cos();
            // d(i)/d(r, theta, phi) in the local frame.
            let d_r = f.offset(-ct, st * cp, st * sp);
            let d_th = f.offset(r * st, r * ct * cp, r * ct * sp);
            let d_ph = f.offset(0.0, -r * st * sp, r * st * cp);
            g_q[bi] = dot(g, d_r) + g_ld * 2.0 / r;
            g_q[ai] = dot(g, d_th) + g_ld * ct / st;
            g_q[ti] = dot(g, d_ph);
            // Through the frame: i = j + a bc + b (n x bc) + c n.
            let (a, b, c) = Frame3::coefficients(r, th, ph);
            let mut g_bc = add(scale(g, a), scale(cross(g, f.n), b));
            let g_n = add(scale(g, c), scale(cross(f.bc, g), b));
            let g_w = scale(sub(g_n, scale(f.n, dot(f.n, g_n))), 1.0 / f.w_len);
            let g_ab = cross(f.bc, g_w);
            g_bc = add(g_bc, cross(g_w, f.ab));
            let g_u = scale(sub(g_bc, scale(f.bc, dot(f.bc, g_bc))), 1.0 / f.u_len);
            accumulate(g_pos, j, add(g, g_u));
            accumulate(g_pos, k, sub(g_ab, g_u));
            accumulate(g_pos, l, scale(g_ab, -1.0));
        }
        // The atoms at p = 2 and p = 1; the root is fixed.
        let (a1, a2) = (self.order[1], self.order[2]);
        let (b2, an2) = (self.bond_index(2), self.angle_index(2));
        let (r2, th2) = (q[b2], q[an2]);
        let g2 = atom(g_pos, a2);
        let (st, ct) = th2.sin_cos();
        g_q[b2] = g2[0] * st + g2[2] * ct + g_ld / r2;
        g_q[an2] = r2 * (g2[0] * ct - g2[2] * st);
        g_q[self.bond_index(1)] = g_pos[3 * a1 + 2];
    }
}

fn accumulate(g: &mut [f64], a: usize, v: V3) {
    for (c, vc) in v.iter().enumerate() {
        g[3 * a + c] += vc;
    }
}

/// Sorted, deduplicated adjacency lists; validates the bonds.
fn adjacency(n_atoms: usize, bonds: &[(usize, usize)]) -> Result<Vec<Vec<usize>>, InternalError> {
    let mut adj = vec![Vec::new(); n_atoms];
    for &(a, b) in bonds {
        for atom in [a, b] {
            if atom >= n_atoms {
                return Err(InternalError::AtomOutOfRange {
                    a,
                    b,
                    atom,
                    n_atoms,
                });
            }
        }
        if a == b {
            return Err(InternalError::SelfBond { atom: a });
        }
        adj[a].push(b);
        adj[b].push(a);
    }
    for nb in &mut adj {
        nb.sort_unstable();
        nb.dedup();
    }
    Ok(adj)
}

/// Breadth-first distances (in bonds) from `start`; `None` for unreachable atoms.
fn bfs_distances(adj: &[Vec<usize>], start: usize) -> Vec<Option<usize>> {
    let mut dist = vec![None; adj.len()];
    dist[start] = Some(0);
    let mut queue = std::collections::VecDeque::from([start]);
    while let Some(a) = queue.pop_front() {
        let d = dist[a].unwrap_or(0);
        for &b in &adj[a] {
            if dist[b].is_none() {
                dist[b] = Some(d + 1);
                queue.push_back(b);
            }
        }
    }
    dist
}

/// The root: minimal eccentricity, then maximal degree, then lowest index.
fn graph_centre(adj: &[Vec<usize>]) -> usize {
    let ecc = |a: usize| {
        bfs_distances(adj, a)
            .into_iter()
            .map(|d| d.unwrap_or(usize::MAX))
            .max()
            .unwrap_or(0)
    };
    (0..adj.len())
        .min_by_key(|&a| (ecc(a), std::cmp::Reverse(adj[a].len()), a))
        .unwrap_or(0)
}

/// Breadth-first tree from `root` (neighbours in ascending index): parent per atom
/// (`usize::MAX` for the root).
fn bfs_parents(adj: &[Vec<usize>], root: usize) -> Vec<usize> {
    let mut parent = vec![usize::MAX; adj.len()];
    let mut seen = vec![false; adj.len()];
    seen[root] = true;
    let mut queue = std::collections::VecDeque::from([root]);
    while let Some(a) = queue.pop_front() {
        for &b in &adj[a] {
            if !seen[b] {
                seen[b] = true;
                parent[b] = a;
                queue.push_back(b);
            }
        }
    }
    parent
}

/// Breadth-first over the tree, children by decreasing subtree size then index.
fn placement_order(parent: &[usize], root: usize) -> Vec<usize> {
    let n = parent.len();
    let mut children = vec![Vec::new(); n];
    for (a, &p) in parent.iter().enumerate() {
        if p != usize::MAX {
            children[p].push(a);
        }
    }
    // Subtree sizes: a plain breadth-first order reversed visits children before parents.
    let mut bfs = vec![root];
    let mut h = 0;
    while h < bfs.len() {
        let a = bfs[h];
        bfs.extend_from_slice(&children[a]);
        h += 1;
    }
    let mut size = vec![1usize; n];
    for &a in bfs.iter().rev() {
        if parent[a] != usize::MAX {
            size[parent[a]] += size[a];
        }
    }
    for c in &mut children {
        c.sort_by_key(|&a| (std::cmp::Reverse(size[a]), a));
    }
    let mut order = vec![root];
    let mut h = 0;
    while h < order.len() {
        let a = order[h];
        order.extend_from_slice(&children[a]);
        h += 1;
    }
    order
}

/// Reference atoms [i, j, k, l] per placement position (see the module documentation).
fn references(order: &[usize], parent: &[usize]) -> Vec<[usize; 4]> {
    let n = order.len();
    let root = order[0];
    let mut first_child = vec![usize::MAX; n];
    let mut refs = vec![[root; 4]; n];
    for (p, &i) in order.iter().enumerate().skip(1) {
        let j = parent[i];
        let k = if j == root { order[1] } else { parent[j] };
        let l = if first_child[j] != usize::MAX && first_child[j] != k {
            first_child[j]
        } else if j == root {
            // j = root, first child is order[1] = k: the next child is order[2].
            order[2]
        } else if k != root {
            parent[k]
        } else if j != order[1] {
            order[1]
        } else {
            order[2]
        };
        // A centre is never a leaf, so the atoms at p = 1 and p = 2 are children of the
        // root (breadth-first order places all of the root's children first).
        debug_assert!(p > 2 || j == root);
        refs[p] = [i, j, k, l];
        if first_child[j] == usize::MAX {
            first_child[j] = i;
        }
    }
    refs
}

/// Graph bonds not in the spanning tree, as sorted (min, max) pairs.
fn non_tree_bonds(adj: &[Vec<usize>], parent: &[usize]) -> Vec<(usize, usize)> {
    let mut out = Vec::new();
    for (a, nb) in adj.iter().enumerate() {
        for &b in nb {
            if a < b && parent[a] != b && parent[b] != a {
                out.push((a, b));
            }
        }
    }
    out
}

/// Batched and generic (f32/f64) versions: every row is computed in f64.
impl ZMatrix {
    /// [`Self::to_internal`] for `log_det.len()` rows of `x` (3N each) into `q` (3N-6
    /// each); `rigid` (6 per row: translation, alpha, beta, gamma) is filled when given.
    pub fn to_internal_batch<T: Real>(
        &self,
        x: &[T],
        q: &mut [T],
        log_det: &mut [T],
        mut rigid: Option<&mut [T]>,
    ) -> Result<(), InternalError> {
        let (rows, dx, dq) = (log_det.len(), 3 * self.n_atoms, self.n_internal());
        self.check("to_internal_batch x", rows * dx, x.len())?;
        self.check("to_internal_batch q", rows * dq, q.len())?;
        if let Some(rb) = rigid.as_deref() {
            self.check("to_internal_batch rigid", rows * 6, rb.len())?;
        }
        let (mut xr, mut qr) = (vec![0.0; dx], vec![0.0; dq]);
        for r in 0..rows {
            to_f64(&x[r * dx..(r + 1) * dx], &mut xr);
            let out = self.to_internal(&xr, &mut qr)?;
            from_f64(&qr, &mut q[r * dq..(r + 1) * dq]);
            log_det[r] = T::of(out.log_det);
            if let Some(rb) = rigid.as_deref_mut() {
                from_f64(&out.rigid.to_array(), &mut rb[r * 6..(r + 1) * 6]);
            }
        }
        Ok(())
    }

    /// [`Self::to_cartesian`] (canonical frame) for `log_det.len()` rows.
    pub fn to_cartesian_batch<T: Real>(
        &self,
        q: &[T],
        x: &mut [T],
        log_det: &mut [T],
    ) -> Result<(), InternalError> {
        let (rows, dx, dq) = (log_det.len(), 3 * self.n_atoms, self.n_internal());
        self.check("to_cartesian_batch q", rows * dq, q.len())?;
        self.check("to_cartesian_batch x", rows * dx, x.len())?;
        let (mut xr, mut qr) = (vec![0.0; dx], vec![0.0; dq]);
        for r in 0..rows {
            to_f64(&q[r * dq..(r + 1) * dq], &mut qr);
            log_det[r] = T::of(self.place_canonical(&qr, &mut xr));
            from_f64(&xr, &mut x[r * dx..(r + 1) * dx]);
        }
        Ok(())
    }

    /// [`Self::to_cartesian_vjp`] for `g_log_det.len()` rows.
    pub fn to_cartesian_vjp_batch<T: Real>(
        &self,
        q: &[T],
        g_x: &[T],
        g_log_det: &[T],
        g_q: &mut [T],
    ) -> Result<(), InternalError> {
        let (rows, dx, dq) = (g_log_det.len(), 3 * self.n_atoms, self.n_internal());
        self.check("to_cartesian_vjp_batch q", rows * dq, q.len())?;
        self.check("to_cartesian_vjp_batch g_x", rows * dx, g_x.len())?;
        self.check("to_cartesian_vjp_batch g_q", rows * dq, g_q.len())?;
        let (mut xr, mut qr, mut gx, mut gq) =
            (vec![0.0; dx], vec![0.0; dq], vec![0.0; dx], vec![0.0; dq]);
        for r in 0..rows {
            to_f64(&q[r * dq..(r + 1) * dq], &mut qr);
            to_f64(&g_x[r * dx..(r + 1) * dx], &mut gx);
            self.place_canonical(&qr, &mut xr);
            self.backward(&qr, &xr, &mut gx, g_log_det[r].to64(), &mut gq);
            from_f64(&gq, &mut g_q[r * dq..(r + 1) * dq]);
        }
        Ok(())
    }
}

fn to_f64<T: Real>(src: &[T], dst: &mut [f64]) {
    for (d, s) in dst.iter_mut().zip(src) {
        *d = s.to64();
    }
}

fn from_f64<T: Real>(src: &[f64], dst: &mut [T]) {
    for (d, s) in dst.iter_mut().zip(src) {
        *d = T::of(*s);
    }
}

/// One ATOM/HETATM record: its serial number and element symbol.
struct PdbAtom {
    serial: i64,
    element: String,
}

fn pdb_error(line: usize, message: impl Into<String>, text: &str) -> InternalError {
    InternalError::Pdb {
        line,
        message: message.into(),
        text: text.to_string(),
    }
}

/// Fixed-width columns [from, to) of a line, trimmed ("" past the end).
fn columns(text: &str, from: usize, to: usize) -> &str {
    let to = to.min(text.len());
    text.get(from.min(to)..to).unwrap_or("").trim()
}

fn pdb_atoms(text: &str) -> Result<Vec<PdbAtom>, InternalError> {
    let mut atoms = Vec::new();
    for (n, line) in text.lines().enumerate() {
        if !(line.starts_with("ATOM  ") || line.starts_with("HETATM")) {
            continue;
        }
        let serial = columns(line, 6, 11)
            .parse::<i64>()
            .map_err(|_| pdb_error(n + 1, "atom serial (columns 7-11) is not an integer", line))?;
        let mut element = columns(line, 76, 78).to_string();
        if element.is_empty() {
            // No element columns: the atom name's leading letters (columns 13-14).
            element = columns(line, 12, 14)
                .chars()
                .filter(|c| c.is_ascii_alphabetic())
                .take(1)
                .collect();
        }
        atoms.push(PdbAtom { serial, element });
    }
    Ok(atoms)
}

/// Bonds from the `CONECT` records of a PDB text: serial numbers mapped through the
/// ATOM/HETATM records (in file order) to 0-based atom indices, each bond once as
/// (min, max), sorted. Errors name the line: a non-integer field, a serial with no atom
/// record, an atom bonded to itself, a duplicated atom serial.
///
/// Many writers list `CONECT` records only for non-standard residues and the links to
/// them, so the bonds inside standard residues may be missing: combine with
/// [`bonds_from_covalent_radii`] when the graph comes out disconnected.
pub fn bonds_from_pdb_conect(text: &str) -> Result<Vec<(usize, usize)>, InternalError> {
    let atoms = pdb_atoms(text)?;
    let mut index = std::collections::HashMap::new();
    for (i, a) in atoms.iter().enumerate() {
        if index.insert(a.serial, i).is_some() {
            let (n, line) = text
                .lines()
                .enumerate()
                .filter(|(_, l)| l.starts_with("ATOM  ") || l.starts_with("HETATM"))
                .nth(i)
                .unwrap_or((0, ""));
            return Err(pdb_error(
                n + 1,
                format!("atom serial {} appears twice", a.serial),
                line,
            ));
        }
    }
    let mut bonds = Vec::new();
    for (n, line) in text.lines().enumerate() {
        if !line.starts_with("CONECT") {
            continue;
        }
        let mut fields = Vec::new();
        let mut col = 6;
        while col < line.len() {
            let f = columns(line, col, col + 5);
            if !f.is_empty() {
                let v = f.parse::<i64>().map_err(|_| {
                    pdb_error(n + 1, format!("CONECT field {f:?} is not an integer"), line)
                })?;
                let i = *index.get(&v).ok_or_else(|| {
                    pdb_error(
                        n + 1,
                        format!("no ATOM/HETATM record with serial {v}"),
                        line,
                    )
                })?;
                fields.push(i);
            }
            col += 5;
        }
        let Some((&a, rest)) = fields.split_first() else {
            return Err(pdb_error(n + 1, "CONECT record names no atom", line));
        };
        for &b in rest {
            if a == b {
                return Err(pdb_error(n + 1, "atom bonded to itself", line));
            }
            bonds.push((a.min(b), a.max(b)));
        }
    }
    bonds.sort_unstable();
    bonds.dedup();
    Ok(bonds)
}

/// Element symbols of the ATOM/HETATM records of a PDB text, in file order (columns
/// 77-78, or the first letter of the atom name when those are blank).
pub fn pdb_elements(text: &str) -> Result<Vec<String>, InternalError> {
    Ok(pdb_atoms(text)?.into_iter().map(|a| a.element).collect())
}

/// Single-bond covalent radius in ångström (Cordero et al., Dalton Trans. 2832, 2008;
/// carbon sp3) for the common elements of organic molecules; `None` otherwise.
pub fn covalent_radius(element: &str) -> Option<f64> {
    let r = match element.trim().to_ascii_uppercase().as_str() {
        "H" => 0.31,
        "C" => 0.76,
        "N" => 0.71,
        "O" => 0.66,
        "F" => 0.57,
        "P" => 1.07,
        "S" => 1.05,
        "CL" => 1.02,
        "BR" => 1.20,
        "I" => 1.39,
        _ => return None,
    };
    Some(r)
}

/// Bond perception from geometry: atoms a, b are bonded when their distance is below
/// R_a + R_b + `tolerance` (ångström; 0.4 is a common choice), R the
/// [`covalent_radius`] of each element. `x` is one configuration (3N); pairs are
/// (min, max), sorted. O(N^2).
pub fn bonds_from_covalent_radii(
    elements: &[impl AsRef<str>],
    x: &[f64],
    tolerance: f64,
) -> Result<Vec<(usize, usize)>, InternalError> {
    let n = elements.len();
    if x.len() != 3 * n {
        return Err(InternalError::Shape {
            what: "bonds_from_covalent_radii x",
            expected: 3 * n,
            got: x.len(),
        });
    }
    let radii = elements
        .iter()
        .enumerate()
        .map(|(atom, e)| {
            covalent_radius(e.as_ref()).ok_or_else(|| InternalError::UnknownElement {
                atom,
                element: e.as_ref().to_string(),
            })
        })
        .collect::<Result<Vec<f64>, _>>()?;
    let mut bonds = Vec::new();
    for a in 0..n {
        for b in a + 1..n {
            if norm(sub(atom(x, a), atom(x, b))) < radii[a] + radii[b] + tolerance {
                bonds.push((a, b));
            }
        }
    }
    Ok(bonds)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A chain 0-1-2-3-4 with a branch 2-5: the centre is 2, and every reference is a
    /// placed bonded path or branch.
    #[test]
    fn references_follow_bonds_and_are_placed_first() {
        let bonds = [(0, 1), (1, 2), (2, 3), (3, 4), (2, 5)];
        let z = ZMatrix::from_bonds(6, &bonds).unwrap();
        assert_eq!(z.root(), 2);
        let bonded = |a: usize, b: usize| bonds.contains(&(a.min(b), a.max(b)));
        let pos = |a: usize| z.order().iter().position(|&o| o == a).unwrap();
        for idx in 0..z.n_internal() {
            let at = z.atoms_of(idx).unwrap();
            assert!(bonded(at[0], at[1]), "{at:?}");
            if at.len() >= 3 {
                assert!(bonded(at[1], at[2]), "{at:?}");
            }
            if at.len() == 4 {
                assert!(bonded(at[2], at[3]) || bonded(at[1], at[3]), "{at:?}");
            }
            assert!(at[1..].iter().all(|&r| pos(r) < pos(at[0])), "{at:?}");
        }
        assert_eq!(z.circular_mask().iter().filter(|&&c| c).count(), 3);
        assert!(z.ring_closures().is_empty());
    }
}
