//! The network kernels against their plain reference: the small-group kernel
//! (`circuit::small`, the linear step as one precomputed matrix with the nonlinear step from
//! the first sample that needs it) against the generic per-sample path of `circuit::step`,
//! on groups of several op-amps and on positive feedback, clean and driven into and out of
//! the nonlinear region, noise off and on. The reference is the project's own generic
//! solver, which `tests/network_engine.rs` checks against textbook closed forms.

const HEAD: &str =
    "[patch]\nrate = \"48 kHz\"\nlength = \"0.1 s\"\noversample = 4\nnoise = false\n[rails]\npos = \"12 V\"\nneg = \"-12 V\"\n";

fn sine(name: &str, f: f64, amp: f64) -> String {
    format!("[sources.{name}]\nwave = \"sine\"\nfreq = \"{f} Hz\"\namp = \"{amp} V\"\n")
}

/// Render with the small-group kernels on or off; the output and the step counts.
fn render(text: &str, kernels: bool) -> (Vec<f64>, (u64, u64)) {
    render_with(text, kernels, true)
}

/// [`render`] with the band-limited corrections on or off. The diode knees' correction
/// (`engine::knee`) reads a record that only the diode table's loop keeps, so the diode
/// group's two paths are compared without it: the test is of the step's solution.
fn render_with(text: &str, kernels: bool, antialias: bool) -> (Vec<f64>, (u64, u64)) {
    let p = railsong::patch::parse_str(text, "t.toml", std::path::Path::new("."), &[])
        .expect("test patch");
    let mut plan = railsong::engine::compile(&p).expect("compiles");
    plan.antialias = antialias;
    let mut eng = railsong::engine::Engine::new(&plan);
    eng.set_group_kernels(kernels);
    let mut out = vec![0.0; p.frames()];
    eng.process(&mut [&mut out[..]]);
    assert!(eng.failure().is_none(), "{:?}", eng.failure());
    (out, eng.network_step_counts())
}

/// Largest difference relative to the reference's peak.
fn rel_diff(a: &[f64], b: &[f64]) -> f64 {
    let peak = b.iter().fold(0.0f64, |m, x| m.max(x.abs())).max(1e-30);
    a.iter()
        .zip(b)
        .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()))
        / peak
}

const SVF: &str =
    "amps = [{ part = \"jfet-general\", plus = \"q\", minus = \"s\", out = \"hp\" }, \
{ part = \"jfet-general\", plus = \"gnd\", minus = \"i1\", out = \"bp\" }, \
{ part = \"jfet-general\", plus = \"gnd\", minus = \"i2\", out = \"lp\" }]\n\
parts = [{ r = \"10k\", ends = [\"osc\", \"s\"] }, { r = \"10k\", ends = [\"lp\", \"s\"] }, \
{ r = \"10k\", ends = [\"s\", \"hp\"] }, { r = \"50k\", ends = [\"bp\", \"q\"] }, \
{ r = \"10k\", ends = [\"q\", \"gnd\"] }, { r = \"15k9\", ends = [\"hp\", \"i1\"] }, \
{ c = \"10n\", ends = [\"i1\", \"bp\"] }, { r = \"15k9\", ends = [\"bp\", \"i2\"] }, \
{ c = \"10n\", ends = [\"i2\", \"lp\"] }]\nout = \"bp\"\n";

// A two-integrator loop with an inverter (three op-amps, each with its own feedback).
const LOOP: &str = "amps = [{ part = \"bipolar-lownoise\", plus = \"gnd\", minus = \"m1\", out = \"bp\" }, \
{ part = \"bipolar-lownoise\", plus = \"gnd\", minus = \"m2\", out = \"lp\" }, \
{ part = \"bipolar-lownoise\", plus = \"gnd\", minus = \"m3\", out = \"inv\" }]\n\
parts = [{ r = \"10k\", ends = [\"osc\", \"m1\"] }, { r = \"50k\", ends = [\"m1\", \"bp\"] }, \
{ c = \"10n\", ends = [\"m1\", \"bp\"] }, { r = \"10k\", ends = [\"inv\", \"m1\"] }, \
{ r = \"10k\", ends = [\"bp\", \"m2\"] }, { c = \"10n\", ends = [\"m2\", \"lp\"] }, \
{ r = \"10k\", ends = [\"lp\", \"m3\"] }, { r = \"10k\", ends = [\"m3\", \"inv\"] }]\nout = \"bp\"\n";

