//! Slope corners of an op-amp's output inside a step, and their band-limited correction
//! (issue 16). One place for both engine cores: a stage of the stage engine and an op-amp of
//! the circuit engine describe a step by the same few numbers ([`SlewStep`]) and get back the
//! end value and the corners of the step.
//!
//! # The stiff slew model
//! When the loop is fast against the time step (`k G h` at least [`STIFF`], `G = f b + eps`,
//! every real part at audio rates and K = 4), the output of `dv/dt = SR tanh(f Vd / Vov) -
//! k eps v` is, within a small fraction of a step, one of two things:
//! - *tracking*: the linear loop's particular solution for the target,
//!   `T(t) = (f / G) (p - p' / (k G) + p'' / (k G)^2 - ...)` (the transient decays as
//!   `exp(-k G t)`, below `exp(-STIFF)` after one step);
//! - *slewing*: a ramp at `+-SR - k eps v`.
//!
//! The output leaves the tracking curve where the curve's slope reaches the slew rate (the
//! ramp starts tangent to it: a corner of the second derivative only), and joins it again
//! where the ramp meets it (a corner of the slope: the ramp's slope against the curve's, or
//! against the opposite ramp when the curve is then steeper than the slew rate the other
//! way). The tanh rounds each corner over about `1 / (k G)` (a twentieth of a step at
//! `k G h` = 20); its in-band part is a small fixed impulse per corner, left out. The target
//! within the step is the quartic through the last five samples of `p` (the engine's
//! first-order hold would put every slewing start on the sample grid), so the corners fall
//! where they fall between samples, and the samples at both ends of a step hold the exact
//! values of this piecewise trajectory. Each instant is solved on a quadratic (the curve's
//! higher powers replaced by their chords over the span, so both agree at its ends) and
//! polished by two steps of Newton's iteration on the curve.
//!
//! # The target's order
//! What limits the slew corners is where the target puts them. Where the ramp meets the
//! curve, an error `e` of the target moves the corner by `e` over the difference of the
//! slopes, and the next ramp starts from there: each stretch of a slewing triangle is offset
//! by about `e`, a different amount at each corner as the corners fall differently between
//! samples (alias, not distortion). Interpolating through the last `m` samples errs by
//! `p^(m) h^m / m!` times the node polynomial (`(u + 1) u (u - 1)` for the quadratic, the
//! step being `0 < u < 1`), so the figure falls by about `6 m` dB per doubling of K.
//! Measured (`tests/engine_edges.rs`, a slow part as a follower asked for 3.1 times its slew
//! rate, 10 kHz at 6 V peak; K = 4, 8, 16): the quadratic through three samples -56.7,
//! -77.7, -90.6 dBc; the cubic through four -70.6, -99.6, -118.9 dBc; the quartic through
//! five -85.9, -118.2, -128.3 dBc. A centred cubic (through `p[n + 1]`) would err about
//! half as much as the backward one, but the stage does not have its next input yet (the
//! clamp's lookahead is on the output; the input at `n + 1` needs the next block, and the
//! state through a capacitor). A corner of the input (a tone that starts from rest, a
//! square wave's edge) misleads the quartic more than the quadratic (it reads the kink as a
//! slope the input does not have: a tone starting at 1.6 times the slew rate started its
//! ramp a tenth of a step late, 1.1 % of the peak): where the fourth difference of the five
//! samples exceeds [`SMOOTH`] times their largest second difference the target is the
//! quadratic through the last three (a sine reads at most about `w^2` at `w` radians per
//! sample, a corner at least 1).
//!
//! # Band-limited corners
//! A corner of the slope by `D` (volts per step) at a fraction `u` of the step from sample
//! `n - 1` to `n` is the ramp `D (t - u)+` added to a smooth signal. Averaged against a
//! kernel of unit area whose response vanishes at every multiple of the internal rate, the
//! ramp differs from its samples only near the corner (the polyBLAMP idea; Esqueda,
//! Valimaki and Bilbao, "Rounding corners with BLAMP", DAFx 2016). The clamp's triangle one
//! sample wide each side ([`super::shaper`], response `sinc^2 (f / fs)`) would give the
//! two-point residual `D (1 - |d|)^3 / 6`, but its second moment (1/6) droops everything
//! the corners make by `1 - (pi f / fs)^2 / 3` in band: 4 % at 21 kHz and K = 4, the
//! harmonics of a slewing tone. The kernel here is `(4/3) B3(t) - (1/3) B3(t / 2) / 2`, `B3`
//! the quadratic B-spline (response `(4/3) sinc^3(f / fs) - (1/3) sinc^3(2 f / fs)`: triple
//! zeros at every multiple of the rate, and a second moment `(4/3)(1/4) - (1/3)(1) = 0`, so
//! no droop to second order). It touches six samples, three on each side of the corner
//! ([`corner6`]), which the clamp's three samples of lookahead hold. (The first version
//! used the triangle pair `(4/3) tri(t) - (1/3) tri(t / 2) / 2` on four samples, double
//! zeros; the slew corners' figures did not move with the change, the reversal edges'
//! gained about 1 dB: neither is limited by the kernel.) The correction is added to the
//! output only, never to the state of the loop; a step without a corner is left alone, so a
//! stage that never slews renders the same samples with and without it.
//!
//! # Reversal edges
//! A reversing input stage (V+ past the end of its input range multiplies Vd by a negative
//! factor) is a positive loop: the output runs away at the slew rate until the rail holds
//! it, and comes back when V+ re-enters the range. The step in which the factor changes
//! sign is split where V+ crosses the range's end ([`crossing`], on the quadratic through
//! the last three samples of V+): up to there the usual sharp model, then a ramp at the
//! slew rate ([`SlewStep::enter_reversal`], [`SlewStep::reversed`]), or, coming back, the
//! ramp from the rail toward the target ([`SlewStep::leave_reversal`]). Every slope change
//! of the output (the ramp's start, the swing, its return, where it meets the target) is a
//! corner with the correction above. A rail-to-rail jump within a step has no local
//! polynomial model, so the clamp's band-limited evaluation cannot read it from the drive:
//! the engine takes the output of the samples whose clamp window holds such an edge as the
//! static clamp of the drive plus the corners' corrections (`run::RevState`).

/// Smallest `k G h` for which a step's corners are taken sharp ([`SlewStep`]): the tanh's
/// rounding then spans at most a quarter of a step, and the tracking transient after one
/// step is below `exp(-4)` of the offset it starts from (and far below for real parts: about
/// 23 for a 0.7 MHz part at 192 kHz).
pub const STIFF: f64 = 4.0;

/// At most this many corners in one step (a ramp that catches up and turns back, then a
/// start of slewing, is three; the step that leaves a reversal adds two before them).
pub const MAX_CORNERS: usize = 6;

/// One step of an op-amp's loop in per-step units (times in steps, slopes in volts per
/// step), the target the quartic through the last five samples of `p`
/// ([`SlewStep::target`]).
#[derive(Debug, Clone, Copy)]
pub struct SlewStep {
    /// `p` at the four samples before the step and at its end (`p[n-4]` ..= `p[n]`).
    pub p: [f64; DEG + 1],
    /// Reversal (or input) factor `f`.
    pub f: f64,
    /// Loop factor `b` (`Vd = p - b v`).
    pub b: f64,
    /// `1 / A0`.
    pub eps: f64,
    /// `k h`, `k = 2 pi GBW`.
    pub kh: f64,
    /// `SR h`: the largest move of one step.
    pub srh: f64,
}

/// A slope corner at `u` (fraction of the step, in `[0, 1]`) by `d` volts per step (slope
/// after less slope before).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Corner {
    /// Where, as a fraction of the step.
    pub u: f64,
    /// Slope after less slope before, volts per step.
    pub d: f64,
    /// Second derivative after less before, volts per step squared.
    pub c: f64,
}

