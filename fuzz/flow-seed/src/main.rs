//! Writes the seed weight files of the `flow_weights` fuzz target: two tiny RealNVP
//! flows (one plain in f32, one whitened with a centre-of-mass frame in f64), each
//! well under 4 KB. Run from fuzz/: `cargo run --manifest-path flow-seed/Cargo.toml`
//! (a crate of its own, so that it builds only the flow crate, not all of tarn).

use tarn_flow::{Flow, FlowSpec, FrameSpec};

fn main() {
    let out = std::path::Path::new("corpus/flow_weights");
    std::fs::create_dir_all(out).expect("corpus directory");

    let mut plain = FlowSpec::new(2);
    plain.n_layers = 2;
    plain.hidden_width = 2;
    plain.hidden_layers = 1;
    let flow = Flow::<f32>::new(plain, None, 1).expect("plain flow");
    let bytes = flow.to_safetensors().expect("plain bytes");
    std::fs::write(out.join("plain_f32.safetensors"), &bytes).expect("write");

    let mut framed = FlowSpec::new(6);
    framed.frame = FrameSpec::CentreOfMass {
        n_particles: 3,
        spatial_dim: 2,
    };
    framed.n_layers = 1;
    framed.hidden_width = 2;
    framed.hidden_layers = 1;
    framed.whiten = true;
    // Whitening needs data to fit its mean and Cholesky factor.
    let data: Vec<f64> = (0..60)
        .map(|i| ((i * 37 % 11) as f64 - 5.0) * 0.1 + (i % 6) as f64)
        .collect();
    let flow = Flow::<f64>::new(framed, Some(&data), 2).expect("framed flow");
    let bytes = flow.to_safetensors().expect("framed bytes");
    std::fs::write(out.join("framed_whitened_f64.safetensors"), &bytes).expect("write");
}
