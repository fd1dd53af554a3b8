//! Axes: scales, 1-2-5 ticks, tick labels.

use super::PlotError;

/// How an axis maps values to positions.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Scale {
    /// Evenly spaced values.
    #[default]
    Linear,
    /// Evenly spaced `log10` of values (values must be above 0).
    Log,
}

/// How tick labels are printed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum TickFormat {
    /// Plain decimal (`0.5`, `20`, `0.001`).
    #[default]
    Plain,
    /// With an SI prefix (`20k`, `4.7m`, `1M`).
    Si,
}

/// An axis as the caller describes it.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct AxisSpec {
    /// What is plotted (`"Input level"`).
    pub label: String,
    /// Its unit (`"Vpk"`, `"%"`, `"ohm"`); shown in parentheses after the label. Empty: none.
    pub unit: String,
    /// Linear or log.
    pub scale: Scale,
    /// Tick label style.
    pub format: TickFormat,
    /// Fixed range `(min, max)`; `None`: fitted to the data with 1-2-5 rounding.
    pub range: Option<(f64, f64)>,
}

impl AxisSpec {
    /// A linear axis with plain ticks and a fitted range.
    pub fn linear(label: &str, unit: &str) -> Self {
        AxisSpec {
            label: label.to_string(),
            unit: unit.to_string(),
            ..AxisSpec::default()
        }
    }

    /// A log axis with plain ticks and a fitted range.
    pub fn log(label: &str, unit: &str) -> Self {
        AxisSpec {
            scale: Scale::Log,
            ..AxisSpec::linear(label, unit)
        }
    }

    /// The label as drawn: `label (unit)`.
    pub fn title(&self) -> String {
        axis_title(&self.label, &self.unit)
    }
}

/// `label (unit)`, or just the label when the unit is empty.
pub(crate) fn axis_title(label: &str, unit: &str) -> String {
    if unit.is_empty() {
        label.to_string()
    } else {
        format!("{label} ({unit})")
    }
}

/// A resolved axis: a range and how it is shown.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Axis {
    pub label: String,
    pub scale: Scale,
    pub format: TickFormat,
    pub lo: f64,
    pub hi: f64,
}

impl Axis {
    /// Position of `v` in `0..1` across the axis (outside for values out of range).
    pub fn norm(&self, v: f64) -> f64 {
        match self.scale {
            Scale::Linear => (v - self.lo) / (self.hi - self.lo),
            Scale::Log => (v.log10() - self.lo.log10()) / (self.hi.log10() - self.lo.log10()),
        }
    }

    /// Tick values and labels inside the range.
    pub fn ticks(&self) -> Vec<(f64, String)> {
        match self.scale {
            Scale::Linear => {
                let step = linear_step(self.lo, self.hi);
                linear_ticks(self.lo, self.hi, step)
                    .into_iter()
                    .map(|v| (v, self.label_for(v, Some(step))))
                    .collect()
            }
            Scale::Log => log_ticks(self.lo, self.hi)
                .into_iter()
                .map(|v| (v, self.label_for(v, None)))
                .collect(),
        }
    }

    /// A tick or marker label for `v` (`step`: the linear tick step, for decimals).
    pub fn label_for(&self, v: f64, step: Option<f64>) -> String {
        match self.format {
            TickFormat::Si => fmt_si(v),
            TickFormat::Plain => fmt_plain(v, step),
        }
    }

    /// Resolve a caller's axis against data values (already checked finite, and positive
    /// for a log axis).
    pub fn resolve(
        plot: &'static str,
        spec: &AxisSpec,
        data: impl Iterator<Item = f64> + Clone,
    ) -> Result<Axis, PlotError> {
        let (lo, hi) = match spec.range {
            Some((lo, hi)) => {
                super::check_range(plot, "axis range", lo, hi)?;
                if spec.scale == Scale::Log && lo <= 0.0 {
                    return Err(PlotError::BadSetting {
                        plot,
                        what: "axis range",
                        value: format!("{lo} .. {hi}"),
                        expected: "values above 0 on a log axis",
                    });
                }
                (lo, hi)
            }
            None => {
                let lo = data.clone().fold(f64::INFINITY, f64::min);
                let hi = data.fold(f64::NEG_INFINITY, f64::max);
                if !(lo.is_finite() && hi.is_finite()) {
                    return Err(PlotError::Empty {
                        plot,
                        what: "data",
                        need: 1,
                    });
                }
                match spec.scale {
                    Scale::Linear => nice_linear_range(lo, hi),
                    Scale::Log => nice_log_range(lo, hi),
                }
            }
        };
        Ok(Axis {
            label: spec.title(),
            scale: spec.scale,
            format: spec.format,
            lo,
            hi,
        })
    }
}

