//! Flow weight files: any bytes read as a safetensors weight file give a flow that
//! writes itself back, or an error; never a panic or an allocation the file's length
//! does not bound.
#![no_main]

use libfuzzer_sys::fuzz_target;
use tarn_flow::Flow;

fuzz_target!(|data: &[u8]| {
    match Flow::<f32>::from_safetensors(data) {
        Ok(flow) => {
            let bytes = flow.to_safetensors().expect("a read flow writes itself");
            let back = Flow::<f32>::from_safetensors(&bytes).expect("and reads back");
            assert_eq!(back, flow);
        }
        Err(e) => {
            let _ = e.to_string();
        }
    }
    let _ = Flow::<f64>::from_safetensors(data).map_err(|e| e.to_string());
});
