//! Linear-phase half-band FIR filters (Kaiser window), polyphase decimators and interpolators.
//!
//! Each factor-of-two stage is a type-I half-band filter: centre tap 1/2, every other tap zero,
//! so a decimator spends one multiply per *pair* of non-zero taps. The stage nearest the base
//! rate is the tight one (passband to [`PASS_EDGE`] times the base rate, stopband from
//! `1 - PASS_EDGE`); stages at higher rates only have to protect that band and are short.

/// Passband edge as a fraction of the base rate: 20 kHz at 48 kHz.
pub const PASS_EDGE: f64 = 20_000.0 / 48_000.0;
/// Largest design attenuation tried for the window, dB.
pub const STOP_DB: f64 = 112.0;

/// Modified Bessel function of the first kind, order 0 (power series).
fn bessel_i0(x: f64) -> f64 {
    let mut sum = 1.0;
    let mut term = 1.0;
    let q = x * x / 4.0;
    for k in 1..200 {
        term *= q / (k as f64 * k as f64);
        sum += term;
        if term < sum * 1e-18 {
            break;
        }
    }
    sum
}

/// Kaiser-window half-band design with `j` non-zero odd taps per side and window parameter
/// `beta`. Returns the odd taps `h[1], h[3], ...` (one side; h[0] = 1/2).
fn kaiser(j: usize, beta: f64) -> Vec<f64> {
    let m = (2 * j - 1) as f64;
    let i0b = bessel_i0(beta);
    let mut taps: Vec<f64> = (0..j)
        .map(|i| {
            let n = (2 * i + 1) as f64;
            let sinc = (std::f64::consts::FRAC_PI_2 * n).sin() / (std::f64::consts::PI * n);
            let r = n / (m + 1.0);
            let w = bessel_i0(beta * (1.0 - r * r).max(0.0).sqrt()) / i0b;
            sinc * w
        })
        .collect();
    // Exact unit gain at DC: the odd taps (both sides) must sum to 1/2.
    let s: f64 = 2.0 * taps.iter().sum::<f64>();
    for t in &mut taps {
        *t *= 0.5 / s;
    }
    taps
}

/// Whether a stage meets the specification: passband (0 .. 0.5 - delta ... ) within
/// [`PASS_DB`], stopband below -[`MIN_STOP_DB`], checked on a dense grid.
fn meets(taps: &[f64], delta: f64) -> bool {
    let fp = 0.25 - 0.5 * delta;
    let fs = 0.25 + 0.5 * delta;
    let n = 600;
    (0..=n).all(|i| {
        let f = fp * i as f64 / n as f64;
        (20.0 * response(taps, f).log10()).abs() < PASS_DB
    }) && (0..=n).all(|i| {
        let f = fs + (0.5 - fs) * i as f64 / n as f64;
        20.0 * response(taps, f).log10() < -MIN_STOP_DB
    })
}

/// Passband flatness every stage must meet, dB.
pub const PASS_DB: f64 = 0.0009;
/// Stopband attenuation every stage must meet, dB.
pub const MIN_STOP_DB: f64 = 100.5;

/// Design one half-band stage for a transition band of width `delta` (fraction of the stage's
/// input rate): the shortest Kaiser-window design (over a few window parameters) that meets
/// the specification on a dense grid. Returns the non-zero odd taps `h[1], h[3], ...` (one
/// side; the filter is symmetric and `h[0] = 1/2`).
pub fn design(delta: f64) -> Vec<f64> {
    let mut best: Option<Vec<f64>> = None;
    for a in [102.0, 104.0, 106.0, 108.0, 110.0, STOP_DB] {
        let beta = 0.1102 * (a - 8.7);
        // Kaiser's length estimate (Oppenheim & Schafer), then search upward from a bit below.
        let n_est = (a - 7.95) / (2.285 * 2.0 * std::f64::consts::PI * delta) + 1.0;
        let j0 = (((n_est + 1.0) / 4.0).ceil() as usize)
            .saturating_sub(3)
            .max(2);
        let limit = best.as_ref().map_or(j0 + 40, |b| b.len());
        for j in j0..limit {
            let t = kaiser(j, beta);
            if meets(&t, delta) {
                best = Some(t);
                break;
            }
        }
    }
    best.unwrap_or_else(|| kaiser(64, 0.1102 * (STOP_DB - 8.7)))
}