/// What one step did: its end value, whether it ends slewing (`+1`, `-1`) or tracking (`0`),
/// and its corners.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Stepped {
    /// The output at the end of the step.
    pub v: f64,
    /// Slewing up (`1`), down (`-1`) or tracking (`0`) at the end of the step.
    pub mode: i8,
    /// The corners, the first [`Stepped::n`] of them in time order.
    pub corners: [Corner; MAX_CORNERS],
    /// How many corners.
    pub n: usize,
    /// Slope (volts per step) of the trajectory at the end of the span.
    pub slope: f64,
    /// Second derivative (volts per step squared) of the trajectory at the end of the span.
    pub curv: f64,
    /// The step returns from a reversal and still ramps at its end: the next step continues
    /// the return ([`SlewStep::into_rail`] takes its corner at the rail).
    pub ret: bool,
}

impl Stepped {
    fn push(&mut self, u: f64, d: f64, c: f64) {
        if self.n < MAX_CORNERS {
            self.corners[self.n] = Corner { u, d, c };
            self.n += 1;
        }
    }
}

/// Samples a corner's correction touches: three before it and three after.
pub const SPAN: usize = 6;

/// The summed corrections of a step's corners on samples `t - 3 ..= t + 2` ([`corner6`]),
/// the step ending at sample `t`.
#[inline]
pub fn corner_weights(r: &Stepped) -> [f64; SPAN] {
    let mut w = [0.0; SPAN];
    for c in &r.corners[..r.n] {
        let (a, b) = corner6(c.u);
        for i in 0..SPAN {
            w[i] += c.d * a[i] + c.c * b[i];
        }
    }
    w
}

/// `sum_j (-1)^j C(3, j) (d + 3/2 - j)+^e / e!` for `e` = 4 and 5: the second and third
/// running integrals of the quadratic B-spline `B3` (three unit boxes convolved, support
/// `|d| < 3/2`), i.e. its averages of `(d + s)+` and `(d + s)+^2 / 2` (de Boor, "A Practical
/// Guide to Splines", 1978: a B-spline as a divided difference of truncated powers).
#[inline(always)]
fn b3_ramps(d: f64) -> (f64, f64) {
    // branch-free (the four truncated powers at once)
    let x = [
        (d + 1.5).max(0.0),
        (d + 0.5).max(0.0),
        (d - 0.5).max(0.0),
        (d - 1.5).max(0.0),
    ];
    let x4 = x.map(|v| {
        let v2 = v * v;
        v2 * v2
    });
    let r = (x4[0] - x4[3]) + 3.0 * (x4[2] - x4[1]);
    let q = (x4[0] * x[0] - x4[3] * x[3]) + 3.0 * (x4[2] * x[2] - x4[1] * x[1]);
    (r * (1.0 / 24.0), q * (1.0 / 120.0))
}

/// The band-limited corrections of a corner at `u` in `[0, 1]` of the step from sample
/// `n - 1` to `n`, for samples `n - 3 ..= n + 2`: per unit jump of the slope (`(t - u)+`)
/// and per unit jump of the second derivative (`(t - u)+^2 / 2`). The kernel is `(4/3)
/// B3(t) - (1/3) B3(t / 2) / 2`: unit area, zero second moment (so no in-band droop to
/// second order), response `(4/3) sinc^3(f / fs) - (1/3) sinc^3(2 f / fs)`, triple zeros at
/// every multiple of the internal rate (the triangle pair of [`blamp4`] has double ones:
/// images next to the rate are taken down by about 52 dB at 20 kHz from it at K = 4 and
/// 48 kHz, against 37 dB); support three samples each side, which the clamp's lookahead
/// holds.
#[inline]
pub fn corner6(u: f64) -> ([f64; SPAN], [f64; SPAN]) {
    // the same piecewise polynomials in `u`, tabulated: two pieces per sample (the kernel's
    // knots fall on whole and half samples), Horner in `u` (see `CORNER_TABLE`)
    let piece = usize::from(u >= 0.5);
    let mut a = [0.0; SPAN];
    let mut b = [0.0; SPAN];
    for i in 0..SPAN {
        let ca = &CORNER_TABLE.0[i][piece];
        let cb = &CORNER_TABLE.1[i][piece];
        a[i] = (((ca[4] * u + ca[3]) * u + ca[2]) * u + ca[1]) * u + ca[0];
        b[i] = ((((cb[5] * u + cb[4]) * u + cb[3]) * u + cb[2]) * u + cb[1]) * u + cb[0];
    }
    (a, b)
}

/// The coefficients (in powers of `u`) of [`corner6_reference`]'s corrections, per sample
/// and piece (`u < 1/2`, `u >= 1/2`): every truncated power `(d + s)+^k` with `d = i - 2 - u`
/// is either 0 or `(i - 2 + s - u)^k` over a whole piece (its knot `i - 2 + s` is a multiple
/// of 1/2), expanded by the binomial theorem. Slope jumps (degree 4) and curvature jumps
/// (degree 5).
type CornerTable = ([[[f64; 6]; 2]; SPAN], [[[f64; 6]; 2]; SPAN]);
static CORNER_TABLE: CornerTable = corner_table();

const fn corner_table() -> CornerTable {
    // (weight, shift) of the truncated powers: (4/3) B3(t) ramps, -(1/3) B3(t/2)/2 ramps
    // (x/2 powers folded into the weights), and the ramp itself
    const S1: [(f64, f64); 4] = [(1.0, 1.5), (-1.0, -1.5), (3.0, -0.5), (-3.0, 0.5)];
    const S2: [(f64, f64); 4] = [(1.0, 3.0), (-1.0, -3.0), (3.0, -1.0), (-3.0, 1.0)];
    let mut ta = [[[0.0; 6]; 2]; SPAN];
    let mut tb = [[[0.0; 6]; 2]; SPAN];
    let mut i = 0;
    while i < SPAN {
        let c = i as f64 - 2.0;
        let mut piece = 0;
        while piece < 2 {
            let mid = if piece == 0 { 0.25 } else { 0.75 };
            let mut j = 0;
            while j < 9 {
                // term j: (shift, weight for a (k = 4 or 1), weight for b (k = 5 or 2))
                let (s, wa, wb, ka, kb) = if j < 4 {
                    let (w, s) = S1[j];
                    (s, w * (4.0 / 3.0) / 24.0, w * (4.0 / 3.0) / 120.0, 4, 5)
                } else if j < 8 {
                    let (w, s) = S2[j - 4];
                    (
                        s,
                        -w * (2.0 / 3.0) / (16.0 * 24.0),
                        -w * (4.0 / 3.0) / (32.0 * 120.0),
                        4,
                        5,
                    )
                } else {
                    (0.0, -1.0, -0.5, 1, 2)
                };
                let knot = c + s;
                // active over the piece, and inside the kernel's support (|d| < 3)
                if knot - mid > 0.0 && (c - mid).abs() < 3.0 {
                    add_power(&mut ta[i][piece], knot, ka, wa);
                    add_power(&mut tb[i][piece], knot, kb, wb);
                }
                j += 1;
            }
            piece += 1;
        }
        i += 1;
    }
    (ta, tb)
}

/// `coef += w (k0 - u)^k` in powers of `u` (binomial theorem).
const fn add_power(coef: &mut [f64; 6], k0: f64, k: usize, w: f64) {
    let mut m = 0;
    let mut binom = 1.0;
    while m <= k {
        // C(k, m) k0^(k - m) (-u)^m
        let mut pw = 1.0;
        let mut e = 0;
        while e < k - m {
            pw *= k0;
            e += 1;
        }
        let sign = if m % 2 == 0 { 1.0 } else { -1.0 };
        coef[m] += w * binom * pw * sign;
        binom = binom * (k - m) as f64 / (m + 1) as f64;
        m += 1;
    }
}

/// [`corner6`] evaluated from its definition (the B-spline ramps as truncated powers): the
/// plain reference the table is tested against.
pub fn corner6_reference(u: f64) -> ([f64; SPAN], [f64; SPAN]) {
    let mut a = [0.0; SPAN];
    let mut b = [0.0; SPAN];
    for (i, (ai, bi)) in a.iter_mut().zip(b.iter_mut()).enumerate() {
        let d = i as f64 - 2.0 - u;
        if d <= -3.0 || d >= 3.0 {
            continue;
        }
        let (r1, q1) = b3_ramps(d);
        let (r2, q2) = b3_ramps(0.5 * d);
        let p = d.max(0.0);
        *ai = (4.0 / 3.0) * r1 - (2.0 / 3.0) * r2 - p;
        *bi = (4.0 / 3.0) * (q1 - q2) - 0.5 * p * p;
    }
    (a, b)
}

