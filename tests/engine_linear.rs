//! Linear-region checks of the engine against op-amp textbook closed forms.
mod engine_support;
use engine_support::*;
use railsong::engine::{compile, EngineError};
use railsong::model::*;
use railsong::parts::taper;

const RATE: f64 = 48_000.0;

/// In-phase gain of `y` relative to the test sine `amp sin(2 pi f t)` (1 kHz, 0.1 s, the
/// first 10 ms skipped), and the quadrature part relative to amp.
fn gain_of(y: &[f64], f: f64, amp: f64) -> (f64, f64) {
    let skip = 480;
    let (a, b, _, _) = fit(&y[skip..], skip, f, RATE);
    (a / amp, b / amp)
}

fn rel(a: f64, b: f64) -> f64 {
    ((a - b) / b).abs()
}

// Sedra & Smith: inverting amplifier gain -Rf/Rin [S]; within 0.01 % with the ideal part.
#[test]
fn inverting_gain() {
    for &(rin, rf) in &[(10e3, 47e3), (22e3, 10e3), (4.7e3, 100e3)] {
        let mut b = Pb::new(RATE, 4, 0.1);
        let s = b.sine("in", 1000.0, 0.1);
        let st = b.inv("inv", &part("ideal"), &[(s, rin)], rf);
        b.out("out", st, 0.0, None);
        let y = &render(&b.p)[0];
        let (g, q) = gain_of(y, 1000.0, 0.1);
        assert!(rel(g, -rf / rin) < 1e-4, "gain {g} vs {}", -rf / rin);
        assert!(q.abs() < 1e-4 * (rf / rin), "quadrature {q}");
    }
}

// Sedra & Smith: summing amplifier Vout = -Rf * sum(Vi / Ri) [S], checked per input with
// coherent tones at different frequencies (superposition), ideal part, 0.01 %.
#[test]
fn summing_amplifier() {
    let mut b = Pb::new(RATE, 4, 0.1);
    let rs = [10e3, 20e3, 47e3, 100e3];
    let fs = [1000.0, 1500.0, 2500.0, 3000.0];
    let amps = [0.3, 0.2, 0.5, 1.0];
    let mut ins = Vec::new();
    for i in 0..4 {
        let n = b.sine(&format!("s{i}"), fs[i], amps[i]);
        ins.push((n, rs[i]));
    }
    let rf = 33e3;
    let st = b.inv("mix", &part("ideal"), &ins, rf);
    b.out("out", st, 0.0, None);
    let y = &render(&b.p)[0];
    for i in 0..4 {
        let (a, _, _, _) = fit(&y[480..], 480, fs[i], RATE);
        let expect = -rf / rs[i] * amps[i];
        assert!(rel(a, expect) < 1e-4, "input {i}: {a} vs {expect}");
    }
}

// Sedra & Smith: non-inverting gain 1 + Rf/Rg, follower gain 1 [S].
#[test]
fn non_inverting_and_follower() {
    let mut b = Pb::new(RATE, 4, 0.1);
    let s = b.sine("in", 1000.0, 0.2);
    let ni = b.noninv("ni", &part("ideal"), s, 39e3, 10e3);
    let fo = b.follower("fo", &part("ideal"), s);
    b.out("ni", ni, 0.0, None);
    b.out("fo", fo, 0.0, None);
    let y = render(&b.p);
    let (g, _) = gain_of(&y[0], 1000.0, 0.2);
    assert!(rel(g, 1.0 + 39e3 / 10e3) < 1e-4, "non-inverting {g}");
    let (g, _) = gain_of(&y[1], 1000.0, 0.2);
    assert!(rel(g, 1.0) < 1e-4, "follower {g}");
}

// Two inverting stages restore polarity (gain (-1)(-1) = +1) [S]: correlation with the input
// above 0.999, with a real profile.
#[test]
fn two_inverters_restore_polarity() {
    let mut b = Pb::new(RATE, 4, 0.1);
    let s = b.sine("in", 1000.0, 1.0);
    let a = b.inv("a", &part("jfet-general"), &[(s, 10e3)], 10e3);
    let c = b.inv("b", &part("jfet-general"), &[(a, 10e3)], 10e3);
    b.out("out", c, 0.0, None);
    let y = &render(&b.p)[0];
    let n0 = 480;
    let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
    for (i, &v) in y.iter().enumerate().skip(n0) {
        let x = (std::f64::consts::TAU * 1000.0 * i as f64 / RATE).sin();
        sxy += x * v;
        sxx += x * x;
        syy += v * v;
    }
    let corr = sxy / (sxx * syy).sqrt();
    assert!(corr > 0.999, "correlation {corr}");
}

