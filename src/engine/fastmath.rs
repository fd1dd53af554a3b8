//! Special functions for the engine's per-sample full step, without library calls: `exp`,
//! `ln`, `ln(1 + u)` for small `u`, `sinh` and `asinh` on the non-negative axis, and `tanh`.
//!
//! Each is a fixed polynomial after an exact range reduction (no table), accurate to a few
//! units in the last place, so the step that uses them agrees with the library-based
//! reference step (the plain full model in `run`) far below the engine's 1 uV tolerance.
//! Method (any numerical-analysis text, e.g. Muller, "Elementary Functions: Algorithms and
//! Implementation", 2016): `exp` by `x = k ln 2 + r`, `|r| <= ln 2 / 2`, Taylor to degree 13;
//! `ln` by `x = 2^k m`, `m` in `[sqrt(1/2), sqrt 2)`, `ln m = 2 atanh(s)`,
//! `s = (m - 1) / (m + 1)`, odd series to degree 21.

/// `ln 2` split so that `k * LN2_HI` is exact for `|k| < 2^20`.
const LN2_HI: f64 = 0.693_147_180_369_123_8;
const LN2_LO: f64 = 1.908_214_929_270_587_7e-10;

/// `exp(x)` for `x <= 700` (0 below -700, where the true value is below 1e-304).
#[inline(always)]
pub fn exp(x: f64) -> f64 {
    if x < -700.0 {
        return 0.0;
    }
    // round to nearest by the 1.5 * 2^52 shift (exact for |y| < 2^51; no library call)
    let y = x * std::f64::consts::LOG2_E;
    let k = (y + 6_755_399_441_055_744.0) - 6_755_399_441_055_744.0;
    let r = (x - k * LN2_HI) - k * LN2_LO;
    // Taylor coefficients 1/n!, n = 13 down to 0
    let mut p = 1.0 / 6_227_020_800.0;
    p = p * r + 1.0 / 479_001_600.0;
    p = p * r + 1.0 / 39_916_800.0;
    p = p * r + 1.0 / 3_628_800.0;
    p = p * r + 1.0 / 362_880.0;
    p = p * r + 1.0 / 40_320.0;
    p = p * r + 1.0 / 5_040.0;
    p = p * r + 1.0 / 720.0;
    p = p * r + 1.0 / 120.0;
    p = p * r + 1.0 / 24.0;
    p = p * r + 1.0 / 6.0;
    p = p * r + 0.5;
    p = p * r + 1.0;
    p = p * r + 1.0;
    // 2^k for |k| <= 1010, built in two factors (each a normal power of two).
    let k = k as i64;
    let k1 = k / 2;
    let k2 = k - k1;
    p * f64::from_bits(((k1 + 1023) as u64) << 52) * f64::from_bits(((k2 + 1023) as u64) << 52)
}

/// `2 atanh(s) = ln((1 + s) / (1 - s))` for `|s| <= 0.18`.
#[inline(always)]
fn two_atanh(s: f64) -> f64 {
    let w = s * s;
    let mut p = 1.0 / 21.0;
    p = p * w + 1.0 / 19.0;
    p = p * w + 1.0 / 17.0;
    p = p * w + 1.0 / 15.0;
    p = p * w + 1.0 / 13.0;
    p = p * w + 1.0 / 11.0;
    p = p * w + 1.0 / 9.0;
    p = p * w + 1.0 / 7.0;
    p = p * w + 1.0 / 5.0;
    p = p * w + 1.0 / 3.0;
    p = p * w + 1.0;
    2.0 * s * p
}

/// `ln(x)` for finite `x > 0` (normal numbers; the engine never passes anything else).
#[inline(always)]
pub fn ln(x: f64) -> f64 {
    let bits = x.to_bits();
    let mut e = ((bits >> 52) & 0x7ff) as i64 - 1023;
    let mut m = f64::from_bits((bits & 0x000f_ffff_ffff_ffff) | 0x3ff0_0000_0000_0000);
    if m > std::f64::consts::SQRT_2 {
        m *= 0.5;
        e += 1;
    }
    let s = (m - 1.0) / (m + 1.0);
    let ef = e as f64;
    ef * LN2_HI + (two_atanh(s) + ef * LN2_LO)
}

/// `ln(1 + u)` for `|u| <= 0.4` (no cancellation for small `u`).
#[inline(always)]
pub fn ln1p_small(u: f64) -> f64 {
    two_atanh(u / (2.0 + u))
}

/// `sinh(z)` for `0 <= z <= 700`.
#[inline(always)]
pub fn sinh(z: f64) -> f64 {
    if z <= 1.0 {
        // z (1 + sum z^(2n) / (2n + 1)!), to z^18 (next term below 1e-17 relative)
        let w = z * z;
        let mut p = 1.0 / 121_645_100_408_832_000.0;
        p = p * w + 1.0 / 355_687_428_096_000.0;
        p = p * w + 1.0 / 1_307_674_368_000.0;
        p = p * w + 1.0 / 6_227_020_800.0;
        p = p * w + 1.0 / 39_916_800.0;
        p = p * w + 1.0 / 362_880.0;
        p = p * w + 1.0 / 5_040.0;
        p = p * w + 1.0 / 120.0;
        p = p * w + 1.0 / 6.0;
        z + z * (p * w)
    } else {
        let e = exp(z);
        0.5 * (e - 1.0 / e)
    }
}