/// Whether `q(y) = a y^2 + b y + c`, on the side `s` of zero at `y = 0` (`s c > 0`), reaches
/// zero within `(0, hi]`: at `hi`, or at its vertex inside. Without a square root or a
/// division, so that the usual step (a ramp still far from the curve) skips
/// [`first_root`]; `true` (let it decide) when `s c <= 0`.
#[inline]
fn reaches(a: f64, b: f64, c: f64, hi: f64, s: f64) -> bool {
    if s * c <= 0.0 || s * (c + hi * (b + hi * a)) <= 0.0 {
        return true;
    }
    // vertex -b / (2 a) in (0, hi), and there s q <= 0: s (4 a c - b^2) a <= 0
    a != 0.0 && b * a < 0.0 && b.abs() < 2.0 * a.abs() * hi && s * (4.0 * a * c - b * b) * a <= 0.0
}

/// The smallest root of `a x^2 + b x + c` in `(lo, hi]`, if any (stable form).
#[inline]
fn first_root(a: f64, b: f64, c: f64, lo: f64, hi: f64) -> Option<f64> {
    let ok = |x: f64| x > lo && x <= hi;
    let (r1, r2) = if a == 0.0 {
        if b == 0.0 {
            return None;
        }
        (-c / b, f64::NAN)
    } else {
        let disc = b * b - 4.0 * a * c;
        if disc < 0.0 {
            return None;
        }
        let q = -0.5 * (b + b.signum() * disc.sqrt());
        if q == 0.0 {
            (0.0, f64::NAN)
        } else {
            (q / a, c / q)
        }
    };
    match (ok(r1), ok(r2)) {
        (true, true) => Some(r1.min(r2)),
        (true, false) => Some(r1),
        (false, true) => Some(r2),
        _ => None,
    }
}

/// Degree of the target's local polynomial ([`SlewStep::target`]).
pub const DEG: usize = 4;

/// Largest ratio of the fourth difference of the last five samples of `p` to their largest
/// second difference for which the target is the quartic through them
/// ([`SlewStep::target`]). A sine of `w` radians per sample reads at most about `w^2`
/// (0.41 at 20 kHz and K = 4); a corner of the input (a ramp or a tone starting from rest)
/// at least 1.
pub const SMOOTH: f64 = 0.7;

/// Newton's iteration for a root of `f` (value and derivative) from `x`, twice; an update
/// that leaves `(lo, hi]` or is not finite is not taken.
#[inline]
fn polish(f: impl Fn(f64) -> (f64, f64), x: f64, lo: f64, hi: f64) -> f64 {
    let mut x = x;
    for _ in 0..2 {
        let (g, dg) = f(x);
        let xn = x - g / dg;
        if xn.is_finite() && xn > lo && xn <= hi {
            x = xn;
        }
    }
    x
}

impl SlewStep {
    /// Whether the loop is stiff enough for the sharp model.
    #[inline]
    pub fn stiff(&self) -> bool {
        self.f > 0.0 && self.kh * (self.f * self.b + self.eps) >= STIFF
    }

    /// The target within the step, `P(u) = sum_k c_k u^k`: the quartic through the last five
    /// samples of `p` (`u = -3 ..= 1`), in Newton's form the quadratic through the last three
    /// plus `d3 (u + 1) u (u - 1)` plus `d4 (u + 2) (u + 1) u (u - 1)`, `d3` and `d4` the
    /// third and fourth differences over `3!` and `4!` (divided differences on a unit grid).
    ///
    /// Where the five samples do not look smooth (the fourth difference more than
    /// [`SMOOTH`] times the largest second difference among them: a corner of the input,
    /// such as a tone's abrupt start, which the quartic would read as a slope that the
    /// input does not have) the target is the quadratic through the last three alone.
    #[inline]
    pub fn target(&self) -> [f64; DEG + 1] {
        let [p4, p3, p2, p1, p0] = self.p;
        let a1 = 0.5 * (p0 - p2);
        let a2 = 0.5 * (p0 - 2.0 * p1 + p2);
        let q4 = p0 + p4 - 4.0 * (p1 + p3) + 6.0 * p2;
        // the fourth difference against each second difference (no maximum needed)
        let lim = q4.abs() * (1.0 / SMOOTH);
        let rough = lim > (p0 - 2.0 * p1 + p2).abs()
            && lim > (p1 - 2.0 * p2 + p3).abs()
            && lim > (p2 - 2.0 * p3 + p4).abs();
        if rough {
            return [p1, a1, a2, 0.0, 0.0];
        }
        let d3 = (p0 - 3.0 * (p1 - p2) - p3) * (1.0 / 6.0);
        let d4 = q4 * (1.0 / 24.0);
        // (u + 2) (u + 1) u (u - 1) = u^4 + 2 u^3 - u^2 - 2 u
        [p1, a1 - d3 - 2.0 * d4, a2 - d4, d3 + 2.0 * d4, d4]
    }

    /// The tracking curve `T(u) = sum_k t_k u^k` of the step: `(f / G) sum_j (-1 / (k G))^j
    /// P^(j)` for the target `P` ([`SlewStep::target`]), the particular solution of `T + T' /
    /// (k G) = (f / G) P`, written out per power (short dependency chains: it runs on every
    /// step that may slew; [`SlewStep::tracking_reference`] is the recursion it expands).
    #[inline]
    pub fn tracking(&self) -> [f64; DEG + 1] {
        let c = self.target();
        let ig = 1.0 / (self.f * self.b + self.eps);
        let ff = self.f * ig;
        let l = ig / self.kh;
        let (l2, l3) = (l * l, l * l * l);
        let l4 = l2 * l2;
        [
            ff * ((c[0] - l * c[1]) + 2.0 * l2 * c[2] - 6.0 * l3 * c[3] + 24.0 * l4 * c[4]),
            ff * ((c[1] - 2.0 * l * c[2]) + 6.0 * l2 * c[3] - 24.0 * l3 * c[4]),
            ff * ((c[2] - 3.0 * l * c[3]) + 12.0 * l2 * c[4]),
            ff * (c[3] - 4.0 * l * c[4]),
            ff * c[4],
        ]
    }

    /// [`SlewStep::tracking`] by its recursion, `t_k = (f / G) c_k - (k + 1) t_(k+1) / (k G)`
    /// from the highest power down: the plain reference it is tested against.
    pub fn tracking_reference(&self) -> [f64; DEG + 1] {
        let c = self.target();
        let g = self.f * self.b + self.eps;
        let ff = self.f / g;
        let l = 1.0 / (self.kh * g);
        let mut t = [0.0; DEG + 1];
        t[DEG] = ff * c[DEG];
        for k in (0..DEG).rev() {
            t[k] = ff * c[k] - l * (k + 1) as f64 * t[k + 1];
        }
        t
    }

    /// Whether a step starting in `mode` can hold an event: it starts slewing, or the
    /// tracking curve's slope passes the slew rate at an end of the step (a slope that peaks
    /// past the slew rate inside the step only, by less than about `w^2 / 8` of itself at
    /// `w` radians per sample, is left to the effective-`phi` step).
    #[inline]
    pub fn eventful(&self, mode: i8) -> bool {
        mode != 0 || self.eventful_with(&self.tracking())
    }

    #[inline]
    fn eventful_with(&self, t: &[f64; DEG + 1]) -> bool {
        let s1 = t[1] + 2.0 * t[2] + 3.0 * t[3] + 4.0 * t[4];
        t[1].abs() > self.srh || s1.abs() > self.srh
    }

    /// `r`, a step of this loop through the sharp model, with only the corners the output
    /// shows: those whose value (every corner of the model lies on the tracking curve) is
    /// inside the swing. Past a rail the output is flat, so a corner of the state there
    /// (a return from a reversal that ramps on past the other rail and meets its target
    /// beyond it) has no correction; for the steps whose output is the static clamp of
    /// the drive plus the corners' corrections (the samples around a reversal edge).
    pub fn visible(&self, r: &Stepped, sw: Swing) -> Stepped {
        let t = self.tracking();
        let mut out = *r;
        out.n = 0;
        for c in &r.corners[..r.n] {
            let u = c.u;
            let v = t[0] + u * (t[1] + u * (t[2] + u * (t[3] + u * t[4])));
            if v >= sw.lo && v <= sw.hi {
                out.push(c.u, c.d, c.c);
            }
        }
        out
    }