// A feedback pot equal to the input resistor sweeps the gain from 0 to 1: |G| = R_pot(at)/Rin
// (inverting gain -Rf/Rin [S] with Rf the pot's resistance, linear taper).
#[test]
fn feedback_pot_sweeps_gain() {
    for &at in &[0.0f64, 0.25, 0.5, 1.0] {
        let mut b = Pb::new(RATE, 4, 0.1);
        let s = b.sine("in", 1000.0, 1.0);
        let rpot = (100e3 * at).max(POT_END_R);
        let st = b.inv_full(
            "vol",
            &part("ideal"),
            vec![SumInput {
                from: s,
                r: 100e3,
                c: None,
            }],
            rpot,
            None,
            Some(PotSetting {
                track: 100e3,
                taper: Taper::Linear,
                at,
            }),
        );
        b.out("out", st, 0.0, None);
        let y = &render(&b.p)[0];
        let (g, _) = gain_of(y, 1000.0, 1.0);
        let expect = -rpot / 100e3;
        assert!(
            (g - expect).abs() < 1e-4 * expect.abs().max(1e-3),
            "at {at}: {g}"
        );
    }
}

// Attenuator loading: a linear pot at mid-rotation feeding a summing resistor into a virtual
// ground. Thevenin: Vth = V/2, Rth = Rp/4; gain = -Rf / (Rin + Rth) * 1/2 [D]. Also the
// CHECKS.md loaded-pot formula for a pot loaded to ground by k * Rp: ratio p / ((1 - x) + p),
// p = x k / (x + k) [D], at an output load.
#[test]
fn attenuator_loading() {
    let rp = 10e3;
    let rin = 10e3;
    let rf = 10e3;
    let mut b = Pb::new(RATE, 4, 0.1);
    let s = b.sine("in", 1000.0, 1.0);
    let a = b.atten("vol", s, rp, Taper::Linear, 0.5);
    let st = b.inv("mix", &part("ideal"), &[(a, rin)], rf);
    b.out("out", st, 0.0, None);
    let y = &render(&b.p)[0];
    let (g, _) = gain_of(y, 1000.0, 1.0);
    let expect = -rf / (rin + rp / 4.0) * 0.5;
    assert!(rel(g, expect) < 1e-4, "{g} vs {expect}");
    // unloaded wiper would give -0.5: loading must be visible
    assert!((g + 0.5).abs() > 0.05);

    // loaded pot as an output: x = 0.3, load k Rp with k = 0.5
    let (x, k) = (0.3, 0.5);
    let mut b = Pb::new(RATE, 4, 0.1);
    let s = b.sine("in", 1000.0, 1.0);
    let fo = b.follower("buf", &part("ideal"), s);
    let a = b.atten("vol", fo, rp, Taper::Linear, x);
    b.out("out", a, 0.0, Some(k * rp));
    let y = &render(&b.p)[0];
    let (g, _) = gain_of(y, 1000.0, 1.0);
    let p = x * k / (x + k);
    let expect = p / ((1.0 - x) + p);
    assert!(rel(g, expect) < 1e-4, "{g} vs {expect}");
    assert!((taper::fraction(Taper::Linear, x) - x).abs() < 1e-15);
}

// Single-pole closed loop: G(f) = G0 / (1 + j f NG / GBW), f(-3 dB) = GBW / NG [S]. From the
// measured |G| at several frequencies, f3 = f / sqrt((G0/|G|)^2 - 1) must be within 1 %.
// K = 16 so the internal rate is far above f3.
#[test]
fn minus_3db_is_gbw_over_noise_gain() {
    for &(gbw, rin, rf) in &[(20e3, 10e3, 10e3), (110e3, 10e3, 100e3)] {
        let ng = 1.0 + rf / rin;
        let f3 = gbw / ng;
        let g0 = rf / rin;
        for &f in &[2000.0, 5000.0, 10000.0, 15000.0] {
            let mut b = Pb::new(RATE, 16, 0.1);
            let s = b.sine("in", f, 0.01);
            let st = b.inv("lp", &linear_part(gbw, 1e9), &[(s, rin)], rf);
            b.out("out", st, 0.0, None);
            let y = &render(&b.p)[0];
            let (a, bq, _, _) = fit(&y[480..], 480, f, RATE);
            let mag = (a * a + bq * bq).sqrt() / 0.01;
            let est = f / ((g0 / mag).powi(2) - 1.0).sqrt();
            assert!(rel(est, f3) < 0.01, "gbw {gbw} f {f}: f3 {est} vs {f3}");
        }
    }
}

// Waves without an engine generator yet are a clear error naming the source.
#[test]
fn unsupported_wave_is_named() {
    let mut b = Pb::new(RATE, 4, 0.1);
    let s = b.wave(
        "kick",
        Wave::Noise {
            pink: true,
            rms: 0.1,
        },
    );
    let st = b.follower("buf", &part("ideal"), s);
    b.out("out", st, 0.0, None);
    let e = compile(&b.p).unwrap_err();
    assert!(matches!(e, EngineError::UnsupportedWave { .. }));
    let msg = e.to_string();
    assert!(msg.contains("kick") && msg.contains("noise") && msg.contains("not available"));
}

