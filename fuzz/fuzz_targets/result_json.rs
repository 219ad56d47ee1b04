//! `out/result.json`: any bytes written as a worker's result file are validated to a
//! result or refused with a message naming the file and the field, for an explore and
//! a dedup expectation. The task directory is fixed per process (created once, with
//! valid arrays under `out/` so that inputs naming them get past the file checks).
#![no_main]

use std::path::PathBuf;
use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;
use tarn::protocol::npy::{encode_f64, Array};
use tarn::protocol::{read_result, Expectation, Role};

/// The process's task directory, with `in/`, `out/` and a few valid arrays.
fn task_dir() -> &'static PathBuf {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        let dir = std::env::temp_dir().join(format!("tarn-fuzz-result-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(dir.join("in")).expect("in/");
        std::fs::create_dir_all(dir.join("out")).expect("out/");
        let put = |name: &str, a: Array| {
            std::fs::write(dir.join("out").join(name), encode_f64(&a)).expect("array")
        };
        put(
            "samples.npy",
            Array::matrix(3, 2, vec![0.1, 0.2, 0.3, 0.4, 0.5, 0.6]),
        );
        put("energies.npy", Array::vector(vec![-1.0, -2.0, -3.0]));
        put("bad.npy", Array::vector(vec![f64::NAN, 1.0, 2.0]));
        put("labels.npy", Array::vector(vec![]));
        put("new_states.npy", Array::matrix(1, 2, vec![0.5, 1.5]));
        put("new_energies.npy", Array::vector(vec![-146.7]));
        put("cv.npy", Array::matrix(3, 1, vec![1.0, 2.0, 3.0]));
        std::fs::write(dir.join("out/model.safetensors"), b"not really a model").expect("model");
        dir
    })
}

fuzz_target!(|data: &[u8]| {
    let dir = task_dir();
    std::fs::write(dir.join("out/result.json"), data).expect("write result.json");
    for role in [Role::Explore, Role::Dedup, Role::Retrain] {
        let want = Expectation {
            role,
            dim: 2,
            n_inputs: 0,
            n_known: 0,
        };
        match read_result(dir, &want) {
            Ok(r) => {
                assert!(r.metrics.values().flatten().all(|v| v.is_finite()));
                if role == Role::Explore {
                    let n = r.arrays["samples"].rows();
                    assert_eq!(r.arrays["energies"].shape, vec![n]);
                }
            }
            Err(e) => {
                // Every refusal names the file it is about. (The field may be empty:
                // a JSON key "" that is not a field of result.json is named as "".)
                let shown = e.to_string();
                assert!(!e.file.is_empty() && !e.message.is_empty(), "{shown}");
            }
        }
    }
});
