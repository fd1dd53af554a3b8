//! Band-limited diode knees at a network's output: antiderivative anti-aliasing of the
//! junctions' part of the output, where the output node belongs to a diode group on its
//! table (no op-amp, one varying input, no noise: a clipper or limiter after a buffer,
//! `circuit::diode::DiodeTable`).
//!
//! Such a group's junction currents are a function of one coordinate `s` (the table's: the
//! input, moved a little by the junction capacitances' state) plus a small first-order term
//! off the table's line, and the output is a linear map of the input, the state and the
//! currents: `y = L(x, z) + sum_q g_q c_q`. The currents' part along the line, `r(s) =
//! sum_q g_q c_q(s)`, bends sharply at the knees, and its harmonics past the internal
//! Nyquist frequency fold back into the audio band. Here `r` at sample `n` is replaced by
//! its mean over the path of `s` from half a sample before to half a sample after
//! (first-order antiderivative anti-aliasing):
//!
//! `r~(n) = (R(m+) - R(m-)) / (m+ - m-)`, with `R` the antiderivative of `r` (exact for the
//! table's interpolant: [`crate::circuit::diode::DiodeTable::integral`]) and `m-`, `m+` the
//! coordinate at `n - 1/2` and `n + 1/2` (the cubic through the four samples around each:
//! `(-s[k-1] + 9 s[k] + 9 s[k+1] - s[k+2]) / 16`), so the mean is centred on `n`: no delay
//! to compensate; the linear part and the term off the line are left as the engine solved
//! them.
//!
//! The mean is a one-sample boxcar on the currents' part (in band: -0.16 dB at 20 kHz at
//! 192 kHz; its first null at the internal rate, where the components that fold to DC
//! lie). A sample is corrected only when its window (the five samples it reads) holds a
//! sample whose step found a junction past its "off" threshold (the linear fast path's own
//! check) and every sample of the window was read from the table: an output that never
//! reaches a knee is untouched, sample for sample. The correction needs two samples after
//! `n`; the network output is [`crate::engine::shaper::LOOKAHEAD`] samples late, so they
//! are there.

use crate::circuit::diode::{madd, seg_line, DiodeTable, MAX_J, SEG_HEAD};

/// Records before the block the correction reads (`n - 2` for the block's first pending
/// sample, `n = -2`).
pub const HIST: usize = 4;

/// Below this width of the input's path over one sample, V, the mean is the currents' part
/// at its midpoint (the antiderivative's difference would lose its digits).
const MIN_SPAN: f64 = 1e-5;

/// What the table's block loop records per sample for the correction ([`KneeAa::apply`]):
/// [`REC`] values, the table's coordinate `s`, a flag, and the currents' part of the output
/// the step took along the table's line (`r(s)`; 0 for a linear step, whose currents are 0).
pub mod tap {
    /// The step was linear: every junction below its "off" threshold.
    pub const OFF: f64 = 0.0;
    /// A junction conducted and the currents came from the table.
    pub const ON: f64 = 1.0;
    /// Not from the table (its Newton step, or the block left the table's loop).
    pub const OTHER: f64 = 2.0;
}

/// Values per sample of the record.
pub const REC: usize = 3;

/// Where the table's block loop records each sample, and the output's part per junction
/// current (to take `r(s)` while the sub-interval is at hand).
#[derive(Debug)]
pub struct Tap<'a> {
    /// [`REC`] values per sample of the block.
    pub rec: &'a mut [f64],
    /// The output's part per junction current, V/A.
    pub g: [f64; MAX_J],
}

/// The compiled correction of one network's output.
#[derive(Debug, Clone, PartialEq)]
pub struct KneeAa {
    /// The diode group (its kernel's table is read).
    pub group: usize,
    /// Junctions.
    pub nj: usize,
    /// The output's part per junction current, V/A.
    pub g: [f64; MAX_J],
    /// `R` per sub-interval of the table ([`RSTRIDE`] values: its start, `1 / width`, `R`
    /// at its start and the quartic in the local `t` that adds the rest: the junctions'
    /// cubics integrated and weighted by `g`): one cache line per lookup.
    pub rtab: Vec<f64>,
}