/// A 1-2-5 step giving about six intervals across `lo..hi`.
pub(crate) fn linear_step(lo: f64, hi: f64) -> f64 {
    let raw = (hi - lo) / 6.0;
    let mag = 10f64.powf(raw.log10().floor());
    for m in [1.0, 2.0, 5.0, 10.0] {
        if m * mag >= raw * (1.0 - 1e-9) {
            return m * mag;
        }
    }
    10.0 * mag
}

/// Multiples of `step` within `lo..hi` (computed as `k * step`, no accumulation).
pub(crate) fn linear_ticks(lo: f64, hi: f64, step: f64) -> Vec<f64> {
    if !(step.is_finite() && step > 0.0 && lo.is_finite() && hi.is_finite()) {
        return Vec::new();
    }
    let k0 = (lo / step - 1e-9).ceil();
    let k1 = (hi / step + 1e-9).floor();
    // A degenerate range (values near the limits of f64) gets no ticks rather than millions.
    if !(k1 - k0).is_finite() || k1 - k0 > 100.0 {
        return Vec::new();
    }
    let (k0, k1) = (k0 as i64, k1 as i64);
    (k0..=k1)
        .map(|k| {
            let v = k as f64 * step;
            // Round away representation noise (0.30000000000000004 -> 0.3).
            let digits = (-step.log10().floor()).max(0.0) as i32 + 1;
            let scale = 10f64.powi(digits);
            (v * scale).round() / scale
        })
        .collect()
}

/// `lo..hi` widened to multiples of the 1-2-5 step (a flat range is widened first).
pub(crate) fn nice_linear_range(lo: f64, hi: f64) -> (f64, f64) {
    let (lo, hi) = if hi - lo <= f64::EPSILON * lo.abs().max(hi.abs()).max(1e-300) {
        let d = if lo == 0.0 { 1.0 } else { lo.abs() * 0.1 };
        (lo - d, hi + d)
    } else {
        (lo, hi)
    };
    let step = linear_step(lo, hi);
    let (a, b) = (
        (lo / step - 1e-9).floor() * step,
        (hi / step + 1e-9).ceil() * step,
    );
    if a.is_finite() && b.is_finite() && a < b {
        (a, b)
    } else {
        (lo, hi)
    }
}

/// `m * 10^e` exactly as the decimal literal reads.
pub(crate) fn decimal(m: u32, e: i32) -> f64 {
    format!("{m}e{e}").parse().unwrap_or(f64::NAN)
}

/// The largest 1-2-5 value at or below `lo` and the smallest at or above `hi` (both > 0).
pub(crate) fn nice_log_range(lo: f64, hi: f64) -> (f64, f64) {
    let (lo, hi) = if hi <= lo {
        (lo / 2.0, hi * 2.0)
    } else {
        (lo, hi)
    };
    let e_lo = lo.log10().floor() as i32;
    let mut a = decimal(1, e_lo);
    for e in [e_lo, e_lo + 1] {
        for m in [1, 2, 5] {
            let v = decimal(m, e);
            if v <= lo * (1.0 + 1e-12) {
                a = v;
            }
        }
    }
    let e_hi = hi.log10().floor() as i32;
    let mut b = decimal(1, e_hi + 1);
    for e in [e_hi + 1, e_hi] {
        for m in [5, 2, 1] {
            let v = decimal(m, e);
            if v >= hi * (1.0 - 1e-12) {
                b = v;
            }
        }
    }
    (a, b)
}

/// Ticks on a log axis: 1-2-5 per decade up to four decades, each decade up to twelve,
/// every other decade beyond.
pub(crate) fn log_ticks(lo: f64, hi: f64) -> Vec<f64> {
    if !(lo > 0.0 && hi > lo && hi.is_finite()) {
        return Vec::new();
    }
    let decades = (hi / lo).log10();
    let mantissas: &[u32] = if decades <= 4.0 { &[1, 2, 5] } else { &[1] };
    let every = if decades <= 12.0 { 1 } else { 2 };
    let e0 = lo.log10().floor() as i32;
    let e1 = hi.log10().ceil() as i32;
    let mut out = Vec::new();
    for e in e0..=e1 {
        if e.rem_euclid(every) != 0 {
            continue;
        }
        for &m in mantissas {
            let v = decimal(m, e);
            if v >= lo * (1.0 - 1e-9) && v <= hi * (1.0 + 1e-9) {
                out.push(v);
            }
        }
    }
    out
}

