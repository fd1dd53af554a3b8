//! Circuit-noise generators of the engine: seeded Gaussian streams at the internal rate and
//! the 1/f (pinking) filter. See the "Noise" section of the [engine docs](super).
//!
//! Uniform numbers come from xoshiro256++ (Blackman and Vigna, "Scrambled linear
//! pseudorandom number generators", ACM TOMS 2021) seeded through SplitMix64 (Steele, Lea and
//! Flood, OOPSLA 2014), as those authors recommend; Gaussian numbers from the Box-Muller
//! transform (Box and Muller, Ann. Math. Statist. 1958), both outputs of every pair used.

use std::f64::consts::PI;

/// SplitMix64 step: advance `state` and return the next output.
fn splitmix64(state: &mut u64) -> u64 {
    *state = state.wrapping_add(0x9e37_79b9_7f4a_7c15);
    let mut z = *state;
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// xoshiro256++.
#[derive(Debug, Clone)]
struct Rng {
    s: [u64; 4],
}

impl Rng {
    fn new(seed: u64) -> Rng {
        let mut st = seed;
        Rng {
            s: [
                splitmix64(&mut st),
                splitmix64(&mut st),
                splitmix64(&mut st),
                splitmix64(&mut st),
            ],
        }
    }

    #[inline(always)]
    fn next_u64(&mut self) -> u64 {
        let s = &mut self.s;
        let result = s[0].wrapping_add(s[3]).rotate_left(23).wrapping_add(s[0]);
        let t = s[1] << 17;
        s[2] ^= s[0];
        s[3] ^= s[1];
        s[1] ^= s[2];
        s[0] ^= s[3];
        s[2] ^= t;
        s[3] = s[3].rotate_left(45);
        result
    }

    /// Uniform in [0, 1).
    #[inline(always)]
    fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / 9_007_199_254_740_992.0)
    }
}

/// Lowest pole of the 1/f filter, Hz (a decade below the audio band, so the shape at 20 Hz is
/// already the 1/f asymptote).
pub const FLICKER_LOW_HZ: f64 = 1.0;
/// Highest zero of the 1/f filter, Hz (above it the 1/f part is flat; it is far below the
/// white part there and the decimator removes that band).
pub const FLICKER_HIGH_HZ: f64 = 100e3;
/// Pole-zero pairs of the 1/f filter per decade.
pub const FLICKER_PER_DECADE: f64 = 3.0;

/// Seed of one noise stream from the patch seed, the owner's key (e.g. `stages.mix`) and the
/// source label (e.g. `vd`): FNV-1a (64 bit) over both strings, mixed with the seed through
/// SplitMix64. Same inputs, same stream; any change gives an unrelated stream.
pub fn stream_seed(seed: u64, owner: &str, label: &str) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in owner.bytes().chain([0u8]).chain(label.bytes()) {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    let mut s = seed ^ h.rotate_left(17);
    splitmix64(&mut s) ^ h
}

/// One first-order section `y = b0 x + b1 x1 - a1 y1`.
#[derive(Debug, Clone, Copy)]
struct Section {
    b0: f64,
    b1: f64,
    a1: f64,
}

/// The 1/f shaping filter: a cascade of first-order shelves whose real poles and zeros
/// interleave at equal logarithmic spacing, [`FLICKER_PER_DECADE`] pairs per decade, each zero
/// half a step above its pole, from [`FLICKER_LOW_HZ`] up (Keshner, "1/f noise", Proc. IEEE
/// 70(3), 1982: 1/f as a superposition of log-spaced relaxation processes). Each section is
/// mapped by the bilinear transform with pre-warped corners. [`Flicker::gain`] scales the
/// cascade so that white input of unit one-sided density gives `1 / f` (V^2/Hz) on average
/// (log-frequency mean) over 20 Hz - 20 kHz.
#[derive(Debug, Clone)]
pub struct Flicker {
    sections: Vec<Section>,
    state: Vec<(f64, f64)>,
    gain: f64,
    rate: f64,
}

