//! The engine's built-in generators (sine, multitone, dc; offset, start/stop, envelope).
mod engine_support;
use engine_support::*;
use railsong::model::*;

const RATE: f64 = 48_000.0;

fn follower_of(
    wave: Wave,
    offset: f64,
    start: f64,
    stop: Option<f64>,
    env: Option<Envelope>,
) -> Vec<f64> {
    let mut b = Pb::new(RATE, 4, 0.05);
    b.p.sources.push(Source {
        name: "src".into(),
        wave,
        offset,
        start,
        stop,
        envelope: env,
        r: 0.0,
    });
    let f = b.follower("buf", &part("ideal"), Node::Source(0));
    b.out("out", f, 0.0, None);
    render(&b.p).remove(0)
}

// A multitone is the sum of its sines (superposition [S]); each fitted amplitude and phase
// matches the tone's, and the offset is the fitted mean.
#[test]
fn multitone_is_a_sum_of_sines() {
    let tones = vec![
        Tone {
            freq: 1000.0,
            amp: 0.5,
            phase: 0.3,
        },
        Tone {
            freq: 2500.0,
            amp: 0.25,
            phase: -1.0,
        },
    ];
    let y = follower_of(
        Wave::Multitone {
            tones: tones.clone(),
        },
        0.1,
        0.0,
        None,
        None,
    );
    for t in &tones {
        let (a, b, c, _) = fit(&y[480..], 480, t.freq, RATE);
        // a sin + b cos = amp sin(w n + phase): a = amp cos(phase), b = amp sin(phase) [D]
        assert!((a - t.amp * t.phase.cos()).abs() < 1e-5, "{a}");
        assert!((b - t.amp * t.phase.sin()).abs() < 1e-5, "{b}");
        assert!((c - 0.1).abs() < 1e-5, "{c}");
    }
}

// Start and stop: silent before start and after stop (away from the band-limited edges, one
// millisecond each side), the sine inside.
#[test]
fn start_and_stop_gate_the_source() {
    let y = follower_of(
        Wave::Sine {
            freq: 1000.0,
            amp: 1.0,
            phase: 0.0,
        },
        0.0,
        0.01,
        Some(0.03),
        None,
    );
    let ms = (RATE / 1000.0) as usize;
    assert!(y[..9 * ms].iter().all(|v| v.abs() < 1e-6));
    assert!(y[31 * ms..].iter().all(|v| v.abs() < 1e-6));
    // inside: the sine with its phase referred to t = 0
    for (n, v) in y.iter().enumerate().take(29 * ms).skip(11 * ms) {
        let e = (std::f64::consts::TAU * 1000.0 * n as f64 / RATE).sin();
        assert!((v - e).abs() < 1e-4, "n {n}: {v} vs {e}");
    }
}

// Envelope: linear attack to 1 over `attack`, then exp(-(t - attack) / decay) [model
// definition]; checked on a DC level mid-attack and one decay constant after the peak.
#[test]
fn envelope_shapes_the_source() {
    let env = Envelope {
        attack: 0.01,
        decay: 0.01,
        every: None,
    };
    let y = follower_of(Wave::Dc { level: 2.0 }, 0.0, 0.0, None, Some(env));
    let at = |t: f64| y[(t * RATE).round() as usize];
    assert!((at(0.005) - 1.0).abs() < 1e-3, "{}", at(0.005));
    assert!(
        (at(0.02) - 2.0 * (-1.0f64).exp()).abs() < 1e-3,
        "{}",
        at(0.02)
    );
}
