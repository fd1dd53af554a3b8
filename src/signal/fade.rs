//! Short fades at the edges of a written file, so that a file does not click where it starts
//! and ends (a render usually starts and stops mid-waveform).
//!
//! The gain rises over the first `len` frames and falls over the last `len` frames as a
//! raised cosine (half a Hann window, common practice for edge fades):
//! `g(k) = sin^2(pi k / (2 len))` at `k` frames from the nearer edge, `k < len`; 1 elsewhere.
//! The first and the last frame are exactly 0. The fade only touches what is written: the
//! figures come from the unfaded signal.

/// Default fade length, s.
pub const DEFAULT_FADE_S: f64 = 0.005;

/// The edge fade of a file of `total` frames.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EdgeFade {
    total: usize,
    len: usize,
}

impl EdgeFade {
    /// A fade of `fade_s` seconds (rounded to whole frames, at most half the file) at each
    /// end of a file of `total` frames at `rate` Hz; `fade_s = 0` switches it off. A length
    /// that is negative or not finite counts as 0.
    pub fn new(total: usize, rate: f64, fade_s: f64) -> EdgeFade {
        let len = if fade_s.is_finite() && fade_s > 0.0 && rate.is_finite() && rate > 0.0 {
            ((fade_s * rate).round() as usize).min(total / 2)
        } else {
            0
        };
        EdgeFade { total, len }
    }

    /// Fade length, frames.
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether the fade is switched off.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Gain at frame `n`.
    pub fn gain(&self, n: usize) -> f64 {
        if n >= self.total {
            return 0.0;
        }
        let k = n.min(self.total - 1 - n);
        if k >= self.len {
            1.0
        } else {
            let s = (std::f64::consts::FRAC_PI_2 * k as f64 / self.len as f64).sin();
            s * s
        }
    }

    /// Whether any of the frames `start .. start + n` lies inside a fade.
    pub fn touches(&self, start: usize, n: usize) -> bool {
        self.len > 0 && (start < self.len || start + n > self.total.saturating_sub(self.len))
    }

    /// Apply the fade to `x`, frames `start .. start + x.len()` of the file.
    pub fn apply(&self, start: usize, x: &mut [f64]) {
        if !self.touches(start, x.len()) {
            return;
        }
        let tail = self.total.saturating_sub(self.len);
        for (i, v) in x.iter_mut().enumerate() {
            let n = start + i;
            if n < self.len || n >= tail {
                *v *= self.gain(n);
            }
        }
    }

    /// A faded copy of a whole file's samples.
    pub fn applied(&self, x: &[f64]) -> Vec<f64> {
        let mut y = x.to_vec();
        self.apply(0, &mut y);
        y
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Definition [D]: zero at both ends, 1 in the middle, 1/2 half-way through the fade
    // (sin^2(pi/4) = 1/2), symmetric, monotonic; 0 s switches it off.
    #[test]
    fn raised_cosine_edges() {
        let f = EdgeFade::new(1000, 48_000.0, 0.001);
        assert_eq!(f.len(), 48);
        assert_eq!(f.gain(0), 0.0);
        assert_eq!(f.gain(999), 0.0);
        assert!((f.gain(24) - 0.5).abs() < 1e-12);
        assert!((f.gain(975) - 0.5).abs() < 1e-12);
        assert_eq!(f.gain(48), 1.0);
        assert_eq!(f.gain(500), 1.0);
        for n in 1..48 {
            assert!(f.gain(n) > f.gain(n - 1));
            assert!((f.gain(n) - f.gain(999 - n)).abs() < 1e-15);
        }
        // chunked application equals the whole
        let x: Vec<f64> = (0..1000).map(|i| (i as f64 * 0.1).sin() + 0.3).collect();
        let whole = f.applied(&x);
        let mut parts = x.clone();
        for (c, chunk) in parts.chunks_mut(37).enumerate() {
            f.apply(c * 37, chunk);
        }
        assert_eq!(whole, parts);
        assert!(EdgeFade::new(1000, 48_000.0, 0.0).is_empty());
        assert_eq!(EdgeFade::new(1000, 48_000.0, 0.0).applied(&x), x);
        // at most half the file
        assert_eq!(EdgeFade::new(10, 48_000.0, 1.0).len(), 5);
    }
}
