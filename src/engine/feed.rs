//! Source feeds: the signal generators that fill the internal-rate source buffers.

use super::plan::{SourcePlan, SourceWave};
use crate::model::Envelope;

/// Something that produces a source's samples at the internal (oversampled) rate.
///
/// The first sample a feed produces after construction or [`SourceFeed::reset`] is at time
/// `-Plan::preroll / Plan::internal_rate` (a short pre-roll before t = 0 that absorbs the
/// decimator's and stages' latency); consecutive samples are `1 / internal_rate` apart.
pub trait SourceFeed: Send {
    /// Fill `out` with the next samples.
    fn fill(&mut self, out: &mut [f64]);
    /// Go back to the first sample.
    fn reset(&mut self);
}

/// Lanes of the interleaved rotation (independent chains, so the loop vectorises).
const LANES: usize = 8;

/// One sinusoid with an exact integer phase accumulator (turns in units of 2^-64).
#[derive(Debug, Clone)]
struct Osc {
    amp: f64,
    inc: u64,
    acc0: u64,
    acc: u64,
    /// cos / sin of j steps, j = 0..LANES (lane offsets)
    lane_c: [f64; LANES],
    lane_s: [f64; LANES],
    /// cos / sin of j - LANES steps (the lanes' previous values)
    prev_c: [f64; LANES],
    prev_s: [f64; LANES],
    /// 2 cos of LANES steps (second-order recurrence)
    two_cos: f64,
}

impl Osc {
    /// Lane values at the current accumulator: lane j holds `amp sin(theta + j w)` and its
    /// previous value `amp sin(theta + (j - LANES) w)`; each lane then advances by LANES steps
    /// with the second-order recurrence `s[n+1] = 2 cos(LANES w) s[n] - s[n-1]`.
    #[inline(always)]
    fn lanes(&self) -> ([f64; LANES], [f64; LANES]) {
        let (s0, c0) = fixed_to_angle(self.acc).sin_cos();
        let mut cur = [0.0; LANES];
        let mut prev = [0.0; LANES];
        for j in 0..LANES {
            cur[j] = self.amp * (s0 * self.lane_c[j] + c0 * self.lane_s[j]);
            prev[j] = self.amp * (s0 * self.prev_c[j] + c0 * self.prev_s[j]);
        }
        (cur, prev)
    }

    #[inline(always)]
    fn advance(&mut self, len: usize) {
        self.acc = self.acc.wrapping_add(self.inc.wrapping_mul(len as u64));
    }
}

fn turns_to_fixed(t: f64) -> u64 {
    let f = t - t.floor();
    // 2^64 * f, exact for f with at most 53 significant bits
    let v = f * 18_446_744_073_709_551_616.0;
    if v >= 18_446_744_073_709_551_616.0 {
        0
    } else {
        v as u64
    }
}

fn fixed_to_angle(a: u64) -> f64 {
    ((a >> 11) as f64) * (1.0 / 9_007_199_254_740_992.0) * std::f64::consts::TAU
}

/// Built-in generator for [`crate::model::Wave::Sine`], [`crate::model::Wave::Multitone`] and
/// [`crate::model::Wave::Dc`], with offset, start, stop and envelope.
///
/// Each tone's phase is an exact integer accumulator; within a fill the samples come from
/// eight interleaved second-order (Chebyshev) recurrences re-anchored to the accumulator at the start of every call, so the error
/// never accumulates beyond one block (about 1e-13 relative).
#[derive(Debug, Clone)]
pub struct ToneFeed {
    oscs: Vec<Osc>,
    dc: f64,
    rest: f64,
    n0: i64,
    n: i64,
    n_start: i64,
    n_stop: i64,
    fs: f64,
    start: f64,
    envelope: Option<Envelope>,
}

