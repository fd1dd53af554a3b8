//! Figures a bench measurement of the modelled circuit would give: settled captures, one set
//! of references (AES17), THD of clipped and slewing tones against closed forms and a
//! fine-step reference, found crossings, the circuit's own peaks, events and alias lines.

use std::f64::consts::PI;
use std::path::Path;

use railsong::analysis::sweep::{bracket, find_crossing, CROSSING_TOLERANCE};
use railsong::measure::{self, Measurement};
use railsong::model::Patch;
use railsong::render::{self, RenderOptions};

fn load(text: &str, sets: &[&str]) -> Patch {
    let sets: Vec<String> = sets.iter().map(|s| s.to_string()).collect();
    railsong::patch::parse_str(text, "test.toml", Path::new("."), &sets).expect("patch")
}

fn measure_of(p: &Patch) -> Measurement {
    let run = render::render(p, &RenderOptions::default(), &mut |_| {}).expect("render");
    measure::measure(
        p,
        &run,
        None,
        &railsong::analysis::Settings::default(),
        None,
        None,
    )
}

/// A unity inverter on +/-12 V rails driven by a 997 Hz sine (AES17 test frequency), noise
/// off; the part is chosen by each test.
const INVERTER: &str = r#"
[patch]
noise = false

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "997 Hz"
amp = "1 Vpk"

[stages.amp]
type = "inverting"
part = "ideal"
from = "osc"
r_in = "10k"
r_fb = "10k"

[outputs.out]
from = "amp"
"#;

/// Fourier series of sin(theta) clipped symmetrically at +/-c (CHECKS.md, [D]): b1 and the
/// odd harmonics b_n (n >= 3); even ones are zero.
fn clipped_b(c: f64, n: usize) -> f64 {
    let c = c.min(1.0);
    let al = c.asin();
    if n == 1 {
        return (2.0 / PI) * (al + c * (1.0 - c * c).sqrt());
    }
    if n.is_multiple_of(2) {
        return 0.0;
    }
    let nf = n as f64;
    4.0 / (PI * nf * (nf * nf - 1.0))
        * (nf * (nf * al).sin() * al.cos() - (nf * al).cos() * al.sin())
}

/// THD_F of the clipped sine over harmonics 2..=10 (what railsong counts by default).
fn clipped_thd(c: f64) -> f64 {
    let h: f64 = (2..=10).map(|n| clipped_b(c, n).powi(2)).sum();
    h.sqrt() / clipped_b(c, 1)
}

#[test]
fn noiseless_linear_stage_reads_the_numerical_floor() {
    // Issue 12: a noiseless linear inverting stage at the default 2 s read THD+N -83 dB
    // because the capture held the switch-on. After the settle time the residual is only
    // rounding: below -120 dB (common practice: double precision and a linear model leave
    // far less than that).
    let p = load(
        INVERTER,
        &["stages.amp.part=jfet-general", "stages.amp.r_fb=20k"],
    );
    assert_eq!(p.length, 2.0, "the default length");
    let m = measure_of(&p);
    let f = &m.outputs["out"].figures;
    assert!(f.thdn_db.unwrap() < -120.0, "THD+N {:?}", f.thdn_db);
    assert!(f.thd_db.unwrap() < -120.0, "THD {:?}", f.thd_db);
    assert!((m.settings.settle_s - measure::SETTLE_MIN_S).abs() < 1e-12);
}

#[test]
fn clipped_sine_thd_matches_its_fourier_series() {
    // A unity inverter with a textbook part clips hard at the rails (+/-12 V): the output is
    // a sine of peak A clipped at c = 12 / A. THD over harmonics 2..10 against the Fourier
    // series of the clipped sine (CHECKS.md [D]), at several levels.
    for a in [12.5, 15.0, 20.0, 40.0] {
        let p = load(INVERTER, &[&format!("sources.osc.amp={a} Vpk")]);
        let f = measure_of(&p).outputs["out"].figures.clone();
        let expect = 100.0 * clipped_thd(12.0 / a);
        let got = f.thd_percent.unwrap();
        assert!(
            (got / expect - 1.0).abs() < 0.005,
            "A = {a} V: THD {got} % vs {expect} %"
        );
    }
}