/// Frequency response magnitude of a half-band stage at `f` (fraction of its input rate).
pub fn response(taps: &[f64], f: f64) -> f64 {
    let w = 2.0 * std::f64::consts::PI * f;
    let mut h = 0.5;
    for (i, t) in taps.iter().enumerate() {
        h += 2.0 * t * (w * (2 * i + 1) as f64).cos();
    }
    h.abs()
}

/// Transition width of the stage whose input rate is `2^level` times the base rate.
pub fn stage_delta(level: u32) -> f64 {
    0.5 - 2.0 * PASS_EDGE / f64::powi(2.0, level as i32)
}

/// Taps for every stage of an oversampling chain of factor `k` (a power of two), ordered from
/// the internal rate down to the base rate.
pub fn chain(k: usize) -> Vec<Vec<f64>> {
    let levels = k.trailing_zeros();
    (0..levels).rev().map(|l| stage_taps(l + 1)).collect()
}

/// The design of the stage at `level` ([`design`] of [`stage_delta`]), made once per process
/// and level: the search evaluates the response on a dense grid, which costs about as much
/// as a second of audio through the engine, and a render builds several chains (the signal,
/// the idle channel, the alias estimate).
fn stage_taps(level: u32) -> Vec<f64> {
    use std::sync::OnceLock;
    const CACHED: usize = 16;
    static TAPS: [OnceLock<Vec<f64>>; CACHED] = [const { OnceLock::new() }; CACHED];
    match TAPS.get(level as usize) {
        Some(cell) => cell.get_or_init(|| design(stage_delta(level))).clone(),
        None => design(stage_delta(level)),
    }
}

/// One decimate-by-two stage with its history, kept as even and odd phases so every tap is
/// one vectorisable pass over the block.
#[derive(Debug, Clone)]
struct DownStage {
    taps: Vec<f64>,
    m: usize,
    even: Vec<f64>,
    odd: Vec<f64>,
}

impl DownStage {
    fn new(taps: Vec<f64>, max_in: usize) -> DownStage {
        let m = 2 * taps.len() - 1;
        DownStage {
            taps,
            m,
            even: vec![0.0; m + max_in / 2],
            odd: vec![0.0; m + max_in / 2],
        }
    }

    #[inline(always)]
    fn process(&mut self, input: &[f64], gain: f64, out: &mut [f64]) {
        // Full-buffer view: buf[2m + i] = input[i]; even[r] = buf[2r], odd[r] = buf[2r + 1].
        // Output j has its centre at buf[2j + m] (odd, m is odd) = odd[j + (m - 1) / 2] and
        // the tap at distance d = 2i + 1 reads even[j + (m -/+ d) / 2].
        let m = self.m;
        let half = input.len() / 2;
        for ((e, o), pair) in self.even[m..m + half]
            .iter_mut()
            .zip(&mut self.odd[m..m + half])
            .zip(input.chunks_exact(2))
        {
            *e = gain * pair[0];
            *o = gain * pair[1];
        }
        let c0 = (m - 1) / 2;
        let (even, odd) = (&self.even, &self.odd);
        // Sixteen outputs at a time, accumulated in registers over all taps (four
        // vectors: the adds of one tap overlap those of the next).
        const W: usize = 16;
        let mut j = 0;
        while j + W <= half {
            let mut acc = [0.0; W];
            for (a, x) in acc.iter_mut().zip(&odd[c0 + j..c0 + j + W]) {
                *a = 0.5 * x;
            }
            for (i, &h) in self.taps.iter().enumerate() {
                let d = 2 * i + 1;
                let lo = &even[(m - d) / 2 + j..(m - d) / 2 + j + W];
                let hi = &even[(m + d) / 2 + j..(m + d) / 2 + j + W];
                for ((a, x), y) in acc.iter_mut().zip(lo).zip(hi) {
                    *a += h * (x + y);
                }
            }
            out[j..j + W].copy_from_slice(&acc);
            j += W;
        }
        for (jj, o) in out.iter_mut().enumerate().take(half).skip(j) {
            let mut a = 0.5 * odd[c0 + jj];
            for (i, &h) in self.taps.iter().enumerate() {
                let d = 2 * i + 1;
                a += h * (even[(m - d) / 2 + jj] + even[(m + d) / 2 + jj]);
            }
            *o = a;
        }
        self.even.copy_within(half..half + m, 0);
        self.odd.copy_within(half..half + m, 0);
    }

