//! Internal coordinates (Z-matrix) on capped alanine (ACE-ALA-NME, 22 atoms) and small
//! graphs, each checked against something outside the module: the PDB file's own
//! records and the standard residue topology, rigid-motion invariance of distances,
//! tarn-physics' independent dihedral, exactly built geometries, and central finite
//! differences for the Jacobian determinant and the reverse-mode gradient.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tarn_flow::internal::{
    bonds_from_covalent_radii, bonds_from_pdb_conect, pdb_elements, CoordinateKind, InternalError,
    RigidBody, ZMatrix,
};
use tarn_physics::cv::dihedral_degrees;

const PDB: &str = include_str!("../../../examples/molecule/ace-ala-nme.pdb");
const C7EQ: &[u8] = include_bytes!("../../../examples/molecule/c7eq.npy");

/// The 66 numbers of c7eq.npy (format 1.0, '<f8', shape (1, 66)).
fn c7eq() -> Vec<f64> {
    assert_eq!(&C7EQ[..6], b"\x93NUMPY");
    let header_len = u16::from_le_bytes([C7EQ[8], C7EQ[9]]) as usize;
    let header = std::str::from_utf8(&C7EQ[10..10 + header_len]).unwrap();
    assert!(
        header.contains("'<f8'") && header.contains("(1, 66)"),
        "{header}"
    );
    let data = &C7EQ[10 + header_len..];
    assert_eq!(data.len(), 66 * 8);
    data.chunks_exact(8)
        .map(|b| f64::from_le_bytes(b.try_into().unwrap()))
        .collect()
}

/// Coordinates of the PDB's ATOM/HETATM records (columns 31-54).
fn pdb_coordinates() -> Vec<f64> {
    PDB.lines()
        .filter(|l| l.starts_with("ATOM") || l.starts_with("HETATM"))
        .flat_map(|l| [&l[30..38], &l[38..46], &l[46..54]].map(|f| f.trim().parse().unwrap()))
        .collect()
}

/// CONECT bonds of the file, written out by hand from its 14 CONECT lines (1-based
/// serials minus one).
const CONECT_BONDS: [(usize, usize); 12] = [
    (0, 1),
    (0, 2),
    (0, 3),
    (0, 4),
    (4, 5),
    (4, 6),
    (14, 16),
    (16, 17),
    (16, 18),
    (18, 19),
    (18, 20),
    (18, 21),
];

/// Bonds inside the standard ALA residue (N-H, N-CA, CA-HA, CA-CB, CB-HB1..3, CA-C,
/// C=O), which the file does not list in CONECT records.
const ALA_BONDS: [(usize, usize); 9] = [
    (6, 7),
    (6, 8),
    (8, 9),
    (8, 10),
    (8, 14),
    (10, 11),
    (10, 12),
    (10, 13),
    (14, 15),
];

fn alanine_bonds() -> Vec<(usize, usize)> {
    let mut b: Vec<_> = CONECT_BONDS.iter().chain(&ALA_BONDS).copied().collect();
    b.sort_unstable();
    b
}

fn alanine() -> ZMatrix {
    ZMatrix::from_bonds(22, &alanine_bonds()).unwrap()
}

fn atom(x: &[f64], a: usize) -> [f64; 3] {
    [x[3 * a], x[3 * a + 1], x[3 * a + 2]]
}

fn sub(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}

fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

fn unit(a: [f64; 3]) -> [f64; 3] {
    let n = dot(a, a).sqrt();
    [a[0] / n, a[1] / n, a[2] / n]
}

/// The test's own canonical alignment: origin at atom o0, +z along o0 -> o1, o2 in the
/// xz-plane with x > 0 (a right-handed orthonormal basis, so a proper rotation).
fn align(x: &[f64], o0: usize, o1: usize, o2: usize) -> Vec<f64> {
    let c = atom(x, o0);
    let ez = unit(sub(atom(x, o1), c));
    let v = sub(atom(x, o2), c);
    let ex = unit(sub(
        v,
        [ez[0] * dot(v, ez), ez[1] * dot(v, ez), ez[2] * dot(v, ez)],
    ));
    let ey = [
        ez[1] * ex[2] - ez[2] * ex[1],
        ez[2] * ex[0] - ez[0] * ex[2],
        ez[0] * ex[1] - ez[1] * ex[0],
    ];
    (0..x.len() / 3)
        .flat_map(|a| {
            let d = sub(atom(x, a), c);
            [dot(d, ex), dot(d, ey), dot(d, ez)]
        })
        .collect()
}

