//! Valid patches in tests/good/ load into the expected model values.
//!
//! Sources of the expected values:
//! - resistor and capacitor codes (4k7, 2M2, 4n7): IEC 60062 [S];
//! - SI prefixes (k, M, m, u, n, p): BIPM SI Brochure, 9th ed. [S];
//! - crest factors (peak / RMS): sine sqrt 2, square 1, triangle and sawtooth sqrt 3, from the
//!   RMS integrals of each waveform [D];
//! - dBu: 0 dBu = sqrt(0.6) V rms (1 mW into 600 ohm), dBV: 0 dBV = 1 V rms [S, common
//!   practice of the audio trade];
//! - decibel voltage ratio 10^(dB/20) [S];
//! - pot taper law y = (b^x - 1)/(b - 1), b = (1/mid - 1)^2, from the parts::taper docs [D];
//!   default mid-rotation fractions 10 % (log) and 90 % (antilog) [P].

use std::f64::consts::{PI, SQRT_2};
use std::path::Path;

use railsong::model::{Node, Patch, StageKind, Taper, Wave};
use railsong::parts;

fn good(name: &str) -> Patch {
    let p = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/good")
        .join(name);
    railsong::patch::load(&p, &[]).unwrap_or_else(|e| panic!("{e}"))
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-9 * a.abs().max(b.abs()).max(1e-30)
}

/// The taper law from the parts::taper module docs, written out again here [D].
fn taper_law(mid: f64, x: f64) -> f64 {
    let b = (1.0 / mid - 1.0).powi(2);
    (b.powf(x) - 1.0) / (b - 1.0)
}

fn stage<'a>(p: &'a Patch, name: &str) -> (usize, &'a railsong::model::Stage) {
    p.stages
        .iter()
        .enumerate()
        .find(|(_, s)| s.name == name)
        .unwrap_or_else(|| panic!("no stage {name}"))
}

fn source_index(p: &Patch, name: &str) -> usize {
    p.sources.iter().position(|s| s.name == name).unwrap()
}

/// Every stage reads only sources and earlier stages (the model's ordering invariant).
fn assert_topological(p: &Patch) {
    for (i, s) in p.stages.iter().enumerate() {
        let froms: Vec<Node> = match &s.kind {
            StageKind::InvertingSum { inputs, .. } => inputs.iter().map(|x| x.from).collect(),
            StageKind::NonInverting { from, .. }
            | StageKind::Follower { from }
            | StageKind::Attenuator { from, .. } => vec![*from],
            StageKind::Network(n) => n.reads(),
        };
        for f in froms {
            match f {
                Node::Stage(j) => assert!(j < i, "stage {} reads a later stage", s.name),
                Node::Source(j) => assert!(j < p.sources.len()),
            }
        }
    }
}

#[test]
fn mixer_patch_settings() {
    let p = good("mixer.toml");
    assert_eq!(p.title, "three-channel mixer");
    assert_eq!(p.rate, 96e3);
    assert_eq!(p.length, 0.5);
    assert_eq!(p.oversample, 8);
    assert_eq!(p.seed, 42);
    assert!(p.noise);
    assert_eq!(p.temperature, 300.0);
    // full_scale = "24 Vpp" is 12 V peak.
    assert!(close(p.full_scale, 12.0));
    assert_eq!((p.rails.pos, p.rails.neg), (12.0, -12.0));
    // Sources keep file order.
    let names: Vec<&str> = p.sources.iter().map(|s| s.name.as_str()).collect();
    assert_eq!(names, ["bass", "lead", "buzz"]);
}

#[test]
fn mixer_levels_convert_with_each_waves_crest_factor() {
    let p = good("mixer.toml");
    match p.sources[0].wave {
        // 10 Vpp sine -> 5 V peak; 90 deg -> pi/2.
        Wave::Sine { freq, amp, phase } => {
            assert_eq!(freq, 110.0);
            assert!(close(amp, 10.0 / 2.0));
            assert!(close(phase, PI / 2.0));
        }
        ref w => panic!("{w:?}"),
    }
    match p.sources[1].wave {
        // 3.5 Vrms triangle -> 3.5 * sqrt 3 peak.
        Wave::Triangle { amp, raw, .. } => {
            assert!(close(amp, 3.5 * 3f64.sqrt()));
            assert!(!raw);
        }
        ref w => panic!("{w:?}"),
    }
    match p.sources[2].wave {
        Wave::Saw { amp, raw, .. } => {
            assert!(close(amp, 5.0));
            assert!(raw);
        }
        ref w => panic!("{w:?}"),
    }
    assert!(close(p.sources[2].offset, 0.1));
}

