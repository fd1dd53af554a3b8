//! End-to-end tests of the `railsong` binary: exit codes, one-line errors, the shipped patches.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn railsong(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_railsong"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("binary runs")
}

fn files(dir: &str, ext: &str) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(Path::new(env!("CARGO_MANIFEST_DIR")).join(dir))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == ext))
        .collect();
    v.sort();
    v
}

#[test]
fn every_shipped_patch_checks_cleanly() {
    let patches = files("patches", "toml");
    assert!(patches.len() >= 5);
    for p in patches {
        let out = railsong(&["check", p.to_str().unwrap()]);
        assert!(
            out.status.success(),
            "{}: {}",
            p.display(),
            String::from_utf8_lossy(&out.stderr)
        );
    }
}

// The catalogue of malformed patches: each file's first line is `# expect: <text>`.
#[test]
fn bad_patches_exit_2_with_one_line_naming_the_file() {
    let bad = files("tests/bad", "toml");
    assert!(bad.len() >= 15, "catalogue has {} files", bad.len());
    for p in bad {
        let text = std::fs::read_to_string(&p).unwrap();
        let expect = text
            .lines()
            .next()
            .and_then(|l| l.strip_prefix("# expect:"))
            .map(str::trim)
            .unwrap_or_else(|| panic!("{} lacks an expect line", p.display()));
        let out = railsong(&["check", p.to_str().unwrap()]);
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{}: {err}", p.display());
        assert_eq!(err.trim_end().lines().count(), 1, "{}: {err}", p.display());
        assert!(err.contains(expect), "{}: {err}", p.display());
        let stem = p.file_name().unwrap().to_str().unwrap();
        assert!(
            err.contains(stem),
            "{}: error does not name the file: {err}",
            p.display()
        );
        assert!(!err.contains("panicked"), "{err}");
    }
}