/// A uniformly random rotation (unit quaternion) and a translation, applied to x.
fn random_motion(x: &[f64], rng: &mut ChaCha8Rng) -> Vec<f64> {
    let mut qv: [f64; 4] = [0.0; 4];
    for v in &mut qv {
        *v = rng.sample(rand_distr::StandardNormal);
    }
    let n = qv.iter().map(|v| v * v).sum::<f64>().sqrt();
    let [w, a, b, c] = qv.map(|v| v / n);
    let r = [
        [
            1.0 - 2.0 * (b * b + c * c),
            2.0 * (a * b - c * w),
            2.0 * (a * c + b * w),
        ],
        [
            2.0 * (a * b + c * w),
            1.0 - 2.0 * (a * a + c * c),
            2.0 * (b * c - a * w),
        ],
        [
            2.0 * (a * c - b * w),
            2.0 * (b * c + a * w),
            1.0 - 2.0 * (a * a + b * b),
        ],
    ];
    let t: [f64; 3] = [rng.gen_range(-5.0..5.0), rng.gen_range(-5.0..5.0), 3.0];
    (0..x.len() / 3)
        .flat_map(|i| {
            let p = atom(x, i);
            [0, 1, 2].map(|k| dot(r[k], p) + t[k])
        })
        .collect()
}

fn max_abs_diff(a: &[f64], b: &[f64]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
}

/// ln|det| of a square matrix (row-major) by LU with partial pivoting.
fn log_abs_det(mut m: Vec<f64>, n: usize) -> f64 {
    let mut s = 0.0;
    for c in 0..n {
        let p = (c..n)
            .max_by(|&a, &b| m[a * n + c].abs().total_cmp(&m[b * n + c].abs()))
            .unwrap();
        for k in 0..n {
            m.swap(c * n + k, p * n + k);
        }
        let piv = m[c * n + c];
        assert!(piv != 0.0, "singular");
        s += piv.abs().ln();
        for r in c + 1..n {
            let f = m[r * n + c] / piv;
            for k in c..n {
                m[r * n + k] -= f * m[c * n + k];
            }
        }
    }
    s
}

/// Wrapped difference of two angles in degrees, in [0, 180].
fn angle_gap_deg(a: f64, b: f64) -> f64 {
    let d = (a - b).rem_euclid(360.0);
    d.min(360.0 - d)
}

#[test]
fn conect_parser_reads_the_alanine_file() {
    let bonds = bonds_from_pdb_conect(PDB).unwrap();
    // The file's 14 CONECT lines name 12 distinct bonds (ACE, NME and the two peptide
    // links); bonds inside the standard ALA residue are not listed.
    assert_eq!(bonds, CONECT_BONDS.to_vec());
    // The CONECT graph alone leaves ALA's amide H (atom 7) without bonds.
    assert_eq!(
        ZMatrix::from_bonds(22, &bonds).unwrap_err(),
        InternalError::NoBonds { atom: 7 }
    );
}

#[test]
fn covalent_radii_recover_conect_plus_the_residue_topology() {
    let elements = pdb_elements(PDB).unwrap();
    assert_eq!(elements.len(), 22);
    assert_eq!(elements.iter().filter(|e| *e == "H").count(), 12);
    for x in [pdb_coordinates(), c7eq()] {
        let perceived = bonds_from_covalent_radii(&elements, &x, 0.4).unwrap();
        assert_eq!(perceived, alanine_bonds());
    }
    // 21 bonds for 22 atoms: a tree, so no ring closures.
    assert_eq!(alanine_bonds().len(), 21);
    assert!(alanine().ring_closures().is_empty());
}

