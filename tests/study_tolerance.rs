//! Tolerance (Monte Carlo) studies: closed-form channel gains and seeded, thread-count
//! independent runs.

use railsong::study::length::StudyLength;
use std::path::Path;

use railsong::analysis::Settings;
use railsong::model::StageKind;
use railsong::study::tolerance::{channel_gains, perturb, run_seed, study, Tolerances};

/// A four-input summer of equal 10k resistors (feedback 10k) on +/-12 V.
const PATCH: &str = r#"
[patch]
rate = "48 kHz"
length = "0.02 s"
oversample = 1
seed = 11

[rails]
pos = "12 V"
neg = "-12 V"

[sources.a]
wave = "sine"
freq = "1 kHz"
amp = "1 Vpk"

[stages.mix]
type = "inverting-sum"
part = "jfet-general"
inputs = [
  { from = "a", r = "10k" },
  { from = "a", r = "10k" },
  { from = "a", r = "10k" },
  { from = "a", r = "10k" },
]
feedback = { r = "10k" }

[outputs.out]
from = "mix"
series = "1k"
load = "100k"
"#;

fn patch() -> railsong::model::Patch {
    railsong::patch::parse_str(PATCH, "tol.toml", Path::new("."), &[]).unwrap()
}

const ONE_PERCENT: Tolerances = Tolerances {
    resistor: 0.01,
    capacitor: 0.01,
};

// Textbook summer gain per input, G_i = -Rf / Ri (Sedra & Smith), evaluated on the perturbed
// values; each value stays within its 1 % band.
#[test]
fn channel_gain_is_the_closed_form_of_the_perturbed_values() {
    let p0 = patch();
    let p = perturb(&p0, &ONE_PERCENT, run_seed(5, 3));
    let StageKind::InvertingSum {
        inputs, feedback, ..
    } = &p.stages[0].kind
    else {
        panic!("summer expected")
    };
    let g = channel_gains(&p);
    assert_eq!(g.len(), 4);
    for (c, i) in g.iter().zip(inputs) {
        assert_eq!(c.gain, -feedback.r / i.r);
        assert!((i.r / 10e3 - 1.0).abs() <= 0.01);
    }
    assert!((feedback.r / 10e3 - 1.0).abs() <= 0.01);
    assert!(((p.outputs[0].series) / 1e3 - 1.0).abs() <= 0.01);
    assert_ne!(feedback.r, 10e3, "the value must actually move");
}

// First-order analysis: G = Rf/Ri with both within 1 % moves by at most about +/-2 %; the
// exact worst case is 1.01/0.99 - 1 = 2.02 %. With 300 uniform runs the spread must also
// reach well past 1 % (else the perturbation is not doing anything).
#[test]
fn equal_resistor_summer_spread_within_two_percent() {
    let rep = study(
        &patch(),
        &ONE_PERCENT,
        300,
        42,
        &Settings::default(),
        StudyLength::default(),
        &|| {},
    )
    .unwrap();
    let exact = (1.0 + 0.01) / (1.0 - 0.01) - 1.0;
    let first_order = 0.02;
    assert_eq!(rep.channels.len(), 4);
    let mut widest: f64 = 0.0;
    for c in &rep.channels {
        let s = c.deviation_percent.unwrap();
        assert!(s.min >= -100.0 * exact && s.max <= 100.0 * exact, "{s:?}");
        assert!(
            s.p5 >= -100.0 * first_order && s.p95 <= 100.0 * first_order,
            "{s:?}"
        );
        widest = widest.max(s.max - s.min);
        assert!(s.median.abs() < 0.5, "{s:?}");
    }
    assert!(widest > 2.0, "spread only {widest} %");
    // mismatch between channels is at most the ratio of two channel gains: two input
    // resistors at opposite ends, 20 log10(1.01/0.99)
    let m = rep.mismatch[0].mismatch_db.unwrap();
    assert!(m.max <= 20.0 * (1.01f64 / 0.99).log10() + 1e-12 && m.min >= 0.0);
    // output gain over nominal: the whole path moves by about the channel spread
    let g = rep.outputs[0].gain_db.unwrap();
    assert!(
        g.max < 20.0 * (1.0 + 2.0 * exact).log10() && g.min > -20.0 * (1.0 + 2.0 * exact).log10()
    );
    assert!(rep.worst_run.is_some());
}

// Seeded runs: the same seed gives identical numbers whatever the number of threads.
#[test]
fn same_seed_same_numbers_on_any_thread_count() {
    let p = patch();
    let go = |threads: usize| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| {
                study(
                    &p,
                    &ONE_PERCENT,
                    24,
                    9,
                    &Settings::default(),
                    StudyLength::default(),
                    &|| {},
                )
                .unwrap()
            })
    };
    let one = go(1);
    let three = go(3);
    assert_eq!(one, three);
    let other = rayon::ThreadPoolBuilder::new()
        .num_threads(2)
        .build()
        .unwrap()
        .install(|| {
            study(
                &p,
                &ONE_PERCENT,
                24,
                10,
                &Settings::default(),
                StudyLength::default(),
                &|| {},
            )
            .unwrap()
        });
    assert_ne!(one.runs[0].channels, other.runs[0].channels);
}