#[test]
fn mixer_summer_values_and_log_pot() {
    let p = good("mixer.toml");
    let (_, sum) = stage(&p, "sum");
    let part = sum.part.as_ref().unwrap();
    assert_eq!(part.name, "warm-jfet");
    assert_eq!(part.about, "a slower JFET part");
    assert!(close(part.slew, 8e6));
    // Not given: inherited from the built-in it is based on.
    let base = parts::builtin("jfet-general").unwrap();
    assert_eq!(part.gbw, base.gbw);
    assert_eq!(part.cm_low, base.cm_low);
    match &sum.kind {
        StageKind::InvertingSum {
            inputs,
            feedback,
            reference,
            single,
        } => {
            let rs: Vec<f64> = inputs.iter().map(|i| i.r).collect();
            assert_eq!(rs, [100e3, 4700.0, 2.2e6]);
            assert_eq!(inputs[0].c, None);
            assert!(close(inputs[1].c.unwrap(), 4.7e-6));
            assert!(close(inputs[2].c.unwrap(), 100e-9));
            assert_eq!(inputs[0].from, Node::Source(source_index(&p, "bass")));
            // A 100k log pot at mid-rotation with mid = 10 % is 10k.
            assert!(close(feedback.r, 100e3 * 0.10));
            assert!(close(feedback.r, 10e3));
            assert!(close(feedback.c.unwrap(), 33e-12));
            let pot = feedback.pot.unwrap();
            assert_eq!(pot.track, 100e3);
            assert_eq!(pot.at, 0.5);
            assert_eq!(pot.taper, Taper::Log { mid: 0.10 });
            assert_eq!(*reference, 0.0);
            assert!(!single);
        }
        k => panic!("{k:?}"),
    }
}

#[test]
fn mixer_inverting_stage_and_outputs() {
    let p = good("mixer.toml");
    let (sum_i, _) = stage(&p, "sum");
    let (restore_i, restore) = stage(&p, "restore");
    assert_eq!(restore.part.as_ref().unwrap().name, "bipolar-lownoise");
    match &restore.kind {
        StageKind::InvertingSum {
            inputs,
            feedback,
            reference,
            single,
        } => {
            assert!(single);
            assert_eq!(inputs.len(), 1);
            assert_eq!(inputs[0].from, Node::Stage(sum_i));
            assert_eq!(inputs[0].r, 10e3);
            assert_eq!(feedback.r, 10e3);
            assert!(close(feedback.c.unwrap(), 4.7e-9));
            assert!(feedback.pot.is_none());
            assert_eq!(*reference, 1.0);
        }
        k => panic!("{k:?}"),
    }
    assert_topological(&p);
    let out = &p.outputs[0];
    assert_eq!(out.name, "out");
    assert_eq!(out.from, Node::Stage(restore_i));
    assert_eq!(out.series, 1e3);
    assert_eq!(out.load, Some(100e3));
    assert_eq!(out.file.as_deref(), Some("mix.wav"));
    let direct = &p.outputs[1];
    assert_eq!(direct.from, Node::Stage(sum_i));
    assert_eq!(
        (direct.series, direct.load, direct.file.clone()),
        (0.0, None, None)
    );
}