#[test]
fn conect_parser_refuses_malformed_lines_naming_them() {
    let bad = PDB.replace("CONECT    6    5", "CONECT    6   x5");
    let err = bonds_from_pdb_conect(&bad).unwrap_err();
    let msg = err.to_string();
    assert!(matches!(err, InternalError::Pdb { line: 30, .. }), "{msg}");
    assert!(msg.contains("line 30") && msg.contains("x5"), "{msg}");
    let unknown = PDB.replace("CONECT    7    5", "CONECT    7   99");
    let msg = bonds_from_pdb_conect(&unknown).unwrap_err().to_string();
    assert!(
        msg.contains("line 31") && msg.contains("serial 99"),
        "{msg}"
    );
}

#[test]
fn disconnected_and_bondless_graphs_are_refused_naming_the_atom() {
    let err = ZMatrix::from_bonds(5, &[(0, 1), (1, 2), (3, 4)]).unwrap_err();
    assert_eq!(
        err,
        InternalError::Disconnected {
            atom: 3,
            reference: 0
        }
    );
    assert!(err.to_string().contains("atom 3"), "{err}");
    let err = ZMatrix::from_bonds(4, &[(0, 1), (1, 2)]).unwrap_err();
    assert_eq!(err, InternalError::NoBonds { atom: 3 });
    assert!(matches!(
        ZMatrix::from_bonds(3, &[(0, 1), (1, 5)]),
        Err(InternalError::AtomOutOfRange { atom: 5, .. })
    ));
    assert!(matches!(
        ZMatrix::from_bonds(2, &[(0, 1)]),
        Err(InternalError::TooFewAtoms { n_atoms: 2 })
    ));
}

#[test]
fn layout_marks_torsions_as_circular() {
    let z = alanine();
    assert_eq!(z.n_internal(), 60);
    let kinds: Vec<_> = (0..60).map(|i| z.kind(i).unwrap()).collect();
    assert!(kinds[..21].iter().all(|k| *k == CoordinateKind::Bond));
    assert!(kinds[21..41].iter().all(|k| *k == CoordinateKind::Angle));
    assert!(kinds[41..].iter().all(|k| *k == CoordinateKind::Torsion));
    assert_eq!(z.circular_mask().iter().filter(|&&c| c).count(), 19);
    assert!(z.kind(60).is_none());
    // The root is CA (atom 8), the graph's centre.
    assert_eq!(z.root(), 8);
}

#[test]
fn round_trip_on_alanine_in_the_canonical_frame() {
    let z = alanine();
    let o = z.order();
    let x = align(&c7eq(), o[0], o[1], o[2]);
    let mut q = vec![0.0; 60];
    let fwd = z.to_internal(&x, &mut q).unwrap();
    let mut x2 = vec![0.0; 66];
    let ld = z.to_cartesian(&q, &mut x2).unwrap();
    let err = max_abs_diff(&x, &x2);
    println!("canonical round trip: max |dx| = {err:.2e} Å");
    assert!(err < 1e-6, "{err}");
    assert!((fwd.log_det + ld).abs() < 1e-12);
    // Bonds positive, angles in (0, pi), torsions in (-pi, pi].
    let pi = std::f64::consts::PI;
    for (i, v) in q.iter().enumerate() {
        let ok = match z.kind(i).unwrap() {
            CoordinateKind::Bond => *v > 0.9 && *v < 1.6,
            CoordinateKind::Angle => *v > 0.0 && *v < pi,
            CoordinateKind::Torsion => *v > -pi && *v <= pi,
        };
        assert!(ok, "coordinate {i} = {v}");
    }
}

#[test]
fn round_trip_with_rigid_body_coordinates() {
    let z = alanine();
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    for _ in 0..5 {
        let x = random_motion(&c7eq(), &mut rng);
        let mut q = vec![0.0; 60];
        let out = z.to_internal(&x, &mut q).unwrap();
        assert_eq!(out.rigid.translation, atom(&x, z.root()));
        let mut x2 = vec![0.0; 66];
        z.to_cartesian_in(&q, &out.rigid, &mut x2).unwrap();
        let err = max_abs_diff(&x, &x2);
        assert!(err < 1e-9, "{err}");
    }
}

