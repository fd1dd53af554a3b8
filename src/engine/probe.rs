//! The alias figure: a coherent capture of a clipped sine through a unity inverting stage.

use super::{compile, Engine};
use crate::model::{
    Feedback, Node, Output, Patch, Rails, Source, Stage, StageKind, SumInput, Wave,
};
use crate::parts::OpAmp;
use rustfft::{num_complex::Complex, FftPlanner};

/// FFT length of the capture, base-rate samples.
pub const PROBE_N: usize = 16384;
/// Warm-up before the capture, base-rate samples.
pub const PROBE_WARM: usize = 1024;
/// Overdrive past the swing limit, dB.
pub const PROBE_OVER_DB: f64 = 7.0;

/// The probe tone: `M * rate / N` with M odd (so coprime to the power-of-two N), near 5 kHz.
pub fn probe_bin(rate: f64) -> usize {
    let m = (5000.0 * PROBE_N as f64 / rate).round() as usize;
    let m = m.max(1);
    if m.is_multiple_of(2) {
        m + 1
    } else {
        m
    }
}

/// Alias power (dBc) of a base-rate capture of length [`PROBE_N`] holding a coherent tone in
/// bin `m`: every in-band bin (1 ..= 20 kHz-equivalent) that is not a harmonic below
/// Nyquist, relative to the fundamental.
pub fn alias_dbc(x: &[f64], m: usize) -> f64 {
    let n = x.len();
    let mut buf: Vec<Complex<f64>> = x.iter().map(|&v| Complex::new(v, 0.0)).collect();
    FftPlanner::new().plan_fft_forward(n).process(&mut buf);
    let pow = |k: usize| buf[k].norm_sqr();
    let band = (super::halfband::PASS_EDGE * n as f64).floor() as usize;
    let mut harmonic = vec![false; n / 2 + 1];
    let mut hk = m;
    while hk <= n / 2 {
        harmonic[hk] = true;
        hk += m;
    }
    let mut alias = 0.0;
    for (k, &is_h) in harmonic.iter().enumerate().take(band + 1).skip(1) {
        if !is_h {
            alias += pow(k);
        }
    }
    10.0 * (alias / pow(m)).log10()
}

/// The probe patch: a unity inverting stage (10k / 10k) with `part` on `rails`, driven
/// [`PROBE_OVER_DB`] past its swing by a coherent sine near 5 kHz around mid-swing.
pub fn probe_patch(part: &OpAmp, rails: Rails, rate: f64, oversample: usize) -> Patch {
    let m = probe_bin(rate);
    let freq = m as f64 * rate / PROBE_N as f64;
    let lo = rails.neg + part.drop_neg;
    let hi = rails.pos - part.drop_pos;
    let mid = 0.5 * (lo + hi);
    let half = 0.5 * (hi - lo).max(1e-3);
    let amp = half * 10f64.powf(PROBE_OVER_DB / 20.0);
    let frames = PROBE_WARM + PROBE_N;
    Patch {
        title: "alias probe".into(),
        rate,
        length: frames as f64 / rate,
        oversample,
        seed: 1,
        noise: false,
        temperature: 298.15,
        rails,
        full_scale: rails.pos.abs().max(rails.neg.abs()),
        tolerances: Default::default(),
        sources: vec![Source {
            name: "probe".into(),
            wave: Wave::Sine {
                freq,
                amp,
                phase: 0.0,
            },
            offset: mid,
            start: 0.0,
            stop: None,
            envelope: None,
            r: 0.0,
        }],
        stages: vec![Stage {
            name: "inverter".into(),
            part: Some(part.clone()),
            kind: StageKind::InvertingSum {
                inputs: vec![SumInput {
                    from: Node::Source(0),
                    r: 10e3,
                    c: None,
                }],
                feedback: Feedback {
                    r: 10e3,
                    c: None,
                    pot: None,
                },
                reference: mid,
                single: true,
            },
        }],
        outputs: vec![Output {
            name: "out".into(),
            from: Node::Stage(0),
            inner: None,
            series: 0.0,
            load: None,
            file: None,
        }],
    }
}

/// Measured alias figure of `part` in dBc, with the band-limited clipper on or off.
pub fn alias_probe_with(
    part: &OpAmp,
    rails: Rails,
    rate: f64,
    oversample: usize,
    antialias: bool,
) -> f64 {
    let patch = probe_patch(part, rails, rate, oversample);
    let Ok(mut plan) = compile(&patch) else {
        return f64::NAN;
    };
    plan.antialias = antialias;
    let mut eng = Engine::new(&plan);
    let mut out = vec![0.0; PROBE_WARM + PROBE_N];
    eng.process(&mut [&mut out[..]]);
    alias_dbc(&out[PROBE_WARM..], probe_bin(rate))
}

/// Measured alias figure in dBc (total power of the non-harmonic in-band bins relative to the
/// fundamental) of a unity inverting stage with `part`, driven 7 dB past its swing by a
/// coherent sine near 5 kHz at `rate`, run at `oversample` times the rate. NaN when the
/// probe patch cannot be built (e.g. an invalid part).
pub fn alias_probe(part: &OpAmp, rails: Rails, rate: f64, oversample: usize) -> f64 {
    alias_probe_with(part, rails, rate, oversample, true)
}