// The plan is plain data: stage order, Millman coefficient, latency and filter lengths can be
// checked without running audio. Inverting stage Rin = Rf: b = Gf / (Gin + Gf) = 1/2 [D].
#[test]
fn plan_is_inspectable() {
    let mut b = Pb::new(RATE, 4, 0.1);
    let s = b.sine("in", 1000.0, 1.0);
    let a = b.inv("first", &part("jfet-general"), &[(s, 10e3)], 10e3);
    let c = b.inv("second", &part("jfet-general"), &[(a, 10e3)], 20e3);
    b.out("out", c, 0.0, None);
    let plan = compile(&b.p).unwrap();
    assert_eq!(plan.stages[0].name, "first");
    assert_eq!(plan.stages[1].name, "second");
    assert!((plan.stages[0].b - 0.5).abs() < 1e-15);
    assert!((plan.stages[1].b - (1.0 / 20e3) / (1.0 / 10e3 + 1.0 / 20e3)).abs() < 1e-15);
    // each op-amp stage delays by the clamp's lookahead; two stages in series [D]
    let la = railsong::engine::shaper::LOOKAHEAD;
    assert_eq!(plan.stages[0].latency, la);
    assert_eq!(plan.stages[1].latency, 2 * la);
    assert_eq!(plan.latency, 2 * la);
    assert_eq!(plan.filter_lengths.len(), 2);
    // output index n is time n / rate: the pre-roll plus the latency fill whole frames
    assert_eq!(
        (plan.preroll + plan.decimator_delay + plan.latency) % plan.oversample,
        0
    );
    let text = format!("{plan:?}");
    assert!(text.contains("second") && text.contains("lin_e"));
    let summary = plan.to_string();
    assert!(summary.contains("stage 1 `second` (inverting, part jfet-general)"));
    assert!(summary.contains("decimator [27, 79] taps"), "{summary}");
    // swing with the current limit: the profile's Isc into 10k feedback + 10k downstream
    // input is far above the rail, so the profile's swing (positive rail minus drop_pos)
    // holds (Ohm's law; figures from the profile)
    let jf = railsong::parts::builtin("jfet-general").unwrap();
    assert!(jf.isc.unwrap() * 5e3 > 12.0);
    assert!((plan.stages[0].shaper.hi - (12.0 - jf.drop_pos)).abs() < 1e-12);
}

// Capacitors, ideal part. Feedback Rf || Cf: G = -(Rf/Rin) / (1 + j f / fc), fc = 1/(2 pi Rf
// Cf); series input C with Rin: G = -(Rf/Rin) j(f/fc) / (1 + j f/fc), fc = 1/(2 pi Rin C)
// (first-order RC networks, any circuits text [S]). |G| within 1 % at K = 16.
#[test]
fn capacitor_networks_follow_first_order_responses() {
    let (rin, rf) = (10e3, 20e3);
    let cf = 1.0 / (std::f64::consts::TAU * rf * 5000.0); // fc 5 kHz
    for &f in &[1000.0, 5000.0, 10000.0] {
        let mut b = Pb::new(RATE, 16, 0.1);
        let s = b.sine("in", f, 0.1);
        let st = b.inv_full(
            "lp",
            &part("ideal"),
            vec![SumInput {
                from: s,
                r: rin,
                c: None,
            }],
            rf,
            Some(cf),
            None,
        );
        b.out("out", st, 0.0, None);
        let y = &render(&b.p)[0];
        let (a, q, _, _) = fit(&y[480..], 480, f, RATE);
        let mag = (a * a + q * q).sqrt() / 0.1;
        let expect = (rf / rin) / (1.0 + (f / 5000.0f64).powi(2)).sqrt();
        assert!(rel(mag, expect) < 0.01, "low-pass f {f}: {mag} vs {expect}");
    }
    let c = 1.0 / (std::f64::consts::TAU * rin * 100.0); // fc 100 Hz
    for &f in &[50.0, 100.0, 400.0] {
        let mut b = Pb::new(RATE, 16, 0.5);
        let s = b.sine("in", f, 0.1);
        let st = b.inv_full(
            "hp",
            &part("ideal"),
            vec![SumInput {
                from: s,
                r: rin,
                c: Some(c),
            }],
            rf,
            None,
            None,
        );
        b.out("out", st, 0.0, None);
        let y = &render(&b.p)[0];
        // skip 0.2 s: the start transient decays with tau = Rin C = 1.6 ms
        let skip = (0.2 * RATE) as usize;
        let (a, q, _, _) = fit(&y[skip..], skip, f, RATE);
        let mag = (a * a + q * q).sqrt() / 0.1;
        let x = f / 100.0;
        let expect = (rf / rin) * x / (1.0 + x * x).sqrt();
        assert!(
            rel(mag, expect) < 0.01,
            "high-pass f {f}: {mag} vs {expect}"
        );
    }
}
