//! The output-swing clipper and its band-limited (anti-aliased) evaluation.
//!
//! The static clipper `f` is the identity between `lo + w` and `hi - w`, constant at `lo` and
//! `hi` beyond `lo - w` and `hi + w`, and a quadratic blend of width `2 w` (the knee) in
//! between (C1, so the output reaches the limit exactly). `w = 0` is a hard clip.
//!
//! Band-limited evaluation at sample `k`: the drive is taken as locally linear with the
//! central-difference slope `s = (x[k+1] - x[k-1]) / 2` and `f` is averaged against a unit
//! triangle kernel one sample wide on each side. In the drive domain that is a triangle of
//! half-width `a = |s|`, so with `C2` the second antiderivative of the residual
//! `c(x) = f(x) - x`,
//! `y[k] = x[k] + (C2(x + a) - 2 C2(x) + C2(x - a)) / a^2`.
//! Where the kernel stays inside one polynomial piece the closed form is used (exact, no
//! cancellation); in particular the linear region returns `x[k]` bit for bit. At a hard corner
//! this is the two-point polyBLAMP correction (the triangle kernel's band-limited ramp
//! residual `(1 - |u|)^3 / 6`); it needs one sample of lookahead.

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

/// Residual of the upper knee as a function of `u = x - (hi - w)`, and its antiderivatives.
#[inline]
fn top(u: f64, w: f64) -> (f64, f64, f64) {
    if u <= 0.0 {
        return (0.0, 0.0, 0.0);
    }
    if w == 0.0 {
        return (-u, -u * u / 2.0, -u * u * u / 6.0);
    }
    if u <= 2.0 * w {
        let u2 = u * u;
        (-u2 / (4.0 * w), -u2 * u / (12.0 * w), -u2 * u2 / (48.0 * w))
    } else {
        let d = u - w;
        let c = -d;
        let c1 = -2.0 * w * w / 3.0 - (d * d - w * w) / 2.0;
        let c2 = -w * w * w / 3.0 - w * w * (u - 2.0 * w) / 6.0 - (d * d * d - w * w * w) / 6.0;
        (c, c1, c2)
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
        top(x - (self.hi - w), w).0 - top((self.lo + w) - x, w).0
    }

    /// Whether `x` is at or past the start of either knee (or the hard limit).
    #[inline]
    pub fn clipping(&self, x: f64) -> bool {
        x >= self.hi - self.w || x <= self.lo + self.w
    }

    /// Kernel average of one side's residual, in that side's coordinate `u` (distance past
    /// the start of the knee), for kernel half-width `a > 0`.
    fn side_avg(u: f64, a: f64, w: f64) -> f64 {
        if u + a <= 0.0 {
            return 0.0;
        }
        if u - a >= 2.0 * w {
            // beyond the knee: c = -(u - w), linear, so the average is the centre value
            return -(u - w);
        }
        if w > 0.0 && u - a >= 0.0 && u + a <= 2.0 * w {
            // inside the quadratic knee: c(u) - a^2 / (24 w) (kernel variance a^2 / 6)
            return -u * u / (4.0 * w) - a * a / (24.0 * w);
        }
        // Straddles a breakpoint: second difference of C2, shifted by its linear Taylor part
        // at the nearest breakpoint (a linear term has zero second difference).
        let b = if w > 0.0 && (u - 2.0 * w).abs() < u.abs() {
            2.0 * w
        } else {
            0.0
        };
        let (_, c1b, c2b) = top(b, w);
        let g = |t: f64| top(t, w).2 - c2b - c1b * (t - b);
        (g(u + a) - 2.0 * g(u) + g(u - a)) / (a * a)
    }

    /// Band-limited output at a sample with drive `x` and kernel half-width `a = |slope|`.
    #[inline]
    pub fn smooth(&self, x: f64, a: f64) -> f64 {
        let w = self.w;
        if x - a >= self.lo + w && x + a <= self.hi - w {
            return x;
        }
        if a <= 1e-12 * (1.0 + x.abs()) {
            return self.apply(x);
        }
        let up = x - (self.hi - w);
        let dn = (self.lo + w) - x;
        x + Self::side_avg(up, a, w) - Self::side_avg(dn, a, w)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Calculus: C2'' = c; checked by central second differences of the closed forms [D].
    #[test]
    fn antiderivatives_are_consistent() {
        for w in [0.0, 0.3] {
            let h = 1e-4;
            for i in 1..200 {
                let u = i as f64 * 0.013;
                let (c, c1, _) = top(u, w);
                let d1 = (top(u + h, w).2 - top(u - h, w).2) / (2.0 * h);
                let d2 = (top(u + h, w).1 - top(u - h, w).1) / (2.0 * h);
                assert!((d1 - c1).abs() < 1e-7, "w {w} u {u}");
                assert!((d2 - c).abs() < 1e-7, "w {w} u {u}");
            }
        }
    }

    // The kernel average must equal a direct numerical average of f against the triangle
    // kernel (midpoint rule with many points) [D].
    #[test]
    fn smooth_matches_direct_average() {
        for w in [0.0, 0.3] {
            let s = Shaper {
                lo: -10.0,
                hi: 10.0,
                w,
            };
            for &(x, a) in &[
                (9.5, 0.8),
                (10.1, 0.2),
                (10.0, 3.0),
                (-9.9, 0.5),
                (9.8, 0.05),
                (11.0, 0.6),
            ] {
                let n = 200_000;
                let mut acc = 0.0;
                let mut wsum = 0.0;
                for i in 0..n {
                    let t = -1.0 + (i as f64 + 0.5) * 2.0 / n as f64;
                    let k = 1.0 - t.abs();
                    acc += k * s.apply(x + t * a);
                    wsum += k;
                }
                let direct = acc / wsum;
                let got = s.smooth(x, a);
                assert!(
                    (got - direct).abs() < 1e-6,
                    "w {w} x {x} a {a}: {got} vs {direct}"
                );
            }
            // linear region: exact
            assert_eq!(s.smooth(3.25, 0.5), 3.25);
        }
    }
}
