//! Crest clips: a twin tone whose crests pass the upper rail (the lower rail far away) through
//! an ideal follower. The band-limited clamp's third-order product must match the same
//! product of the clipped waveform itself, sampled densely in the test, within 1 dB; and where
//! the drive never reaches the rail, no product at all.
//!
//! Both captures are coherent (integer-hertz tones over exactly one second, a single DFT bin
//! with a rectangular window: common practice of coherent testing, IEEE Std 1241), so the
//! bin holds the product alone.
mod engine_support;
use engine_support::*;
use railsong::model::{Tone, Wave};
use std::f64::consts::TAU;

const RATE: f64 = 48_000.0;
const HI: f64 = 12.0;

/// Peak amplitude of the component at `freq` of a whole number of seconds of `x` at `rate`.
fn bin_amp(x: &[f64], freq: f64, rate: f64) -> f64 {
    let (mut re, mut im) = (0.0, 0.0);
    for (i, &v) in x.iter().enumerate() {
        let t = TAU * freq * i as f64 / rate;
        re += v * t.cos();
        im += v * t.sin();
    }
    2.0 * (re * re + im * im).sqrt() / x.len() as f64
}

/// Twin tone of `a` per tone (phases 0, sines) clipped at `HI`, sampled at 32 x 48 kHz for
/// one second: the product at `fp`, V peak.
fn clipped_reference(f1: f64, f2: f64, a: f64, fp: f64) -> f64 {
    let rate = 32.0 * RATE;
    let x: Vec<f64> = (0..rate as usize)
        .map(|i| {
            let t = i as f64 / rate;
            (a * (TAU * f1 * t).sin() + a * (TAU * f2 * t).sin()).min(HI)
        })
        .collect();
    bin_amp(&x, fp, rate)
}

/// The engine's product at `fp` for the same twin tone, rails +12 V / -30 V, the last whole
/// second of a 1.1 s render.
fn rendered(f1: f64, f2: f64, a: f64, fp: f64, k: usize) -> f64 {
    let mut b = Pb::new(RATE, k, 1.1).rails(HI, -30.0);
    let tones = [f1, f2].map(|freq| Tone {
        freq,
        amp: a,
        phase: 0.0,
    });
    let s = b.wave(
        "twin",
        Wave::Multitone {
            tones: tones.to_vec(),
        },
    );
    let f = b.follower("buf", &part("ideal"), s);
    b.out("out", f, 0.0, None);
    let y = render(&b.p).remove(0);
    bin_amp(&y[y.len() - RATE as usize..], fp, RATE)
}

// Third-order product 2 f1 - f2 against the densely sampled clipped waveform, within 1 dB
// (issue 12). The crests pass the rail by 0.5 % to 30 % of it. A 3-point local model
// resolves a crest only as finely as the drive is sampled: at K = 4 a 19/20 kHz twin tone
// (under 10 samples per cycle) needs crests 10 % past the rail; at K = 8 every level holds.
// Before the fix the straight-line model read 8 to 25 dB high at these levels.
#[test]
fn crest_clip_product_matches_the_clipped_waveform() {
    let cases: &[(f64, f64, usize, &[f64])] = &[
        (5_000.0, 6_000.0, 4, &[0.02, 0.05, 0.1, 0.3]),
        (13_000.0, 14_000.0, 4, &[0.02, 0.05, 0.1, 0.3]),
        (19_000.0, 20_000.0, 4, &[0.1, 0.3]),
        (19_000.0, 20_000.0, 8, &[0.005, 0.01, 0.02, 0.05]),
    ];
    for &(f1, f2, k, overs) in cases {
        for &over in overs {
            // each tone half the crest: the crests reach HI (1 + over) where both align
            let a = HI * (1.0 + over) / 2.0;
            let fp = 2.0 * f1 - f2;
            let want = clipped_reference(f1, f2, a, fp);
            let got = rendered(f1, f2, a, fp, k);
            let d = 20.0 * (got / want).log10();
            println!("{f1}/{f2} Hz K={k} crest +{over}: {d:+.2} dB");
            assert!(
                d.abs() < 1.0,
                "{f1}/{f2} Hz at K = {k}, crests {over} past the rail: product {:.2} dBV, \
                 clipped waveform {:.2} dBV",
                20.0 * got.log10(),
                20.0 * want.log10()
            );
        }
    }
}

// A twin tone whose samples come near the rail but whose crests never reach it (5/6 kHz,
// phases 0: the two crests never align exactly, so the sum stays below 2 a): the clipped
// waveform is the drive itself and has no product; the clamp must add none. (Before the fix,
// a straight line through the neighbours of a crest crossed the rail and the product read
// about -71 dBV at 1 % over.)
#[test]
fn no_product_where_the_drive_never_reaches_the_rail() {
    let (f1, f2) = (5_000.0, 6_000.0);
    let a = HI * 1.01 / 2.0;
    let fp = 2.0 * f1 - f2;
    // the reference has no product: nothing was clipped
    let want = clipped_reference(f1, f2, a, fp);
    assert!(want < 1e-9, "{want}");
    let got = rendered(f1, f2, a, fp, 4);
    assert!(got < 1e-9, "product {:.1} dBV", 20.0 * got.log10());
}
