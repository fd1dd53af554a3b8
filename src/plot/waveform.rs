//! Waveform plot: volts against time, with rails, limits and event spans.

use std::fmt::Write;

use super::axis::{nice_linear_range, Axis, Scale, TickFormat};
use super::decimate::decimate;
use super::doc::{
    esc, num, px, Frame, Svg, ACCENT, ACCENT2, BOTTOM, DARK, LEFT, LIGHT, MID, RIGHT, TOP,
};
use super::{check_finite, check_range, PlotError};

const PLOT: &str = "waveform";

/// A sampled trace: sample `n` is at `start_s + n / rate` seconds.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Trace<'a> {
    /// Samples, V.
    pub samples: &'a [f64],
    /// Sample rate, Hz.
    pub rate: f64,
    /// Time of the first sample, s.
    pub start_s: f64,
}

/// What happened during an event span.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum EventKind {
    /// The output sat at a swing limit.
    Clipping,
    /// The output was slew-rate limited.
    Slewing,
    /// An input was outside the common-mode range.
    OutOfInputRange,
    /// The output was phase-reversed.
    Reversed,
}

impl EventKind {
    /// All kinds, in legend order.
    pub const ALL: [EventKind; 4] = [
        EventKind::Clipping,
        EventKind::Slewing,
        EventKind::OutOfInputRange,
        EventKind::Reversed,
    ];

    /// The class / `data-kind` name.
    pub fn name(self) -> &'static str {
        match self {
            EventKind::Clipping => "clipping",
            EventKind::Slewing => "slewing",
            EventKind::OutOfInputRange => "out-of-input-range",
            EventKind::Reversed => "reversed",
        }
    }

    /// The legend label.
    pub fn label(self) -> &'static str {
        match self {
            EventKind::Clipping => "clipping",
            EventKind::Slewing => "slew-limited",
            EventKind::OutOfInputRange => "outside input range",
            EventKind::Reversed => "phase reversed",
        }
    }

    fn fill(self) -> (&'static str, f64) {
        match self {
            EventKind::Clipping => (ACCENT2, 0.22),
            EventKind::Slewing => (ACCENT, 0.16),
            EventKind::OutOfInputRange => (MID, 0.20),
            EventKind::Reversed => (DARK, 0.28),
        }
    }
}

/// A time span during which an event held.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EventSpan {
    /// What happened.
    pub kind: EventKind,
    /// Start, s.
    pub start_s: f64,
    /// End, s.
    pub end_s: f64,
}

/// A waveform plot.
#[derive(Debug, Clone, Default)]
pub struct WaveformPlot<'a> {
    /// Title line.
    pub title: &'a str,
    /// Caption line.
    pub caption: &'a str,
    /// The trace drawn in the main colour (an output).
    pub output: Trace<'a>,
    /// An optional second trace drawn lighter (the input).
    pub input: Option<Trace<'a>>,
    /// Time window shown `(start, end)`, s; `None`: the whole output trace.
    pub window_s: Option<(f64, f64)>,
    /// Supply rails `(neg, pos)`, V.
    pub rails: Option<(f64, f64)>,
    /// Output swing limits `(neg, pos)`, V.
    pub swing: Option<(f64, f64)>,
    /// Input common-mode window `(low, high)`, V.
    pub common_mode: Option<(f64, f64)>,
    /// Event spans to shade.
    pub spans: &'a [EventSpan],
}

fn check_trace(what: &'static str, t: &Trace) -> Result<(), PlotError> {
    if t.samples.is_empty() {
        return Err(PlotError::Empty {
            plot: PLOT,
            what,
            need: 1,
        });
    }
    if !(t.rate.is_finite() && t.rate > 0.0) {
        return Err(PlotError::BadSetting {
            plot: PLOT,
            what: "rate",
            value: format!("{}", t.rate),
            expected: "a sample rate above 0 Hz",
        });
    }
    check_finite(PLOT, "start_s", &[t.start_s])?;
    check_finite(PLOT, what, t.samples)
}

/// Indices of the samples of `t` inside `[t0, t1]` seconds.
fn in_window(t: &Trace, t0: f64, t1: f64) -> std::ops::Range<usize> {
    let n = t.samples.len();
    // A sample within 1e-9 of a sample period of an edge counts as inside (rounding of
    // times such as 1 ms * 48 kHz).
    let a = ((t0 - t.start_s) * t.rate - 1e-9).ceil().max(0.0);
    let b = ((t1 - t.start_s) * t.rate + 1e-9).floor() + 1.0;
    let a = (a as usize).min(n);
    let b = (b.max(0.0) as usize).min(n);
    a..b.max(a)
}

