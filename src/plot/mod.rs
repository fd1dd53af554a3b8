//! Plots: pure functions that turn figures and signals into standalone SVG documents.
//!
//! Every plot function takes plain slices and small structs (so the caller can feed it from
//! [`crate::analysis`] results or from engine output) and returns the whole SVG document as a
//! `String`, or a [`PlotError`] naming the plot, the input and what was expected. Nothing here
//! does I/O and nothing panics on user input. The output is deterministic: the same input gives
//! the same bytes (no time stamps, no random ids).
//!
//! | function | what it draws |
//! |---|---|
//! | [`spectrum_svg`] | level in dB against log frequency, harmonics marked, noise floor dashed |
//! | [`waveform_svg`] | volts against time (ms), rails, swing limits, common-mode window, event spans |
//! | [`transfer_svg`] | output V against input V, ideal straight line dashed, rails |
//! | [`sweep_svg`] | a figure against a parameter, linear or log axes, crossings, threshold |
//! | [`histogram_svg`] | a spread of values in bins, min/median/max marked |
//!
//! Helpers: [`spectrum_db`] turns a [`crate::analysis::Spectrum`] into dBV or dBFS levels,
//! [`HarmonicMark::from_levels`] takes the harmonics of a
//! [`crate::analysis::ThdResult`], [`settings_caption`] writes the settings line of a THD result,
//! [`histogram_bins`] computes the bins a histogram would draw.
//!
//! ```
//! use railsong::plot::{sweep_svg, AxisSpec, Crossing, SweepPlot, SweepSeries, Threshold};
//! // THD (%) measured at five input levels (Vpk).
//! let points = [(0.5, 0.002), (1.0, 0.008), (2.0, 0.03), (4.0, 0.4), (8.0, 6.0)];
//! let at = railsong::analysis::sweep::level_at_thd(&points, 1.0).unwrap();
//! let svg = sweep_svg(&SweepPlot {
//!     title: "THD against level",
//!     caption: "997 Hz, harmonics 2-10",
//!     x: AxisSpec::log("Input level", "Vpk"),
//!     y: AxisSpec::log("THD", "%"),
//!     series: &[SweepSeries { name: "stage 1", points: &points }],
//!     crossings: &[Crossing { x: at, y: 1.0, label: format!("1 % THD at {at:.1} Vpk") }],
//!     threshold: Some(Threshold { y: 1.0, label: "1 % THD".into() }),
//! })
//! .unwrap();
//! assert!(svg.contains("data-series=\"stage 1\""));
//! assert!(svg.contains("class=\"crossing\""));
//! ```
//!
//! # Style
//! - Fixed canvas of [`WIDTH`] x [`HEIGHT`] px, white background, plot area framed in a
//!   mid grey, light grey grid lines at every tick. Generic `sans-serif` font.
//! - Neutral palette: greys for frame, grid, text and reference lines; two muted accents only,
//!   a slate blue (`#3d6a8a`, the main series) and an ochre (`#b0793a`, markers, thresholds,
//!   the second series). Further series use dark and mid grey with dash patterns. A secondary
//!   trace (the input of a waveform) is a light blue-grey.
//! - Reference lines (ideal gain, noise floor, swing limits, thresholds) are dashed; supply
//!   rails are solid dark grey; the common-mode window is dotted ochre.
//! - Axes carry a label with its unit in parentheses. Linear ticks use 1-2-5 steps (about six
//!   ticks). Log axes put ticks at 1, 2 and 5 times each decade when they span at most four
//!   decades (20, 50, 100, 200 ... 20k), at each decade up to twelve decades, and every other
//!   decade beyond. Frequency and parameter axes may print SI prefixes (`20k`, `4.7m`).
//! - A title on top (bold), a caption line at the bottom (settings, source), both XML-escaped,
//!   as is every other text and attribute taken from the caller. Labels drawn over data
//!   (harmonics, levels, crossings) have a white halo; a legend, when there is one, is a row
//!   above the top right of the plot area, clear of the data.
//! - Spectrum harmonic labels are vertical (they stay readable when harmonics crowd together
//!   at the top of a log axis); they read `H3 -9.5 dBc`.
//! - Long series are decimated per pixel column: for each run of consecutive points falling
//!   in the same 1 px column, the first, lowest, highest and last point are kept (in their
//!   original order), so peaks and the envelope survive and a path has at most about four
//!   points per column. A transfer curve may go back and forth (a ramp up and down, a sine
//!   input): it is cut into 1 px cells, points in the cell of the previous point are dropped
//!   and a step between two cells is drawn only the first time, so a curve retraced many times
//!   costs one pass (the cell grows if more than 16 000 points would remain). Coordinates are
//!   written with 0.1 px resolution (0.01 px for ticks and markers). A plot of a million
//!   samples stays well under 300 kB.
//!
//! # Machine-readable contract
//! Tests and tools can parse the SVG and find each element by class and data attributes;
//! every `data-*` number is printed with Rust's shortest round-trip formatting for `f64`.
//! - root `<svg class="railsong-plot" data-plot="spectrum|waveform|transfer|sweep|histogram">`.
//! - `<text class="title">`, `<text class="caption">`, `<text class="axis-label x|y">`.
//! - the plot area `<rect class="plot-area" x y width height>`.
//! - each axis `<g class="axis x|y" data-scale="linear|log" data-min data-max data-px-min
//!   data-px-max>`: the data range and the pixel coordinates it maps to (for `y`, `data-px-min`
//!   is the bottom of the plot area, the larger pixel value). Linear maps `v` to
//!   `px-min + (v - min) / (max - min) (px-max - px-min)`; log does the same with `log10`.
//! - inside each axis, `<g class="tick" data-value>` holding a `<line>` (at `x1`/`x2` for the x
//!   axis, `y1`/`y2` for y) and a `<text>` label.
//! - series: `<path class="series KIND" data-series="NAME" data-points="N" data-source-points="M"
//!   d="M x,y L x,y ...">` (`N` points drawn out of `M` given). Spectrum: `spectrum`;
//!   waveform: `output` and `input`; transfer: `transfer`; sweep: class `series sweep` with the
//!   caller's series name in `data-series` (and `data-index`), wrapped with its point markers in
//!   `<g class="series-group" data-series>`; histogram bars: `<rect class="bin" data-lo data-hi
//!   data-count>` inside `<g class="bins" data-rule="freedman-diaconis|sqrt" data-width
//!   data-count>`.
//! - spectrum: `<g class="harmonic" data-order data-freq data-dbc>` with a `<circle>` on the
//!   peak (the highest bin within 3 bins of `data-freq`) and a `<text>` `H3 -9.5 dBc`;
//!   `<g class="harmonics-hidden" data-count>` (how many were below `hide_below_dbc`);
//!   `<line class="noise-floor" data-db data-source="median|given">`.
//! - waveform: `<line class="level rail|swing|common-mode" data-level="pos|neg|low|high" data-v>`
//!   with a `<text class="level-label">`; event spans `<rect class="span KIND" data-kind="KIND"
//!   data-start-ms data-end-ms>`, `KIND` one of `clipping`, `slewing`, `out-of-input-range`,
//!   `reversed`; a legend `<g class="legend">` with `<g class="legend-item" data-kind|data-series>`.
//! - transfer: `<line class="reference ideal" data-slope data-offset>` (the ideal line, clipped
//!   to the plot area) and rail lines as for the waveform.
//! - sweep: `<line class="threshold" data-y>`, `<g class="crossing" data-x data-y>` with a
//!   `<circle>` and `<text>`; series points `<circle class="point" data-x data-y>` (series of
//!   at most 100 points).
//! - histogram: `<line class="stat min|median|max" data-stat data-value>` with a label, and
//!   `<text class="note">` naming the bin rule, bin count and width.