// A Sallen-Key low-pass with a gain of 2: positive feedback through the capacitor to the
// output (one op-amp, but a capacitor on the non-inverting side: not the stage shape).
const SALLEN_KEY: &str =
    "amps = [{ part = \"jfet-general\", plus = \"b\", minus = \"m\", out = \"y\" }]\n\
parts = [{ r = \"10k\", ends = [\"osc\", \"a\"] }, { r = \"10k\", ends = [\"a\", \"b\"] }, \
{ c = \"10n\", ends = [\"a\", \"y\"] }, { c = \"10n\", ends = [\"b\", \"gnd\"] }, \
{ r = \"10k\", ends = [\"y\", \"m\"] }, { r = \"10k\", ends = [\"m\", \"gnd\"] }]\nout = \"y\"\n";

fn case(net: &str, f: f64, amp: f64, noise: bool) -> String {
    let head = if noise {
        HEAD.replace("noise = false", "noise = true")
    } else {
        HEAD.to_string()
    };
    format!(
        "{head}{}[stages.n]\ntype = \"network\"\n{net}[outputs.out]\nfrom = \"n\"\n",
        sine("osc", f, amp)
    )
}

// Clean: every step is the kernel's matrix step; the reference takes the generic affine map
// and the same state update node by node. They agree to rounding (1e-12 of the peak).
#[test]
fn small_group_kernel_matches_the_generic_path_when_clean() {
    for (name, net, f) in [
        ("state-variable filter", SVF, 997.0),
        ("two-integrator loop", LOOP, 1590.0),
        ("Sallen-Key", SALLEN_KEY, 1000.0),
    ] {
        let text = case(net, f, 0.5, false);
        let (a, ca) = render(&text, true);
        let (b, cb) = render(&text, false);
        assert_eq!(ca, cb, "{name}: both take the same steps");
        assert!(ca.0 > 0 && ca.1 == 0, "{name}: clean, all linear: {ca:?}");
        let d = rel_diff(&a, &b);
        assert!(d < 1e-12, "{name}: relative difference {d:e}");
    }
}

// Driven into clipping and back (and slewing on the fast edges): the kernel hands the
// state and the previous step's full solution to the nonlinear step at the first sample
// outside its checks and resumes after it; the same samples as the generic path.
#[test]
fn small_group_kernel_crosses_into_and_out_of_the_nonlinear_region() {
    for (name, net, f, amp) in [
        ("state-variable filter", SVF, 997.0, 4.0),
        ("two-integrator loop", LOOP, 1590.0, 1.0),
        ("Sallen-Key", SALLEN_KEY, 1000.0, 4.0),
    ] {
        let text = case(net, f, amp, false);
        let (a, ca) = render(&text, true);
        let (b, cb) = render(&text, false);
        assert_eq!(ca, cb, "{name}: both take the same steps");
        assert!(
            ca.0 > 1000 && ca.1 > 100,
            "{name}: both linear and nonlinear steps: {ca:?}"
        );
        let d = rel_diff(&a, &b);
        assert!(d < 1e-12, "{name}: relative difference {d:e}");
    }
}