#[test]
fn one_percent_crossing_matches_the_closed_form() {
    // The level where THD reaches 1 %, found on the circuit (bisection with renders, to
    // 0.1 % in level) against the same level found by bisection on the closed form of the
    // clipped sine (CHECKS.md [D]) here: A = 12 V / c with THD_F(c) = 1 %.
    let (mut lo, mut hi) = (0.5f64, 1.0f64);
    for _ in 0..200 {
        let c = 0.5 * (lo + hi);
        if clipped_thd(c) > 0.01 {
            lo = c;
        } else {
            hi = c;
        }
    }
    let expect = 12.0 / (0.5 * (lo + hi));
    let base = load(INVERTER, &["patch.length=0.3 s"]);
    let thd = |a: f64| {
        let mut p = base.clone();
        if let railsong::model::Wave::Sine { amp, .. } = &mut p.sources[0].wave {
            *amp = a;
        }
        measure_of(&p).outputs["out"]
            .figures
            .thd_percent
            .map(|t| t / 100.0)
    };
    // a coarse sweep, then the crossing found between its points
    let pts: Vec<(f64, f64)> = [10.0, 12.5, 15.0, 20.0]
        .iter()
        .map(|&a| (a, thd(a).unwrap_or(1e-12).max(1e-12)))
        .collect();
    let (b0, b1) = bracket(&pts, 0.01).expect("the sweep crosses 1 %");
    let got = find_crossing(b0, b1, 0.01, CROSSING_TOLERANCE, &mut |a| thd(a)).unwrap();
    assert!((got / expect - 1.0).abs() < 1e-3, "{got} V vs {expect} V");
}

#[test]
fn aes17_references_on_a_hard_clipped_tone() {
    // AES17: THD+N is the residual over the whole signal in band, SINAD its inverse, so
    // SINAD = -THD+N, THD+N <= 0 dB and SINAD >= 0 dB. A tone clipped hard (c = 0.2): the
    // band 20 Hz - 20 kHz holds the odd harmonics of 997 Hz up to the 19th, so THD+N is
    // sqrt(sum b_n^2, n = 3..19) / sqrt(sum b_n^2, n = 1..19) from the Fourier series of
    // the clipped sine (CHECKS.md [D]); THD (re the fundamental, harmonics 2..10) likewise.
    let p = load(INVERTER, &["sources.osc.amp=60 Vpk"]);
    let f = measure_of(&p).outputs["out"].figures.clone();
    let c = 12.0 / 60.0;
    let band = |from: usize| -> f64 { (from..=19).map(|n| clipped_b(c, n).powi(2)).sum() };
    let thdn_expect = 20.0 * (band(3).sqrt() / band(1).sqrt()).log10();
    let (thdn, sinad) = (f.thdn_db.unwrap(), f.sinad_db.unwrap());
    assert!(
        (thdn - thdn_expect).abs() < 0.1,
        "THD+N {thdn} dB vs {thdn_expect} dB"
    );
    assert_eq!(sinad, -thdn);
    assert!(thdn <= 0.0 && sinad >= 0.0);
    // ENOB from that SINAD (IEEE Std 1057 form)
    assert!((f.enob.unwrap() - (sinad - 1.76) / 6.02).abs() < 1e-12);
    let thd_expect = 20.0 * clipped_thd(c).log10();
    assert!(
        (f.thd_db.unwrap() - thd_expect).abs() < 0.1,
        "{:?} vs {thd_expect}",
        f.thd_db
    );
    // rms_v is AC: the mean is ~0 here, and rms_v matches the clipped wave's rms (CHECKS.md
    // mean square of the clipped sine, times the 60 V scale)
    let al = c.asin();
    let ms = (2.0 / PI) * (al / 2.0 - al.sin() * al.cos() / 2.0 + c * c * (PI / 2.0 - al));
    let rms_expect = 60.0 * ms.sqrt();
    assert!(
        (f.rms_v.unwrap() / rms_expect - 1.0).abs() < 2e-3,
        "{:?} vs {rms_expect}",
        f.rms_v
    );
}

