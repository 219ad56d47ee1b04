//! Runs the energy benchmark once and prints one JSON object per row; the same numbers
//! `tarn bench energy --json` reports.
fn main() {
    let rows = tarn_physics::bench::energy_benchmark(&[1, 2], 4096, 1.0).expect("benchmark");
    for r in rows {
        println!("{}", serde_json::to_string(&r).expect("row serialises"));
    }
}
