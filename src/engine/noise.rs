//! Circuit-noise generators of the engine: seeded Gaussian streams at the internal rate and
//! the 1/f (pinking) filter. See the "Noise" section of the [engine docs](super).
//!
//! Uniform numbers come from xoshiro256++ (Blackman and Vigna, "Scrambled linear
//! pseudorandom number generators", ACM TOMS 2021) seeded through SplitMix64 (Steele, Lea and
//! Flood, OOPSLA 2014), as those authors recommend; Gaussian numbers from the Box-Muller
//! transform (Box and Muller, Ann. Math. Statist. 1958), both outputs of every pair used.

use std::f64::consts::PI;

use crate::rng::{splitmix64, Rng};

/// Lowest pole of the 1/f filter, Hz (below the audio band, so the shape at 20 Hz is already
/// the 1/f asymptote).
pub const FLICKER_LOW_HZ: f64 = 3.0;
/// Highest zero of the 1/f filter, Hz (above it the 1/f part is flat; it is far below the
/// white part there and the decimator removes that band).
pub const FLICKER_HIGH_HZ: f64 = 100e3;
/// Most sections of the 1/f filter (3 Hz to 100 kHz at two per decade needs 9).
pub const MAX_SECTIONS: usize = 10;
/// Lowest rate the engine runs a 1/f filter at, Hz: a stage's 1/f part runs at
/// `fs / floor(fs / FLICKER_MIN_RATE)` (64 kHz at K = 4 and 48 kHz), each value held, which
/// keeps the held part within 0.1 dB over 20 Hz - 5 kHz and its share of the total noise
/// within 0.1 dB up to 20 kHz (see [`NoiseStream`]).
pub const FLICKER_MIN_RATE: f64 = 64e3;
/// Pole-zero pairs of the 1/f filter per decade.
pub const FLICKER_PER_DECADE: f64 = 2.0;

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

/// One first-order section `y = x + b1 x1 - a1 y1` (its `b0` is folded into the cascade's
/// gain).
#[derive(Debug, Clone, Copy)]
struct Section {
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
    /// Coefficients padded to [`MAX_SECTIONS`] with identity sections, and the transposed
    /// direct-form states (fixed size, so the per-sample loop keeps them in registers).
    b1: [f64; MAX_SECTIONS],
    a1: [f64; MAX_SECTIONS],
    state: [f64; MAX_SECTIONS],
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
        while fp * half < top && sections.len() < MAX_SECTIONS {
            let wp = k * (PI * fp / rate).tan();
            let wz = k * (PI * fp * half / rate).tan();
            let d = k + wp;
            // (b0 + b1 z^-1) / (1 + a1 z^-1), b0 = g (k + wz) / d, b1 = g (wz - k) / d (g = wp / wz), divided
            // by b0 (the calibration below sets the overall gain)
            sections.push(Section {
                b1: (wz - k) / (k + wz),
                a1: (wp - k) / d,
            });
            fp *= step;
        }
        let mut f = Flicker {
            b1: std::array::from_fn(|i| sections.get(i).map_or(0.0, |s| s.b1)),
            a1: std::array::from_fn(|i| sections.get(i).map_or(0.0, |s| s.a1)),
            state: [0.0; MAX_SECTIONS],
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
            // (1 + b1 z^-1) / (1 + a1 z^-1), z^-1 = c + j s
            let (nr, ni) = (1.0 + sec.b1 * c, sec.b1 * s);
            let (dr, di) = (1.0 + sec.a1 * c, sec.a1 * s);
            h2 *= (nr * nr + ni * ni) / (dr * dr + di * di);
        }
        h2
    }

    /// `out[n] = f * H(x)[n]` over a block (the 1/f part alone).
    #[inline(always)]
    fn shape_block(&mut self, x: &[f64], f: f64, out: &mut [f64]) {
        let (b1, a1) = (self.b1, self.a1);
        let mut st = self.state;
        for (o, &g) in out.iter_mut().zip(x) {
            let mut y = g;
            for j in 0..MAX_SECTIONS {
                let x = y;
                y = x + st[j];
                st[j] = b1[j] * x - a1[j] * y;
            }
            *o = f * y;
        }
        self.state = st;
    }

    fn clear(&mut self) {
        self.state = [0.0; MAX_SECTIONS];
    }
}

