//! Arbitrary `--set PATH=VALUE` strings (one per line of the input) applied to a valid patch
//! with every kind of section (sources, stages, outputs, parts, variants).
#![no_main]

use libfuzzer_sys::fuzz_target;
use std::path::Path;

const BASE: &str = include_str!("../../patches/demo.toml");
const MIXER: &str = include_str!("../../tests/good/mixer.toml");

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    // The first byte picks the base patch, every line after it is one --set argument.
    let (base, rest) = match text.strip_prefix('#') {
        Some(r) => (MIXER, r),
        None => (BASE, text),
    };
    let sets: Vec<String> = rest.lines().take(16).map(str::to_string).collect();
    let _ = railsong::patch::parse_str(base, "fuzz.toml", Path::new("."), &sets);
    // The same strings through the one-value parser used by --set.
    for s in &sets {
        if let Some((_, v)) = s.split_once('=') {
            let _ = railsong::patch::parse_set_value(v);
        }
    }
});
