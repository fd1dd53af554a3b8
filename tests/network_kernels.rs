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
    let p = railsong::patch::parse_str(text, "t.toml", std::path::Path::new("."), &[])
        .expect("test patch");
    let plan = railsong::engine::compile(&p).expect("compiles");
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
        for noise in [false, true] {
            let text = case(net, 997.0, amp, noise);
            let (a, ca) = render(&text, true);
            let (b, cb) = render(&text, false);
            assert_eq!(ca, cb, "{name}: both take the same steps");
            assert!(ca.1 > 1000, "{name}: nonlinear steps taken: {ca:?}");
            let d = abs_diff(&a, &b);
            assert!(d < 1e-9, "{name} (noise {noise}): {d:e} V");
        }
    }
}