/// `ln(u)` for `u` in (0, 1]: exponent from the bits, `ln m = 2 atanh((m - 1) / (m + 1))`
/// for the mantissa in [sqrt(1/2), sqrt(2)) to the s^13 term (relative error below 1e-12).
#[inline(always)]
fn ln_series(u: f64) -> f64 {
    const ONE: u64 = 0x3ff0_0000_0000_0000;
    const MANT: u64 = 0x000f_ffff_ffff_ffff;
    const TWO52: f64 = 4_503_599_627_370_496.0;
    let x = u.to_bits();
    let m0 = f64::from_bits((x & MANT) | ONE);
    let e0 = f64::from_bits(0x4330_0000_0000_0000 | (x >> 52)) - TWO52 - 1023.0;
    let big = m0 > std::f64::consts::SQRT_2;
    let m = if big { 0.5 * m0 } else { m0 };
    let e = if big { e0 + 1.0 } else { e0 };
    // ln m = 2 atanh(s), s = (m - 1) / (m + 1), |s| <= 0.172
    let s = (m - 1.0) / (m + 1.0);
    let s2 = s * s;
    let series = 1.0
        + s2 * (1.0 / 3.0
            + s2 * (1.0 / 5.0
                + s2 * (1.0 / 7.0 + s2 * (1.0 / 9.0 + s2 * (1.0 / 11.0 + s2 * (1.0 / 13.0))))));
    e * std::f64::consts::LN_2 + 2.0 * s * series
}

/// `(sin th, cos th)` for |th| <= pi/4: Taylor series to th^13 and th^14 (error below 1e-13).
#[inline(always)]
fn sin_cos_series(th: f64) -> (f64, f64) {
    let q = th * th;
    let sn = th
        * (1.0
            + q * (-1.0 / 6.0
                + q * (1.0 / 120.0
                    + q * (-1.0 / 5040.0
                        + q * (1.0 / 362_880.0
                            + q * (-1.0 / 39_916_800.0 + q * (1.0 / 6_227_020_800.0)))))));
    let cs = 1.0
        + q * (-0.5
            + q * (1.0 / 24.0
                + q * (-1.0 / 720.0
                    + q * (1.0 / 40_320.0
                        + q * (-1.0 / 3_628_800.0
                            + q * (1.0 / 479_001_600.0 + q * (-1.0 / 87_178_291_200.0)))))));
    (sn, cs)
}

/// Unit Gaussians from raw 64-bit words, two words per pair: Box-Muller with the angle drawn
/// as a uniform `theta` in [-pi/4, pi/4] (second word) followed by a random element of the
/// square's symmetry group (three low bits of the first word: swap, two signs), which makes
/// the angle uniform on the circle; the radius `sqrt(-2 ln u)` takes `u` from the first
/// word's top 52 bits. `ln`, `sin` and `cos` are short series on reduced ranges (relative
/// error below 1e-12), branch-free, so the loop vectorises. `out.len() == words.len()`.
#[inline(always)]
fn gaussians(words: &[u64], out: &mut [f64]) {
    const ONE: u64 = 0x3ff0_0000_0000_0000;
    for (o, w) in out.chunks_exact_mut(2).zip(words.chunks_exact(2)) {
        let (a, b) = (w[0], w[1]);
        // u in (0, 1]: 2 - [1, 2)
        let u = 2.0 - f64::from_bits(ONE | (a >> 12));
        let ln_u = ln_series(u);
        let r = (-2.0 * ln_u).max(0.0).sqrt();
        // theta in [-pi/4, pi/4)
        let t = f64::from_bits(ONE | (b >> 12)) - 1.5;
        let th = t * std::f64::consts::FRAC_PI_2;
        let (sn, cs) = sin_cos_series(th);
        let swap = a & 1 == 1;
        let (p0, p1) = if swap { (sn, cs) } else { (cs, sn) };
        let sx = f64::from_bits(ONE | ((a >> 1) & 1) << 63);
        let sy = f64::from_bits(ONE | ((a >> 2) & 1) << 63);
        o[0] = r * p0 * sx;
        o[1] = r * p1 * sy;
    }
}