#[test]
fn pairwise_distances_survive_a_random_rigid_motion() {
    let z = alanine();
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let x0 = c7eq();
    let x = random_motion(&x0, &mut rng);
    let mut q = vec![0.0; 60];
    z.to_internal(&x, &mut q).unwrap();
    let mut y = vec![0.0; 66];
    z.to_cartesian(&q, &mut y).unwrap();
    let mut worst = 0.0f64;
    for a in 0..22 {
        for b in a + 1..22 {
            let d0 = dot(
                sub(atom(&x0, a), atom(&x0, b)),
                sub(atom(&x0, a), atom(&x0, b)),
            );
            let d1 = dot(sub(atom(&y, a), atom(&y, b)), sub(atom(&y, a), atom(&y, b)));
            worst = worst.max((d0.sqrt() - d1.sqrt()).abs());
        }
    }
    println!("max pairwise distance change: {worst:.2e} Å");
    assert!(worst < 1e-9, "{worst}");
    // The output is in the canonical frame.
    let o = z.order();
    assert_eq!(atom(&y, o[0]), [0.0; 3]);
    assert!(y[3 * o[1]] == 0.0 && y[3 * o[1] + 1] == 0.0 && y[3 * o[1] + 2] > 0.0);
    assert!(y[3 * o[2] + 1] == 0.0 && y[3 * o[2]] > 0.0);
}

#[test]
fn torsions_match_tarn_physics_dihedrals_including_phi_and_psi() {
    let z = alanine();
    let x = c7eq();
    let mut q = vec![0.0; 60];
    z.to_internal(&x, &mut q).unwrap();
    let (mut phi, mut psi) = (None, None);
    for (idx, &t) in q.iter().enumerate() {
        if !z.is_circular(idx) {
            continue;
        }
        let at: [usize; 4] = z.atoms_of(idx).unwrap().try_into().unwrap();
        let reference = dihedral_degrees(&x, at);
        let gap = angle_gap_deg(t.to_degrees(), reference);
        assert!(gap < 1e-9, "torsion {at:?}: {t} vs {reference}");
        // The dihedral is the same read in either direction.
        let rev = [at[3], at[2], at[1], at[0]];
        if at == [4, 6, 8, 14] || rev == [4, 6, 8, 14] {
            phi = Some(reference);
        }
        if at == [6, 8, 14, 16] || rev == [6, 8, 14, 16] {
            psi = Some(reference);
        }
    }
    let (phi, psi) = (
        phi.expect("phi is a torsion"),
        psi.expect("psi is a torsion"),
    );
    println!("C7eq start: phi = {phi:.2}°, psi = {psi:.2}°");
    // The C7eq basin: phi near -80°, psi near +70° (a broad box, not a tight value).
    assert!((-120.0..-40.0).contains(&phi) && (20.0..120.0).contains(&psi));
}

#[test]
fn torsion_sign_on_an_exactly_built_geometry() {
    // Chain 0-1-2-3 (root is a centre: 1), atoms i = (1,0,0), j = 0, k = (0,0,1),
    // l = (cos t, sin t, 1): the dihedral (0,1,2,3) is t by construction (IUPAC sign).
    let z = ZMatrix::from_bonds(4, &[(0, 1), (1, 2), (2, 3)]).unwrap();
    let idx = (0..6).find(|&i| z.is_circular(i)).unwrap();
    assert_eq!(idx, 5);
    let at = z.atoms_of(idx).unwrap();
    for t_deg in [-150.0f64, -90.0, -30.0, 0.0, 60.0, 120.0, 179.0] {
        let t = t_deg.to_radians();
        let x = [
            1.0,
            0.0,
            0.0,
            0.0,
            0.0,
            0.0,
            0.0,
            0.0,
            1.0,
            t.cos(),
            t.sin(),
            1.0,
        ];
        let mut q = vec![0.0; 6];
        z.to_internal(&x, &mut q).unwrap();
        // The Z-matrix's quadruple is (0,1,2,3) or its reverse, both equal to t.
        assert!(at == [3, 2, 1, 0] || at == [0, 1, 2, 3], "{at:?}");
        assert!((q[idx] - t).abs() < 1e-12, "{t_deg}: {}", q[idx]);
        assert!(q[..3].iter().all(|r| (r - 1.0).abs() < 1e-12), "{q:?}");
    }
}

