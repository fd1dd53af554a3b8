//! Sources at engine speed against their plain references (issue 13): the rotation sine and
//! multitone against the library sine of the exact phase at every sample, the recurrent
//! log sweep against its closed form, the recurrent envelope decay against `exp(-t / decay)`.
//! Reference: the platform's libm (a general reference library) evaluating each waveform's
//! textbook closed form; the bound is 1e-9 of full scale (the figure) and the checks
//! use much tighter ones.

use railsong::model::{Envelope, Source, Tone, Wave};
use railsong::signal::{generator, Generator, LogSweep, Multitone, Sine, SineReference};

/// Fill in calls of awkward sizes (the engine's blocks, odd remainders, one sample).
fn fill_chunked(g: &mut dyn Generator, n: usize) -> Vec<f64> {
    let sizes = [512usize, 1, 7, 255, 256, 257, 1000, 3];
    let mut out = vec![0.0; n];
    let mut i = 0;
    let mut k = 0;
    while i < n {
        let m = sizes[k % sizes.len()].min(n - i);
        g.fill(&mut out[i..i + m]);
        i += m;
        k += 1;
    }
    out
}

fn max_diff(a: &[f64], b: &[f64]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
}

#[test]
fn rotation_sine_matches_the_library_sine() {
    let n = 200_000;
    for &rate in &[48_000.0, 192_000.0, 768_000.0] {
        for &(freq, phase) in &[
            (0.1, 0.0),
            (20.0, 0.3),
            (997.0, 1.0),
            (1000.0, -2.0),
            (0.45 * rate, 0.7),
            (rate / 4.0, 0.0),
        ] {
            let amp = 2.5;
            let mut fast = Sine::new(freq, amp, phase, rate);
            let tone = Tone { freq, amp, phase };
            let mut plain = SineReference::new(&[tone], rate);
            let a = fill_chunked(&mut fast, n);
            let b = fill_chunked(&mut plain, n);
            let d = max_diff(&a, &b);
            assert!(d < 1e-12 * amp, "rate {rate} freq {freq}: {d:e} V");
            // reset reproduces the samples bit for bit
            fast.reset();
            assert_eq!(a, fill_chunked(&mut fast, n));
        }
    }
}

#[test]
fn rotation_multitone_matches_the_library_sum() {
    let rate = 192_000.0;
    let tones = [
        Tone {
            freq: 60.0,
            amp: 1.0,
            phase: 0.0,
        },
        Tone {
            freq: 7000.0,
            amp: 0.25,
            phase: 1.3,
        },
        Tone {
            freq: 19_997.0,
            amp: 0.1,
            phase: -0.4,
        },
    ];
    let a = fill_chunked(&mut Multitone::new(&tones, rate), 300_000);
    let b = fill_chunked(&mut SineReference::new(&tones, rate), 300_000);
    let d = max_diff(&a, &b);
    assert!(d < 1e-12, "{d:e} V");
}

#[test]
fn recurrent_sweep_matches_its_closed_form() {
    // across the end of the sweep (the steady tone after it) and at two rates
    for &(from, to, duration, rate) in &[
        (20.0, 20_000.0, 1.0, 48_000.0),
        (20_000.0, 20.0, 0.5, 192_000.0),
        (100.0, 100.0, 0.2, 48_000.0),
    ] {
        let amp = 3.0;
        let n = ((duration + 0.3) * rate) as usize;
        let mut g = LogSweep::new(from, to, amp, duration, rate);
        let a = fill_chunked(&mut g, n);
        let r = LogSweep::new(from, to, amp, duration, rate);
        let b: Vec<f64> = (0..n as u64).map(|i| r.reference_sample(i)).collect();
        let d = max_diff(&a, &b);
        assert!(d < 1e-10 * amp, "{from} -> {to} Hz at {rate}: {d:e} V");
    }
}

#[test]
fn recurrent_envelope_decay_matches_exp() {
    // a DC source of 1 V with a 1 ms attack and a 0.7 s decay: after the peak the level is
    // exp(-(t - attack) / decay) (the envelope's definition; signal module docs)
    let rate = 48_000.0;
    let (attack, decay) = (0.001, 0.7);
    let src = Source {
        name: "d".into(),
        wave: Wave::Dc { level: 1.0 },
        offset: 0.0,
        start: 0.0,
        stop: None,
        envelope: Some(Envelope {
            attack,
            decay,
            every: None,
        }),
    };
    let mut g = generator(&src, rate, 1).unwrap();
    let n = (5.0 * rate) as usize;
    let y = fill_chunked(g.as_mut(), n);
    let pk = (attack * rate) as usize;
    let mut worst: f64 = 0.0;
    for (i, &v) in y.iter().enumerate().skip(pk + 1) {
        let expect = (-((i - pk) as f64) / (decay * rate)).exp();
        worst = worst.max((v - expect).abs());
    }
    assert!(worst < 1e-12, "{worst:e}");
}
