//! Band-limited corrections of the engine's nonlinear events other than the output clamp
//! (issue 16): slew corners, reversal edges, diode knees. Every figure is a coherent capture
//! of the patch's own stages (`railsong::alias::estimate`: tone on an odd bin of a
//! power-of-two capture, so every in-band bin off the harmonics is alias; common practice of
//! coherent testing, IEEE Std 1241 discusses coherent sampling), in band 20 Hz - 20 kHz at
//! 48 kHz.
use std::path::Path;

use railsong::alias;
use railsong::model::Patch;

fn load(text: &str, sets: &[String]) -> Patch {
    railsong::patch::parse_str(text, "test.toml", Path::new("."), sets).expect("patch")
}

fn alias_dbc(text: &str, k: usize, extra: &[&str]) -> f64 {
    let mut sets = vec![format!("patch.oversample={k}")];
    sets.extend(extra.iter().map(|s| s.to_string()));
    let p = load(text, &sets);
    let est = alias::estimate(&p, None).expect("estimate");
    est[0].1.dbc.expect("figure")
}

/// [`alias_dbc`] at K = 4 and K = 8.
fn alias_k4_k8(text: &str, extra: &[&str]) -> (f64, f64) {
    (alias_dbc(text, 4, extra), alias_dbc(text, 8, extra))
}

/// A slow part (single-supply class, slew rate lowered to 120 mV/us) as a follower on
/// +/-12 V, 10 kHz at 6 V peak: the tone's largest slope, `2 pi f A` = 0.377 V/us, is 3.1
/// times the slew rate, so the output is a triangle whose corners fall anywhere between
/// internal samples.
const SLEWER: &str = r#"
[patch]
noise = false
length = "0.3 s"

[rails]
pos = "12 V"
neg = "-12 V"

[parts.slow]
based_on = "single-supply"
slew = "0.12 V/us"

[sources.osc]
wave = "sine"
freq = "10 kHz"
amp = "6 Vpk"

[stages.buf]
type = "follower"
part = "slow"
from = "osc"

[outputs.out]
from = "buf"
"#;

/// The first 0.1 s of a patch's first output, with the band-limited corrections on or off.
fn render_0s1(p: &Patch, antialias: bool) -> Vec<f64> {
    let mut plan = railsong::engine::compile(p).expect("compiles");
    plan.antialias = antialias;
    let mut eng = railsong::engine::Engine::new(&plan);
    let mut out = vec![0.0; 4800];
    eng.process(&mut [out.as_mut_slice()]);
    out
}

fn amp(a: &str) -> String {
    format!("sources.osc.amp={a}")
}

// Slew corners (the issue's case: a slow part asked for 3.1 times its slew rate, every
// corner somewhere between internal samples; the issue asks for -70 dBc at K = 4). Before
// the stiff slew model and its band-limited corners the engine read -14.5 dBc at K = 4
// (engine docs' table); with the quadratic target through the last three samples of the
// input -56.7 dBc at K = 4, -77.7 at 8, -90.6 at 16; with the cubic through four -70.6,
// -99.6, -118.9. Measured now (the quartic through five): -85.9 dBc at K = 4, -118.2 at 8,
// -128.3 at 16 (asserted with margin).
#[test]
fn slew_corners_are_band_limited() {
    let a = amp("6 Vpk");
    let (k4, k8) = alias_k4_k8(SLEWER, &[&a]);
    let k16 = alias_dbc(SLEWER, 16, &[&a]);
    println!("slew corners 3.1x SR: K 4 {k4:.1}, K 8 {k8:.1}, K 16 {k16:.1} dBc");
    assert!(k4 < -84.0, "{k4}");
    assert!(k8 < k4 - 25.0 && k16 < k8 - 6.0, "{k4} {k8} {k16}");
}

// A stage that never slews is left alone: the same follower at 1.5 V peak (largest slope
// 0.094 V/us, under the slew rate), the tone faded in over 2 ms (an abrupt start is a corner
// of the input that the local model of the target reads as steeper than it is), renders bit
// for bit the same samples with the corrections on and off, and the steady tone reads only
// the arithmetic floor (an LTI system maps a sinusoid to a sinusoid; textbook).
#[test]
fn a_stage_that_never_slews_is_untouched() {
    let p = load(
        SLEWER,
        &[
            amp("1.5 Vpk"),
            "sources.osc.attack=2 ms".into(),
            "sources.osc.decay=3600 s".into(),
        ],
    );
    let (on, off) = (render_0s1(&p, true), render_0s1(&p, false));
    let diff: Vec<(usize, f64)> = on
        .iter()
        .zip(&off)
        .enumerate()
        .filter(|(_, (a, b))| a != b)
        .map(|(i, (a, b))| (i, a - b))
        .collect();
    assert!(
        diff.is_empty(),
        "{} differ, first {:?}",
        diff.len(),
        &diff[..diff.len().min(5)]
    );
    let d = alias_dbc(SLEWER, 4, &[&amp("1.5 Vpk")]);
    assert!(d < -130.0, "{d}");
}

