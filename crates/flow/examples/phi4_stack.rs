//! Experiment: a checkerboard layer stack trained by reverse KL on 8×8 lattice φ⁴.
use tarn_flow::stack::{
    sample::generate, train::train, LayerKind, LayerSpec, StackFlow, StackSpec, TransformKind,
};
use tarn_flow::{Activation, TrainParams};
use tarn_physics::models::Phi4;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let epochs: usize = args.get(1).map_or(20, |s| s.parse().unwrap());
    let steps: usize = args.get(5).map_or(100, |s| s.parse().unwrap());
    let repeat: usize = args.get(2).map_or(8, |s| s.parse().unwrap());
    let ch: usize = args.get(3).map_or(16, |s| s.parse().unwrap());
    let lr: f64 = args.get(4).map_or(1e-3, |s| s.parse().unwrap());
    let model = Phi4::new(8, -4.0, 8.0).unwrap();
    let spec = StackSpec {
        data_dim: 64,
        lattice_side: 8,
        layers: vec![LayerSpec {
            kind: LayerKind::Checkerboard,
            transform: if std::env::var("SPLINE").is_ok() {
                TransformKind::Spline
            } else {
                TransformKind::Affine
            },
            repeat,
            hidden: Some(vec![ch, ch]),
            kernel: 3,
            activation: Activation::Tanh,
            clamp: 3.0,
            bins: 8,
            bound: 3.0,
        }],
        permutation_seed: 0,
    };
    let mut flow = StackFlow::<f32>::new(spec, 1).unwrap();
    let p = TrainParams {
        w_ml: 0.0,
        w_kl: 1.0,
        steps_per_epoch: steps,
        max_epochs: 1,
        learning_rate: lr,
        learning_rate_final: std::env::var("LR_FINAL").ok().map(|v| v.parse().unwrap()),
        kl_batch_size: std::env::var("BATCH")
            .ok()
            .map_or(256, |v| v.parse().unwrap()),
        threads: 2,
        held_out_fraction: 0.0,
        ..Default::default()
    };
    let t0 = std::time::Instant::now();
    let p = TrainParams {
        max_epochs: epochs,
        ..p
    };
    let r = train(&mut flow, &[], None, Some(&model), &p, 7).unwrap();
    for (i, k) in r.kl_loss.iter().enumerate() {
        if i % 5 == 4 || i + 1 == r.kl_loss.len() {
            println!("epoch {i} kl {k:.4}");
        }
    }
    let g = generate(&flow, &model, 8192, 1.0, 1.0, 2, 1000).unwrap();
    let lw = &g.log_weight;
    let m = lw.iter().cloned().fold(f64::MIN, f64::max);
    let s1: f64 = lw.iter().map(|v| (v - m).exp()).sum();
    let s2: f64 = lw.iter().map(|v| (2.0 * (v - m)).exp()).sum();
    let f64flow = flow.to_precision::<f64>();
    let g64 = generate(&f64flow, &model, 8, 1.0, 1.0, 1, 1000).unwrap();
    println!(
        "log q f32 {:?}\nlog q f64 {:?}",
        &g.log_q[..4],
        &g64.log_q[..4]
    );
    let mean_uq: f64 = g
        .reduced_energy
        .iter()
        .zip(&g.log_q)
        .map(|(u, q)| u + q)
        .sum::<f64>()
        / lw.len() as f64;
    println!(
        "E_q[u + log q] = {mean_uq:.4} (train loss - 90.81 = {:.4})",
        r.kl_loss.last().unwrap() - 32.0 * (1.0 + (2.0 * std::f64::consts::PI).ln())
    );
    println!(
        "ess {:.4} train {:.1}s",
        s1 * s1 / s2 / lw.len() as f64,
        t0.elapsed().as_secs_f64()
    );
}
