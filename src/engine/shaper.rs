//! The output-swing clipper and its band-limited (anti-aliased) evaluation.
//!
//! The static clipper `f` is the identity between `lo + w` and `hi - w`, constant at `lo` and
//! `hi` beyond `lo - w` and `hi + w`, and a quadratic blend of width `2 w` (the knee) in
//! between (C1, so the output reaches the limit exactly). `w = 0` is a hard clip. Its
//! residual `c(x) = f(x) - x` is a piecewise polynomial of the drive of degree at most 2.
//!
//! Band-limited evaluation at sample `k` ([`Shaper::smooth`]): around the sample the drive is
//! the quadratic through `x[k-1]`, `x[k]`, `x[k+1]`, `x(t) = x[k] + s t + q t^2` (`t` in
//! samples, `s = (x[k+1] - x[k-1]) / 2`, `q = (x[k+1] + x[k-1]) / 2 - x[k]`), and
//!
//! `y[k] = x[k] + integral over |t| < 1 of (1 - |t|) c(x(t)) dt`,
//!
//! the drive plus its clipped part smoothed by a triangle kernel one sample wide each side
//! (whose response `sinc^2` vanishes at every multiple of the internal rate, where the
//! clipped part's images would alias into the band). The kernel is split at its apex and at
//! every crossing of a piece boundary (the roots of the quadratic); on each piece the
//! integrand is a polynomial of degree at most 5, integrated exactly by three-point
//! Gauss-Legendre. Where the local drive stays in the linear region the output is the drive
//! itself, bit for bit: a correction applies only where the drive crosses a limit. For a
//! straight drive across a hard corner this is the two-point polyBLAMP correction (the
//! triangle kernel's band-limited ramp residual `(1 - |u|)^3 / 6`); the quadratic matters at
//! crests, where a straight line through a crest's neighbours crosses a rail the drive never
//! reaches (by volts at audio frequencies and K = 4). Held past a limit, the output is the
//! limit less the kernel's smoothing of the clipped part, `-q / 6` at a hard limit (millivolts
//! at audio frequencies): the in-band cost of the kernel, `1 - sinc^2(f / fs)` of the clipped
//! part. The result is bounded to the limits widened by [`GIBBS`] of the span, which only
//! drives that move by a large part of the swing within one sample reach. It needs one
//! sample of lookahead.

/// The clipper of one stage.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Shaper {
    /// Lower swing limit, V.
    pub lo: f64,
    /// Upper swing limit, V.
    pub hi: f64,
    /// Half-width of the knee, V (0: hard).
    pub w: f64,
}

/// Three-point Gauss-Legendre nodes and weights on [-1, 1] (exact for degree 5;
/// Abramowitz and Stegun 1964, table 25.4).
const GL_T: [f64; 3] = [-0.774_596_669_241_483_4, 0.0, 0.774_596_669_241_483_4];
const GL_W: [f64; 3] = [5.0 / 9.0, 8.0 / 9.0, 5.0 / 9.0];

/// How far the band-limited output may pass a limit, as a fraction of the span `hi - lo`:
/// the Gibbs overshoot of a band-limited step, `Si(pi) / pi - 1/2` = 0.0895 of the step
/// (Abramowitz and Stegun 1964, 5.2.14; common practice), for a rail-to-rail step.
pub const GIBBS: f64 = 0.0895;

/// Residual of the upper knee as a function of `u = x - (hi - w)`.
#[inline]
fn top(u: f64, w: f64) -> f64 {
    if u <= 0.0 {
        0.0
    } else if u <= 2.0 * w {
        -u * u / (4.0 * w)
    } else {
        -(u - w)
    }
}

impl Shaper {
    /// The static clipper.
    #[inline]
    pub fn apply(&self, x: f64) -> f64 {
        x + self.residual(x)
    }

    /// `f(x) - x`.
    #[inline]
    pub fn residual(&self, x: f64) -> f64 {
        let w = self.w;
        top(x - (self.hi - w), w) - top((self.lo + w) - x, w)
    }

    /// Whether `x` is at or past the start of either knee (or the hard limit).
    #[inline]
    pub fn clipping(&self, x: f64) -> bool {
        x >= self.hi - self.w || x <= self.lo + self.w
    }