/// The shape of `patches/net-diode-clipper.toml` without its pot: an op-amp with gain 10
/// (90k over 10k) into 4k7 and a pair of small-signal silicon diodes to ground. The diodes'
/// knee is about 0.6 V (the profile's 0.55 to 0.7 V at 1 mA, from memory); a 0.6 V peak input
/// drives the op-amp's output to 6 V peak, 20 dB past it.
const DIODE_CLIPPER: &str = r#"
[patch]
noise = false
length = "0.3 s"

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "1 kHz"
amp = "0.6 Vpk"

[stages.drive]
type = "network"
amps = [{ part = "jfet-general", plus = "osc", minus = "fb", out = "y" }]
parts = [
  { r = "90k", ends = ["y", "fb"] },
  { r = "10k", ends = ["fb", "gnd"] },
  { r = "4k7", ends = ["y", "x"] },
  { diode = "silicon-signal", ends = ["x", "gnd"] },
  { diode = "silicon-signal", ends = ["gnd", "x"] },
]
out = "x"

[outputs.out]
from = "drive"
"#;

// Diode knees (issue 16, item 3: a diode clipper driven 20 dB past its knee, <= -80 dBc at
// K = 4). The output is the diodes' node, a group read from its table: its junctions' part
// is replaced by its mean over one sample of the input's path (first-order antiderivative
// anti-aliasing, `engine::knee`). Before that correction: 1 kHz -89.3 dBc at K = 4, -141.5
// at K = 8; 5 kHz -47.5 at K = 4, -59.8 at K = 8; 9 kHz -33.1 at K = 4. With it (measured):
// 1 kHz -111.4 at K = 4, -150.4 at K = 8; 5 kHz -70.7 and -87.9; 9 kHz -60.2 and -85.2
// (asserted with margin). 220 Hz reads the floor either way (-185 dBc).
#[test]
fn diode_knees_are_band_limited() {
    let (k4, k8) = alias_k4_k8(DIODE_CLIPPER, &[]);
    let (f5, f5k8) = alias_k4_k8(DIODE_CLIPPER, &["sources.osc.freq=5 kHz"]);
    println!(
        "diode clipper 20 dB past the knee, 1 kHz: K 4 {k4:.1}, K 8 {k8:.1} dBc; 5 kHz K 4 {f5:.1}, K 8 {f5k8:.1}"
    );
    assert!(k4 < -100.0, "{k4}");
    assert!(k8 < k4 - 20.0, "{k4} {k8}");
    assert!(f5 < -65.0, "{f5}");
    assert!(f5k8 < f5 - 10.0, "{f5} {f5k8}");
}

/// Amplitude of the DFT bin `k` of `x`, relative to a full-scale sine.
fn bin_amp(x: &[f64], k: usize) -> f64 {
    let n = x.len() as f64;
    let (mut re, mut im) = (0.0, 0.0);
    for (i, &v) in x.iter().enumerate() {
        let ph = 2.0 * std::f64::consts::PI * (k as f64) * (i as f64) / n;
        re += v * ph.cos();
        im -= v * ph.sin();
    }
    2.0 * (re * re + im * im).sqrt() / n
}

// The knees' correction changes what folds back, not the clipped tone: the fundamental and
// the third harmonic of the 1 kHz case with the correction on and off agree within 0.01 dB
// (its one-sample mean is -0.0004 dB at 3 kHz at 192 kHz: sinc(3/192)); and a clipper that
// never reaches its knee renders the same samples with the correction on and off (red LEDs,
// whose knee is near 1.6 V, from memory: their "off" model holds to about 0.7 V here, so a
// 0.5 V peak never leaves it; small silicon diodes behind 4k7 never have an "off" region:
// their threshold, where the current stays within the fast path's 10 nA, is below 0 V).
#[test]
fn diode_knee_correction_keeps_the_tone_and_leaves_a_quiet_clipper_alone() {
    let p = load(DIODE_CLIPPER, &[]);
    let (on, off) = (render_0s1(&p, true), render_0s1(&p, false));
    // the last 50 ms: 50 cycles of 1 kHz in 2400 samples, coherent
    let (a, b) = (&on[2400..], &off[2400..]);
    for (k, what) in [(50, "fundamental"), (150, "H3")] {
        let (x, y) = (bin_amp(a, k), bin_amp(b, k));
        let db = 20.0 * (x / y).log10();
        assert!(db.abs() < 0.01, "{what}: {x} against {y} ({db:+.4} dB)");
    }
    assert!(
        bin_amp(a, 150) > 0.01 * bin_amp(a, 50),
        "the tone is clipped"
    );
    quiet_leds_are_untouched(DIODE_CLIPPER);
}