/// The free Cartesian coordinates of the canonical frame: z of order[1], x and z of
/// order[2], all of the others.
fn free_coordinates(z: &ZMatrix, x: &[f64]) -> Vec<f64> {
    let o = z.order();
    let mut v = vec![x[3 * o[1] + 2], x[3 * o[2]], x[3 * o[2] + 2]];
    for &a in &o[3..] {
        v.extend_from_slice(&x[3 * a..3 * a + 3]);
    }
    v
}

fn alanine_q() -> Vec<f64> {
    let z = alanine();
    let mut q = vec![0.0; 60];
    z.to_internal(&c7eq(), &mut q).unwrap();
    q
}

#[test]
fn log_det_matches_a_finite_difference_jacobian() {
    let z = alanine();
    let q = alanine_q();
    let n = 60;
    let h = 1e-6;
    let mut jac = vec![0.0; n * n];
    let mut x = vec![0.0; 66];
    for c in 0..n {
        let mut qp = q.clone();
        qp[c] += h;
        z.to_cartesian(&qp, &mut x).unwrap();
        let fp = free_coordinates(&z, &x);
        qp[c] -= 2.0 * h;
        z.to_cartesian(&qp, &mut x).unwrap();
        let fm = free_coordinates(&z, &x);
        for r in 0..n {
            jac[r * n + c] = (fp[r] - fm[r]) / (2.0 * h);
        }
    }
    let fd = log_abs_det(jac, n);
    let ld = z.to_cartesian(&q, &mut x).unwrap();
    println!("canonical log|det J|: analytic {ld:.10}, finite differences {fd:.10}");
    assert!((fd - ld).abs() < 1e-6, "{ld} vs {fd}");
}

#[test]
fn full_jacobian_with_rigid_body_coordinates_adds_the_orientation_factor() {
    // (t, alpha, beta, gamma, q) -> x is square (66 x 66); its |det| should be
    // sin(beta) * exp(log_det + orientation_log_jacobian).
    let z = alanine();
    let q = alanine_q();
    let ext = [0.3, -1.2, 2.0, 0.7, 1.1, -2.4];
    let mut p: Vec<f64> = ext.to_vec();
    p.extend_from_slice(&q);
    let eval = |p: &[f64]| {
        let rb = RigidBody::from_array(p[..6].try_into().unwrap());
        let mut x = vec![0.0; 66];
        z.to_cartesian_in(&p[6..], &rb, &mut x).unwrap();
        x
    };
    let n = 66;
    let h = 1e-6;
    let mut jac = vec![0.0; n * n];
    for c in 0..n {
        let mut pp = p.clone();
        pp[c] += h;
        let fp = eval(&pp);
        pp[c] -= 2.0 * h;
        let fm = eval(&pp);
        for r in 0..n {
            jac[r * n + c] = (fp[r] - fm[r]) / (2.0 * h);
        }
    }
    let fd = log_abs_det(jac, n);
    let mut x = vec![0.0; 66];
    let ld = z.to_cartesian(&q, &mut x).unwrap();
    let want = ext[4].sin().ln() + ld + z.orientation_log_jacobian(&q);
    println!("full log|det|: predicted {want:.10}, finite differences {fd:.10}");
    assert!((fd - want).abs() < 1e-6, "{want} vs {fd}");
}