mod axis;
mod decimate;
mod doc;
mod histogram;
mod spectrum;
mod sweep;
mod transfer;
mod waveform;

pub use axis::{AxisSpec, Scale, TickFormat};
pub use histogram::{histogram_bins, histogram_svg, BinRule, Bins, HistogramPlot, MAX_BINS};
pub use spectrum::{
    settings_caption, spectrum_db, spectrum_svg, DbScale, HarmonicMark, SpectrumPlot, FLOOR_DB,
};
pub use sweep::{sweep_svg, Crossing, SweepPlot, SweepSeries, Threshold};
pub use transfer::{transfer_svg, TransferPlot};
pub use waveform::{waveform_svg, EventKind, EventSpan, Trace, WaveformPlot};

use thiserror::Error;

/// Canvas width, px.
pub const WIDTH: f64 = 800.0;
/// Canvas height, px.
pub const HEIGHT: f64 = 500.0;

/// Why a plot could not be drawn. Each message names the plot and the input.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum PlotError {
    /// An input that needs values has none.
    #[error("plot {plot}: `{what}` is empty, at least {need} value(s) are needed")]
    Empty {
        /// The plot.
        plot: &'static str,
        /// The input.
        what: &'static str,
        /// How many values are needed.
        need: usize,
    },
    /// Two inputs that pair up have different lengths.
    #[error(
        "plot {plot}: `{what}` has {got} values but `{other}` has {expected}; they must match"
    )]
    LengthMismatch {
        /// The plot.
        plot: &'static str,
        /// The input with the wrong length.
        what: &'static str,
        /// Its length.
        got: usize,
        /// The input it must match.
        other: &'static str,
        /// That input's length.
        expected: usize,
    },
    /// A value is NaN or infinite.
    #[error("plot {plot}: `{what}` value {index} is not finite ({value})")]
    NotFinite {
        /// The plot.
        plot: &'static str,
        /// The input.
        what: &'static str,
        /// Index of the value.
        index: usize,
        /// The value.
        value: f64,
    },
    /// A value on a log axis is not above zero.
    #[error("plot {plot}: `{what}` value {index} is {value}, a log axis needs values above 0")]
    NotPositive {
        /// The plot.
        plot: &'static str,
        /// The input.
        what: &'static str,
        /// Index of the value.
        index: usize,
        /// The value.
        value: f64,
    },
    /// A range or setting is unusable (empty, reversed, not finite, not positive).
    #[error("plot {plot}: `{what}` is {value}; expected {expected}")]
    BadSetting {
        /// The plot.
        plot: &'static str,
        /// The setting.
        what: &'static str,
        /// What was given, as text.
        value: String,
        /// What was expected.
        expected: &'static str,
    },
}

