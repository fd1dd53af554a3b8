//! The SVG document: escaping, number printing, the frame (title, caption, axes, grid).

use std::fmt::Write;

use super::axis::{Axis, Scale};
use super::{HEIGHT, WIDTH};

/// Left edge of the plot area, px.
pub(crate) const LEFT: f64 = 78.0;
/// Right edge of the plot area, px.
pub(crate) const RIGHT: f64 = WIDTH - 30.0;
/// Top edge of the plot area, px.
pub(crate) const TOP: f64 = 52.0;
/// Bottom edge of the plot area, px.
pub(crate) const BOTTOM: f64 = HEIGHT - 86.0;

/// Main series colour (muted slate blue).
pub(crate) const ACCENT: &str = "#3d6a8a";
/// Second accent (muted ochre): markers, thresholds, second series.
pub(crate) const ACCENT2: &str = "#b0793a";
/// Light blue-grey for a secondary trace.
pub(crate) const LIGHT: &str = "#a9bccb";
/// Dark grey: rails, text.
pub(crate) const DARK: &str = "#3a3a3a";
/// Mid grey: reference lines.
pub(crate) const MID: &str = "#7a7a7a";

/// Escape text for XML character data and attribute values.
pub(crate) fn esc(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '&' => out.push_str("&amp;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            // Characters XML 1.0 does not allow at all are dropped; tab, newline and CR
            // become a space (every text here is one line).
            '\t' | '\n' | '\r' => out.push(' '),
            c if (c as u32) < 0x20 || c == '\u{FFFE}' || c == '\u{FFFF}' => {}
            c => out.push(c),
        }
    }
    out
}

/// A pixel coordinate with 0.01 px resolution, trailing zeros trimmed.
pub(crate) fn px(v: f64) -> String {
    trim(format!("{v:.2}"))
}

/// A path coordinate with 0.1 px resolution.
pub(crate) fn px1(v: f64) -> String {
    trim(format!("{v:.1}"))
}

fn trim(mut s: String) -> String {
    if s.contains('.') {
        while s.ends_with('0') {
            s.pop();
        }
        if s.ends_with('.') {
            s.pop();
        }
    }
    if s == "-0" {
        s = "0".to_string();
    }
    s
}

/// A data value for a `data-*` attribute (shortest round-trip form).
pub(crate) fn num(v: f64) -> String {
    format!("{v}")
}

/// Mapping from data to pixels for one plot.
#[derive(Debug, Clone)]
pub(crate) struct Frame {
    pub x: Axis,
    pub y: Axis,
}

impl Frame {
    /// Pixel x of a data x.
    pub fn px(&self, x: f64) -> f64 {
        LEFT + self.x.norm(x) * (RIGHT - LEFT)
    }
    /// Pixel y of a data y.
    pub fn py(&self, y: f64) -> f64 {
        BOTTOM - self.y.norm(y) * (BOTTOM - TOP)
    }
}

/// An SVG document under construction.
pub(crate) struct Svg {
    out: String,
}

impl Svg {
    /// Start a document of plot kind `kind` (the root's `data-plot`).
    pub fn new(kind: &str, title: &str) -> Self {
        let mut out = String::with_capacity(32 * 1024);
        let _ = write!(
            out,
            "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n\
             <svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{w}\" height=\"{h}\" \
             viewBox=\"0 0 {w} {h}\" class=\"railsong-plot\" data-plot=\"{kind}\">\n\
             <title>{t}</title>\n",
            w = WIDTH,
            h = HEIGHT,
            t = esc(title),
        );
        let _ = write!(
            out,
            "<style>\
             text{{font-family:sans-serif;fill:{DARK}}}\
             .title{{font-size:16px;font-weight:bold}}\
             .caption{{font-size:11px;fill:#666666}}\
             .axis-label{{font-size:12px}}\
             .tick text{{font-size:11px;fill:#555555}}\
             .tick line{{stroke:#e3e3e3;stroke-width:1}}\
             .level-label,.marker-label,.legend text,.note{{font-size:11px}}\
             .level-label,.marker-label{{paint-order:stroke;stroke:#ffffff;stroke-width:3px;stroke-linejoin:round}}\
             .series{{fill:none;stroke-width:1.3;stroke-linejoin:round}}\
             </style>\n\
             <rect class=\"background\" x=\"0\" y=\"0\" width=\"{WIDTH}\" height=\"{HEIGHT}\" fill=\"#ffffff\"/>\n\
             <clipPath id=\"plot-clip\"><rect x=\"{LEFT}\" y=\"{TOP}\" width=\"{pw}\" height=\"{ph}\"/></clipPath>\n",
            pw = RIGHT - LEFT,
            ph = BOTTOM - TOP,
        );
        Svg { out }
    }