    /// The step from `v0` in `mode` through the sharp model (see the module documentation).
    pub fn step(&self, v0: f64, mode: i8) -> Stepped {
        self.step_span(v0, mode, 0.0, 1.0)
    }

    /// [`SlewStep::step`] if the loop is stiff ([`SlewStep::stiff`]) and the step can hold
    /// an event ([`SlewStep::eventful`]), with the tracking curve computed once.
    #[inline]
    pub fn step_if_eventful(&self, v0: f64, mode: i8) -> Option<Stepped> {
        if !self.stiff() {
            return None;
        }
        let t = self.tracking();
        (mode != 0 || self.eventful_with(&t)).then(|| self.span_with(&t, v0, mode, 0.0, 1.0))
    }

    /// The part of the step from `ua` to `ue` (fractions of the step, `0 <= ua <= ue <= 1`),
    /// from `v0` at `ua` in `mode`; [`Stepped::v`] is the value at `ue`.
    ///
    /// Every instant is first solved on a quadratic (the higher powers replaced by their
    /// chords over the span, so that it agrees with the curve at both ends), then polished by
    /// Newton's iteration on the curve itself.
    pub fn step_span(&self, v0: f64, mode: i8, ua: f64, ue: f64) -> Stepped {
        self.span_with(&self.tracking(), v0, mode, ua, ue)
    }

    /// [`SlewStep::step_span`] on the tracking curve `t`.
    #[inline]
    fn span_with(&self, t: &[f64; DEG + 1], v0: f64, mode: i8, ua: f64, ue: f64) -> Stepped {
        let r = self.srh;
        let leak = self.kh * self.eps;
        let cv0 = |u: f64| t[0] + u * (t[1] + u * (t[2] + u * (t[3] + u * t[4])));
        // The curve the output tracks: through the state when the step starts tracking (the
        // previous steps hold it to within their transient), the tracking curve otherwise.
        let shift = if mode == 0 { v0 - cv0(ua) } else { 0.0 };
        let cv = |u: f64| cv0(u) + shift;
        let cs = |u: f64| t[1] + u * (2.0 * t[2] + u * (3.0 * t[3] + 4.0 * t[4] * u));
        let cc = |u: f64| 2.0 * t[2] + u * (6.0 * t[3] + 12.0 * t[4] * u);
        let mut out = Stepped::default();
        let mut u = ua;
        let mut v = v0;
        let mut mode = mode;
        // the ramp's slope (volts per step) and whether it just left the curve at `u`
        let mut ramp = f64::from(mode) * r - leak * v0;
        let mut fresh = false;
        for _ in 0..MAX_CORNERS {
            if mode == 0 {
                // first x in [u, 1) where the curve's slope reaches a ramp's
                let vu = cv(u);
                let rho = |s: f64| s * r - leak * vu;
                let s0 = cs(u);
                let next = if s0 > rho(1.0) {
                    Some((1i8, u))
                } else if s0 < rho(-1.0) {
                    Some((-1i8, u))
                } else {
                    let mut best: Option<(i8, f64)> = None;
                    for sg in [1i8, -1i8] {
                        // cs(x) = rho, the cubic term's chord over [0, 1]
                        let rs = rho(f64::from(sg));
                        let x = first_root(3.0 * t[3], 2.0 * t[2] + 4.0 * t[4], t[1] - rs, u, ue)
                            .map(|x| polish(|x| (cs(x) - rs, cc(x)), x, u, ue));
                        if let Some(x) = x {
                            if x < ue && best.is_none_or(|(_, bx)| x < bx) {
                                best = Some((sg, x));
                            }
                        }
                    }
                    best
                };
                let Some((s, x)) = next else {
                    out.v = cv(ue);
                    out.mode = 0;
                    out.slope = cs(ue);
                    out.curv = cc(ue);
                    return out;
                };
                v = cv(x);
                ramp = rho(f64::from(s));
                out.push(x, ramp - cs(x), -cc(x));
                u = x;
                mode = s;
                fresh = true;
            } else {
                let s = f64::from(mode);
                // gap between the curve and the ramp, sum_k g_k y^k at x = u + y; slewing
                // towards the curve while s gap > 0, the ramp meets it at the first root
                let span = ue - u;
                let g4 = t[4];
                let g3 = t[3] + 4.0 * t[4] * u;
                let g2 = 0.5 * cc(u);
                let g1 = cs(u) - ramp;
                let s2 = span * span;
                let y = if fresh {
                    // the ramp leaves the curve at u (g0 = 0): a root of gap / y
                    if s * g1 < 0.0 {
                        Some(0.0)
                    } else {
                        reaches(g3, g2 + g4 * s2, g1, span, s)
                            .then(|| first_root(g3, g2 + g4 * s2, g1, 0.0, span))
                            .flatten()
                            .map(|y| {
                                let f = |y: f64| {
                                    (
                                        g1 + y * (g2 + y * (g3 + y * g4)),
                                        g2 + y * (2.0 * g3 + 3.0 * g4 * y),
                                    )
                                };
                                polish(f, y, 0.0, span)
                            })
                    }
                } else {
                    let g0 = cv(u) - v;
                    if s * g0 <= 0.0 {
                        Some(0.0)
                    } else {
                        reaches(g2, g1 + (g3 + g4 * span) * s2, g0, span, s)
                            .then(|| first_root(g2, g1 + (g3 + g4 * span) * s2, g0, 0.0, span))
                            .flatten()
                            .map(|y| {
                                let f = |y: f64| {
                                    (
                                        g0 + y * (g1 + y * (g2 + y * (g3 + y * g4))),
                                        g1 + y * (2.0 * g2 + y * (3.0 * g3 + 4.0 * g4 * y)),
                                    )
                                };
                                polish(f, y, 0.0, span)
                            })
                    }
                };
                fresh = false;
                let Some(y) = y else {
                    out.v = v + ramp * span;
                    out.mode = mode;
                    out.slope = ramp;
                    return out;
                };
                let x = u + y;
                v = cv(x);
                let after = cs(x);
                let back = -s * r - leak * v;
                if s * (after - back) < 0.0 {
                    // the curve runs away the other way faster than the slew rate
                    out.push(x, back - ramp, 0.0);
                    ramp = back;
                    mode = -mode;
                    fresh = true;
                } else {
                    out.push(x, after - ramp, cc(x));
                    mode = 0;
                }
                u = x;
            }
        }
        // corner budget spent: finish the step in the current mode
        if mode == 0 {
            out.v = cv(ue);
            out.slope = cs(ue);
            out.curv = cc(ue);
        } else {
            out.v = v + ramp * (ue - u);
            out.slope = ramp;
        }
        out.mode = mode;
        out
    }
}

impl Swing {
    /// An op-amp's output swing (its clamp's limits) and its state's hold.
    pub fn pair(lo: f64, hi: f64, state_lo: f64, state_hi: f64) -> (Swing, Swing) {
        (
            Swing { lo, hi },
            Swing {
                lo: state_lo,
                hi: state_hi,
            },
        )
    }
}

