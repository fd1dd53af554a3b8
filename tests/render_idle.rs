//! The idle-channel render behind the noise and SNR figures is only as long as those figures
//! need (issue 13): the settle time plus one capture of the length a whole-length render
//! keeps. Reference: the same figures from the idle render at the patch's whole length.
//! Both are estimates of the same stationary noise from captures of equal length, so they
//! agree within the noise figures' stated precision, 0.1 dB (issue 13: simulated noise
//! figures within 0.1 dB of the analytic budget), not bit for bit.

use std::path::Path;

use railsong::measure::{self, noise_figures};
use railsong::render::{idle_frames, render_idle, TAIL_MAX};

/// The render benchmark's clean mixer (four sines, summer, restoring inverter, noise on), at
/// `length`.
fn mixer(length: &str, extra: &str) -> railsong::model::Patch {
    let text = include_str!("../benches/patches/mixer_clean.toml")
        .replace("length = \"120 s\"", &format!("length = \"{length}\""))
        .replace("[sources.a]\n", &format!("[sources.a]\n{extra}"));
    railsong::patch::parse_str(&text, "mixer_clean.toml", Path::new("."), &[]).unwrap()
}

fn db(a: f64, b: f64) -> f64 {
    20.0 * (a / b).log10()
}

#[test]
fn shortened_idle_render_gives_the_whole_lengths_noise_figures() {
    let p = mixer("30 s", "");
    let n = idle_frames(&p).expect("shorter than the patch");
    let settle = (measure::settle_time(&p) * p.rate).round() as usize;
    assert_eq!(n, settle + TAIL_MAX);
    assert!(n < p.frames() / 2, "{n} of {}", p.frames());
    let figs = |full: bool| {
        let s = render_idle(&p, full).unwrap();
        assert_eq!(s.frames, if full { p.frames() } else { n });
        let x = &s.run.outputs[0].samples;
        // the same capture length either way: the last TAIL_MAX samples, all after settling
        assert_eq!(x.len(), TAIL_MAX);
        assert!(s.run.first_frame >= settle);
        noise_figures(x, p.rate)
    };
    let (short, full) = (figs(false), figs(true));
    let pairs = [
        (short.noise_rms_v, full.noise_rms_v),
        (short.noise_a_rms_v, full.noise_a_rms_v),
    ];
    for (a, b) in pairs {
        let (a, b) = (a.unwrap(), b.unwrap());
        let d = db(a, b);
        println!("short {a:e} V, full {b:e} V: {d:+.4} dB");
        assert!(d.abs() < 0.1, "{d} dB");
    }
}

#[test]
fn idle_channel_with_a_switched_offset_renders_in_full() {
    // a source that switches a DC offset on at 2 s keeps a step in the idle channel: not
    // stationary, so the idle render keeps the whole length
    let p = mixer("30 s", "offset = \"1 V\"\nstart = \"2 s\"\n");
    assert_eq!(idle_frames(&p), None);
    // an offset on from t = 0 is constant: shortened
    let p = mixer("30 s", "offset = \"1 V\"\n");
    assert!(idle_frames(&p).is_some());
    // a patch no longer than settle time plus one capture renders in full
    let p = mixer("5 s", "");
    assert_eq!(idle_frames(&p), None);
}
