//! A figure against a parameter (sweeps).

use std::fmt::Write;

use super::axis::{Axis, AxisSpec, Scale};
use super::doc::{esc, num, px, Frame, Svg, ACCENT, ACCENT2, BOTTOM, DARK, LEFT, MID, RIGHT, TOP};
use super::{check_finite, PlotError};

const PLOT: &str = "sweep";

/// Stroke colour and dash pattern of series `i`.
fn series_style(i: usize) -> (&'static str, &'static str) {
    const STYLES: [(&str, &str); 4] = [
        (ACCENT, ""),
        (ACCENT2, "7 3"),
        (DARK, "2 3"),
        (MID, "9 3 2 3"),
    ];
    STYLES[i % STYLES.len()]
}

/// One series of a sweep: `(parameter, figure)` points.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct SweepSeries<'a> {
    /// Name (legend and `data-series`).
    pub name: &'a str,
    /// Points `(x, y)`, drawn in the given order.
    pub points: &'a [(f64, f64)],
}

/// A marked point (e.g. where THD crosses 1 %).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Crossing {
    /// Parameter value.
    pub x: f64,
    /// Figure value.
    pub y: f64,
    /// Label (`"1 % THD at 3.2 Vpk"`).
    pub label: String,
}

/// A horizontal threshold line.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Threshold {
    /// Figure value.
    pub y: f64,
    /// Label (`"1 % THD"`).
    pub label: String,
}

/// A sweep plot.
#[derive(Debug, Clone, Default)]
pub struct SweepPlot<'a> {
    /// Title line.
    pub title: &'a str,
    /// Caption line.
    pub caption: &'a str,
    /// The parameter axis.
    pub x: AxisSpec,
    /// The figure axis (THD % reads best on a log axis).
    pub y: AxisSpec,
    /// The series.
    pub series: &'a [SweepSeries<'a>],
    /// Marked crossing points.
    pub crossings: &'a [Crossing],
    /// Optional threshold line.
    pub threshold: Option<Threshold>,
}

fn check_axis_values(
    what: &'static str,
    scale: Scale,
    vals: impl Iterator<Item = f64>,
) -> Result<(), PlotError> {
    for (index, value) in vals.enumerate() {
        if !value.is_finite() {
            return Err(PlotError::NotFinite {
                plot: PLOT,
                what,
                index,
                value,
            });
        }
        if scale == Scale::Log && value <= 0.0 {
            return Err(PlotError::NotPositive {
                plot: PLOT,
                what,
                index,
                value,
            });
        }
    }
    Ok(())
}

