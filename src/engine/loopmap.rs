//! Band-limited diode knees inside an op-amp's loop: antiderivative anti-aliasing of a
//! group's static map, for a network output in a group with op-amps and diodes (a clipper
//! with its diodes in the feedback path, a precision rectifier) fed by one varying input.
//!
//! Such a group follows its input almost statically: its output is close to `f(u(n))`, `f`
//! the group's DC solution as a function of the input (capacitors open, op-amps at
//! equilibrium, diodes by their Shockley law) and `u` the input slightly delayed by the
//! loop's own lag (the op-amps' finite bandwidth, the junction capacitances: a fraction of a
//! microsecond, and different on either side of a knee). At the diodes' knees `f` bends
//! sharply and the harmonics of `f(u(t))` past the internal Nyquist frequency fold into the
//! audio band. Here `f(u(n))` is replaced by its mean over the path of `u` from half a sample
//! before to half a sample after (first-order antiderivative anti-aliasing, as the passive
//! knees of [`crate::engine::knee`] do for a diode group's currents):
//!
//! `f~(n) = (F(m+) - F(m-)) / (m+ - m-)`, `F` the antiderivative of `f`, exact for the
//! table's interpolant, `m-`, `m+` the path at `n - 1/2` and `n + 1/2` (the cubic through
//! the four samples around each), so the mean is centred on `n`. The correction
//! `f~(n) - f(u(n))` is added to the output (or to the drive of the op-amp that makes it,
//! before its clamp).
//!
//! `u(n)` is the input the engine's own output implies, `f^-1(y(n))` ([`LoopMapAa::inverse`]),
//! not the source's sample: the loop's lag moves the knee's instant by a tenth of a step or
//! so, and a mean taken along the undelayed input corrects a knee where the output does not
//! have it (measured on a feedback clipper at 1 kHz, K = 4: -73.5 dBc along the input against
//! -90.2 along the implied input; with an ideal part and no junction capacitance, where the
//! two coincide, both -92.4). Where `f` is flat or out of the table there is no implied
//! input, and the samples whose window reads one are left as solved.
//!
//! `f` is tabulated at compile time by solving the group at the input values of an adaptive
//! grid: uniform cells, each split into equal sub-intervals until the cubic through four
//! points of each matches three more solutions within [`TOL`]. A sub-interval is *bent*
//! where a junction of the group passes its "off" threshold (the linear fast path's own
//! check) and *out* where an op-amp is held at or near its swing, an op-amp's input leaves
//! its common-mode range, or the solution fails: the clamp and the reversal edges have
//! their own corrections. A sample is corrected only when the five implied inputs it reads
//! lie in the table, none out and one bent, and its path crosses no sub-interval that is
//! out: an output that never reaches a knee is untouched, sample for sample.

use crate::circuit::plan::GroupPlan;
use crate::circuit::step::{static_point, GroupState};
use crate::circuit::Circuit;

/// Input records before the block the correction reads (the block's first pending sample,
/// `n = -2`, reads `n - 2`).
pub const HIST: usize = 4;

/// Largest error of the table's cubic against the group's solution, V (checked at three
/// points of each sub-interval): the correction is the difference of the interpolant's
/// mean and its value, so its error is far below this.
pub const TOL: f64 = 1e-7;

/// Cells of the table's input range.
const CELLS: usize = 256;

/// Most sub-intervals of one cell (a power of two).
const MAX_SUB: usize = 1024;

/// Below this width of the input's path over one sample, V, the mean is `f` at the path's
/// midpoint (the antiderivative's difference would lose its digits).
const MIN_SPAN: f64 = 1e-7;

/// A sub-interval's class: every junction below its "off" threshold.
const LINEAR: u8 = 0;
/// A junction conducts.
const BENT: u8 = 1;
/// Not corrected here (an op-amp at its swing or past its input range, or no solution).
const OUT: u8 = 2;

/// Values per sub-interval of [`LoopMapAa::seg`]: its start, `1 / width`, `F` at its start,
/// the cubic `c0 .. c3` in the local `t`, and `4 k + class`, `k` the count of sub-intervals
/// out before it.
const STRIDE: usize = 8;

/// The compiled correction of one network's output.
#[derive(Debug, Clone, PartialEq)]
pub struct LoopMapAa {
    /// The group whose map is tabulated.
    pub group: usize,
    /// The circuit node of the group's input.
    pub input: usize,
    x0: f64,
    inv_hf: f64,
    /// Per finest slot of the input range, the sub-interval that holds it.
    slot: Vec<u32>,
    seg: Vec<f64>,
    /// The tangent taken out: `f = g + la x + lb`.
    la: f64,
    lb: f64,
}

