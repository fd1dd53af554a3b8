//! Histogram of a spread of values (tolerance runs).

use std::fmt::Write;

use super::axis::{nice_linear_range, Axis, AxisSpec, Scale};
use super::doc::{esc, num, px, Frame, Svg, ACCENT, ACCENT2, BOTTOM, DARK, RIGHT, TOP};
use super::spectrum::median;
use super::{check_finite, PlotError};

const PLOT: &str = "histogram";

/// Most bins drawn; a rule asking for more gets wider bins.
pub const MAX_BINS: usize = 200;

/// How the bin width is chosen.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum BinRule {
    /// Freedman-Diaconis: width `2 IQR / n^(1/3)` (falls back to [`BinRule::Sqrt`] when the
    /// interquartile range is 0).
    #[default]
    FreedmanDiaconis,
    /// Square-root choice: `ceil(sqrt n)` bins across the range.
    Sqrt,
}

impl BinRule {
    /// The `data-rule` name.
    pub fn name(self) -> &'static str {
        match self {
            BinRule::FreedmanDiaconis => "freedman-diaconis",
            BinRule::Sqrt => "sqrt",
        }
    }

    fn label(self) -> &'static str {
        match self {
            BinRule::FreedmanDiaconis => "Freedman-Diaconis rule",
            BinRule::Sqrt => "square-root rule",
        }
    }
}

/// Bins of a set of values. Bin `i` covers `[lo + i width, lo + (i + 1) width)`; the last
/// bin also holds its upper edge (the maximum).
#[derive(Debug, Clone, PartialEq)]
pub struct Bins {
    /// The rule actually used (after any fallback).
    pub rule: BinRule,
    /// Lower edge of the first bin (the minimum, or below it for a flat set).
    pub lo: f64,
    /// Bin width.
    pub width: f64,
    /// Count per bin.
    pub counts: Vec<usize>,
    /// Smallest value.
    pub min: f64,
    /// Median (mean of the two middle values for an even count).
    pub median: f64,
    /// Largest value.
    pub max: f64,
}

/// Quantile `q` of sorted values, linear interpolation between order statistics
/// (Hyndman and Fan definition 7: `h = (n - 1) q`).
pub(crate) fn quantile_sorted(sorted: &[f64], q: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * q;
    let i = h.floor() as usize;
    let frac = h - i as f64;
    match sorted.get(i + 1) {
        Some(&next) => sorted[i] + frac * (next - sorted[i]),
        None => sorted[i],
    }
}

/// Bin `values` by `rule`.
pub fn histogram_bins(values: &[f64], rule: BinRule) -> Result<Bins, PlotError> {
    if values.is_empty() {
        return Err(PlotError::Empty {
            plot: PLOT,
            what: "values",
            need: 1,
        });
    }
    check_finite(PLOT, "values", values)?;
    let mut sorted = values.to_vec();
    sorted.sort_by(f64::total_cmp);
    let n = sorted.len();
    let min = sorted[0];
    let max = sorted[n - 1];
    let med = median(&sorted);
    let range = max - min;
    let (rule, lo, width, k) = if range <= 0.0 {
        let w = if min == 0.0 { 1.0 } else { 0.02 * min.abs() };
        (rule, min - w / 2.0, w, 1)
    } else {
        let iqr = quantile_sorted(&sorted, 0.75) - quantile_sorted(&sorted, 0.25);
        let (rule, width) = match rule {
            BinRule::FreedmanDiaconis if iqr > 0.0 => (rule, 2.0 * iqr / (n as f64).cbrt()),
            _ => (BinRule::Sqrt, range / (n as f64).sqrt().ceil()),
        };
        let k = ((range / width) * (1.0 - 1e-12)).ceil().max(1.0);
        if k > MAX_BINS as f64 {
            (rule, min, range / MAX_BINS as f64, MAX_BINS)
        } else {
            (rule, min, width, k as usize)
        }
    };
    let mut counts = vec![0usize; k];
    for &v in &sorted {
        let i = (((v - lo) / width).floor().max(0.0) as usize).min(k - 1);
        counts[i] += 1;
    }
    Ok(Bins {
        rule,
        lo,
        width,
        counts,
        min,
        median: med,
        max,
    })
}