#[test]
fn missing_file_and_bad_flags_exit_2() {
    let out = railsong(&["check", "no/such/patch.toml"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("no/such/patch.toml"));
    let out = railsong(&["check"]);
    assert_eq!(out.status.code(), Some(2));
    let out = railsong(&["frobnicate"]);
    assert_eq!(out.status.code(), Some(2));
    // clap's detail survives, on one line: the missing argument is named, a misspelt
    // command or flag gets its suggestion
    let one_line = |args: &[&str], want: &[&str]| {
        let out = railsong(args);
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        let err = String::from_utf8_lossy(&out.stderr).to_string();
        assert_eq!(err.trim_end().lines().count(), 1, "{err}");
        for w in want {
            assert!(err.contains(w), "{args:?}: {err} lacks {w}");
        }
    };
    one_line(&["check"], &["<PATCH>"]);
    one_line(
        &["compare", "patches/demo.toml", "--b", "x"],
        &["--a <NAME>"],
    );
    one_line(
        &["rendr", "patches/demo.toml"],
        &["'rendr'", "did you mean", "'render'"],
    );
    one_line(
        &["render", "patches/demo.toml", "--ouy", "x"],
        &["did you mean '--out'?"],
    );
}

// Common practice: four 10 Vpp inputs into a unity summer exceed +/-12 V rails.
#[test]
fn check_reports_the_hot_mix_and_set_overrides() {
    let out = railsong(&["check", "patches/hot-inputs.toml"]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("[clip] stages.mix"), "{text}");
    let out = railsong(&["check", "patches/clean-mix.toml"]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(!text.contains("[clip]"), "{text}");
    // Inverting gain -Rf/Rin (textbook): 10k feedback makes each input -0.1 and stops clipping.
    let out = railsong(&[
        "check",
        "patches/hot-inputs.toml",
        "--set",
        "stages.mix.feedback.r=10k",
    ]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success());
    assert!(!text.contains("[clip] stages.mix"), "{text}");
    assert!(text.contains("-0.100x4"), "{text}");
}

#[test]
fn parts_lists_every_builtin_profile() {
    let out = railsong(&["parts"]);
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    for name in railsong::parts::builtin_names() {
        assert!(text.contains(name), "{name} missing");
    }
    let out = railsong(&["parts", "patches/own-part.toml"]);
    assert!(String::from_utf8_lossy(&out.stdout).contains("line-driver (patch)"));
}

// Independent noise sources add in power; each resistor's share follows Johnson-Nyquist
// e = sqrt(4 k T R) (k = 1.380649e-23 J/K, SI 2019) times its gain to the output.
#[test]
fn noise_budget_json_adds_up_in_power() {
    let out = railsong(&["noise", "patches/clean-mix.toml", "--json"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let b = &v[0];
    let total = b["total_rms"].as_f64().unwrap();
    let items = b["items"].as_array().unwrap();
    let sum: f64 = items
        .iter()
        .map(|i| i["rms"].as_f64().unwrap().powi(2))
        .sum::<f64>()
        .sqrt();
    assert!((sum / total - 1.0).abs() < 1e-9, "{sum} vs {total}");
    // the 1k output series resistor sees only the 100k load divider: sqrt(4kTR) * 100/101
    let k: f64 = 1.380649e-23;
    let t = 298.15;
    let series = items
        .iter()
        .find(|i| {
            i["label"]
                .as_str()
                .unwrap()
                .starts_with("outputs.main.series")
        })
        .unwrap();
    let expect = (4.0 * k * t * 1e3).sqrt() * 100.0 / 101.0;
    let got = series["density_1k"].as_f64().unwrap();
    assert!((got / expect - 1.0).abs() < 1e-3, "{got} vs {expect}");
    let out = railsong(&["noise", "patches/clean-mix.toml", "--output", "nope"]);
    assert_eq!(out.status.code(), Some(2));
}

// A network stage's idle render carries its circuit noise: `noise` compares it with the
// analytic budget (within 0.3 dB: a 2 s render's band estimate and the budget's model), and
// names a comparator held at its swing, whose small-signal budget does not hold.
#[test]
fn noise_compares_network_renders_with_the_budget() {
    let out = railsong(&["noise", "patches/net-sallen-key.toml"]);
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    let line = text
        .lines()
        .find(|l| l.starts_with("simulated:"))
        .unwrap_or_else(|| panic!("{text}"));
    let db: f64 = line
        .rsplit('(')
        .next()
        .and_then(|t| t.split_whitespace().next())
        .and_then(|t| t.parse().ok())
        .unwrap_or_else(|| panic!("{line}"));
    assert!(db.abs() < 0.3, "{line}");
    let out = railsong(&["noise", "patches/net-schmitt-gate.toml"]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("at its swing in the idle render"), "{text}");
}

// SNR re 10 Vpp (common practice for modular audio): 20 log10(5/sqrt2 V / noise rms); the
// A-weighted noise of a flat-ish hiss is lower than the unweighted (IEC 61672-1 curve).
#[test]
fn measure_reports_idle_channel_noise_and_snr() {
    let out = railsong(&[
        "measure",
        "patches/clean-mix.toml",
        "--json",
        "--set",
        "patch.length=1 s",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let o = &v["outputs"]["main"];
    let n = o["noise_rms_v"].as_f64().unwrap();
    let na = o["noise_a_rms_v"].as_f64().unwrap();
    let snr = o["snr_ref_db"].as_f64().unwrap();
    assert!(n > 1e-6 && n < 1e-3, "{n}");
    assert!(na < n);
    let expect = 20.0 * ((5.0 / 2f64.sqrt()) / n).log10();
    assert!((snr - expect).abs() < 1e-9);
    // noise off: every noise figure is null, not 0
    let out = railsong(&[
        "measure",
        "patches/clean-mix.toml",
        "--json",
        "--set",
        "patch.length=1 s",
        "--set",
        "patch.noise=false",
    ]);
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert!(v["outputs"]["main"]["noise_rms_v"].is_null());
    assert!(v["outputs"]["main"]["snr_db"].is_null());
}

// `--tol 5` means 5 % (the flag takes percent), an impossible tolerance is refused with a
// clear message, and `tolerance --help` says what `--plots` writes.
#[test]
fn tolerance_flags_read_percent_and_help_names_the_plot() {
    let out = railsong(&[
        "tolerance",
        "patches/clean-mix.toml",
        "--tol",
        "5",
        "--runs",
        "3",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(String::from_utf8_lossy(&out.stdout).contains("+/-5 %"));
    let out = railsong(&["tolerance", "patches/clean-mix.toml", "--tol", "150"]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("--tol 150") && err.contains("below 100 %"),
        "{err}"
    );
    let out = railsong(&["tolerance", "--help"]);
    assert!(String::from_utf8_lossy(&out.stdout).contains("<output>-tolerance-gain.svg"));
}

// Every `--set` example of the README's paragraph on overrides works on the demo patch.
#[test]
fn readme_set_examples_work_on_the_demo() {
    let readme = std::fs::read_to_string("README.md").unwrap();
    let para = readme
        .split("\n\n")
        .find(|p| p.contains("takes `--set PATH=VALUE`"))
        .expect("the overrides paragraph");
    let examples: Vec<String> = para
        .split('`')
        .filter_map(|s| s.strip_prefix("--set "))
        .filter(|s| !s.starts_with("PATH"))
        .map(|s| s.replace('"', ""))
        .collect();
    assert!(examples.len() >= 2, "{examples:?}");
    for e in &examples {
        let out = railsong(&["check", "patches/demo.toml", "--set", e]);
        assert!(
            out.status.success(),
            "--set {e}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
}

// `--variant` on check and measure picks the variant (here "hot": the mixer's feedback
// resistor 330k instead of 100k, gain -Rf/Ri = -3.3, textbook), and `measure --csv` carries
// the event columns: the hot mix clips, the base does not.
#[test]
fn variant_flag_and_csv_event_columns() {
    let base = railsong(&["check", "patches/ab-feedback.toml"]);
    let hot = railsong(&["check", "patches/ab-feedback.toml", "--variant", "hot"]);
    assert!(base.status.success() && hot.status.success());
    assert!(String::from_utf8_lossy(&base.stdout).contains("-1.000x2"));
    assert!(String::from_utf8_lossy(&hot.stdout).contains("-3.300x2"));
    let bad = railsong(&["check", "patches/ab-feedback.toml", "--variant", "cold"]);
    assert_eq!(bad.status.code(), Some(2));
    let csv = |variant: &str| {
        let out = railsong(&[
            "measure",
            "patches/ab-feedback.toml",
            "--variant",
            variant,
            "--set",
            "patch.length=0.5 s",
            "--csv",
        ]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8_lossy(&out.stdout).to_string()
    };
    let cell = |text: &str, col: &str| -> String {
        let mut lines = text.lines();
        let head: Vec<&str> = lines.next().unwrap().split(',').collect();
        let row: Vec<&str> = lines.next().unwrap().split(',').collect();
        let i = head
            .iter()
            .position(|h| *h == col)
            .unwrap_or_else(|| panic!("no {col}"));
        row[i].to_string()
    };
    let (b, h) = (csv("base"), csv("hot"));
    assert_eq!(cell(&b, "clip_s").parse::<f64>().unwrap(), 0.0);
    assert!(cell(&h, "clip_s").parse::<f64>().unwrap() > 0.0);
    assert_eq!(cell(&h, "first_clip_stage"), "mix");
    assert!(cell(&h, "first_clip_s").parse::<f64>().unwrap() >= 0.0);
    assert_eq!(cell(&b, "first_clip_s"), "");
}

// `measure --level-sweep --plots --plots-dir` writes the THD-against-level plot, with the
// crossings found on the circuit marked.
#[test]
fn level_sweep_writes_its_plot() {
    let dir = tempfile::tempdir().unwrap();
    let patch = dir.path().join("amp.toml");
    std::fs::write(
        &patch,
        r#"
[patch]
length = "0.3 s"
noise = false

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "1 kHz"
amp = "1 Vpk"

[stages.amp]
type = "inverting"
part = "bipolar-lownoise"
from = "osc"
r_in = "10k"
r_fb = "10k"

[outputs.out]
from = "amp"
"#,
    )
    .unwrap();
    let plots = dir.path().join("plots");
    let out = railsong(&[
        "measure",
        patch.to_str().unwrap(),
        "--level-sweep",
        "osc=2Vpk..16Vpk",
        "--steps",
        "5",
        "--plots",
        "--plots-dir",
        plots.to_str().unwrap(),
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let svg = std::fs::read_to_string(plots.join("out-level-sweep.svg")).unwrap();
    assert!(svg.contains("class=\"crossing"), "crossings marked");
    assert!(svg.contains("THD (%)"));
}
