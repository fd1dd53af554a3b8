//! Large-signal checks: slew rate, full-power bandwidth, output swing, phase reversal.
mod engine_support;
use engine_support::*;
use proptest::prelude::*;
use railsong::engine::{compile, run, Engine, RunOptions};
use railsong::model::*;
use railsong::parts::builtin_names;

/// A slow follower part: SR = 0.1 V/us, GBW 1 MHz, no swing or input limits.
fn slow() -> railsong::parts::OpAmp {
    linear_part(1e6, 0.1e6)
}

/// Follower at K = 1 and a high base rate (no decimation filter, so slopes are seen raw).
/// The follower's samples with the band-limited corrections off (`Plan::antialias`): the
/// slope checks below are about the step itself; the corrections smooth each slew corner
/// over four samples with a kernel that has negative lobes, so within two samples of a corner
/// the band-limited output may pass SR by a few percent (tests/engine_edges.rs).
fn follower_out(freq: f64, vp: f64, rate: f64) -> Vec<f64> {
    let mut b = Pb::new(rate, 1, 0.01).rails(15.0, -15.0);
    let s = b.sine("in", freq, vp);
    let f = b.follower("buf", &slow(), s);
    b.out("out", f, 0.0, None);
    let mut plan = railsong::engine::compile(&b.p).expect("compiles");
    plan.antialias = false;
    let mut eng = railsong::engine::Engine::new(&plan);
    let mut out = vec![0.0; b.p.frames()];
    eng.process(&mut [out.as_mut_slice()]);
    out
}

fn max_slope(y: &[f64], rate: f64) -> f64 {
    y.windows(2)
        .map(|w| (w[1] - w[0]).abs() * rate)
        .fold(0.0, f64::max)
}

/// Residual rms after the fundamental fit, relative to the fundamental rms (a THD+N ratio).
fn distortion(y: &[f64], freq: f64, rate: f64) -> (f64, f64) {
    let skip = y.len() / 4;
    let (a, b, _, res) = fit(&y[skip..], skip, freq, rate);
    let amp = (a * a + b * b).sqrt();
    (res / (amp / 2f64.sqrt()), amp)
}

// Slew rate: an input whose peak slope 2 pi f Vp exceeds SR comes out with a maximum slope of
// SR (textbook definition of slew rate [S]); within 2 %.
#[test]
fn slew_limited_slope_is_sr() {
    let rate = 1_536_000.0;
    for &(f, vp) in &[(5000.0, 5.0), (10_000.0, 3.0)] {
        assert!(std::f64::consts::TAU * f * vp > 0.1e6);
        let y = follower_out(f, vp, rate);
        let s = max_slope(&y[y.len() / 4..], rate);
        assert!((s / 0.1e6 - 1.0).abs() < 0.02, "f {f}: max slope {s} V/s");
    }
}

// Full-power bandwidth f_p = SR / (2 pi Vp) [S] (5 V peak at 0.1 V/us: 3.18 kHz): below it the
// output is nearly undistorted, above it it is slew-limited (slope pinned at SR, distortion
// large).
#[test]
fn full_power_bandwidth() {
    let rate = 1_536_000.0;
    let vp = 5.0;
    let fp = 0.1e6 / (std::f64::consts::TAU * vp);
    let (d_half, a_half) = distortion(&follower_out(0.5 * fp, vp, rate), 0.5 * fp, rate);
    let (d_at, a_at) = distortion(&follower_out(fp, vp, rate), fp, rate);
    let y2 = follower_out(2.0 * fp, vp, rate);
    let (d_2, _) = distortion(&y2, 2.0 * fp, rate);
    println!("fp {fp}: d(fp/2) {d_half} a {a_half}; d(fp) {d_at} a {a_at}; d(2fp) {d_2}");
    assert!(d_half < 0.005, "at fp/2: {d_half}");
    assert!((a_half / vp - 1.0).abs() < 0.005);
    assert!(d_at < 0.01, "at fp: {d_at}");
    assert!(d_2 > 0.05, "at 2 fp: {d_2}");
    let s = max_slope(&y2[y2.len() / 4..], rate);
    assert!((s / 0.1e6 - 1.0).abs() < 0.02, "slope above fp {s}");
}

