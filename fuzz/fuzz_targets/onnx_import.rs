//! Arbitrary bytes as an ONNX model: decode, convert, build and verify a bundle, run the
//! generated check inputs — the whole import but the file I/O.
#![no_main]

use convoy::import::{ImportOptions, import_onnx_bytes};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let _ = import_onnx_bytes(data.to_vec(), &ImportOptions::default(), &mut |_| {});
});