/// Values per sub-interval of [`KneeAa::rtab`] (seven used).
pub const RSTRIDE: usize = 8;

impl KneeAa {
    /// The correction for output weights `g` (per junction current) of a group whose table
    /// is `tab` with `nj` junctions.
    pub fn new(group: usize, nj: usize, g: [f64; MAX_J], tab: &DiodeTable) -> KneeAa {
        let mut rtab = Vec::with_capacity(tab.seg.len() / tab.stride * RSTRIDE);
        let mut run = 0.0;
        for sg in tab.seg.chunks_exact(tab.stride) {
            // the quartic's coefficients of t .. t^4, weighted by g
            let width = 1.0 / sg[1];
            let mut a = [0.0; 4];
            for q in 0..nj {
                let p = &sg[SEG_HEAD + 4 * q..SEG_HEAD + 4 * q + 4];
                for (k, x) in a.iter_mut().enumerate() {
                    *x += g[q] * width * p[k] / (k + 1) as f64;
                }
            }
            rtab.extend_from_slice(&[sg[0], sg[1], run, a[0], a[1], a[2], a[3], 0.0]);
            run += a.iter().sum::<f64>();
        }
        KneeAa { group, nj, g, rtab }
    }

    /// `R(s)`: the antiderivative of the currents' part; `None` outside the table.
    #[inline(always)]
    pub fn big_r(&self, tab: &DiodeTable, s: f64) -> Option<f64> {
        self.big_r_with::<false>(tab, s)
    }

    /// [`KneeAa::big_r`], its quartic with fused multiply-adds when `F` (only where the
    /// code is compiled for a CPU that has them: [`KneeAa::apply`]'s AVX2 copy).
    #[inline(always)]
    fn big_r_with<const F: bool>(&self, tab: &DiodeTable, s: f64) -> Option<f64> {
        let xf = (s - tab.s0) * tab.inv_hf;
        if !(xf >= 0.0 && xf < tab.slot.len() as f64) {
            return None;
        }
        // SAFETY: 0 <= xf < slot.len() (checked just above): the cast is exact.
        let i = unsafe { xf.to_int_unchecked::<i64>() } as usize;
        let j = tab.slot[i] as usize;
        let a: &[f64; RSTRIDE] = self.rtab[j * RSTRIDE..][..RSTRIDE].try_into().ok()?;
        let t = ((s - a[0]) * a[1]).clamp(0.0, 1.0);
        let q = madd::<F>(t, madd::<F>(t, a[6], a[5]), a[4]);
        Some(madd::<F>(t, madd::<F>(t, q, a[3]), a[2]))
    }

    /// `R(s)` from the table's own antiderivatives ([`DiodeTable::integral`]): the plain
    /// reference of the weighted table.
    pub fn big_r_reference(&self, tab: &DiodeTable, s: f64) -> Option<f64> {
        let c = tab.integral(self.nj, s)?;
        Some((0..self.nj).map(|q| self.g[q] * c[q]).sum())
    }

    /// `r(s)` from the table, on its line; `None` outside it.
    #[inline(always)]
    pub fn r(&self, tab: &DiodeTable, s: f64) -> Option<f64> {
        let (base, t) = tab.locate(s)?;
        let sg = &tab.seg[base..base + tab.stride];
        Some((0..self.nj).map(|q| self.g[q] * seg_line(sg, q, t)).sum())
    }

