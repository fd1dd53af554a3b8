//! Circuit-noise generators of the engine: seeded Gaussian streams at the internal rate and
//! the 1/f (pinking) filter. See the "Noise" section of the [engine docs](super).
//!
//! Uniform numbers come from xoshiro256++ (Blackman and Vigna, "Scrambled linear
//! pseudorandom number generators", ACM TOMS 2021) seeded through SplitMix64 (Steele, Lea and
//! Flood, OOPSLA 2014), as those authors recommend, four generators in lockstep
//! ([`crate::rng::Rng4`]); each sample is the sum of four 16-bit uniforms of one word
//! ([`white_samples`]), made Gaussian by the filters that follow (central limit theorem).

use std::f64::consts::PI;

#[cfg(test)]
use crate::rng::Rng;
use crate::rng::{splitmix64, Rng4};

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
    /// `b1 - a1` of each section.
    c: [f64; MAX_SECTIONS],
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
            c: std::array::from_fn(|i| sections.get(i).map_or(0.0, |s| s.b1 - s.a1)),
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

    /// `out[n] = f * H(x)[n]` over a block (the 1/f part alone), one sample at a time
    /// through every section: the plain reference of [`Flicker::shape_block`]. Each section
    /// in transposed direct form, `y = x + s`, `s <- (b1 - a1) x - a1 s` (the same as
    /// `s <- b1 x - a1 y`, with one multiply fewer on the state's own chain).
    pub fn shape_block_serial(&mut self, x: &[f64], f: f64, out: &mut [f64]) {
        let (c, a1) = (self.c, self.a1);
        let mut st = self.state;
        for (o, &g) in out.iter_mut().zip(x) {
            let mut y = g;
            for j in 0..MAX_SECTIONS {
                let x = y;
                y = x + st[j];
                st[j] = c[j] * x - a1[j] * st[j];
            }
            *o = f * y;
        }
        self.state = st;
    }

    /// As [`Flicker::shape_block_serial`], bit for bit, with the sections in lockstep
    /// (issue 13): at tick `t` section `j` takes sample `t - j` (a skewed pipeline), so the
    /// sections of one tick are independent and run side by side in groups of four (one
    /// 256-bit vector each), instead of one sample waiting on the chain of sections. Only
    /// the groups in use run (two at the engine's 1/f rates, which need at most 8 sections).
    /// Compilers keep the portable version's lanes in scalar registers, so the common case
    /// (two groups) has an explicit 256-bit version where the CPU has AVX2 (the same
    /// operations lane by lane, so the same bits).
    #[inline(always)]
    pub fn shape_block(&mut self, x: &[f64], f: f64, out: &mut [f64]) {
        match self.sections.len() {
            0..=4 => self.pipelined::<1>(x, f, out),
            5..=8 => {
                #[cfg(target_arch = "x86_64")]
                {
                    if std::arch::is_x86_feature_detected!("avx2") {
                        // SAFETY: the CPU supports AVX2 (checked just above).
                        unsafe { self.pipelined2_avx2(x, f, out) };
                        return;
                    }
                }
                self.pipelined::<2>(x, f, out)
            }
            _ => self.pipelined::<3>(x, f, out),
        }
    }

    /// [`Flicker::pipelined`] with two groups, in AVX2 registers: the steady-state ticks
    /// in vectors (the shift by one section is a lane rotation and a blend), the fill and
    /// drain ticks by the portable code.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn pipelined2_avx2(&mut self, x: &[f64], f: f64, out: &mut [f64]) {
        use std::arch::x86_64::*;
        const V: usize = 2;
        let nf = x.len().min(out.len());
        let depth = 4 * V;
        if nf < 2 * depth {
            return self.shape_block_serial(&x[..nf], f, &mut out[..nf]);
        }
        let c: [[f64; 4]; V] = std::array::from_fn(|v| std::array::from_fn(|i| self.c[4 * v + i]));
        let a1: [[f64; 4]; V] =
            std::array::from_fn(|v| std::array::from_fn(|i| self.a1[4 * v + i]));
        let mut st: [[f64; 4]; V] =
            std::array::from_fn(|v| std::array::from_fn(|i| self.state[4 * v + i]));
        let mut a = [[0.0f64; 4]; V];
        a[0][0] = x[0];
        for (t, &xn) in x[1..depth].iter().enumerate() {
            pipeline_tick::<V, true>(&mut a, &mut st, &c, &a1, xn, 0, t + 1);
        }
        // SAFETY (loads and stores): every pointer is to a local [f64; 4].
        let ld = |p: &[f64; 4]| unsafe { _mm256_loadu_pd(p.as_ptr()) };
        let (c0, c1) = (ld(&c[0]), ld(&c[1]));
        let (k0, k1) = (ld(&a1[0]), ld(&a1[1]));
        let (mut s0, mut s1) = (ld(&st[0]), ld(&st[1]));
        let (mut x0, mut x1) = (ld(&a[0]), ld(&a[1]));
        for t in depth - 1..nf {
            let input = x.get(t + 1).copied().unwrap_or(0.0);
            let y0 = _mm256_add_pd(x0, s0);
            let y1 = _mm256_add_pd(x1, s1);
            s0 = _mm256_sub_pd(_mm256_mul_pd(c0, x0), _mm256_mul_pd(k0, s0));
            s1 = _mm256_sub_pd(_mm256_mul_pd(c1, x1), _mm256_mul_pd(k1, s1));
            // [y[3], y[0], y[1], y[2]]
            let r0 = _mm256_permute4x64_pd::<0b10_01_00_11>(y0);
            let r1 = _mm256_permute4x64_pd::<0b10_01_00_11>(y1);
            x0 = _mm256_blend_pd::<0b0001>(r0, _mm256_set1_pd(input));
            x1 = _mm256_blend_pd::<0b0001>(r1, r0);
            out[t + 1 - depth] = f * _mm256_cvtsd_f64(r1);
        }
        // SAFETY (stores): every pointer is to a local [f64; 4].
        let stv = |p: &mut [f64; 4], v: __m256d| unsafe { _mm256_storeu_pd(p.as_mut_ptr(), v) };
        stv(&mut st[0], s0);
        stv(&mut st[1], s1);
        stv(&mut a[0], x0);
        stv(&mut a[1], x1);
        for t in nf..nf + depth - 1 {
            let y = pipeline_tick::<V, true>(&mut a, &mut st, &c, &a1, 0.0, t + 1 - nf, depth);
            out[t + 1 - depth] = f * y;
        }
        for (dst, src) in self.state.chunks_mut(4).zip(&st) {
            dst.copy_from_slice(src);
        }
    }

    /// The skewed pipeline with `V` groups of four sections (`4 V >= ` the sections in use;
    /// the rest are identity sections, exact: `x + 0 = x`).
    #[inline(always)]
    fn pipelined<const V: usize>(&mut self, x: &[f64], f: f64, out: &mut [f64]) {
        let nf = x.len().min(out.len());
        let depth = 4 * V;
        if nf < 2 * depth || depth > MAX_SECTIONS + 3 {
            return self.shape_block_serial(&x[..nf], f, &mut out[..nf]);
        }
        let lane = |arr: &[f64; MAX_SECTIONS], j: usize| arr.get(j).copied().unwrap_or(0.0);
        let c: [[f64; 4]; V] =
            std::array::from_fn(|v| std::array::from_fn(|i| lane(&self.c, 4 * v + i)));
        let a1: [[f64; 4]; V] =
            std::array::from_fn(|v| std::array::from_fn(|i| lane(&self.a1, 4 * v + i)));
        let mut st: [[f64; 4]; V] =
            std::array::from_fn(|v| std::array::from_fn(|i| lane(&self.state, 4 * v + i)));
        // a[v][i]: the input waiting for section 4 v + i (the output of the section before
        // it, one tick ago)
        let mut a = [[0.0f64; 4]; V];
        // fill: ticks 0 .. depth - 1, sections 0 ..= t active
        a[0][0] = x[0];
        for (t, &xn) in x[1..depth].iter().enumerate() {
            pipeline_tick::<V, true>(&mut a, &mut st, &c, &a1, xn, 0, t + 1);
        }
        // steady state: every section active; the tick at `t` takes `x[t]` into section 0
        // and gives section depth-1's output of sample `t + 1 - depth`
        for t in depth - 1..nf - 1 {
            let y = pipeline_tick::<V, false>(&mut a, &mut st, &c, &a1, x[t + 1], 0, depth);
            out[t + 1 - depth] = f * y;
        }
        let y = pipeline_tick::<V, false>(&mut a, &mut st, &c, &a1, 0.0, 0, depth);
        out[nf - depth] = f * y;
        // drain: sections t - nf + 1 .. depth active
        for t in nf..nf + depth - 1 {
            let y = pipeline_tick::<V, true>(&mut a, &mut st, &c, &a1, 0.0, t + 1 - nf, depth);
            out[t + 1 - depth] = f * y;
        }
        // the lanes past MAX_SECTIONS are identity sections, not kept
        for (dst, src) in self.state.iter_mut().zip(st.iter().flatten()) {
            *dst = *src;
        }
    }

    fn clear(&mut self) {
        self.state = [0.0; MAX_SECTIONS];
    }
}