impl Flicker {
    /// The filter for sampling rate `rate` (Hz).
    pub fn new(rate: f64) -> Flicker {
        let step = 10f64.powf(1.0 / FLICKER_PER_DECADE);
        let half = step.sqrt();
        let top = FLICKER_HIGH_HZ.min(0.45 * rate);
        let k = 2.0 * rate;
        let mut sections = Vec::new();
        let mut fp = FLICKER_LOW_HZ;
        while fp * half < top {
            let wp = k * (PI * fp / rate).tan();
            let wz = k * (PI * fp * half / rate).tan();
            let g = wp / wz;
            let d = k + wp;
            sections.push(Section {
                b0: g * (k + wz) / d,
                b1: g * (wz - k) / d,
                a1: (wp - k) / d,
            });
            fp *= step;
        }
        let mut f = Flicker {
            state: vec![(0.0, 0.0); sections.len()],
            sections,
            gain: 1.0,
            rate,
        };
        // Calibrate: mean over a log grid of ln(f |H|^2) in 20 Hz .. 2 kHz (two decades of
        // the periodic ripple, clear of the top end).
        let (lo, hi) = (20.0f64, 2e3f64.min(0.4 * rate));
        let n = 200;
        let mut acc = 0.0;
        for i in 0..=n {
            let fr = lo * (hi / lo).powf(i as f64 / n as f64);
            acc += (fr * f.response2(fr)).ln();
        }
        f.gain = (-0.5 * acc / (n + 1) as f64).exp();
        f
    }

    /// Sampling rate, Hz.
    pub fn rate(&self) -> f64 {
        self.rate
    }

    /// Number of first-order sections.
    pub fn sections(&self) -> usize {
        self.sections.len()
    }

    /// Scale that makes the output density `1 / f` for unit white input density.
    pub fn gain(&self) -> f64 {
        self.gain
    }

    /// `|H(f)|^2` of the cascade including [`Flicker::gain`].
    pub fn response2(&self, f: f64) -> f64 {
        let w = 2.0 * PI * f / self.rate;
        let (c, s) = (w.cos(), -w.sin());
        let mut h2 = self.gain * self.gain;
        for sec in &self.sections {
            // (b0 + b1 z^-1) / (1 + a1 z^-1), z^-1 = c + j s
            let (nr, ni) = (sec.b0 + sec.b1 * c, sec.b1 * s);
            let (dr, di) = (1.0 + sec.a1 * c, sec.a1 * s);
            h2 *= (nr * nr + ni * ni) / (dr * dr + di * di);
        }
        h2
    }

    /// Filter one sample (without [`Flicker::gain`]).
    #[inline(always)]
    fn tick(&mut self, x: f64) -> f64 {
        let mut y = x;
        for (s, st) in self.sections.iter().zip(self.state.iter_mut()) {
            let o = s.b0 * y + s.b1 * st.0 - s.a1 * st.1;
            st.0 = y;
            st.1 = o;
            y = o;
        }
        y
    }

    fn clear(&mut self) {
        self.state.fill((0.0, 0.0));
    }
}

/// A seeded noise stream of the engine at the internal rate: `white` (one-sided density,
/// V/sqrt(Hz)) plus a 1/f part of density^2 `flicker^2 / f`, independent of each other.
/// Each sample costs one Gaussian pair when there is a 1/f part, half a pair otherwise.
#[derive(Debug, Clone)]
pub struct NoiseStream {
    seed: u64,
    rng: Rng,
    white_sigma: f64,
    flicker_sigma: f64,
    flicker: Option<Flicker>,
}

impl NoiseStream {
    /// A stream at sampling rate `rate` (Hz). The white part's per-sample sigma is
    /// `white * sqrt(rate / 2)` (white noise of one-sided density `d` sampled at `fs` has
    /// variance `d^2 fs / 2`).
    pub fn new(white: f64, flicker: f64, rate: f64, seed: u64) -> NoiseStream {
        let scale = (0.5 * rate).sqrt();
        let fl = (flicker > 0.0).then(|| Flicker::new(rate));
        let fg = fl.as_ref().map_or(0.0, |f| f.gain());
        NoiseStream {
            seed,
            rng: Rng::new(seed),
            white_sigma: white.max(0.0) * scale,
            flicker_sigma: flicker.max(0.0) * scale * fg,
            flicker: fl,
        }
    }

    /// Whether the stream is silent (all densities 0): then [`NoiseStream::fill`] is never
    /// needed.
    pub fn is_silent(&self) -> bool {
        self.white_sigma == 0.0 && self.flicker_sigma == 0.0
    }

