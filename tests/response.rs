//! `railsong response` against textbook closed forms and against rendered sine fits.
mod engine_support;
use engine_support::fit;
use std::f64::consts::TAU;

fn patch(text: &str) -> railsong::model::Patch {
    railsong::patch::parse_str(text, "test.toml", std::path::Path::new("."), &[])
        .unwrap_or_else(|e| panic!("{e}"))
}

const SK: &str = "[patch]\nlength = \"0.2 s\"\nnoise = false\noversample = 16\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n\
[sources.osc]\nwave = \"sine\"\nfreq = \"FREQ Hz\"\namp = \"1 V\"\n\
[stages.sk]\ntype = \"network\"\namps = [{ part = \"ideal\", plus = \"b\", minus = \"y\", out = \"y\" }]\n\
parts = [{ r = \"10k\", ends = [\"osc\", \"a\"] }, { r = \"10k\", ends = [\"a\", \"b\"] }, \
{ c = \"22n\", ends = [\"a\", \"y\"] }, { c = \"10n\", ends = [\"b\", \"gnd\"] }]\nout = \"y\"\n\
[stages.inv]\ntype = \"inverting\"\npart = \"jfet-general\"\nfrom = \"sk\"\nr_in = \"10k\"\nr_fb = \"22k\"\n\
[outputs.out]\nfrom = \"inv\"\n";

// Unity-gain Sallen-Key low-pass: H = 1 / (1 - (w/w0)^2 + j w / (w0 Q)),
// w0 = 1 / sqrt(R1 R2 C1 C2), Q = sqrt(R1 R2 C1 C2) / (C2 (R1 + R2)) [S] (CHECKS.md), then an
// inverter of gain -22k/10k whose single-pole part (GBW / NG) the response includes: with the
// ideal part in the filter, the response within 0.05 dB of the closed form times -2.2 below
// 10 kHz (the inverter's pole at GBW/3.2 is far above).
#[test]
fn response_matches_the_closed_form() {
    let (r1, r2, c1, c2): (f64, f64, f64, f64) = (10e3, 10e3, 22e-9, 10e-9);
    let w0 = 1.0 / (r1 * r2 * c1 * c2).sqrt();
    let q = (r1 * r2 * c1 * c2).sqrt() / (c2 * (r1 + r2));
    let p = patch(&SK.replace("FREQ", "1000"));
    let grid = railsong::response::log_grid(20.0, 10e3, 30).unwrap();
    let r = railsong::response::response(&p, 0, &grid).unwrap();
    let pts = &r.outputs["out"].points;
    for pt in pts {
        let x = TAU * pt.hz / w0;
        let (re, im) = (1.0 - x * x, x / q);
        let want = 20.0 * (2.2 / (re * re + im * im).sqrt()).log10();
        assert!(
            (pt.gain_db - want).abs() < 0.05,
            "{} Hz: {} vs {want}",
            pt.hz,
            pt.gain_db
        );
    }
    assert_eq!(r.outputs["out"].source, "osc");
}

// Single-pole closed loop: f(-3 dB) = GBW / NG [S] (CHECKS.md: GBW 1 MHz, gain -10, NG 11:
// 90.9 kHz), found by the response's -3 dB search within 1 %.
#[test]
fn closed_loop_bandwidth_is_gbw_over_noise_gain() {
    let text = "[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n[parts.slow]\nbased_on = \"ideal\"\ngbw = \"1 MHz\"\nslew = \"1000 V/us\"\n\
[sources.osc]\nwave = \"sine\"\nfreq = \"1 kHz\"\namp = \"1 V\"\n\
[stages.inv]\ntype = \"inverting\"\npart = \"slow\"\nfrom = \"osc\"\nr_in = \"10k\"\nr_fb = \"100k\"\n\
[outputs.out]\nfrom = \"inv\"\n";
    let p = patch(text);
    let grid = railsong::response::log_grid(1e3, 1e6, 400).unwrap();
    let r = railsong::response::response(&p, 0, &grid).unwrap();
    let f3 = railsong::response::minus_3db(&r.outputs["out"].points);
    let want = 1e6 / 11.0;
    assert_eq!(f3.len(), 1, "{f3:?}");
    assert!((f3[0] / want - 1.0).abs() < 0.01, "{} vs {want}", f3[0]);
}