/// One tick of [`Flicker::pipelined`]: section `4 v + i` takes its waiting input `a[v][i]`;
/// sections outside `lo .. hi` (no sample of theirs this tick) keep their state; then every
/// output moves on to the next section and `input` enters the first. Returns the last
/// section's output.
#[inline(always)]
fn pipeline_tick<const V: usize, const MASK: bool>(
    a: &mut [[f64; 4]; V],
    st: &mut [[f64; 4]; V],
    c: &[[f64; 4]; V],
    a1: &[[f64; 4]; V],
    input: f64,
    lo: usize,
    hi: usize,
) -> f64 {
    let mut y = [[0.0f64; 4]; V];
    for v in 0..V {
        for i in 0..4 {
            y[v][i] = a[v][i] + st[v][i];
            let s = c[v][i] * a[v][i] - a1[v][i] * st[v][i];
            let j = 4 * v + i;
            if !MASK || (j >= lo && j < hi) {
                st[v][i] = s;
            }
        }
    }
    a[0] = [input, y[0][0], y[0][1], y[0][2]];
    for v in 1..V {
        a[v] = [y[v - 1][3], y[v][0], y[v][1], y[v][2]];
    }
    y[V - 1][3]
}

/// Unit-variance white samples from raw 64-bit words, one word each: the sum of the word's
/// four 16-bit fields (Irwin-Hall with four uniforms: zero mean, unit variance after
/// scaling, excess kurtosis -0.3, bounded at 3.46 sigma), branch-free and vectorisable. The
/// engine's white noise uses these at the internal rate (issue 13: one word a sample instead
/// of half a Box-Muller pair); what anyone hears or measures is that noise after the
/// decimation filter, a weighted sum of many samples, which is Gaussian by the central limit
/// theorem (tested on the output in `tests/engine_noise.rs`). The 1/f filter is driven by the
/// same sums (issue 13: the Box-Muller transform was most of the 1/f part's cost): its
/// output in band is a weighted sum of many inputs too, the slower the more, and passes the
/// decimator as well (tested by the kurtosis of an output where the 1/f part dominates).
fn white_samples(words: &[u64], out: &mut [f64]) {
    // each field uniform on 0..=65535: mean 32767.5, variance (65536^2 - 1) / 12
    const MEAN: f64 = 4.0 * 32_767.5;
    let inv_sigma = 1.0 / (4.0 * (65_536.0f64 * 65_536.0 - 1.0) / 12.0).sqrt();
    for (o, &w) in out.iter_mut().zip(words) {
        let s = (w & 0xffff) + ((w >> 16) & 0xffff) + ((w >> 32) & 0xffff) + (w >> 48);
        *o = (s as f64 - MEAN) * inv_sigma;
    }
}

