//! Logarithmic (exponential) sine sweep.
//!
//! Instantaneous frequency `f(t) = f0 (f1 / f0)^(t / T)`; its integral, the phase in cycles,
//! is `phi(t) = f0 T / L (exp(t L / T) - 1)` with `L = ln(f1 / f0)` (the exponential sweep
//! used for impulse-response measurement: Farina, AES 108th Convention, 2000, preprint
//! 5093). After `T` the tone holds at `f1` with `phi(t) = phi(T) + f1 (t - T)`, so the phase is
//! continuous. The phase is evaluated in closed form at every sample index (nothing
//! accumulates), and reduced to one cycle before the sine.

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

impl Generator for LogSweep {
    fn fill(&mut self, out: &mut [f64]) {
        for y in out {
            let t = self.n as f64 / self.rate;
            let phi = self.phase_at(t);
            let c = phi - phi.round();
            *y = self.amp * (TAU * c).sin();
            self.n += 1;
        }
    }
    fn reset(&mut self) {
        self.n = 0;
    }
}