/// A histogram plot.
#[derive(Debug, Clone, Default)]
pub struct HistogramPlot<'a> {
    /// Title line.
    pub title: &'a str,
    /// Caption line.
    pub caption: &'a str,
    /// The values.
    pub values: &'a [f64],
    /// The value axis: label, unit and tick format (scale and range are set from the bins).
    pub x: AxisSpec,
    /// Bin-width rule.
    pub rule: BinRule,
}

/// Draw a histogram as SVG.
pub fn histogram_svg(p: &HistogramPlot) -> Result<String, PlotError> {
    let bins = histogram_bins(p.values, p.rule)?;
    let k = bins.counts.len();
    let hi = bins.lo + k as f64 * bins.width;
    let peak = bins.counts.iter().copied().max().unwrap_or(1).max(1);
    let (_, ytop) = nice_linear_range(0.0, peak as f64);
    let frame = Frame {
        x: Axis {
            label: p.x.title(),
            scale: Scale::Linear,
            format: p.x.format,
            lo: bins.lo,
            hi,
        },
        y: Axis {
            label: "Count".to_string(),
            scale: Scale::Linear,
            format: super::axis::TickFormat::Plain,
            lo: 0.0,
            hi: ytop,
        },
    };
    let mut svg = Svg::new(PLOT, p.title);
    svg.axes(&frame);
    let _ = writeln!(
        svg.buf(),
        "<g class=\"bins\" data-rule=\"{}\" data-width=\"{}\" data-count=\"{k}\" data-values=\"{}\">",
        bins.rule.name(),
        num(bins.width),
        p.values.len()
    );
    for (i, &c) in bins.counts.iter().enumerate() {
        let a = bins.lo + i as f64 * bins.width;
        let b = a + bins.width;
        let x0 = frame.px(a);
        let x1 = frame.px(b);
        let y = frame.py(c as f64);
        let _ = writeln!(
            svg.buf(),
            "<rect class=\"bin\" data-lo=\"{}\" data-hi=\"{}\" data-count=\"{c}\" x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\" fill=\"{ACCENT}\" fill-opacity=\"0.55\" stroke=\"#ffffff\" stroke-width=\"0.5\"/>",
            num(a),
            num(b),
            px(x0),
            px(y),
            px(x1 - x0),
            px(BOTTOM - y)
        );
    }
    svg.raw("</g>\n");
    let ax = &frame.x;
    for (i, (stat, v)) in [
        ("min", bins.min),
        ("median", bins.median),
        ("max", bins.max),
    ]
    .into_iter()
    .enumerate()
    {
        let x = frame.px(v);
        let colour = if stat == "median" { ACCENT2 } else { DARK };
        let label = format!("{stat} {}", ax.label_for(v, None));
        let (tx, anchor) = if x + 6.0 + 6.2 * label.chars().count() as f64 > RIGHT {
            (x - 4.0, "end")
        } else {
            (x + 4.0, "start")
        };
        let _ = writeln!(
            svg.buf(),
            "<line class=\"stat {stat}\" data-stat=\"{stat}\" data-value=\"{}\" x1=\"{x}\" y1=\"{TOP}\" x2=\"{x}\" y2=\"{BOTTOM}\" stroke=\"{colour}\" stroke-width=\"1.2\" stroke-dasharray=\"5 3\"/>\
             <text class=\"marker-label stat-label\" x=\"{}\" y=\"{}\" text-anchor=\"{anchor}\" fill=\"{colour}\">{}</text>",
            num(v),
            px(tx),
            px(TOP + 14.0 + 14.0 * i as f64),
            esc(&label),
            x = px(x),
        );
    }
    let _ = writeln!(
        svg.buf(),
        "<text class=\"note\" x=\"{}\" y=\"{}\" text-anchor=\"end\">{}: {k} bins of {}, n = {}</text>",
        px(RIGHT),
        TOP - 8.0,
        bins.rule.label(),
        esc(&ax.label_for(bins.width, None)),
        p.values.len()
    );
    Ok(svg.finish(p.title, p.caption))
}
