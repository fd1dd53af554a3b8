//! Deterministic random-input smoke tests (proptest, fixed seed): arbitrary bytes and strings
//! into the patch parser and the WAV loader return `Ok` or a typed error and never panic.
//! The long, coverage-guided version of these runs is the fuzz crate (`fuzz/`).

use std::path::Path;

use proptest::prelude::*;
use proptest::test_runner::{Config, RngAlgorithm, TestRng, TestRunner};

/// A runner with a fixed seed, no failure files, `cases` cases.
fn runner(cases: u32, seed: u8) -> TestRunner {
    let config = Config {
        cases,
        failure_persistence: None,
        ..Config::default()
    };
    TestRunner::new_with_rng(
        config,
        TestRng::from_seed(RngAlgorithm::ChaCha, &[seed; 32]),
    )
}

/// Pieces of patch text, so random strings reach past the TOML parser into the validator.
const PIECES: &[&str] = &[
    "[patch]\n",
    "[rails]\n",
    "pos = \"12 V\"\n",
    "neg = \"-12 V\"\n",
    "neg = 12\n",
    "[sources.osc]\n",
    "wave = \"sine\"\n",
    "wave = \"file\"\n",
    "wave = \"multitone\"\n",
    "tones = [{ freq = \"1 kHz\", amp = 1 }]\n",
    "freq = \"1 kHz\"\n",
    "freq = 1e308\n",
    "amp = \"10 Vpp\"\n",
    "amp = -1\n",
    "decay = \"1 ms\"\n",
    "every = 0\n",
    "[stages.a]\n",
    "[stages.b]\n",
    "type = \"inverting-sum\"\n",
    "type = \"follower\"\n",
    "type = \"attenuator\"\n",
    "part = \"jfet-general\"\n",
    "part = \"a\"\n",
    "from = \"osc\"\n",
    "from = \"a\"\n",
    "from = \"b\"\n",
    "inputs = [{ from = \"osc\", r = \"10k\" }]\n",
    "feedback = { pot = \"100k\", taper = \"log\", at = 0.5 }\n",
    "r_in = \"4k7\"\n",
    "r_fb = \"0\"\n",
    "pot = \"1e15\"\n",
    "at = \"150%\"\n",
    "[outputs.out]\n",
    "file = \"../x\"\n",
    "[parts.a]\n",
    "based_on = \"a\"\n",
    "slew = \"10 V/us\"\n",
    "[variants.v]\n",
    "\"stages.a.r_in\" = \"1k\"\n",
    "= \n",
    "\"\n",
    "[[",
    "nan",
    "\u{0}",
    "é",
];

#[test]
fn random_text_into_parse_str_never_panics() {
    let mut r = runner(300, 7);
    let strat = (
        proptest::collection::vec(0..PIECES.len(), 0..40),
        proptest::collection::vec(any::<u8>(), 0..64),
    );
    r.run(&strat, |(picks, noise)| {
        let mut text: String = picks.iter().map(|&i| PIECES[i]).collect();
        text.push_str(&String::from_utf8_lossy(&noise));
        let _ = railsong::patch::parse_str(&text, "smoke.toml", Path::new("."), &[]);
        Ok(())
    })
    .unwrap();
}

#[test]
fn random_bytes_into_parse_str_never_panic() {
    let mut r = runner(300, 8);
    r.run(&proptest::collection::vec(any::<u8>(), 0..512), |bytes| {
        let text = String::from_utf8_lossy(&bytes);
        let _ = railsong::patch::parse_str(&text, "smoke.toml", Path::new("."), &[]);
        Ok(())
    })
    .unwrap();
}

#[test]
fn random_set_strings_never_panic() {
    let base = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/good/mixer.toml"),
    )
    .unwrap();
    let paths = [
        "patch.rate",
        "rails.pos",
        "sources",
        "stages",
        "outputs",
        "variants",
        "parts.x.based_on",
        "stages.mix.inputs[0].r",
        "stages.mix.inputs[99].r",
        "stages.mix.inputs[-1].r",
        "a..b",
        "",
        ".",
        "[0]",
    ];
    let mut r = runner(300, 9);
    let strat = (
        0..paths.len(),
        proptest::collection::vec(any::<u8>(), 0..12),
        proptest::collection::vec(any::<u8>(), 0..24),
    );
    r.run(&strat, |(p, suffix, value)| {
        let set = format!(
            "{}{}={}",
            paths[p],
            String::from_utf8_lossy(&suffix),
            String::from_utf8_lossy(&value)
        );
        let _ = railsong::patch::parse_str(&base, "mixer.toml", Path::new("."), &[set]);
        Ok(())
    })
    .unwrap();
}