#[test]
fn every_source_kind() {
    let p = good("every_source.toml");
    let src = |n: &str| &p.sources[source_index(&p, n)];
    let dbu = 0.6f64.sqrt();
    match src("s_sine").wave {
        // +4 dBu sine: rms = sqrt(0.6) * 10^(4/20), peak = rms * sqrt 2.
        Wave::Sine { freq, amp, .. } => {
            assert_eq!(freq, 997.0);
            assert!(close(amp, dbu * 10f64.powf(4.0 / 20.0) * SQRT_2));
        }
        ref w => panic!("{w:?}"),
    }
    match src("s_square").wave {
        // Square crest factor 1: 3 Vrms is 3 V peak.
        Wave::Square { amp, phase, .. } => {
            assert!(close(amp, 3.0));
            assert_eq!(phase, 1.0);
        }
        ref w => panic!("{w:?}"),
    }
    match src("s_tri").wave {
        Wave::Triangle { amp, .. } => assert!(close(amp, 4.0)),
        ref w => panic!("{w:?}"),
    }
    match src("s_saw").wave {
        // -10 dBV: 10^(-10/20) V rms; sawtooth crest factor sqrt 3.
        Wave::Saw { amp, .. } => assert!(close(amp, 10f64.powf(-0.5) * 3f64.sqrt())),
        ref w => panic!("{w:?}"),
    }
    match src("s_pulse").wave {
        Wave::Pulse { amp, width, .. } => {
            assert!(close(amp, 2.0));
            assert!(close(width, 0.25));
        }
        ref w => panic!("{w:?}"),
    }
    match &src("s_multi").wave {
        Wave::Multitone { tones } => {
            assert_eq!(tones.len(), 2);
            assert_eq!(
                (tones[0].freq, tones[0].amp, tones[0].phase),
                (60.0, 4.0, 0.0)
            );
            assert_eq!(tones[1].freq, 7e3);
            assert!(close(tones[1].amp, SQRT_2));
            assert!(close(tones[1].phase, PI));
        }
        w => panic!("{w:?}"),
    }
    match src("s_sweep").wave {
        Wave::Sweep {
            from,
            to,
            amp,
            duration,
        } => {
            assert_eq!((from, to, duration), (20.0, 20e3, 1.5));
            assert!(close(amp, SQRT_2));
        }
        ref w => panic!("{w:?}"),
    }
    match src("s_noise").wave {
        Wave::Noise { pink, rms } => {
            assert!(pink);
            assert!(close(rms, dbu * 10f64.powf(-20.0 / 20.0)));
        }
        ref w => panic!("{w:?}"),
    }
    match src("s_dc").wave {
        Wave::Dc { level } => assert_eq!(level, -2.5),
        ref w => panic!("{w:?}"),
    }
    match &src("s_steps").wave {
        Wave::Steps { levels, hold } => {
            assert_eq!(levels, &[0.0, 1.0, 2.0, -0.5]);
            assert_eq!(*hold, 0.25);
        }
        w => panic!("{w:?}"),
    }
    match src("s_ramp").wave {
        Wave::Ramp { from, to, duration } => assert_eq!((from, to, duration), (-5.0, 5.0, 2.0)),
        ref w => panic!("{w:?}"),
    }
    let file = src("s_file");
    match &file.wave {
        Wave::File {
            path,
            channel,
            full_scale,
            looped,
        } => {
            // Relative to the patch's folder, made absolute; not opened.
            assert!(path.is_absolute());
            assert!(
                path.ends_with("tests/good/audio/loop.wav"),
                "{}",
                path.display()
            );
            assert_eq!(*channel, Some(1));
            assert_eq!(*full_scale, 5.0);
            assert!(!looped);
        }
        w => panic!("{w:?}"),
    }
    assert!(close(file.start, 0.1));
    assert_eq!(file.stop, Some(1.5));
    assert_eq!(file.envelope, None);
    let env = src("s_kick").envelope.unwrap();
    assert!(close(env.attack, 2e-3));
    assert!(close(env.decay, 0.15));
    assert_eq!(env.every, Some(0.5));
    // No [patch] full_scale: 1.25 times the larger rail magnitude (Gibbs margin).
    assert_eq!(p.full_scale, 1.25 * 15.0);
}

#[test]
fn every_part_key_through_a_chain_of_user_parts() {
    let p = good("every_source.toml");
    let (_, gain) = stage(&p, "gain");
    let q = gain.part.as_ref().unwrap();
    assert_eq!(q.name, "quiet");
    assert_eq!(q.about, "based on base-quiet");
    // From base-quiet:
    assert!(close(q.gbw, 20e6));
    assert!(close(q.slew, 15e6));
    assert!(close(q.a0.unwrap(), 10f64.powf(120.0 / 20.0)));
    assert!(close(q.drop_pos, 1.1));
    assert!(close(q.drop_neg, 0.9));
    assert!(close(q.knee, 0.2));
    assert_eq!(q.cm_low, Some(-0.2));
    assert_eq!(q.cm_high, None);
    assert!(q.reversal);
    // From quiet itself:
    assert!(close(q.vos, -150e-6));
    assert!(close(q.ib, 80e-9));
    assert!(close(q.en, 3.2e-9));
    assert_eq!(q.en_corner, 5.0);
    assert!(close(q.inoise, 0.9e-12));
    assert_eq!(q.isc, None);
    assert_eq!(q.supply_max, 44.0);
}