/// `clipper` with red LEDs for its diodes: at 0.05 V peak in (0.5 V at the LEDs) the
/// corrections leave every sample as solved; at 0.3 V peak (3 V: clipped) they are taken.
fn quiet_leds_are_untouched(clipper: &str) {
    let leds = clipper.replace("silicon-signal", "led-red");
    for (level, quiet) in [("0.05 Vpk", true), ("0.3 Vpk", false)] {
        let p = load(&leds, &[amp(level)]);
        let (on, off) = (render_0s1(&p, true), render_0s1(&p, false));
        let differ = on.iter().zip(&off).filter(|(x, y)| x != y).count();
        assert_eq!(differ == 0, quiet, "{level}: {differ} samples differ");
    }
}

/// A feedback-diode clipper: an inverting stage of gain -10 (10k in, 100k feedback) with two
/// silicon signal diodes anti-parallel across its 100k, so the diodes sit in the op-amp's
/// loop; 1 V peak in, so the stage would give 10 V against knees near 0.5 V, about 26 dB
/// past them.
const FEEDBACK_CLIPPER: &str = r#"
[patch]
noise = false
length = "0.3 s"

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "1 kHz"
amp = "1 Vpk"

[stages.clip]
type = "network"
amps = [{ part = "jfet-general", plus = "gnd", minus = "m", out = "y" }]
parts = [
  { r = "10k", ends = ["osc", "m"] },
  { r = "100k", ends = ["m", "y"] },
  { diode = "silicon-signal", ends = ["m", "y"] },
  { diode = "silicon-signal", ends = ["y", "m"] },
]
out = "y"

[outputs.out]
from = "clip"
"#;

// Diode knees in an op-amp's loop (issue 16, items 1 and 3): the group's static map is
// tabulated and its mean over one sample of the path of the input the output implies is
// taken (`engine::loopmap`). Before (the knees taken on the internal grid): 1 kHz -69.5 dBc
// at K = 4, -110 at K = 8; 5 kHz -34.8 and -55. With it (measured): 1 kHz -90.2 and -124.4;
// 5 kHz -56.2 and -77.2 (asserted with margin; the issue asks -80 dBc at K = 4 for a clipper
// driven 20 dB past its knee, as the passive clipper above is tested, at 1 kHz).
#[test]
fn diode_knees_in_an_op_amp_loop_are_band_limited() {
    let (k4, k8) = alias_k4_k8(FEEDBACK_CLIPPER, &[]);
    let (f5, f5k8) = alias_k4_k8(FEEDBACK_CLIPPER, &["sources.osc.freq=5 kHz"]);
    println!(
        "feedback-diode clipper, 1 kHz: K 4 {k4:.1}, K 8 {k8:.1} dBc; 5 kHz K 4 {f5:.1}, K 8 {f5k8:.1}"
    );
    assert!(k4 < -85.0, "{k4}");
    assert!(k8 < k4 - 20.0, "{k4} {k8}");
    assert!(f5 < -50.0, "{f5}");
    assert!(f5k8 < f5 - 10.0, "{f5} {f5k8}");
}