    /// Correct a block: `taps` holds the table loop's record ([`tap`], [`REC`] values per
    /// sample) from `HIST` samples before the block to its end, `pending` the two output
    /// samples before the block not yet corrected (they wait in the output's delay line)
    /// and `out` the block's output (its last two samples are corrected with the next
    /// block); `scratch` room for `2 (b + 1)` values. A corrected sample `n` takes `r~(n) -
    /// r(n)`, `r(n)` the currents' part the step took.
    ///
    /// In three passes (the midpoints, `R` at each, the means), so that the table's
    /// lookups, each a load that depends on another, overlap from one sample to the next.
    pub fn apply(
        &self,
        tab: &DiodeTable,
        taps: &[f64],
        pending: &mut [f64; 2],
        out: &mut [f64],
        scratch: &mut [f64],
    ) {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
            {
                // SAFETY: the CPU supports AVX2 and FMA (checked just above).
                unsafe { self.apply_fma(tab, taps, pending, out, scratch) };
                return;
            }
        }
        self.apply_with::<false>(tab, taps, pending, out, scratch);
    }

    /// [`KneeAa::apply`] compiled for AVX2 and FMA.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma")]
    unsafe fn apply_fma(
        &self,
        tab: &DiodeTable,
        taps: &[f64],
        pending: &mut [f64; 2],
        out: &mut [f64],
        scratch: &mut [f64],
    ) {
        self.apply_with::<true>(tab, taps, pending, out, scratch);
    }

    /// [`KneeAa::apply`] (`F`: fused multiply-adds in `R`'s quartic).
    #[inline(always)]
    fn apply_with<const F: bool>(
        &self,
        tab: &DiodeTable,
        taps: &[f64],
        pending: &mut [f64; 2],
        out: &mut [f64],
        scratch: &mut [f64],
    ) {
        let b = out.len();
        debug_assert_eq!(taps.len(), REC * (b + HIST));
        if !taps.iter().skip(1).step_by(REC).any(|&f| f == tap::ON) {
            return;
        }
        let s = |j: usize| taps[REC * j];
        // the midpoint between records k + 1 and k + 2: sample i's path runs from mid[i] to
        // mid[i + 1]
        let (mid, big) = scratch[..2 * (b + 1)].split_at_mut(b + 1);
        for (k, m) in mid.iter_mut().enumerate() {
            *m = (-s(k) + 9.0 * s(k + 1) + 9.0 * s(k + 2) - s(k + 3)) / 16.0;
        }
        for (r, &m) in big.iter_mut().zip(mid.iter()) {
            *r = self.big_r_with::<F>(tab, m).unwrap_or(f64::NAN);
        }
        // sample n (from -2) reads the records n - 2 ..= n + 2: i = n + 2 ..= n + 6 from the
        // start of `taps`
        // the window's counts of conducting samples and of samples not from the table, kept
        // as the window slides
        let flag = |j: usize| taps[REC * j + 1];
        let (mut on, mut other) = (0u32, 0u32);
        let count = |f: f64, on: &mut u32, other: &mut u32, add: bool| {
            let (a, o) = (
                u32::from(f == tap::ON),
                u32::from(f != tap::ON && f != tap::OFF),
            );
            if add {
                *on += a;
                *other += o;
            } else {
                *on -= a;
                *other -= o;
            }
        };
        for j in 0..4 {
            count(flag(j), &mut on, &mut other, true);
        }
        for i in 0..b {
            count(flag(i + 4), &mut on, &mut other, true);
            if i > 0 {
                count(flag(i - 1), &mut on, &mut other, false);
            }
            if on == 0 || other > 0 {
                continue;
            }
            let (lo, hi) = (mid[i], mid[i + 1]);
            let m = if (hi - lo).abs() < MIN_SPAN {
                self.r(tab, 0.5 * (lo + hi)).unwrap_or(f64::NAN)
            } else {
                (big[i + 1] - big[i]) / (hi - lo)
            };
            let d = m - taps[REC * (i + 2) + 2];
            if !d.is_finite() {
                continue;
            }
            if i < 2 {
                pending[i] += d;
            } else {
                out[i - 2] += d;
            }
        }
    }
}