/// One sub-interval of the table: its start, width, cubic in the local `t` and class.
type Row = (f64, f64, [f64; 4], u8);

/// One cell `[a, a + h]` split into equal sub-intervals, as few as fit (a power of two, at
/// most [`MAX_SUB`]): per sub-interval its start, width, cubic in the local `t` (through
/// the solutions at `t = 0, 1/3, 2/3, 1`, checked at `1/6, 1/2, 5/6`) and class; `None`
/// when even the finest split does not fit within [`TOL`].
fn fit_cell(pt: &mut impl FnMut(f64) -> (f64, u8), a: f64, h: f64) -> Option<Vec<Row>> {
    let mut m = 1;
    while m <= MAX_SUB {
        if let Some(rows) = split_cell(pt, a, h, m) {
            return Some(rows);
        }
        m *= 2;
    }
    None
}

/// [`fit_cell`] with `m` sub-intervals; `None` when one of them misses [`TOL`].
fn split_cell(pt: &mut impl FnMut(f64) -> (f64, u8), a: f64, h: f64, m: usize) -> Option<Vec<Row>> {
    let w = h / m as f64;
    let mut rows = Vec::with_capacity(m);
    let mut left = pt(a);
    for k in 0..m {
        let s0 = a + k as f64 * w;
        let p1 = pt(s0 + w / 3.0);
        let p2 = pt(s0 + 2.0 * w / 3.0);
        let p3 = pt(s0 + w);
        let ps = [left, p1, p2, p3];
        let mut class = ps.iter().map(|p| p.1).max().unwrap_or(OUT);
        let mut cf = [0.0; 4];
        if class != OUT {
            // Newton's forward differences at u = 3 t = 0, 1, 2, 3, in powers of t
            let [v0, v1, v2, v3] = ps.map(|p| p.0);
            let (d1, d2, d3) = (v1 - v0, v2 - 2.0 * v1 + v0, v3 - 3.0 * v2 + 3.0 * v1 - v0);
            cf = [
                v0,
                3.0 * (d1 - d2 / 2.0 + d3 / 3.0),
                9.0 * (d2 - d3) / 2.0,
                4.5 * d3,
            ];
            for tt in [1.0 / 6.0, 0.5, 5.0 / 6.0] {
                let (v, cl) = pt(s0 + tt * w);
                class = class.max(cl);
                if class == OUT {
                    break;
                }
                let fit = cf[0] + tt * (cf[1] + tt * (cf[2] + tt * cf[3]));
                if (fit - v).abs() > TOL {
                    return None;
                }
            }
        }
        if class == OUT {
            cf = [0.0; 4];
        }
        rows.push((s0, w, cf, class));
        left = p3;
    }
    Some(rows)
}

/// Whether the map `f = g + la x` rises (or falls, with `la`) through every sub-interval
/// that is not out: the input a drive implies ([`LoopMapAa::inverse`]) is unique only then.
/// A map that turns back (a full-wave rectifier's) is not corrected here.
fn monotonic(fitted: &[Vec<Row>], la: f64) -> bool {
    let sg = la.signum();
    fitted
        .iter()
        .flatten()
        .filter(|r| r.3 != OUT)
        .all(|&(_, w, cf, _)| {
            [0.0, 0.25, 0.5, 0.75, 1.0].iter().all(|&t| {
                let df = (cf[1] + t * (2.0 * cf[2] + t * 3.0 * cf[3])) / w + la;
                df * sg > 0.0
            })
        })
}

/// What one solve of the map gives: the output and the point's class.
#[allow(clippy::too_many_arguments)]
fn point(
    c: &Circuit,
    gp: &GroupPlan,
    vn: &mut [f64],
    st: &mut GroupState,
    warm: bool,
    input: usize,
    out: Out,
    x: f64,
) -> (f64, u8) {
    vn[input] = x;
    let amps = match static_point(c, gp, vn, st, warm) {
        Ok(a) => a,
        Err(_) => return (f64::NAN, OUT),
    };
    let mut class = LINEAR;
    for (ac, &(v, held)) in gp.amps.iter().zip(&amps) {
        let a = &c.amps[ac.amp];
        let sh = &a.shaper;
        if held || v < sh.lo + sh.w || v > sh.hi - sh.w {
            return (f64::NAN, OUT);
        }
        if let Some((cl, ch)) = a.cm {
            let vp = vn[a.plus];
            if vp < cl || vp > ch {
                return (f64::NAN, OUT);
            }
        }
    }
    let Some(fp) = gp.fast.as_ref() else {
        return (f64::NAN, OUT);
    };
    for (q, &ei) in gp.junctions.iter().enumerate() {
        let e = &c.elems[ei];
        if vn[e.a] - vn[e.b] > fp.vth[q] {
            class = BENT;
        }
    }
    let y = match out {
        Out::Node(n) => vn[n],
        Out::Amp(j) => amps[j].0,
    };
    if y.is_finite() {
        (y, class)
    } else {
        (f64::NAN, OUT)
    }
}