/// A plausible 44-byte RIFF/WAVE header (Multimedia Programming Interface and Data
/// Specifications 1.0, 1991) with random fields, so random bytes get past the magic numbers.
fn header(tag: u16, channels: u16, rate: u32, bits: u16, data_len: u32) -> Vec<u8> {
    let mut v = Vec::new();
    v.extend_from_slice(b"RIFF");
    v.extend_from_slice(&data_len.wrapping_add(36).to_le_bytes());
    v.extend_from_slice(b"WAVEfmt ");
    v.extend_from_slice(&16u32.to_le_bytes());
    v.extend_from_slice(&tag.to_le_bytes());
    v.extend_from_slice(&channels.to_le_bytes());
    v.extend_from_slice(&rate.to_le_bytes());
    let align = channels.wrapping_mul(bits.div_ceil(8));
    v.extend_from_slice(&rate.wrapping_mul(u32::from(align)).to_le_bytes());
    v.extend_from_slice(&align.to_le_bytes());
    v.extend_from_slice(&bits.to_le_bytes());
    v.extend_from_slice(b"data");
    v.extend_from_slice(&data_len.to_le_bytes());
    v
}

#[test]
fn random_bytes_into_load_wav_never_panic() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("smoke.wav");
    let mut r = runner(300, 10);
    let strat = (
        prop_oneof![Just(1u16), Just(3), Just(2), Just(0xFFFE), any::<u16>()],
        0u16..4,
        prop_oneof![Just(48_000u32), Just(44_100), 0u32..200, any::<u32>()],
        prop_oneof![Just(8u16), Just(16), Just(24), Just(32), any::<u16>()],
        prop_oneof![0u32..512, any::<u32>()],
        proptest::collection::vec(any::<u8>(), 0..600),
        any::<bool>(),
        0usize..80,
    );
    r.run(&strat, |(tag, ch, rate, bits, len, body, raw, cut)| {
        let mut bytes = if raw {
            body.clone()
        } else {
            let mut h = header(tag, ch, rate, bits, len);
            h.extend_from_slice(&body);
            h
        };
        // Sometimes cut the file short, anywhere.
        if cut < 40 && !bytes.is_empty() {
            let at = (cut * 97) % bytes.len();
            bytes.truncate(at);
        }
        std::fs::write(&path, &bytes).unwrap();
        for channel in [None, Some(0), Some(1)] {
            match railsong::signal::load_wav(&path, channel, 1.0, 48_000.0, 256, true) {
                Ok(v) => {
                    prop_assert_eq!(v.len(), 256);
                    prop_assert!(v.iter().all(|x| x.is_finite()));
                }
                Err(e) => {
                    // Every refusal names the file.
                    prop_assert!(e.to_string().contains("smoke.wav"), "{}", e);
                }
            }
        }
        Ok(())
    })
    .unwrap();
}

/// Regression: 8-bit samples in 1000 channels with a data chunk that claims 4 GB: the buffer
/// is sized by what the file can hold, which ends inside a frame; the partial frame must be
/// dropped, not indexed past the buffer, and the file reported as truncated.
#[test]
fn a_lying_size_ending_inside_a_wide_frame_is_truncated() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("wide.wav");
    let mut bytes = header(1, 1000, 8_000, 8, 4_000_000_000);
    bytes.extend_from_slice(&[128u8; 1456]);
    std::fs::write(&path, &bytes).unwrap();
    for channel in [None, Some(999)] {
        let e = railsong::signal::load_wav(&path, channel, 1.0, 8_000.0, 4, false).unwrap_err();
        let msg = e.to_string();
        assert!(
            msg.contains("wide.wav") && msg.contains("truncated"),
            "{msg}"
        );
    }
}

/// Regression: a data chunk that claims 4 GiB in a file of a few hundred bytes is reported as
/// truncated after the samples that are there, without sizing a buffer by the claim.
#[test]
fn a_lying_data_size_is_truncated_not_allocated() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("lie.wav");
    let mut bytes = header(1, 1, 48_000, 16, 0xFFFF_FFF0);
    bytes.extend_from_slice(&[0u8; 200]);
    std::fs::write(&path, &bytes).unwrap();
    let e = railsong::signal::load_wav(&path, None, 1.0, 48_000.0, 10, false).unwrap_err();
    let msg = e.to_string();
    assert!(
        msg.contains("truncated") && msg.contains("after 100 of"),
        "{msg}"
    );
}