#[test]
fn vjp_matches_finite_differences() {
    let z = alanine();
    let q = alanine_q();
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let g_x: Vec<f64> = (0..66).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let g_ld = 0.7;
    let rb = RigidBody::from_array([0.5, 0.1, -0.2, 2.1, 0.4, -1.0]);
    for moved in [false, true] {
        let loss = |q: &[f64]| {
            let mut x = vec![0.0; 66];
            let ld = if moved {
                z.to_cartesian_in(q, &rb, &mut x).unwrap()
            } else {
                z.to_cartesian(q, &mut x).unwrap()
            };
            dot_slices(&g_x, &x) + g_ld * ld
        };
        let mut g_q = vec![0.0; 60];
        if moved {
            z.to_cartesian_vjp_in(&q, &rb, &g_x, g_ld, &mut g_q)
                .unwrap();
        } else {
            z.to_cartesian_vjp(&q, &g_x, g_ld, &mut g_q).unwrap();
        }
        let h = 1e-6;
        let mut worst = 0.0f64;
        for c in 0..60 {
            let mut qp = q.clone();
            qp[c] += h;
            let lp = loss(&qp);
            qp[c] -= 2.0 * h;
            let fd = (lp - loss(&qp)) / (2.0 * h);
            let err = (fd - g_q[c]).abs() / (1.0 + fd.abs());
            worst = worst.max(err);
        }
        println!("vjp (moved = {moved}): max relative error {worst:.2e}");
        assert!(worst < 1e-7, "{worst}");
    }
    // The orientation factor's gradient.
    let mut g = vec![0.0; 60];
    z.orientation_log_jacobian_vjp(&q, 1.0, &mut g);
    for c in 0..60 {
        let (mut qp, mut qm) = (q.clone(), q.clone());
        qp[c] += 1e-6;
        qm[c] -= 1e-6;
        let fd = (z.orientation_log_jacobian(&qp) - z.orientation_log_jacobian(&qm)) / 2e-6;
        assert!((fd - g[c]).abs() < 1e-6, "{c}: {fd} vs {}", g[c]);
    }
}

