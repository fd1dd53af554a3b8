//! Least-squares sine fits of IEEE Std 1057 (also IEEE Std 1241).
//!
//! Model: `x[n] = a cos(w t_n) + b sin(w t_n) + c`, `w = 2 pi f`, with the time origin at the
//! centre of the record, `t_n = (n - (N-1)/2) / rate` (this keeps the four-parameter normal
//! equations well conditioned; [`SineFit::phase`] is converted back to the first sample).
//!
//! - Three-parameter fit (known frequency): linear least squares on `[cos, sin, 1]`.
//! - Four-parameter fit: Gauss-Newton on frequency; each step solves the linearised system on
//!   `[cos, sin, 1, t (-a sin + b cos)]` from the previous estimate, and stops when the
//!   frequency step is below `1e-12` of the frequency or after [`MAX_ITERATIONS`].
//!
//! The residual `x - fit` is what THD+N and SINAD are built on.

use super::spectrum::{check_freq, check_rate, check_samples};
use super::AnalysisError;

/// Iteration cap of the four-parameter fit.
pub const MAX_ITERATIONS: usize = 30;

/// Result of a sine fit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SineFit {
    /// Frequency, Hz (the given one for a three-parameter fit).
    pub freq: f64,
    /// Cosine coefficient (centred time origin), V.
    pub a: f64,
    /// Sine coefficient (centred time origin), V.
    pub b: f64,
    /// Constant term (DC), V.
    pub dc: f64,
    /// Peak amplitude `sqrt(a^2 + b^2)`, V.
    pub amplitude: f64,
    /// Phase at the first sample of the record, radians, for `amplitude cos(w t + phase)`.
    pub phase: f64,
    /// Four-parameter iterations used (0 for a three-parameter fit).
    pub iterations: usize,
    /// Whether four-parameter iteration met its tolerance (always true for three-parameter).
    pub converged: bool,
    /// RMS of the full-band residual `x - fit`, V.
    pub residual_rms: f64,
}

impl SineFit {
    /// The fitted model at sample `n` of the record it was fitted to (`len` samples).
    pub fn value(&self, n: usize, len: usize, rate: f64) -> f64 {
        let t = (n as f64 - (len as f64 - 1.0) / 2.0) / rate;
        let (s, c) = (2.0 * std::f64::consts::PI * self.freq * t).sin_cos();
        self.a * c + self.b * s + self.dc
    }

    /// Write `x - fit` into `out` (same length as `samples`; extra `out` is left untouched).
    pub fn residual(&self, samples: &[f64], rate: f64, out: &mut [f64]) {
        let len = samples.len();
        for (n, (o, &x)) in out.iter_mut().zip(samples).enumerate() {
            *o = x - self.value(n, len, rate);
        }
    }
}

#[allow(clippy::needless_range_loop)] // textbook index form of elimination
/// Solve the `D x D` system `m x = v` by Gaussian elimination with partial pivoting.
fn solve<const D: usize>(mut m: [[f64; D]; D], mut v: [f64; D]) -> Option<[f64; D]> {
    for col in 0..D {
        let pivot = (col..D).max_by(|&i, &j| m[i][col].abs().total_cmp(&m[j][col].abs()))?;
        if m[pivot][col].abs() < 1e-300 {
            return None;
        }
        m.swap(col, pivot);
        v.swap(col, pivot);
        for row in col + 1..D {
            let f = m[row][col] / m[col][col];
            for k in col..D {
                m[row][k] -= f * m[col][k];
            }
            v[row] -= f * v[col];
        }
    }
    let mut x = [0.0; D];
    for row in (0..D).rev() {
        let mut s = v[row];
        for k in row + 1..D {
            s -= m[row][k] * x[k];
        }
        x[row] = s / m[row][row];
    }
    if x.iter().all(|v| v.is_finite()) {
        Some(x)
    } else {
        None
    }
}

fn centred_t(n: usize, len: usize, rate: f64) -> f64 {
    (n as f64 - (len as f64 - 1.0) / 2.0) / rate
}

#[allow(clippy::needless_range_loop)] // symmetric fill by index
/// Least squares on `D` columns produced by `cols(n) -> [f64; D]`.
fn lsq<const D: usize>(
    samples: &[f64],
    mut cols: impl FnMut(usize) -> [f64; D],
) -> Option<[f64; D]> {
    let mut m = [[0.0; D]; D];
    let mut v = [0.0; D];
    for (n, &x) in samples.iter().enumerate() {
        let c = cols(n);
        for i in 0..D {
            v[i] += c[i] * x;
            for j in i..D {
                m[i][j] += c[i] * c[j];
            }
        }
    }
    for i in 0..D {
        for j in 0..i {
            m[i][j] = m[j][i];
        }
    }
    solve(m, v)
}

