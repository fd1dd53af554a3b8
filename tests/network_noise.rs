//! Rendered circuit noise of network stages that run on the circuit kernel, against the
//! analytic noise budget (railsong::budget: nodal analysis of every resistor's thermal
//! noise, each op-amp's en with its 1/f part and in, through the same circuit), and the
//! rules the stage kernel keeps: noise off renders no noise, the seed fixes the render.
mod engine_support;
use engine_support::*;
use railsong::analysis::{band_rms, Bandwidth, Settings};
use railsong::budget::budget;
use railsong::model::Patch;

const RATE: f64 = 48_000.0;

fn db(x: f64) -> f64 {
    20.0 * x.log10()
}

/// RMS of `y` over `lo .. hi` Hz (FFT band sum, as tests/engine_noise.rs measures it).
fn rms_in(y: &[f64], lo: f64, hi: f64) -> f64 {
    let s = Settings {
        bandwidth: Bandwidth::Band { lo, hi },
        max_capture: usize::MAX,
        ..Settings::default()
    };
    band_rms(y, RATE, &s).expect("band rms").rms_v
}

fn parse(text: &str) -> Patch {
    railsong::patch::parse_str(text, "test.toml", std::path::Path::new("."), &[])
        .expect("patch parses")
}

/// A state-variable filter (three op-amps in one group, about 1 kHz, Q = 2) with its input
/// at 0 V, read at its low-pass output.
const SVF: &str = r#"
[patch]
length = "3 s"
noise = true
seed = 7

[rails]
pos = "12 V"
neg = "-12 V"

[sources.mute]
wave = "dc"
level = "0 V"

[stages.svf]
type = "network"
amps = [
  { part = "jfet-general", plus = "q", minus = "s", out = "hp", name = "sum" },
  { part = "jfet-general", plus = "gnd", minus = "i1", out = "bp", name = "int1" },
  { part = "jfet-general", plus = "gnd", minus = "i2", out = "lp", name = "int2" },
]
parts = [
  { r = "10k", ends = ["mute", "s"] },
  { r = "10k", ends = ["lp", "s"] },
  { r = "10k", ends = ["s", "hp"] },
  { r = "50k", ends = ["bp", "q"] },
  { r = "10k", ends = ["q", "gnd"] },
  { r = "15k9", ends = ["hp", "i1"] },
  { c = "10n", ends = ["i1", "bp"] },
  { r = "15k9", ends = ["bp", "i2"] },
  { c = "10n", ends = ["i2", "lp"] },
]
out = "lp"

[outputs.low]
from = "svf"
"#;

/// A non-inverting gain-of-eleven stage whose + input is AC coupled (1 uF from the muted
/// source, 100k to ground): a capacitor in the + path, which the stage shape does not take.
const COUPLED: &str = r#"
[patch]
length = "3 s"
noise = true
seed = 7

[rails]
pos = "12 V"
neg = "-12 V"

[sources.mute]
wave = "dc"
level = "0 V"

[stages.amp]
type = "network"
amps = [{ part = "bipolar-lownoise", plus = "p", minus = "fb", out = "y" }]
parts = [
  { c = "1u", ends = ["mute", "p"] },
  { r = "100k", ends = ["p", "gnd"] },
  { r = "10k", ends = ["y", "fb"] },
  { r = "1k", ends = ["fb", "gnd"] },
]
out = "y"

[outputs.out]
from = "amp"
"#;

fn compare(text: &str, label: &str) {
    let p = parse(text);
    // the stage runs on the circuit kernel (a network plan), not the stage kernel
    let plan = railsong::engine::compile(&p).expect("compiles");
    assert_eq!(plan.networks.len(), 1, "{label}: not on the circuit kernel");
    assert!(plan.networks[0]
        .circuit
        .groups
        .iter()
        .any(|g| g.noise.is_some()));
    let y = &render(&p)[0];
    // skip the first 0.25 s (the noise starts from the noiseless rest state)
    let got = rms_in(&y[12_000..], 20.0, 20e3);
    let want = budget(&p, (20.0, 20e3))[0].total_rms;
    let err = db(got / want);
    println!("{label}: rendered {got:e} V vs budget {want:e} V: {err:+.3} dB");
    assert!(err.abs() < 0.2, "{label}: {err} dB");
}

#[test]
fn state_variable_filter_noise_matches_the_budget() {
    compare(SVF, "state-variable filter");
}

#[test]
fn coupled_non_inverting_noise_matches_the_budget() {
    compare(COUPLED, "AC-coupled non-inverting");
}

#[test]
fn network_noise_is_seeded_and_off_when_noise_is_off() {
    // Determinism is a design property (same seed, same render), checked bit for bit.
    let p = parse(SVF);
    let a = render(&p);
    assert_eq!(a, render(&p));
    let mut q = p.clone();
    q.seed = 8;
    assert_ne!(a, render(&q));
    // Noise off: the muted filter sits at its rest state, so its output is constant.
    let mut off = p.clone();
    off.noise = false;
    let d = &render(&off)[0];
    let (lo, hi) = d
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &x| {
            (l.min(x), h.max(x))
        });
    assert!(hi - lo < 1e-12, "{lo} .. {hi}");
    assert!(rms_in(&a[0][12_000..], 20.0, 20e3) > 1e-7);
}

#[test]
fn fast_path_and_nonlinear_step_agree_with_noise_on() {
    // The same noise draws enter the fast map and the nonlinear step (they are made before
    // the path decision): the two paths agree within the engine's 1 uV fast-path criterion
    // (engine module docs), with a tone through the filter.
    let text = SVF.replace(
        "wave = \"dc\"\nlevel = \"0 V\"",
        "wave = \"sine\"\nfreq = \"1 kHz\"\namp = \"1 Vpk\"",
    );
    let mut p = parse(&text);
    p.length = 0.2;
    let plan = railsong::engine::compile(&p).expect("compiles");
    let frames = p.frames();
    let out = |fast: bool| {
        let mut e = railsong::engine::Engine::new(&plan);
        e.set_fast_path(fast);
        let mut y = vec![0.0; frames];
        e.process(&mut [y.as_mut_slice()]);
        y
    };
    let (yf, ys) = (out(true), out(false));
    let worst = yf
        .iter()
        .zip(&ys)
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max);
    println!("fast vs nonlinear step with noise: {worst:e} V");
    assert!(worst < 1e-6, "{worst}");
    let mut q = p.clone();
    q.noise = false;
    let quiet = {
        let plan = railsong::engine::compile(&q).expect("compiles");
        let mut e = railsong::engine::Engine::new(&plan);
        let mut y = vec![0.0; frames];
        e.process(&mut [y.as_mut_slice()]);
        y
    };
    let diff = yf
        .iter()
        .zip(&quiet)
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max);
    assert!(diff > 1e-7, "{diff}");
}