/// Check that every value is finite.
pub(crate) fn check_finite(
    plot: &'static str,
    what: &'static str,
    values: &[f64],
) -> Result<(), PlotError> {
    match values.iter().enumerate().find(|(_, v)| !v.is_finite()) {
        Some((index, &value)) => Err(PlotError::NotFinite {
            plot,
            what,
            index,
            value,
        }),
        None => Ok(()),
    }
}

/// Check that two paired inputs have the same length.
pub(crate) fn check_same_len(
    plot: &'static str,
    what: &'static str,
    got: usize,
    other: &'static str,
    expected: usize,
) -> Result<(), PlotError> {
    if got == expected {
        Ok(())
    } else {
        Err(PlotError::LengthMismatch {
            plot,
            what,
            got,
            other,
            expected,
        })
    }
}

/// Check a value range `lo < hi`, both finite.
pub(crate) fn check_range(
    plot: &'static str,
    what: &'static str,
    lo: f64,
    hi: f64,
) -> Result<(), PlotError> {
    if lo.is_finite() && hi.is_finite() && lo < hi {
        Ok(())
    } else {
        Err(PlotError::BadSetting {
            plot,
            what,
            value: format!("{lo} .. {hi}"),
            expected: "two finite values, the first below the second",
        })
    }
}