#[test]
fn follower_non_inverting_and_attenuator() {
    let p = good("every_source.toml");
    let names: Vec<&str> = p.stages.iter().map(|s| s.name.as_str()).collect();
    assert_eq!(names, ["buf", "gain", "vol"]);
    assert_topological(&p);
    let (_, buf) = stage(&p, "buf");
    assert_eq!(buf.part.as_ref().unwrap().name, "ideal");
    assert_eq!(
        buf.kind,
        StageKind::Follower {
            from: Node::Source(source_index(&p, "s_sine"))
        }
    );
    match &stage(&p, "gain").1.kind {
        StageKind::NonInverting {
            from,
            r_fb,
            c_fb,
            r_g,
            reference,
        } => {
            assert_eq!(*from, Node::Stage(0));
            assert_eq!((*r_fb, *r_g, *reference), (22e3, 2.2e3, -1.0));
            assert!(close(c_fb.unwrap(), 100e-12));
        }
        k => panic!("{k:?}"),
    }
    let (_, vol) = stage(&p, "vol");
    assert!(vol.part.is_none());
    match vol.kind {
        StageKind::Attenuator {
            from,
            pot,
            taper,
            at,
        } => {
            assert_eq!(from, Node::Stage(1));
            assert_eq!(pot, 10e3);
            assert_eq!(taper, Taper::AntiLog { mid: 0.9 });
            assert!(close(at, 0.3));
        }
        ref k => panic!("{k:?}"),
    }
    assert_eq!(p.outputs[0].from, Node::Stage(2));
    assert_eq!(p.outputs[1].from, Node::Source(source_index(&p, "s_noise")));
    assert_eq!(p.outputs[1].load, None);
}

#[test]
fn stages_are_sorted_into_signal_order() {
    let p = good("chain.toml");
    assert_eq!(p.rate, 44100.0);
    assert_eq!((p.rails.pos, p.rails.neg), (12.0, 0.0));
    // Written last, middle, first, side; "side" reads "last".
    let names: Vec<&str> = p.stages.iter().map(|s| s.name.as_str()).collect();
    assert_eq!(names, ["first", "middle", "last", "side"]);
    assert_topological(&p);
    match &stage(&p, "middle").1.kind {
        StageKind::InvertingSum {
            inputs,
            feedback,
            reference,
            single,
        } => {
            assert!(single);
            assert_eq!(inputs[0].from, Node::Stage(0));
            // Antilog is the mirror of log: y(x) = 1 - law(1 - mid, 1 - x), mid = 0.9.
            let want = 50e3 * (1.0 - taper_law(0.1, 1.0 - 0.25));
            assert!(close(feedback.r, want), "{} vs {want}", feedback.r);
            assert_eq!(feedback.pot.unwrap().taper, Taper::AntiLog { mid: 0.9 });
            assert_eq!(*reference, 6.0);
        }
        k => panic!("{k:?}"),
    }
    assert_eq!(p.outputs[0].from, Node::Stage(2));
    assert_eq!(p.outputs[1].from, Node::Stage(3));
}

#[test]
fn defaults_of_a_minimal_patch() {
    let p = good("minimal.toml");
    assert_eq!(p.title, "minimal");
    assert_eq!(p.rate, 48e3);
    assert_eq!(p.length, 2.0);
    assert_eq!(p.oversample, 4);
    assert_eq!(p.seed, 1);
    // Circuit noise is on by default for renders (project decision, patches/README.md).
    assert!(p.noise);
    // 25 C = 298.15 K (SI definition of the degree Celsius) [S].
    assert!(close(p.temperature, 298.15));
    // Default calibration: 1.25 times the larger rail (Gibbs margin of a rail-to-rail step).
    assert_eq!(
        p.full_scale,
        1.25 * p.rails.pos.abs().max(p.rails.neg.abs())
    );
    assert_eq!(p.frames(), 96_000);
    assert!(p.stages.is_empty());
    assert_eq!(
        p.sources[0].wave,
        Wave::Sine {
            freq: 1000.0,
            amp: 1.0,
            phase: 0.0
        }
    );
    assert_eq!(p.outputs[0].from, Node::Source(0));
}

