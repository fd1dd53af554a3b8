//! Control voltages: constant, stepped, ramp. Steps change on the sample grid (a control
//! voltage jump, not band-limited).

use super::Generator;

/// A constant voltage.
#[derive(Debug, Clone)]
pub struct Dc {
    level: f64,
}

impl Dc {
    /// A constant `level` V.
    pub fn new(level: f64) -> Self {
        Dc { level }
    }
}

impl Generator for Dc {
    fn fill(&mut self, out: &mut [f64]) {
        out.fill(self.level);
    }
    fn reset(&mut self) {}
}

/// Levels held for `hold` seconds each, cycling. Level `k` covers the samples `n` with
/// `floor(n / (hold * rate)) mod len = k`.
#[derive(Debug, Clone)]
pub struct Steps {
    levels: Vec<f64>,
    hold_samples: f64,
    n: u64,
}

impl Steps {
    /// `levels` (V, non-empty), each held `hold` s (> 0), at `rate` Hz.
    pub fn new(levels: &[f64], hold: f64, rate: f64) -> Self {
        Steps {
            levels: levels.to_vec(),
            hold_samples: hold * rate,
            n: 0,
        }
    }
}

impl Generator for Steps {
    fn fill(&mut self, out: &mut [f64]) {
        let len = self.levels.len() as f64;
        for y in out {
            let k = (self.n as f64 / self.hold_samples).floor();
            let idx = (k - (k / len).floor() * len) as usize;
            *y = self.levels[idx.min(self.levels.len() - 1)];
            self.n += 1;
        }
    }
    fn reset(&mut self) {
        self.n = 0;
    }
}

/// A linear ramp from `from` to `to` over `duration` s, then held at `to`.
#[derive(Debug, Clone)]
pub struct Ramp {
    from: f64,
    to: f64,
    duration_samples: f64,
    n: u64,
}

impl Ramp {
    /// Ramp from `from` V to `to` V over `duration` s (0: jump at once) at `rate` Hz.
    pub fn new(from: f64, to: f64, duration: f64, rate: f64) -> Self {
        Ramp {
            from,
            to,
            duration_samples: duration * rate,
            n: 0,
        }
    }
}

impl Generator for Ramp {
    fn fill(&mut self, out: &mut [f64]) {
        for y in out {
            let n = self.n as f64;
            *y = if n >= self.duration_samples {
                self.to
            } else {
                self.from + (self.to - self.from) * (n / self.duration_samples)
            };
            self.n += 1;
        }
    }
    fn reset(&mut self) {
        self.n = 0;
    }
}
