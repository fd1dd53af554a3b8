//! Level-sweep helper: where THD crosses a threshold.

/// The level at which THD first rises through `threshold`, from `(level, thd)` points.
///
/// Points are taken in order of increasing level (they are sorted here); levels are linear
/// quantities (V, not dB) and THD any linear unit matching `threshold` (percent or ratio).
/// Between the two points that bracket the first upward crossing (`thd_i < threshold <=
/// thd_{i+1}`), the level is interpolated linearly in `log(level)` against `log(thd)`:
/// distortion that grows as a power of level is then interpolated exactly. A point exactly at
/// the threshold is returned as is. Points with a non-positive or non-finite value are
/// skipped. `None` if THD never reaches the threshold within the sweep (or starts above it:
/// no crossing is seen).
pub fn level_at_thd(points: &[(f64, f64)], threshold: f64) -> Option<f64> {
    if !(threshold.is_finite() && threshold > 0.0) {
        return None;
    }
    let mut pts: Vec<(f64, f64)> = points
        .iter()
        .copied()
        .filter(|(l, t)| l.is_finite() && *l > 0.0 && t.is_finite() && *t > 0.0)
        .collect();
    pts.sort_by(|a, b| a.0.total_cmp(&b.0));
    for pair in pts.windows(2) {
        let (l0, t0) = pair[0];
        let (l1, t1) = pair[1];
        if t0 == threshold {
            return Some(l0);
        }
        if t0 < threshold && t1 >= threshold {
            let (x0, x1) = (l0.ln(), l1.ln());
            let (y0, y1, y) = (t0.ln(), t1.ln(), threshold.ln());
            let frac = (y - y0) / (y1 - y0);
            return Some((x0 + frac * (x1 - x0)).exp());
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn power_law_is_interpolated_exactly() {
        // HD3 of a cubic nonlinearity grows as A^2 (power series, CHECKS.md):
        // thd = k A^2 crosses t at A = sqrt(t / k).
        let k = 0.01;
        let pts: Vec<(f64, f64)> = (1..=10)
            .map(|i| {
                let a = i as f64;
                (a, k * a * a)
            })
            .collect();
        let got = level_at_thd(&pts, 0.5).unwrap();
        assert!((got - (0.5f64 / k).sqrt()).abs() < 1e-12);
        assert_eq!(level_at_thd(&pts, 5.0), None);
        assert_eq!(level_at_thd(&pts, 0.0), None);
    }
}