/// A reversing op-amp's step through its edges, for both engines: the step in which V+
/// leaves the input range `(cl, ch)` ramps at the slew rate from the instant it crosses the
/// range's end ([`crossing`], on V+ at the two samples before, `vph`, and now, `vp`), held
/// at the rail while reversed; the step in which it comes back ramps toward the target from
/// that instant. `was`: reversed after the previous step; `ret`: the previous step returned
/// from a reversal and still ramped ([`Stepped::ret`]); `mode` that step's; `sw` the
/// output swing, `hold` the state's limits. `None` when the loop is not stiff or the step
/// has no edge.
#[allow(clippy::too_many_arguments)]
pub fn reversal_step(
    ev: &SlewStep,
    (cl, ch): (f64, f64),
    was: bool,
    ret: bool,
    vph: [f64; 2],
    vp: f64,
    v0: f64,
    mode: i8,
    sw: Swing,
    hold: Swing,
) -> Option<Stepped> {
    if ev.kh * (ev.b + ev.eps) < STIFF {
        return None;
    }
    let on = ev.f <= 0.0;
    let [vp2, vp1] = vph;
    let low = vp + vp1 < cl + ch || vp1.is_nan() && vp < 0.5 * (cl + ch);
    let m = |x: f64| if low { x - cl } else { ch - x };
    let u = || crossing([m(vp2), m(vp1), m(vp)]);
    let mut full = *ev;
    full.f = 1.0;
    match (was, on) {
        (false, true) => Some(full.enter_reversal(v0, mode, u(), sw, hold)),
        (true, true) if mode != 0 => Some(ev.reversed(v0, mode, sw)),
        (true, false) => Some(full.leave_reversal(v0, mode, u(), sw, hold)),
        (false, false) => {
            // a dip below the range between two samples inside it
            if !vp2.is_nan() {
                if let Some((ua, ub)) = dip_roots([m(vp2), m(vp1), m(vp)]) {
                    return Some(full.dip(v0, mode, ua, ub, sw, hold));
                }
            }
            if mode == 0 {
                return None;
            }
            full.from_rail(v0, mode, sw, hold).or_else(|| {
                if ret {
                    full.into_rail(v0, mode, sw)
                } else {
                    None
                }
            })
        }
        _ => None,
    }
}

/// The two instants `(ua, ub)` in `(0, 1)` where the input margin of a reversing stage dips
/// below zero and comes back within one step from sample `n - 1` to `n`, both samples
/// inside the range: the roots of the quadratic through the margin at `n - 2`, `n - 1`,
/// `n` (as [`crossing`]), when it is convex with its lowest point inside the step and below
/// zero; `None` otherwise.
pub fn dip_roots(m: [f64; 3]) -> Option<(f64, f64)> {
    let [m2, m1, m0] = m;
    if !(m1 > 0.0 && m0 > 0.0) {
        return None;
    }
    let a1 = 0.5 * (m0 - m2);
    let a2 = 0.5 * (m0 - 2.0 * m1 + m2);
    if a2.is_nan() || a2 <= 0.0 {
        return None;
    }
    let um = -a1 / (2.0 * a2);
    if !(um > 0.0 && um < 1.0) || m1 + um * (a1 + um * a2) >= 0.0 {
        return None;
    }
    let ua = first_root(a2, a1, m1, 0.0, um)?;
    let ub = first_root(a2, a1, m1, um, 1.0)?;
    (ua < ub).then_some((ua, ub))
}

/// Where the input margin of a reversing stage (V+ less the end of its input range, positive
/// inside) crosses zero within the step from sample `n - 1` to `n`, from its values at
/// `n - 2`, `n - 1`, `n`: the first root in `(0, 1]` of the quadratic through them (the
/// target's model where five samples do not look smooth, [`SlewStep::target`]), else of the
/// line through the last two, else the end of the step.
pub fn crossing(m: [f64; 3]) -> f64 {
    let [m2, m1, m0] = m;
    let a1 = 0.5 * (m0 - m2);
    let a2 = 0.5 * (m0 - 2.0 * m1 + m2);
    if let Some(u) = first_root(a2, a1, m1, 0.0, 1.0) {
        return u;
    }
    let u = m1 / (m1 - m0);
    if u.is_finite() {
        u.clamp(0.0, 1.0)
    } else {
        1.0
    }
}

/// The limits a reversal edge runs into: the output swing (where the output's slope corner
/// is) and the state's hold (a margin beyond it).
#[derive(Debug, Clone, Copy)]
pub struct Swing {
    /// Output swing, V.
    pub lo: f64,
    /// See [`Swing::lo`].
    pub hi: f64,
}

impl SlewStep {
    /// The slope of a ramp at the slew rate in direction `s` from `v`, volts per step.
    #[inline]
    pub fn ramp(&self, s: f64, v: f64) -> f64 {
        s * self.srh - self.kh * self.eps * v
    }

    /// The corner where a ramp of slope `r` from `v` at `u` reaches the swing, if it does
    /// within `(u, 1]` from inside it.
    fn swing_corner(out: &mut Stepped, v: f64, u: f64, r: f64, sw: Swing) {
        let lim = if r > 0.0 { sw.hi } else { sw.lo };
        if (lim - v) * r > 0.0 && v >= sw.lo && v <= sw.hi {
            let x = u + (lim - v) / r;
            if x <= 1.0 {
                out.push(x, -r, 0.0);
            }
        }
    }

    /// The output's corners while the state ramps with slope `r` from `v` at `u` to the
    /// step's end: where it enters the swing from past a rail (the output leaves the rail),
    /// then where it reaches the other end ([`SlewStep::swing_corner`]). A state past a rail
    /// and moving away from it leaves the output flat.
    fn ramp_corners(out: &mut Stepped, v: f64, u: f64, r: f64, sw: Swing) {
        let (mut v, mut u) = (v, u);
        let lim = if v < sw.lo && r > 0.0 {
            Some(sw.lo)
        } else if v > sw.hi && r < 0.0 {
            Some(sw.hi)
        } else {
            None
        };
        if let Some(lim) = lim {
            let x = u + (lim - v) / r;
            if x > 1.0 || x.is_nan() {
                return;
            }
            out.push(x, r, 0.0);
            (v, u) = (lim, x);
        }
        Self::swing_corner(out, v, u, r, sw);
    }

    /// The step in which the loop turns positive at `u0` (the input leaves its range, the
    /// reversal factor crosses zero): up to `u0` the stage as in [`SlewStep::step`] (this
    /// step's `f` the factor before the crossing), from `u0` a ramp at the slew rate away
    /// from the target. The direction is that of the error voltage the reversed factor
    /// multiplies: `-sign(p - b v)`, which while tracking is the sign of the lag, `-sign(p')`
    /// (the finite gain's offset `p eps / G` decides a target at rest). Corners: the ramp's
    /// start (slope and second derivative) and, if it gets there within the step, the swing.
    /// [`Stepped::mode`] is the ramp's direction.
    pub fn enter_reversal(&self, v0: f64, mode: i8, u0: f64, sw: Swing, hold: Swing) -> Stepped {
        let mut out = self.step_span(v0, mode, 0.0, u0);
        // (the state saturates at its hold: a target past the rail moves it no further)
        let vu = out.v.clamp(hold.lo, hold.hi);
        let s = if out.mode != 0 {
            -f64::from(out.mode)
        } else {
            let c = self.target();
            let dp = c[1] + u0 * (2.0 * c[2] + u0 * (3.0 * c[3] + 4.0 * c[4] * u0));
            let pu = c[0] + u0 * (c[1] + u0 * (c[2] + u0 * (c[3] + u0 * c[4])));
            if dp != 0.0 {
                -dp.signum()
            } else if pu * self.eps != 0.0 {
                -(pu * self.eps).signum()
            } else {
                1.0
            }
        };
        let r = self.ramp(s, vu);
        if vu >= sw.lo && vu <= sw.hi {
            out.push(u0, r - out.slope, -out.curv);
        }
        // (from a state past a rail, the output is flat there until the ramp brings the
        // state back inside the swing)
        Self::ramp_corners(&mut out, vu, u0, r, sw);
        out.v = vu + r * (1.0 - u0);
        out.mode = s as i8;
        out.slope = r;
        out.curv = 0.0;
        out
    }

    /// A step wholly reversed, ramping in direction `mode` from the state `v0` (held at the
    /// state's limit once there): the swing's corner if the ramp reaches it.
    pub fn reversed(&self, v0: f64, mode: i8, sw: Swing) -> Stepped {
        let r = self.ramp(f64::from(mode), v0);
        let mut out = Stepped::default();
        Self::ramp_corners(&mut out, v0, 0.0, r, sw);
        out.v = v0 + r;
        out.mode = mode;
        out.slope = r;
        out
    }