// The response agrees with rendered sine fits (three-parameter least squares, IEEE Std 1057
// style) within 0.05 dB and 0.5 degrees below 20 kHz at K = 16 (the trapezoidal capacitors'
// frequency warp, fs/pi tan(pi f/fs) [D], is then 0.2 % at 19 kHz, about 0.035 dB on this
// two-pole slope; at K = 8 it reads 0.16 dB there).
#[test]
fn response_agrees_with_rendered_sines() {
    let rate = 48_000.0;
    for f in [100.0, 1000.0, 3000.0, 10_000.0, 19_000.0] {
        let p = patch(&SK.replace("FREQ", &f.to_string()));
        let r = railsong::response::response(&p, 0, &[f]).unwrap();
        let want = r.outputs["out"].points[0];
        let run = railsong::engine::run(&p, &Default::default()).unwrap();
        let y = &run.outputs[0].samples;
        let skip = 960;
        let (a, b, _, _) = fit(&y[skip..], skip, f, rate);
        let gdb = 20.0 * a.hypot(b).log10();
        let ph = b.atan2(a).to_degrees();
        let dph = (ph - want.phase_deg + 540.0).rem_euclid(360.0) - 180.0;
        assert!(
            (gdb - want.gain_db).abs() < 0.05,
            "{f} Hz: rendered {gdb} dB, response {} dB",
            want.gain_db
        );
        assert!(dph.abs() < 0.5, "{f} Hz: phase {ph} vs {}", want.phase_deg);
    }
}

// Open-circuit (zero-value) time constants [Gray, Hurst, Lewis and Meyer, "Analysis and
// Design of Analog Integrated Circuits", 2009, sec. 7.3]: each capacitor times the
// resistance it sees with the other capacitors open and the sources at rest. A single-supply
// stage: the 100n input coupling capacitor sees the 1M/1M bias divider (500k: 50 ms; the
// `+` input draws nothing), the 10u leg capacitor sees 4k7 into the inverting node, which
// the loop holds (47 ms), the 1u output capacitor sees the 100k load behind the op-amp's
// output (100 ms). The settle time follows their sum.
#[test]
fn capacitor_time_constants_are_the_textbook_rc_products() {
    let p = patch(
        "[patch]\nlength = \"1 s\"\n[rails]\npos = \"9 V\"\nneg = \"0 V\"\n\
         [sources.in]\nwave = \"sine\"\nfreq = \"200 Hz\"\namp = \"0.1 V\"\n\
         [stages.amp]\ntype = \"network\"\n\
         amps = [{ part = \"ideal\", plus = \"bias\", minus = \"fb\", out = \"y\" }]\n\
         parts = [{ c = \"100n\", ends = [\"in\", \"bias\"] }, { r = \"1M\", ends = [\"pos\", \"bias\"] }, \
         { r = \"1M\", ends = [\"bias\", \"gnd\"] }, { r = \"100k\", ends = [\"y\", \"fb\"] }, \
         { r = \"4k7\", ends = [\"fb\", \"leg\"] }, { c = \"10u\", ends = [\"leg\", \"gnd\"] }, \
         { c = \"1u\", ends = [\"y\", \"out\"] }, { r = \"100k\", ends = [\"out\", \"gnd\"] }]\n\
         out = \"out\"\n[outputs.out]\nfrom = \"amp\"\n",
    );
    let (w, tau) = railsong::response::capacitor_time_constants(&p).unwrap();
    let mut got: Vec<(f64, f64)> = w
        .circuit
        .elems
        .iter()
        .zip(&tau)
        .filter_map(|(e, &t)| match e.kind {
            railsong::circuit::ElemKind::C(c) => Some((c, t)),
            _ => None,
        })
        .collect();
    got.sort_by(|a, b| a.0.total_cmp(&b.0));
    let want = [(100e-9, 50e-3), (1e-6, 100e-3), (10e-6, 47e-3)];
    assert_eq!(got.len(), 3, "{got:?}");
    for ((c, t), (wc, wt)) in got.iter().zip(want) {
        assert!((c - wc).abs() < 1e-15);
        assert!((t / wt - 1.0).abs() < 1e-3, "{c} F: {t} s vs {wt} s");
    }
    let sum: f64 = want.iter().map(|x| x.1).sum();
    let slowest = railsong::measure::slowest_time_constant(&p);
    assert!((slowest / sum - 1.0).abs() < 1e-3, "{slowest} vs {sum}");
}