// A ring of seven inverting stages of gain -1/2 each (a loop gain of -1/128: negative
// feedback, no capacitor): the op-amps' outputs spread over more rows than the vector
// segment keeps extremes for, so their peaks come from their rows written out.
fn ring7() -> String {
    let mut amps = Vec::new();
    let mut parts = vec!["{ r = \"20k\", ends = [\"osc\", \"m0\"] }".to_string()];
    for i in 0..7 {
        amps.push(format!(
            "{{ part = \"jfet-general\", plus = \"gnd\", minus = \"m{i}\", out = \"y{i}\" }}"
        ));
        parts.push(format!(
            "{{ r = \"20k\", ends = [\"y{i}\", \"m{}\"] }}",
            (i + 1) % 7
        ));
        parts.push(format!("{{ r = \"10k\", ends = [\"m{i}\", \"y{i}\"] }}"));
    }
    format!(
        "amps = [{}]\nparts = [{}]\nout = \"y6\"\n",
        amps.join(", "),
        parts.join(", ")
    )
}

/// Every op-amp's lowest and highest output over a render, kernels on or off.
fn amp_peaks(text: &str, kernels: bool) -> Vec<(String, f64, f64)> {
    let p = railsong::patch::parse_str(text, "t.toml", std::path::Path::new("."), &[])
        .expect("test patch");
    let plan = railsong::engine::compile(&p).expect("compiles");
    let mut eng = railsong::engine::Engine::new(&plan);
    eng.set_group_kernels(kernels);
    let mut out = vec![0.0; p.frames()];
    eng.process(&mut [&mut out[..]]);
    assert!(eng.failure().is_none(), "{:?}", eng.failure());
    eng.events()
        .into_iter()
        .map(|e| {
            let hi = e.peak_pos_v.expect("a peak");
            let lo = e.peak_neg_v.expect("a peak");
            (e.stage, lo, hi)
        })
        .collect()
}

// The op-amps' peaks: the kernel keeps its segments' extremes in registers (or, past two
// vectors of rows, takes them from the rows written out) and widens them at every
// nonlinear step; the generic path takes every sample's node value. The same peaks to
// rounding, clean and clipping.
#[test]
fn op_amp_peaks_match_the_generic_path() {
    let ring = ring7();
    for (name, net, f, amp) in [
        ("state-variable filter", SVF, 997.0, 0.5),
        ("state-variable filter, clipping", SVF, 997.0, 4.0),
        ("two-integrator loop", LOOP, 1590.0, 1.0),
        ("ring of seven", ring.as_str(), 997.0, 1.0),
        ("ring of seven, clipping", ring.as_str(), 997.0, 30.0),
    ] {
        let text = case(net, f, amp, false);
        let a = amp_peaks(&text, true);
        let b = amp_peaks(&text, false);
        assert_eq!(a.len(), b.len(), "{name}");
        for ((na, la, ha), (_, lb, hb)) in a.iter().zip(&b) {
            let tol = 1e-9 * (1.0 + hb.abs().max(lb.abs()));
            assert!(
                (la - lb).abs() < tol && (ha - hb).abs() < tol,
                "{name}, {na}: kernel {la} .. {ha}, generic {lb} .. {hb}"
            );
            assert!(ha > la, "{name}, {na}: the output moves");
        }
    }
}

// Circuit noise on: the group's draws are extra inputs of the kernel's matrix; the same
// draws give the same samples as the generic path, clean and clipping.
#[test]
fn small_group_kernel_takes_the_circuit_noise() {
    for amp in [0.5, 4.0] {
        let text = case(SVF, 997.0, amp, true);
        let (a, ca) = render(&text, true);
        let (b, cb) = render(&text, false);
        assert_eq!(ca, cb);
        let d = rel_diff(&a, &b);
        assert!(d < 1e-12, "amp {amp}: relative difference {d:e}");
        // and the noise is there: the noisy render differs from the noiseless one
        let (q, _) = render(&case(SVF, 997.0, amp, false), true);
        let dn = a
            .iter()
            .zip(&q)
            .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()));
        assert!(dn > 1e-7, "amp {amp}: noise reaches the output ({dn:e} V)");
    }
}

/// Largest absolute difference, V.
fn abs_diff(a: &[f64], b: &[f64]) -> f64 {
    a.iter()
        .zip(b)
        .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()))
}

