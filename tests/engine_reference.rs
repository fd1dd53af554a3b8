//! The op-amp step against a plain reference: a fixed-step classical Runge-Kutta (RK4)
//! integration of the same differential equation at a rate 256 times higher (numerical
//! analysis textbooks; the reference is kept deliberately simple).
mod engine_support;
use engine_support::*;

/// RK4 of dv/dt = SR tanh((u(t) - v) / Vov) (follower, infinite A0), sampled at `rate`.
fn reference(freq: f64, vp: f64, gbw: f64, sr: f64, rate: f64, n: usize) -> Vec<f64> {
    let vov = sr / (std::f64::consts::TAU * gbw);
    let w = std::f64::consts::TAU * freq;
    let sub = 256;
    let h = 1.0 / (rate * sub as f64);
    let dv = |t: f64, v: f64| sr * ((vp * (w * t).sin() - v) / vov).tanh();
    let mut v = 0.0;
    let mut out = Vec::with_capacity(n);
    for i in 0..n {
        out.push(v);
        for j in 0..sub {
            let t = (i * sub + j) as f64 * h;
            let k1 = dv(t, v);
            let k2 = dv(t + h / 2.0, v + h / 2.0 * k1);
            let k3 = dv(t + h / 2.0, v + h / 2.0 * k2);
            let k4 = dv(t + h, v + h * k3);
            v += h / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4);
        }
    }
    out
}

/// The engine's samples of the same follower, with the band-limited corrections off
/// (`Plan::antialias`): they move the samples beside a slew corner by up to `SR h / 3` by
/// design (tests/engine_edges.rs); this test checks the step itself.
fn engine(freq: f64, vp: f64, gbw: f64, sr: f64, rate: f64, n: usize) -> Vec<f64> {
    let mut b = Pb::new(rate, 1, n as f64 / rate).rails(15.0, -15.0);
    let s = b.sine("in", freq, vp);
    let f = b.follower("buf", &linear_part(gbw, sr), s);
    b.out("out", f, 0.0, None);
    let mut plan = railsong::engine::compile(&b.p).expect("compiles");
    plan.antialias = false;
    let mut eng = railsong::engine::Engine::new(&plan);
    let mut out = vec![0.0; n];
    eng.process(&mut [out.as_mut_slice()]);
    out
}

// Three regimes at 192 kHz internal rate, 5 kHz input: slewing (5 V peak, SR 0.1 V/us, 1.6
// times the slew rate), mildly nonlinear (GBW 20 kHz, Vd comparable to Vov) and linear
// (GBW 20 kHz, huge SR: a single pole at 20 kHz). The engine's samples stay within the stated
// fraction of the peak of the RK4 reference. (The step holds the input as a first-order hold,
// which for a sampled sine loses about (pi f / fs)^2 / 3 = 0.22 % here [D].)
#[test]
fn step_matches_a_fine_reference() {
    let rate = 192_000.0;
    let n = 1920; // 10 ms
    for &(gbw, sr, vp, tol) in &[
        (1e6, 0.1e6, 5.0, 0.01),
        (20e3, 1e3, 0.01, 0.003),
        (20e3, 1e9, 1.0, 0.003),
    ] {
        let r = reference(5000.0, vp, gbw, sr, rate, n);
        let e = engine(5000.0, vp, gbw, sr, rate, n);
        let err = r
            .iter()
            .zip(&e)
            .map(|(a, b)| (a - b).abs())
            .fold(0.0, f64::max);
        println!("gbw {gbw} sr {sr}: max error {:.3e} of {vp} V peak", err);
        assert!(err < tol * vp, "gbw {gbw}: {err}");
    }
}
