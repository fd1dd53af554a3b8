//! The analytic noise budget against closed forms.
//!
//! Sources of the expected values (CHECKS.md, "Noise" and "Op-amp stages"):
//! - Johnson-Nyquist e = sqrt(4 k T R), k = 1.380649e-23 J/K exactly (SI 2019) [S]; 1 kOhm at
//!   300 K: 4.070 nV/sqrt(Hz) and 0.5756 uV rms in 20 kHz [D];
//! - resistor noise at the output of an inverting stage e^2 = 4 k T Rf (1 + Rf / Rpar) [D];
//! - inverting gain -Rf/Rin, non-inverting 1 + Rf/Rg, noise gain 1 + Rf / Rpar (op-amp
//!   textbooks, e.g. Sedra & Smith; Franco) [S];
//! - the Thevenin equivalent of a resistive divider: open-circuit ratio Rb / (Rt + Rb), source
//!   resistance Rt || Rb, and its thermal noise 4 k T (Rt || Rb) (circuit theory; Nyquist) [D];
//! - independent noise sources add in power, correlated ones (one source along two paths) in
//!   amplitude [S, any noise text].

use railsong::budget::{
    band_power, budget, format_budget, johnson_density, try_budget, NoiseError, OutputBudget,
    BOLTZMANN, DEFAULT_BAND,
};
use railsong::model::{
    Feedback, Node, Output, Patch, Rails, Source, Stage, StageKind, SumInput, Taper, Wave,
};
use railsong::parts::{builtin, OpAmp};

const T: f64 = 300.0;

fn close(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * a.abs().max(b.abs()).max(1e-300)
}

/// 4 k T R, written out here from the Johnson-Nyquist formula [S].
fn four_ktr(r: f64) -> f64 {
    4.0 * 1.380649e-23 * T * r
}

fn sine(name: &str) -> Source {
    Source {
        name: name.into(),
        wave: Wave::Sine {
            freq: 1000.0,
            amp: 1.0,
            phase: 0.0,
        },
        offset: 0.0,
        start: 0.0,
        stop: None,
        envelope: None,
        r: 0.0,
    }
}

fn patch(n_sources: usize, stages: Vec<Stage>, outputs: Vec<Output>) -> Patch {
    Patch {
        title: "t".into(),
        rate: 48e3,
        length: 0.1,
        oversample: 4,
        seed: 1,
        noise: true,
        temperature: T,
        rails: Rails {
            pos: 12.0,
            neg: -12.0,
        },
        full_scale: 12.0,
        tolerances: Default::default(),
        sources: (0..n_sources).map(|i| sine(&format!("s{i}"))).collect(),
        stages,
        outputs,
    }
}

fn out(name: &str, from: Node, series: f64, load: Option<f64>) -> Output {
    Output {
        name: name.into(),
        from,
        inner: None,
        series,
        load,
        file: None,
    }
}

/// The ideal profile with chosen noise figures.
fn part(en: f64, corner: f64, inoise: f64) -> OpAmp {
    let mut p = builtin("ideal").unwrap();
    p.name = "test-part".into();
    p.en = en;
    p.en_corner = corner;
    p.inoise = inoise;
    p
}

fn summer(name: &str, p: OpAmp, inputs: &[(Node, f64)], rf: f64) -> Stage {
    Stage {
        name: name.into(),
        part: Some(p),
        kind: StageKind::InvertingSum {
            inputs: inputs
                .iter()
                .map(|(from, r)| SumInput {
                    from: *from,
                    r: *r,
                    c: None,
                })
                .collect(),
            feedback: Feedback {
                r: rf,
                c: None,
                pot: None,
            },
            reference: 0.0,
            single: inputs.len() == 1,
        },
    }
}

fn non_inverting(name: &str, p: OpAmp, from: Node, r_fb: f64, r_g: f64) -> Stage {
    Stage {
        name: name.into(),
        part: Some(p),
        kind: StageKind::NonInverting {
            from,
            r_fb,
            c_fb: None,
            r_g,
            reference: 0.0,
        },
    }
}

fn follower(name: &str, p: OpAmp, from: Node) -> Stage {
    Stage {
        name: name.into(),
        part: Some(p),
        kind: StageKind::Follower { from },
    }
}

fn attenuator(name: &str, from: Node, pot: f64, at: f64) -> Stage {
    Stage {
        name: name.into(),
        part: None,
        kind: StageKind::Attenuator {
            from,
            pot,
            taper: Taper::Linear,
            at,
        },
    }
}

fn item<'a>(b: &'a OutputBudget, starts: &str) -> &'a railsong::budget::Contribution {
    b.items
        .iter()
        .find(|c| c.label.starts_with(starts))
        .unwrap_or_else(|| panic!("no item '{starts}' in {:#?}", b.items))
}

