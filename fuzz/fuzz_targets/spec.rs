//! The campaign spec validator on arbitrary input; see `fuzz/checks.rs`.
#![no_main]

#[path = "../checks.rs"]
mod checks;

libfuzzer_sys::fuzz_target!(|data: &[u8]| checks::check_spec(data));