/// What the map's output is: a node of the group, or the state of its `j`-th op-amp (the
/// drive before its clamp).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Out {
    /// A node's voltage.
    Node(usize),
    /// The group's `j`-th op-amp's state.
    Amp(usize),
}

impl LoopMapAa {
    /// Tabulate the map of group `gi` of `c` from its input node `input` to `out` over
    /// `[-span, span]`, V; `vn` the circuit's node values at rest (the fixed nodes set).
    /// `None` when some cell cannot be fitted within [`TOL`] or the group never bends.
    pub fn build(
        c: &Circuit,
        gp: &GroupPlan,
        gi: usize,
        input: usize,
        out: Out,
        span: f64,
        vn: &[f64],
    ) -> Option<LoopMapAa> {
        let mut vn = vn.to_vec();
        let mut st = GroupState::new(gp, c.nodes.len());
        let h = 2.0 * span / CELLS as f64;
        // each cell's sub-intervals (start, width, cubic, class), solved by continuation
        // from the rest input 0 V outwards (each solve starts from the last: a loop closed
        // through diodes stays closed)
        let mut fitted: Vec<Vec<Row>> = vec![Vec::new(); CELLS];
        let mid = CELLS / 2;
        let order: Vec<usize> = (mid..CELLS).chain((0..mid).rev()).collect();
        let mut warm = false;
        for (k, &cell) in order.iter().enumerate() {
            if k == CELLS - mid {
                // back to the rest input for the cells below it
                warm = false;
            }
            let a = -span + cell as f64 * h;
            let mut pt = |x: f64| {
                let p = point(c, gp, &mut vn, &mut st, warm, input, out, x);
                warm = p.1 != OUT;
                p
            };
            if k == CELLS - mid {
                pt(0.0);
            }
            fitted[cell] = fit_cell(&mut pt, a, h)?;
        }
        // The map's tangent at the rest input (0 V, or the nearest input where the map is
        // defined), taken out of the table: what is tabulated and averaged is the bend
        // `g = f - L`, near zero where the junctions barely conduct, so the correction
        // fades there (the mean of a line over a curved path is not its value on the
        // path: averaged whole, the map would take a one-sample boxcar where it is
        // corrected and none where it is not, a step at every edge of the correction).
        let (la, lb) = fitted
            .iter()
            .flatten()
            .filter(|r| r.3 != OUT)
            .min_by(|p, q| {
                let d = |r: &Row| (r.0.max(0.0) + (r.0 + r.1).min(0.0)).abs();
                d(p).total_cmp(&d(q))
            })
            .map(|&(s0, w, cf, _)| {
                let t = (-s0 / w).clamp(0.0, 1.0);
                let v = cf[0] + t * (cf[1] + t * (cf[2] + t * cf[3]));
                let dv = (cf[1] + t * (2.0 * cf[2] + t * 3.0 * cf[3])) / w;
                (dv, v - dv * (s0 + t * w))
            })?;
        for &mut (s0, w, ref mut cf, class) in fitted.iter_mut().flatten() {
            if class != OUT {
                cf[0] -= la * s0 + lb;
                cf[1] -= la * w;
            }
        }
        let mut seg: Vec<f64> = Vec::new();
        let mut cells: Vec<(usize, usize)> = Vec::with_capacity(CELLS);
        let mut f_run = 0.0;
        let mut outs = 0usize;
        let mut any_bent = false;
        for rows in &fitted {
            cells.push((seg.len() / STRIDE, rows.len()));
            for &(s0, w, cf, class) in rows {
                any_bent |= class == BENT;
                seg.extend_from_slice(&[
                    s0,
                    1.0 / w,
                    f_run,
                    cf[0],
                    cf[1],
                    cf[2],
                    cf[3],
                    (4 * outs + class as usize) as f64,
                ]);
                f_run += w * (cf[0] + cf[1] / 2.0 + cf[2] / 3.0 + cf[3] / 4.0);
                if class == OUT {
                    outs += 1;
                }
            }
        }
        if !any_bent || !monotonic(&fitted, la) {
            return None;
        }
        let per_cell = cells.iter().map(|c| c.1).max().unwrap_or(1);
        let mut slot = Vec::with_capacity(CELLS * per_cell);
        for &(first, m) in &cells {
            for i in 0..per_cell {
                slot.push((first + i / (per_cell / m)) as u32);
            }
        }
        Some(LoopMapAa {
            group: gi,
            input,
            x0: -span,
            inv_hf: per_cell as f64 / h,
            slot,
            seg,
            la,
            lb,
        })
    }