    /// Append raw markup (already escaped).
    pub fn raw(&mut self, s: &str) {
        self.out.push_str(s);
    }

    /// The underlying buffer, for `write!`.
    pub fn buf(&mut self) -> &mut String {
        &mut self.out
    }

    /// Grid and ticks of both axes (drawn first, under the data).
    pub fn axes(&mut self, frame: &Frame) {
        self.axis(frame, true);
        self.axis(frame, false);
    }

    fn axis(&mut self, frame: &Frame, is_x: bool) {
        let a = if is_x { &frame.x } else { &frame.y };
        let (pmin, pmax) = if is_x { (LEFT, RIGHT) } else { (BOTTOM, TOP) };
        let _ = writeln!(
            self.out,
            "<g class=\"axis {}\" data-scale=\"{}\" data-min=\"{}\" data-max=\"{}\" data-px-min=\"{}\" data-px-max=\"{}\">",
            if is_x { "x" } else { "y" },
            match a.scale {
                Scale::Linear => "linear",
                Scale::Log => "log",
            },
            num(a.lo),
            num(a.hi),
            num(pmin),
            num(pmax),
        );
        for (v, label) in a.ticks() {
            if is_x {
                let x = px(frame.px(v));
                let _ = writeln!(
                    self.out,
                    "<g class=\"tick\" data-value=\"{}\"><line x1=\"{x}\" y1=\"{TOP}\" x2=\"{x}\" y2=\"{BOTTOM}\"/>\
                     <line class=\"tick-mark\" x1=\"{x}\" y1=\"{BOTTOM}\" x2=\"{x}\" y2=\"{}\" stroke=\"{MID}\"/>\
                     <text x=\"{x}\" y=\"{}\" text-anchor=\"middle\">{}</text></g>",
                    num(v),
                    BOTTOM + 5.0,
                    BOTTOM + 18.0,
                    esc(&label)
                );
            } else {
                let y = px(frame.py(v));
                let _ = writeln!(
                    self.out,
                    "<g class=\"tick\" data-value=\"{}\"><line x1=\"{LEFT}\" y1=\"{y}\" x2=\"{RIGHT}\" y2=\"{y}\"/>\
                     <line class=\"tick-mark\" x1=\"{}\" y1=\"{y}\" x2=\"{LEFT}\" y2=\"{y}\" stroke=\"{MID}\"/>\
                     <text x=\"{}\" y=\"{}\" text-anchor=\"end\">{}</text></g>",
                    num(v),
                    LEFT - 5.0,
                    LEFT - 8.0,
                    px(frame.py(v) + 4.0),
                    esc(&label)
                );
            }
        }
        self.out.push_str("</g>\n");
        if is_x {
            let _ = writeln!(
                self.out,
                "<text class=\"axis-label x\" x=\"{}\" y=\"{}\" text-anchor=\"middle\">{}</text>",
                px((LEFT + RIGHT) / 2.0),
                BOTTOM + 40.0,
                esc(&a.label)
            );
        } else {
            let cy = px((TOP + BOTTOM) / 2.0);
            let _ = writeln!(
                self.out,
                "<text class=\"axis-label y\" x=\"20\" y=\"{cy}\" text-anchor=\"middle\" transform=\"rotate(-90 20 {cy})\">{}</text>",
                esc(&a.label)
            );
        }
    }