fn density_sq(b: &OutputBudget) -> f64 {
    b.items.iter().map(|c| c.density_1k * c.density_1k).sum()
}

// CHECKS.md Noise [S]/[D]: 1 kOhm at 300 K, 4.070 nV/sqrt(Hz), 0.5756 uV rms in 20 kHz.
#[test]
fn johnson_nyquist_one_k_at_300_k() {
    assert_eq!(BOLTZMANN, 1.380649e-23); // SI 2019, exact by definition
    let e = johnson_density(1e3, 300.0);
    assert!(close(e, four_ktr(1e3).sqrt(), 1e-12));
    assert_eq!(format!("{:.3}", e * 1e9), "4.070");
    let rms = band_power(e, 0.0, (1.0, 20_001.0)).sqrt();
    assert!(close(rms, (four_ktr(1e3) * 20e3).sqrt(), 1e-12));
    assert_eq!(format!("{:.4}", rms * 1e6), "0.5756");

    // The same through a whole budget: an ideal follower, out through 1k, unloaded.
    let p = patch(
        1,
        vec![follower("buf", part(0.0, 0.0, 0.0), Node::Source(0))],
        vec![out("o", Node::Stage(0), 1e3, None)],
    );
    let b = &budget(&p, (1.0, 20_001.0))[0];
    assert_eq!(b.items.len(), 1);
    assert_eq!(b.items[0].label, "outputs.o.series (1k, thermal)");
    assert!(close(b.total_rms, rms, 1e-12));
    assert!(close(b.total_density_1k, e, 1e-12));
}