/// Plain decimal label: decimals from the step (linear) or the value's magnitude (log);
/// exponent form outside `1e-4 ..= 1e6`.
pub(crate) fn fmt_plain(v: f64, step: Option<f64>) -> String {
    if v == 0.0 {
        return "0".to_string();
    }
    let a = v.abs();
    if !(1e-4..1e6).contains(&a) && step.is_none_or(|s| !(1e-4..1e6).contains(&s)) {
        return format!("{v:e}");
    }
    // A tick step sets the decimals; a lone value keeps about three significant digits.
    let decimals = match step {
        Some(s) => (-(s.log10()) + 1e-9).ceil().max(0.0) as usize,
        None => ((-(a.log10()) + 1e-9).ceil() + 2.0).max(0.0) as usize,
    };
    let s = format!("{v:.decimals$}");
    if s.contains('.') {
        let s = s.trim_end_matches('0').trim_end_matches('.');
        s.to_string()
    } else {
        s
    }
}

/// A value with an SI prefix and up to three significant digits: `20k`, `4.7m`, `-1.5`.
pub(crate) fn fmt_si(v: f64) -> String {
    if v == 0.0 || !v.is_finite() {
        return format!("{v}");
    }
    const PREFIXES: [(i32, &str); 9] = [
        (-15, "f"),
        (-12, "p"),
        (-9, "n"),
        (-6, "u"),
        (-3, "m"),
        (0, ""),
        (3, "k"),
        (6, "M"),
        (9, "G"),
    ];
    // Round to three significant digits first so 999.9 becomes 1k, not 1000.
    let sig = format!("{:.2e}", v);
    let r: f64 = sig.parse().unwrap_or(v);
    let e3 = ((r.abs().log10() + 1e-12).floor() as i32).div_euclid(3) * 3;
    let e3 = e3.clamp(-15, 9);
    let prefix = PREFIXES
        .iter()
        .find(|(e, _)| *e == e3)
        .map(|(_, p)| *p)
        .unwrap_or("");
    let m = r / 10f64.powi(e3);
    let mut s = format!("{m:.2}");
    if s.contains('.') {
        s = s.trim_end_matches('0').trim_end_matches('.').to_string();
    }
    format!("{s}{prefix}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_ticks_audio_band() {
        // 1-2-5 sequence per decade (common practice for audio frequency axes).
        let t = log_ticks(20.0, 20_000.0);
        assert_eq!(
            t,
            vec![20.0, 50.0, 100.0, 200.0, 500.0, 1e3, 2e3, 5e3, 1e4, 2e4]
        );
    }

    #[test]
    fn linear_steps_are_1_2_5() {
        assert_eq!(linear_step(0.0, 12.0), 2.0);
        assert_eq!(linear_step(-12.0, 12.0), 5.0);
        assert_eq!(linear_step(0.0, 0.6), 0.1);
        assert_eq!(
            linear_ticks(-1.0, 1.0, 0.5),
            vec![-1.0, -0.5, 0.0, 0.5, 1.0]
        );
    }

    #[test]
    fn labels() {
        assert_eq!(fmt_si(20_000.0), "20k");
        assert_eq!(fmt_si(4.7e-3), "4.7m");
        assert_eq!(fmt_si(999.9), "1k");
        assert_eq!(fmt_plain(0.001, None), "0.001");
        assert_eq!(fmt_plain(0.5, Some(0.5)), "0.5");
        assert_eq!(fmt_plain(-10.0, Some(5.0)), "-10");
        assert_eq!(fmt_plain(1.5, Some(0.5)), "1.5");
    }

    #[test]
    fn nice_ranges() {
        assert_eq!(nice_log_range(23.0, 19_000.0), (20.0, 20_000.0));
        assert_eq!(nice_log_range(0.013, 7.0), (0.01, 10.0));
        assert_eq!(nice_linear_range(-11.3, 11.3), (-15.0, 15.0));
    }
}