    /// Frame of the plot area, title and caption (drawn last, on top of the data).
    pub fn finish(mut self, title: &str, caption: &str) -> String {
        let _ = write!(
            self.out,
            "<rect class=\"plot-area\" x=\"{LEFT}\" y=\"{TOP}\" width=\"{}\" height=\"{}\" fill=\"none\" stroke=\"{MID}\" stroke-width=\"1\"/>\n\
             <text class=\"title\" x=\"{LEFT}\" y=\"26\">{}</text>\n\
             <text class=\"caption\" x=\"{LEFT}\" y=\"{}\">{}</text>\n</svg>\n",
            RIGHT - LEFT,
            BOTTOM - TOP,
            esc(title),
            HEIGHT - 14.0,
            esc(caption)
        );
        self.out
    }

    /// A series path from pixel points (already decimated).
    pub fn path(
        &mut self,
        class: &str,
        name: &str,
        extra: &str,
        pts: &[(f64, f64)],
        source: usize,
        style: &str,
    ) {
        self.paths(
            class,
            name,
            extra,
            std::slice::from_ref(&pts),
            source,
            style,
        );
    }

    /// A series path made of sub-paths (each starts with `M`).
    pub fn paths<P: AsRef<[(f64, f64)]>>(
        &mut self,
        class: &str,
        name: &str,
        extra: &str,
        subpaths: &[P],
        source: usize,
        style: &str,
    ) {
        let total: usize = subpaths.iter().map(|p| p.as_ref().len()).sum();
        let _ = write!(
            self.out,
            "<path class=\"series {class}\" data-series=\"{}\" data-points=\"{total}\" data-source-points=\"{source}\"{extra} clip-path=\"url(#plot-clip)\" {style} d=\"",
            esc(name),
        );
        for pts in subpaths {
            for (i, &(x, y)) in pts.as_ref().iter().enumerate() {
                self.out.push(if i == 0 { 'M' } else { 'L' });
                self.out.push_str(&px1(x));
                self.out.push(',');
                self.out.push_str(&px1(y));
            }
        }
        self.out.push_str("\"/>\n");
    }

    /// A legend row above the top right of the plot area. Each entry: the item's
    /// attribute (`data-kind="..."` or `data-series="..."`), its swatch markup drawn in a
    /// 18 x 10 box at the origin, and its label.
    pub fn legend(&mut self, entries: &[(String, String, String)]) {
        if entries.is_empty() {
            return;
        }
        // One row above the plot area, right-aligned (clear of the data and of the title,
        // which sits higher).
        let widths: Vec<f64> = entries
            .iter()
            .map(|e| 24.0 + 6.3 * e.2.chars().count() as f64 + 14.0)
            .collect();
        let total: f64 = widths.iter().sum();
        let _ = writeln!(
            self.out,
            "<g class=\"legend\" transform=\"translate({} {})\">",
            px(RIGHT - total + 14.0),
            px(TOP - 17.0)
        );
        let mut x = 0.0;
        for ((attr, swatch, label), w) in entries.iter().zip(&widths) {
            let _ = writeln!(
                self.out,
                "<g class=\"legend-item\" {attr} transform=\"translate({} 0)\">{swatch}<text x=\"24\" y=\"9\">{}</text></g>",
                px(x),
                esc(label)
            );
            x += w;
        }
        self.out.push_str("</g>\n");
    }
}

/// Clip the segment `(x0,y0)-(x1,y1)` (pixels) to the plot area (Liang-Barsky).
pub(crate) fn clip_to_area(x0: f64, y0: f64, x1: f64, y1: f64) -> Option<(f64, f64, f64, f64)> {
    let (dx, dy) = (x1 - x0, y1 - y0);
    let mut t0: f64 = 0.0;
    let mut t1: f64 = 1.0;
    for (p, q) in [
        (-dx, x0 - LEFT),
        (dx, RIGHT - x0),
        (-dy, y0 - TOP),
        (dy, BOTTOM - y0),
    ] {
        if p == 0.0 {
            if q < 0.0 {
                return None;
            }
        } else {
            let r = q / p;
            if p < 0.0 {
                t0 = t0.max(r);
            } else {
                t1 = t1.min(r);
            }
        }
    }
    if t0 > t1 {
        return None;
    }
    Some((x0 + t0 * dx, y0 + t0 * dy, x0 + t1 * dx, y0 + t1 * dy))
}