// A diode clipper after a follower: antiparallel silicon diodes from a resistor's far end to
// ground (a passive group with two junctions, their series resistances and capacitances).
const CLIPPER: &str = "amps = [{ part = \"jfet-general\", plus = \"osc\", minus = \"y\", out = \"y\" }]\n\
parts = [{ r = \"4k7\", ends = [\"y\", \"x\"] }, { diode = \"silicon-signal\", ends = [\"x\", \"gnd\"] }, \
{ diode = \"silicon-signal\", ends = [\"gnd\", \"x\"] }]\nout = \"x\"\n";

// A passive half-wave rectifier with a smoothing capacitor: one Schottky junction from the
// source's resistor into an RC load (one junction, a capacitor that holds the peak).
const RECTIFIER: &str = "amps = [{ part = \"jfet-general\", plus = \"osc\", minus = \"y\", out = \"y\" }]\n\
parts = [{ r = \"1k\", ends = [\"y\", \"a\"] }, { diode = \"schottky\", ends = [\"a\", \"k\"] }, \
{ r = \"47k\", ends = [\"k\", \"gnd\"] }, { c = \"100n\", ends = [\"k\", \"gnd\"] }]\nout = \"k\"\n";

// The reduced diode step (Newton on the junction voltages only, passive nodes eliminated at
// compile time) against the generic nonlinear step (the whole group assembled and factored
// per iteration): the same equations solved to their convergence tolerance, so the rendered
// samples agree within 1 nV; noise on and off.
#[test]
fn reduced_diode_step_matches_the_generic_nonlinear_step() {
    for (name, net, amp) in [
        ("clipper, driven hard", CLIPPER, 5.0),
        ("clipper, near the knee", CLIPPER, 0.5),
        ("rectifier", RECTIFIER, 3.0),
    ] {
        let p = railsong::patch::parse_str(
            &case(net, 997.0, amp, false),
            "t.toml",
            std::path::Path::new("."),
            &[],
        )
        .expect("test patch");
        let plan = railsong::engine::compile(&p).expect("compiles");
        assert!(
            plan.networks[0]
                .kernels
                .iter()
                .flatten()
                .any(|k| k.diode.is_some()),
            "{name}: the diode group has its reduced step"
        );
        // noise off: the group's one varying input makes it a table (the block loop of
        // `DiodeStep::run_table_block`); noise on: the per-sample Newton step
        assert!(
            plan.networks[0]
                .kernels
                .iter()
                .flatten()
                .any(|k| k.diode.as_ref().is_some_and(|d| d.table.is_some())),
            "{name}: the diode group has its table"
        );
        for noise in [false, true] {
            let text = case(net, 997.0, amp, noise);
            let (a, ca) = render_with(&text, true, false);
            let (b, cb) = render_with(&text, false, false);
            assert_eq!(ca, cb, "{name}: both take the same steps");
            assert!(ca.1 > 1000, "{name}: nonlinear steps taken: {ca:?}");
            let d = abs_diff(&a, &b);
            assert!(d < 1e-9, "{name} (noise {noise}): {d:e} V");
        }
    }
}

/// The clipper's diode group: its reduced step (with the table when it has one).
fn clipper_diode_step(text: &str) -> railsong::circuit::diode::DiodeStep {
    let p = railsong::patch::parse_str(text, "t.toml", std::path::Path::new("."), &[])
        .expect("test patch");
    let plan = railsong::engine::compile(&p).expect("compiles");
    plan.networks[0]
        .kernels
        .iter()
        .flatten()
        .find_map(|k| k.diode.clone())
        .expect("the diode group has its reduced step")
}