/// One sample of [`white_samples`], bit for bit, in vector-friendly integer steps: the four
/// fields summed pairwise in 32-bit halves, and the sum (below 2^18) turned into a float by
/// its bits (`2^52 + s` has `s` as its mantissa) instead of an integer conversion, which
/// 256-bit vectors lack for 64-bit integers.
#[inline(always)]
fn white_one(w: u64) -> f64 {
    const MEAN: f64 = 4.0 * 32_767.5;
    const TWO52: f64 = 4_503_599_627_370_496.0;
    // 1 / sqrt(4 (65536^2 - 1) / 12), as `white_samples` computes it
    let inv_sigma = 1.0 / (4.0 * (65_536.0f64 * 65_536.0 - 1.0) / 12.0).sqrt();
    const LOW16: u64 = 0x0000_ffff_0000_ffff;
    let pairs = (w & LOW16) + ((w >> 16) & LOW16);
    let s = (pairs & 0xffff_ffff) + (pairs >> 32);
    let x = f64::from_bits(0x4330_0000_0000_0000 | s) - TWO52;
    (x - MEAN) * inv_sigma
}

/// `out[i] += v[i / H]` (each value held `H` samples; the last run may be shorter).
#[inline(always)]
fn spread<const H: usize>(out: &mut [f64], v: &[f64]) {
    let full = v.len().min(out.len() / H);
    let mut runs = out.chunks_exact_mut(H);
    for (run, &x) in (&mut runs).zip(v) {
        for o in run.iter_mut() {
            *o += x;
        }
    }
    let tail = runs.into_remainder();
    if let Some(&x) = v.get(full) {
        for o in tail {
            *o += x;
        }
    }
}

