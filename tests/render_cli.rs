//! End-to-end tests of `render`, `demo` and `measure` through the binary.

use std::path::Path;
use std::process::{Command, Output};

fn railsong(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_railsong"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("binary runs")
}

fn read_wav(path: &Path) -> (hound::WavSpec, Vec<f64>) {
    let mut r = hound::WavReader::open(path).unwrap();
    let spec = r.spec();
    let scale = (1i64 << (spec.bits_per_sample - 1)) as f64;
    let v = match spec.sample_format {
        hound::SampleFormat::Float => r.samples::<f32>().map(|s| s.unwrap() as f64).collect(),
        hound::SampleFormat::Int => r
            .samples::<i32>()
            .map(|s| s.unwrap() as f64 / scale)
            .collect(),
    };
    (spec, v)
}

#[test]
fn demo_writes_its_files_and_says_what_to_listen_for() {
    let dir = tempfile::tempdir().unwrap();
    let out = railsong(&["demo", "--out", dir.path().to_str().unwrap()]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("listen"), "{text}");
    for name in ["clean", "rails", "reversal"] {
        let wav = dir.path().join(format!("{name}.wav"));
        assert!(wav.exists(), "{} missing", wav.display());
        let (spec, s) = read_wav(&wav);
        assert_eq!(spec.sample_rate, 48000);
        assert_eq!(s.len(), 6 * 48000);
        // Default calibration: the larger rail is full scale, so nothing clips the file.
        assert!(s.iter().all(|x| x.abs() < 1.0));
    }
    // the figures of every output, as `measure --json` prints them
    let fig: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("figures.json")).unwrap())
            .unwrap();
    // Common practice: the follower's input dips below -8 V, so it spends time reversed.
    assert!(
        fig["outputs"]["reversal"]["events"]["buffer"]["reversed_s"]
            .as_f64()
            .unwrap()
            > 0.0
    );
    assert_eq!(
        fig["outputs"]["clean"]["events"]["mix"]["clip_s"].as_f64(),
        Some(0.0)
    );
    assert!(
        fig["outputs"]["rails"]["events"]["hot"]["clip_s"]
            .as_f64()
            .unwrap()
            > 0.0
    );
    // no temporary files left behind
    for e in std::fs::read_dir(dir.path()).unwrap() {
        let n = e.unwrap().file_name().into_string().unwrap();
        assert!(!n.contains(".tmp"), "left over {n}");
    }
}