    /// Back to the start of the stream.
    pub fn reset(&mut self) {
        self.rng = Rng::new(self.seed);
        if let Some(f) = &mut self.flicker {
            f.clear();
        }
    }

    /// A Box-Muller pair of independent unit Gaussians.
    #[inline(always)]
    fn pair(&mut self) -> (f64, f64) {
        let u1 = 1.0 - self.rng.uniform(); // (0, 1]
        let u2 = self.rng.uniform();
        let r = (-2.0 * u1.ln()).sqrt();
        let (s, c) = (2.0 * PI * u2).sin_cos();
        (r * c, r * s)
    }

    /// Overwrite `out` with the next samples.
    pub fn fill(&mut self, out: &mut [f64]) {
        let ws = self.white_sigma;
        let fs = self.flicker_sigma;
        if self.flicker.is_some() && fs > 0.0 {
            for o in out.iter_mut() {
                let (a, b) = self.pair();
                let pink = match &mut self.flicker {
                    Some(f) => f.tick(b),
                    None => 0.0,
                };
                *o = ws * a + fs * pink;
            }
        } else {
            let mut chunks = out.chunks_exact_mut(2);
            for c in &mut chunks {
                let (a, b) = self.pair();
                c[0] = ws * a;
                c[1] = ws * b;
            }
            for o in chunks.into_remainder() {
                *o = ws * self.pair().0;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn flicker_shape_within_half_db_of_one_over_f() {
        // Target: density^2 proportional to 1/f (the 1/f part of en^2 (1 + fc/f), the
        // usual op-amp voltage-noise model; common practice). Checked on the filter's exact
        // frequency response at the internal rates of 48 kHz with K = 4 .. 16 over
        // 20 Hz - 20 kHz (measured worst 0.16 dB); at K = 2 the top end falls off near
        // Nyquist (measured -0.62 dB at 20 kHz), so there the bound is 0.7 dB.
        for (rate, tol) in [(96e3, 0.7), (192e3, 0.5), (384e3, 0.5), (768e3, 0.5)] {
            let f = Flicker::new(rate);
            let mut worst = 0.0f64;
            for i in 0..=600 {
                let fr = 20.0 * 1000f64.powf(i as f64 / 600.0);
                let db = 10.0 * (fr * f.response2(fr)).log10();
                worst = worst.max(db.abs());
            }
            assert!(worst < tol, "rate {rate}: worst {worst} dB");
        }
    }

    #[test]
    fn xoshiro_reference_sequence() {
        // xoshiro256++ (Blackman and Vigna's published algorithm) from state [1, 2, 3, 4],
        // worked by hand: out1 = rotl(1 + 4, 23) + 1 = 5 * 2^23 + 1; the state becomes
        // [7, 0, 262146, rotl(6, 45)], so out2 = rotl(7 + 6 * 2^45, 23) + 7
        // = 7 * 2^23 + 96 + 7.
        let mut r = Rng { s: [1, 2, 3, 4] };
        assert_eq!(r.next_u64(), 5 * (1 << 23) + 1);
        assert_eq!(r.next_u64(), 7 * (1 << 23) + 96 + 7);
    }

    #[test]
    fn seeds_differ_by_owner_and_label() {
        let a = stream_seed(1, "stages.a", "vd");
        assert_eq!(a, stream_seed(1, "stages.a", "vd"));
        assert_ne!(a, stream_seed(2, "stages.a", "vd"));
        assert_ne!(a, stream_seed(1, "stages.b", "vd"));
        assert_ne!(a, stream_seed(1, "stages.a", "out"));
    }

    #[test]
    fn white_variance_is_density_squared_times_half_rate() {
        // Sampled white noise of one-sided density d at rate fs has variance d^2 fs / 2
        // (Parseval over 0 .. fs/2; textbook).
        let (d, fs) = (10e-9, 192e3);
        let mut s = NoiseStream::new(d, 0.0, fs, 7);
        let mut buf = vec![0.0; 200_000];
        s.fill(&mut buf);
        let var = buf.iter().map(|x| x * x).sum::<f64>() / buf.len() as f64;
        let want = d * d * fs / 2.0;
        // 200k samples: relative standard error of the variance sqrt(2 / N) = 0.3 %.
        assert!((var / want - 1.0).abs() < 0.015, "{var} vs {want}");
    }
}
