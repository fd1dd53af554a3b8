//! Values at the edges of every documented range (patches/README.md), alone and combined:
//! each documented minimum and maximum, just past them, 0, the smallest denormal, 1e-300 and
//! 1e300, with both signs. Whatever the combination: no panic, no NaN or infinity in any
//! sample, warning or printed figure, and through the binary (`check`, `render`, `measure`,
//! `noise`) an exit code of 0 or 2 only.
//!
//! proptest with fixed seeds (the runs are repeatable); `RAILSONG_EDGE_CASES=N` multiplies
//! the case counts and `RAILSONG_EDGE_SEED=S` picks another seed for longer runs. The counts
//! and durations of the recorded runs are in DEVELOPERS.md.

use std::cell::Cell;
use std::path::Path;
use std::process::Command;

use proptest::prelude::*;
use proptest::test_runner::{Config, RngAlgorithm, TestRng, TestRunner};

/// A small patch with every kind of figure in reach of `--set`: a part of its own, a sine
/// with an envelope, an inverting stage with a feedback capacitor, an attenuator and an
/// output with a series resistor and a load.
const BASE: &str = r#"
[patch]
length = "20 ms"
rate = "48 kHz"
oversample = 4

[rails]
pos = "12 V"
neg = "-12 V"

[parts.p]
based_on = "jfet-general"

[sources.s]
wave = "sine"
freq = "1 kHz"
amp = "1 V"
decay = "10 ms"

[stages.a]
type = "inverting"
part = "p"
from = "s"
r_in = "10k"
r_fb = "22k"
c_fb = "100p"

[stages.v]
type = "attenuator"
from = "a"
pot = "10k"
taper = "log"
at = 0.5

[outputs.out]
from = "v"
series = "1k"
load = "100k"
"#;

/// Every documented range reachable from [`BASE`] (key path, low end, high end), in base SI
/// units as patches/README.md lists them.
const RANGES: &[(&str, f64, f64)] = &[
    ("patch.rate", 8e3, 768e3),
    ("patch.length", 1e-3, 3600.0),
    ("patch.temperature", 1.0, 1000.0),
    ("patch.full_scale", 1e-3, 1000.0),
    ("rails.pos", -100.0, 100.0),
    ("rails.neg", -100.0, 100.0),
    ("sources.s.freq", 0.0, 24e3),
    ("sources.s.amp", 0.0, 1000.0),
    ("sources.s.offset", -1000.0, 1000.0),
    ("sources.s.phase", -1e6, 1e6),
    ("sources.s.start", 0.0, 3600.0),
    ("sources.s.attack", 0.0, 3600.0),
    ("sources.s.decay", 1e-6, 3600.0),
    ("sources.s.every", 1.0 / 48e3, 3600.0),
    ("parts.p.gbw", 100.0, 1e12),
    ("parts.p.slew", 1e3, 1e12),
    ("parts.p.a0", 1.0, 1e12),
    ("parts.p.drop_pos", 0.0, 100.0),
    ("parts.p.drop_neg", 0.0, 100.0),
    ("parts.p.knee", 0.0, 10.0),
    ("parts.p.cm_low", -100.0, 100.0),
    ("parts.p.cm_high", -100.0, 100.0),
    ("parts.p.vos", -1.0, 1.0),
    ("parts.p.ib", -1e-3, 1e-3),
    ("parts.p.en", 0.0, 1e-6),
    ("parts.p.en_corner", 0.0, 1e6),
    ("parts.p.in", 0.0, 1e-9),
    ("parts.p.isc", 1e-6, 100.0),
    ("parts.p.supply_max", 1.0, 1000.0),
    ("stages.a.r_in", 1e-3, 1e9),
    ("stages.a.r_fb", 1e-3, 1e9),
    ("stages.a.c_fb", 1e-15, 10.0),
    ("stages.v.pot", 1e-3, 1e9),
    ("stages.v.at", 0.0, 1.0),
    ("outputs.out.series", 1e-3, 1e9),
    ("outputs.out.load", 1e-3, 1e9),
];

