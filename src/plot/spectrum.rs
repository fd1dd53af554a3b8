//! Spectrum plot: level in dB against log frequency.

use std::fmt::Write;

use super::axis::{Axis, Scale, TickFormat};
use super::decimate::decimate;
use super::doc::{esc, num, px, Frame, Svg, ACCENT, ACCENT2, BOTTOM, MID, TOP};
use super::{check_finite, check_range, check_same_len, PlotError};
use crate::analysis::distortion::{HarmonicLevel, ThdResult};
use crate::analysis::levels::{peak_to_dbfs, v_to_dbv};
use crate::analysis::Spectrum;

const PLOT: &str = "spectrum";

/// Levels below this are drawn at this value (a zero amplitude has no dB value).
pub const FLOOR_DB: f64 = -400.0;

/// How spectrum amplitudes become dB.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum DbScale {
    /// dBV: `20 log10(A / sqrt 2 / 1 V)` (the bin's sine amplitude as rms, re 1 V rms).
    Dbv,
    /// dBFS: `20 log10(A / full_scale_v)` (a sine of peak `full_scale_v` reads 0 dBFS).
    Dbfs {
        /// Peak voltage of a full-scale sine, V.
        full_scale_v: f64,
    },
}

impl DbScale {
    /// The unit label (`"dBV"`, `"dBFS"`).
    pub fn unit(self) -> &'static str {
        match self {
            DbScale::Dbv => "dBV",
            DbScale::Dbfs { .. } => "dBFS",
        }
    }
}

/// Frequencies (Hz) and levels (dB) of every bin of `spectrum`, levels clamped at
/// [`FLOOR_DB`].
pub fn spectrum_db(spectrum: &Spectrum, scale: DbScale) -> Result<(Vec<f64>, Vec<f64>), PlotError> {
    if let DbScale::Dbfs { full_scale_v } = scale {
        if !(full_scale_v.is_finite() && full_scale_v > 0.0) {
            return Err(PlotError::BadSetting {
                plot: PLOT,
                what: "full_scale_v",
                value: format!("{full_scale_v}"),
                expected: "a peak voltage above 0 V",
            });
        }
    }
    let freqs = (0..spectrum.amplitude.len())
        .map(|k| spectrum.freq_of(k))
        .collect();
    let levels = spectrum
        .amplitude
        .iter()
        .map(|&a| {
            let d = match scale {
                DbScale::Dbv => v_to_dbv(a / std::f64::consts::SQRT_2),
                DbScale::Dbfs { full_scale_v } => peak_to_dbfs(a, full_scale_v),
            };
            if d.is_nan() {
                FLOOR_DB
            } else {
                d.max(FLOOR_DB)
            }
        })
        .collect();
    Ok((freqs, levels))
}

/// The settings line of a THD result: `window blackman-harris-7, FFT 65536, band 20 Hz -
/// 24 kHz, coherent capture`.
pub fn settings_caption(thd: &ThdResult) -> String {
    format!(
        "window {}, FFT {}, band {}Hz - {}Hz, {}",
        thd.window.name(),
        thd.fft_len,
        si_space(thd.bandwidth_hz[0]),
        si_space(thd.bandwidth_hz[1]),
        if thd.coherent {
            "coherent capture"
        } else {
            "non-coherent capture"
        }
    )
}

/// `20 k` style: value, space, prefix (so `Hz` follows the prefix).
fn si_space(v: f64) -> String {
    let s = super::axis::fmt_si(v);
    match s.chars().last() {
        Some(c) if c.is_ascii_alphabetic() => format!("{} {}", &s[..s.len() - 1], c),
        _ => format!("{s} "),
    }
}

/// A harmonic to mark on a spectrum.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HarmonicMark {
    /// Order (2 = second harmonic).
    pub order: usize,
    /// Where it was measured, Hz (the folded frequency for an aliased harmonic).
    pub freq_hz: f64,
    /// Level relative to the fundamental, dB.
    pub dbc: f64,
}

impl HarmonicMark {
    /// Marks for the harmonics of a THD result.
    pub fn from_levels(levels: &[HarmonicLevel]) -> Vec<HarmonicMark> {
        levels
            .iter()
            .map(|h| HarmonicMark {
                order: h.order,
                freq_hz: h.freq_hz,
                dbc: h.dbc,
            })
            .collect()
    }
}

