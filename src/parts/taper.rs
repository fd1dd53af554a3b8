//! Potentiometer tapers: fraction of the track resistance between the wiper and the ground end,
//! as a function of rotation.
//!
//! Taper letters are not standardised (common practice), so railsong names the law and, for
//! audio tapers, the fraction at mid-rotation ("10 % log"). The smooth law used here passes
//! through y(0) = 0, y(0.5) = mid and y(1) = 1:
//! `b = (1/mid - 1)^2`, `y = (b^x - 1) / (b - 1)`, which is exact for those three points.

use crate::model::Taper;

/// Default mid-rotation fraction of a "log" (audio) taper: 10 % (common practice).
pub const LOG_MID_DEFAULT: f64 = 0.10;

/// Fraction of the track between wiper and ground end at rotation `at` (clamped to 0..1).
pub fn fraction(taper: Taper, at: f64) -> f64 {
    let x = at.clamp(0.0, 1.0);
    match taper {
        Taper::Linear => x,
        Taper::Log { mid } => exp_law(mid, x),
        Taper::AntiLog { mid } => 1.0 - exp_law(1.0 - mid, 1.0 - x),
    }
}

fn exp_law(mid: f64, x: f64) -> f64 {
    let b = (1.0 / mid - 1.0).powi(2);
    if (b - 1.0).abs() < 1e-12 {
        return x;
    }
    (b.powf(x) - 1.0) / (b - 1.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Three-point law, derived in the module docs [D].
    #[test]
    fn log_taper_hits_its_three_points() {
        for mid in [0.05, 0.1, 0.15, 0.2] {
            let t = Taper::Log { mid };
            assert!(fraction(t, 0.0).abs() < 1e-12);
            assert!((fraction(t, 0.5) - mid).abs() < 1e-12);
            assert!((fraction(t, 1.0) - 1.0).abs() < 1e-12);
        }
        let a = Taper::AntiLog { mid: 0.9 };
        assert!((fraction(a, 0.5) - 0.9).abs() < 1e-12);
        assert!((fraction(Taper::Linear, 0.3) - 0.3).abs() < 1e-15);
    }

    #[test]
    fn tapers_are_monotone() {
        for t in [
            Taper::Linear,
            Taper::Log { mid: 0.1 },
            Taper::AntiLog { mid: 0.85 },
        ] {
            let mut last = -1.0;
            for i in 0..=100 {
                let y = fraction(t, i as f64 / 100.0);
                assert!(y >= last);
                last = y;
            }
        }
    }
}