/// The values tried for a range: its ends, just past them, 0, the extremes of f64 and both
/// signs of each.
fn edges(lo: f64, hi: f64) -> Vec<f64> {
    let step = |x: f64, up: bool| {
        let d = x.abs().max(1e-12) * 1e-9;
        if up {
            x + d
        } else {
            x - d
        }
    };
    let mut v = vec![
        lo,
        hi,
        step(lo, false),
        step(hi, true),
        step(lo, true),
        step(hi, false),
        0.0,
        5e-324,
        1e-300,
        1e300,
        0.5 * (lo + hi),
    ];
    let neg: Vec<f64> = v.iter().map(|x| -x).collect();
    v.extend(neg);
    v
}

/// A `--set` string for `path` = `x` (a plain TOML number is the value in SI units).
fn set(path: &str, x: f64) -> String {
    if x == x.trunc() && x.abs() < 1e15 {
        format!("{path}={x:.1}")
    } else {
        format!("{path}={x:e}")
    }
}

fn strategy() -> impl Strategy<Value = Vec<String>> {
    // Three in four values are inside their range (its ends, just inside, the middle), so
    // that most combinations reach the engine; the rest are anywhere on the edge list.
    let inside = (0..RANGES.len(), 0..5usize).prop_map(|(k, e)| {
        let (path, lo, hi) = RANGES[k];
        let v = edges(lo, hi);
        set(path, v[[0, 1, 4, 5, 10][e]])
    });
    let any = (0..RANGES.len(), 0..22usize).prop_map(|(k, e)| {
        let (path, lo, hi) = RANGES[k];
        let v = edges(lo, hi);
        set(path, v[e % v.len()])
    });
    prop::collection::vec(prop_oneof![3 => inside, 1 => any], 1..4)
}

/// Whether `text` shows a NaN or an infinity.
fn shows_non_finite(text: &str) -> bool {
    text.split(|c: char| c.is_whitespace() || ",;:()[]{}'\"=/".contains(c))
        .any(|t| {
            let t = t.trim_start_matches(['+', '-']);
            t.eq_ignore_ascii_case("nan") || t.eq_ignore_ascii_case("inf")
        })
}

/// Cases and seed: the given ones, or `RAILSONG_EDGE_CASES` (a multiplier) and
/// `RAILSONG_EDGE_SEED` from the environment for longer recorded runs.
fn runner(cases: u32, seed: u8) -> TestRunner {
    let env = |k: &str| std::env::var(k).ok().and_then(|v| v.parse::<u32>().ok());
    let cases = cases * env("RAILSONG_EDGE_CASES").unwrap_or(1);
    let seed = env("RAILSONG_EDGE_SEED").map_or(seed, |s| s as u8);
    TestRunner::new_with_rng(
        Config {
            cases,
            failure_persistence: None,
            ..Config::default()
        },
        TestRng::from_seed(RngAlgorithm::ChaCha, &[seed; 32]),
    )
}

/// Longest patch the library case renders (3600 s at the edge would take minutes).
const MAX_RENDER_S: f64 = 0.1;