/// Draw a waveform as SVG (time axis in ms).
pub fn waveform_svg(p: &WaveformPlot) -> Result<String, PlotError> {
    check_trace("output", &p.output)?;
    if let Some(t) = &p.input {
        check_trace("input", t)?;
    }
    let out = &p.output;
    let (t0, t1) = match p.window_s {
        Some(w) => w,
        None => (
            out.start_s,
            out.start_s + (out.samples.len().max(2) - 1) as f64 / out.rate,
        ),
    };
    check_range(PLOT, "window_s", t0, t1)?;
    for (what, pair) in [
        ("rails", p.rails),
        ("swing", p.swing),
        ("common_mode", p.common_mode),
    ] {
        if let Some((a, b)) = pair {
            check_range(PLOT, what, a, b)?;
        }
    }
    for s in p.spans {
        check_range(PLOT, "spans", s.start_s, s.end_s)?;
    }
    let r_out = in_window(out, t0, t1);
    let r_in = p.input.as_ref().map(|t| in_window(t, t0, t1));
    let mut vals: Vec<f64> = Vec::new();
    let mut extend = |lo: f64, hi: f64| {
        vals.push(lo);
        vals.push(hi);
    };
    let seg = &out.samples[r_out.clone()];
    if !seg.is_empty() {
        extend(
            seg.iter().copied().fold(f64::INFINITY, f64::min),
            seg.iter().copied().fold(f64::NEG_INFINITY, f64::max),
        );
    }
    if let (Some(t), Some(r)) = (&p.input, &r_in) {
        let s = &t.samples[r.clone()];
        if !s.is_empty() {
            extend(
                s.iter().copied().fold(f64::INFINITY, f64::min),
                s.iter().copied().fold(f64::NEG_INFINITY, f64::max),
            );
        }
    }
    for (a, b) in [p.rails, p.swing, p.common_mode].into_iter().flatten() {
        extend(a, b);
    }
    if vals.is_empty() {
        return Err(PlotError::Empty {
            plot: PLOT,
            what: "samples within window_s",
            need: 1,
        });
    }
    let vlo = vals.iter().copied().fold(f64::INFINITY, f64::min);
    let vhi = vals.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let pad = 0.04 * (vhi - vlo);
    let (ylo, yhi) = nice_linear_range(vlo - pad, vhi + pad);
    let frame = Frame {
        x: Axis {
            label: "Time (ms)".to_string(),
            scale: Scale::Linear,
            format: TickFormat::Plain,
            lo: t0 * 1e3,
            hi: t1 * 1e3,
        },
        y: Axis {
            label: "Voltage (V)".to_string(),
            scale: Scale::Linear,
            format: TickFormat::Plain,
            lo: ylo,
            hi: yhi,
        },
    };
    let mut svg = Svg::new(PLOT, p.title);
    svg.axes(&frame);

    // Event spans, clipped to the window.
    svg.raw("<g class=\"spans\">\n");
    let mut kinds_seen = [false; 4];
    for s in p.spans {
        let a = s.start_s.max(t0);
        let b = s.end_s.min(t1);
        if a > b {
            continue;
        }
        let i = EventKind::ALL
            .iter()
            .position(|k| *k == s.kind)
            .unwrap_or(0);
        kinds_seen[i] = true;
        let (fill, op) = s.kind.fill();
        let x0 = frame.px(a * 1e3);
        let x1 = frame.px(b * 1e3);
        let _ = writeln!(
            svg.buf(),
            "<rect class=\"span {k}\" data-kind=\"{k}\" data-start-ms=\"{}\" data-end-ms=\"{}\" x=\"{}\" y=\"{TOP}\" width=\"{}\" height=\"{}\" fill=\"{fill}\" fill-opacity=\"{op}\"/>",
            num(a * 1e3),
            num(b * 1e3),
            px(x0),
            px((x1 - x0).max(0.5)),
            BOTTOM - TOP,
            k = s.kind.name(),
        );
    }
    svg.raw("</g>\n");

    // Level lines.
    let mut levels: Vec<(&str, &str, f64, String, &str, &str)> = Vec::new();
    if let Some((n, pp)) = p.rails {
        levels.push(("rail", "pos", pp, format!("rail {} V", fmt_v(pp)), DARK, ""));
        levels.push(("rail", "neg", n, format!("rail {} V", fmt_v(n)), DARK, ""));
    }
    if let Some((n, pp)) = p.swing {
        levels.push((
            "swing",
            "pos",
            pp,
            format!("swing limit {} V", fmt_v(pp)),
            MID,
            "6 4",
        ));
        levels.push((
            "swing",
            "neg",
            n,
            format!("swing limit {} V", fmt_v(n)),
            MID,
            "6 4",
        ));
    }
    if let Some((lo, hi)) = p.common_mode {
        levels.push((
            "common-mode",
            "high",
            hi,
            format!("CM high {} V", fmt_v(hi)),
            ACCENT2,
            "2 3",
        ));
        levels.push((
            "common-mode",
            "low",
            lo,
            format!("CM low {} V", fmt_v(lo)),
            ACCENT2,
            "2 3",
        ));
    }
    svg.raw("<g class=\"levels\">\n");
    for (class, which, v, label, colour, dash) in &levels {
        let y = frame.py(*v);
        let dash_attr = if dash.is_empty() {
            String::new()
        } else {
            format!(" stroke-dasharray=\"{dash}\"")
        };
        // Positive limits are labelled above their line, negative ones below.
        let ty = if matches!(*which, "pos" | "high") {
            y - 4.0
        } else {
            y + 12.0
        };
        // Rails are labelled at the left, swing limits at the right, the common-mode
        // window in the middle, so close levels do not overprint.
        let (tx, anchor) = match *class {
            "rail" => (LEFT + 6.0, "start"),
            "swing" => (RIGHT - 6.0, "end"),
            _ => ((LEFT + RIGHT) / 2.0, "middle"),
        };
        let _ = writeln!(
            svg.buf(),
            "<line class=\"level {class}\" data-level=\"{which}\" data-v=\"{}\" x1=\"{LEFT}\" y1=\"{y}\" x2=\"{RIGHT}\" y2=\"{y}\" stroke=\"{colour}\" stroke-width=\"1\"{dash_attr}/>\
             <text class=\"level-label\" x=\"{}\" y=\"{}\" text-anchor=\"{anchor}\" fill=\"{colour}\">{}</text>",
            num(*v),
            px(tx),
            px(ty),
            esc(label),
            y = px(y),
        );
    }
    svg.raw("</g>\n");

    // Traces: input under output.
    let mut legend = Vec::new();
    if let (Some(t), Some(r)) = (&p.input, r_in) {
        let pts = trace_points(&frame, t, r.clone());
        svg.path(
            "input",
            "input",
            "",
            &pts,
            r.len(),
            &format!("stroke=\"{LIGHT}\""),
        );
        legend.push((
            "data-series=\"input\"".to_string(),
            format!("<line x1=\"0\" y1=\"5\" x2=\"18\" y2=\"5\" stroke=\"{LIGHT}\" stroke-width=\"2\"/>"),
            "input".to_string(),
        ));
    }
    let pts = trace_points(&frame, out, r_out.clone());
    svg.path(
        "output",
        "output",
        "",
        &pts,
        r_out.len(),
        &format!("stroke=\"{ACCENT}\""),
    );
    legend.insert(
        0,
        (
            "data-series=\"output\"".to_string(),
            format!("<line x1=\"0\" y1=\"5\" x2=\"18\" y2=\"5\" stroke=\"{ACCENT}\" stroke-width=\"2\"/>"),
            "output".to_string(),
        ),
    );
    for (i, k) in EventKind::ALL.iter().enumerate() {
        if kinds_seen[i] {
            let (fill, op) = k.fill();
            legend.push((
                format!("data-kind=\"{}\"", k.name()),
                format!("<rect x=\"0\" y=\"0\" width=\"18\" height=\"10\" fill=\"{fill}\" fill-opacity=\"{op}\"/>"),
                k.label().to_string(),
            ));
        }
    }
    svg.legend(&legend);
    Ok(svg.finish(p.title, p.caption))
}

fn trace_points(frame: &Frame, t: &Trace, r: std::ops::Range<usize>) -> Vec<(f64, f64)> {
    let start = r.start;
    decimate(t.samples[r].iter().enumerate().map(|(i, &v)| {
        let time_ms = (t.start_s + (start + i) as f64 / t.rate) * 1e3;
        (frame.px(time_ms), frame.py(v).clamp(TOP, BOTTOM))
    }))
}

/// A voltage with up to three decimals, trailing zeros trimmed.
pub(crate) fn fmt_v(v: f64) -> String {
    let s = format!("{v:.3}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s == "-0" {
        "0".to_string()
    } else {
        s.to_string()
    }
}