    /// A step that starts with the state past the swing, slewing in direction `mode` back
    /// toward it (the return from a reversal found the swing only after its own step): the
    /// corner where the output leaves the rail, then the stable loop, as
    /// [`SlewStep::leave_reversal`] from the start of the step; `None` when the state is not
    /// past the swing or moves away from it.
    pub fn from_rail(&self, v0: f64, mode: i8, sw: Swing, hold: Swing) -> Option<Stepped> {
        let toward = (v0 > sw.hi && mode < 0) || (v0 < sw.lo && mode > 0);
        toward.then(|| self.leave_reversal(v0, 0, 0.0, sw, hold))
    }

    /// A step that ramps in direction `mode` from inside the swing into a rail (the ramp
    /// after a reversal, on its way to the other rail): the plain ramp, with the output's
    /// corner where it reaches the swing and none after it; a ramp that has not reached
    /// the swing by the step's end is the step as it is, still returning
    /// ([`Stepped::ret`]: the next step takes the corner); `None` when the step ends
    /// tracking without reaching the swing (the stage's usual step), or starts outside
    /// it.
    pub fn into_rail(&self, v0: f64, mode: i8, sw: Swing) -> Option<Stepped> {
        if !(v0 >= sw.lo && v0 <= sw.hi) {
            return None;
        }
        let rest = self.step_span(v0, mode, 0.0, 1.0);
        let r = self.ramp(f64::from(mode), v0);
        let mut out = Stepped::default();
        if !Self::rest_to_rail(&mut out, &rest, v0, 0.0, r, sw) {
            // not there by the step's end: the ramp goes on (the next step continues the
            // return), else the stage's usual step
            if rest.mode == 0 {
                return None;
            }
            let mut out = rest;
            out.ret = true;
            return Some(out);
        }
        out.v = rest.v;
        out.mode = rest.mode;
        out.slope = rest.slope;
        out.curv = rest.curv;
        out.ret = rest.mode != 0;
        Some(out)
    }

    /// The corners of `rest`, a span that starts at `ua` from `va` inside the swing with a
    /// ramp of slope `r`, as the output sees them: where the ramp reaches the swing before
    /// any corner of its own, the output's corner there and none after (the state then
    /// runs on past the rail, its corners hidden by the clamp). True when the ramp reaches
    /// the swing within the step (else `rest`'s corners as they are).
    fn rest_to_rail(
        out: &mut Stepped,
        rest: &Stepped,
        va: f64,
        ua: f64,
        r: f64,
        sw: Swing,
    ) -> bool {
        let lim = if r > 0.0 { sw.hi } else { sw.lo };
        let x = ua + (lim - va) / r;
        let cut = x > ua && x <= 1.0 && rest.corners[..rest.n].iter().all(|c| c.u >= x);
        if cut {
            out.push(x, -r, 0.0);
        } else {
            for c in &rest.corners[..rest.n] {
                out.push(c.u, c.d, c.c);
            }
        }
        cut
    }

    /// The step in which the loop turns negative again at `u1` (the input is back in its
    /// range): the reversed ramp in direction `mode` (`0`: none) from the state `v0` up to
    /// `u1`, the state held within `hold` (the state's limits), then the stable loop from
    /// the value reached, slewing toward the target, through [`SlewStep::step_span`] (this
    /// step's `f` the factor after the crossing). The output leaves the swing where the
    /// state's ramp passes it. Corners: every slope change of the output within the step.
    pub fn leave_reversal(&self, v0: f64, mode: i8, u1: f64, sw: Swing, hold: Swing) -> Stepped {
        let mut out = Stepped::default();
        let inside = |v: f64| v >= sw.lo && v <= sw.hi;
        // up to u1
        let (v1, before) = if mode == 0 {
            (v0, 0.0)
        } else {
            let r = self.ramp(f64::from(mode), v0);
            // (from a state past a rail: where the ramp brings it inside the swing, then
            // where it reaches the other end; those up to u1)
            let mut pre = Stepped::default();
            Self::ramp_corners(&mut pre, v0, 0.0, r, sw);
            for c in pre.corners[..pre.n].iter().filter(|c| c.u <= u1) {
                out.push(c.u, c.d, c.c);
            }
            let v1 = (v0 + r * u1).clamp(hold.lo, hold.hi);
            (v1, if inside(v1) { r } else { 0.0 })
        };
        self.leave_from(&mut out, v1, before, u1, sw);
        out
    }

    /// The stable loop from `u1` on, the state `v1` there and the output's slope before it
    /// `before` (the reversed ramp's, or 0 at a rail), slewing toward the target: the rest
    /// of [`SlewStep::leave_reversal`] (and of [`SlewStep::dip`]), its corners after those
    /// already in `out`.
    fn leave_from(&self, out: &mut Stepped, v1: f64, before: f64, u1: f64, sw: Swing) {
        let inside = |v: f64| v >= sw.lo && v <= sw.hi;
        let t = self.tracking();
        let target = t[0] + u1 * (t[1] + u1 * (t[2] + u1 * (t[3] + u1 * t[4])));
        let s: i8 = if target > v1 { 1 } else { -1 };
        let r1 = self.ramp(f64::from(s), v1);
        let (ua, va) = if inside(v1) {
            out.push(u1, r1 - before, 0.0);
            (u1, v1)
        } else {
            let lim = if v1 > sw.hi { sw.hi } else { sw.lo };
            let ul = u1 + (lim - v1) / r1;
            // past the step (the next one finds it, [`SlewStep::from_rail`]), or the state
            // moving away from the swing: the output stays at the rail
            if ul >= 1.0 || ul.is_nan() || ul < u1 {
                out.v = v1 + r1 * (1.0 - u1);
                out.mode = s;
                out.slope = r1;
                out.ret = true;
                return;
            }
            out.push(ul, r1, 0.0);
            (ul, lim)
        };
        let rest = self.step_span(va, s, ua, 1.0);
        // (a ramp that reaches the other rail within the step: its corner there)
        Self::rest_to_rail(out, &rest, va, ua, r1, sw);
        out.v = rest.v;
        out.mode = rest.mode;
        out.slope = rest.slope;
        out.curv = rest.curv;
        out.ret = rest.mode != 0;
    }

