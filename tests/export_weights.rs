//! `tarn export` keeps what reweighting needs with every sample: the temperature factor
//! its stage sampled at and, for explorers that hand back log importance weights (here
//! well-tempered metadynamics), those weights, in `samples.csv` and `log_weights.npy`.

mod common;

use common::Env;

const CAMPAIGN: &str = r#"
name = "weights-out"
seed = 3
kT = 1.0

[system]
model = "double-well"

[start]
points = [[-0.987, 0.0]]

[[explore]]
name = "biased"
kind = "metadynamics"
walkers = 1
[explore.params]
n_steps = 3000
dt = 0.01
save_stride = 100
temperature_factor = 1.5
cvs = [{ cv = "coordinate", index = 0 }]
hill_height = 0.2
hill_widths = [0.1]
pace = 20
bias_factor = 5.0
grid = [{ min = -2.5, max = 2.5, bins = 100 }]

[[explore]]
name = "plain"
kind = "metropolis"
walkers = 1
[explore.params]
n_steps = 1000
step_size = 0.2
save_stride = 100

[dedup]
kind = "quench"

[stop]
max_rounds = 1
"#;

/// Reads a little-endian f64 `.npy` vector (the layout tarn writes: version 1.0 header).
fn read_npy_vector(bytes: &[u8]) -> Vec<f64> {
    assert_eq!(&bytes[..6], b"\x93NUMPY");
    let hlen = u16::from_le_bytes([bytes[8], bytes[9]]) as usize;
    bytes[10 + hlen..]
        .chunks_exact(8)
        .map(|c| f64::from_le_bytes(c.try_into().unwrap()))
        .collect()
}

#[test]
fn export_carries_temperature_factors_and_log_weights() {
    let env = Env::new();
    let file = env.write("c.toml", CAMPAIGN);
    env.tarn(&["run", file.to_str().unwrap(), "--quiet"])
        .code(0);
    let out = env.path().join("out");
    env.tarn(&["export", "weights-out", "--out", out.to_str().unwrap()])
        .code(0);
    let csv = std::fs::read_to_string(out.join("samples.csv")).unwrap();
    let mut lines = csv.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let col = |name: &str| header.iter().position(|h| *h == name).unwrap();
    let (c_stage, c_tau, c_lw) = (col("stage"), col("temperature_factor"), col("log_weight"));
    let npy = read_npy_vector(&std::fs::read(out.join("log_weights.npy")).unwrap());
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    assert_eq!(rows.len(), npy.len());
    let (mut biased, mut plain) = (0, 0);
    for (r, w) in rows.iter().zip(&npy) {
        match r[c_stage] {
            "biased" => {
                biased += 1;
                assert_eq!(r[c_tau], "1.5");
                let v: f64 = r[c_lw].parse().unwrap();
                assert!(v.is_finite() && v == *w, "{v} vs {w}");
            }
            "plain" => {
                plain += 1;
                assert_eq!(r[c_tau], "1");
                assert_eq!(r[c_lw], "");
                assert!(w.is_nan());
            }
            other => panic!("unexpected stage {other}"),
        }
    }
    assert_eq!((biased, plain), (30, 10));
}