// As for the passive clipper: the correction leaves the clipped tone as it was (third
// harmonic with it on and off within 0.01 dB, the fundamental moved by the closed-form droop
// of the one-sample mean on the map's bend, which in a gain-10 stage holds the stage's own
// 10 V where the diodes conduct), and a feedback clipper whose diodes
// never leave their "off" model (red LEDs, 0.05 V peak in: 0.5 V across them) renders the
// same samples with the correction on and off, while 0.3 V peak (3 V, past the LEDs' knee
// near 1.6 V, from memory) is corrected.
#[test]
fn loop_knee_correction_keeps_the_tone_and_leaves_a_quiet_clipper_alone() {
    let p = load(FEEDBACK_CLIPPER, &[]);
    let (on, off) = (render_0s1(&p, true), render_0s1(&p, false));
    let (a, b) = (&on[2400..], &off[2400..]);
    // H3 within 0.01 dB; the fundamental moves by the mean's droop on the bend (see above):
    // the path's midpoint sits (w h)^2 / 8 of the input toward zero (cosine of half a step;
    // the four-point midpoint interpolation is exact to that order), times the bend's slope
    // (10, the stage's gain, where the diodes conduct: nearly the whole cycle), on an input
    // of 1 V, in phase with the inverted output's fundamental: +0.0189 dB at most (+0.0183
    // measured). Far below what a bench could resolve on a clipper's level.
    let (x, y) = (bin_amp(a, 150), bin_amp(b, 150));
    let db = 20.0 * (x / y).log10();
    assert!(db.abs() < 0.01, "H3: {x} against {y} ({db:+.4} dB)");
    let wh = 2.0 * std::f64::consts::PI * 1000.0 / 192_000.0;
    let (x, y) = (bin_amp(a, 50), bin_amp(b, 50));
    let db = 20.0 * (x / y).log10();
    let bound = 20.0 * (1.0 + 10.0 * 1.0 * wh * wh / 8.0 / y).log10();
    assert!(
        db > 0.5 * bound && db < 1.02 * bound,
        "fundamental: {x} against {y} ({db:+.4} dB, closed form {bound:+.4} dB)"
    );
    assert!(
        bin_amp(a, 150) > 0.01 * bin_amp(a, 50),
        "the tone is clipped"
    );
    quiet_leds_are_untouched(FEEDBACK_CLIPPER);
}

/// A JFET-input follower (input range ending 4 V above the negative rail, common practice
/// for the class; the profile's `cm_low`) on +/-12 V, 1 kHz at 10 V peak: the input dips 2 V
/// below the range every cycle, and the output jumps to the positive rail and back.
const REVERSER: &str = r#"
[patch]
noise = false
length = "0.3 s"

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "1 kHz"
amp = "10 Vpk"

[stages.follow]
type = "follower"
part = "jfet-general"
from = "osc"

[outputs.out]
from = "follow"
"#;

// Reversal edges (issue 16, item 2): the step in which the input leaves its range ramps at
// the slew rate from the instant V+ crosses the range's end (between samples), held at the
// rail; the step in which it comes back ramps toward the target from that instant; every
// slope corner (the ramp's start, the swing, the return) gets its band-limited correction.
// Before: -20.0 dBc at K = 4, -26.1 at 8, -34.1 at 16 (engine docs' table; the reversed
// branch took one explicit step on the grid). Measured now, 10 V peak (2 V below the range)
// and 9 V peak: -69.7 / -73.8 dBc at K = 4, -73.6 / -78.3 at 8, -77.9 / -82.8 at 16
// (asserted with margin; 10 V peak: -31.9 at K = 1, -57.9 at K = 2). Without the
// corrections (`Plan::antialias` off) the exact edges alone read -21.4 dBc at K = 4.
#[test]
fn reversal_edges_are_band_limited_and_improve_with_k() {
    for a in ["10 Vpk", "9 Vpk"] {
        let s = format!("sources.osc.amp={a}");
        let k: Vec<f64> = [4, 8, 16]
            .iter()
            .map(|&k| alias_dbc(REVERSER, k, &[&s]))
            .collect();
        println!("reversal {a}: K 4, 8, 16: {k:.1?} dBc");
        assert!(k[0] < -65.0, "{a}: {k:?}");
        assert!(k[1] < k[0] - 2.0 && k[2] < k[1] - 2.0, "{a}: {k:?}");
    }
}

/// The reversing part as a non-inverting stage of gain 3 (1 + 20k/10k, textbook): 10 V peak
/// in, so the output sits at the negative rail when V+ leaves the input range and the
/// reversal throws it from rail to rail; the way back throws it from rail to rail again.
fn reversing_gain3(network: bool) -> String {
    let stage = if network {
        "[stages.g]\ntype = \"network\"\namps = [{ part = \"jfet-general\", plus = \"osc\", minus = \"fb\", out = \"y\" }]\n\
parts = [{ r = \"20k\", ends = [\"y\", \"fb\"] }, { r = \"10k\", ends = [\"fb\", \"gnd\"] }]\nout = \"y\"\n"
    } else {
        "[stages.g]\ntype = \"non-inverting\"\npart = \"jfet-general\"\nfrom = \"osc\"\nr_fb = \"20k\"\nr_g = \"10k\"\n"
    };
    format!(
        "{}{stage}[outputs.out]\nfrom = \"g\"\n",
        sources_of(REVERSER)
    )
}