/// A follower with a slow part (10 MHz, 0.3 V/us, output to the rails) on +/-15 V, driven
/// by a 10 Vpk sine whose slope outruns the slew rate.
const SLEWER: &str = r#"
[patch]
noise = false
length = "0.3 s"

[rails]
pos = "15 V"
neg = "-15 V"

[parts.slow]
based_on = "ideal"
gbw = "10 MHz"
slew = "0.3 V/us"

[sources.osc]
wave = "sine"
freq = "7 kHz"
amp = "10 Vpk"

[stages.buf]
type = "follower"
part = "slow"
from = "osc"

[outputs.out]
from = "buf"
"#;

/// Fine-step slew limiter (infinite bandwidth, slope limited to `sr`): the amplitudes of
/// harmonics 1..=`n` of its steady state for `a sin(2 pi f t)`, by a DFT over whole periods.
fn slew_limiter_harmonics(a: f64, f: f64, sr: f64, n: usize) -> Vec<f64> {
    let per = 200_000usize; // steps per period
    let h = 1.0 / (f * per as f64);
    let mut y = 0.0;
    let mut re = vec![0.0; n + 1];
    let mut im = vec![0.0; n + 1];
    for k in 0..(8 * per) {
        let t = (k + 1) as f64 * h;
        let x = a * (2.0 * PI * f * t).sin();
        y += (x - y).clamp(-sr * h, sr * h);
        if k >= 6 * per {
            for m in 1..=n {
                let w = 2.0 * PI * f * m as f64 * t;
                re[m] += y * w.cos();
                im[m] += y * w.sin();
            }
        }
    }
    let norm = 2.0 / (2 * per) as f64;
    (0..=n).map(|m| norm * re[m].hypot(im[m])).collect()
}

#[test]
fn slewing_tone_thd_matches_a_fine_step_slew_limiter() {
    // 7 kHz at 48 kHz: harmonics 2 and 3 lie below Nyquist, so THD counts them; the
    // reference counts the same two (compare like with like). Slewing time dt = dV / SR
    // (CHECKS.md [S]) is what the reference integrates at a 0.7 ns step.
    let p = load(SLEWER, &[]);
    let f = measure_of(&p).outputs["out"].figures.clone();
    let b = slew_limiter_harmonics(10.0, 7000.0, 0.3e6, 3);
    let expect = 100.0 * (b[2] * b[2] + b[3] * b[3]).sqrt() / b[1];
    let got = f.thd_percent.unwrap();
    assert_eq!(f.thd_harmonics, Some(2));
    // the issue asks for 10 %; the model agrees within 2 %
    assert!(
        (got / expect - 1.0).abs() < 0.02,
        "THD {got} % vs {expect} %"
    );
}

