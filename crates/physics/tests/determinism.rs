//! Results must not depend on the thread count: batches are split into fixed chunks and
//! each configuration is computed by one thread in a fixed order.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tarn_physics::quench::{quench_batch, FireParams};
use tarn_physics::SystemSpec;

fn in_pool<T: Send>(threads: usize, f: impl FnOnce() -> T + Send) -> T {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap()
        .install(f)
}

#[test]
fn energies_forces_and_quenches_are_identical_on_one_and_two_threads() {
    let mut rng = ChaCha8Rng::seed_from_u64(8);
    for text in [
        "model = \"lennard-jones\"\nparticles = 13\ndims = 3",
        "model = \"phi4\"\nsize = 8\nm2 = -4.0\nlambda = 3.0",
        "model = \"muller-brown\"",
    ] {
        let spec: SystemSpec = toml::from_str(text).unwrap();
        let model = spec.build().unwrap();
        let start = spec.default_start().unwrap();
        let n = 300; // several chunks of 64
        let x: Vec<f64> = (0..n)
            .flat_map(|_| {
                start
                    .iter()
                    .map(|v| v + rng.gen_range(-0.05..0.05))
                    .collect::<Vec<_>>()
            })
            .collect();
        let run = |threads| {
            in_pool(threads, || {
                let mut e = vec![0.0; n];
                let mut f = vec![0.0; x.len()];
                model.evaluate(&x, &mut e, Some(&mut f)).unwrap();
                let q = quench_batch(
                    model.as_ref(),
                    &x[..20 * spec.dim()],
                    &FireParams::default(),
                )
                .unwrap();
                (e, f, q)
            })
        };
        let (e1, f1, q1) = run(1);
        let (e2, f2, q2) = run(2);
        assert!(
            e1.iter().zip(&e2).all(|(a, b)| a.to_bits() == b.to_bits()),
            "{text}"
        );
        assert!(
            f1.iter().zip(&f2).all(|(a, b)| a.to_bits() == b.to_bits()),
            "{text}"
        );
        assert_eq!(q1, q2, "{text}");
    }
}
