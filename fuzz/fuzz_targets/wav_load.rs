//! Arbitrary bytes as a WAV input file: `load_wav` must return samples or a typed error,
//! never panic or allocate without bound (a header may claim gigabytes of data).
#![no_main]

use libfuzzer_sys::fuzz_target;
use std::io::Write;
use std::path::PathBuf;
use std::sync::OnceLock;

fn scratch() -> &'static PathBuf {
    static P: OnceLock<PathBuf> = OnceLock::new();
    P.get_or_init(|| std::env::temp_dir().join(format!("railsong-fuzz-{}.wav", std::process::id())))
}

fuzz_target!(|data: &[u8]| {
    let path = scratch();
    {
        let mut f = std::fs::File::create(path).expect("scratch file");
        f.write_all(data).expect("scratch write");
    }
    // One load per input (the resampler's set-up dominates the time). Inputs of even length
    // are read at the rate their header declares (bytes 24..28 of a canonical header), so
    // most of them skip the resampler and the decoder gets most of the executions; odd ones
    // are mixed at 48 kHz, or take channel 1 at 44.1 kHz with another scale.
    let declared = data
        .get(24..28)
        .map(|b| f64::from(u32::from_le_bytes([b[0], b[1], b[2], b[3]])))
        .filter(|r| (100.0..=1_536_000.0).contains(r));
    let _ = match (data.len() % 4, declared) {
        (0, Some(rate)) | (2, Some(rate)) => {
            railsong::signal::load_wav(path, None, 1.0, rate, 1000, true)
        }
        (1, _) => railsong::signal::load_wav(path, None, 1.0, 48_000.0, 1000, true),
        _ => railsong::signal::load_wav(path, Some(1), 5.0, 44_100.0, 1000, false),
    };
});