/// Unit-variance white samples from raw 64-bit words, one word each: the sum of the word's
/// four 16-bit fields (Irwin-Hall with four uniforms: zero mean, unit variance after
/// scaling, excess kurtosis -0.3, bounded at 3.46 sigma), branch-free and vectorisable. The
/// engine's white noise uses these at the internal rate (issue 13: one word a sample instead
/// of half a Box-Muller pair); what anyone hears or measures is that noise after the
/// decimation filter, a weighted sum of many samples, which is Gaussian by the central limit
/// theorem (tested on the output in `tests/engine_noise.rs`). The 1/f part keeps the exact
/// Gaussians of [`gaussians`].
#[inline(always)]
fn white_samples(words: &[u64], out: &mut [f64]) {
    // each field uniform on 0..=65535: mean 32767.5, variance (65536^2 - 1) / 12
    const MEAN: f64 = 4.0 * 32_767.5;
    let inv_sigma = 1.0 / (4.0 * (65_536.0f64 * 65_536.0 - 1.0) / 12.0).sqrt();
    for (o, &w) in out.iter_mut().zip(words) {
        let s = (w & 0xffff) + ((w >> 16) & 0xffff) + ((w >> 32) & 0xffff) + (w >> 48);
        *o = (s as f64 - MEAN) * inv_sigma;
    }
}

/// A seeded noise stream of the engine at the internal rate: `white` (one-sided density,
/// V/sqrt(Hz)) plus a 1/f part of density^2 `flicker^2 / f`, independent of each other.
///
/// The 1/f part may run at a lower rate, `rate / hold` (the engine uses at least
/// [`FLICKER_MIN_RATE`], issue 13: it is a low-frequency signal), each of its samples held
/// for `hold` internal samples: a zero-order hold keeps the spectral density at low
/// frequencies and rolls it off by `sinc^2(f hold / rate)` (-0.09 dB at 5 kHz, -1.4 dB at
/// 20 kHz at 64 kHz), where the 1/f part is far below the white part (`fc / f` of it), so the
/// total changes by less than 0.1 dB in the audio band; the images above the base band are
/// removed by the decimator. Each internal sample costs half a Gaussian pair for the white part, plus half a
/// pair and the 1/f filter per `hold` samples. Scratch is sized for blocks of `block` samples
/// at construction; [`NoiseStream::fill`] does not allocate.
#[derive(Debug, Clone)]
pub struct NoiseStream {
    seed: u64,
    rng: Rng,
    white_sigma: f64,
    flicker_sigma: f64,
    flicker: Option<Flicker>,
    hold: usize,
    block: usize,
    /// Position within the current hold, and the held 1/f value.
    phase: usize,
    held: f64,
    words: Vec<u64>,
    gauss: Vec<f64>,
    fbuf: Vec<f64>,
}

impl NoiseStream {
    /// A stream at sampling rate `rate` (Hz), filled in blocks of at most `block` samples
    /// (longer requests are split). The white part's per-sample sigma is
    /// `white * sqrt(rate / 2)` (white noise of one-sided density `d` sampled at `fs` has
    /// variance `d^2 fs / 2`); the 1/f part at the full rate.
    pub fn new(white: f64, flicker: f64, rate: f64, seed: u64, block: usize) -> NoiseStream {
        NoiseStream::with_hold(white, flicker, rate, seed, block, 1)
    }

