//! Transfer curve: output V against input V, with the ideal straight line.

use std::fmt::Write;

use super::axis::{nice_linear_range, Axis, Scale, TickFormat};
use super::decimate::decimate_xy;
use super::doc::{
    clip_to_area, esc, num, px, Frame, Svg, ACCENT, BOTTOM, DARK, LEFT, MID, RIGHT, TOP,
};
use super::waveform::fmt_v;
use super::{check_finite, check_range, check_same_len, PlotError};

const PLOT: &str = "transfer";

/// A transfer-curve plot (typically from a slow input ramp).
#[derive(Debug, Clone, Default)]
pub struct TransferPlot<'a> {
    /// Title line.
    pub title: &'a str,
    /// Caption line.
    pub caption: &'a str,
    /// Input voltages, V (in time order).
    pub input_v: &'a [f64],
    /// Output voltages, V, paired with `input_v`.
    pub output_v: &'a [f64],
    /// Ideal gain, V/V: the reference line is `out = gain * in + offset_v`.
    pub gain: f64,
    /// Ideal output at 0 V input, V.
    pub offset_v: f64,
    /// Supply rails `(neg, pos)`, V.
    pub rails: Option<(f64, f64)>,
}

/// Draw a transfer curve as SVG.
pub fn transfer_svg(p: &TransferPlot) -> Result<String, PlotError> {
    check_same_len(
        PLOT,
        "output_v",
        p.output_v.len(),
        "input_v",
        p.input_v.len(),
    )?;
    if p.input_v.len() < 2 {
        return Err(PlotError::Empty {
            plot: PLOT,
            what: "input_v",
            need: 2,
        });
    }
    check_finite(PLOT, "input_v", p.input_v)?;
    check_finite(PLOT, "output_v", p.output_v)?;
    check_finite(PLOT, "gain", &[p.gain])?;
    check_finite(PLOT, "offset_v", &[p.offset_v])?;
    if let Some((a, b)) = p.rails {
        check_range(PLOT, "rails", a, b)?;
    }
    let fold = |v: &[f64]| {
        (
            v.iter().copied().fold(f64::INFINITY, f64::min),
            v.iter().copied().fold(f64::NEG_INFINITY, f64::max),
        )
    };
    let (xlo, xhi) = fold(p.input_v);
    let (mut ylo, mut yhi) = fold(p.output_v);
    if let Some((a, b)) = p.rails {
        ylo = ylo.min(a);
        yhi = yhi.max(b);
    }
    let pad = 0.04 * (yhi - ylo);
    let (ylo, yhi) = nice_linear_range(ylo - pad, yhi + pad);
    let (xlo, xhi) = nice_linear_range(xlo, xhi);
    let frame = Frame {
        x: Axis {
            label: "Input (V)".to_string(),
            scale: Scale::Linear,
            format: TickFormat::Plain,
            lo: xlo,
            hi: xhi,
        },
        y: Axis {
            label: "Output (V)".to_string(),
            scale: Scale::Linear,
            format: TickFormat::Plain,
            lo: ylo,
            hi: yhi,
        },
    };
    let mut svg = Svg::new(PLOT, p.title);
    svg.axes(&frame);
    if let Some((n, pp)) = p.rails {
        for (which, v) in [("pos", pp), ("neg", n)] {
            let y = px(frame.py(v));
            let ty = if which == "pos" {
                frame.py(v) - 4.0
            } else {
                frame.py(v) + 12.0
            };
            let _ = writeln!(
                svg.buf(),
                "<line class=\"level rail\" data-level=\"{which}\" data-v=\"{}\" x1=\"{LEFT}\" y1=\"{y}\" x2=\"{RIGHT}\" y2=\"{y}\" stroke=\"{DARK}\" stroke-width=\"1\"/>\
                 <text class=\"level-label\" x=\"{}\" y=\"{}\" text-anchor=\"end\" fill=\"{DARK}\">rail {} V</text>",
                num(v),
                RIGHT - 6.0,
                px(ty),
                fmt_v(v)
            );
        }
    }
    // Ideal line, clipped to the plot area.
    let line = |x: f64| p.gain * x + p.offset_v;
    if let Some((x0, y0, x1, y1)) = clip_to_area(
        frame.px(xlo),
        frame.py(line(xlo)),
        frame.px(xhi),
        frame.py(line(xhi)),
    ) {
        let label = format!(
            "ideal: gain {} V/V{}",
            fmt_v(p.gain),
            if p.offset_v != 0.0 {
                format!(", offset {} V", fmt_v(p.offset_v))
            } else {
                String::new()
            }
        );
        let _ = writeln!(
            svg.buf(),
            "<line class=\"reference ideal\" data-slope=\"{}\" data-offset=\"{}\" x1=\"{}\" y1=\"{}\" x2=\"{}\" y2=\"{}\" stroke=\"{MID}\" stroke-width=\"1\" stroke-dasharray=\"6 4\"/>",
            num(p.gain),
            num(p.offset_v),
            px(x0),
            px(y0),
            px(x1),
            px(y1)
        );
        let _ = writeln!(
            svg.buf(),
            "<text class=\"marker-label reference-label\" x=\"{}\" y=\"{}\" fill=\"{MID}\">{}</text>",
            px(LEFT + 6.0),
            px(BOTTOM - 8.0),
            esc(&label)
        );
    }
    let pixels: Vec<(f64, f64)> = p
        .input_v
        .iter()
        .zip(p.output_v)
        .map(|(&x, &y)| (frame.px(x), frame.py(y).clamp(TOP, BOTTOM)))
        .collect();
    let pts = decimate_xy(&pixels);
    svg.paths(
        "transfer",
        "transfer",
        "",
        &pts,
        p.input_v.len(),
        &format!("stroke=\"{ACCENT}\" stroke-width=\"1.6\""),
    );
    Ok(svg.finish(p.title, p.caption))
}
