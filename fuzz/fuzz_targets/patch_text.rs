//! Arbitrary UTF-8 text as a patch: parsing and validation must return Ok or a typed error,
//! never panic, hang or allocate without bound.
#![no_main]

use libfuzzer_sys::fuzz_target;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let _ = railsong::patch::parse_str(text, "fuzz.toml", Path::new("."), &[]);
});