#[test]
fn edge_values_through_the_library_never_panic_or_give_non_finite_figures() {
    let accepted = Cell::new(0usize);
    let refused = Cell::new(0usize);
    runner(1000, 14)
        .run(&strategy(), |sets| {
            let p = match railsong::patch::parse_str(BASE, "edge.toml", Path::new("."), &sets) {
                Ok(p) => p,
                Err(e) => {
                    let m = e.to_string();
                    prop_assert!(m.starts_with("edge.toml"), "{m}");
                    prop_assert!(!shows_non_finite(&m), "{m}");
                    refused.set(refused.get() + 1);
                    return Ok(());
                }
            };
            accepted.set(accepted.get() + 1);
            let report = railsong::check::check(&p);
            for w in &report.warnings {
                prop_assert!(!shows_non_finite(&w.message), "{sets:?}: {}", w.message);
            }
            if p.length > MAX_RENDER_S {
                return Ok(());
            }
            let opts = railsong::render::RenderOptions {
                frames: None,
                alias_probe: true,
                uncorrected: false,
            };
            let mut finite = true;
            let streamed = railsong::render::render_streaming(
                &p,
                &opts,
                &mut |_, x| {
                    finite &= x.iter().all(|v| v.is_finite());
                    Ok(())
                },
                &mut |_| {},
            );
            match streamed {
                Ok(s) => {
                    prop_assert!(finite, "{sets:?}: a non-finite sample");
                    for a in &s.run.alias {
                        prop_assert!(a.dbc.is_finite(), "{sets:?}: alias {}", a.dbc);
                    }
                    let m = railsong::measure::measure(
                        &p,
                        &s.run,
                        None,
                        &railsong::analysis::Settings::default(),
                        None,
                        None,
                    );
                    let json = railsong::measure::to_json(&m);
                    prop_assert!(!shows_non_finite(&json), "{sets:?}: {json}");
                }
                Err(e) => {
                    // The library may refuse what the patch let through only with a
                    // message, never a panic; the binary's check below holds it to exit 2.
                    let m = e.to_string();
                    prop_assert!(!shows_non_finite(&m), "{m}");
                }
            }
            Ok(())
        })
        .unwrap();
    let (accepted, refused) = (accepted.get(), refused.get());
    println!("library: {accepted} accepted, {refused} refused");
    assert!(accepted > 50 && refused > 50, "{accepted} / {refused}");
}

#[test]
fn edge_values_through_the_binary_exit_0_or_2_and_print_no_non_finite_number() {
    // check, render (and its figures file), measure and noise: every command that prints
    // figures of a patch.
    let tmp = tempfile::tempdir().unwrap();
    let patch = tmp.path().join("edge.toml");
    std::fs::write(&patch, BASE).unwrap();
    let codes = Cell::new([0usize; 3]);
    let case = Cell::new(0usize);
    runner(80, 41)
        .run(&strategy(), |sets| {
            case.set(case.get() + 1);
            let case = case.get();
            for cmd in ["check", "render", "measure", "noise"] {
                let out_dir = tmp.path().join(format!("out{case}"));
                let mut args: Vec<String> = vec![cmd.into(), patch.display().to_string()];
                if cmd == "render" {
                    args.push("--out".into());
                    args.push(out_dir.display().to_string());
                }
                for s in &sets {
                    args.push("--set".into());
                    args.push(s.clone());
                }
                let o = Command::new(env!("CARGO_BIN_EXE_railsong"))
                    .args(&args)
                    .output()
                    .unwrap();
                let (so, se) = (
                    String::from_utf8_lossy(&o.stdout),
                    String::from_utf8_lossy(&o.stderr),
                );
                let code = o.status.code();
                prop_assert!(
                    matches!(code, Some(0) | Some(2)),
                    "{cmd} {sets:?}: exit {code:?}: {se}"
                );
                prop_assert!(!se.contains("panicked"), "{cmd} {sets:?}: {se}");
                prop_assert!(!shows_non_finite(&so), "{cmd} {sets:?}: {so}");
                prop_assert!(!shows_non_finite(&se), "{cmd} {sets:?}: {se}");
                if code == Some(2) {
                    prop_assert_eq!(se.trim_end().lines().count(), 1, "{}", se);
                }
                if cmd == "render" && code == Some(0) {
                    let fig = std::fs::read_to_string(out_dir.join("figures.json")).unwrap();
                    prop_assert!(!shows_non_finite(&fig), "{sets:?}: {fig}");
                }
                let mut c = codes.get();
                c[code.unwrap_or(1) as usize] += 1;
                codes.set(c);
                let _ = std::fs::remove_dir_all(&out_dir);
            }
            Ok(())
        })
        .unwrap();
    let codes = codes.get();
    println!("binary: {} exit 0, {} exit 2", codes[0], codes[2]);
    assert!(codes[0] > 20 && codes[2] > 20, "{codes:?}");
}
