//! `.npy` arrays: any bytes decode to an array whose shape matches its data, or to an
//! error; nothing larger than the input is allocated.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(a) = tarn::protocol::npy::decode(data) {
        let count: usize = a.shape.iter().product();
        assert_eq!(count, a.data.len(), "shape {:?} vs data", a.shape);
        // What tarn decodes it can encode again, and the re-encoded bytes decode to
        // the same array (bit for bit, NaN payloads included).
        let back = tarn::protocol::npy::decode(&tarn::protocol::npy::encode_f64(&a))
            .expect("re-encoded array decodes");
        assert_eq!(back.shape, a.shape);
        assert!(back
            .data
            .iter()
            .zip(&a.data)
            .all(|(x, y)| x.to_bits() == y.to_bits()));
    } else if let Err(e) = tarn::protocol::npy::decode(data) {
        let _ = e.to_string();
    }
});