// The clipper's table (junction currents tabulated along the input's line at compile time,
// read by cubic Hermite interpolation, first-order term off the line) against the plain
// reference, the reduced Newton step (`DiodeStep::newton`, converged), over a dense sweep of
// the whole table and off its line as far as the table is taken: every unknown of the group
// (`T dc`) within 1e-9 V. Outside the table (past its range, or farther off the line) the
// table declines and the Newton step takes the sample.
#[test]
#[allow(clippy::needless_range_loop)]
fn diode_table_matches_the_newton_reference_over_a_dense_sweep() {
    use railsong::circuit::diode::{MAX_J, TABLE_RMAX};
    let ds = clipper_diode_step(&case(CLIPPER, 997.0, 5.0, false));
    let tab = ds
        .table
        .as_ref()
        .expect("the clipper's diode group has a table");
    let nj = ds.nj;
    assert_eq!(nj, 2, "two junctions");
    let ny = ds.t.len() / nj;
    let (lo, hi) = (tab.s0, tab.s0 + tab.h * tab.ncell as f64);
    // the follower's swing, as the table's range must cover it (about +-10 V on +-12 V
    // rails; from memory of the profile, not a datasheet)
    assert!(lo < -9.0 && hi > 9.0, "range {lo} .. {hi}");
    let mut worst: f64 = 0.0;
    let mut v = [0.0f64; MAX_J];
    let npts = 200_000;
    for i in 0..=npts {
        let s = lo + (hi - lo) * (i as f64 + 0.37) / (npts as f64 + 1.0);
        for rho in [0.0, 0.9 * TABLE_RMAX, -0.9 * TABLE_RMAX, 0.3 * TABLE_RMAX] {
            let mut v0 = [0.0f64; MAX_J];
            for q in 0..nj {
                v0[q] = tab.a[q] * s + tab.b[q] + rho * tab.e[0][q];
            }
            // the first point from zero (a cold start far into conduction would need
            // many limited steps), then continuation along the sweep
            let mut vr = if i == 0 { [0.0; MAX_J] } else { v };
            let mut cur = [0.0f64; MAX_J];
            assert!(
                ds.newton(&v0, &mut vr, &mut cur),
                "reference converges at {s} V"
            );
            if rho == 0.0 {
                v = vr;
            }
            let ct = tab.eval(nj, &v0).expect("inside the table");
            for row in 0..ny {
                let e: f64 = (0..nj).map(|q| ds.t[row * nj + q] * (ct[q] - cur[q])).sum();
                worst = worst.max(e.abs());
            }
        }
    }
    assert!(worst < 1e-9, "table error {worst:e} V");
    // outside: past the range, and farther off the line than TABLE_RMAX
    let mut v0 = [0.0f64; MAX_J];
    for q in 0..nj {
        v0[q] = tab.a[q] * (hi + 1.0) + tab.b[q];
    }
    assert!(tab.eval(nj, &v0).is_none(), "past the range");
    for q in 0..nj {
        v0[q] = tab.b[q] + 3.0 * TABLE_RMAX * tab.e[0][q];
    }
    assert!(tab.eval(nj, &v0).is_none(), "off the line");
}

// A diode limiter straight on a source (no op-amp: the group reads the source), driven
// past the table's range (the rails, 12 V, and a little): the samples beyond it take the
// Newton step, the rest the table; the render agrees with the generic nonlinear step
// (the whole group assembled and factored per iteration) within 1 nV, and takes the same
// linear and nonlinear steps.
#[test]
fn diode_table_hands_samples_past_its_range_to_the_newton_step() {
    let net = "amps = []\nparts = [{ r = \"4k7\", ends = [\"osc\", \"x\"] }, \
{ diode = \"silicon-signal\", ends = [\"x\", \"gnd\"] }, \
{ diode = \"silicon-signal\", ends = [\"gnd\", \"x\"] }]\nout = \"x\"\n";
    for amp in [20.0, 0.3] {
        let text = case(net, 997.0, amp, false);
        let ds = clipper_diode_step(&text);
        let tab = ds.table.as_ref().expect("a table");
        let hi = tab.s0 + tab.h * tab.ncell as f64;
        assert!(hi < 14.0, "the table ends near the rails: {hi}");
        let (a, ca) = render_with(&text, true, false);
        let (b, cb) = render_with(&text, false, false);
        assert_eq!(ca, cb, "{amp} V: both take the same steps");
        let d = abs_diff(&a, &b);
        assert!(d < 1e-9, "{amp} V: {d:e} V");
        // a diode clipper holds its output near one junction drop (about 0.6 V for small
        // silicon at a few mA, from memory), well under the drive
        let peak = a.iter().fold(0.0f64, |m, x| m.max(x.abs()));
        if amp > 1.0 {
            assert!(peak > 0.5 && peak < 1.0, "{amp} V: peak {peak}");
        }
    }
}

