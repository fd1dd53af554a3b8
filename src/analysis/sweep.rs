//! Level-sweep helpers: where THD crosses a threshold, first between the points of a sweep
//! ([`level_at_thd`], [`bracket`]) and then found on the circuit itself by bisection
//! ([`find_crossing`]), each step a fresh measurement at the level tried.

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

/// The two neighbouring points of a sweep that bracket the first upward crossing of
/// `threshold` (`below.1 < threshold <= above.1`), with the same filtering and ordering as
/// [`level_at_thd`]. `None` when the sweep does not cross.
pub fn bracket(points: &[(f64, f64)], threshold: f64) -> Option<((f64, f64), (f64, f64))> {
    if !(threshold.is_finite() && threshold > 0.0) {
        return None;
    }
    let mut pts: Vec<(f64, f64)> = points
        .iter()
        .copied()
        .filter(|(l, t)| l.is_finite() && *l > 0.0 && t.is_finite() && *t > 0.0)
        .collect();
    pts.sort_by(|a, b| a.0.total_cmp(&b.0));
    pts.windows(2)
        .find(|w| w[0].1 < threshold && w[1].1 >= threshold)
        .map(|w| (w[0], w[1]))
}

/// Default precision of [`find_crossing`]: 0.1 % in level.
pub const CROSSING_TOLERANCE: f64 = 1e-3;

/// Where `thd(level)` reaches `threshold`, found on the circuit: starting from a bracket
/// (`below.1 < threshold <= above.1`, levels above 0), each step measures THD at a level
/// inside the bracket (`eval`, e.g. a render at that level) and keeps the half that still
/// brackets the crossing, until the bracket is narrower than `rel_tol` (a ratio, 1e-3 =
/// 0.1 %); the answer is interpolated inside that last bracket, so it lies within `rel_tol`
/// of the crossing of a THD that rises through the bracket.
///
/// The level tried is the log-log interpolation between the ends (a power law is found in
/// one step), kept at least a tenth of the bracket from either end; when the same end moved
/// on the last two steps the level tried is the (geometric) midpoint, so the bracket at
/// least halves every three steps whatever the curve (bisection's guarantee); when the
/// new bracket predicts the crossing close to the level just tried, the next level is
/// placed just across it, which closes the bracket in one more step. `None` if `eval`
/// returns `None` (THD could not be measured) or the bracket is not one.
pub fn find_crossing(
    below: (f64, f64),
    above: (f64, f64),
    threshold: f64,
    rel_tol: f64,
    eval: &mut dyn FnMut(f64) -> Option<f64>,
) -> Option<f64> {
    let (mut a, mut b) = (below, above);
    let ok = |p: (f64, f64)| p.0.is_finite() && p.0 > 0.0 && p.1.is_finite() && p.1 > 0.0;
    if !(ok(a) && ok(b) && a.0 < b.0 && a.1 < threshold && b.1 >= threshold && rel_tol > 0.0) {
        return None;
    }
    // fraction (in log level) of the bracket where the log-log line meets the threshold
    let frac = |a: (f64, f64), b: (f64, f64)| {
        let f = (threshold.ln() - a.1.ln()) / (b.1.ln() - a.1.ln());
        if f.is_finite() {
            f.clamp(0.0, 1.0)
        } else {
            0.5
        }
    };
    let at = |a: (f64, f64), b: (f64, f64), f: f64| (a.0.ln() + f * (b.0 / a.0).ln()).exp();
    let mut next: Option<f64> = None;
    // which end moved on the last two steps (true: the upper one)
    let mut moved: [Option<bool>; 2] = [None, None];
    for _ in 0..200 {
        if b.0 / a.0 - 1.0 <= rel_tol {
            return Some(at(a, b, frac(a, b)));
        }
        let x = match next.take() {
            Some(x) if x > a.0 && x < b.0 => x,
            // the same end moved twice: the interpolation is lopsided, halve instead
            _ if moved[0].is_some() && moved[0] == moved[1] => at(a, b, 0.5),
            _ => at(a, b, frac(a, b).clamp(0.1, 0.9)),
        };
        let t = eval(x)?;
        if !(t.is_finite() && t > 0.0) {
            return None;
        }
        let upper = t >= threshold;
        if upper {
            b = (x, t);
        } else {
            a = (x, t);
        }
        moved = [moved[1], Some(upper)];
        // the crossing predicted by the new bracket: if it is within half the tolerance of
        // the level just tried, try just across it
        let guess = at(a, b, frac(a, b));
        let step = 0.8 * rel_tol;
        if (guess / x - 1.0).abs() < 0.5 * rel_tol {
            next = Some(if t >= threshold {
                x / (1.0 + step)
            } else {
                x * (1.0 + step)
            });
        }
    }
    Some(at(a, b, frac(a, b)))
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

    #[test]
    fn crossing_is_found_within_the_tolerance() {
        // THD of a hard clip of a sine against its level has no power law: check against a
        // closed form inverted by plain bisection here. Clip at 1, level A: THD_F of a sine
        // clipped at c = 1/A (Fourier series of the clipped sine, CHECKS.md).
        let thd = |a: f64| {
            let c: f64 = (1.0 / a).min(1.0);
            let al = c.asin();
            let b1 = (2.0 / std::f64::consts::PI) * (al + c * (1.0 - c * c).sqrt());
            let ms = (2.0 / std::f64::consts::PI)
                * (al / 2.0 - al.sin() * al.cos() / 2.0
                    + c * c * (std::f64::consts::PI / 2.0 - al));
            ((ms - b1 * b1 / 2.0).max(0.0)).sqrt() / (b1 / 2f64.sqrt())
        };
        let (mut lo, mut hi) = (1.0, 2.0);
        for _ in 0..100 {
            let m = 0.5 * (lo + hi);
            if thd(m) < 0.01 {
                lo = m;
            } else {
                hi = m;
            }
        }
        let exact = 0.5 * (lo + hi);
        let mut calls = 0;
        let got = find_crossing((1.001, thd(1.001)), (4.0, thd(4.0)), 0.01, 1e-3, &mut |a| {
            calls += 1;
            Some(thd(a))
        })
        .unwrap();
        assert!((got / exact - 1.0).abs() < 1e-3, "{got} vs {exact}");
        // plain bisection of this bracket to 0.1 % needs log2(ln(4 / 1.001) / ln(1.001)),
        // 11 steps; the interpolating steps must not need more here
        let plain = ((4.0f64 / 1.001).ln() / 1.001f64.ln()).log2().ceil() as usize;
        assert!(
            calls <= plain,
            "{calls} evaluations, bisection needs {plain}"
        );
        // not a bracket, or not measurable: None
        assert_eq!(
            find_crossing((1.0, 0.02), (2.0, 0.03), 0.01, 1e-3, &mut |_| Some(0.01)),
            None
        );
        assert_eq!(
            find_crossing((1.001, 1e-4), (4.0, 0.2), 0.01, 1e-3, &mut |_| None),
            None
        );
    }
}