    /// Whether the quadratic through `x0`, `x1`, `x2` (at t = -1, 0, 1) stays strictly inside
    /// the linear region over `|t| <= 1`, by a cheap sufficient test: on [-1, 1] the
    /// quadratic passes the largest (smallest) of its three samples by at most `|q| / 4`.
    #[inline]
    pub fn inside(&self, x0: f64, x1: f64, x2: f64) -> bool {
        let m = 0.25 * (0.5 * (x0 + x2) - x1).abs();
        (x0.min(x1).min(x2) - m > self.lo + self.w) & (x0.max(x1).max(x2) + m < self.hi - self.w)
    }

    /// Band-limited output at the sample with drive `x1`, between `x0` (one sample before)
    /// and `x2` (one sample after); see the module documentation.
    pub fn smooth(&self, x0: f64, x1: f64, x2: f64) -> f64 {
        let s = 0.5 * (x2 - x0);
        let q = 0.5 * (x0 + x2) - x1;
        let w = self.w;
        // Kernel support split at the kernel's apex and at every crossing of a boundary.
        let mut ts = [0.0f64; 11];
        ts[0] = -1.0;
        ts[1] = 0.0;
        ts[2] = 1.0;
        let mut n = 3;
        let mut crossed = false;
        let four = [self.hi - w, self.hi + w, self.lo + w, self.lo - w];
        let two = [self.hi, self.lo];
        let bounds: &[f64] = if w > 0.0 { &four } else { &two };
        for &bd in bounds {
            // roots of q t^2 + s t + (x1 - bd) in (-1, 1) (stable form)
            let c = x1 - bd;
            let mut push = |t: f64| {
                if t > -1.0 && t < 1.0 {
                    ts[n] = t;
                    n += 1;
                    crossed = true;
                }
            };
            if q == 0.0 {
                if s != 0.0 {
                    push(-c / s);
                }
                continue;
            }
            let disc = s * s - 4.0 * q * c;
            if disc < 0.0 {
                continue;
            }
            let r = -0.5 * (s + s.signum() * disc.sqrt());
            if r != 0.0 {
                push(r / q);
                push(c / r);
            } else {
                // s = 0 and c = 0: a double root at t = 0
                push(0.0);
            }
        }
        if !crossed && !self.clipping(x1) {
            return x1;
        }
        let ts = &mut ts[..n];
        ts.sort_unstable_by(f64::total_cmp);
        let mut acc = 0.0;
        for pair in ts.windows(2) {
            let (a, b) = (pair[0], pair[1]);
            if b <= a {
                continue;
            }
            let (mid, half) = (0.5 * (a + b), 0.5 * (b - a));
            for (&g, &gw) in GL_T.iter().zip(&GL_W) {
                let t = mid + half * g;
                let x = x1 + t * (s + q * t);
                acc += gw * half * (1.0 - t.abs()) * self.residual(x);
            }
        }
        let g = GIBBS * (self.hi - self.lo);
        (x1 + acc).clamp(self.lo - g, self.hi + g)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The definition evaluated by brute force: midpoint rule with many points over the
    /// kernel (an independent quadrature of the same integral) [D].
    fn direct(s: &Shaper, x0: f64, x1: f64, x2: f64) -> f64 {
        let (sl, q) = (0.5 * (x2 - x0), 0.5 * (x0 + x2) - x1);
        let n = 400_000;
        let mut acc = 0.0;
        for i in 0..n {
            let t = -1.0 + (i as f64 + 0.5) * 2.0 / n as f64;
            acc += (1.0 - t.abs()) * s.residual(x1 + t * (sl + q * t)) * 2.0 / n as f64;
        }
        let g = GIBBS * (s.hi - s.lo);
        (x1 + acc).clamp(s.lo - g, s.hi + g)
    }

    // The piecewise Gauss-Legendre integral equals a brute-force quadrature of the same
    // definition, for straight and curved drives, hard and soft knees, crossings on either
    // side of the sample [D].
    #[test]
    fn smooth_matches_direct_quadrature() {
        for w in [0.0, 0.3] {
            let s = Shaper {
                lo: -10.0,
                hi: 10.0,
                w,
            };
            for &(x0, x1, x2) in &[
                (8.7, 9.5, 10.3),
                (9.9, 10.1, 10.3),
                (7.0, 10.0, 13.0),
                (-9.4, -9.9, -10.4),
                (9.75, 9.8, 9.85),
                (10.4, 11.0, 11.6),
                (9.0, 9.9, 9.2),    // crest grazing the rail between samples
                (9.6, 10.2, 9.9),   // crest past the rail at the sample
                (10.5, 9.7, 10.6),  // valley between two clipped samples
                (-12.0, 0.0, 12.0), // both rails within one sample
            ] {
                let got = s.smooth(x0, x1, x2);
                let want = direct(&s, x0, x1, x2);
                assert!(
                    (got - want).abs() < 1e-6,
                    "w {w} ({x0}, {x1}, {x2}): {got} vs {want}"
                );
            }
        }
    }

    // A straight drive across a hard corner: the correction is the two-point polyBLAMP, i.e.
    // the triangle-kernel average of the clipped line (Esqueda, Valimaki and Bilbao,
    // "Aliasing reduction in clipped signals", IEEE Trans. Signal Processing 2016) [S].
    #[test]
    fn straight_drive_is_the_kernel_average() {
        let s = Shaper {
            lo: -10.0,
            hi: 10.0,
            w: 0.0,
        };
        for &(x, a) in &[(9.5, 0.8), (10.1, 0.2), (10.0, 3.0), (-9.9, 0.5)] {
            let n = 200_000;
            let mut acc = 0.0;
            for i in 0..n {
                let t = -1.0 + (i as f64 + 0.5) * 2.0 / n as f64;
                acc += (1.0 - t.abs()) * s.apply(x + t * a) * 2.0 / n as f64;
            }
            let got = s.smooth(x - a, x, x + a);
            assert!((got - acc).abs() < 1e-6, "x {x} a {a}: {got} vs {acc}");
        }
    }

    // In the linear region the output is the drive bit for bit, however curved the drive,
    // even where a straight line through a crest's neighbours would cross the limit; held
    // past a hard limit it is the closed form `hi - q / 6` (the triangle kernel's second
    // moment is 1/6: integral of (1 - |t|) t^2 over [-1, 1]) [D].
    #[test]
    fn one_piece_closed_forms() {
        for w in [0.0, 0.3] {
            let s = Shaper {
                lo: -10.0,
                hi: 10.0,
                w,
            };
            assert_eq!(s.smooth(2.0, 3.25, 3.0), 3.25);
            assert!(s.inside(2.0, 3.25, 3.0));
            // a crest below the knee (a straight line would reach 9.6 + 2.2)
            assert_eq!(s.smooth(5.0, 9.6, 5.2), 9.6);
        }
        let s = Shaper {
            lo: -10.0,
            hi: 10.0,
            w: 0.0,
        };
        let q: f64 = 0.5 * (13.0 + 12.0) - 15.0;
        assert!((s.smooth(13.0, 15.0, 12.0) - (10.0 - q / 6.0)).abs() < 1e-12);
        assert!((s.smooth(-13.0, -15.0, -12.0) - (-10.0 + q / 6.0)).abs() < 1e-12);
        // bounded to the limits widened by GIBBS of the span
        let g = GIBBS * 20.0;
        assert_eq!(s.smooth(-200.0, 40.0, -200.0), 10.0 + g);
    }

    // The cheap test never passes a quadratic that leaves the linear region: checked
    // against the exact extremum (vertex) on a grid of samples [D].
    #[test]
    fn inside_is_sufficient() {
        let s = Shaper {
            lo: -1.0,
            hi: 1.0,
            w: 0.0,
        };
        let g: Vec<f64> = (0..41).map(|i| -1.2 + 0.06 * i as f64).collect();
        for &x0 in &g {
            for &x1 in &g {
                for &x2 in &g {
                    if !s.inside(x0, x1, x2) {
                        continue;
                    }
                    let (sl, q) = (0.5 * (x2 - x0), 0.5 * (x0 + x2) - x1);
                    let mut mx = x0.max(x2).max(x1);
                    let mut mn = x0.min(x2).min(x1);
                    if q != 0.0 {
                        let tv = -sl / (2.0 * q);
                        if tv.abs() < 1.0 {
                            let xv = x1 + tv * (sl + q * tv);
                            mx = mx.max(xv);
                            mn = mn.min(xv);
                        }
                    }
                    assert!(mx < 1.0 && mn > -1.0, "({x0}, {x1}, {x2})");
                }
            }
        }
    }
}