    /// The sub-interval (offset in `seg`) and local `t` of `x`; `None` outside the table.
    #[inline(always)]
    fn locate(&self, x: f64) -> Option<(usize, f64)> {
        let xf = (x - self.x0) * self.inv_hf;
        if !(xf >= 0.0 && xf < self.slot.len() as f64) {
            return None;
        }
        let base = self.slot[xf as usize] as usize * STRIDE;
        let s = &self.seg[base..base + STRIDE];
        Some((base, ((x - s[0]) * s[1]).clamp(0.0, 1.0)))
    }

    /// `f(x)` from the table and its sub-interval's tag (`4 k + class`); `None` outside.
    pub fn f(&self, x: f64) -> Option<(f64, usize)> {
        let (base, t) = self.locate(x)?;
        let s = &self.seg[base..base + STRIDE];
        Some((s[3] + t * (s[4] + t * (s[5] + t * s[6])), s[7] as usize))
    }

    /// The input at which the map gives `y`: Newton from `guess` on the table's cubics, kept
    /// inside the bracket of the root found so far (bisection when a step leaves it: the
    /// cubics of neighbouring sub-intervals meet with a small kink in slope, and plain Newton
    /// can cycle across such a join; it did, near the knees, on about one sample in 300). `None` where the map is flat, out, or outside the table.
    pub fn inverse(&self, y: f64, guess: f64) -> Option<f64> {
        let mut x = if guess.is_finite() { guess } else { 0.0 };
        let sg = self.la.signum();
        let (mut lo, mut hi) = (f64::NEG_INFINITY, f64::INFINITY);
        for _ in 0..80 {
            let (base, t) = self.locate(x)?;
            let s = &self.seg[base..base + STRIDE];
            if (s[7] as usize) % 4 == OUT as usize {
                return None;
            }
            let v = s[3] + t * (s[4] + t * (s[5] + t * s[6])) + self.la * x + self.lb;
            let dv = (s[4] + t * (2.0 * s[5] + t * 3.0 * s[6])) * s[1] + self.la;
            let r = v - y;
            if r.abs() < 1e-13 {
                return Some(x);
            }
            if r * sg > 0.0 {
                hi = x;
            } else {
                lo = x;
            }
            if hi - lo < 1e-14 * (1.0 + x.abs()) {
                return Some(0.5 * (lo + hi));
            }
            let mut nx = if dv * sg > 1e-12 {
                x - r / dv
            } else {
                f64::NAN
            };
            if !(nx > lo && nx < hi) {
                nx = if lo.is_finite() && hi.is_finite() {
                    0.5 * (lo + hi)
                } else if lo.is_finite() {
                    x + 1e-3 * (1.0 + x.abs())
                } else {
                    x - 1e-3 * (1.0 + x.abs())
                };
            }
            x = nx;
        }
        None
    }

    /// `F(x)`, the antiderivative of the table's `f` from the table's start, and the
    /// sub-interval's tag; `None` outside.
    pub fn big_f(&self, x: f64) -> Option<(f64, usize)> {
        let (base, t) = self.locate(x)?;
        let s = &self.seg[base..base + STRIDE];
        let w = 1.0 / s[1];
        let r = s[2] + w * t * (s[3] + t * (s[4] / 2.0 + t * (s[5] / 3.0 + t * s[6] / 4.0)));
        Some((r, s[7] as usize))
    }