// Slew events: a slew-limited render reports slew time, a small signal reports none (slewing
// means |Vd| > Vov by the model's definition; for a follower at 5 kHz, 5 V peak, the input
// slope exceeds SR for the part of each period where |cos| > SR / (2 pi f Vp) [D]).
#[test]
fn slew_events_are_reported() {
    let ev = |vp: f64| {
        let mut b = Pb::new(48_000.0, 4, 0.02).rails(15.0, -15.0);
        let s = b.sine("in", 5000.0, vp);
        let f = b.follower("buf", &slow(), s);
        b.out("out", f, 0.0, None);
        run(&b.p, &RunOptions::default()).unwrap().events[0].clone()
    };
    let big = ev(5.0);
    // fraction of time with |cos| > r is (2/pi) acos(r) [D]; the output slews somewhat
    // longer (it must catch up), so the measured time is at least that fraction
    let r = 0.1e6 / (std::f64::consts::TAU * 5000.0 * 5.0);
    let min_frac = 2.0 / std::f64::consts::PI * r.acos();
    assert!(big.slew_s > 0.02 * min_frac, "{big:?} vs {min_frac}");
    let small = ev(0.5);
    assert_eq!(small.slew_s, 0.0, "{small:?}");
    assert_eq!(small.clip_s, 0.0);
}

// Phase reversal (common practice): JFET-input general-purpose profile on +/-12 V, follower.
// The input range stops 4 V above V- (-8 V): at -7.9 V the output follows, at -8.1 V the loop
// turns positive and the output goes to the positive side.
#[test]
fn phase_reversal_below_the_input_range() {
    let run_dc = |level: f64| {
        let mut b = Pb::new(48_000.0, 4, 0.01);
        let s = b.dc("in", level);
        let f = b.follower("buf", &part("jfet-general"), s);
        b.out("out", f, 0.0, None);
        let r = run(&b.p, &RunOptions::default()).unwrap();
        (r.outputs[0].samples.clone(), r.events[0].clone())
    };
    let (y, ev) = run_dc(-7.9);
    let last = y[y.len() - 1];
    // follower gain 1 with the profile's offset at V+ (textbook follower; offset from the
    // profile)
    let vos = part("jfet-general").vos;
    assert!((last - (-7.9 + vos)).abs() < 1e-3, "{last}");
    assert_eq!(ev.reversed_s, 0.0);
    let (y, ev) = run_dc(-8.1);
    let last = y[y.len() - 1];
    assert!(last > 5.0, "reversed output {last}");
    assert!(ev.reversed_s > 0.009 && ev.cm_out_s > 0.009, "{ev:?}");
}

// An input past the range of a part without reversal clips at the range edge: a follower
// with the bipolar profile (range `cm_low` inside the negative rail) at -11 V input stays at
// the range edge plus the profile's offset.
#[test]
fn input_range_clips_without_reversal() {
    let mut b = Pb::new(48_000.0, 4, 0.01);
    let s = b.dc("in", -11.0);
    let f = b.follower("buf", &part("bipolar-lownoise"), s);
    b.out("out", f, 0.0, None);
    let r = run(&b.p, &RunOptions::default()).unwrap();
    let last = *r.outputs[0].samples.last().unwrap();
    let p = part("bipolar-lownoise");
    let edge = -12.0 + p.cm_low.unwrap();
    assert!((last - (edge + p.vos)).abs() < 1e-3, "{last}");
    assert!(r.events[0].cm_out_s > 0.009);
}

// Output current limit [S: Ohm's law]: the profile's Isc into a 100 ohm load limits the
// swing to Isc * 100 ohm.
#[test]
fn current_limit_shrinks_the_swing() {
    let mut b = Pb::new(48_000.0, 4, 0.02);
    let s = b.sine("in", 1000.0, 8.0);
    let f = b.follower("buf", &part("jfet-general"), s);
    b.out("out", f, 0.0, Some(100.0));
    let plan = compile(&b.p).unwrap();
    let limit = part("jfet-general").isc.unwrap() * 100.0;
    assert!((plan.stages[0].shaper.hi - limit).abs() < 1e-12);
    let y = render(&b.p).remove(0);
    let mx = y.iter().cloned().fold(f64::MIN, f64::max);
    assert!(
        mx < limit * 1.05 && mx > limit * 0.92,
        "{mx} against {limit}"
    );
}

