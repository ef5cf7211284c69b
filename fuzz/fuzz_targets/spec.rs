//! The campaign spec validator on arbitrary text: it must answer with a spec or a list
//! of errors (each naming its JSON path), never panic or hang.
#![no_main]

use libfuzzer_sys::fuzz_target;
use tessera_worker::engine::spec;

fuzz_target!(|data: &[u8]| {
    let Ok(src) = std::str::from_utf8(data) else { return };
    if let Err(errors) = spec::parse_spec(src) {
        assert!(!errors.is_empty(), "rejected without an error");
    }
});