// CHECKS.md [D]: e^2 = 4 k T Rf (1 + Rf / Rpar): Rf's own noise at gain 1 plus each input
// resistor's noise at gain Rf / Ri.
#[test]
fn inverting_summer_resistor_noise() {
    let rin = [10e3, 47e3, 100e3];
    let rf = 100e3;
    let inputs: Vec<(Node, f64)> = rin
        .iter()
        .enumerate()
        .map(|(i, r)| (Node::Source(i), *r))
        .collect();
    let p = patch(
        3,
        vec![summer("mix", part(0.0, 0.0, 0.0), &inputs, rf)],
        vec![out("o", Node::Stage(0), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    let rpar = 1.0 / rin.iter().map(|r| 1.0 / r).sum::<f64>();
    let expect = four_ktr(rf) * (1.0 + rf / rpar);
    assert!(close(density_sq(b), expect, 1e-12));
    assert!(close(b.total_density_1k.powi(2), expect, 1e-12));
    assert!(close(
        b.total_rms.powi(2),
        expect * (DEFAULT_BAND.1 - DEFAULT_BAND.0),
        1e-12
    ));
    for (k, r) in rin.iter().enumerate() {
        let c = item(b, &format!("stages.mix.inputs[{k}].r ("));
        assert!(close(c.density_1k, four_ktr(*r).sqrt() * rf / r, 1e-12));
    }
    let c = item(b, "stages.mix.feedback.r (100k, thermal)");
    assert!(close(c.density_1k, four_ktr(rf).sqrt(), 1e-12));
}

// Non-inverting: Rf at gain 1 and Rg at gain Rf/Rg (textbook gains), so the same closed form
// with Rpar = Rg [D].
#[test]
fn non_inverting_resistor_noise() {
    let (rf, rg) = (90e3, 10e3);
    let p = patch(
        1,
        vec![non_inverting(
            "amp",
            part(0.0, 0.0, 0.0),
            Node::Source(0),
            rf,
            rg,
        )],
        vec![out("o", Node::Stage(0), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    assert!(close(density_sq(b), four_ktr(rf) * (1.0 + rf / rg), 1e-12));
    assert_eq!(b.items.len(), 2);
}

// Textbook: en appears at the output times the noise gain 1 + Rf / Rin (inverting) or 1 + Rf/Rg
// (non-inverting), at signal gains 1, 10 and 100.
#[test]
fn en_times_noise_gain() {
    let en = 10e-9;
    for gain in [1.0, 10.0, 100.0] {
        let rin = 10e3;
        let rf = gain * rin;
        let p = patch(
            1,
            vec![summer(
                "inv",
                part(en, 0.0, 0.0),
                &[(Node::Source(0), rin)],
                rf,
            )],
            vec![out("o", Node::Stage(0), 0.0, None)],
        );
        let b = &budget(&p, DEFAULT_BAND)[0];
        let c = item(b, "stages.inv en (test-part)");
        assert!(close(c.density_1k, en * (1.0 + rf / rin), 1e-12), "{gain}");

        let stage = if gain == 1.0 {
            follower("ni", part(en, 0.0, 0.0), Node::Source(0))
        } else {
            non_inverting("ni", part(en, 0.0, 0.0), Node::Source(0), rf - rin, rin)
        };
        let p = patch(1, vec![stage], vec![out("o", Node::Stage(0), 0.0, None)]);
        let b = &budget(&p, DEFAULT_BAND)[0];
        let c = item(b, "stages.ni en (test-part)");
        assert!(close(c.density_1k, en * gain, 1e-12), "{gain}");
    }
}

// Ideal op-amp: the inverting input is held at the reference, so in- flows through Rf alone
// and appears as in * Rf [S, textbook]; in+ through the source resistance times the noise gain.
#[test]
fn current_noise_through_feedback_and_source_resistance() {
    let inoise = 1e-12;
    let (rin, rf) = (10e3, 100e3);
    let p = patch(
        1,
        vec![summer(
            "inv",
            part(0.0, 0.0, inoise),
            &[(Node::Source(0), rin)],
            rf,
        )],
        vec![out("o", Node::Stage(0), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    let c = item(b, "stages.inv in- (test-part");
    assert!(close(c.density_1k, inoise * rf, 1e-12));
    assert!(!b.items.iter().any(|c| c.label.contains("in+")));

    // A follower behind a 10k linear pot at mid-rotation: source resistance 5k || 5k [D].
    let p = patch(
        1,
        vec![
            attenuator("vol", Node::Source(0), 10e3, 0.5),
            follower("buf", part(0.0, 0.0, inoise), Node::Stage(0)),
        ],
        vec![out("o", Node::Stage(1), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    let c = item(b, "stages.buf in+ (test-part, through 2k5)");
    assert!(close(c.density_1k, inoise * 2.5e3, 1e-12));
}

// en^2 (1 + fc / f) over 20 Hz .. 20 kHz against a plain numerical integral: composite Simpson
// in u = ln f (df = f du), 20000 panels.
#[test]
fn one_over_f_band_integral() {
    let (en, fc) = (10e-9, 200.0);
    let p = patch(
        1,
        vec![follower("buf", part(en, fc, 0.0), Node::Source(0))],
        vec![out("o", Node::Stage(0), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    let (f1, f2) = DEFAULT_BAND;
    let n = 20_000;
    let (u1, u2) = (f1.ln(), f2.ln());
    let h = (u2 - u1) / n as f64;
    let g = |u: f64| {
        let f = u.exp();
        en * en * (1.0 + fc / f) * f
    };
    let mut s = g(u1) + g(u2);
    for i in 1..n {
        let w = if i % 2 == 1 { 4.0 } else { 2.0 };
        s += w * g(u1 + i as f64 * h);
    }
    let numeric = s * h / 3.0;
    assert!(close(b.total_rms.powi(2), numeric, 1e-9));
    // spot density at 1 kHz: en sqrt(1 + fc / 1000)
    assert!(close(
        b.total_density_1k,
        en * (1.0 + fc / 1e3).sqrt(),
        1e-12
    ));
    // the corner raises the rms above the white part alone
    assert!(b.total_rms > en * (f2 - f1).sqrt());
}

// The ideal profile has en = in = 0: only the resistors remain.
#[test]
fn ideal_part_leaves_only_resistors() {
    let p = patch(
        2,
        vec![summer(
            "mix",
            builtin("ideal").unwrap(),
            &[(Node::Source(0), 10e3), (Node::Source(1), 22e3)],
            47e3,
        )],
        vec![out("o", Node::Stage(0), 1e3, Some(100e3))],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    assert_eq!(b.items.len(), 5);
    assert!(b.items.iter().all(|c| c.label.contains(", thermal")));
    // with a real part its en and in- join them
    let mut q = p.clone();
    q.stages[0].part = builtin("jfet-general");
    let b = &budget(&q, DEFAULT_BAND)[0];
    assert_eq!(b.items.len(), 7);
    assert!(b
        .items
        .iter()
        .any(|c| c.label == "stages.mix en (jfet-general)"));
}

fn mixer_text() -> &'static str {
    r#"
[patch]
temperature = "300 K"
[rails]
pos = "12 V"
neg = "-12 V"
[sources.a]
wave = "sine"
freq = "1 kHz"
amp = "1 V"
[sources.b]
wave = "sine"
freq = "2 kHz"
amp = "1 V"
[stages.vol]
type = "attenuator"
from = "b"
pot = "10k"
taper = "linear"
at = 0.5
[stages.mix]
type = "inverting-sum"
part = "jfet-general"
inputs = [{ from = "a", r = "100k" }, { from = "vol", r = "100k" }, { from = "a", r = "100k" }]
feedback = { r = "100k" }
[stages.inv]
type = "inverting"
part = "bipolar-lownoise"
from = "mix"
r_in = "10k"
r_fb = "10k"
[outputs.main]
from = "inv"
series = "1k"
load = "100k"
"#
}

fn mixer() -> Patch {
    railsong::patch::parse_str(mixer_text(), "mix.toml", std::path::Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"))
}

// Shares are of the total power, so they sum to 100 % and the item powers sum to the total.
#[test]
fn shares_sum_to_one_hundred_and_are_sorted() {
    let b = &budget(&mixer(), DEFAULT_BAND)[0];
    let share: f64 = b.items.iter().map(|c| c.share).sum();
    assert!((share - 100.0).abs() < 1e-9);
    let power: f64 = b.items.iter().map(|c| c.rms * c.rms).sum();
    assert!(close(power, b.total_rms.powi(2), 1e-12));
    assert!(b.items.windows(2).all(|w| w[0].share >= w[1].share));
    for c in &b.items {
        assert!(close(
            c.share,
            100.0 * c.rms * c.rms / b.total_rms.powi(2),
            1e-12
        ));
    }
}

// Labels name each contributor by its patch key path.
#[test]
fn labels_follow_patch_keys() {
    let b = &budget(&mixer(), DEFAULT_BAND)[0];
    for want in [
        "stages.mix.inputs[0].r (100k, thermal)",
        "stages.mix.inputs[1].r (100k, thermal)",
        "stages.mix.inputs[2].r (100k, thermal)",
        "stages.mix.feedback.r (100k, thermal)",
        "stages.mix en (jfet-general)",
        "stages.mix in- (jfet-general, into 100k)",
        "stages.vol.pot upper (5k, thermal)",
        "stages.vol.pot lower (5k, thermal)",
        "stages.inv.r_in (10k, thermal)",
        "stages.inv.r_fb (10k, thermal)",
        "stages.inv en (bipolar-lownoise)",
        "outputs.main.series (1k, thermal)",
        "outputs.main.load (100k, thermal, next module's input)",
    ] {
        assert!(
            b.items.iter().any(|c| c.label == want),
            "missing '{want}' in {:#?}",
            b.items
        );
    }
    let text = format_budget(b);
    assert!(text.contains("share %") && text.contains("nV/rtHz") && text.contains("uV rms"));
    for c in &b.items {
        assert!(text.contains(&c.label));
    }
    assert!(text.contains(&format!("{:.4}", b.total_rms * 1e6)));
    assert_eq!(text.lines().count(), 2 + b.items.len() + 1 + b.notes.len());
}

// A divider's wiper at the ground end (at = 0): the lower segment is 0 ohm and the upper
// segment's noise divides by 0 (Rb / (Rt + Rb) = 0) [D]; nothing from the track or upstream
// reaches the follower.
#[test]
fn attenuator_at_ground_end_adds_nothing() {
    let p = patch(
        1,
        vec![
            summer(
                "pre",
                builtin("jfet-general").unwrap(),
                &[(Node::Source(0), 10e3)],
                100e3,
            ),
            attenuator("vol", Node::Stage(0), 10e3, 0.0),
            follower("buf", part(0.0, 0.0, 0.0), Node::Stage(1)),
        ],
        vec![out("o", Node::Stage(2), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    assert!(b.items.is_empty(), "{:#?}", b.items);
    assert_eq!(b.total_rms, 0.0);
    // at mid-rotation the wiper is a 5k || 5k Thevenin source: 4 k T (2.5k) plus the upstream
    // stage's noise halved [D]
    let mut q = p.clone();
    if let StageKind::Attenuator { at, .. } = &mut q.stages[1].kind {
        *at = 0.5;
    }
    let bq = &budget(&q, DEFAULT_BAND)[0];
    let track: f64 = bq
        .items
        .iter()
        .filter(|c| c.label.starts_with("stages.vol.pot"))
        .map(|c| c.density_1k.powi(2))
        .sum();
    assert!(close(track, four_ktr(2.5e3), 1e-12));
    let pre = &budget(
        &{
            let mut r = p.clone();
            r.outputs[0].from = Node::Stage(0);
            r
        },
        DEFAULT_BAND,
    )[0];
    assert!(close(density_sq(bq) - track, 0.25 * density_sq(pre), 1e-9));
}

// The wiper's source resistance adds to the summing resistor: gain -Rf / (Ri + Rth), so the
// resistor noise follows e^2 = 4 k T Rf (1 + Rf / (Ri + Rth)) [D].
#[test]
fn attenuator_resistance_enters_summer_gain() {
    let (rin, rf) = (10e3, 10e3);
    let p = patch(
        1,
        vec![
            attenuator("vol", Node::Source(0), 10e3, 0.5),
            summer("inv", part(0.0, 0.0, 0.0), &[(Node::Stage(0), rin)], rf),
        ],
        vec![out("o", Node::Stage(1), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    let rth = 2.5e3;
    assert!(close(
        density_sq(b),
        four_ktr(rf) * (1.0 + rf / (rin + rth)),
        1e-12
    ));
}

// 1 kOhm series into a 100 kOhm load: the node and the series resistor divide by
// RL / (Rs + RL), the load's own noise by Rs / (Rs + RL); together 4 k T (Rs || RL) [D]; the
// level loss is 0.086 dB (CHECKS.md [D]).
#[test]
fn series_into_load_divides() {
    let en = 20e-9;
    let (rs, rl) = (1e3, 100e3);
    let p = patch(
        1,
        vec![follower("buf", part(en, 0.0, 0.0), Node::Source(0))],
        vec![out("main", Node::Stage(0), rs, Some(rl))],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    let div = rl / (rs + rl);
    assert!((20.0 * div.log10() + 0.086).abs() < 5e-4);
    assert!(close(item(b, "stages.buf en").density_1k, en * div, 1e-12));
    let s = item(b, "outputs.main.series (1k, thermal)");
    assert!(close(s.density_1k, four_ktr(rs).sqrt() * div, 1e-12));
    let l = item(b, "outputs.main.load (100k");
    assert!(close(
        l.density_1k,
        four_ktr(rl).sqrt() * rs / (rs + rl),
        1e-12
    ));
    assert!(close(
        s.density_1k.powi(2) + l.density_1k.powi(2),
        four_ktr(rs * rl / (rs + rl)),
        1e-12
    ));
    // the notes give the total without the next module's load resistor
    let without = (b.total_rms.powi(2) - l.rms.powi(2)).sqrt();
    assert!(b
        .notes
        .iter()
        .any(|n| n.contains("without it") && n.contains(&format!("{:.4}", without * 1e6))));
}

// One source reaching an output along two paths adds in amplitude [S]: a stage feeding two
// unity inputs of a summer reaches its output at gain 2, not sqrt 2.
#[test]
fn reconvergent_paths_add_in_amplitude() {
    let en = 10e-9;
    let p = patch(
        1,
        vec![
            follower("buf", part(en, 0.0, 0.0), Node::Source(0)),
            summer(
                "mix",
                part(0.0, 0.0, 0.0),
                &[(Node::Stage(0), 10e3), (Node::Stage(0), 10e3)],
                10e3,
            ),
        ],
        vec![out("o", Node::Stage(1), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    assert!(close(item(b, "stages.buf en").density_1k, 2.0 * en, 1e-12));
}

// Closed-loop bandwidth GBW / NG (textbook): 1 MHz at noise gain 100 is 10 kHz, inside the
// band, and is flagged; at noise gain 10 (100 kHz) it is not.
#[test]
fn narrow_stage_is_flagged() {
    let mk = |rf: f64| {
        patch(
            1,
            vec![non_inverting(
                "amp",
                builtin("single-supply").unwrap(),
                Node::Source(0),
                rf,
                1e3,
            )],
            vec![out("o", Node::Stage(0), 0.0, None)],
        )
    };
    let flagged = |p: &Patch| {
        budget(p, DEFAULT_BAND)[0]
            .notes
            .iter()
            .any(|n| n.starts_with("stages.amp: closed-loop bandwidth"))
    };
    assert!(flagged(&mk(99e3)));
    assert!(!flagged(&mk(9e3)));
}

#[test]
fn bad_band_is_an_error() {
    let p = mixer();
    for band in [
        (0.0, 20e3),
        (20e3, 20.0),
        (20.0, f64::INFINITY),
        (f64::NAN, 1.0),
    ] {
        assert!(budget(&p, band).is_empty());
        assert!(matches!(try_budget(&p, band), Err(NoiseError::Band { .. })));
    }
    let e = try_budget(&p, (0.0, 1.0)).unwrap_err().to_string();
    assert!(e.contains("0 < low < high"));
}

/// `fp (atan(f2 / fp) - atan(f1 / fp))`: the integral of `1 / (1 + (f / fp)^2)` over the band,
/// a one-pole low-pass's power response [D].
fn lowpass_integral(fp: f64, (f1, f2): (f64, f64)) -> f64 {
    fp * ((f2 / fp).atan() - (f1 / fp).atan())
}

// A capacitor across Rf: every resistor's noise sees the one-pole low-pass 1 / (1 + j f / fp),
// fp = 1 / (2 pi Rf Cf) [S, textbook], so the power is the flat density times the integral
// above [D], and the spot density at fp = 1 kHz is the flat one over sqrt 2.
#[test]
fn feedback_capacitor_low_passes_resistor_noise() {
    let (rin, rf) = (10e3, 100e3);
    let fp = 1e3;
    let cf = 1.0 / (2.0 * std::f64::consts::PI * rf * fp);
    let mut st = summer("inv", part(0.0, 0.0, 0.0), &[(Node::Source(0), rin)], rf);
    if let StageKind::InvertingSum { feedback, .. } = &mut st.kind {
        feedback.c = Some(cf);
    }
    let p = patch(1, vec![st], vec![out("o", Node::Stage(0), 0.0, None)]);
    let b = &budget(&p, DEFAULT_BAND)[0];
    let flat = four_ktr(rf) * (1.0 + rf / rin);
    // (the ideal profile's 1 THz GBW moves this by about 1e-8)
    assert!(close(b.total_density_1k.powi(2), flat / 2.0, 1e-6));
    assert!(close(
        b.total_rms.powi(2),
        flat * lowpass_integral(fp, DEFAULT_BAND),
        1e-5
    ));
    assert!(b.notes.iter().any(|n| n.starts_with("stages.inv.c_fb")));
}

// A coupling capacitor in series with Ri: Ri's noise reaches the output through
// -Rf / (Ri + 1 / (j w C)), |H|^2 = (Rf / Ri)^2 f^2 / (f^2 + fp^2), fp = 1 / (2 pi Ri C), whose
// integral is (Rf / Ri)^2 (f2 - f1 - fp (atan(f2 / fp) - atan(f1 / fp))) [D]; Rf stays flat.
#[test]
fn coupling_capacitor_high_passes_its_resistor() {
    let (rin, rf) = (10e3, 20e3);
    let fp = 100.0;
    let c = 1.0 / (2.0 * std::f64::consts::PI * rin * fp);
    let mut st = summer("inv", part(0.0, 0.0, 0.0), &[(Node::Source(0), rin)], rf);
    if let StageKind::InvertingSum { inputs, .. } = &mut st.kind {
        inputs[0].c = Some(c);
    }
    let p = patch(1, vec![st], vec![out("o", Node::Stage(0), 0.0, None)]);
    let b = &budget(&p, DEFAULT_BAND)[0];
    let (f1, f2) = DEFAULT_BAND;
    let want = four_ktr(rin) * (rf / rin).powi(2) * (f2 - f1 - lowpass_integral(fp, DEFAULT_BAND));
    assert!(close(item(b, "stages.inv.r_in").rms.powi(2), want, 1e-5));
    let flat_rf = four_ktr(rf) * (f2 - f1);
    assert!(close(item(b, "stages.inv.r_fb").rms.powi(2), flat_rf, 1e-9));
}

// Single-pole closed loop G(f) = G0 / (1 + j f NG / GBW) [S]: a follower on a 10 kHz GBW part
// low-passes its own en at 10 kHz. With a 1/f corner the band power is
// en^2 (I0 + fc I1), I0 the low-pass integral above and
// I1 = ln(f2 / f1) - ln((1 + (f2/fp)^2) / (1 + (f1/fp)^2)) / 2 [D].
#[test]
fn gain_bandwidth_rolls_off_the_noise() {
    let (en, fc, gbw) = (10e-9, 100.0, 10e3);
    let mut pt = part(en, fc, 0.0);
    pt.gbw = gbw;
    pt.a0 = None;
    let p = patch(
        1,
        vec![follower("buf", pt, Node::Source(0))],
        vec![out("o", Node::Stage(0), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    let (f1, f2) = DEFAULT_BAND;
    let i0 = lowpass_integral(gbw, DEFAULT_BAND);
    let i1 = (f2 / f1).ln() - 0.5 * ((1.0 + (f2 / gbw).powi(2)) / (1.0 + (f1 / gbw).powi(2))).ln();
    assert!(close(b.total_rms.powi(2), en * en * (i0 + fc * i1), 1e-5));
    let spot = en * en * (1.0 + fc / 1e3) / (1.0 + (1e3 / gbw).powi(2));
    assert!(close(b.total_density_1k.powi(2), spot, 1e-9));
    assert!(b
        .notes
        .iter()
        .any(|n| n.starts_with("stages.buf: closed-loop bandwidth")));
}

// The table layout (our own): share %, nV/rtHz at 1 kHz, uV rms, contributor. One 1k resistor
// at 300 K over a 20 kHz wide band: 4.070 nV/rtHz, 0.5756 uV rms (CHECKS.md [D]).
#[test]
fn table_layout() {
    let p = patch(
        1,
        vec![follower("buf", part(0.0, 0.0, 0.0), Node::Source(0))],
        vec![out("o", Node::Stage(0), 1e3, None)],
    );
    let b = &budget(&p, (1.0, 20_001.0))[0];
    let text = format_budget(b);
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines[0], "noise at output 'o'");
    assert_eq!(
        lines[1].split_whitespace().collect::<Vec<_>>(),
        ["share", "%", "nV/rtHz", "uV", "rms", "contributor"]
    );
    let row: Vec<&str> = lines[2].split_whitespace().collect();
    assert_eq!(row[..3], ["100.00", "4.070", "0.5756"]);
    assert_eq!(row[3..].join(" "), "outputs.o.series (1k, thermal)");
    let total: Vec<&str> = lines[3].split_whitespace().collect();
    assert_eq!(total, ["100.00", "4.070", "0.5756", "total"]);
    assert!(lines[4..].iter().all(|l| l.starts_with("note: ")));
}

// The load resistor is counted but can be left out for comparison: the total without it is the
// power sum of the other items [D].
#[test]
fn total_without_load() {
    let b = &budget(&mixer(), DEFAULT_BAND)[0];
    let load = item(b, "outputs.main.load (");
    let want = (b.total_rms.powi(2) - load.rms.powi(2)).sqrt();
    assert!(close(b.rms_without_load(), want, 1e-12));
    assert!(b.rms_without_load() < b.total_rms);
}

// Labels for the other key paths: a feedback pot, a coupling capacitor's corner note, a
// non-inverting stage and a follower behind a pot (in+ through the wiper resistance).
#[test]
fn labels_for_pots_and_non_inverting() {
    let text = r#"
[patch]
temperature = "300 K"
[rails]
pos = "12 V"
neg = "-12 V"
[sources.a]
wave = "sine"
freq = "1 kHz"
amp = "1 V"
[stages.gain]
type = "inverting"
part = "jfet-general"
from = "a"
r_in = "10k"
c_in = "1u"
feedback = { pot = "100k", taper = "linear", at = 0.5 }
[stages.vol]
type = "attenuator"
from = "gain"
pot = "10k"
taper = "linear"
at = 0.5
[stages.buf]
type = "follower"
part = "bipolar-lownoise"
from = "vol"
[stages.boost]
type = "non-inverting"
part = "bipolar-lownoise"
from = "buf"
r_fb = "22k"
r_g = "2k2"
[outputs.out]
from = "boost"
"#;
    let p = railsong::patch::parse_str(text, "t.toml", std::path::Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"));
    let b = &budget(&p, DEFAULT_BAND)[0];
    for want in [
        "stages.gain.feedback.pot (50k set, thermal)",
        "stages.gain.r_in (10k, thermal)",
        "stages.buf in+ (bipolar-lownoise, through 2k5)",
        "stages.buf en (bipolar-lownoise)",
        "stages.boost.r_fb (22k, thermal)",
        "stages.boost.r_g (2k2, thermal)",
        "stages.boost in- (bipolar-lownoise, into 22k)",
    ] {
        assert!(
            b.items.iter().any(|c| c.label == want),
            "missing '{want}' in {:#?}",
            b.items
        );
    }
    // 10k with 1 uF: 15.9 Hz, below the band, so no note; 10k with 100 nF: 159 Hz, noted
    assert!(!b.notes.iter().any(|n| n.starts_with("stages.gain.c_in")));
    let q = railsong::patch::parse_str(
        text,
        "t.toml",
        std::path::Path::new("."),
        &["stages.gain.c_in=100n".into()],
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let bq = &budget(&q, DEFAULT_BAND)[0];
    // closed form 1 / (2 pi 10k 100n) = 159.15 Hz, printed to four figures; the resistance
    // the capacitor sees is 10k plus the virtual ground's fraction of an ohm (finite A0),
    // which may round the last figure down
    assert!(
        bq.notes.iter().any(|n| n.starts_with("stages.gain.c_in")
            && n.contains("R = 10k,")
            && (n.contains("159.2 Hz") || n.contains("159.1 Hz"))),
        "{:#?}",
        bq.notes
    );
    // the unloaded output is said to be unloaded
    assert!(b.notes.iter().any(|n| n.contains("unloaded")));
}

// A pot wiper shared by two summing resistors: the budget solves the wiper node with every
// load on it. By nodal analysis (Kirchhoff's current law at the wiper, virtual ground at V-)
// [D]: G = 1/Ru + 1/Rl + 1/R1 + 1/R2; a track segment Rx reaches the output at
// Rf (1/R1 + 1/R2) / (Rx G), a summing resistor Rk at Rf (1/Rk - (1/R1 + 1/R2) / (Rk G)), and
// Rf at 1.
#[test]
fn shared_wiper_is_solved_with_all_its_loads() {
    let (pot, at) = (10e3, 0.7);
    let (ru, rl) = (pot * (1.0 - at), pot * at);
    let (r1, r2, rf) = (10e3, 22e3, 47e3);
    let p = patch(
        1,
        vec![
            attenuator("vol", Node::Source(0), pot, at),
            summer(
                "mix",
                part(0.0, 0.0, 0.0),
                &[(Node::Stage(0), r1), (Node::Stage(0), r2)],
                rf,
            ),
        ],
        vec![out("a", Node::Stage(1), 0.0, None)],
    );
    let b = &budget(&p, DEFAULT_BAND)[0];
    let g = 1.0 / ru + 1.0 / rl + 1.0 / r1 + 1.0 / r2;
    let sum = 1.0 / r1 + 1.0 / r2;
    let seg = |rx: f64| rf * sum / (rx * g);
    let inp = |rk: f64| rf * (1.0 / rk - sum / (rk * g));
    for (label, r, gain) in [
        ("stages.vol.pot upper", ru, seg(ru)),
        ("stages.vol.pot lower", rl, seg(rl)),
        ("stages.mix.inputs[0].r", r1, inp(r1)),
        ("stages.mix.inputs[1].r", r2, inp(r2)),
        ("stages.mix.feedback.r", rf, 1.0),
    ] {
        let c = item(b, label);
        assert!(
            close(c.density_1k, four_ktr(r).sqrt() * gain.abs(), 1e-9),
            "{label}"
        );
    }
    assert_eq!(b.items.len(), 5);
}

// Seeded sweep over summers with 1 to 5 inputs: resistor noise 4 k T Rf (1 + Rf / Rpar) and en
// times 1 + Rf / Rpar (CHECKS.md [D], textbook noise gain [S]) for every drawn circuit; white
// sources through flat gains give rms^2 = density^2 (f2 - f1) [D].
#[test]
fn seeded_summers_match_closed_forms() {
    let mut state: u64 = 0x5eed_2026;
    let mut uniform = move || {
        // 64-bit LCG (Knuth's MMIX constants), top 53 bits as a fraction
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    let en = 5e-9;
    for _ in 0..40 {
        let n = 1 + (uniform() * 5.0) as usize;
        let rs: Vec<f64> = (0..n).map(|_| 10f64.powf(3.0 + 3.0 * uniform())).collect();
        let rf = 10f64.powf(3.0 + 3.0 * uniform());
        let inputs: Vec<(Node, f64)> = rs
            .iter()
            .enumerate()
            .map(|(i, r)| (Node::Source(i), *r))
            .collect();
        let p = patch(
            n,
            vec![summer("mix", part(en, 0.0, 0.0), &inputs, rf)],
            vec![out("o", Node::Stage(0), 0.0, None)],
        );
        let b = &budget(&p, DEFAULT_BAND)[0];
        let rpar = 1.0 / rs.iter().map(|r| 1.0 / r).sum::<f64>();
        let ng = 1.0 + rf / rpar;
        let resistors: f64 = b
            .items
            .iter()
            .filter(|c| c.label.contains("thermal"))
            .map(|c| c.density_1k.powi(2))
            .sum();
        assert!(close(resistors, four_ktr(rf) * ng, 1e-6), "{rs:?} {rf}");
        assert!(close(item(b, "stages.mix en").density_1k, en * ng, 1e-6));
        assert!(close(
            b.total_rms.powi(2),
            b.total_density_1k.powi(2) * (DEFAULT_BAND.1 - DEFAULT_BAND.0),
            1e-6
        ));
    }
}

// A source's output resistance is a resistor of the circuit with its thermal noise. Behind a
// noiseless follower it is the whole output noise, 4 k T R over the band [D]; into an
// inverting stage it adds to the input resistor: gain -Rf / (Rs + Rin) for its noise, and
// Rf's own noise at gain 1 [D, nodal analysis of the inverting stage].
#[test]
fn source_resistance_is_a_noisy_resistor() {
    let (rs, rin, rf) = (47e3, 10e3, 100e3);
    let mut p = patch(
        1,
        vec![follower("buf", part(0.0, 0.0, 0.0), Node::Source(0))],
        vec![out("o", Node::Stage(0), 0.0, None)],
    );
    p.sources[0].r = rs;
    let b = &budget(&p, DEFAULT_BAND)[0];
    assert_eq!(b.items.len(), 1, "{:#?}", b.items);
    assert_eq!(b.items[0].label, "sources.s0.r (47k, thermal)");
    let band = DEFAULT_BAND.1 - DEFAULT_BAND.0;
    assert!(close(b.total_rms, (four_ktr(rs) * band).sqrt(), 1e-6));

    let mut p = patch(
        1,
        vec![summer(
            "inv",
            part(0.0, 0.0, 0.0),
            &[(Node::Source(0), rin)],
            rf,
        )],
        vec![out("o", Node::Stage(0), 0.0, None)],
    );
    p.sources[0].r = rs;
    let b = &budget(&p, DEFAULT_BAND)[0];
    let item = |l: &str| {
        b.items
            .iter()
            .find(|c| c.label.starts_with(l))
            .unwrap_or_else(|| panic!("{l} in {:#?}", b.items))
    };
    let g = rf / (rs + rin);
    assert!(close(
        item("sources.s0.r").density_1k,
        g * four_ktr(rs).sqrt(),
        1e-4
    ));
    assert!(close(
        item("stages.inv.r_in").density_1k,
        g * four_ktr(rin).sqrt(),
        1e-4
    ));
    assert!(close(
        item("stages.inv.r_fb").density_1k,
        four_ktr(rf).sqrt(),
        1e-4
    ));
}