// The antiderivative the diode knees' correction reads (`engine::knee`): the table's own
// (`DiodeTable::integral`, the exact integral of its cubic per sub-interval) against a
// composite Simpson rule over the table's values on its line (a general numerical rule,
// not the table's own arithmetic), its derivative against the table's value, and the
// correction's weighted copy (`KneeAa`, one cache line per lookup) against the plain sum.
#[test]
fn diode_table_antiderivative() {
    use railsong::engine::knee::KneeAa;
    let ds = clipper_diode_step(&case(CLIPPER, 997.0, 1.0, false));
    let tab = ds.table.as_ref().expect("a table");
    let nj = ds.nj;
    let on_line = |s: f64| -> [f64; 4] {
        let v0: [f64; 4] = std::array::from_fn(|q| tab.a[q] * s + tab.b[q]);
        tab.eval(nj, &v0).expect("inside the table")
    };
    // the knees lie within a volt of 0 V at the junctions
    let (lo, hi) = (-1.2, 1.2);
    let n = 24_000;
    let hs = (hi - lo) / n as f64;
    let mut simpson = [0.0f64; 4];
    for k in 0..n {
        let (x0, x1) = (lo + k as f64 * hs, lo + (k + 1) as f64 * hs);
        let (f0, fm, f1) = (on_line(x0), on_line(0.5 * (x0 + x1)), on_line(x1));
        for q in 0..nj {
            simpson[q] += hs / 6.0 * (f0[q] + 4.0 * fm[q] + f1[q]);
        }
    }
    let (ia, ib) = (tab.integral(nj, lo).unwrap(), tab.integral(nj, hi).unwrap());
    for q in 0..nj {
        let exact = ib[q] - ia[q];
        assert!(
            (exact - simpson[q]).abs() <= 1e-9 * exact.abs().max(1e-12),
            "junction {q}: {exact:e} against Simpson {:e}",
            simpson[q]
        );
        assert!(exact > 0.0, "a junction conducts somewhere in the range");
    }
    let mut g = [0.0; 4];
    g[..nj]
        .iter_mut()
        .enumerate()
        .for_each(|(q, x)| *x = 1e3 * (q + 1) as f64);
    let kn = KneeAa::new(0, nj, g, tab);
    for k in 0..=200 {
        let s = lo + (hi - lo) * k as f64 / 200.0;
        // the derivative of the antiderivative is the table's value (central difference:
        // its truncation, d^2/6 c'' with c'' about c / nvt^2, is near 3e-6 of c)
        let d = 1e-4;
        let (p, m) = (
            tab.integral(nj, s + d).unwrap(),
            tab.integral(nj, s - d).unwrap(),
        );
        let c = on_line(s);
        for q in 0..nj {
            let slope = (p[q] - m[q]) / (2.0 * d);
            assert!(
                (slope - c[q]).abs() <= 1e-5 * c[q].abs() + 1e-13,
                "s {s}: slope {slope:e} against {:e}",
                c[q]
            );
        }
        let (fast, plain) = (
            kn.big_r(tab, s).unwrap(),
            kn.big_r_reference(tab, s).unwrap(),
        );
        assert!(
            (fast - plain).abs() <= 1e-12 * plain.abs().max(1e-9),
            "s {s}: {fast:e} against {plain:e}"
        );
    }
}