// Reversal edges from a rail (issue 16): a reversal that starts with the op-amp's state past
// its rail has its output corners where the slew-rate ramp brings the state back inside the
// swing and where it reaches the other end, and a return that ramps into the other rail
// (within its step or a later one: the return goes on while the ramp does) has its corner
// there; a step whose ramp has not left the rail by its end keeps its drive at the rail (it
// was thrown a whole ramp ahead, to the far rail, a sample early). In the samples around an
// edge (the static clamp of the drive plus the corners' corrections) a corner of the state
// past the rail has no correction: the return ramps on past the other rail and meets its
// target there, where the output is flat. Before the first of these: -30.1 dBc at K = 4,
// -38.3 at 8; before the last two (the hidden corner corrected, the return's corner left to
// the clamp when it fell two steps on): -51.1, -53.2 and -69.1 at 4, 8 and 16. Measured
// now (stage and network alike): -81.7, -86.0 and -88.7 dBc.
#[test]
fn reversal_edges_from_rail_to_rail() {
    for network in [false, true] {
        let text = reversing_gain3(network);
        let k: Vec<f64> = [4, 8, 16]
            .iter()
            .map(|&k| alias_dbc(&text, k, &[]))
            .collect();
        println!("reversing gain-3 stage (network {network}): K 4, 8, 16: {k:.1?} dBc");
        assert!(k[0] < -75.0, "{k:?}");
        assert!(k[1] < k[0] - 2.0 && k[2] < k[1] - 1.0, "{k:?}");
    }
}

/// A slow part (the slew-corner case's) inside a two-op-amp loop: non-inverting gain 2 whose
/// feedback is taken after a fast follower (a composite amplifier), so the group is solved
/// by the circuit engine's generic nonlinear step, not a stage kernel. 10 kHz at 3 V peak
/// in, 6 V peak out: 3.1 times the slow part's slew rate, as in `SLEWER`.
fn composite(out: &str) -> String {
    format!(
        r#"{}[stages.comp]
type = "network"
amps = [
  {{ part = "slow", plus = "osc", minus = "f", out = "y" }},
  {{ part = "jfet-general", plus = "y", minus = "z", out = "z" }},
]
parts = [{{ r = "10k", ends = ["z", "f"] }}, {{ r = "10k", ends = ["f", "gnd"] }}]
out = "{out}"

[outputs.out]
from = "comp"
"#,
        sources_of(SLEWER).replace("amp = \"6 Vpk\"", "amp = \"3 Vpk\"")
    )
}

/// A patch's text before its stages (settings, rails, parts, sources).
fn sources_of(text: &str) -> &str {
    &text[..text.find("[stages.").expect("a stage")]
}

// Slew corners of an op-amp in a multi-op-amp group (issue 16, item 1, in the network
// engine's per-op-amp model): the generic step takes the same stiff slew model as the stage
// engine (the target's newest sample read from the group's solution, the op-amp held at
// the model's end value), and the corners reach the output band-limited, from the output's
// own op-amp or, through the follower, scaled by the follower's sensitivity to it. Before
// (the effective slew factor and a per-step bound, corners on the grid): -15.0 dBc at K =
// 4, -25.5 at 8 for both outputs; the model alone without the corrections -48.5 at K = 4.
// Measured now: output at the slow part -73.6 dBc at K = 4, -81.5 at 8; after the follower
// -73.4, -80.9 (the issue asks -70 at K = 4; asserted with margin).
#[test]
fn slew_corners_in_a_multi_op_amp_loop_are_band_limited() {
    for out in ["y", "z"] {
        let text = composite(out);
        let (k4, k8) = alias_k4_k8(&text, &[]);
        println!("composite, output {out}: K 4 {k4:.1}, K 8 {k8:.1} dBc");
        assert!(k4 < -72.0, "{out}: {k4}");
        assert!(k8 < k4 - 5.0, "{out}: {k4} {k8}");
    }
}

