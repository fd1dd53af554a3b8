//! Parameter sweeps: the values of one key path, and the parallel run of the points.
//!
//! Values are given as text with the path's own unit ("47k", "3 Vpk", "1 kHz", "0.4") and
//! passed to the patch layer as a `--set PATH=VALUE` override, so every value is checked by
//! the same rules as the patch file. A range `FROM..TO` is split into a number (with its SI
//! prefix or resistor letter code applied) and a unit text, which both ends must share.

use super::length::{study_frames, StudyLength};
use rayon::prelude::*;
use serde::Serialize;

use super::StudyError;
use crate::analysis::Settings;
use crate::measure::{self, Measurement, OutputReport};
use crate::parts::eseries::Series;
use crate::patch;
use crate::render::{self, RenderOptions};

/// One value of a sweep.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Value {
    /// The text passed to the patch layer.
    pub text: String,
    /// The number, in the unit of the text with its prefix applied (ohms for "47k", volts
    /// for "3 Vpk"), for tables and crossings.
    pub x: f64,
}

/// How the points of a range are spaced.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Spacing {
    /// Equal steps.
    Linear,
    /// Equal ratios (both ends must be above 0).
    Log,
}

fn prefix(c: char) -> Option<f64> {
    Some(match c {
        'f' => 1e-15,
        'p' => 1e-12,
        'n' => 1e-9,
        'u' | 'µ' => 1e-6,
        'm' => 1e-3,
        'k' | 'K' => 1e3,
        'M' => 1e6,
        'G' => 1e9,
        'R' | 'r' => 1.0,
        _ => return None,
    })
}

/// Split `text` into a number and its unit: `"47k"` -> (47000, ""), `"4k7"` -> (4700, ""),
/// `"0.5 Vpk"` -> (0.5, "Vpk"), `"1 kHz"` -> (1000, "Hz"), `"2 ms"` -> (0.002, "s"),
/// `"-10 dBu"` -> (-10, "dBu"). A prefix letter followed by more letters is a prefix only
/// when the rest is a unit (so `"5 mV"` is milli, but `"10 dBu"` has no prefix).
pub fn parse_quantity(text: &str) -> Result<(f64, String), StudyError> {
    let t = text.trim();
    let bad = || {
        StudyError::arg(
            "value",
            text,
            "a number with an optional prefix and unit, e.g. 47k, 4k7, 0.5 Vpk, 1 kHz",
        )
    };
    let end = t
        .char_indices()
        .find(|&(i, c)| {
            !(c.is_ascii_digit()
                || c == '.'
                || ((c == '-' || c == '+')
                    && (i == 0 || matches!(t.as_bytes()[i - 1], b'e' | b'E')))
                || ((c == 'e' || c == 'E')
                    && t[i + 1..]
                        .starts_with(|d: char| d.is_ascii_digit() || d == '-' || d == '+')))
        })
        .map_or(t.len(), |(i, _)| i);
    let num: f64 = t[..end].parse().map_err(|_| bad())?;
    let rest = &t[end..];
    // resistor letter code: 4k7, 2M2, 470R (the letter is the decimal point)
    let mut chars = rest.chars();
    if let Some(c) = chars.next() {
        let tail = chars.as_str();
        if let Some(mult) = prefix(c) {
            if !tail.is_empty()
                && tail.bytes().all(|b| b.is_ascii_digit())
                && !t[..end].contains('.')
            {
                let frac: f64 = format!("0.{tail}").parse().map_err(|_| bad())?;
                return Ok(((num + frac) * mult, String::new()));
            }
        }
    }
    let rest = rest.trim_start();
    let mut chars = rest.chars();
    match chars.next() {
        None => Ok((num, String::new())),
        Some(c) => {
            let tail = chars.as_str();
            let unit_like = |u: &str| {
                [
                    "V", "Vpk", "Vpp", "Vrms", "Hz", "s", "F", "A", "ohm", "Ω", "V/us", "V/s",
                ]
                .contains(&u)
            };
            match prefix(c) {
                Some(m) if tail.is_empty() || unit_like(tail) => Ok((num * m, tail.to_string())),
                _ => Ok((num, rest.to_string())),
            }
        }
    }
}

fn value(x: f64, unit: &str) -> Value {
    let text = if unit.is_empty() {
        format!("{x}")
    } else {
        format!("{x} {unit}")
    };
    Value { text, x }
}