/// Draw a sweep as SVG.
pub fn sweep_svg(p: &SweepPlot) -> Result<String, PlotError> {
    if p.series.iter().all(|s| s.points.is_empty()) {
        return Err(PlotError::Empty {
            plot: PLOT,
            what: "series points",
            need: 1,
        });
    }
    for s in p.series {
        check_axis_values("series x", p.x.scale, s.points.iter().map(|q| q.0))?;
        check_axis_values("series y", p.y.scale, s.points.iter().map(|q| q.1))?;
    }
    check_axis_values("crossings x", p.x.scale, p.crossings.iter().map(|c| c.x))?;
    check_axis_values("crossings y", p.y.scale, p.crossings.iter().map(|c| c.y))?;
    if let Some(t) = &p.threshold {
        check_axis_values("threshold", p.y.scale, std::iter::once(t.y))?;
    }
    check_finite(
        PLOT,
        "threshold",
        &[p.threshold.as_ref().map_or(0.0, |t| t.y)],
    )?;
    let xs = p
        .series
        .iter()
        .flat_map(|s| s.points.iter().map(|q| q.0))
        .chain(p.crossings.iter().map(|c| c.x));
    let ys = p
        .series
        .iter()
        .flat_map(|s| s.points.iter().map(|q| q.1))
        .chain(p.crossings.iter().map(|c| c.y))
        .chain(p.threshold.iter().map(|t| t.y));
    let frame = Frame {
        x: Axis::resolve(PLOT, &p.x, xs)?,
        y: Axis::resolve(PLOT, &p.y, ys)?,
    };
    let mut svg = Svg::new(PLOT, p.title);
    svg.axes(&frame);
    if let Some(t) = &p.threshold {
        let y = frame.py(t.y);
        let _ = writeln!(
            svg.buf(),
            "<line class=\"threshold\" data-y=\"{}\" x1=\"{LEFT}\" y1=\"{}\" x2=\"{RIGHT}\" y2=\"{}\" stroke=\"{ACCENT2}\" stroke-width=\"1\" stroke-dasharray=\"6 4\"/>\
             <text class=\"marker-label threshold-label\" x=\"{}\" y=\"{}\" text-anchor=\"start\" fill=\"{ACCENT2}\">{}</text>",
            num(t.y),
            px(y),
            px(y),
            px(LEFT + 6.0),
            px(y - 4.0),
            esc(&t.label)
        );
    }
    let mut legend = Vec::new();
    for (i, s) in p.series.iter().enumerate() {
        let (colour, dash) = series_style(i);
        let dash_attr = if dash.is_empty() {
            String::new()
        } else {
            format!(" stroke-dasharray=\"{dash}\"")
        };
        let pts: Vec<(f64, f64)> = s
            .points
            .iter()
            .map(|&(x, y)| (frame.px(x), frame.py(y)))
            .collect();
        let _ = writeln!(
            svg.buf(),
            "<g class=\"series-group\" data-series=\"{}\">",
            esc(s.name)
        );
        svg.path(
            "sweep",
            s.name,
            &format!(" data-index=\"{i}\""),
            &pts,
            s.points.len(),
            &format!("stroke=\"{colour}\"{dash_attr}"),
        );
        if s.points.len() <= 100 {
            for (&(x, y), &(cx, cy)) in s.points.iter().zip(&pts) {
                if (LEFT..=RIGHT).contains(&cx) && (TOP..=BOTTOM).contains(&cy) {
                    let _ = writeln!(
                        svg.buf(),
                        "<circle class=\"point\" data-x=\"{}\" data-y=\"{}\" cx=\"{}\" cy=\"{}\" r=\"2.2\" fill=\"{colour}\"/>",
                        num(x),
                        num(y),
                        px(cx),
                        px(cy)
                    );
                }
            }
        }
        svg.raw("</g>\n");
        legend.push((
            format!("data-series=\"{}\"", esc(s.name)),
            format!("<line x1=\"0\" y1=\"5\" x2=\"18\" y2=\"5\" stroke=\"{colour}\" stroke-width=\"2\"{dash_attr}/>"),
            s.name.to_string(),
        ));
    }
    for c in p.crossings {
        let cx = frame.px(c.x);
        let cy = frame.py(c.y);
        // Label to the right of the marker, or to the left near the right edge.
        let (tx, anchor) = if cx + 8.0 + 6.2 * c.label.chars().count() as f64 > RIGHT {
            (cx - 8.0, "end")
        } else {
            (cx + 8.0, "start")
        };
        let _ = writeln!(
            svg.buf(),
            "<g class=\"crossing\" data-x=\"{}\" data-y=\"{}\">\
             <line x1=\"{x}\" y1=\"{}\" x2=\"{x}\" y2=\"{BOTTOM}\" stroke=\"{ACCENT2}\" stroke-width=\"1\" stroke-dasharray=\"2 3\"/>\
             <circle cx=\"{x}\" cy=\"{y}\" r=\"4.5\" fill=\"none\" stroke=\"{ACCENT2}\" stroke-width=\"1.6\"/>\
             <text class=\"marker-label\" x=\"{}\" y=\"{}\" text-anchor=\"{anchor}\">{}</text></g>",
            num(c.x),
            num(c.y),
            px(cy + 4.5),
            px(tx),
            px(cy + 16.0),
            esc(&c.label),
            x = px(cx),
            y = px(cy),
        );
    }
    if p.series.len() > 1 {
        svg.legend(&legend);
    }
    Ok(svg.finish(p.title, p.caption))
}
