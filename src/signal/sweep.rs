//! Logarithmic (exponential) sine sweep.
//!
//! Instantaneous frequency `f(t) = f0 (f1 / f0)^(t / T)`; its integral, the phase in cycles,
//! is `phi(t) = f0 T / L (exp(t L / T) - 1)` with `L = ln(f1 / f0)` (the exponential sweep
//! used for impulse-response measurement: Farina, AES 108th Convention, 2000, preprint
//! 5093). After `T` the tone holds at `f1` with `phi(t) = phi(T) + f1 (t - T)`, so the phase is
//! continuous.
//!
//! At engine speed: the phase is evaluated in closed form at the start of every run of
//! [`super::periodic::ANCHOR`] samples (one `exp` there); within the run
//! `phi(t0 + m h) = phi(t0) + B (r^m - 1)` with `B = f0 e^(k t0) / k` and `r = e^(k h)`, and
//! `g_m = r^m - 1` follows the recurrence `g_(m+1) = g_m + (r - 1)(1 + g_m)` (`r - 1` from
//! `exp_m1`, no cancellation). The phase is reduced to one cycle and the sine is a polynomial
//! ([`sin_turns`]), so no library transcendental runs per sample. The closed form at every
//! sample stays as the plain reference ([`LogSweep::reference_sample`]); the two agree to
//! about 1e-11 of the amplitude (tested to 1e-10).

use std::f64::consts::TAU;

use super::Generator;

/// Exponential sine sweep from `from` to `to` Hz over `duration` s, then a steady tone.
#[derive(Debug, Clone)]
pub struct LogSweep {
    f0: f64,
    f1: f64,
    amp: f64,
    duration: f64,
    /// `ln(f1 / f0) / T`, 1/s.
    k: f64,
    /// Phase at the end of the sweep, cycles.
    phi_end: f64,
    rate: f64,
    n: u64,
}

impl LogSweep {
    /// A sweep from `from` Hz to `to` Hz (both > 0) over `duration` s (> 0), `amp` V peak,
    /// at `rate` Hz.
    pub fn new(from: f64, to: f64, amp: f64, duration: f64, rate: f64) -> Self {
        let k = (to / from).ln() / duration;
        let mut s = LogSweep {
            f0: from,
            f1: to,
            amp,
            duration,
            k,
            phi_end: 0.0,
            rate,
            n: 0,
        };
        s.phi_end = s.sweep_phase(duration);
        s
    }

    /// The sweep's own phase law, cycles, for `0 <= t <= T`.
    fn sweep_phase(&self, t: f64) -> f64 {
        if self.k.abs() < 1e-300 {
            self.f0 * t
        } else {
            self.f0 / self.k * (self.k * t).exp_m1()
        }
    }

    /// Phase in cycles at time `t` s (closed form; see the module docs).
    pub fn phase_at(&self, t: f64) -> f64 {
        if t >= self.duration {
            return self.phi_end + self.f1 * (t - self.duration);
        }
        self.sweep_phase(t)
    }

    /// Instantaneous frequency in Hz at time `t` s.
    pub fn freq_at(&self, t: f64) -> f64 {
        if t >= self.duration {
            self.f1
        } else {
            self.f0 * (self.k * t).exp()
        }
    }
}

/// `sin(2 pi c)` for `c` in `[-1/2, 1/2]`, without a library call: folded to
/// `[-1/4, 1/4]` (`sin(pi - x) = sin x`, exact subtractions) and the odd Taylor series of
/// `sin x`, `|x| <= pi / 2`, to `x^21` (the next term is below 2e-18).
#[inline(always)]
pub fn sin_turns(c: f64) -> f64 {
    let c = if c > 0.25 {
        0.5 - c
    } else if c < -0.25 {
        -0.5 - c
    } else {
        c
    };
    let x = TAU * c;
    let w = x * x;
    // 1 / (2n + 1)!, n = 10 down to 1, with alternating signs
    let mut p = 1.0 / 51_090_942_171_709_440_000.0;
    p = -1.0 / 121_645_100_408_832_000.0 + w * p;
    p = 1.0 / 355_687_428_096_000.0 + w * p;
    p = -1.0 / 1_307_674_368_000.0 + w * p;
    p = 1.0 / 6_227_020_800.0 + w * p;
    p = -1.0 / 39_916_800.0 + w * p;
    p = 1.0 / 362_880.0 + w * p;
    p = -1.0 / 5_040.0 + w * p;
    p = 1.0 / 120.0 + w * p;
    p = -1.0 / 6.0 + w * p;
    x + x * (w * p)
}

/// `y - round(y)` for `|y| < 2^51` (nearest-even by the `1.5 * 2^52` shift; no library call).
#[inline(always)]
fn frac_centred(y: f64) -> f64 {
    const SHIFT: f64 = 6_755_399_441_055_744.0;
    y - ((y + SHIFT) - SHIFT)
}

impl LogSweep {
    /// The sample at index `n` by the closed form and the library sine (the plain reference of
    /// [`Generator::fill`]).
    pub fn reference_sample(&self, n: u64) -> f64 {
        let t = n as f64 / self.rate;
        let phi = self.phase_at(t);
        let c = phi - phi.round();
        self.amp * (TAU * c).sin()
    }

    /// Samples of absolute indices `n .. n + out.len()`, within one run of
    /// [`super::periodic::ANCHOR`] samples; the method depends only on the run, so any
    /// chunking gives the same samples bit for bit.
    fn fill_run(&self, out: &mut [f64], n: u64) {
        let anchor = super::periodic::ANCHOR as u64;
        let k = n % anchor;
        let run0 = n - k;
        let t0 = run0 as f64 / self.rate;
        let t_last = (run0 + anchor - 1) as f64 / self.rate;
        if t0 >= self.duration {
            // the steady tone after the sweep: the reference's own phase formula
            for (i, y) in out.iter_mut().enumerate() {
                let t = (n + i as u64) as f64 / self.rate;
                let phi = self.phi_end + self.f1 * (t - self.duration);
                *y = self.amp * sin_turns(frac_centred(phi));
            }
        } else if t_last < self.duration && self.k.abs() >= 1e-300 {
            let fa = frac_centred(self.sweep_phase(t0));
            let big_b = self.f0 / self.k * (self.k * t0).exp();
            let rm1 = (self.k / self.rate).exp_m1();
            let mut g = 0.0;
            for _ in 0..k {
                g += rm1 * (1.0 + g);
            }
            for y in out.iter_mut() {
                *y = self.amp * sin_turns(frac_centred(fa + big_b * g));
                g += rm1 * (1.0 + g);
            }
        } else {
            // the run that crosses the end of the sweep (once per render), or f0 = f1
            for (i, y) in out.iter_mut().enumerate() {
                let t = (n + i as u64) as f64 / self.rate;
                *y = self.amp * sin_turns(frac_centred(self.phase_at(t)));
            }
        }
    }
}

impl Generator for LogSweep {
    fn fill(&mut self, out: &mut [f64]) {
        let len = out.len() as u64;
        for (run, n) in super::periodic::runs(out, self.n) {
            self.fill_run(run, n);
        }
        self.n += len;
    }
    fn reset(&mut self) {
        self.n = 0;
    }
}
