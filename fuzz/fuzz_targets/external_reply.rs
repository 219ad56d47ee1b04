//! The external energy model's framing: any byte stream read as the program's replies
//! (to a fixed request of 3 configurations of 2 coordinates, with and without forces)
//! or as tarn's requests ends in values or a framing error, never a panic, a hang or
//! an allocation beyond the stated bounds.
#![no_main]

use std::io::Cursor;

use libfuzzer_sys::fuzz_target;
use tarn_physics::external::{read_reply, read_request};

const N: usize = 3;
const DIM: usize = 2;

fuzz_target!(|data: &[u8]| {
    // Replies, read one after another as the client does, until the first error.
    let mut scratch = Vec::new();
    for want_forces in [true, false] {
        let mut r = Cursor::new(data);
        for _ in 0..8 {
            let mut energy = [0.0f64; N];
            let mut forces = [0.0f64; N * DIM];
            let f = if want_forces {
                Some(&mut forces[..])
            } else {
                None
            };
            match read_reply(&mut r, N, DIM, &mut energy, f, &mut scratch) {
                Ok(()) => assert!(energy.iter().all(|e| !e.is_nan())),
                Err(e) => {
                    let _ = e.to_string();
                    break;
                }
            }
        }
    }
    // Requests, as a Rust energy program reads them.
    let mut r = Cursor::new(data);
    for _ in 0..8 {
        match read_request(&mut r, 1 << 16) {
            Ok(Some(req)) => assert_eq!(req.x.len(), req.n * req.dim),
            Ok(None) => break,
            Err(e) => {
                let _ = e.to_string();
                break;
            }
        }
    }
});