    /// A step in which the input leaves its range at `ua` and is back at `ub` (`ua < ub`,
    /// inside the step: a dip shorter than a step, between two samples inside the range):
    /// [`SlewStep::enter_reversal`] up to `ub` (its corners after `ub` dropped, the state
    /// held within `hold`), then the stable loop from there as [`SlewStep::leave_reversal`]
    /// takes it after its crossing. Without it such a dip is not seen at all, while a finer
    /// step renders the output's pulse toward the other rail.
    pub fn dip(&self, v0: f64, mode: i8, ua: f64, ub: f64, sw: Swing, hold: Swing) -> Stepped {
        let inside = |v: f64| v >= sw.lo && v <= sw.hi;
        let e = self.enter_reversal(v0, mode, ua, sw, hold);
        let mut out = Stepped::default();
        for c in e.corners[..e.n].iter().filter(|c| c.u <= ub) {
            out.push(c.u, c.d, c.c);
        }
        // the ramp from `ua`: the state at `ua` (held), and its slope
        let r = e.slope;
        let vu = e.v - r * (1.0 - ua);
        let v1 = (vu + r * (ub - ua)).clamp(hold.lo, hold.hi);
        self.leave_from(&mut out, v1, if inside(v1) { r } else { 0.0 }, ub, sw);
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The same model integrated by brute force: a hard slew limiter of the tracking curve
    /// (`v' = clamp(T' + g (T - v), -SR, SR)`, `g` half the sub-step rate) by explicit Euler
    /// at 200 000 sub-steps [D].
    fn brute(s: &SlewStep, v0: f64, mode: i8) -> f64 {
        let t = s.tracking();
        let n = 200_000;
        let dt = 1.0 / n as f64;
        let mut v = v0;
        let _ = mode;
        for i in 0..n {
            let u = i as f64 * dt;
            let tv = t[0] + u * (t[1] + u * (t[2] + u * (t[3] + u * t[4])));
            let ts = t[1] + u * (2.0 * t[2] + u * (3.0 * t[3] + 4.0 * t[4] * u));
            let want = ts + 0.5 / dt * (tv - v);
            v += want.clamp(-s.srh, s.srh) * dt;
        }
        v
    }

    fn step_of(p: [f64; 5]) -> SlewStep {
        SlewStep {
            p,
            f: 1.0,
            b: 1.0,
            eps: 0.0,
            kh: 1e4,
            srh: 0.6,
        }
    }

    /// Corner `c` is at `u` with slope change `d`, within `tol`.
    fn corner_at(c: &Corner, u: f64, d: f64, tol: f64) {
        assert!(
            (c.u - u).abs() < tol && (c.d - d).abs() < tol,
            "{c:?}: want {u} {d}"
        );
    }

    // A reversal that starts with the state past a rail: the output is flat at the rail
    // until the slew-rate ramp brings the state back inside the swing, then ramps to the
    // other end. Its corners are where the straight line of the state crosses each end of
    // the swing (line crossings: x = u0 + (limit - v) / r).
    #[test]
    fn reversal_from_past_a_rail_has_the_outputs_corners() {
        let s = step_of([-0.5; 5]);
        let sw = Swing { lo: -0.1, hi: 0.1 };
        let (u0, v0) = (0.2, -0.2);
        let r = s.srh;
        let out = s.enter_reversal(v0, 0, u0, sw, Swing { lo: -0.3, hi: 0.3 });
        assert_eq!(out.n, 2, "{:?}", &out.corners[..out.n]);
        let x1 = u0 + (sw.lo - v0) / r;
        let x2 = x1 + (sw.hi - sw.lo) / r;
        corner_at(&out.corners[0], x1, r, 1e-12);
        corner_at(&out.corners[1], x2, -r, 1e-12);
        // a state past the rail and moving away: the output stays flat, no corner
        let away = s.reversed(-0.2, -1, sw);
        assert_eq!(away.n, 0);
    }

    // A dip below the range between two samples inside it: the margin quadratic through
    // m(-1) = 3, m(0) = 1, m(1) = 1 is m(u) = 1 - u + u^2, convex with its lowest point
    // at u = 1/2, m = 3/4 > 0: no dip; through 1.3, 0.1, 0.1 it is 0.1 - 0.6 u + 0.6 u^2,
    // lowest -0.05 at u = 1/2, roots (0.6 -+ sqrt(0.36 - 0.24)) / 1.2 (the quadratic
    // formula).
    #[test]
    fn dip_roots_of_the_margin_quadratic() {
        assert_eq!(dip_roots([3.0, 1.0, 1.0]), None);
        let (ua, ub) = dip_roots([1.3, 0.1, 0.1]).expect("a dip");
        let d = (0.36f64 - 0.24).sqrt();
        assert!((ua - (0.6 - d) / 1.2).abs() < 1e-12, "{ua}");
        assert!((ub - (0.6 + d) / 1.2).abs() < 1e-12, "{ub}");
        // a sample outside the range: a crossing, not a dip
        assert_eq!(dip_roots([1.3, -0.1, 0.1]), None);
    }

    // A dip from a state held past the lower rail: the output leaves the rail where the
    // ramp (from the hold, at the slew rate) crosses the swing's lower end, turns at `ub`
    // (the slope changes by twice the ramp's), and is back at the rail where the ramp down
    // crosses it again (line crossings, as above); the state's corner past the rail is not
    // the output's.
    #[test]
    fn dip_throws_a_pulse_between_its_roots() {
        let s = step_of([-3.0; 5]);
        let sw = Swing { lo: -0.2, hi: 0.2 };
        let hold = Swing { lo: -0.3, hi: 0.3 };
        let (ua, ub) = (0.2, 0.4);
        let out = s.dip(-0.3, 0, ua, ub, sw, hold);
        let r = s.ramp(1.0, -0.3);
        let x1 = ua + (sw.lo + 0.3) / r;
        let peak = -0.3 + r * (ub - ua);
        let rd = s.ramp(-1.0, peak);
        let x3 = ub + (sw.lo - peak) / rd;
        assert!(x3 < 1.0, "back at the rail within the step: {x3}");
        assert_eq!(out.n, 3, "{:?}", &out.corners[..out.n]);
        corner_at(&out.corners[0], x1, r, 1e-9);
        corner_at(&out.corners[1], ub, rd - r, 1e-9);
        corner_at(&out.corners[2], x3, -rd, 1e-9);
    }

    // A return whose reversed ramp starts from a state past the lower rail (the step after
    // the one that entered the reversal, its ramp not yet out of the hold): the output
    // leaves the rail where the ramp crosses the swing's lower end, turns at `u1`, and
    // stops at the lower rail again (line crossings). Without the first corner the pulse's
    // correction was short of one corner (the averaging summer's `sag` pulses).
    #[test]
    fn return_from_past_a_rail_has_the_outputs_corners() {
        let s = step_of([-3.0; 5]);
        let sw = Swing { lo: -0.2, hi: 0.2 };
        let hold = Swing { lo: -0.3, hi: 0.3 };
        let (v0, u1) = (-0.25, 0.3);
        let out = s.leave_reversal(v0, 1, u1, sw, hold);
        let r = s.ramp(1.0, v0);
        let x1 = (sw.lo - v0) / r;
        let v1 = v0 + r * u1;
        let rd = s.ramp(-1.0, v1);
        let x3 = u1 + (sw.lo - v1) / rd;
        assert_eq!(out.n, 3, "{:?}", &out.corners[..out.n]);
        corner_at(&out.corners[0], x1, r, 1e-9);
        corner_at(&out.corners[1], u1, rd - r, 1e-9);
        corner_at(&out.corners[2], x3, -rd, 1e-9);
    }

    // In the samples around an edge only the corners the output shows are corrected: a
    // step that slews down from inside the swing and meets its target past the lower rail
    // has that corner dropped; the same step with a target inside keeps it.
    #[test]
    fn visible_drops_the_corners_past_a_rail() {
        let sw = Swing { lo: -0.2, hi: 0.2 };
        let past = step_of([-0.5; 5]);
        let r = past.step(-0.1, -1);
        assert_eq!(r.n, 1, "{:?}", &r.corners[..r.n]);
        assert_eq!(past.visible(&r, sw).n, 0);
        let inside = step_of([-0.15; 5]);
        let r = inside.step(0.1, -1);
        assert_eq!(r.n, 1, "{:?}", &r.corners[..r.n]);
        assert_eq!(inside.visible(&r, sw).n, 1);
    }

    // The return from a reversal held at the upper rail onto a target past the lower one:
    // the output leaves the upper rail, then stops at the lower one; the state's own
    // corners beyond that (where it meets the target past the rail) are hidden by the
    // clamp. The next step's ramp from inside the swing into the rail has its corner too.
    #[test]
    fn return_from_a_reversal_stops_at_the_other_rail() {
        let s = step_of([-3.0; 5]);
        let sw = Swing { lo: -0.2, hi: 0.2 };
        let hold = Swing { lo: -0.3, hi: 0.3 };
        let u1 = 0.1;
        let out = s.leave_reversal(0.3, 1, u1, sw, hold);
        let r = s.ramp(-1.0, 0.3);
        let xa = u1 + (sw.hi - 0.3) / r;
        let xb = xa + (sw.lo - sw.hi) / r;
        assert!(
            xb < 1.0,
            "the ramp reaches the lower rail within the step: {xb}"
        );
        assert_eq!(out.n, 2, "{:?}", &out.corners[..out.n]);
        corner_at(&out.corners[0], xa, r, 1e-9);
        corner_at(&out.corners[1], xb, -r, 1e-9);
        // from inside the swing, ramping down into the lower rail
        let v0 = -0.1;
        let into = s.into_rail(v0, -1, sw).expect("a ramp into the rail");
        let r = s.ramp(-1.0, v0);
        assert_eq!(into.n, 1);
        let x = (sw.lo - v0) / r;
        corner_at(&into.corners[0], x, -r, 1e-9);
    }

    // End values against a brute-force slew limiter of the same tracking curve: onset inside
    // the step, catch-up then tracking, catch-up then the other ramp, a pure ramp [D].
    #[test]
    fn end_value_matches_a_fine_step_slew_limiter() {
        let cases: [([f64; 5], f64, i8); 8] = [
            ([-0.9, -0.3, 0.0, 0.5, 1.3], 0.5, 0), // slope rises through the slew rate
            ([0.0, 0.0, 0.0, 0.0, 0.0], 0.4, -1),  // ramp down onto a flat target
            ([3.2, 3.2, 3.0, 2.6, 2.0], 2.3, 1),   // ramp up meets a falling target, turns back
            ([-4.0, -2.0, 0.0, 2.0, 4.0], 0.0, 1), // far behind: a full ramp
            ([-0.9, -0.3, 0.0, 0.2, 0.3], 0.15, 1), // catch-up then tracking
            ([1.5, 0.6, 0.0, 0.5, 1.3], 0.5, 0),   // a cubic target: slope through the slew rate
            ([0.6, 2.0, 3.0, 2.6, 2.0], 2.3, 1),   // a cubic target: the ramp turns back
            ([0.0, 2.0, 3.0, 2.6, 2.0], 2.3, 1),   // a quartic target: the ramp turns back
        ];
        for (p, v0, mode) in cases {
            let s = step_of(p);
            let got = s.step(v0, mode);
            let want = brute(&s, v0, mode);
            assert!(
                (got.v - want).abs() < 2e-4,
                "{p:?} {v0} {mode}: {} vs {want}",
                got.v
            );
        }
    }

    // The target interpolates the five samples (Lagrange's form written out as the plain
    // reference, textbook) and the tracking curve is the loop's particular solution: `T +
    // T' / (k G) = (f / G) P` at every point of the step (for a polynomial target the
    // particular solution is the finite series of its derivatives, textbook) [D].
    #[test]
    fn quartic_target_and_its_tracking_curve() {
        let s = SlewStep {
            p: [0.0; 5],
            f: 0.8,
            b: 0.5,
            eps: 1e-4,
            kh: 30.0,
            srh: 0.6,
        };
        // samples of a slow quartic (smooth enough for the quartic target)
        let poly = |u: f64| 0.2 + 0.5 * u - 0.3 * u * u + 0.04 * u * u * u - 0.01 * u.powi(4);
        let p: [f64; 5] = [-3.0, -2.0, -1.0, 0.0, 1.0].map(poly);
        let s = SlewStep { p, ..s };
        let lagrange = |u: f64| {
            let nodes = [-3.0, -2.0, -1.0, 0.0, 1.0];
            (0..5)
                .map(|i| {
                    let mut w = 1.0;
                    for j in 0..5 {
                        if j != i {
                            w *= (u - nodes[j]) / (nodes[i] - nodes[j]);
                        }
                    }
                    w * p[i]
                })
                .sum::<f64>()
        };
        let c = s.target();
        let ev = |u: f64| c.iter().rev().fold(0.0, |a, &ck| a * u + ck);
        for k in 0..=40 {
            let u = -3.0 + 0.1 * f64::from(k);
            assert!((ev(u) - lagrange(u)).abs() < 1e-12, "{u}");
            assert!((ev(u) - poly(u)).abs() < 1e-12, "{u}");
        }
        let t = s.tracking();
        let tr = s.tracking_reference();
        for k in 0..=DEG {
            assert!(
                (t[k] - tr[k]).abs() < 1e-13 * (1.0 + tr[k].abs()),
                "{k}: {t:?} {tr:?}"
            );
        }
        let g = s.f * s.b + s.eps;
        // the reference is the particular solution
        for k in 0..=10 {
            let u = 0.1 * f64::from(k);
            let tv = tr.iter().rev().fold(0.0, |a, &tk| a * u + tk);
            let ts = (1..=DEG).rev().fold(0.0, |a, j| a * u + j as f64 * tr[j]);
            let lhs = tv + ts / (s.kh * g);
            assert!((lhs - s.f / g * ev(u)).abs() < 1e-12, "{u}");
        }
    }

    // A corner of the input (a tone starting from rest: samples at zero, then a sine) takes
    // the quadratic through the last three samples; a sine at 20 kHz and K = 4 (0.65 rad per
    // sample) is smooth enough for the quartic at every phase [D].
    #[test]
    fn the_quartic_only_where_the_samples_look_smooth() {
        let w = std::f64::consts::TAU * 20e3 / 192e3;
        let mk = |p: [f64; 5]| SlewStep {
            p,
            f: 1.0,
            b: 1.0,
            eps: 0.0,
            kh: 20.0,
            srh: 0.5,
        };
        for k in 0..100 {
            let ph = f64::from(k) * 0.0628;
            let p: [f64; 5] = [0.0, 1.0, 2.0, 3.0, 4.0].map(|j: f64| 5.0 * (ph + j * w).sin());
            let c = mk(p).target();
            let d4 = (p[0] - 4.0 * p[1] + 6.0 * p[2] - 4.0 * p[3] + p[4]) / 24.0;
            assert!((c[4] - d4).abs() < 1e-12 && d4 != 0.0, "{ph}");
        }
        for lead in 1..=3 {
            let mut p = [0.0; 5];
            for j in 0..lead {
                p[4 - j] = 5.0 * (f64::from((lead - j) as u32) * 0.16).sin();
            }
            let c = mk(p).target();
            let a1 = 0.5 * (p[4] - p[2]);
            let a2 = 0.5 * (p[4] - 2.0 * p[3] + p[2]);
            assert_eq!(c, [p[3], a1, a2, 0.0, 0.0], "{lead}");
        }
    }

    // The tabulated corrections equal the reference's evaluation of the truncated powers
    // (the same polynomials expanded, so to rounding) over the whole step and at the
    // pieces' ends.
    #[test]
    fn corner6_table_matches_its_reference() {
        let mut worst: f64 = 0.0;
        for k in 0..=20_000 {
            let u = k as f64 / 20_000.0;
            let (a, b) = corner6(u);
            let (ra, rb) = corner6_reference(u);
            for i in 0..SPAN {
                worst = worst.max((a[i] - ra[i]).abs()).max((b[i] - rb[i]).abs());
            }
        }
        assert!(worst < 1e-13, "{worst:e}");
    }

    // The kernel's average of a unit ramp `(t - u)+` (and of `(t - u)+^2 / 2`) at the six
    // samples around the corner equals the sample plus `corner6`, and the sample itself
    // three samples away: checked by a midpoint quadrature of the kernel's definition (the
    // quadratic B-spline written out piecewise, textbook) [D].
    #[test]
    fn corner6_is_the_kernel_average_of_a_ramp() {
        let b3 = |x: f64| {
            let a = x.abs();
            if a < 0.5 {
                0.75 - a * a
            } else if a < 1.5 {
                0.5 * (1.5 - a) * (1.5 - a)
            } else {
                0.0
            }
        };
        let kernel = |x: f64| (4.0 / 3.0) * b3(x) - (1.0 / 3.0) * 0.5 * b3(0.5 * x);
        let m = 120_000;
        let avg = |n: f64, u: f64, pw: i32| {
            (0..m)
                .map(|i| {
                    let x = -3.0 + (i as f64 + 0.5) * 6.0 / m as f64;
                    let r = (n + x - u).max(0.0);
                    kernel(x) * r.powi(pw) / f64::from(pw) * 6.0 / m as f64
                })
                .sum::<f64>()
        };
        for u in [0.0, 0.1, 0.37, 0.5, 0.93, 1.0] {
            let (a, b) = corner6(u);
            for (j, n) in [-2.0, -1.0, 0.0, 1.0, 2.0, 3.0].into_iter().enumerate() {
                let r = (n - u).max(0.0);
                let got = avg(n, u, 1) - r;
                assert!((got - a[j]).abs() < 1e-8, "u {u} n {n}: {got} vs {}", a[j]);
                let got = avg(n, u, 2) - 0.5 * r * r;
                assert!((got - b[j]).abs() < 1e-8, "u {u} n {n}: {got} vs {}", b[j]);
            }
            assert!((avg(4.0, u, 1) - (4.0 - u)).abs() < 1e-8, "{u}");
            assert!(avg(-3.0, u, 1).abs() < 1e-8, "{u}");
        }
        let kernel_m = kernel;
        // no droop: the kernel's second moment is zero, so a parabola's average is itself
        let second: f64 = (0..m)
            .map(|i| {
                let x = -3.0 + (i as f64 + 0.5) * 6.0 / m as f64;
                kernel_m(x) * x * x * 6.0 / m as f64
            })
            .sum();
        assert!(second.abs() < 1e-8, "{second}");
    }
}
