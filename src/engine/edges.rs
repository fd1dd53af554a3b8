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
//!   `T(t) = (f / G) (p - p' / (k G) + p'' / (k G)^2)` (the transient decays as
//!   `exp(-k G t)`, below `exp(-STIFF)` after one step);
//! - *slewing*: a ramp at `+-SR - k eps v`.
//!
//! The output leaves the tracking curve where the curve's slope reaches the slew rate (the
//! ramp starts tangent to it: a corner of the second derivative only), and joins it again
//! where the ramp meets it (a corner of the slope: the ramp's slope against the curve's, or
//! against the opposite ramp when the curve is then steeper than the slew rate the other
//! way). The tanh rounds each corner over about `1 / (k G)` (a twentieth of a step at
//! `k G h` = 20); its in-band part is a small fixed impulse per corner, left out. The target
//! within the step is the quadratic through the last three samples of `p` (the engine's
//! first-order hold would put every slewing start on the sample grid), so the corners fall
//! where they fall between samples, and the samples at both ends of a step hold the exact
//! values of this piecewise trajectory.
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
//! harmonics of a slewing tone. The kernel here, `(4/3) tri(t) - (1/3) tri(t / 2) / 2`
//! (response `(4/3) sinc^2(f / fs) - (1/3) sinc^2(2 f / fs)`: the same double zeros at
//! every multiple of the rate, so the same attenuation of the images next to them, and a
//! second moment `(4/3)(1/6) - (1/3)(2/3) = 0`, so no droop to second order), touches four
//! samples, two on each side of the corner: [`blamp4`]. The correction is added to the
//! output only, never to the state of the loop; a step without a corner is left alone, so a
//! stage that never slews renders the same samples with and without it.

/// Smallest `k G h` for which a step's corners are taken sharp ([`SlewStep`]): the tanh's
/// rounding then spans at most a quarter of a step, and the tracking transient after one
/// step is below `exp(-4)` of the offset it starts from (and far below for real parts: about
/// 23 for a 0.7 MHz part at 192 kHz).
pub const STIFF: f64 = 4.0;

/// At most this many corners in one step (a ramp that catches up and turns back, then a
/// start of slewing, is three; more would need a target that turns within a step).
pub const MAX_CORNERS: usize = 4;