#[test]
fn variants_apply_over_the_base() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/good/chain.toml");
    let vars = railsong::patch::load_variants(&path).unwrap();
    let names: Vec<&str> = vars.iter().map(|v| v.name.as_str()).collect();
    assert_eq!(names, ["hot", "slow"]);
    // Unquoted dotted keys flatten back into paths.
    let paths: Vec<&str> = vars[1].overrides.iter().map(|(p, _)| p.as_str()).collect();
    assert_eq!(paths, ["stages.side.part", "patch.oversample"]);

    let hot = railsong::patch::load_variant(&path, Some("hot"), &[]).unwrap();
    match &stage(&hot, "middle").1.kind {
        StageKind::InvertingSum { feedback, .. } => {
            assert_eq!(feedback.pot.unwrap().at, 0.9);
            assert!(close(feedback.r, 50e3 * (1.0 - taper_law(0.1, 0.1))));
        }
        k => panic!("{k:?}"),
    }
    match stage(&hot, "first").1.kind {
        StageKind::Attenuator { at, .. } => assert_eq!(at, 1.0),
        ref k => panic!("{k:?}"),
    }
    let slow = railsong::patch::load_variant(&path, Some("slow"), &[]).unwrap();
    assert_eq!(slow.oversample, 16);
    assert_eq!(
        stage(&slow, "side").1.part.as_ref().unwrap().name,
        "single-supply"
    );
    // The base is untouched by its variants.
    let base = railsong::patch::load(&path, &[]).unwrap();
    assert_eq!(base.oversample, 4);
    let err = railsong::patch::load_variant(&path, Some("hott"), &[]).unwrap_err();
    assert!(
        err.to_string()
            .contains("no variant named 'hott' (did you mean 'hot'?)"),
        "{err}"
    );
}

/// A long chain written backwards sorts into signal order, and a long chain of derived parts
/// resolves, without deep recursion (thousands of stages).
#[test]
fn long_chains_of_stages_and_parts() {
    let n = 3000;
    let mut text =
        String::from("[rails]\npos = 12\nneg = -12\n[sources.s]\nwave = \"dc\"\nlevel = 1\n");
    for i in (0..n).rev() {
        let from = if i == 0 {
            "s".to_string()
        } else {
            format!("f{}", i - 1)
        };
        text.push_str(&format!(
            "[stages.f{i}]\ntype = \"follower\"\npart = \"p{i}\"\nfrom = \"{from}\"\n"
        ));
        let base = if i == 0 {
            "ideal".to_string()
        } else {
            format!("p{}", i - 1)
        };
        text.push_str(&format!("[parts.p{i}]\nbased_on = \"{base}\"\n"));
    }
    text.push_str(&format!("[outputs.o]\nfrom = \"f{}\"\n", n - 1));
    let p = railsong::patch::parse_str(&text, "chain.toml", Path::new("."), &[]).unwrap();
    assert_topological(&p);
    for (i, s) in p.stages.iter().enumerate() {
        assert_eq!(s.name, format!("f{i}"));
        assert_eq!(s.part.as_ref().unwrap().name, format!("p{i}"));
    }
    assert_eq!(p.outputs[0].from, Node::Stage(n - 1));
    // Closing the loop is reported as a cycle.
    let set = vec!["stages.f0.from=f2999".to_string()];
    let e = railsong::patch::parse_str(&text, "chain.toml", Path::new("."), &set).unwrap_err();
    let m = e.to_string();
    // The loop is printed in signal order from the stage written first in the file.
    assert!(
        m.contains("stages.f2999: cycle through stages f2999 -> f0 -> f1 -> "),
        "{}",
        &m[..200.min(m.len())]
    );
    // ... and ends with the cycle, then the advice to put a loop inside one network stage.
    assert!(m.contains("f2998 -> f2999 (a feedback loop must sit inside one network stage"));
}