/// `steps` values from `from` to `to` (both texts with the same unit).
pub fn range_values(
    from: &str,
    to: &str,
    steps: usize,
    spacing: Spacing,
) -> Result<Vec<Value>, StudyError> {
    if steps < 2 {
        return Err(StudyError::arg("--steps", steps.to_string(), "2 or more"));
    }
    let (a, ua) = parse_quantity(from)?;
    let (b, ub) = parse_quantity(to)?;
    if ua != ub {
        return Err(StudyError::arg(
            "--set",
            format!("{from}..{to}"),
            format!("both ends in the same unit (found '{ua}' and '{ub}')"),
        ));
    }
    if spacing == Spacing::Log && !(a > 0.0 && b > 0.0) {
        return Err(StudyError::arg(
            "--log",
            format!("{from}..{to}"),
            "both ends above 0",
        ));
    }
    Ok((0..steps)
        .map(|k| {
            let f = k as f64 / (steps - 1) as f64;
            let x = match spacing {
                Spacing::Linear => a + (b - a) * f,
                Spacing::Log => a * (b / a).powf(f),
            };
            value(x, &ua)
        })
        .collect())
}

/// An explicit list, `"10k,22k,47k"`: each text is passed on as written.
pub fn list_values(list: &str) -> Result<Vec<Value>, StudyError> {
    let out: Vec<Value> = list
        .split(',')
        .map(str::trim)
        .filter(|s| !s.is_empty())
        .map(|s| {
            parse_quantity(s).map(|(x, _)| Value {
                text: s.to_string(),
                x,
            })
        })
        .collect::<Result<_, _>>()?;
    if out.is_empty() {
        return Err(StudyError::arg("--values", list, "a comma-separated list"));
    }
    Ok(out)
}

/// Every value of an IEC 60063 series in `lo..hi` (inclusive), e.g. E24 in 10k..100k.
pub fn series_values(series: Series, lo: &str, hi: &str) -> Result<Vec<Value>, StudyError> {
    let (a, ua) = parse_quantity(lo)?;
    let (b, ub) = parse_quantity(hi)?;
    if ua != ub || !(a > 0.0 && b >= a) {
        return Err(StudyError::arg(
            "--range",
            format!("{lo}..{hi}"),
            "LO..HI in one unit with 0 < LO <= HI, e.g. 10k..100k",
        ));
    }
    let out: Vec<Value> = series
        .values_in(a, b)
        .into_iter()
        .map(|x| {
            // three significant figures, read back from decimal text: 12000, not 11999.999...
            let clean: f64 = format!("{x:.2e}").parse().unwrap_or(x);
            value(clean, &ua)
        })
        .collect();
    if out.is_empty() {
        return Err(StudyError::arg(
            "--range",
            format!("{lo}..{hi}"),
            format!("a range holding at least one {} value", series.name()),
        ));
    }
    Ok(out)
}

/// Figures a sweep can tabulate (names as in the JSON of `measure`; the event names are
/// durations summed over the op-amp stages upstream of the output).
pub const FIGURES: [&str; 20] = [
    "thd_percent",
    "thd_db",
    "thdn_db",
    "sinad_db",
    "enob",
    "snr_db",
    "peak_v",
    "rms_v",
    "dc_v",
    "crest_db",
    "headroom_pos_db",
    "headroom_neg_db",
    "rms_dbu",
    "rms_dbv",
    "imd_smpte_percent",
    "imd_ccif_percent",
    "clip_s",
    "slew_s",
    "cm_out_s",
    "reversed_s",
];

/// Default figures of a sweep.
pub const DEFAULT_FIGURES: [&str; 5] = [
    "thd_percent",
    "thdn_db",
    "peak_v",
    "headroom_pos_db",
    "headroom_neg_db",
];

/// Check a list of figure names against [`FIGURES`].
pub fn check_figures(names: &[String]) -> Result<(), StudyError> {
    for n in names {
        if !FIGURES.contains(&n.as_str()) {
            return Err(StudyError::arg(
                "--figure",
                n.clone(),
                format!("one of {}", FIGURES.join(", ")),
            ));
        }
    }
    Ok(())
}

/// The value of a figure of one output (`None`: it does not apply, or an unknown name).
pub fn figure(r: &OutputReport, name: &str) -> Option<f64> {
    let f = &r.figures;
    match name {
        "thd_percent" => f.thd_percent,
        "thd_db" => f.thd_db,
        "thdn_db" => f.thdn_db,
        "sinad_db" => f.sinad_db,
        "enob" => f.enob,
        "snr_db" => f.snr_db,
        "peak_v" => f.peak_v,
        "rms_v" => f.rms_v,
        "dc_v" => f.dc_v,
        "crest_db" => f.crest_db,
        "headroom_pos_db" => f.headroom_pos_db,
        "headroom_neg_db" => f.headroom_neg_db,
        "rms_dbu" => f.rms_dbu,
        "rms_dbv" => f.rms_dbv,
        "imd_smpte_percent" => f.imd_smpte_percent,
        "imd_ccif_percent" => f.imd_ccif_percent,
        "clip_s" | "slew_s" | "cm_out_s" | "reversed_s" => {
            Some(super::compare::event_total(r, name))
        }
        _ => None,
    }
}

