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
    // One load per input (the resampler's set-up dominates the time): mixed channels at
    // 48 kHz for inputs of even length, channel 1 at 44.1 kHz with another scale otherwise.
    let _ = if data.len() % 2 == 0 {
        railsong::signal::load_wav(path, None, 1.0, 48_000.0, 1000, true)
    } else {
        railsong::signal::load_wav(path, Some(1), 5.0, 44_100.0, 1000, false)
    };
});