#[test]
fn slewing_tone_above_nyquist_is_measured_on_the_internal_signal() {
    // 20 kHz at 48 kHz: every harmonic lies above the file's Nyquist frequency, so the file
    // cannot show THD; the engine's internal signal can. At the default K = 4 (192 kHz) it
    // holds harmonics 2..4, at K = 8 (384 kHz) 2..9: THD over those against the fine-step
    // slew limiter's same harmonics (compare like with like), within 2 % (the issue asks for
    // 10 %; measured 0.6 % at K = 4, 0.03 % at K = 8). The internal capture takes the
    // model's steps without the band-limited corrections (`RenderOptions::uncorrected`):
    // they band-limit to the audio band, and with them H3 (60 kHz) read 2.2 dB low at K = 4
    // (THD 22 % low) and 4.5 % low at K = 8.
    for (k, nh) in [(4, 3), (8, 8)] {
        let p = load(
            SLEWER,
            &["sources.osc.freq=20 kHz", &format!("patch.oversample={k}")],
        );
        let mut m = measure_of(&p);
        assert_eq!(m.outputs["out"].figures.thd_percent, None);
        render::complete_thd(&p, &mut m, &railsong::analysis::Settings::default(), None).unwrap();
        let f = &m.outputs["out"].figures;
        assert_eq!(f.thd_harmonics, Some(nh), "{:?}", f.notes);
        let at = format!("internal signal at {} Hz", 48_000 * k);
        assert!(f.notes.iter().any(|n| n.contains(&at)), "{:?}", f.notes);
        let b = slew_limiter_harmonics(10.0, 20_000.0, 0.3e6, nh + 1);
        let expect = 100.0 * (2..=nh + 1).map(|i| b[i] * b[i]).sum::<f64>().sqrt() / b[1];
        let got = f.thd_percent.unwrap();
        assert!(
            (got / expect - 1.0).abs() < 0.02,
            "K = {k}: THD {got} % vs {expect} %"
        );
    }
}

#[test]
fn harmonics_above_nyquist_give_null_with_a_note_never_zero() {
    // 20 kHz at 48 kHz without oversampling: every harmonic lies above Nyquist, inside the
    // engine too; a slewing part makes a nearly triangular wave (THD_F 12 %, CHECKS.md),
    // which a THD of 0 would hide.
    let p = load(SLEWER, &["sources.osc.freq=20 kHz", "patch.oversample=1"]);
    let mut m = measure_of(&p);
    render::complete_thd(&p, &mut m, &railsong::analysis::Settings::default(), None).unwrap();
    let r = &m.outputs["out"];
    assert_eq!(r.figures.thd_percent, None);
    assert!(
        r.figures
            .notes
            .iter()
            .any(|n| n.starts_with("thd:") && n.contains("above Nyquist")),
        "{:?}",
        r.figures.notes
    );
    // the stage is slewing most of the time: 2 A / SR per half period against 25 us
    assert!(r.events["buf"].slew_s > 0.1, "{:?}", r.events["buf"]);
    let json = serde_json::to_value(&m).unwrap();
    assert!(json["outputs"]["out"]["thd_percent"].is_null());
}

/// An inverter with a general JFET-input part made hard-cornered (knee 0) on +/-12 V: it
/// swings to 10.5 V either way (1.5 V output drop, stated here) and slews at 13 V/us.
const HARD: &str = r#"
[patch]
noise = false
length = "0.3 s"

[rails]
pos = "12 V"
neg = "-12 V"

[parts.hard]
based_on = "jfet-general"
knee = "0 V"
drop_pos = "1.5 V"
drop_neg = "1.5 V"
slew = "13 V/us"

[sources.osc]
wave = "sine"
freq = "997 Hz"
amp = "21 Vpk"
start = "0.1 s"

[stages.amp]
type = "inverting"
part = "hard"
from = "osc"
r_in = "10k"
r_fb = "10k"

[outputs.out]
from = "amp"
"#;

#[test]
fn clipping_part_is_not_counted_as_slewing_and_says_when_it_first_clips() {
    // The tone's steepest slope, 2 pi f A = 0.13 V/us, is a hundredth of the part's slew
    // rate (full-power bandwidth SR / (2 pi Vp), CHECKS.md [S]): the stage never slews,
    // though it sits at its swing limit a third of the time. Held at the limit is clipping,
    // not slewing.
    let p = load(HARD, &[]);
    let m = measure_of(&p);
    let e = m.outputs["out"].events["amp"];
    assert!(e.clip_s > 0.05, "{e:?}");
    assert!(e.slew_s < 1e-5, "{e:?}");
    // The output is -21 sin(w (t - 0.1 s)): it reaches the -10.5 V limit first where
    // 21 sin(w t') = 10.5, t' = asin(1/2) / (2 pi 997 Hz) after the switch-on (to within a
    // few internal samples at 192 kHz).
    let expect = 0.1 + (0.5f64).asin() / (2.0 * PI * 997.0);
    let t = e.first_clip_s.unwrap();
    assert!(
        (t - expect).abs() < 10e-6,
        "first clip at {t} s vs {expect} s"
    );
    assert_eq!(measure::first_clip(&m), Some(("amp".to_string(), t)));
    // The settle time starts at the switch-on (0.1 s) and lasts at least 50 ms.
    assert!(
        (m.settings.settle_s - 0.15).abs() < 1e-9,
        "{}",
        m.settings.settle_s
    );
}

