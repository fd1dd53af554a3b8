//! Start/stop gating, offset and the attack/decay envelope against their definitions:
//! linear attack `level = t / attack`, exponential decay `level = exp(-t / decay)` (the
//! definition of a time constant), retrigger every `every` seconds from the current level.

use railsong::model::{Envelope, Source, Wave};
use railsong::signal::generator;

fn render(src: &Source, rate: f64, n: usize) -> Vec<f64> {
    let mut g = generator(src, rate, 0).expect("valid source");
    let mut out = vec![0.0; n];
    g.fill(&mut out);
    out
}

fn dc(level: f64) -> Source {
    Source {
        name: "g".into(),
        wave: Wave::Dc { level },
        offset: 0.0,
        start: 0.0,
        stop: None,
        envelope: None,
        r: 0.0,
    }
}

#[test]
fn silent_before_start_and_after_stop_offset_only_while_on() {
    let src = Source {
        offset: 0.5,
        start: 0.010,
        stop: Some(0.020),
        ..dc(2.0)
    };
    let x = render(&src, 1000.0, 30);
    for (i, v) in x.iter().enumerate() {
        let want = if (10..20).contains(&i) { 2.5 } else { 0.0 };
        assert_eq!(*v, want, "sample {i}");
    }
}

#[test]
fn waveform_clock_starts_at_start() {
    // A ramp switched on at 5 ms starts from its `from` value there.
    let src = Source {
        name: "r".into(),
        wave: Wave::Ramp {
            from: 1.0,
            to: 2.0,
            duration: 0.004,
        },
        offset: 0.0,
        start: 0.005,
        stop: None,
        envelope: None,
        r: 0.0,
    };
    let x = render(&src, 1000.0, 12);
    assert_eq!(&x[..5], &[0.0; 5]);
    assert_eq!(&x[5..10], &[1.0, 1.25, 1.5, 1.75, 2.0]);
    // A sine switched on later starts at its stated phase (zero crossing for phase 0).
    let s = Source {
        name: "s".into(),
        wave: Wave::Sine {
            freq: 100.0,
            amp: 1.0,
            phase: 0.0,
        },
        offset: 0.0,
        start: 0.0105,
        stop: None,
        envelope: None,
        r: 0.0,
    };
    let y = render(&s, 48_000.0, 600);
    let on = (0.0105f64 * 48_000.0).round() as usize;
    assert!(y[..on].iter().all(|v| *v == 0.0));
    assert_eq!(y[on], 0.0);
    assert!(y[on + 1] > 0.0);
}

#[test]
fn envelope_attack_and_decay_times() {
    let fs = 48_000.0;
    let (attack, decay) = (0.010, 0.020);
    let src = Source {
        offset: 0.25,
        envelope: Some(Envelope {
            attack,
            decay,
            every: None,
        }),
        ..dc(1.0)
    };
    let x = render(&src, fs, 10_000);
    let env: Vec<f64> = x.iter().map(|v| v - 0.25).collect();
    let peak = (attack * fs) as usize;
    let tau = (decay * fs) as usize;
    assert_eq!(env[0], 0.0, "starts from zero");
    // Linear attack: half-way at half the attack time, 1 at the attack time.
    assert!((env[peak / 2] - 0.5).abs() < 1e-12);
    assert!((env[peak] - 1.0).abs() < 1e-12);
    assert!(env[peak - 1] < 1.0);
    // Exponential decay with time constant `decay`: e^-1 after one, e^-3 after three.
    assert!((env[peak + tau] - (-1.0f64).exp()).abs() < 1e-12);
    assert!((env[peak + 3 * tau] - (-3.0f64).exp()).abs() < 1e-12);
    // The offset is not enveloped: before the attack the output is the offset alone.
    assert_eq!(x[0], 0.25);
}

#[test]
fn envelope_retriggers_from_current_level() {
    let fs = 48_000.0;
    let (attack, decay, every) = (0.010, 0.020, 0.1);
    let src = Source {
        envelope: Some(Envelope {
            attack,
            decay,
            every: Some(every),
        }),
        ..dc(1.0)
    };
    let x = render(&src, fs, 15_000);
    let (pk, tau, per) = (attack * fs, decay * fs, (every * fs) as usize);
    // Just before the retrigger: exp(-(per - peak) / tau).
    let before = (-(per as f64 - pk) / tau).exp();
    assert!((x[per] - before).abs() < 1e-12, "{} vs {before}", x[per]);
    // Then it rises at 1 / attack per second from there.
    for j in [10usize, 100, 400] {
        let want = (before + j as f64 / pk).min(1.0);
        assert!((x[per + j] - want).abs() < 1e-9, "j {j}");
    }
    // It reaches 1 after attack * (1 - level) and decays again.
    let reach = per + ((1.0 - before) * pk).ceil() as usize;
    assert!((x[reach] - 1.0).abs() < 1e-12);
    assert!(x[reach + 100] < 1.0);
}

#[test]
fn instant_attack_and_decay() {
    let src = Source {
        envelope: Some(Envelope {
            attack: 0.0,
            decay: 0.0,
            every: Some(0.005),
        }),
        ..dc(1.0)
    };
    let x = render(&src, 1000.0, 12);
    assert_eq!(
        x,
        vec![1.0, 0.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 0.0, 1.0, 0.0]
    );
}