/// A spectrum plot.
#[derive(Debug, Clone, Default)]
pub struct SpectrumPlot<'a> {
    /// Title line.
    pub title: &'a str,
    /// Caption line (settings; see [`settings_caption`]).
    pub caption: &'a str,
    /// Bin frequencies, Hz, non-decreasing.
    pub freq_hz: &'a [f64],
    /// Bin levels, dB in `unit`.
    pub level_db: &'a [f64],
    /// The dB unit for the y label (`"dBV"`, `"dBFS"`).
    pub unit: &'a str,
    /// Frequency range shown; `None`: 20 Hz to the last bin (Nyquist).
    pub band_hz: Option<(f64, f64)>,
    /// Level range shown; `None`: fitted (10 dB steps, at most 200 dB deep).
    pub db_range: Option<(f64, f64)>,
    /// Harmonics to mark.
    pub harmonics: &'a [HarmonicMark],
    /// Harmonics below this many dBc are not marked (`None`: all are).
    pub hide_below_dbc: Option<f64>,
    /// Noise-floor line; `None`: the median of the bin levels in the band.
    pub noise_floor_db: Option<f64>,
}

/// Median of a non-empty slice (mean of the two middle values for an even count).
pub(crate) fn median(values: &[f64]) -> f64 {
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

/// Draw a spectrum as SVG.
pub fn spectrum_svg(p: &SpectrumPlot) -> Result<String, PlotError> {
    let f = p.freq_hz;
    let l = p.level_db;
    check_same_len(PLOT, "level_db", l.len(), "freq_hz", f.len())?;
    check_finite(PLOT, "freq_hz", f)?;
    check_finite(PLOT, "level_db", l)?;
    if let Some(i) = (1..f.len()).find(|&i| f[i] < f[i - 1]) {
        return Err(PlotError::BadSetting {
            plot: PLOT,
            what: "freq_hz",
            value: format!("{} after {} at index {i}", f[i], f[i - 1]),
            expected: "non-decreasing frequencies",
        });
    }
    let (lo, hi) = match p.band_hz {
        Some(b) => b,
        None => (20.0, f.last().copied().unwrap_or(0.0)),
    };
    check_range(PLOT, "band_hz", lo, hi)?;
    if lo <= 0.0 {
        return Err(PlotError::BadSetting {
            plot: PLOT,
            what: "band_hz",
            value: format!("{lo} .. {hi}"),
            expected: "a lower edge above 0 Hz (log axis)",
        });
    }
    let first = f.partition_point(|&x| x < lo);
    let last = f.partition_point(|&x| x <= hi);
    if first >= last {
        return Err(PlotError::Empty {
            plot: PLOT,
            what: "bins within band_hz",
            need: 1,
        });
    }
    let band = &l[first..last];
    let (floor, floor_source) = match p.noise_floor_db {
        Some(v) => {
            check_finite(PLOT, "noise_floor_db", &[v])?;
            (v, "given")
        }
        None => (median(band), "median"),
    };
    let (db_lo, db_hi) = match p.db_range {
        Some((a, b)) => {
            check_range(PLOT, "db_range", a, b)?;
            (a, b)
        }
        None => {
            let max = band.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            let min = band
                .iter()
                .copied()
                .fold(f64::INFINITY, f64::min)
                .min(floor);
            let top = (max / 10.0).ceil() * 10.0 + 10.0;
            let bottom = ((min / 10.0).floor() * 10.0 - 10.0).max(top - 200.0);
            (bottom, top)
        }
    };
    let frame = Frame {
        x: Axis {
            label: "Frequency (Hz)".to_string(),
            scale: Scale::Log,
            format: TickFormat::Si,
            lo,
            hi,
        },
        y: Axis {
            label: super::axis::axis_title("Level", p.unit),
            scale: Scale::Linear,
            format: TickFormat::Plain,
            lo: db_lo,
            hi: db_hi,
        },
    };
    let mut svg = Svg::new(PLOT, p.title);
    svg.axes(&frame);
    let clamp_y = |y: f64| y.clamp(TOP, BOTTOM);
    let pts = decimate(
        f[first..last]
            .iter()
            .zip(band)
            .map(|(&x, &y)| (frame.px(x), clamp_y(frame.py(y)))),
    );
    svg.path(
        "spectrum",
        "spectrum",
        "",
        &pts,
        last - first,
        &format!("stroke=\"{ACCENT}\""),
    );
    // Noise floor.
    let fy = clamp_y(frame.py(floor));
    let _ = writeln!(
        svg.buf(),
        "<line class=\"noise-floor\" data-db=\"{}\" data-source=\"{floor_source}\" x1=\"{}\" y1=\"{y}\" x2=\"{}\" y2=\"{y}\" stroke=\"{MID}\" stroke-dasharray=\"6 4\"/>\
         <text class=\"marker-label noise-floor-label\" x=\"{}\" y=\"{}\" fill=\"{MID}\">noise floor {} {}{}</text>",
        num(floor),
        px(frame.px(lo)),
        px(frame.px(hi)),
        px(frame.px(lo) + 6.0),
        px(fy - 4.0),
        fmt_db(floor),
        esc(p.unit),
        if floor_source == "median" { " (median)" } else { "" },
        y = px(fy),
    );
    // Harmonics: marked only where they stand above the noise floor (by HARMONIC_ABOVE_FLOOR_DB),
    // labelled only where the label clears the previous one.
    let mut hidden = 0usize;
    let mut last_label_x = f64::NEG_INFINITY;
    svg.raw("<g class=\"harmonics\">\n");
    for h in p.harmonics {
        if !h.freq_hz.is_finite() || h.dbc.is_nan() {
            return Err(PlotError::BadSetting {
                plot: PLOT,
                what: "harmonics",
                value: format!("H{} at {} Hz, {} dBc", h.order, h.freq_hz, h.dbc),
                expected: "a finite frequency and a dBc value that is not NaN",
            });
        }
        if h.freq_hz < lo || h.freq_hz > hi {
            continue;
        }
        if p.hide_below_dbc.is_some_and(|t| h.dbc < t) {
            hidden += 1;
            continue;
        }
        // Marker on the highest bin within 3 bins of the harmonic's frequency.
        let k = f.partition_point(|&x| x < h.freq_hz);
        let a = k.saturating_sub(3).max(first);
        let b = (k + 4).min(last);
        let peak = l[a..b.max(a + 1).min(l.len())]
            .iter()
            .copied()
            .fold(f64::NEG_INFINITY, f64::max);
        if peak.is_nan() || peak <= floor + HARMONIC_ABOVE_FLOOR_DB {
            hidden += 1;
            continue;
        }
        let mx = frame.px(h.freq_hz);
        let my = clamp_y(frame.py(peak));
        let labelled = mx - last_label_x >= LABEL_GAP_PX;
        if labelled {
            last_label_x = mx;
        }
        let label = format!("H{} {} dBc", h.order, fmt_db(h.dbc));
        let len = 6.2 * label.chars().count() as f64;
        let (ty, anchor) = if my - 8.0 - len > TOP + 2.0 {
            (my - 8.0, "start")
        } else {
            (my + 8.0, "end")
        };
        let tx = mx + 4.0;
        let text = if labelled {
            format!(
                "<text class=\"marker-label\" x=\"{}\" y=\"{}\" text-anchor=\"{anchor}\" transform=\"rotate(-90 {} {})\">{}</text>",
                px(tx),
                px(ty),
                px(tx),
                px(ty),
                esc(&label)
            )
        } else {
            String::new()
        };
        let _ = writeln!(
            svg.buf(),
            "<g class=\"harmonic\" data-order=\"{}\" data-freq=\"{}\" data-dbc=\"{}\" data-labelled=\"{labelled}\">\
             <circle cx=\"{}\" cy=\"{}\" r=\"3\" fill=\"none\" stroke=\"{ACCENT2}\" stroke-width=\"1.5\"/>{text}</g>",
            h.order,
            num(h.freq_hz),
            num(h.dbc),
            px(mx),
            px(my),
        );
    }
    let _ = writeln!(
        svg.buf(),
        "</g><g class=\"harmonics-hidden\" data-count=\"{hidden}\"/>"
    );
    Ok(svg.finish(p.title, p.caption))
}

/// How far a harmonic's peak must stand above the noise floor to be marked, dB.
pub const HARMONIC_ABOVE_FLOOR_DB: f64 = 6.0;

/// Least horizontal distance between two harmonic labels (each drawn vertically, about
/// 11 px wide), px.
const LABEL_GAP_PX: f64 = 14.0;

/// A dB value with one decimal (`-9.5`, `-inf`).
fn fmt_db(v: f64) -> String {
    if v.is_finite() {
        let s = format!("{v:.1}");
        if s == "-0.0" {
            "0.0".to_string()
        } else {
            s
        }
    } else if v < 0.0 {
        "-inf".to_string()
    } else {
        "inf".to_string()
    }
}
