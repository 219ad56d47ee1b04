//! Flow weight files: any bytes read as a safetensors weight file (either family: the
//! RealNVP `tarn-flow` or the layer stack `tarn-flow-stack`) give a flow that writes
//! itself back, or an error; never a panic or an allocation the file's length does not
//! bound.
#![no_main]

use libfuzzer_sys::fuzz_target;
use tarn_flow::stack::StackFlow;
use tarn_flow::{AnyFlow, Flow};

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
    if let Ok(flow) = AnyFlow::from_safetensors(data) {
        let bytes = flow.to_safetensors().expect("a read flow writes itself");
        let back = AnyFlow::from_safetensors(&bytes).expect("and reads back");
        assert_eq!(back.to_safetensors().expect("writes again"), bytes);
    }
    let _ = StackFlow::<f64>::from_safetensors(data).map_err(|e| e.to_string());
});