/// The patch text a sweep runs on.
#[derive(Debug, Clone)]
pub struct PatchText<'a> {
    /// The TOML text.
    pub text: &'a str,
    /// Its name in messages (the file path).
    pub origin: &'a str,
    /// Folder for relative file paths.
    pub base_dir: &'a std::path::Path,
    /// A variant to apply first, if any.
    pub variant: Option<&'a str>,
}

/// One point of a sweep.
#[derive(Debug, Clone)]
pub struct Point {
    /// The value.
    pub value: Value,
    /// The measurement at this value.
    pub measurement: Measurement,
}

/// Run every value of `values` for `path`: load the patch with `fixed` overrides and then
/// `PATH=VALUE`, render (settle time plus one capture for a stationary patch unless
/// `length` is [`StudyLength::Full`]), measure. Points run in parallel on the current rayon
/// pool, each on its own (nothing shared but `tick`); the result is in the order of
/// `values`. `tick` is called once per finished point.
pub fn run(
    src: &PatchText,
    fixed: &[String],
    path: &str,
    values: &[Value],
    settings: &Settings,
    length: StudyLength,
    tick: &(dyn Fn() + Sync),
) -> Result<Vec<Point>, StudyError> {
    values
        .par_iter()
        .map(|v| {
            let mut sets = fixed.to_vec();
            sets.push(format!("{path}={}", v.text));
            let p =
                patch::parse_str_variant(src.text, src.origin, src.base_dir, src.variant, &sets)?;
            let opts = RenderOptions {
                frames: study_frames(&p, length),
                ..RenderOptions::default()
            };
            let run = render::render(&p, &opts, &mut |_| {})?;
            let mut measurement = measure::measure(&p, &run, None, settings, None, None);
            render::complete_thd(&p, &mut measurement, settings, None)?;
            tick();
            Ok(Point {
                value: v.clone(),
                measurement,
            })
        })
        .collect()
}

/// Where THD (`thd_percent`) of output `output` reaches `threshold` (%) as `path` varies,
/// found on the circuit: the first upward crossing between the sweep's `points` (value,
/// THD %) brackets it, then [`crate::analysis::sweep::find_crossing`] renders and measures
/// the patch at values inside the bracket (each a `PATH=VALUE` override with `unit`, the
/// sweep's own unit) until the value is known within `rel_tol` (0.1 %:
/// [`crate::analysis::sweep::CROSSING_TOLERANCE`]). `Ok(None)` when the sweep does not
/// cross, or THD cannot be measured inside the bracket.
#[allow(clippy::too_many_arguments)]
pub fn find_thd_crossing(
    src: &PatchText,
    fixed: &[String],
    path: &str,
    unit: &str,
    points: &[(f64, f64)],
    threshold: f64,
    rel_tol: f64,
    settings: &Settings,
    output: &str,
    length: StudyLength,
) -> Result<Option<f64>, StudyError> {
    let Some((lo, hi)) = crate::analysis::sweep::bracket(points, threshold) else {
        return Ok(None);
    };
    let mut failed: Option<StudyError> = None;
    let mut eval = |x: f64| -> Option<f64> {
        let r = (|| -> Result<Option<f64>, StudyError> {
            let mut sets = fixed.to_vec();
            sets.push(format!("{path}={}", value(x, unit).text));
            let p =
                patch::parse_str_variant(src.text, src.origin, src.base_dir, src.variant, &sets)?;
            let opts = RenderOptions {
                frames: study_frames(&p, length),
                ..RenderOptions::default()
            };
            let run = render::render(&p, &opts, &mut |_| {})?;
            let mut m = measure::measure(&p, &run, None, settings, Some(output), None);
            render::complete_thd(&p, &mut m, settings, None)?;
            Ok(m.outputs.get(output).and_then(|r| r.figures.thd_percent))
        })();
        match r {
            Ok(t) => t,
            Err(e) => {
                failed = Some(e);
                None
            }
        }
    };
    let at = crate::analysis::sweep::find_crossing(lo, hi, threshold, rel_tol, &mut eval);
    match failed {
        Some(e) => Err(e),
        None => Ok(at),
    }
}

/// Where a figure crosses `threshold` between points, interpolated on log scales of both
/// value and figure (as [`crate::analysis::sweep::level_at_thd`]); values and figures must be
/// above 0. For THD in percent pass e.g. `1.0`.
pub fn crossing(points: &[(f64, f64)], threshold: f64) -> Option<f64> {
    crate::analysis::sweep::level_at_thd(points, threshold)
}
