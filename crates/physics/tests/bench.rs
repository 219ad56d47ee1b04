//! The benchmark functions run and report consistent rows (speed itself is a figure
//! for `tarn bench energy`, not a test).

use tarn_physics::bench::{energy_benchmark, measure_f64_peak, model_throughput};
use tarn_physics::models::MullerBrown;

#[test]
fn energy_benchmark_rows_are_consistent() {
    let rows = energy_benchmark(&[1, 2], 64, 0.02).unwrap();
    assert_eq!(rows.len(), 6);
    for r in &rows {
        assert!(r.peak_gflops.is_finite() && r.peak_gflops > 0.0, "{r:?}");
        assert!(r.gflops > 0.0 && r.fraction_of_peak > 0.0, "{r:?}");
        assert!((r.fraction_of_peak - r.gflops / r.peak_gflops).abs() < 1e-12);
        if r.system != "peak-fma" {
            let per_config = if r.system == "lj13-3d" { 78.0 } else { 256.0 };
            assert!(
                (r.interactions_per_sec - r.configs_per_sec * per_config).abs()
                    < 1e-6 * r.interactions_per_sec
            );
        }
        let json = serde_json::to_string(r).unwrap();
        assert!(json.contains("\"bench\":\"energy\""));
    }
    assert!(measure_f64_peak(0, 0.01).is_err());
    let (rate, secs) = model_throughput(&MullerBrown, &[0.0; 200], 0.01).unwrap();
    assert!(rate > 0.0 && secs >= 0.01);
}