#[test]
fn render_refuses_to_overwrite_a_file_it_did_not_write() {
    let dir = tempfile::tempdir().unwrap();
    let foreign = dir.path().join("main.wav");
    std::fs::write(&foreign, b"my own recording").unwrap();
    let d = dir.path().to_str().unwrap();
    let out = railsong(&["render", "patches/clean-mix.toml", "--out", d]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("--force"));
    assert_eq!(std::fs::read(&foreign).unwrap(), b"my own recording");
    let out = railsong(&["render", "patches/clean-mix.toml", "--out", d, "--force"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // and a second render over its own files needs no flag
    let out = railsong(&["render", "patches/clean-mix.toml", "--out", d]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

const KEYS: [&str; 14] = [
    "fundamental_hz",
    "thd_percent",
    "thd_db",
    "thdn_db",
    "sinad_db",
    "enob",
    "snr_db",
    "peak_v",
    "rms_v",
    "dc_v",
    "headroom_pos_db",
    "headroom_neg_db",
    "harmonics_dbc",
    "events",
];

#[test]
fn measure_json_has_every_key_for_every_patch() {
    let mut n = 0;
    for e in std::fs::read_dir(Path::new(env!("CARGO_MANIFEST_DIR")).join("patches")).unwrap() {
        let p = e.unwrap().path();
        if p.extension().is_none_or(|x| x != "toml") {
            continue;
        }
        n += 1;
        let out = railsong(&[
            "measure",
            p.to_str().unwrap(),
            "--json",
            "--set",
            "patch.length=0.5 s",
        ]);
        assert!(
            out.status.success(),
            "{}: {}",
            p.display(),
            String::from_utf8_lossy(&out.stderr)
        );
        let v: serde_json::Value = serde_json::from_slice(&out.stdout)
            .unwrap_or_else(|e| panic!("{}: not JSON: {e}", p.display()));
        let outs = v["outputs"].as_object().expect("outputs object");
        assert!(!outs.is_empty());
        for (name, o) in outs {
            for k in KEYS {
                assert!(
                    o.get(k).is_some(),
                    "{}: outputs.{name} lacks {k}",
                    p.display()
                );
            }
        }
        assert!(v["settings"].is_object());
    }
    assert!(n >= 5);
}

/// A 1 kHz sine with a 1 V offset through a unity inverter: starts and ends away from 0 V.
const EDGES: &str = r#"
[patch]
length = "0.2 s"
noise = false

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "1 kHz"
amp = "2 Vpk"
phase = "90 deg"
offset = "1 V"

[stages.amp]
type = "inverting"
part = "bipolar-lownoise"
from = "osc"
r_in = "10k"
r_fb = "10k"

[outputs.out]
from = "amp"
"#;

// File edges (issue 12): with the default 5 ms fade the first and last samples of the file
// are exactly zero, the fade is a raised cosine (sin^2(pi k / 2 L), common practice: half
// way through it the file is at half the unfaded value), the middle of the file is untouched,
// and figures.json is the same as with the fade switched off (figures come from the unfaded
// signal). `--fade 0` writes the unfaded file; a bad length exits 2.
#[test]
fn files_fade_at_their_edges_and_the_figures_do_not() {
    let dir = tempfile::tempdir().unwrap();
    let patch = dir.path().join("edges.toml");
    std::fs::write(&patch, EDGES).unwrap();
    let p = patch.to_str().unwrap();
    let faded = dir.path().join("faded");
    let plain = dir.path().join("plain");
    for (out, fade) in [(&faded, None), (&plain, Some("0"))] {
        let mut args = vec![
            "render",
            p,
            "--out",
            out.to_str().unwrap(),
            "--depth",
            "float",
        ];
        if let Some(f) = fade {
            args.extend(["--fade", f]);
        }
        let o = railsong(&args);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    let (_, f) = read_wav(&faded.join("out.wav"));
    let (_, u) = read_wav(&plain.join("out.wav"));
    assert_eq!(f.len(), u.len());
    let n = f.len();
    assert_eq!(f[0], 0.0);
    assert_eq!(f[n - 1], 0.0);
    // unfaded, the file starts near -3 V (of 15 V full scale): not zero
    assert!(u[0].abs() > 0.1, "{}", u[0]);
    let len = 240; // 5 ms at 48 kHz
    assert!((f[len / 2] - 0.5 * u[len / 2]).abs() < 1e-6);
    assert!((f[n - 1 - len / 2] - 0.5 * u[n - 1 - len / 2]).abs() < 1e-6);
    assert_eq!(f[len..n - len], u[len..n - len]);
    let figures = |d: &Path| std::fs::read_to_string(d.join("figures.json")).unwrap();
    assert_eq!(figures(&faded), figures(&plain));
    let bad = railsong(&[
        "render",
        p,
        "--out",
        dir.path().join("bad").to_str().unwrap(),
        "--fade=-1ms",
    ]);
    assert_eq!(bad.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&bad.stderr).contains("--fade"));
}

/// The peaks `render` prints: `band-limited` is the output at the file's rate before the
/// edge fade and the listening gain (the figures' record), `file` the samples written. The
/// file's own peak, read back and scaled by the calibration, must be the one printed.
#[test]
fn the_printed_file_peak_is_the_files_own() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("hot");
    let o = railsong(&[
        "render",
        "patches/hot-inputs.toml",
        "--out",
        out.to_str().unwrap(),
        "--depth",
        "float",
        "--listen",
        "-20",
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8_lossy(&o.stdout);
    let line = text
        .lines()
        .find(|l| l.trim_start().starts_with("main.wav:"))
        .unwrap_or_else(|| panic!("no line for main.wav in {text}"));
    let volts = |key: &str| -> f64 {
        let at = line.find(key).unwrap_or_else(|| panic!("{key} in {line}")) + key.len();
        let word: String = line[at..]
            .chars()
            .take_while(|c| c.is_ascii_digit() || *c == '.')
            .collect();
        word.parse().unwrap()
    };
    let (_, s) = read_wav(&out.join("main.wav"));
    let full_scale = 15.0; // the patch's calibration (the larger rail)
    let peak = s.iter().fold(0.0f64, |a, &x| a.max(x.abs())) * full_scale;
    let printed = volts("file ");
    // printed to four significant figures
    assert!(
        (printed - peak).abs() <= 5e-4 * peak,
        "{line}: file read back {peak}"
    );
    // the listening gain lowers the file below the band-limited record
    assert!(volts("band-limited ") > 2.0 * printed, "{line}");
}