fn rms_of_wav(path: &Path) -> f64 {
    let mut r = hound::WavReader::open(path).unwrap();
    let x: Vec<f64> = r.samples::<f32>().map(|s| s.unwrap() as f64).collect();
    (x.iter().map(|v| v * v).sum::<f64>() / x.len() as f64).sqrt()
}

// End to end: the command line printed for the worst run renders exactly that run. Its file's
// RMS over the nominal render's is the gain the study reported for it (same seed, same
// perturbation; both files 32-bit float, so within float rounding).
#[test]
fn render_run_reproduces_the_reported_run() {
    use std::process::Command;
    let bin = env!("CARGO_BIN_EXE_railsong");
    let dir = tempfile::tempdir().unwrap();
    let patch = dir.path().join("tol.toml");
    std::fs::write(&patch, PATCH.replace("0.02 s", "0.1 s")).unwrap();
    let run = |args: &[&str]| {
        let o = Command::new(bin).args(args).output().unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        o.stdout
    };
    let p = patch.to_str().unwrap();
    let a = run(&[
        "tolerance",
        p,
        "--runs",
        "12",
        "--tol",
        "1%",
        "--seed",
        "77",
        "--json",
    ]);
    let b = run(&[
        "tolerance",
        p,
        "--runs",
        "12",
        "--tol",
        "1%",
        "--seed",
        "77",
        "--json",
    ]);
    assert_eq!(a, b, "same seed, same numbers");
    let j: serde_json::Value = serde_json::from_slice(&a).unwrap();
    let worst = j["worst_run"].as_u64().unwrap() as usize;
    let gain_db = j["runs"][worst - 1]["outputs"][0]["gain_db"]
        .as_f64()
        .unwrap();
    let out = dir.path().join("r");
    let o = out.to_str().unwrap();
    run(&["render", p, "--depth", "float", "--out", o]);
    let w = worst.to_string();
    run(&[
        "tolerance",
        p,
        "--tol",
        "1%",
        "--seed",
        "77",
        "--render-run",
        &w,
        "--depth",
        "float",
        "--out",
        o,
    ]);
    let g = 20.0
        * (rms_of_wav(&out.join(format!("out-run{worst}.wav"))) / rms_of_wav(&out.join("out.wav")))
            .log10();
    assert!((g - gain_db).abs() < 1e-4, "{g} vs {gain_db}");
    assert!(gain_db.abs() > 1e-3, "the worst run should move the gain");
}

// Per-stage tolerance keys: a stage marked 0 % keeps its nominal values in every run, the
// others move within the study's tolerance; `[patch] tolerance` is read as the default.
#[test]
fn per_stage_tolerance_overrides_the_study_default() {
    let text = r#"
[patch]
tolerance = "2%"
cap_tolerance = "10%"
[rails]
pos = "12 V"
neg = "-12 V"
[sources.a]
wave = "sine"
freq = "1 kHz"
amp = "1 Vpk"
[stages.precise]
type = "inverting"
part = "ideal"
from = "a"
r_in = "10k"
r_fb = "10k"
tolerance = "0%"
[stages.loose]
type = "inverting"
part = "ideal"
from = "precise"
r_in = "10k"
r_fb = "10k"
[outputs.out]
from = "loose"
"#;
    let p = railsong::patch::parse_str(text, "t.toml", std::path::Path::new("."), &[]).unwrap();
    assert_eq!(p.tolerances.resistor, Some(0.02));
    assert_eq!(p.tolerances.capacitor, Some(0.10));
    let tol = railsong::study::tolerance::Tolerances {
        resistor: 0.05,
        capacitor: 0.05,
    };
    let r_in = |p: &railsong::model::Patch, i: usize| match &p.stages[i].kind {
        railsong::model::StageKind::InvertingSum { inputs, .. } => inputs[0].r,
        _ => unreachable!(),
    };
    let mut moved = 0;
    for run in 1..=20 {
        let q = railsong::study::tolerance::perturb(&p, &tol, run);
        assert_eq!(r_in(&q, 0), 10e3, "the 0 % stage never moves");
        let d = (r_in(&q, 1) / 10e3 - 1.0).abs();
        assert!(d <= 0.05 + 1e-12);
        if d > 0.0 {
            moved += 1;
        }
    }
    assert!(moved > 15);
    // out of range
    let bad = text.replace("tolerance = \"0%\"", "tolerance = \"80%\"");
    let e = railsong::patch::parse_str(&bad, "t.toml", std::path::Path::new("."), &[]).unwrap_err();
    assert!(e.to_string().contains("stages.precise.tolerance"), "{e}");
}
