//! Hand-derived backward passes checked against central finite differences in f64
//! (relative error below 1e-4, the criterion of issue 4): the maximum-likelihood loss
//! with respect to parameters and data, and the reverse-KL loss with respect to
//! parameters and latent inputs, through whitening, the centre-of-mass frame and the
//! energy regularisation.

mod common;
use common::*;
use tarn_flow::{
    regularise_energy, Activation, Flow, FlowSpec, FrameSpec, KlTerm, Threading, Workspace,
};
use tarn_physics::EnergyModel;

/// Relative error per component with a floor of 1e-3 of the largest component, so that
/// components that are zero up to round-off do not divide by zero.
fn assert_close(what: &str, analytic: &[f64], numeric: &[f64]) {
    let big = analytic
        .iter()
        .chain(numeric)
        .fold(0.0f64, |m, v| m.max(v.abs()));
    assert!(
        big > 1e-6,
        "{what}: gradient is identically zero, the check would be empty"
    );
    let mut worst = 0.0f64;
    for (i, (a, n)) in analytic.iter().zip(numeric).enumerate() {
        let rel = (a - n).abs() / a.abs().max(n.abs()).max(1e-3 * big);
        assert!(
            rel < 1e-4,
            "{what}[{i}]: analytic {a} numeric {n} (rel {rel:e})"
        );
        worst = worst.max(rel);
    }
    eprintln!(
        "{what}: {} components, worst relative error {worst:e}",
        analytic.len()
    );
}

fn central_diff(n: usize, h: f64, mut f: impl FnMut(usize, f64) -> f64) -> Vec<f64> {
    (0..n).map(|i| (f(i, h) - f(i, -h)) / (2.0 * h)).collect()
}

fn small_spec(dim: usize, act: Activation) -> FlowSpec {
    let mut s = FlowSpec::new(dim);
    s.n_layers = 3;
    s.hidden_width = 6;
    s.activation = act;
    s.clamp = 1.5;
    s.permutation_seed = 7;
    s
}

fn cases() -> Vec<(FlowSpec, Option<Vec<f64>>)> {
    let mut out = vec![
        (small_spec(2, Activation::Silu), None),
        (small_spec(5, Activation::Tanh), None),
    ];
    let mut w = small_spec(4, Activation::Silu);
    w.whiten = true;
    w.hidden_layers = 1;
    let data: Vec<f64> = normals(50, 4, 8)
        .chunks_exact(4)
        .flat_map(|r| vec![r[0] + 1.0, 2.0 * r[1] + r[0], 0.5 * r[2], r[3] - r[2]])
        .collect();
    out.push((w, Some(data)));
    let mut c = small_spec(6, Activation::Silu);
    c.frame = FrameSpec::CentreOfMass {
        n_particles: 3,
        spatial_dim: 2,
    };
    c.hidden_layers = 3;
    out.push((c, None));
    out
}

#[test]
fn nll_gradients_match_finite_differences() {
    for (spec, data) in cases() {
        let mut flow: Flow<f64> = random_flow(spec.clone(), data.as_deref(), 31, 0.4);
        let dx = flow.data_dim();
        let n = 7;
        let x: Vec<f64> = normals(n, dx, 32).iter().map(|v| 1.3 * v).collect();
        let mut ws = Workspace::new(&flow, 4, 2, Threading::Batch).unwrap(); // 2 blocks, 2 chunks
        let mut g = vec![0.0; flow.n_params()];
        let mut gx = vec![0.0; n * dx];
        ws.nll_grad(&flow, &x, &mut g, Some(&mut gx)).unwrap();
        let np = flow.n_params();
        let num = central_diff(np, 1e-5, |i, h| {
            flow.params_mut()[i] += h;
            let mut gg = vec![0.0; np];
            let v = ws.nll_grad(&flow, &x, &mut gg, None).unwrap();
            flow.params_mut()[i] -= h;
            v
        });
        assert_close(&format!("d NLL / d params ({:?})", spec.frame), &g, &num);
        let numx = central_diff(n * dx, 1e-5, |i, h| {
            let mut xp = x.clone();
            xp[i] += h;
            let mut gg = vec![0.0; np];
            ws.nll_grad(&flow, &xp, &mut gg, None).unwrap()
        });
        assert_close("d NLL / d x", &gx, &numx);
    }
}

