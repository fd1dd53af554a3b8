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
    // Mixed channels at the default internal rate (48 kHz x 4), and channel 1 at 48 kHz.
    let _ = railsong::signal::load_wav(path, None, 1.0, 192_000.0, 4800, true);
    let _ = railsong::signal::load_wav(path, Some(1), 5.0, 48_000.0, 1000, false);
});