fn random_patch(
    parts: (usize, usize),
    amp: f64,
    freq: f64,
    r: (f64, f64, f64),
    second: u8,
    load: Option<f64>,
    k: usize,
) -> (Patch, f64, f64) {
    let names = builtin_names();
    let p1 = part(names[parts.0 % 4]);
    let p2 = part(names[parts.1 % 4]);
    let mut b = Pb::new(48_000.0, k, 0.02);
    let s = b.sine("in", freq, amp);
    let a = b.inv("a", &p1, &[(s, r.0)], r.1);
    let c = match second % 3 {
        0 => b.noninv("b", &p2, a, r.2, r.0),
        1 => b.follower("b", &p2, a),
        _ => b.inv("b", &p2, &[(a, r.0)], r.2),
    };
    b.out("out", c, 100.0, load);
    let plan = compile(&b.p).unwrap();
    let sh = plan.stages[1].shaper;
    (b.p, sh.lo.min(0.0), sh.hi.max(0.0))
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 24, failure_persistence: None, .. ProptestConfig::default() })]
    // Swing: the output never leaves the profile's swing limits (after the current limit)
    // and is always finite. At K = 1 there is no decimation filter: the bound is the
    // band-limited clamp's own, the limits widened by `GIBBS` of the span (the Gibbs
    // overshoot of a rail-to-rail step, Abramowitz and Stegun 5.2.14).
    #[test]
    fn output_stays_inside_the_swing(
        parts in (0usize..4, 0usize..4),
        amp in 0.0f64..40.0,
        freq in 20.0f64..15_000.0,
        r in (1e3f64..100e3, 1e3f64..200e3, 1e3f64..200e3),
        second in 0u8..3,
        load in proptest::option::of(50.0f64..100e3),
    ) {
        let (p, lo, hi) = random_patch(parts, amp, freq, r, second, load, 1);
        let y = render(&p).remove(0);
        let g = railsong::engine::shaper::GIBBS * (hi - lo) + 1e-9;
        for &v in &y {
            prop_assert!(v.is_finite());
            prop_assert!(v >= lo - g && v <= hi + g, "{} outside [{}, {}] + {}", v, lo, hi, g);
        }
        // At K = 4 the output is band-limited to the base rate: a wave clipped into a square
        // keeps its fundamental, 4/pi of the limit (square-wave Fourier series [S]), and the
        // decimator's 20-28 kHz transition band may pass part of the third harmonic (1/3 of
        // that) [D]: bound |v - mid| <= (4/pi)(4/3) * half-span.
        let (p, lo, hi) = random_patch(parts, amp, freq, r, second, load, 4);
        let y = render(&p).remove(0);
        let (mid, half) = (0.5 * (lo + hi), 0.5 * (hi - lo));
        let bound = 4.0 / std::f64::consts::PI * 4.0 / 3.0 * half;
        for &v in &y {
            prop_assert!(v.is_finite());
            prop_assert!((v - mid).abs() <= bound, "K=4: {} outside {} +/- {}", v, mid, bound);
        }
    }
}

// Engine::with_feeds: an external feed replaces a source (here a constant 1 V feed into a
// follower gives 1 V).
#[test]
fn external_feed_is_used() {
    struct One;
    impl railsong::engine::SourceFeed for One {
        fn fill(&mut self, out: &mut [f64]) {
            out.fill(1.0);
        }
        fn reset(&mut self) {}
    }
    let mut b = Pb::new(48_000.0, 4, 0.01);
    let s = b.dc("in", 0.0);
    let f = b.follower("buf", &part("ideal"), s);
    b.out("out", f, 0.0, None);
    let plan = compile(&b.p).unwrap();
    let mut e = Engine::with_feeds(&plan, vec![Box::new(One)]);
    let mut y = vec![0.0; 480];
    e.process(&mut [&mut y[..]]);
    assert!((y[479] - 1.0).abs() < 1e-9, "{}", y[479]);
}
