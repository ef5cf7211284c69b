//! The ONNX reader and the network bounds on arbitrary input; see `fuzz/checks.rs`.
#![no_main]

#[path = "../checks.rs"]
mod checks;

libfuzzer_sys::fuzz_target!(|data: &[u8]| checks::check_onnx(data));