#[test]
fn peak_is_the_circuits_and_the_file_peak_is_reported_apart() {
    // The part cannot pass 10.5 V (12 V rail, 1.5 V drop): the circuit's peak stops there
    // and its headroom is 0 dB, not negative; the band-limited file overshoots (Gibbs) and
    // that figure is the file's.
    let p = load(HARD, &["sources.osc.start=0 s", "sources.osc.amp=30 Vpk"]);
    let r = &measure_of(&p).outputs["out"];
    let f = &r.figures;
    let peak = f.peak_v.unwrap();
    assert!((peak - 10.5).abs() < 1e-9, "{peak}");
    assert!(f.file_peak_v.unwrap() > 10.5 + 0.05, "{:?}", f.file_peak_v);
    for h in [
        f.headroom_pos_db,
        f.headroom_neg_db,
        r.events["amp"].headroom_pos_db,
    ] {
        assert!(h.unwrap().abs() < 1e-9, "{h:?}");
    }
    // a stage inside its swing: headroom from its own peak, 20 log10(10.5 / 5) (the part's
    // input offset moves the peak by a few mV: 0.01 dB)
    let p = load(HARD, &["sources.osc.start=0 s", "sources.osc.amp=5 Vpk"]);
    let e = measure_of(&p).outputs["out"].events["amp"];
    let expect = 20.0 * (10.5f64 / 5.0).log10();
    assert!(
        (e.headroom_pos_db.unwrap() - expect).abs() < 0.02,
        "{e:?} vs {expect}"
    );
    assert_eq!(e.first_clip_s, None);
}

#[test]
fn settle_time_follows_the_slowest_time_constant() {
    // A 1 uF coupling capacitor into 10k: tau = R C = 10 ms, the settle time 14 tau
    // (exp(-14) = -122 dB); a 100 pF feedback capacitor on 10k (1 us) changes nothing.
    let p = load(
        INVERTER,
        &[
            "stages.amp.c_in=1u",
            "stages.amp.c_fb=100p",
            "patch.length=1 s",
        ],
    );
    assert!((measure::slowest_time_constant(&p) - 10e-3).abs() < 1e-12);
    assert!((measure::settle_time(&p) - 14.0 * 10e-3).abs() < 1e-12);
    let m = measure_of(&p);
    assert!(
        m.outputs["out"].figures.notes.is_empty(),
        "{:?}",
        m.outputs["out"].figures.notes
    );
    // when the record ends before settle time + 0.1 s, the capture says so
    let p = load(INVERTER, &["stages.amp.c_in=1u", "patch.length=0.2 s"]);
    let f = measure_of(&p).outputs["out"].figures.clone();
    assert!(
        f.notes.iter().any(|n| n.contains("after the settle time")),
        "{:?}",
        f.notes
    );
    assert!(f.thd_percent.is_some());
}