    /// As [`NoiseStream::new`], with the 1/f part at `rate / hold`, each value held `hold`
    /// samples (see the type's docs).
    pub fn with_hold(
        white: f64,
        flicker: f64,
        rate: f64,
        seed: u64,
        block: usize,
        hold: usize,
    ) -> NoiseStream {
        let hold = hold.max(1);
        let frate = rate / hold as f64;
        let scale = (0.5 * rate).sqrt();
        let fl = (flicker > 0.0).then(|| Flicker::new(frate));
        let fg = fl.as_ref().map_or(0.0, |f| f.gain());
        let block = block.max(1);
        let nf = if fl.is_some() {
            block.div_ceil(hold) + 1
        } else {
            0
        };
        let n = block + 2 * nf.div_ceil(2);
        NoiseStream {
            seed,
            rng: Rng::new(seed),
            white_sigma: white.max(0.0) * scale,
            flicker_sigma: flicker.max(0.0) * (0.5 * frate).sqrt() * fg,
            flicker: fl,
            hold,
            block,
            phase: 0,
            held: 0.0,
            words: vec![0; n],
            gauss: vec![0.0; n],
            fbuf: vec![0.0; nf],
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
        self.phase = 0;
        self.held = 0.0;
        if let Some(f) = &mut self.flicker {
            f.clear();
        }
    }

    /// Overwrite `out` with the next samples.
    #[inline(always)]
    pub fn fill(&mut self, out: &mut [f64]) {
        for part in out.chunks_mut(self.block) {
            self.fill_chunk(part);
        }
    }

    #[inline(always)]
    fn fill_chunk(&mut self, out: &mut [f64]) {
        let ws = self.white_sigma;
        let fs = self.flicker_sigma;
        let n = out.len();
        // new 1/f samples: positions whose phase is 0
        let first = (self.hold - self.phase) % self.hold;
        let nf = match &self.flicker {
            Some(_) if n > first => (n - first).div_ceil(self.hold),
            _ => 0,
        };
        let m = n + 2 * nf.div_ceil(2);
        for w in &mut self.words[..m] {
            *w = self.rng.next_u64();
        }
        white_samples(&self.words[..n], &mut self.gauss[..n]);
        gaussians(&self.words[n..m], &mut self.gauss[n..m]);
        for (o, g) in out.iter_mut().zip(&self.gauss[..n]) {
            *o = ws * g;
        }
        if let Some(f) = &mut self.flicker {
            f.shape_block(&self.gauss[n..n + nf], fs, &mut self.fbuf[..nf]);
            let (hold, mut phase, mut held) = (self.hold, self.phase, self.held);
            let mut j = 0;
            for o in out.iter_mut() {
                if phase == 0 {
                    held = self.fbuf[j];
                    j += 1;
                }
                *o += held;
                phase += 1;
                if phase == hold {
                    phase = 0;
                }
            }
            self.phase = phase;
            self.held = held;
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
        // 20 Hz - 20 kHz (measured worst 0.07-0.14 dB) and at K = 2 (measured 0.39 dB, the top end
        // near Nyquist).
        for (rate, tol) in [(96e3, 0.5), (192e3, 0.5), (384e3, 0.5), (768e3, 0.5)] {
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
        let mut r = Rng::from_state([1, 2, 3, 4]);
        assert_eq!(r.next_u64(), 5 * (1 << 23) + 1);
        assert_eq!(r.next_u64(), 7 * (1 << 23) + 96 + 7);
    }

    #[test]
    fn gaussians_have_unit_moments_and_normal_tails() {
        // Standard normal: mean 0, variance 1, fourth moment 3, P(|x| > 2) = 0.0455
        // (Abramowitz and Stegun 26.2; textbook). 400k samples: standard errors about
        // 0.0016 (mean), 0.0022 (variance), 0.011 (fourth moment), 0.0003 (tail).
        let mut rng = Rng::new(11);
        let n = 400_000;
        let words: Vec<u64> = (0..n).map(|_| rng.next_u64()).collect();
        let mut g = vec![0.0; n];
        gaussians(&words, &mut g);
        let nf = n as f64;
        let mean = g.iter().sum::<f64>() / nf;
        let var = g.iter().map(|x| x * x).sum::<f64>() / nf;
        let m4 = g.iter().map(|x| x.powi(4)).sum::<f64>() / nf;
        let tail = g.iter().filter(|x| x.abs() > 2.0).count() as f64 / nf;
        assert!(mean.abs() < 0.008, "{mean}");
        assert!((var - 1.0).abs() < 0.011, "{var}");
        assert!((m4 - 3.0).abs() < 0.06, "{m4}");
        assert!((tail - 0.0455).abs() < 0.0015, "{tail}");
        // pairs uncorrelated
        let c = g.chunks_exact(2).map(|p| p[0] * p[1]).sum::<f64>() / (nf / 2.0);
        assert!(c.abs() < 0.011, "{c}");
        // the series match the library functions
        for i in 0..=1000 {
            let u = 2f64.powf(-52.0 * i as f64 / 1000.0);
            let want = u.ln();
            assert!(
                (ln_series(u) - want).abs() <= 1e-12 * want.abs().max(1.0),
                "{u}"
            );
            let th = std::f64::consts::FRAC_PI_4 * (i as f64 / 500.0 - 1.0);
            let (sn, cs) = sin_cos_series(th);
            assert!(
                (sn - th.sin()).abs() < 1e-13 && (cs - th.cos()).abs() < 1e-13,
                "{th}"
            );
        }
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
        let mut s = NoiseStream::new(d, 0.0, fs, 7, 512);
        let mut buf = vec![0.0; 200_000];
        s.fill(&mut buf);
        let var = buf.iter().map(|x| x * x).sum::<f64>() / buf.len() as f64;
        let want = d * d * fs / 2.0;
        // 200k samples: relative standard error of the variance sqrt(2 / N) = 0.3 %.
        assert!((var / want - 1.0).abs() < 0.015, "{var} vs {want}");
    }
}
