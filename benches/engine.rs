//! Engine throughput: a four-input summer with a restoring inverter at K = 4, 48 kHz, one
//! core. Prints samples/s (base-rate frames per second of wall time) and times real time for
//! a clean mix and a mix that clips, each with circuit noise off and on. Only the processing is timed (compile and allocation
//! happen before the clock starts). Run with `cargo bench --bench engine`.

#[macro_use]
#[path = "common/out.rs"]
mod out;

use railsong::engine::{compile, Engine};
use railsong::model::*;
use railsong::parts::builtin;
use std::time::Instant;

fn patch(amp: f64, noise: bool) -> Patch {
    let jf = builtin("jfet-general").expect("built-in");
    let freqs = [110.0, 440.0, 997.0, 3150.0];
    let sources = freqs
        .iter()
        .enumerate()
        .map(|(i, &f)| Source {
            name: format!("in{i}"),
            wave: Wave::Sine {
                freq: f,
                amp,
                phase: 0.3 * i as f64,
            },
            offset: 0.0,
            start: 0.0,
            stop: None,
            envelope: None,
            r: 0.0,
        })
        .collect();
    let inputs = (0..4)
        .map(|i| SumInput {
            from: Node::Source(i),
            r: 100e3,
            c: None,
        })
        .collect();
    Patch {
        title: "bench".into(),
        rate: 48_000.0,
        length: 10.0,
        oversample: 4,
        seed: 1,
        noise,
        temperature: 298.15,
        rails: Rails {
            pos: 12.0,
            neg: -12.0,
        },
        full_scale: 12.0,
        tolerances: Default::default(),
        sources,
        stages: vec![
            Stage {
                name: "mix".into(),
                part: Some(jf.clone()),
                kind: StageKind::InvertingSum {
                    inputs,
                    feedback: Feedback {
                        r: 100e3,
                        c: None,
                        pot: None,
                    },
                    reference: 0.0,
                    single: false,
                },
            },
            Stage {
                name: "restore".into(),
                part: Some(jf),
                kind: StageKind::InvertingSum {
                    inputs: vec![SumInput {
                        from: Node::Stage(0),
                        r: 10e3,
                        c: None,
                    }],
                    feedback: Feedback {
                        r: 10e3,
                        c: None,
                        pot: None,
                    },
                    reference: 0.0,
                    single: true,
                },
            },
        ],
        outputs: vec![Output {
            name: "out".into(),
            from: Node::Stage(1),
            inner: None,
            series: 1e3,
            load: Some(100e3),
            file: None,
        }],
    }
}

/// CPU time of this process in seconds (Linux `/proc/self/schedstat`, first field, ns), so the
/// figure is not inflated by other processes competing for the cores; None elsewhere.
fn cpu_time() -> Option<f64> {
    let s = std::fs::read_to_string("/proc/self/schedstat").ok()?;
    let ns: f64 = s.split_whitespace().next()?.parse().ok()?;
    Some(ns * 1e-9)
}

fn measure(label: &str, amp: f64, noise: bool, seconds: f64) {
    measure_patch(label, &patch(amp, noise), true, seconds);
}

/// A follower on +/-12 V driven by one sine (issue 16's edge cases): `part` and `slew`
/// override the built-in's slew rate when given.
fn follower(part: &str, slew: Option<&str>, freq: &str, amp: &str) -> Patch {
    let slew = slew.map_or(String::new(), |s| format!("slew = \"{s}\"\n"));
    let text = format!(
        "[patch]\nnoise = false\nlength = \"10 s\"\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\
         [parts.p]\nbased_on = \"{part}\"\n{slew}[sources.osc]\nwave = \"sine\"\nfreq = \"{freq}\"\n\
         amp = \"{amp}\"\n[stages.buf]\ntype = \"follower\"\npart = \"p\"\nfrom = \"osc\"\n\
         [outputs.out]\nfrom = \"buf\"\n"
    );
    railsong::patch::parse_str(&text, "bench.toml", std::path::Path::new("."), &[])
        .expect("bench patch")
}

fn measure_patch(label: &str, p: &Patch, aa: bool, seconds: f64) {
    let mut plan = compile(p).expect("bench patch compiles");
    plan.antialias = aa;
    let mut e = Engine::new(&plan);
    let frames = (seconds * p.rate) as usize;
    let mut out = vec![0.0; 4800];
    // warm-up
    e.process(&mut [&mut out[..]]);
    e.reset();
    let mut best = f64::INFINITY;
    let mut best_cpu = f64::INFINITY;
    for _ in 0..5 {
        e.reset();
        let c0 = cpu_time();
        let t = Instant::now();
        let mut done = 0;
        while done < frames {
            let n = out.len().min(frames - done);
            e.process(&mut [&mut out[..n]]);
            done += n;
        }
        best = best.min(t.elapsed().as_secs_f64());
        if let (Some(a), Some(b)) = (c0, cpu_time()) {
            best_cpu = best_cpu.min(b - a);
        }
    }
    let (fast, full) = e.path_counts();
    let sps = frames as f64 / best;
    out!(
        "{label:18} {frames} frames in {best:.4} s wall: {sps:.3e} samples/s, {:.0}x real time \
         at 48 kHz (stage blocks: {fast} fast, {full} full; clip {:.3} s)",
        sps / p.rate,
        e.events().iter().map(|ev| ev.clip_s).sum::<f64>()
    );
    if best_cpu.is_finite() {
        let cps = frames as f64 / best_cpu;
        out!(
            "{label:18} by CPU time {best_cpu:.4} s: {cps:.3e} samples/s, {:.0}x real time",
            cps / p.rate
        );
    }
    std::hint::black_box(&out);
}

fn main() {
    out!("four-input summer + restoring inverter, jfet-general, K = 4, 48 kHz, one core");
    // RAILSONG_BENCH=clean or =clipping runs one case only (for profiling).
    let only = std::env::var("RAILSONG_BENCH").unwrap_or_default();
    if only.is_empty() || only == "clean" {
        measure("clean", 0.5, false, 20.0);
    }
    if only.is_empty() || only == "noise" {
        measure("clean+noise", 0.5, true, 20.0);
    }
    if only.is_empty() || only == "clipping" {
        measure("clipping", 5.0, false, 5.0);
    }
    if only.is_empty() || only == "clipnoise" {
        measure("clip+noise", 5.0, true, 5.0);
    }
    // Issue 16: the band-limited corrections of slew corners and reversal edges, on and off
    // (`Plan::antialias`), on the clean mix, a follower that slews all the time (a slow part
    // at 3.1 times its slew rate: a triangle) and one that reverses every cycle (2 V below
    // its input range at 1 kHz).
    if only.is_empty() || only == "edges" {
        let slewing = follower("single-supply", Some("0.12 V/us"), "10 kHz", "6 Vpk");
        let reversing = follower("jfet-general", None, "1 kHz", "10 Vpk");
        for aa in [true, false] {
            let tag = if aa { "on" } else { "off" };
            measure_patch(&format!("clean aa {tag}"), &patch(0.5, false), aa, 20.0);
            measure_patch(&format!("slewing aa {tag}"), &slewing, aa, 5.0);
            measure_patch(&format!("reversing aa {tag}"), &reversing, aa, 5.0);
        }
    }
}