    fn fill(&mut self, v: f64) {
        self.even.fill(v);
        self.odd.fill(v);
    }
}

/// Decimator from `k` times the base rate to the base rate (cascade of half-band stages).
#[derive(Debug, Clone)]
pub struct Decimator {
    stages: Vec<DownStage>,
    scratch: Vec<Vec<f64>>,
    delay: usize,
}

impl Decimator {
    /// Build for factor `k` (1, 2, 4, 8 or 16) and input blocks of at most `max_in` samples
    /// (a multiple of `k`).
    pub fn new(k: usize, max_in: usize) -> Decimator {
        let taps = chain(k);
        let mut stages = Vec::new();
        let mut scratch = Vec::new();
        let mut delay = 0;
        let mut len = max_in;
        let mut step = 1;
        for t in taps {
            let m = 2 * t.len() - 1;
            delay += m * step;
            step *= 2;
            stages.push(DownStage::new(t, len));
            len /= 2;
            scratch.push(vec![0.0; len]);
        }
        Decimator {
            stages,
            scratch,
            delay,
        }
    }

    /// Group delay in input (internal-rate) samples: output `m` is input time `k m - delay`.
    pub fn delay(&self) -> usize {
        self.delay
    }

    /// Fill every history with a constant (the signal's rest value).
    pub fn reset(&mut self, rest: f64) {
        for s in &mut self.stages {
            s.fill(rest);
        }
    }

    /// Decimate `input` (length a multiple of k) into `out` (length input / k).
    #[inline(always)]
    pub fn process(&mut self, input: &[f64], out: &mut [f64]) {
        self.process_scaled(input, 1.0, out);
    }

    /// Decimate `gain * input` (the gain applied on the way in, no extra pass).
    #[inline(always)]
    pub fn process_scaled(&mut self, input: &[f64], gain: f64, out: &mut [f64]) {
        let ns = self.stages.len();
        if ns == 0 {
            for (o, x) in out.iter_mut().zip(input) {
                *o = gain * x;
            }
            return;
        }
        let mut len = input.len();
        for i in 0..ns {
            let (done, rest) = self.scratch.split_at_mut(i);
            let (src, g): (&[f64], f64) = if i == 0 {
                (input, gain)
            } else {
                (&done[i - 1][..len], 1.0)
            };
            let dst = &mut rest[0][..len / 2];
            self.stages[i].process(src, g, dst);
            len /= 2;
        }
        out[..len].copy_from_slice(&self.scratch[ns - 1][..len]);
    }
}

/// One interpolate-by-two stage with its history.
#[derive(Debug, Clone)]
struct UpStage {
    taps: Vec<f64>,
    hist: usize,
    buf: Vec<f64>,
}

impl UpStage {
    fn process(&mut self, input: &[f64], out: &mut [f64]) {
        let h = self.hist;
        let jn = self.taps.len();
        let n = input.len();
        self.buf[h..h + n].copy_from_slice(input);
        let buf = &self.buf;
        for j in 0..n {
            let b = h + j; // buffer index of x[j]
            let mut acc = 0.0;
            for (i, t) in self.taps.iter().enumerate() {
                acc += t * (buf[b - jn - i] + buf[b - jn + i + 1]);
            }
            out[2 * j] = 2.0 * acc;
            out[2 * j + 1] = buf[b + 1 - jn];
        }
        self.buf.copy_within(n..n + h, 0);
    }
}