/// One step of an op-amp's loop in per-step units (times in steps, slopes in volts per
/// step), the target the quadratic through the last three samples of `p`.
#[derive(Debug, Clone, Copy)]
pub struct SlewStep {
    /// `p` at the two samples before the step and at its end (`p[n-2]`, `p[n-1]`, `p[n]`).
    pub p: [f64; 3],
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
#[derive(Debug, Clone, Copy, Default)]
pub struct Stepped {
    /// The output at the end of the step.
    pub v: f64,
    /// Slewing up (`1`), down (`-1`) or tracking (`0`) at the end of the step.
    pub mode: i8,
    /// The corners, the first [`Stepped::n`] of them in time order.
    pub corners: [Corner; MAX_CORNERS],
    /// How many corners.
    pub n: usize,
}

impl Stepped {
    fn push(&mut self, u: f64, d: f64, c: f64) {
        if self.n < MAX_CORNERS {
            self.corners[self.n] = Corner { u, d, c };
            self.n += 1;
        }
    }
}

/// The band-limited correction of a unit slope corner at distance `d` (samples, either
/// side) from the corner: the kernel average of the ramp `(t)+` less its sample, for the
/// kernel `(4/3) tri(t) - (1/3) tri(t / 2) / 2` (`tri` the unit triangle), which is
/// `(2/9) (1 - |d|)+^3 - (1/9) (1 - |d| / 2)+^3`, zero from two samples on.
#[inline]
pub fn blamp4(d: f64) -> f64 {
    let a = (1.0 - d.abs()).max(0.0);
    let b = (1.0 - 0.5 * d.abs()).max(0.0);
    (2.0 / 9.0) * a * a * a - (1.0 / 9.0) * b * b * b
}

/// The corrections of a unit slope corner at `u` in `[0, 1]` of the step from sample
/// `n - 1` to `n`, for samples `n - 2`, `n - 1`, `n` and `n + 1` ([`blamp4`]).
#[inline]
pub fn blamp(u: f64) -> [f64; 4] {
    [blamp4(1.0 + u), blamp4(u), blamp4(1.0 - u), blamp4(2.0 - u)]
}

/// `R(d)`, the triangle kernel's average of `(t)+^2 / 2` less its sample at distance `d`:
/// the running integral of the ramp's (see [`blamp4`]): `(1 + d)^4 / 24` on `[-1, 0]`,
/// `1/12 - (1 - d)^4 / 24` on `[0, 1]`, `1/12` beyond.
#[inline]
fn tri_par(d: f64) -> f64 {
    if d <= -1.0 {
        0.0
    } else if d <= 0.0 {
        let a = 1.0 + d;
        a * a * a * a / 24.0
    } else if d < 1.0 {
        let a = 1.0 - d;
        1.0 / 12.0 - a * a * a * a / 24.0
    } else {
        1.0 / 12.0
    }
}

/// The band-limited correction of a unit jump of the second derivative (`(t)+^2 / 2`) at
/// signed distance `d` (sample less corner) for the kernel of [`blamp4`]: `(4/3) R(d) -
/// (4/3) R(d / 2)` (the wide triangle's `R` scales by 4), zero from two samples on either
/// side since the kernel's second moment is zero.
#[inline]
pub fn blep2(d: f64) -> f64 {
    (4.0 / 3.0) * (tri_par(d) - tri_par(0.5 * d))
}

/// [`blep2`] for samples `n - 2`, `n - 1`, `n` and `n + 1` around a jump at `u` of the step
/// from `n - 1` to `n`.
#[inline]
pub fn blep2_at(u: f64) -> [f64; 4] {
    [blep2(-1.0 - u), blep2(-u), blep2(1.0 - u), blep2(2.0 - u)]
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

impl SlewStep {
    /// Whether the loop is stiff enough for the sharp model.
    #[inline]
    pub fn stiff(&self) -> bool {
        self.f > 0.0 && self.kh * (self.f * self.b + self.eps) >= STIFF
    }

    /// The tracking curve `T(u) = c0 + c1 u + c2 u^2` of the step.
    #[inline]
    fn tracking(&self) -> [f64; 3] {
        let [p2, p1, p0] = self.p;
        // quadratic through (-1, p2), (0, p1), (1, p0)
        let a1 = 0.5 * (p0 - p2);
        let a2 = 0.5 * (p0 - 2.0 * p1 + p2);
        let g = self.f * self.b + self.eps;
        let ff = self.f / g;
        let l = 1.0 / (self.kh * g);
        [
            ff * (p1 - l * a1 + 2.0 * l * l * a2),
            ff * (a1 - 2.0 * l * a2),
            ff * a2,
        ]
    }

    /// Whether a step starting in `mode` can hold an event: it starts slewing, or the
    /// tracking curve's slope passes the slew rate somewhere in the step (its slope is linear
    /// in time, so at an end).
    #[inline]
    pub fn eventful(&self, mode: i8) -> bool {
        if mode != 0 {
            return true;
        }
        let t = self.tracking();
        let (s0, s1) = (t[1], t[1] + 2.0 * t[2]);
        s0.abs() > self.srh || s1.abs() > self.srh
    }

    /// The step from `v0` in `mode` through the sharp model (see the module documentation).
    pub fn step(&self, v0: f64, mode: i8) -> Stepped {
        let t = self.tracking();
        let r = self.srh;
        let leak = self.kh * self.eps;
        // The curve the output tracks: through the state when the step starts tracking (the
        // previous steps hold it to within their transient), the tracking curve otherwise.
        let shift = if mode == 0 { v0 - t[0] } else { 0.0 };
        let cv = |u: f64| t[0] + shift + u * (t[1] + u * t[2]);
        let cs = |u: f64| t[1] + 2.0 * t[2] * u;
        let mut out = Stepped::default();
        let mut u = 0.0;
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
                    let m = 2.0 * t[2];
                    let mut best: Option<(i8, f64)> = None;
                    if m != 0.0 {
                        for sg in [1i8, -1i8] {
                            let x = (rho(f64::from(sg)) - t[1]) / m;
                            if x > u && x < 1.0 && best.is_none_or(|(_, bx)| x < bx) {
                                best = Some((sg, x));
                            }
                        }
                    }
                    best
                };
                let Some((s, x)) = next else {
                    out.v = cv(1.0);
                    out.mode = 0;
                    return out;
                };
                v = cv(x);
                ramp = rho(f64::from(s));
                out.push(x, ramp - cs(x), -2.0 * t[2]);
                u = x;
                mode = s;
                fresh = true;
            } else {
                let s = f64::from(mode);
                // gap between the curve and the ramp, g0 + g1 y + g2 y^2 at x = u + y; slewing
                // towards the curve while s gap > 0, the ramp meets it at the first root
                let g2 = t[2];
                let g1 = cs(u) - ramp;
                let y = if fresh {
                    // the ramp leaves the curve at u (g0 = 0): the other root
                    if s * g1 < 0.0 {
                        Some(0.0)
                    } else if g2 != 0.0 {
                        let y = -g1 / g2;
                        (y > 0.0 && y <= 1.0 - u).then_some(y)
                    } else {
                        None
                    }
                } else {
                    let g0 = cv(u) - v;
                    if s * g0 <= 0.0 {
                        Some(0.0)
                    } else {
                        first_root(g2, g1, g0, 0.0, 1.0 - u)
                    }
                };
                fresh = false;
                let Some(y) = y else {
                    out.v = v + ramp * (1.0 - u);
                    out.mode = mode;
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
                    out.push(x, after - ramp, 2.0 * t[2]);
                    mode = 0;
                }
                u = x;
            }
        }
        // corner budget spent: finish the step in the current mode
        out.v = if mode == 0 {
            cv(1.0)
        } else {
            v + ramp * (1.0 - u)
        };
        out.mode = mode;
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
            let tv = t[0] + u * (t[1] + u * t[2]);
            let ts = t[1] + 2.0 * t[2] * u;
            let want = ts + 0.5 / dt * (tv - v);
            v += want.clamp(-s.srh, s.srh) * dt;
        }
        v
    }

    fn step_of(p: [f64; 3]) -> SlewStep {
        SlewStep {
            p,
            f: 1.0,
            b: 1.0,
            eps: 0.0,
            kh: 1e4,
            srh: 0.6,
        }
    }

    // End values against a brute-force slew limiter of the same tracking curve: onset inside
    // the step, catch-up then tracking, catch-up then the other ramp, a pure ramp [D].
    #[test]
    fn end_value_matches_a_fine_step_slew_limiter() {
        let cases: [([f64; 3], f64, i8); 5] = [
            ([0.0, 0.5, 1.3], 0.5, 0),  // slope rises through the slew rate
            ([0.0, 0.0, 0.0], 0.4, -1), // ramp down onto a flat target
            ([3.0, 2.6, 2.0], 2.3, 1),  // ramp up meets a falling target, turns back
            ([0.0, 2.0, 4.0], 0.0, 1),  // far behind: a full ramp
            ([0.0, 0.2, 0.3], 0.15, 1), // catch-up then tracking
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

    // The kernel's average of a unit ramp `(t - u)+` at the samples around the corner
    // equals the sample plus `blamp`, and the sample itself two samples away: checked by a
    // midpoint quadrature of the kernel's definition [D].
    #[test]
    fn blamp_is_the_kernel_average_of_a_ramp() {
        let tri = |x: f64| (1.0 - x.abs()).max(0.0);
        let kernel = |x: f64| (4.0 / 3.0) * tri(x) - (1.0 / 3.0) * 0.5 * tri(0.5 * x);
        for u in [0.0, 0.1, 0.37, 0.5, 0.93, 1.0] {
            let avg = |n: f64| {
                let m = 200_000;
                (0..m)
                    .map(|i| {
                        let x = -2.0 + (i as f64 + 0.5) * 4.0 / m as f64;
                        kernel(x) * (n + x - u).max(0.0) * 4.0 / m as f64
                    })
                    .sum::<f64>()
            };
            let w = blamp(u);
            for (j, n) in [-1.0, 0.0, 1.0, 2.0].into_iter().enumerate() {
                let got = avg(n) - (n - u).max(0.0);
                assert!((got - w[j]).abs() < 1e-8, "u {u} n {n}: {got} vs {}", w[j]);
            }
            assert!((avg(3.0) - (3.0 - u)).abs() < 1e-8, "{u}");
            assert!(avg(-2.0).abs() < 1e-8, "{u}");
        }
        // the same for a unit jump of the second derivative, `(t - u)+^2 / 2`
        for u in [0.0, 0.25, 0.5, 0.8] {
            let avg = |n: f64| {
                let m = 200_000;
                (0..m)
                    .map(|i| {
                        let x = -2.0 + (i as f64 + 0.5) * 4.0 / m as f64;
                        let r = (n + x - u).max(0.0);
                        kernel(x) * 0.5 * r * r * 4.0 / m as f64
                    })
                    .sum::<f64>()
            };
            let w = blep2_at(u);
            for (j, n) in [-1.0, 0.0, 1.0, 2.0].into_iter().enumerate() {
                let r = (n - u).max(0.0);
                let got = avg(n) - 0.5 * r * r;
                assert!((got - w[j]).abs() < 1e-8, "u {u} n {n}: {got} vs {}", w[j]);
            }
            let r = 3.0 - u;
            assert!((avg(3.0) - 0.5 * r * r).abs() < 1e-8, "{u}");
        }
        // no droop: the kernel's second moment is zero, so a parabola's average is itself
        let m = 200_000;
        let second: f64 = (0..m)
            .map(|i| {
                let x = -2.0 + (i as f64 + 0.5) * 4.0 / m as f64;
                kernel(x) * x * x * 4.0 / m as f64
            })
            .sum();
        assert!(second.abs() < 1e-8, "{second}");
    }
}
