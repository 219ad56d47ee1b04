//! MBAR against golden values from pymbar 4.0.3 (crates/stats/golden/pymbar_harmonic.py)
//! and against the exact harmonic result Δf_0j = ½ ln(K_j/K_0).
//!
//! The script saved the 60,000 samples it drew (numpy default_rng, seed in the JSON);
//! this test rebuilds u_kn = K_k x²/2 from them, checks the rebuild against the
//! script's checksums, reruns MBAR in Rust and compares. Status: R (recomputed with
//! pymbar 4.0.3 from a published method; exact values from Gaussian integrals).

use std::path::PathBuf;

use serde_json::Value;
use tarn_stats::{Mbar, MbarOptions};

fn golden_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("golden")
}

/// Reads a 1-D little-endian float64 `.npy` file (format version 1.0 or 2.0).
fn read_npy_f64(path: &PathBuf) -> Vec<f64> {
    let bytes = std::fs::read(path).expect("golden .npy file is committed");
    assert_eq!(&bytes[..6], b"\x93NUMPY", "not a .npy file");
    let (header_len, start) = match bytes[6] {
        1 => (u16::from_le_bytes([bytes[8], bytes[9]]) as usize, 10),
        _ => (
            u32::from_le_bytes([bytes[8], bytes[9], bytes[10], bytes[11]]) as usize,
            12,
        ),
    };
    let header = std::str::from_utf8(&bytes[start..start + header_len]).unwrap();
    assert!(header.contains("'descr': '<f8'"), "header {header}");
    assert!(header.contains("'fortran_order': False"), "header {header}");
    let data = &bytes[start + header_len..];
    data.chunks_exact(8)
        .map(|c| f64::from_le_bytes(c.try_into().unwrap()))
        .collect()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn matrix(v: &Value) -> Vec<Vec<f64>> {
    v.as_array().unwrap().iter().map(floats).collect()
}

struct Golden {
    json: Value,
    u_kn: Vec<f64>,
    n_k: Vec<usize>,
    springs: Vec<f64>,
}

fn load() -> Golden {
    let text = std::fs::read_to_string(golden_dir().join("pymbar_harmonic.json")).unwrap();
    let json: Value = serde_json::from_str(&text).unwrap();
    assert_eq!(json["pymbar_version"], "4.0.3");
    let x = read_npy_f64(&golden_dir().join(json["samples_file"].as_str().unwrap()));
    let springs = floats(&json["spring_constants"]);
    let n_k: Vec<usize> = json["n_k"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_u64().unwrap() as usize)
        .collect();
    assert_eq!(x.len(), n_k.iter().sum::<usize>());
    let u_kn: Vec<f64> = springs
        .iter()
        .flat_map(|&k| x.iter().map(move |x| 0.5 * k * x * x))
        .collect();
    // The rebuilt u_kn is the one pymbar saw (row sums and sums of squares).
    let n = x.len();
    for (k, (s, s2)) in floats(&json["u_kn_row_sums"])
        .iter()
        .zip(floats(&json["u_kn_row_sums_of_squares"]))
        .enumerate()
    {
        let row = &u_kn[k * n..(k + 1) * n];
        let sum: f64 = row.iter().sum();
        let sum2: f64 = row.iter().map(|u| u * u).sum();
        assert!((sum - s).abs() < 1e-9 * s.abs(), "row {k} sum {sum} vs {s}");
        assert!(
            (sum2 - s2).abs() < 1e-9 * s2.abs(),
            "row {k} sum of squares"
        );
    }
    Golden {
        json,
        u_kn,
        n_k,
        springs,
    }
}

#[test]
fn mbar_matches_pymbar_4_0_3_on_harmonic_states() {
    let g = load();
    let m = Mbar::solve(&g.u_kn, &g.n_k, &MbarOptions::default()).unwrap();
    let d = m.free_energy_differences();
    let ref_df = matrix(&g.json["delta_f"]);
    let ref_ddf = matrix(&g.json["d_delta_f"]);
    let k = g.n_k.len();
    let (mut worst_df, mut worst_rel) = (0.0f64, 0.0f64);
    for i in 0..k {
        for j in 0..k {
            let (df, ddf) = d.get(i, j);
            worst_df = worst_df.max((df - ref_df[i][j]).abs());
            if i != j {
                worst_rel = worst_rel.max((ddf - ref_ddf[i][j]).abs() / ref_ddf[i][j]);
            }
            assert!(
                (df - ref_df[i][j]).abs() < 1e-6,
                "Δf[{i},{j}] = {df} vs pymbar {}",
                ref_df[i][j]
            );
            if i != j {
                let rel = (ddf - ref_ddf[i][j]).abs() / ref_ddf[i][j];
                assert!(
                    rel < 1e-3,
                    "dΔf[{i},{j}] = {ddf} vs pymbar {} (rel {rel:e})",
                    ref_ddf[i][j]
                );
            } else {
                assert!(ddf.abs() < 1e-6);
            }
        }
    }
    eprintln!(
        "MBAR: Δf_01 = {:.6} ± {:.6}, Δf_02 = {:.6} ± {:.6} in {} iterations (residual {:e}); \
         max |Δf − pymbar| = {worst_df:e}, max rel |dΔf − pymbar| = {worst_rel:e}",
        d.get(0, 1).0,
        d.get(0, 1).1,
        d.get(0, 2).0,
        d.get(0, 2).1,
        m.iterations(),
        m.residual()
    );
}

#[test]
fn mbar_expectations_match_pymbar_4_0_3() {
    let g = load();
    let m = Mbar::solve(&g.u_kn, &g.n_k, &MbarOptions::default()).unwrap();
    let n = g.u_kn.len() / g.n_k.len();
    // x² = 2 u_0 / K_0 with K_0 = 1.
    let x2: Vec<f64> = g.u_kn[..n].iter().map(|u| 2.0 * u / g.springs[0]).collect();
    let e = m.expectations(&x2).unwrap();
    eprintln!("MBAR ⟨x²⟩ = {:?} ± {:?}", e.mean, e.err);
    let mu = floats(&g.json["x2_expectation_mu"]);
    let sigma = floats(&g.json["x2_expectation_sigma"]);
    for k in 0..g.n_k.len() {
        assert!(
            (e.mean[k] - mu[k]).abs() < 1e-6 * mu[k].abs().max(1.0),
            "⟨x²⟩_{k}"
        );
        let rel = (e.err[k] - sigma[k]).abs() / sigma[k];
        assert!(
            rel < 1e-3,
            "δ⟨x²⟩_{k} = {} vs pymbar {} (rel {rel:e})",
            e.err[k],
            sigma[k]
        );
        // Exact ⟨x²⟩_k = 1/K_k (Gaussian integral), within 4 standard errors.
        assert!((e.mean[k] - 1.0 / g.springs[k]).abs() < 4.0 * e.err[k]);
    }
}

#[test]
fn mbar_agrees_with_exact_harmonic_free_energies() {
    // Exact: f_k = −ln ∫ exp(−K_k x²/2) dx = ½ ln(K_k / 2π), so Δf_0j = ½ ln(K_j/K_0)
    // = 0.693147 and 1.386294 (REFERENCES.md, R). Within 3 standard errors.
    let g = load();
    let m = Mbar::solve(&g.u_kn, &g.n_k, &MbarOptions::default()).unwrap();
    let d = m.free_energy_differences();
    for j in 1..g.n_k.len() {
        let exact = 0.5 * (g.springs[j] / g.springs[0]).ln();
        let (df, err) = d.get(0, j);
        assert!(
            (df - exact).abs() < 3.0 * err,
            "Δf_0{j} = {df} ± {err} vs exact {exact}"
        );
        // The error bars are those of REFERENCES.md (0.0043 and 0.0067 at this size).
        assert!(err > 0.003 && err < 0.008, "dΔf_0{j} = {err}");
    }
}
