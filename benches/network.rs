//! Network throughput at K = 4, 48 kHz, one core, times real time (median of 5 timed runs of
//! 10 s of audio each, wall time, processing only: compile and allocation happen before the
//! clock starts): the four-input summer plus restoring inverter as shorthand stages and as
//! one network; a state-variable filter (three op-amps in one loop), clean and with circuit
//! noise on; a diode clipper driven hard, with the band-limited corrections (its knees,
//! `engine::knee`) on and off; a feedback-diode clipper (its diodes in the op-amp's loop: the
//! generic nonlinear step, `engine::loopmap`'s correction) on and off. Run with `cargo bench --bench network` (add
//! `-- WORD` to run only the cases whose name contains WORD, `-- =NAME` for one case).
//! Each case also prints the median of the same runs in the thread's CPU time, which a
//! shared machine's load inflates less than wall time.

#[macro_use]
#[path = "common/out.rs"]
mod out;

use railsong::engine::{compile, Engine};
use std::time::Instant;

/// This thread's CPU time, s.
fn cpu_time() -> f64 {
    let mut ts = libc::timespec {
        tv_sec: 0,
        tv_nsec: 0,
    };
    // SAFETY: a valid pointer to a timespec; the clock id is a constant of the platform.
    unsafe { libc::clock_gettime(libc::CLOCK_THREAD_CPUTIME_ID, &mut ts) };
    ts.tv_sec as f64 + ts.tv_nsec as f64 * 1e-9
}

const HEAD: &str =
    "[patch]\nlength = \"10 s\"\nnoise = false\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n";

fn sources() -> String {
    [110.0, 440.0, 997.0, 3150.0]
        .iter()
        .enumerate()
        .map(|(i, f)| {
            format!(
                "[sources.in{i}]\nwave = \"sine\"\nfreq = \"{f} Hz\"\namp = \"1 V\"\nphase = {}\n",
                0.3 * i as f64
            )
        })
        .collect()
}

fn cases() -> Vec<(&'static str, String)> {
    let shorthand = format!(
        "{HEAD}{}[stages.mix]\ntype = \"inverting-sum\"\npart = \"jfet-general\"\n\
inputs = [{{ from = \"in0\", r = \"100k\" }}, {{ from = \"in1\", r = \"100k\" }}, {{ from = \"in2\", r = \"100k\" }}, {{ from = \"in3\", r = \"100k\" }}]\n\
feedback = {{ r = \"100k\" }}\n[stages.flip]\ntype = \"inverting\"\npart = \"jfet-general\"\nfrom = \"mix\"\nr_in = \"10k\"\nr_fb = \"10k\"\n\
[outputs.out]\nfrom = \"flip\"\n",
        sources()
    );
    let network = format!(
        "{HEAD}{}[stages.mix]\ntype = \"network\"\n\
amps = [{{ part = \"jfet-general\", plus = \"gnd\", minus = \"m\", out = \"y\" }}, {{ part = \"jfet-general\", plus = \"gnd\", minus = \"n\", out = \"z\" }}]\n\
parts = [{{ r = \"100k\", ends = [\"in0\", \"m\"] }}, {{ r = \"100k\", ends = [\"in1\", \"m\"] }}, {{ r = \"100k\", ends = [\"in2\", \"m\"] }}, {{ r = \"100k\", ends = [\"in3\", \"m\"] }}, \
{{ r = \"100k\", ends = [\"m\", \"y\"] }}, {{ r = \"10k\", ends = [\"y\", \"n\"] }}, {{ r = \"10k\", ends = [\"n\", \"z\"] }}]\nout = \"z\"\n\
[outputs.out]\nfrom = \"mix\"\n",
        sources()
    );
    let svf = format!(
        "{HEAD}[sources.in]\nwave = \"sine\"\nfreq = \"997 Hz\"\namp = \"1 V\"\n[stages.svf]\ntype = \"network\"\n\
amps = [{{ part = \"jfet-general\", plus = \"q\", minus = \"s\", out = \"hp\" }}, {{ part = \"jfet-general\", plus = \"gnd\", minus = \"i1\", out = \"bp\" }}, {{ part = \"jfet-general\", plus = \"gnd\", minus = \"i2\", out = \"lp\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"in\", \"s\"] }}, {{ r = \"10k\", ends = [\"lp\", \"s\"] }}, {{ r = \"10k\", ends = [\"s\", \"hp\"] }}, {{ r = \"50k\", ends = [\"bp\", \"q\"] }}, {{ r = \"10k\", ends = [\"q\", \"gnd\"] }}, \
{{ r = \"15k9\", ends = [\"hp\", \"i1\"] }}, {{ c = \"10n\", ends = [\"i1\", \"bp\"] }}, {{ r = \"15k9\", ends = [\"bp\", \"i2\"] }}, {{ c = \"10n\", ends = [\"i2\", \"lp\"] }}]\nout = \"lp\"\n\
[outputs.out]\nfrom = \"svf\"\n"
    );
    let clipper = format!(
        "{HEAD}[sources.in]\nwave = \"sine\"\nfreq = \"997 Hz\"\namp = \"5 V\"\n[stages.clip]\ntype = \"network\"\n\
amps = [{{ part = \"jfet-general\", plus = \"in\", minus = \"y\", out = \"y\" }}]\n\
parts = [{{ r = \"4k7\", ends = [\"y\", \"x\"] }}, {{ diode = \"silicon-signal\", ends = [\"x\", \"gnd\"] }}, {{ diode = \"silicon-signal\", ends = [\"gnd\", \"x\"] }}]\nout = \"x\"\n\
[outputs.out]\nfrom = \"clip\"\n"
    );
    // gain -10 with two diodes across its 100k (in the op-amp's loop), 20 dB past the knees
    let feedback = format!(
        "{HEAD}[sources.in]\nwave = \"sine\"\nfreq = \"997 Hz\"\namp = \"1 V\"\n[stages.clip]\ntype = \"network\"\n\
amps = [{{ part = \"jfet-general\", plus = \"gnd\", minus = \"m\", out = \"y\" }}]\n\
parts = [{{ r = \"10k\", ends = [\"in\", \"m\"] }}, {{ r = \"100k\", ends = [\"m\", \"y\"] }}, {{ diode = \"silicon-signal\", ends = [\"m\", \"y\"] }}, {{ diode = \"silicon-signal\", ends = [\"y\", \"m\"] }}]\nout = \"y\"\n\
[outputs.out]\nfrom = \"clip\"\n"
    );
    let svf_noise = svf.replace("noise = false", "noise = true");
    vec![
        ("summer + inverter, shorthand", shorthand),
        ("summer + inverter, one network", network),
        ("state-variable filter, clean", svf),
        ("state-variable filter, clean, circuit noise on", svf_noise),
        ("diode clipper, driven hard", clipper.clone()),
        ("diode clipper, driven hard, corrections off", clipper),
        ("feedback-diode clipper, driven hard", feedback.clone()),
        (
            "feedback-diode clipper, driven hard, corrections off",
            feedback,
        ),
    ]
}