/// Interpolator from the base rate to `k` times the base rate, for inputs that arrive at the
/// base rate (WAV files). Output sample `i` is base-rate input time `(i - delay) / k`.
#[derive(Debug, Clone)]
pub struct Upsampler {
    stages: Vec<UpStage>,
    scratch: Vec<Vec<f64>>,
    delay: usize,
    k: usize,
}

impl Upsampler {
    /// Build for factor `k` (1, 2, 4, 8 or 16) and input blocks of at most `max_in` samples.
    pub fn new(k: usize, max_in: usize) -> Upsampler {
        let mut taps = chain(k);
        taps.reverse(); // base rate first
        let mut stages = Vec::new();
        let mut scratch = Vec::new();
        let mut len = max_in;
        let mut delay_base = 0.0; // in base-rate samples
        let mut scale = 2.0;
        for t in taps {
            let hist = 2 * t.len() - 1;
            delay_base += hist as f64 / scale;
            scale *= 2.0;
            stages.push(UpStage {
                taps: t,
                hist,
                buf: vec![0.0; hist + len],
            });
            len *= 2;
            scratch.push(vec![0.0; len]);
        }
        Upsampler {
            stages,
            scratch,
            delay: (delay_base * k as f64).round() as usize,
            k,
        }
    }

    /// Group delay in output (internal-rate) samples.
    pub fn delay(&self) -> usize {
        self.delay
    }

    /// Oversampling factor.
    pub fn factor(&self) -> usize {
        self.k
    }

    /// Fill every history with a constant.
    pub fn reset(&mut self, rest: f64) {
        for s in &mut self.stages {
            s.buf.fill(rest);
        }
    }

    /// Interpolate `input` into `out` (length `k * input.len()`).
    pub fn process(&mut self, input: &[f64], out: &mut [f64]) {
        let ns = self.stages.len();
        if ns == 0 {
            out[..input.len()].copy_from_slice(input);
            return;
        }
        let mut len = input.len();
        for i in 0..ns {
            let (done, rest) = self.scratch.split_at_mut(i);
            let src: &[f64] = if i == 0 { input } else { &done[i - 1][..len] };
            let dst = &mut rest[0][..2 * len];
            self.stages[i].process(src, dst);
            len *= 2;
        }
        out[..len].copy_from_slice(&self.scratch[ns - 1][..len]);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Specification of the decimation chain (railsong design): >= 100 dB stopband, passband flat
    // within 0.001 dB up to 20 kHz at 48 kHz; checked on the designed taps by direct evaluation
    // of the frequency response (a plain cosine sum, no FFT).
    #[test]
    fn every_stage_meets_the_specification() {
        for level in 1..=4u32 {
            let d = stage_delta(level);
            let taps = design(d);
            let fp = PASS_EDGE / f64::powi(2.0, level as i32);
            let fs = 0.5 - fp;
            for i in 0..=400 {
                let f = fp * i as f64 / 400.0;
                let db = 20.0 * response(&taps, f).log10();
                assert!(db.abs() < 0.001, "level {level} f {f} {db} dB");
            }
            for i in 0..=400 {
                let f = fs + (0.5 - fs) * i as f64 / 400.0;
                let db = 20.0 * response(&taps, f).log10();
                assert!(db < -100.0, "level {level} f {f} {db} dB");
            }
        }
    }

    // The whole chain (all stages in cascade, each seen at its own rate) stays within
    // 0.001 dB up to 20 kHz at 48 kHz [railsong design specification].
    #[test]
    fn chain_passband_is_flat() {
        for k in [2usize, 4, 8, 16] {
            let taps = chain(k);
            let levels = taps.len();
            for i in 0..=400 {
                let f = PASS_EDGE * i as f64 / 400.0; // fraction of the base rate
                let mut g = 1.0;
                for (n, t) in taps.iter().enumerate() {
                    // taps[0] runs at the internal rate k, the last one at 2x the base rate
                    let level = (levels - n) as i32;
                    g *= response(t, f / f64::powi(2.0, level));
                }
                let db = 20.0 * g.log10();
                assert!(db.abs() < 0.001, "K {k} f {f}: {db} dB");
            }
        }
    }
}
