//! Seeded Gaussian noise, white and pink.
//!
//! Uniform numbers come from xoshiro256++ (Blackman and Vigna, "Scrambled linear
//! pseudorandom number generators", ACM TOMS 2021), seeded through SplitMix64 (Steele, Lea
//! and Flood, OOPSLA 2014), as those authors recommend. Gaussian numbers come from the
//! Box-Muller transform (Box and Muller, Ann. Math. Statist. 1958), both outputs used.
//!
//! Pink noise filters white noise through a cascade of first-order sections whose real poles
//! and zeros interleave at equal logarithmic spacing, three pole-zero pairs per decade, the
//! zero of each pair half a step (10^(1/6)) above its pole: the classic approximation of a
//! 1/f spectrum by log-spaced relaxation processes (Keshner, "1/f noise", Proc. IEEE 70(3),
//! 1982). Each pair falls 20 dB/decade over half of each step, so the average slope is
//! -10 dB/decade (-3.01 dB/octave). The first pole is at [`PINK_LOW_HZ`] (flat below it, so the
//! level stays bounded); sections are added while their zero stays below 0.45 times the rate
//! (flat above the last one). Each section is mapped by the bilinear transform with its pole
//! and zero pre-warped, so the corners sit where designed at any rate. The output is scaled
//! by the measured impulse-response energy of the cascade, so its RMS over the full band is
//! the requested value.

use std::f64::consts::PI;

use super::Generator;
pub(crate) use crate::rng::{splitmix64, Rng};

/// Unit Gaussian source (Box-Muller, pairs).
#[derive(Debug, Clone)]
struct Gauss {
    seed: u64,
    rng: Rng,
    spare: Option<f64>,
}

impl Gauss {
    fn new(seed: u64) -> Self {
        Gauss {
            seed,
            rng: Rng::new(seed),
            spare: None,
        }
    }
    #[inline]
    fn next(&mut self) -> f64 {
        if let Some(s) = self.spare.take() {
            return s;
        }
        let u1 = 1.0 - self.rng.uniform(); // (0, 1]
        let u2 = self.rng.uniform();
        let r = (-2.0 * u1.ln()).sqrt();
        let (s, c) = (2.0 * PI * u2).sin_cos();
        self.spare = Some(r * s);
        r * c
    }
    fn reset(&mut self) {
        *self = Gauss::new(self.seed);
    }
}

/// White Gaussian noise of a given RMS.
#[derive(Debug, Clone)]
pub struct WhiteNoise {
    gauss: Gauss,
    rms: f64,
}

impl WhiteNoise {
    /// White Gaussian noise, `rms` V, from `seed`.
    pub fn new(rms: f64, seed: u64) -> Self {
        WhiteNoise {
            gauss: Gauss::new(seed),
            rms,
        }
    }
}

impl Generator for WhiteNoise {
    fn fill(&mut self, out: &mut [f64]) {
        for y in out {
            *y = self.rms * self.gauss.next();
        }
    }
    fn reset(&mut self) {
        self.gauss.reset();
    }
}

/// Lowest pole of the pink filter, Hz: the spectrum is flat below it.
pub const PINK_LOW_HZ: f64 = 10.0;

/// One first-order section `y = b0 x + b1 x1 - a1 y1`.
#[derive(Debug, Clone, Copy)]
struct Section {
    b0: f64,
    b1: f64,
    a1: f64,
    x1: f64,
    y1: f64,
}

impl Section {
    /// Bilinear map of `(1 + s / wz) / (1 + s / wp)` with both corners pre-warped.
    fn shelf(fp: f64, fz: f64, rate: f64) -> Self {
        let k = 2.0 * rate;
        let wp = k * (PI * fp / rate).tan();
        let wz = k * (PI * fz / rate).tan();
        // H(s) = (wp / wz) (s + wz) / (s + wp); s = k (1 - z^-1) / (1 + z^-1).
        let g = wp / wz;
        let d = k + wp;
        Section {
            b0: g * (k + wz) / d,
            b1: g * (wz - k) / d,
            a1: (wp - k) / d,
            x1: 0.0,
            y1: 0.0,
        }
    }
    #[inline]
    fn tick(&mut self, x: f64) -> f64 {
        let y = self.b0 * x + self.b1 * self.x1 - self.a1 * self.y1;
        self.x1 = x;
        self.y1 = y;
        y
    }
    fn clear(&mut self) {
        self.x1 = 0.0;
        self.y1 = 0.0;
    }
}

/// Pink (-10 dB/decade) Gaussian noise of a given RMS over the full band.
#[derive(Debug, Clone)]
pub struct PinkNoise {
    gauss: Gauss,
    sections: Vec<Section>,
    gain: f64,
}

impl PinkNoise {
    /// Pink Gaussian noise, `rms` V over the full band, at `rate` Hz, from `seed`.
    pub fn new(rms: f64, rate: f64, seed: u64) -> Self {
        let step = 10f64.powf(1.0 / 3.0);
        let half = 10f64.powf(1.0 / 6.0);
        let mut sections = Vec::new();
        let mut fp = PINK_LOW_HZ;
        while fp * half < 0.45 * rate {
            sections.push(Section::shelf(fp, fp * half, rate));
            fp *= step;
        }
        // Impulse-response energy of the cascade (unit white input variance -> output variance).
        let mut probe = sections.clone();
        let mut energy = 0.0;
        let tau = rate / (2.0 * PI * PINK_LOW_HZ.min(rate / 4.0));
        let max_len = (60.0 * tau) as usize + 1024;
        let mut x = 1.0;
        for i in 0..max_len {
            let mut y = x;
            for s in &mut probe {
                y = s.tick(y);
            }
            x = 0.0;
            energy += y * y;
            if i > 64 && y * y < 1e-20 * energy {
                break;
            }
        }
        let gain = if energy > 0.0 {
            rms / energy.sqrt()
        } else {
            0.0
        };
        PinkNoise {
            gauss: Gauss::new(seed),
            sections,
            gain,
        }
    }
}

impl Generator for PinkNoise {
    fn fill(&mut self, out: &mut [f64]) {
        for y in out {
            let mut v = self.gauss.next();
            for s in &mut self.sections {
                v = s.tick(v);
            }
            *y = self.gain * v;
        }
    }
    fn reset(&mut self) {
        self.gauss.reset();
        for s in &mut self.sections {
            s.clear();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splitmix_reference_value() {
        // SplitMix64 with state 0: first output 0xe220a8397b1dcdaf (reference implementation
        // by Vigna, splitmix64.c; from memory).
        let mut s = 0u64;
        assert_eq!(splitmix64(&mut s), 0xe220_a839_7b1d_cdaf);
    }
}