// The same loop below its slew rate (0.8 V peak in, 1.6 V peak out: largest slope
// 0.10 V/us against 0.12), the tone faded in: the group takes its nonlinear step (the
// input is past the fast path's bound) but no step holds a corner, and the samples are
// bit for bit those without the corrections.
#[test]
fn a_multi_op_amp_loop_that_never_slews_is_untouched() {
    let sets = [
        "sources.osc.amp=0.8 Vpk".to_string(),
        "sources.osc.attack=2 ms".to_string(),
        "sources.osc.decay=3600 s".to_string(),
    ];
    let p = load(&composite("y"), &sets);
    let (on, off) = (render_0s1(&p, true), render_0s1(&p, false));
    let differ = on.iter().zip(&off).filter(|(a, b)| a != b).count();
    assert_eq!(differ, 0, "{differ} samples differ");
    assert!(on[2400..].iter().any(|x| x.abs() > 1.0), "no tone");
}

/// A JFET-input follower (the `REVERSER` case, 1 kHz at 10 V peak, 2 V below its input
/// range) whose feedback is taken after a buffer: the group is solved by the generic step.
fn reversing_composite(buffer: &str) -> String {
    format!(
        r#"{}[stages.comp]
type = "network"
amps = [
  {{ part = "jfet-general", plus = "osc", minus = "z", out = "y" }},
  {{ part = "{buffer}", plus = "y", minus = "z", out = "z" }},
]
parts = [{{ r = "100k", ends = ["z", "gnd"] }}]
out = "y"

[outputs.out]
from = "comp"
"#,
        sources_of(REVERSER)
    )
}

// Reversal edges of an op-amp in a multi-op-amp group (issue 16, item 1, in the network
// engine's per-op-amp model): the stage engine's split steps (`engine::edges::
// reversal_step`), the edge decided once per step from the settled solution, its target
// read as if the output were linear and, for the edge itself, extrapolated from the last
// four samples (the edge's own jump drives the buffer within the step). The corners of the
// two steps after an edge go to the same override as the edge's (the static clamp of the
// drive plus the corrections), as in the stage engine: added to the drive, the part that
// falls on samples held past the rail was lost in the clamp. Before the edges: -18.5 /
// -18.6 dBc at K = 4 (ideal / slewing bipolar buffer), -27.6 / -22.0 at K = 8; before the
// override: -48.2 / -48.4 at K = 4, -57.6 / -56.7 at K = 8. Measured now: ideal buffer
// -69.0 at K = 4, -73.5 at 8 (the same follower as a stage: -69.7, -73.6); bipolar buffer
// -48.5, -56.0, and worse at K = 16 (-40.8; -35.1 before the edge step's target in the
// history was the extrapolated one: DEVELOPERS.md, "Known gaps", the buffer's own slewing
// after the edge).
#[test]
fn reversal_edges_in_a_multi_op_amp_loop() {
    for buffer in ["ideal", "bipolar-lownoise"] {
        let text = reversing_composite(buffer);
        let (k4, k8) = alias_k4_k8(&text, &[]);
        println!("reversing composite, {buffer} buffer: K 4 {k4:.1}, K 8 {k8:.1} dBc");
        let bound = if buffer == "ideal" { -66.0 } else { -45.0 };
        assert!(k4 < bound, "{buffer}: {k4}");
        assert!(k8 < k4 - 3.0, "{buffer}: {k4} {k8}");
    }
}

// A dip below the input range shorter than a step (issue 16): the passive-averaging
// summer's `sag` variant (`patches/net-averaging-summer.toml`: three drones averaged at
// -8 V, the JFET-input part's range ending there) grazes the range's end, and a dip between
// two samples inside the range was not seen at all at K = 4 while finer steps (whose
// samples fall in it) threw the output toward the other rail for that moment. The step now
// finds the dip on the margin's quadratic through three samples (`engine::edges::
// dip_roots`) and takes the reversal and the return within the step
// (`SlewStep::dip`); a return whose reversed ramp starts from a state still past the rail
// has the output's corner where that ramp leaves the rail (it had none: each such pulse's
// correction was a corner short). The estimate (the difference method: the patch against
// itself stepping 4 times finer) read -48.2 dB at K = 4 before the dips, -60.5 dB with
// them, -79.7 dB now (-27.7 before the returns' hidden corner was dropped).
#[test]
fn a_dip_shorter_than_a_step_is_not_missed() {
    let text = std::fs::read_to_string("patches/net-averaging-summer.toml").expect("patch");
    let sag = [
        "sources.root.offset=-8 V",
        "sources.fifth.offset=-8 V",
        "sources.octave.offset=-8 V",
    ];
    let k4 = alias_dbc(&text, 4, &sag);
    println!("averaging summer, sag: K 4 {k4:.1} dB");
    assert!(k4 < -75.0, "{k4}");
}