/// `tanh(y)` for any `y` (NaN gives NaN): `sign(y) s / sqrt(1 + s^2)` with `s = sinh(|y|)`
/// (no cancellation near 0), exactly `+-1` from `|y| >= 20` (where `1 - tanh` is below
/// half an ulp of 1).
#[inline(always)]
pub fn tanh(y: f64) -> f64 {
    let z = y.abs();
    if z >= 20.0 {
        return 1.0f64.copysign(y);
    }
    let s = sinh(z);
    (s / (1.0 + s * s).sqrt()).copysign(y)
}

/// `asinh(y)` for finite `y >= 0`: `ln(1 + u)`, `u = y + y^2 / (1 + sqrt(1 + y^2))` (no
/// cancellation for small `y`), `y` itself below 1e-8 (the next term is `y^3 / 6`), and
/// `ln(2 y)` above 1e8.
#[inline(always)]
pub fn asinh(y: f64) -> f64 {
    if y < 1e-8 {
        y
    } else if y > 1e8 {
        std::f64::consts::LN_2 + ln(y)
    } else {
        let y2 = y * y;
        let u = y + y2 / (1.0 + (1.0 + y2).sqrt());
        if u <= 0.4 {
            ln1p_small(u)
        } else {
            ln(1.0 + u)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Reference: the platform's libm (a general reference library).
    #[test]
    fn exp_matches_the_library() {
        let mut worst: f64 = 0.0;
        for i in -200_000..200_000 {
            let x = i as f64 * 0.0035 + 1e-9 * i as f64;
            let (a, b) = (exp(x), x.exp());
            if b > 1e-300 {
                worst = worst.max(((a - b) / b).abs());
            }
        }
        assert!(worst < 4e-16, "relative error {worst:e}");
        assert_eq!(exp(0.0), 1.0);
        assert_eq!(exp(-800.0), 0.0);
    }

    #[test]
    fn ln_matches_the_library() {
        let mut worst: f64 = 0.0;
        let mut x = 1e-300;
        while x < 1e300 {
            for y in [x, x * 1.37, x * 1.999, x * 0.7072] {
                let (a, b) = (ln(y), y.ln());
                worst = worst.max((a - b).abs() / b.abs().max(1e-300));
            }
            x *= 1.11;
        }
        for i in 1..100_000 {
            let y = 1.0 + (i as f64 - 50_000.0) * 1e-5;
            let (a, b) = (ln(y), y.ln());
            worst = worst.max(if b == 0.0 {
                a.abs()
            } else {
                ((a - b) / b).abs()
            });
        }
        assert!(worst < 1e-15, "relative error {worst:e}");
    }

    #[test]
    fn ln1p_sinh_and_asinh_match_the_library() {
        let mut worst: f64 = 0.0;
        for i in -4000..=4000 {
            let u = i as f64 * 1e-4;
            let (a, b) = (ln1p_small(u), u.ln_1p());
            worst = worst.max(if b == 0.0 {
                a.abs()
            } else {
                ((a - b) / b).abs()
            });
        }
        assert!(worst < 5e-15, "ln1p relative error {worst:e}");
        let mut worst: f64 = 0.0;
        for i in 0..70_000 {
            let z = i as f64 * 1e-2 + 1e-7 * i as f64;
            let (a, b) = (sinh(z), z.sinh());
            worst = worst.max(if b == 0.0 {
                a.abs()
            } else {
                ((a - b) / b).abs()
            });
            let y = (i as f64 * 1e-3).powi(3) + 1e-12 * i as f64;
            let (a, b) = (asinh(y), y.asinh());
            worst = worst.max(if b == 0.0 {
                a.abs()
            } else {
                ((a - b) / b).abs()
            });
        }
        assert!(worst < 5e-15, "sinh / asinh relative error {worst:e}");
    }

    #[test]
    fn tanh_matches_the_library() {
        let mut worst: f64 = 0.0;
        for i in -60_000..=60_000 {
            let y = i as f64 * 5e-4 + 1e-9 * i as f64;
            let (a, b) = (tanh(y), y.tanh());
            worst = worst.max(if b == 0.0 {
                a.abs()
            } else {
                ((a - b) / b).abs()
            });
        }
        assert!(worst < 5e-15, "tanh relative error {worst:e}");
        assert_eq!(tanh(0.0), 0.0);
        assert_eq!(tanh(1e3), 1.0);
        assert_eq!(tanh(-1e3), -1.0);
        assert!(tanh(f64::NAN).is_nan());
    }
}