    /// Correct a block: `xs` holds the (implied) input from [`HIST`] samples before the block to its
    /// end, `pending` the two output samples before the block not yet corrected (they wait
    /// in the output's delay line) and `out` the block's output (its last two samples are
    /// corrected with the next block); `scratch` room for `b + 1` values.
    pub fn apply(&self, xs: &[f64], pending: &mut [f64; 2], out: &mut [f64], scratch: &mut [f64]) {
        let b = out.len();
        debug_assert_eq!(xs.len(), b + HIST);
        // each record's class (OUT outside the table)
        let class = |x: f64| self.f(x).map_or(OUT, |(_, tag)| (tag % 4) as u8);
        if !xs.iter().any(|&x| class(x) == BENT) {
            return;
        }
        // the midpoint between records k + 1 and k + 2: sample i's path runs from mid[i] to
        // mid[i + 1]
        let mid = &mut scratch[..b + 1];
        for (k, m) in mid.iter_mut().enumerate() {
            *m = (-xs[k] + 9.0 * xs[k + 1] + 9.0 * xs[k + 2] - xs[k + 3]) / 16.0;
        }
        // sample n (from -2) reads the records n - 2 ..= n + 2: i = n + 2 ..= n + 6 from
        // the start of `xs`; the window's counts of bent records and of records out, kept
        // as the window slides
        let (mut bent, mut outc) = (0u32, 0u32);
        let mut count = |x: f64, add: bool| {
            let k = class(x);
            let (bb, oo) = (u32::from(k == BENT), u32::from(k == OUT));
            if add {
                bent += bb;
                outc += oo;
            } else {
                bent -= bb;
                outc -= oo;
            }
            bent > 0 && outc == 0
        };
        for &x in &xs[..4] {
            count(x, true);
        }
        for i in 0..b {
            if i > 0 {
                count(xs[i - 1], false);
            }
            if !count(xs[i + 4], true) {
                continue;
            }
            let (lo, hi) = (mid[i], mid[i + 1]);
            let m = if (hi - lo).abs() < MIN_SPAN {
                self.f(0.5 * (lo + hi)).map(|v| v.0)
            } else {
                match (self.big_f(lo), self.big_f(hi)) {
                    // the path crosses no sub-interval out of the map, nor ends in one
                    (Some((a, ta)), Some((z, tz)))
                        if ta / 4 == tz / 4 && ta % 4 != OUT as usize && tz % 4 != OUT as usize =>
                    {
                        Some((z - a) / (hi - lo))
                    }
                    _ => None,
                }
            };
            let Some(m) = m else { continue };
            let Some((gx, _)) = self.f(xs[i + 2]) else {
                continue;
            };
            let d = m - gx;
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

#[cfg(test)]
mod tests {
    use super::*;

    /// Sub-intervals of `f` on `[-1, 1]` in eight pieces, each the cubic through `f` at
    /// `t = 0, 1/3, 2/3, 1` (as `fit_cell` fits them), with `la x` taken out.
    fn rows(f: impl Fn(f64) -> f64, la: f64) -> Vec<Vec<Row>> {
        (0..8)
            .map(|k| {
                let (s0, w) = (-1.0 + 0.25 * k as f64, 0.25);
                let v = |t: f64| f(s0 + t * w) - la * (s0 + t * w);
                let [v0, v1, v2, v3] = [0.0, 1.0 / 3.0, 2.0 / 3.0, 1.0].map(v);
                let (d1, d2, d3) = (v1 - v0, v2 - 2.0 * v1 + v0, v3 - 3.0 * v2 + 3.0 * v1 - v0);
                let cf = [
                    v0,
                    3.0 * (d1 - d2 / 2.0 + d3 / 3.0),
                    9.0 * (d2 - d3) / 2.0,
                    4.5 * d3,
                ];
                vec![(s0, w, cf, BENT)]
            })
            .collect()
    }

    // A map that turns back (|x|, a full-wave rectifier's shape) has no unique input for a
    // drive, so it is refused; a falling map (an inverting clipper's, -10 x softened by a
    // cube) and a rising one pass; a sub-interval out of the map is not looked at.
    #[test]
    fn a_map_that_turns_back_is_refused() {
        let clip = |x: f64| -10.0 * x + 3.0 * x * x * x;
        assert!(monotonic(&rows(clip, -10.0), -10.0));
        assert!(monotonic(&rows(|x| 2.0 * x + x.sin(), 2.0), 2.0));
        assert!(!monotonic(
            &rows(|x| x * x.abs().sqrt() - 0.5 * x.abs(), 1.0),
            1.0
        ));
        assert!(!monotonic(&rows(f64::abs, 1.0), 1.0));
        let mut out = rows(f64::abs, 1.0);
        for r in out.iter_mut().take(4) {
            r[0].3 = OUT;
        }
        assert!(monotonic(&out, 1.0), "only the rising half is in the map");
    }
}
