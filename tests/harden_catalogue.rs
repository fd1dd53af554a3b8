//! The bad-input catalogue, driven through the binary's `render` command: every malformed
//! patch in `tests/bad/`, `--set` overrides that name nothing or carry bad values, and WAV
//! inputs that are broken in every way a file can be (written by the test into a temporary
//! folder). Each case must exit with code 2, print exactly one line on stderr that names the
//! file at fault and what was expected, never panic, and leave the output folder absent or
//! empty.
//!
//! WAV layout (RIFF chunks, the `fmt ` fields, format tags 1 = PCM, 2 = ADPCM, 3 = IEEE
//! float, 0xFFFE = extensible): the *Multimedia Programming Interface and Data
//! Specifications* 1.0 (1991), and RFC 2361 for the format tags.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn railsong(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_railsong"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("binary runs")
}

/// Files in `dir` (recursively), empty when it does not exist.
fn contents(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let Ok(rd) = std::fs::read_dir(dir) else {
        return out;
    };
    for e in rd {
        let p = e.unwrap().path();
        if p.is_dir() {
            out.extend(contents(&p));
        }
        out.push(p);
    }
    out
}

/// Render `patch` into a fresh folder and check everything a bad input must do. `names` are
/// texts the one error line must contain (the file at fault, the key or offset, what was
/// expected). Returns the error line.
fn expect_bad(patch: &Path, sets: &[&str], names: &[&str]) -> String {
    let tmp = tempfile::tempdir().unwrap();
    let out_dir = tmp.path().join("out");
    let mut args = vec![
        "render",
        patch.to_str().unwrap(),
        "--out",
        out_dir.to_str().unwrap(),
    ];
    for s in sets {
        args.push("--set");
        args.push(s);
    }
    let out = railsong(&args);
    let err = String::from_utf8_lossy(&out.stderr).to_string();
    let what = format!("{} {sets:?}", patch.display());
    assert_eq!(
        out.status.code(),
        Some(2),
        "{what}: exit code; stderr: {err}"
    );
    assert!(!err.contains("panicked"), "{what}: {err}");
    assert_eq!(
        err.trim_end().lines().count(),
        1,
        "{what}: not one line: {err}"
    );
    assert!(err.starts_with("railsong: "), "{what}: {err}");
    for n in names {
        assert!(err.contains(n), "{what}: error lacks `{n}`: {err}");
    }
    let left = contents(&out_dir);
    assert!(left.is_empty(), "{what}: wrote {left:?}");
    err
}

fn bad_patches() -> Vec<PathBuf> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bad");
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "toml"))
        .collect();
    v.sort();
    v
}

#[test]
fn every_bad_patch_is_refused_by_render_and_writes_nothing() {
    let bad = bad_patches();
    assert!(bad.len() >= 55, "catalogue has {} patch files", bad.len());
    for p in &bad {
        let text = std::fs::read_to_string(p).unwrap();
        let expect = text
            .lines()
            .next()
            .and_then(|l| l.strip_prefix("# expect:"))
            .map(str::trim)
            .unwrap_or_else(|| panic!("{} lacks an expect line", p.display()));
        let file = p.file_name().unwrap().to_str().unwrap();
        expect_bad(p, &[], &[file, expect]);
    }
}

/// A small valid patch for the `--set` cases.
const MIXER: &str = "tests/good/mixer.toml";

#[test]
fn set_overrides_that_name_nothing_or_carry_bad_values_are_refused() {
    let p = Path::new(env!("CARGO_MANIFEST_DIR")).join(MIXER);
    // (override, texts the message must contain)
    let cases: [(&str, &[&str]); 9] = [
        ("stages.nope.r_in=10k", &["mixer.toml", "stages.nope"]),
        ("patch.bogus=1", &["mixer.toml", "bogus"]),
        ("no-equals-sign", &["mixer.toml", "expected PATH=VALUE"]),
        ("=10k", &["mixer.toml"]),
        ("rails.pos=abc", &["mixer.toml", "rails.pos", "expected"]),
        ("rails.pos=-15 V", &["mixer.toml", "rails.pos"]),
        ("patch.rate=0", &["mixer.toml", "patch.rate"]),
        ("patch.length=1e15 s", &["mixer.toml", "patch.length"]),
        ("sources..freq=1 kHz", &["mixer.toml"]),
    ];
    for (set, names) in cases {
        expect_bad(&p, &[set], names);
    }
}

// ----- WAV inputs ----------------------------------------------------------------------------