/// A times-real-time figure: whole above 10, one decimal below.
fn times_rt(x: f64) -> String {
    if x >= 10.0 {
        format!("{x:.0}")
    } else {
        format!("{x:.1}")
    }
}

fn main() {
    // `cargo bench --bench network -- WORD` runs only the cases whose name contains WORD
    let only: Option<String> = std::env::args().skip(1).find(|a| !a.starts_with('-'));
    for (name, text) in cases() {
        let skip = |w: &String| match w.strip_prefix('=') {
            Some(exact) => name != exact,
            None => !name.contains(w.as_str()),
        };
        if only.as_ref().is_some_and(skip) {
            continue;
        }
        let p = railsong::patch::parse_str(&text, "bench.toml", std::path::Path::new("."), &[])
            .expect("bench patch");
        let mut plan = compile(&p).expect("compiles");
        plan.antialias = !name.ends_with("corrections off");
        let frames = p.frames();
        let mut out = vec![0.0; frames];
        let mut times = Vec::new();
        let mut cpu = Vec::new();
        let mut counts = (0, 0);
        for _ in 0..5 {
            let mut eng = Engine::new(&plan);
            let (t, c) = (Instant::now(), cpu_time());
            eng.process(&mut [&mut out[..]]);
            times.push(t.elapsed().as_secs_f64());
            cpu.push(cpu_time() - c);
            counts = eng.network_step_counts();
        }
        times.sort_by(f64::total_cmp);
        cpu.sort_by(f64::total_cmp);
        let med = times[2];
        out!(
            "{name}: {} x real time (median of 5, {:.3} s for {} s of audio; min {} x, max {} x)",
            times_rt(p.length / med),
            med,
            p.length,
            times_rt(p.length / times[4]),
            times_rt(p.length / times[0])
        );
        out!(
            "  CPU time: {} x real time (median of the same 5, {:.3} s)",
            times_rt(p.length / cpu[2]),
            cpu[2]
        );
        if counts.0 + counts.1 > 0 {
            out!(
                "  network steps: {} linear, {} nonlinear",
                counts.0,
                counts.1
            );
        }
    }
}