/// The reverse-KL loss the workspace differentiates, recomputed from its definition:
/// mean over rows of rho(beta E(f(z))) - log|det df/dz|.
fn kl_loss(
    ws: &mut Workspace<f64>,
    flow: &Flow<f64>,
    z: &[f64],
    energy: &dyn EnergyModel,
    term: &KlTerm,
) -> f64 {
    let n = z.len() / flow.dim();
    let (mut x, mut ld, mut e) = (vec![0.0; n * flow.data_dim()], vec![0.0; n], vec![0.0; n]);
    ws.generate(flow, z, &mut x, &mut ld).unwrap();
    energy.evaluate(&x, &mut e, None).unwrap();
    (0..n)
        .map(|i| regularise_energy(term.beta * e[i], term.cutoff).0 - ld[i])
        .sum::<f64>()
        / n as f64
}

#[test]
fn reverse_kl_gradients_match_finite_differences() {
    let well = DoubleWell::standard();
    let gauss5 = Gaussian {
        dim: 5,
        k: 2.0,
        centre: 0.3,
    };
    let gauss4 = Gaussian {
        dim: 4,
        k: 0.7,
        centre: -0.2,
    };
    let cluster = HarmonicCluster { n: 3, d: 2, k: 1.3 };
    let energies: [&dyn EnergyModel; 4] = [&well, &gauss5, &gauss4, &cluster];
    for ((spec, data), energy) in cases().into_iter().zip(energies) {
        let mut flow: Flow<f64> = random_flow(spec.clone(), data.as_deref(), 41, 0.4);
        let d = flow.dim();
        let n = 6;
        let z = normals(n, d, 42);
        let mut ws = Workspace::new(&flow, 8, 2, Threading::Batch).unwrap();
        // The cutoff sits inside the sampled energy range so both branches of rho occur.
        for cutoff in [1e9, 1.0] {
            let term = KlTerm {
                beta: 0.8,
                temperature_factor: 1.0,
                cutoff,
            };
            let np = flow.n_params();
            let mut g = vec![0.0; np];
            let mut gz = vec![0.0; n * d];
            ws.kl_grad(&flow, &z, energy, &term, &mut g, Some(&mut gz))
                .unwrap();
            let num = central_diff(np, 1e-5, |i, h| {
                flow.params_mut()[i] += h;
                let v = kl_loss(&mut ws, &flow, &z, energy, &term);
                flow.params_mut()[i] -= h;
                v
            });
            assert_close(
                &format!("d KL / d params (cutoff {cutoff}, {:?})", spec.frame),
                &g,
                &num,
            );
            let numz = central_diff(n * d, 1e-5, |i, h| {
                let mut zp = z.clone();
                zp[i] += h;
                kl_loss(&mut ws, &flow, &zp, energy, &term)
            });
            assert_close("d KL / d z", &gz, &numz);
        }
    }
}

#[test]
fn f32_gradients_agree_with_f64() {
    let (spec, _) = cases().remove(1);
    let flow64: Flow<f64> = random_flow(spec, None, 51, 0.3);
    let flow32: Flow<f32> = flow64.to_precision();
    let x = normals(64, flow64.data_dim(), 52);
    let x32: Vec<f32> = x.iter().map(|&v| v as f32).collect();
    let mut ws64 = Workspace::new(&flow64, 64, 1, Threading::Batch).unwrap();
    let mut ws32 = Workspace::new(&flow32, 64, 2, Threading::Batch).unwrap();
    let (mut g64, mut g32) = (
        vec![0.0; flow64.n_params()],
        vec![0.0f32; flow32.n_params()],
    );
    let l64 = ws64.nll_grad(&flow64, &x, &mut g64, None).unwrap();
    let l32 = ws32.nll_grad(&flow32, &x32, &mut g32, None).unwrap();
    assert!((l64 - l32).abs() < 1e-4 * l64.abs().max(1.0));
    let norm: f64 = g64.iter().map(|v| v * v).sum::<f64>().sqrt();
    let diff: f64 = g64
        .iter()
        .zip(&g32)
        .map(|(a, &b)| (a - b as f64).powi(2))
        .sum::<f64>()
        .sqrt();
    assert!(
        diff < 1e-4 * norm,
        "f32 gradient differs from f64 by {diff} (norm {norm})"
    );
}
