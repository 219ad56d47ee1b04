//! The external energy model through real pipes: a Python program (numpy only) that
//! reimplements Müller–Brown must agree with the built-in model, and a program that
//! dies, answers the wrong size or writes garbage must give clear errors.
//!
//! Needs `python3` with numpy on PATH (the garbage/death tests need only python3).

use std::process::{Child, ChildStdin, ChildStdout, Command, Stdio};

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tarn_physics::external::ExternalClient;
use tarn_physics::models::MullerBrown;
use tarn_physics::quench::{quench_batch, FireParams};
use tarn_physics::EnergyModel;

type Client = ExternalClient<ChildStdout, ChildStdin>;

fn spawn(args: &[&str]) -> (Child, Client) {
    let mut child = Command::new("python3")
        .args(args)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::inherit())
        .spawn()
        .expect("python3 must be on PATH for the external-model tests");
    let out = child.stdout.take().unwrap();
    let inp = child.stdin.take().unwrap();
    (child, ExternalClient::new(out, inp, 2))
}

fn example_path() -> String {
    format!(
        "{}/../../examples/external-energy/muller_brown_server.py",
        env!("CARGO_MANIFEST_DIR")
    )
}

fn finish(child: &mut Child, client: Client) -> std::process::ExitStatus {
    let (out, inp) = client.into_inner();
    drop(inp);
    drop(out);
    child.wait().unwrap()
}

fn random_points(n: usize, seed: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..n)
        .flat_map(|_| [rng.gen_range(-1.5..1.2), rng.gen_range(-0.4..2.0)])
        .collect()
}

#[test]
fn python_muller_brown_matches_the_built_in_model() {
    let (mut child, client) = spawn(&[&example_path()]);
    let x = random_points(1000, 1);
    let (mut e1, mut f1) = (vec![0.0; 1000], vec![0.0; 2000]);
    let (mut e2, mut f2) = (vec![0.0; 1000], vec![0.0; 2000]);
    client.evaluate(&x, &mut e1, Some(&mut f1)).unwrap();
    MullerBrown.evaluate(&x, &mut e2, Some(&mut f2)).unwrap();
    for i in 0..1000 {
        assert!(
            (e1[i] - e2[i]).abs() <= 1e-12 * e2[i].abs().max(1.0),
            "{} vs {}",
            e1[i],
            e2[i]
        );
    }
    for i in 0..2000 {
        assert!((f1[i] - f2[i]).abs() <= 1e-11 * f2[i].abs().max(1.0));
    }
    // Energies only, and a single configuration.
    let mut e3 = vec![0.0; 1000];
    client.evaluate(&x, &mut e3, None).unwrap();
    assert_eq!(e1, e3);
    assert!((client.energy_of(&[-0.558224, 1.441726]).unwrap() + 146.699517).abs() < 1e-5);
    // Quench works the same through the pipe (one request per lockstep step).
    let starts = random_points(16, 2);
    let a = quench_batch(&client, &starts, &FireParams::default()).unwrap();
    let b = quench_batch(&MullerBrown, &starts, &FireParams::default()).unwrap();
    for i in 0..16 {
        assert!(
            (a.energies[i] - b.energies[i]).abs() < 1e-8,
            "{} vs {}",
            a.energies[i],
            b.energies[i]
        );
    }
    // Throughput through the pipe with large batches (a figure, reported, not a gate).
    let big = random_points(100_000, 3);
    let (mut e, mut f) = (vec![0.0; 100_000], vec![0.0; 200_000]);
    let t = std::time::Instant::now();
    let reps = 10;
    for _ in 0..reps {
        client.evaluate(&big, &mut e, Some(&mut f)).unwrap();
    }
    let rate = (reps * 100_000) as f64 / t.elapsed().as_secs_f64();
    eprintln!("external Müller–Brown through the pipe: {rate:.3e} configurations/s (energy + forces, batch 1e5)");
    let status = finish(&mut child, client);
    assert!(
        status.success(),
        "the example must exit 0 when its input closes: {status}"
    );
}

#[test]
fn a_program_that_dies_gives_a_clear_error_and_the_client_stays_refused() {
    let (mut child, client) = spawn(&["-c", "import sys; sys.stdin.buffer.read(25); sys.exit(3)"]);
    let mut e = [0.0; 4];
    let err = client
        .evaluate(&[0.0; 8], &mut e, None)
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("closed its output") || err.contains("broken pipe"),
        "{err}"
    );
    let again = client
        .evaluate(&[0.0; 8], &mut e, None)
        .unwrap_err()
        .to_string();
    assert!(again.contains("earlier failure"), "{again}");
    let _ = finish(&mut child, client);
}

#[test]
fn a_program_answering_the_wrong_size_is_refused() {
    let script = "import sys, struct\n\
h = sys.stdin.buffer.read(25)\n\
n, d = struct.unpack('<QQ', h[8:24])\n\
sys.stdin.buffer.read(8 * n * d)\n\
sys.stdout.buffer.write(struct.pack('<4sIQ', b'TRNR', 0, n + 1) + b'\\0' * 8 * (n + 1))\n\
sys.stdout.buffer.flush()\n\
sys.stdin.buffer.read()\n";
    let (mut child, client) = spawn(&["-c", script]);
    let mut e = [0.0; 3];
    let err = client
        .evaluate(&[0.0; 6], &mut e, None)
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("answered 4 configurations to a request of 3"),
        "{err}"
    );
    let _ = finish(&mut child, client);
}

#[test]
fn a_program_writing_garbage_is_refused() {
    let script = "import sys\n\
sys.stdin.buffer.read(25 + 16)\n\
print('loading model... done', flush=True)\n\
sys.stdin.buffer.read()\n";
    let (mut child, client) = spawn(&["-c", script]);
    let mut e = [0.0; 1];
    let err = client
        .evaluate(&[0.0; 2], &mut e, None)
        .unwrap_err()
        .to_string();
    assert!(err.contains("magic") && err.contains("print"), "{err}");
    let _ = finish(&mut child, client);
}

#[test]
fn a_program_reporting_failure_passes_its_message_on() {
    // The example refuses a request of the wrong dimension with a failure reply.
    let mut child = Command::new("python3")
        .arg(example_path())
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn()
        .unwrap();
    let client = ExternalClient::new(child.stdout.take().unwrap(), child.stdin.take().unwrap(), 3);
    let mut e = [0.0; 1];
    let err = client
        .evaluate(&[0.0; 3], &mut e, None)
        .unwrap_err()
        .to_string();
    assert!(err.contains("Muller-Brown has dim 2"), "{err}");
    let (o, i) = client.into_inner();
    drop(i);
    drop(o);
    let _ = child.wait();
}