#[test]
fn alias_estimate_lists_the_stages_that_feed_each_output() {
    // Two stages share a part and feed `a`; a third, of another part, feeds only `b`.
    let text = r#"
[patch]
noise = false
length = "0.1 s"

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "997 Hz"
amp = "1 Vpk"

[stages.one]
type = "inverting"
part = "jfet-general"
from = "osc"
r_in = "10k"
r_fb = "10k"

[stages.two]
type = "inverting"
part = "jfet-general"
from = "one"
r_in = "10k"
r_fb = "10k"

[stages.other]
type = "follower"
part = "bipolar-lownoise"
from = "osc"

[outputs.a]
from = "two"

[outputs.b]
from = "other"
"#;
    let p = load(text, &[]);
    // `a` is fed by `one` and `two`, `b` by `other` only (the patch's wiring).
    let est = railsong::alias::estimate(&p, None).unwrap();
    let names: Vec<&str> = est.iter().map(|(n, _)| n.as_str()).collect();
    assert_eq!(names, ["a", "b"]);
    let stages =
        |i: usize| -> Vec<String> { est[i].1.stages.iter().map(|s| s.stage.clone()).collect() };
    assert_eq!(stages(0), ["one", "two"]);
    assert_eq!(stages(1), ["other"]);
    // A 1 Vpk tone is far inside every stage's range: linear stages make no new
    // frequencies (an LTI system maps a sinusoid to a sinusoid; textbook), so only the
    // arithmetic floor remains and nothing is flagged.
    for (_, a) in &est {
        assert!(a.dbc.unwrap() < -150.0, "{a:?}");
        assert!(!a.above_limit);
    }
    let only = railsong::alias::estimate(&p, Some("a")).unwrap();
    assert_eq!(only.len(), 1);
    let run = render::render(&p, &RenderOptions::default(), &mut |_| {}).unwrap();
    let mut m = measure::measure(&p, &run, None, &Default::default(), Some("a"), None);
    assert!(m.outputs["a"].alias.is_none());
    railsong::alias::apply(&p, &mut m).unwrap();
    assert_eq!(m.outputs["a"].alias, Some(only[0].1.clone()));
    assert!(m.settings.alias.contains("measured on this patch"));
}

#[test]
fn streamed_render_skips_the_same_settle_time_as_a_full_one() {
    // A streamed render keeps only the last TAIL_MAX samples; its capture must still start
    // at the settle time of the record, not of the tail. At 8 kHz a 34 s render keeps the
    // last 32.8 s, and a 10 uF coupling capacitor into 10k (tau 0.1 s) settles in 1.4 s,
    // which ends inside the tail: both renders must analyse the very same samples.
    let p = load(
        INVERTER,
        &[
            "patch.rate=8 kHz",
            "patch.length=34 s",
            "stages.amp.c_in=10u",
            "stages.amp.part=jfet-general",
        ],
    );
    let settings = railsong::analysis::Settings::default();
    let full = measure_of(&p);
    let streamed = render::render_streaming(
        &p,
        &RenderOptions::default(),
        &mut |_, _| Ok(()),
        &mut |_| {},
    )
    .unwrap();
    let frames = p.frames();
    assert_eq!(streamed.run.first_frame, frames - render::TAIL_MAX);
    assert!((measure::settle_time(&p) * p.rate) as usize > streamed.run.first_frame);
    let m = measure::measure(&p, &streamed.run, None, &settings, None, None);
    let (a, b) = (&full.outputs["out"].figures, &m.outputs["out"].figures);
    assert_eq!(a.fft_len, b.fft_len);
    assert_eq!(a.thd_percent, b.thd_percent);
    assert_eq!(a.thdn_db, b.thdn_db);
}

#[test]
fn render_summary_names_the_first_clip_and_the_alias_estimate() {
    // The render summary says which stage clips first and when (the closed form of the
    // clipping test above: 0.1 s + asin(1/2) / (2 pi 997 Hz) = 100.08 ms), and prints the
    // output's alias estimate once, saying it was measured on this patch.
    let dir = tempfile::tempdir().unwrap();
    let patch = dir.path().join("hard.toml");
    std::fs::write(&patch, HARD).unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_railsong"))
        .arg("render")
        .arg(&patch)
        .arg("--out")
        .arg(dir.path().join("out"))
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(text.contains("first clip: stage amp at 100.1 ms"), "{text}");
    assert_eq!(text.matches("alias of out at x4").count(), 1, "{text}");
    assert!(text.contains("measured on this patch"), "{text}");
}