/// A canonical WAV file: `RIFF` size, `WAVE`, a 16-byte `fmt ` chunk and a `data` chunk whose
/// size field is `data_len` (the true length unless a test lies).
fn wav(tag: u16, channels: u16, rate: u32, bits: u16, data: &[u8], data_len: u32) -> Vec<u8> {
    let align = channels.wrapping_mul(bits / 8);
    let mut v = Vec::new();
    v.extend_from_slice(b"RIFF");
    v.extend_from_slice(&(36 + data.len() as u32).to_le_bytes());
    v.extend_from_slice(b"WAVE");
    v.extend_from_slice(b"fmt ");
    v.extend_from_slice(&16u32.to_le_bytes());
    v.extend_from_slice(&tag.to_le_bytes());
    v.extend_from_slice(&channels.to_le_bytes());
    v.extend_from_slice(&rate.to_le_bytes());
    v.extend_from_slice(&rate.wrapping_mul(u32::from(align)).to_le_bytes());
    v.extend_from_slice(&align.to_le_bytes());
    v.extend_from_slice(&bits.to_le_bytes());
    v.extend_from_slice(b"data");
    v.extend_from_slice(&data_len.to_le_bytes());
    v.extend_from_slice(data);
    v
}

/// 16-bit PCM mono at 48 kHz, `n` samples of a ramp.
fn pcm16(n: usize) -> Vec<u8> {
    let data: Vec<u8> = (0..n)
        .flat_map(|i| ((i as i16).wrapping_mul(37)).to_le_bytes())
        .collect();
    wav(1, 1, 48_000, 16, &data, data.len() as u32)
}

fn float32(samples: &[f32]) -> Vec<u8> {
    let data: Vec<u8> = samples.iter().flat_map(|s| s.to_le_bytes()).collect();
    wav(3, 1, 48_000, 32, &data, data.len() as u32)
}

/// Write `bytes` as `input.wav` beside a patch that plays it (extra keys in `source`), and
/// check the render is refused. Returns the error line.
fn bad_wav(bytes: Option<&[u8]>, source: &str, names: &[&str]) -> String {
    let tmp = tempfile::tempdir().unwrap();
    let wav_path = tmp.path().join("input.wav");
    if let Some(b) = bytes {
        std::fs::write(&wav_path, b).unwrap();
    }
    let patch = tmp.path().join("plays-file.toml");
    std::fs::write(
        &patch,
        format!(
            r#"[patch]
length = "0.1 s"

[rails]
pos = "12 V"
neg = "-12 V"

[sources.clip]
wave = "file"
path = "input.wav"
{source}

[stages.buf]
type = "follower"
part = "ideal"
from = "clip"

[outputs.out]
from = "buf"
"#
        ),
    )
    .unwrap();
    let mut all = vec!["input.wav"];
    all.extend_from_slice(names);
    let err = expect_bad(&patch, &[], &all);
    if let Some(b) = bytes {
        assert_eq!(
            std::fs::read(&wav_path).unwrap(),
            b,
            "the input was changed"
        );
    }
    err
}

#[test]
fn wav_missing_and_empty() {
    bad_wav(None, "", &["not found"]);
    bad_wav(Some(b""), "", &["empty", "0 bytes"]);
    // A data chunk that declares no samples.
    bad_wav(Some(&wav(1, 1, 48_000, 16, &[], 0)), "", &["empty"]);
}

#[test]
fn wav_truncated_mid_header_and_mid_data() {
    let good = pcm16(1000);
    // Inside the RIFF header, inside the fmt chunk, inside the data chunk header.
    for cut in [3, 10, 20, 30, 40] {
        bad_wav(Some(&good[..cut]), "", &["WAV file"]);
    }
    // Inside the samples: the header says 1000 samples, 300 and a half are there.
    let err = bad_wav(Some(&good[..44 + 601]), "", &["truncated"]);
    assert!(err.contains("1000"), "names the declared count: {err}");
}

#[test]
fn wav_with_lying_chunk_sizes() {
    let data: Vec<u8> = (0..200i16).flat_map(|s| s.to_le_bytes()).collect();
    // A data chunk that claims 4 GiB: must be refused, not allocated.
    bad_wav(
        Some(&wav(1, 1, 48_000, 16, &data, 0xFFFF_FFF0)),
        "",
        &["truncated"],
    );
    // A fmt chunk that claims to run past the end of the file.
    let mut v = wav(1, 1, 48_000, 16, &data, data.len() as u32);
    v[16..20].copy_from_slice(&0x7FFF_FFF0u32.to_le_bytes());
    bad_wav(Some(&v), "", &["WAV file"]);
    // A fmt chunk too short to hold the format fields.
    let mut v = wav(1, 1, 48_000, 16, &data, data.len() as u32);
    v[16..20].copy_from_slice(&4u32.to_le_bytes());
    bad_wav(Some(&v), "", &["WAV file"]);
    // A block align that disagrees with channels x bits.
    let mut v = wav(1, 1, 48_000, 16, &data, data.len() as u32);
    v[32..34].copy_from_slice(&7u16.to_le_bytes());
    bad_wav(Some(&v), "", &["WAV file"]);
}