/// `out[i] = ws * white_one(word i)` for `out.len()` a multiple of 4, the words from `rng`.
#[inline(always)]
fn white_portable(rng: &mut Rng4, ws: f64, out: &mut [f64]) {
    // the generator's state in locals (registers) for the loop
    let mut r = *rng;
    for c in out.chunks_exact_mut(4) {
        let w = r.next4();
        for (o, &w) in c.iter_mut().zip(&w) {
            *o = ws * white_one(w);
        }
    }
    *rng = r;
}

/// One step of the four lanes of xoshiro256++ in a 256-bit register each (the arithmetic of
/// [`crate::rng::Rng::next_u64`] lane by lane; rotations as two shifts and an or).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[inline]
fn xoshiro4_avx2(s: &mut [std::arch::x86_64::__m256i; 4]) -> std::arch::x86_64::__m256i {
    use std::arch::x86_64::*;
    let [s0, s1, s2, s3] = *s;
    let sum = _mm256_add_epi64(s0, s3);
    let out = _mm256_add_epi64(
        _mm256_or_si256(_mm256_slli_epi64::<23>(sum), _mm256_srli_epi64::<41>(sum)),
        s0,
    );
    let t = _mm256_slli_epi64::<17>(s1);
    let s2 = _mm256_xor_si256(s2, s0);
    let s3 = _mm256_xor_si256(s3, s1);
    let s1 = _mm256_xor_si256(s1, s2);
    let s0 = _mm256_xor_si256(s0, s3);
    let s2 = _mm256_xor_si256(s2, t);
    let s3 = _mm256_or_si256(_mm256_slli_epi64::<45>(s3), _mm256_srli_epi64::<19>(s3));
    *s = [s0, s1, s2, s3];
    out
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[inline]
fn load_state(rng: &Rng4) -> [std::arch::x86_64::__m256i; 4] {
    use std::arch::x86_64::*;
    let st = rng.state();
    // SAFETY: each pointer is to a [u64; 4] (32 bytes), unaligned loads.
    std::array::from_fn(|k| unsafe { _mm256_loadu_si256(st[k].as_ptr().cast()) })
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[inline]
fn store_state(rng: &mut Rng4, s: &[std::arch::x86_64::__m256i; 4]) {
    use std::arch::x86_64::*;
    let mut st = [[0u64; 4]; 4];
    for k in 0..4 {
        // SAFETY: each pointer is to a [u64; 4] (32 bytes), unaligned stores.
        unsafe { _mm256_storeu_si256(st[k].as_mut_ptr().cast(), s[k]) };
    }
    rng.set_state(st);
}

/// [`white_portable`] in AVX2 registers, bit for bit (the steps of [`white_one`] on four
/// lanes).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn white_avx2(rng: &mut Rng4, ws: f64, out: &mut [f64]) {
    use std::arch::x86_64::*;
    const MEAN: f64 = 4.0 * 32_767.5;
    const TWO52: f64 = 4_503_599_627_370_496.0;
    let inv_sigma = 1.0 / (4.0 * (65_536.0f64 * 65_536.0 - 1.0) / 12.0).sqrt();
    let mut s = load_state(rng);
    let low16 = _mm256_set1_epi64x(0x0000_ffff_0000_ffff);
    let low32 = _mm256_set1_epi64x(0xffff_ffff);
    let exp = _mm256_set1_epi64x(0x4330_0000_0000_0000);
    let (two52, mean) = (_mm256_set1_pd(TWO52), _mm256_set1_pd(MEAN));
    let (inv, wsv) = (_mm256_set1_pd(inv_sigma), _mm256_set1_pd(ws));
    for c in out.chunks_exact_mut(4) {
        let w = xoshiro4_avx2(&mut s);
        let pairs = _mm256_add_epi64(
            _mm256_and_si256(w, low16),
            _mm256_and_si256(_mm256_srli_epi64::<16>(w), low16),
        );
        let sum = _mm256_add_epi64(
            _mm256_and_si256(pairs, low32),
            _mm256_srli_epi64::<32>(pairs),
        );
        let x = _mm256_sub_pd(_mm256_castsi256_pd(_mm256_or_si256(sum, exp)), two52);
        let g = _mm256_mul_pd(_mm256_sub_pd(x, mean), inv);
        // SAFETY: `c` has four elements.
        unsafe { _mm256_storeu_pd(c.as_mut_ptr(), _mm256_mul_pd(wsv, g)) };
    }
    store_state(rng, &s);
}

/// [`Rng4::fill`] in AVX2 registers, bit for bit.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn words_avx2(rng: &mut Rng4, out: &mut [u64]) {
    use std::arch::x86_64::*;
    let mut s = load_state(rng);
    for c in out.chunks_exact_mut(4) {
        let w = xoshiro4_avx2(&mut s);
        // SAFETY: `c` has four elements.
        unsafe { _mm256_storeu_si256(c.as_mut_ptr().cast(), w) };
    }
    store_state(rng, &s);
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
/// removed by the decimator. Each internal sample costs one random word for the white part,
/// plus one word and a step of the 1/f filter per `hold` samples. Scratch is sized for blocks of `block` samples
/// at construction; [`NoiseStream::fill`] does not allocate.
#[derive(Debug, Clone)]
pub struct NoiseStream {
    seed: u64,
    rng: Rng4,
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
        let n = (block + nf).next_multiple_of(4);
        NoiseStream {
            seed,
            rng: Rng4::new(seed),
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
        self.rng = Rng4::new(self.seed);
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
        let (first, nf) = self.flicker_count(n);
        let m = n + nf;
        // White part: words drawn four at a time (one per generator lane) and turned into
        // samples on the spot (the same arithmetic as `white_samples`, see `white_one`).
        let n4 = n - n % 4;
        let m4 = m.next_multiple_of(4);
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU supports AVX2 (checked just above).
                unsafe {
                    white_avx2(&mut self.rng, ws, &mut out[..n4]);
                    words_avx2(&mut self.rng, &mut self.words[n4..m4]);
                }
            } else {
                white_portable(&mut self.rng, ws, &mut out[..n4]);
                self.rng.fill(&mut self.words[n4..m4]);
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            white_portable(&mut self.rng, ws, &mut out[..n4]);
            self.rng.fill(&mut self.words[n4..m4]);
        }
        // The rest of the words, in the order the plain version draws them.
        for (o, &w) in out[n4..].iter_mut().zip(&self.words[n4..n]) {
            *o = ws * white_one(w);
        }
        if let Some(f) = &mut self.flicker {
            for (g, &w) in self.gauss[..nf].iter_mut().zip(&self.words[n..m]) {
                *g = white_one(w);
            }
            f.shape_block(&self.gauss[..nf], fs, &mut self.fbuf[..nf]);
            // each new 1/f value held `hold` samples, without a branch per sample (the
            // common holds with a fixed run length)
            let head = first.min(n);
            for o in &mut out[..head] {
                *o += self.held;
            }
            let fb = &self.fbuf[..nf];
            let rest = &mut out[head..];
            match self.hold {
                2 => spread::<2>(rest, fb),
                3 => spread::<3>(rest, fb),
                4 => spread::<4>(rest, fb),
                6 => spread::<6>(rest, fb),
                h => {
                    for (run, &v) in rest.chunks_mut(h).zip(fb) {
                        for o in run {
                            *o += v;
                        }
                    }
                }
            }
            if let Some(&v) = fb.last() {
                self.held = v;
            }
            self.phase = (self.phase + n) % self.hold;
        }
    }

    /// Position of the first new 1/f sample in a chunk of `n` samples (where the hold's
    /// phase is 0) and how many new 1/f samples the chunk takes.
    #[inline(always)]
    fn flicker_count(&self, n: usize) -> (usize, usize) {
        let first = (self.hold - self.phase) % self.hold;
        let nf = match &self.flicker {
            Some(_) if n > first => (n - first).div_ceil(self.hold),
            _ => 0,
        };
        (first, nf)
    }

    /// The plain reference of [`NoiseStream::fill`]: every word drawn into a buffer first,
    /// white samples by [`white_samples`], the serial 1/f cascade, the hold sample by sample.
    /// Same samples as [`NoiseStream::fill`], bit for bit (tested).
    pub fn fill_reference(&mut self, out: &mut [f64]) {
        for part in out.chunks_mut(self.block) {
            let ws = self.white_sigma;
            let fs = self.flicker_sigma;
            let n = part.len();
            let (_, nf) = self.flicker_count(n);
            let m = n + nf;
            self.rng.fill(&mut self.words[..m.next_multiple_of(4)]);
            white_samples(&self.words[..m], &mut self.gauss[..m]);
            for (o, g) in part.iter_mut().zip(&self.gauss[..n]) {
                *o = ws * g;
            }
            if let Some(f) = &mut self.flicker {
                f.shape_block_serial(&self.gauss[n..m], fs, &mut self.fbuf[..nf]);
                let (hold, mut phase, mut held) = (self.hold, self.phase, self.held);
                let mut j = 0;
                for o in part.iter_mut() {
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
    fn pipelined_flicker_matches_the_serial_cascade_bit_for_bit() {
        // The lockstep cascade against the plain one-sample-at-a-time reference, over many
        // blocks (state carried across them), short blocks (serial fallback) included, at
        // rates giving 8 and 9 sections.
        for rate in [64e3, 96e3, 120e3, 400e3] {
            let mut fast = Flicker::new(rate);
            let mut plain = fast.clone();
            let mut rng = Rng::new(5);
            for (k, len) in [171usize, 3, 40, 171, 16, 17, 500, 1, 171]
                .into_iter()
                .enumerate()
            {
                let x: Vec<f64> = (0..len).map(|_| rng.uniform() - 0.5).collect();
                let (mut a, mut b) = (vec![0.0; len], vec![0.0; len]);
                fast.shape_block(&x, 0.7, &mut a);
                plain.shape_block_serial(&x, 0.7, &mut b);
                assert_eq!(
                    a,
                    b,
                    "rate {rate}, block {k} ({} sections)",
                    fast.sections()
                );
            }
        }
    }

    #[test]
    fn noise_stream_matches_its_plain_reference_bit_for_bit() {
        // fill (lockstep words, fused white samples, pipelined cascade, branch-free hold)
        // against fill_reference (buffered words, white_samples, serial cascade, hold
        // sample by sample), with and without 1/f, holds 1 to 4, odd chunk sizes.
        for (flicker, hold) in [
            (0.0, 1),
            (20e-9, 1),
            (20e-9, 2),
            (20e-9, 3),
            (20e-9, 4),
            (20e-9, 5),
            (20e-9, 6),
        ] {
            let mut a = NoiseStream::with_hold(7e-9, flicker, 192e3, 9, 512, hold);
            let mut b = a.clone();
            for len in [512usize, 512, 13, 1, 2, 700, 511, 3, 64] {
                let (mut x, mut y) = (vec![0.0; len], vec![0.0; len]);
                a.fill(&mut x);
                b.fill_reference(&mut y);
                assert_eq!(x, y, "flicker {flicker}, hold {hold}, len {len}");
            }
        }
        // the portable white loop (used without AVX2) against the plain steps
        let (mut r1, mut r2) = (Rng4::new(8), Rng4::new(8));
        let mut fast = vec![0.0; 400];
        white_portable(&mut r1, 0.3, &mut fast);
        let mut words = vec![0u64; 400];
        r2.fill(&mut words);
        let mut plain = vec![0.0; 400];
        white_samples(&words, &mut plain);
        for (a, b) in fast.iter().zip(&plain) {
            assert_eq!(*a, 0.3 * b);
        }
        // white_one is white_samples, sample by sample
        let mut r = Rng::new(3);
        let words: Vec<u64> = (0..10_000)
            .map(|_| r.next_u64())
            .chain([0, u64::MAX])
            .collect();
        let mut w = vec![0.0; words.len()];
        white_samples(&words, &mut w);
        for (&x, &y) in words.iter().zip(&w) {
            assert_eq!(white_one(x), y);
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