fn dot_slices(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

#[test]
fn batched_versions_agree_with_single_rows_in_f64_and_f32() {
    let z = alanine();
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    let rows = 3;
    let xs: Vec<f64> = (0..rows)
        .flat_map(|_| random_motion(&c7eq(), &mut rng))
        .collect();
    let (mut q, mut ld, mut rb) = (vec![0.0; rows * 60], vec![0.0; rows], vec![0.0; rows * 6]);
    z.to_internal_batch(&xs, &mut q, &mut ld, Some(&mut rb))
        .unwrap();
    for r in 0..rows {
        let mut q1 = vec![0.0; 60];
        let out = z.to_internal(&xs[r * 66..(r + 1) * 66], &mut q1).unwrap();
        assert_eq!(&q[r * 60..(r + 1) * 60], &q1[..]);
        assert_eq!(ld[r], out.log_det);
        assert_eq!(&rb[r * 6..(r + 1) * 6], &out.rigid.to_array());
    }
    let mut x = vec![0.0; rows * 66];
    let mut ld2 = vec![0.0; rows];
    z.to_cartesian_batch(&q, &mut x, &mut ld2).unwrap();
    assert!(ld.iter().zip(&ld2).all(|(a, b)| (a + b).abs() < 1e-12));
    let g_x = vec![0.25; rows * 66];
    let mut g_q = vec![0.0; rows * 60];
    z.to_cartesian_vjp_batch(&q, &g_x, &[1.0; 3], &mut g_q)
        .unwrap();
    let mut g1 = vec![0.0; 60];
    z.to_cartesian_vjp(&q[60..120], &g_x[66..132], 1.0, &mut g1)
        .unwrap();
    assert_eq!(&g_q[60..120], &g1[..]);
    // f32: the same maps, rounded at the interface only.
    let q32: Vec<f32> = q.iter().map(|&v| v as f32).collect();
    let mut x32 = vec![0.0f32; rows * 66];
    let mut ld32 = vec![0.0f32; rows];
    z.to_cartesian_batch(&q32, &mut x32, &mut ld32).unwrap();
    let err = x32
        .iter()
        .zip(&x)
        .map(|(a, b)| (*a as f64 - b).abs())
        .fold(0.0, f64::max);
    assert!(err < 1e-4, "{err}");
    assert!(matches!(
        z.to_cartesian_batch(&q32[..59], &mut x32, &mut ld32),
        Err(InternalError::Shape { .. })
    ));
}

#[test]
fn a_ring_is_parametrised_by_its_spanning_tree() {
    // Cyclohexane-like carbon ring (chair, 1.53 Å bonds) with one substituent: the
    // ring-closing bond is listed, and the round trip and its length are exact.
    let mut x = Vec::new();
    for i in 0..6 {
        let a = i as f64 * std::f64::consts::PI / 3.0;
        let zc = if i % 2 == 0 { 0.25 } else { -0.25 };
        x.extend_from_slice(&[1.45 * a.cos(), 1.45 * a.sin(), zc]);
    }
    x.extend_from_slice(&[2.9, 0.1, 0.9]);
    let bonds = [(0, 1), (1, 2), (2, 3), (3, 4), (4, 5), (5, 0), (0, 6)];
    let z = ZMatrix::from_bonds(7, &bonds).unwrap();
    assert_eq!(z.ring_closures().len(), 1);
    let mut q = vec![0.0; 15];
    let out = z.to_internal(&x, &mut q).unwrap();
    let mut y = vec![0.0; 21];
    z.to_cartesian_in(&q, &out.rigid, &mut y).unwrap();
    assert!(max_abs_diff(&x, &y) < 1e-12);
    let (a, b) = z.ring_closures()[0];
    let d = |v: &[f64]| dot(sub(atom(v, a), atom(v, b)), sub(atom(v, a), atom(v, b))).sqrt();
    assert!((d(&x) - d(&y)).abs() < 1e-12);
}

/// A random tree of `n` atoms (valence at most 4), labels shuffled.
fn random_tree(n: usize, rng: &mut ChaCha8Rng) -> Vec<(usize, usize)> {
    let mut degree = vec![0usize; n];
    let mut label: Vec<usize> = (0..n).collect();
    for i in (1..n).rev() {
        label.swap(i, rng.gen_range(0..=i));
    }
    let mut bonds = Vec::new();
    for a in 1..n {
        let b = loop {
            let b = rng.gen_range(0..a);
            if degree[b] < 4 {
                break b;
            }
        };
        degree[a] += 1;
        degree[b] += 1;
        bonds.push((label[a], label[b]));
    }
    bonds
}

#[test]
fn random_trees_round_trip_internal_coordinates_and_their_vjp() {
    // Every reference rule (sibling, parent of k, the root's other child) occurs on
    // random trees; internal -> Cartesian -> internal must return q, and the VJP must
    // match central differences.
    let mut rng = ChaCha8Rng::seed_from_u64(21);
    let pi = std::f64::consts::PI;
    for case in 0..30 {
        let n = rng.gen_range(3..14);
        let z = ZMatrix::from_bonds(n, &random_tree(n, &mut rng)).unwrap();
        let m = z.n_internal();
        let q: Vec<f64> = (0..m)
            .map(|i| match z.kind(i).unwrap() {
                CoordinateKind::Bond => rng.gen_range(0.9..1.6),
                CoordinateKind::Angle => rng.gen_range(0.5..2.6),
                CoordinateKind::Torsion => rng.gen_range(-pi..pi),
            })
            .collect();
        let mut x = vec![0.0; 3 * n];
        let ld = z.to_cartesian(&q, &mut x).unwrap();
        let mut q2 = vec![0.0; m];
        let back = z.to_internal(&x, &mut q2).unwrap();
        assert!(
            max_abs_diff(&q, &q2) < 1e-10,
            "case {case}: {q:?} vs {q2:?}"
        );
        assert!((ld + back.log_det).abs() < 1e-12);
        let g_x: Vec<f64> = (0..3 * n).map(|_| rng.gen_range(-1.0..1.0)).collect();
        let mut g_q = vec![0.0; m];
        z.to_cartesian_vjp(&q, &g_x, -0.3, &mut g_q).unwrap();
        let loss = |q: &[f64]| {
            let mut x = vec![0.0; 3 * n];
            let ld = z.to_cartesian(q, &mut x).unwrap();
            dot_slices(&g_x, &x) - 0.3 * ld
        };
        for c in 0..m {
            let (mut qp, mut qm) = (q.clone(), q.clone());
            qp[c] += 1e-6;
            qm[c] -= 1e-6;
            let fd = (loss(&qp) - loss(&qm)) / 2e-6;
            assert!(
                (fd - g_q[c]).abs() < 1e-6 * (1.0 + fd.abs()),
                "case {case}, coordinate {c}: {fd} vs {}",
                g_q[c]
            );
        }
    }
}