#[test]
fn wav_with_bad_format_fields() {
    let data = vec![0u8; 400];
    bad_wav(
        Some(&wav(1, 0, 48_000, 16, &data, 400)),
        "",
        &["zero channels"],
    );
    bad_wav(
        Some(&wav(1, 1, 0, 16, &data, 400)),
        "",
        &["sample rate 0 Hz", "outside"],
    );
    bad_wav(
        Some(&wav(1, 1, 2_000_000_000, 16, &data, 400)),
        "",
        &["sample rate 2000000000 Hz", "outside"],
    );
    // Format tag 2 (ADPCM, RFC 2361): compressed, not read.
    // Its 4-bit samples come in 256-byte blocks.
    let mut adpcm = wav(2, 1, 48_000, 4, &data, 400);
    adpcm[28..32].copy_from_slice(&(48_000u32 * 256).to_le_bytes());
    adpcm[32..34].copy_from_slice(&256u16.to_le_bytes());
    bad_wav(Some(&adpcm), "", &["unsupported"]);
    // WAVE_FORMAT_EXTENSIBLE whose sub-format GUID names no known codec.
    let mut ext = Vec::new();
    ext.extend_from_slice(b"RIFF");
    ext.extend_from_slice(&(4 + 48 + 8 + 400u32).to_le_bytes());
    ext.extend_from_slice(b"WAVEfmt ");
    ext.extend_from_slice(&40u32.to_le_bytes());
    for v in [0xFFFEu16, 1] {
        ext.extend_from_slice(&v.to_le_bytes());
    }
    ext.extend_from_slice(&48_000u32.to_le_bytes());
    ext.extend_from_slice(&96_000u32.to_le_bytes());
    for v in [2u16, 16, 22, 16] {
        ext.extend_from_slice(&v.to_le_bytes());
    }
    ext.extend_from_slice(&4u32.to_le_bytes());
    ext.extend_from_slice(&[0x11; 16]);
    ext.extend_from_slice(b"data");
    ext.extend_from_slice(&400u32.to_le_bytes());
    ext.extend_from_slice(&data);
    bad_wav(Some(&ext), "", &["unsupported"]);
    // PCM of 12 bits in 16-bit containers is not a size railsong reads.
    bad_wav(Some(&wav(1, 1, 48_000, 12, &data, 400)), "", &["WAV file"]);
    // 64-bit float is not read.
    bad_wav(
        Some(&wav(3, 1, 48_000, 64, &data, 400)),
        "",
        &["unsupported"],
    );
    // Not a RIFF file at all.
    bad_wav(
        Some(b"[rails]\npos = \"12 V\"\nthis is a patch, not audio\n"),
        "",
        &["malformed"],
    );
    // A channel the file does not have.
    bad_wav(
        Some(&pcm16(100)),
        "channel = 3",
        &["channel 3", "1 channel"],
    );
}

#[test]
fn wav_with_non_finite_float_samples() {
    let err = bad_wav(
        Some(&float32(&[0.0, 0.5, f32::NAN, 0.25])),
        "",
        &["not a finite number"],
    );
    assert!(err.contains("sample 2"), "names the sample: {err}");
    bad_wav(
        Some(&float32(&[f32::INFINITY, 0.0])),
        "",
        &["sample 0", "not a finite number"],
    );
    bad_wav(
        Some(&float32(&[0.0, 0.0, 0.0, f32::NEG_INFINITY])),
        "",
        &["sample 3", "not a finite number"],
    );
}

#[test]
fn a_good_wav_next_to_the_same_patch_renders() {
    // The control case: the same patch and a sound file render, so the refusals above are
    // caused by the broken bytes and not by the patch.
    let tmp = tempfile::tempdir().unwrap();
    std::fs::write(tmp.path().join("input.wav"), pcm16(4800)).unwrap();
    let patch = tmp.path().join("plays-file.toml");
    std::fs::write(
        &patch,
        "[patch]\nlength = \"0.1 s\"\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\
         [sources.clip]\nwave = \"file\"\npath = \"input.wav\"\n\
         [outputs.out]\nfrom = \"clip\"\n",
    )
    .unwrap();
    let out_dir = tmp.path().join("out");
    let out = railsong(&[
        "render",
        patch.to_str().unwrap(),
        "--out",
        out_dir.to_str().unwrap(),
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(out_dir.join("out.wav").exists());
}