fn finish(samples: &[f64], rate: f64, freq: f64, p: [f64; 3], iterations: usize) -> SineFit {
    let len = samples.len();
    let t0 = centred_t(0, len, rate);
    // a cos + b sin = R cos(w t + phi), phi = atan2(-b, a); shift origin to t0.
    let phase_c = (-p[1]).atan2(p[0]);
    let mut phase = phase_c + 2.0 * std::f64::consts::PI * freq * t0;
    phase = phase.rem_euclid(2.0 * std::f64::consts::PI);
    let mut fit = SineFit {
        freq,
        a: p[0],
        b: p[1],
        dc: p[2],
        amplitude: p[0].hypot(p[1]),
        phase,
        iterations,
        converged: true,
        residual_rms: 0.0,
    };
    let ss: f64 = samples
        .iter()
        .enumerate()
        .map(|(n, &x)| {
            let r = x - fit.value(n, len, rate);
            r * r
        })
        .sum();
    fit.residual_rms = (ss / len as f64).sqrt();
    fit
}

/// Three-parameter fit at the known frequency `freq` Hz (IEEE Std 1057, 4.1.3.1).
pub fn fit_sine_3(samples: &[f64], rate: f64, freq: f64) -> Result<SineFit, AnalysisError> {
    check_rate(rate)?;
    check_freq("fit frequency", freq, rate)?;
    check_samples("samples", samples, 8)?;
    let len = samples.len();
    let w = 2.0 * std::f64::consts::PI * freq;
    let p = lsq::<3>(samples, |n| {
        let (s, c) = (w * centred_t(n, len, rate)).sin_cos();
        [c, s, 1.0]
    })
    .ok_or(AnalysisError::FitFailed {
        what: "three-parameter sine fit",
    })?;
    Ok(finish(samples, rate, freq, p, 0))
}

/// Four-parameter fit starting from `freq_guess` Hz (IEEE Std 1057, 4.1.3.3). The guess
/// should be within a fraction of a bin (`rate / N`) of the tone.
pub fn fit_sine_4(samples: &[f64], rate: f64, freq_guess: f64) -> Result<SineFit, AnalysisError> {
    let first = fit_sine_3(samples, rate, freq_guess)?;
    let len = samples.len();
    let bin = rate / len as f64;
    let mut w = 2.0 * std::f64::consts::PI * freq_guess;
    let (mut a, mut b) = (first.a, first.b);
    let mut best = first;
    let mut converged = false;
    let mut iterations = 0;
    for it in 1..=MAX_ITERATIONS {
        iterations = it;
        let p = match lsq::<4>(samples, |n| {
            let t = centred_t(n, len, rate);
            let (s, c) = (w * t).sin_cos();
            [c, s, 1.0, t * (-a * s + b * c)]
        }) {
            Some(p) => p,
            None => break,
        };
        // Keep each step within half a bin (safeguard against a poor starting point).
        let max_step = std::f64::consts::PI * bin;
        let dw = p[3].clamp(-max_step, max_step);
        let w_new = w + dw;
        let f_new = w_new / (2.0 * std::f64::consts::PI);
        if check_freq("fit frequency", f_new, rate).is_err() {
            break;
        }
        let trial = fit_sine_3(samples, rate, f_new)?;
        if trial.residual_rms <= best.residual_rms {
            best = trial;
        }
        a = trial.a;
        b = trial.b;
        w = w_new;
        if dw.abs() <= 1e-12 * w.abs() {
            converged = true;
            break;
        }
    }
    best.iterations = iterations;
    best.converged = converged;
    Ok(best)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn recovers_known_parameters() {
        // A noiseless sine is fitted exactly (IEEE Std 1057: the fit is the least-squares
        // estimator, zero residual for a pure sine).
        let rate = 48_000.0;
        let f = 997.3;
        let x: Vec<f64> = (0..10_000)
            .map(|n| 0.5 + 2.0 * (2.0 * std::f64::consts::PI * f * n as f64 / rate + 1.1).cos())
            .collect();
        let fit = fit_sine_4(&x, rate, f + 0.8).unwrap();
        assert!(fit.converged);
        assert!((fit.freq - f).abs() < 1e-9, "{}", fit.freq);
        assert!((fit.amplitude - 2.0).abs() < 1e-10);
        assert!((fit.dc - 0.5).abs() < 1e-10);
        assert!((fit.phase - 1.1).abs() < 1e-8, "{}", fit.phase);
        assert!(fit.residual_rms < 1e-10);
        let fit3 = fit_sine_3(&x, rate, f).unwrap();
        assert!((fit3.amplitude - 2.0).abs() < 1e-12);
    }
}