impl ToneFeed {
    /// Build the generator for one planned source; `fs` is the internal rate and `preroll`
    /// the number of samples before t = 0.
    pub fn new(src: &SourcePlan, fs: f64, preroll: usize) -> ToneFeed {
        let n0 = -(preroll as i64);
        let (tones, level): (Vec<(f64, f64, f64)>, f64) = match &src.wave {
            SourceWave::Tones { tones } => (tones.clone(), 0.0),
            SourceWave::Dc { level } => (Vec::new(), *level),
        };
        let oscs = tones
            .iter()
            .map(|&(freq, amp, phase)| {
                let inc = turns_to_fixed(freq / fs);
                let acc0 = turns_to_fixed(phase / std::f64::consts::TAU)
                    .wrapping_add(inc.wrapping_mul(n0 as u64));
                let mut lane_c = [0.0; LANES];
                let mut lane_s = [0.0; LANES];
                let mut prev_c = [0.0; LANES];
                let mut prev_s = [0.0; LANES];
                for j in 0..LANES {
                    let th = fixed_to_angle(inc.wrapping_mul(j as u64));
                    lane_c[j] = th.cos();
                    lane_s[j] = th.sin();
                    let th = fixed_to_angle(
                        inc.wrapping_mul(j as u64)
                            .wrapping_sub(inc.wrapping_mul(LANES as u64)),
                    );
                    prev_c[j] = th.cos();
                    prev_s[j] = th.sin();
                }
                let th = fixed_to_angle(inc.wrapping_mul(LANES as u64));
                Osc {
                    amp,
                    inc,
                    acc0,
                    acc: acc0,
                    lane_c,
                    lane_s,
                    prev_c,
                    prev_s,
                    two_cos: 2.0 * th.cos(),
                }
            })
            .collect();
        let n_start = (src.start * fs - 1e-6).ceil() as i64;
        let n_stop = match src.stop {
            Some(t) => (t * fs - 1e-6).ceil() as i64,
            None => i64::MAX,
        };
        ToneFeed {
            oscs,
            dc: level + src.offset,
            rest: src.rest,
            n0,
            n: n0,
            n_start,
            n_stop,
            fs,
            start: src.start,
            envelope: src.envelope,
        }
    }
}

impl ToneFeed {
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn fill_avx2(&mut self, out: &mut [f64]) {
        self.fill_impl(out);
    }

    #[inline(always)]
    fn fill_impl(&mut self, out: &mut [f64]) {
        let len = out.len();
        out.fill(self.dc);
        // Tones two at a time (one pass over the block per pair).
        let mut pairs = self.oscs.chunks_exact_mut(2);
        for pr in &mut pairs {
            let (a, b) = pr.split_at_mut(1);
            let (ca, pa) = a[0].lanes();
            let (cb, pb) = b[0].lanes();
            let (mut ca, mut pa, mut cb, mut pb) = (ca, pa, cb, pb);
            let (ta, tb) = (a[0].two_cos, b[0].two_cos);
            let mut chunks = out.chunks_exact_mut(LANES);
            for ch in &mut chunks {
                for j in 0..LANES {
                    ch[j] += ca[j] + cb[j];
                    let na = ta * ca[j] - pa[j];
                    let nb = tb * cb[j] - pb[j];
                    pa[j] = ca[j];
                    ca[j] = na;
                    pb[j] = cb[j];
                    cb[j] = nb;
                }
            }
            for ((v, x), y) in chunks.into_remainder().iter_mut().zip(&ca).zip(&cb) {
                *v += x + y;
            }
            a[0].advance(len);
            b[0].advance(len);
        }
        for o in pairs.into_remainder() {
            let (mut cur, mut prev) = o.lanes();
            let tc = o.two_cos;
            let mut chunks = out.chunks_exact_mut(LANES);
            for ch in &mut chunks {
                for j in 0..LANES {
                    ch[j] += cur[j];
                    let nx = tc * cur[j] - prev[j];
                    prev[j] = cur[j];
                    cur[j] = nx;
                }
            }
            for (v, sj) in chunks.into_remainder().iter_mut().zip(cur.iter()) {
                *v += sj;
            }
            o.advance(len);
        }
        let first = self.n;
        let last = self.n + len as i64; // exclusive
        if first < self.n_start || last > self.n_stop || self.envelope.is_some() {
            for (i, v) in out.iter_mut().enumerate() {
                let n = first + i as i64;
                if n >= self.n_start && n < self.n_stop {
                    if let Some(env) = &self.envelope {
                        let t = (n - self.n_start) as f64 / self.fs;
                        *v *= envelope_gain(env, t);
                    }
                } else if n < self.n_start && self.start <= 0.0 {
                    *v = self.rest;
                } else {
                    *v = 0.0;
                }
            }
        }
        self.n = last;
    }
}

impl SourceFeed for ToneFeed {
    fn fill(&mut self, out: &mut [f64]) {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU supports AVX2 (checked just above).
                unsafe { self.fill_avx2(out) };
                return;
            }
        }
        self.fill_impl(out);
    }

    fn reset(&mut self) {
        self.n = self.n0;
        for o in &mut self.oscs {
            o.acc = o.acc0;
        }
    }
}

/// Envelope gain `t` seconds after the source's start.
fn envelope_gain(env: &Envelope, t: f64) -> f64 {
    let t = match env.every {
        Some(p) if p > 0.0 => t % p,
        _ => t,
    };
    if t < env.attack {
        t / env.attack
    } else if env.decay > 0.0 {
        (-(t - env.attack) / env.decay).exp()
    } else {
        0.0
    }
}
