//! `railsong sweep`: figures against a stepped value.

use std::path::{Path, PathBuf};

use railsong::analysis::Settings;
use railsong::measure;
use railsong::parts::eseries::Series;
use railsong::study::length::StudyLength;
use railsong::study::sweep::{self, PatchText, Spacing, Value};
use railsong::units::fmt_eng;

use super::common::{default_dir, failure_io, signal_error, stem_of, study_error};
use super::progress::Progress;
use super::Failure;

/// Options of `sweep`.
pub(crate) struct SweepArgs<'a> {
    pub patch: &'a Path,
    pub set: &'a str,
    pub steps: usize,
    pub log: bool,
    pub values: Option<&'a str>,
    pub series: Option<&'a str>,
    pub range: Option<&'a str>,
    pub figures: Option<&'a str>,
    pub with: &'a [String],
    pub variant: Option<&'a str>,
    pub csv: bool,
    pub json: bool,
    /// Write plots: (folder, force).
    pub plots: Option<(Option<PathBuf>, bool)>,
    /// Settle time plus one capture per point, or the whole length (`--full`).
    pub length: StudyLength,
}

pub(crate) fn split_range<'s>(flag: &str, s: &'s str) -> Result<(&'s str, &'s str), Failure> {
    match s.split_once("..") {
        Some((a, b)) if !a.trim().is_empty() && !b.trim().is_empty() => Ok((a.trim(), b.trim())),
        _ => Err(Failure::bad_input(format!(
            "{flag} {s}: expected FROM..TO, e.g. 10k..100k"
        ))),
    }
}

pub(crate) fn sweep_values(args: &SweepArgs) -> Result<(String, Vec<Value>), Failure> {
    let (path, rhs) = match args.set.split_once('=') {
        Some((p, r)) => (p.trim().to_string(), Some(r.trim())),
        None => (args.set.trim().to_string(), None),
    };
    if path.is_empty() {
        return Err(Failure::bad_input(format!(
            "--set {}: expected PATH=FROM..TO (or PATH with --values or --series)",
            args.set
        )));
    }
    let values = match (args.values, args.series, rhs) {
        (Some(list), None, None) => sweep::list_values(list),
        (None, Some(s), None) => {
            let series = Series::parse(s).ok_or_else(|| {
                Failure::bad_input(format!("--series {s}: expected E12, E24, E48, E96 or E192"))
            })?;
            let range = args.range.ok_or_else(|| {
                Failure::bad_input("--series needs --range LO..HI, e.g. --range 10k..100k")
            })?;
            let (lo, hi) = split_range("--range", range)?;
            sweep::series_values(series, lo, hi)
        }
        (None, None, Some(r)) => {
            let (a, b) = split_range("--set", r)?;
            let spacing = if args.log {
                Spacing::Log
            } else {
                Spacing::Linear
            };
            sweep::range_values(a, b, args.steps, spacing)
        }
        _ => {
            return Err(Failure::bad_input(format!(
                "--set {}: give exactly one of PATH=FROM..TO, --values LIST or --series NAME --range LO..HI (with --values or --series, --set takes the PATH alone)",
                args.set
            )))
        }
    }
    .map_err(study_error)?;
    Ok((path, values))
}

/// `railsong sweep`.
pub(crate) fn cmd_sweep(args: &SweepArgs) -> Result<(), Failure> {
    let (path, values) = sweep_values(args)?;
    let figures: Vec<String> = match args.figures {
        Some(f) => f
            .split(',')
            .map(|s| s.trim().to_string())
            .filter(|s| !s.is_empty())
            .collect(),
        None => sweep::DEFAULT_FIGURES
            .iter()
            .map(|s| s.to_string())
            .collect(),
    };
    sweep::check_figures(&figures).map_err(study_error)?;
    // Load once up front: a bad patch, variant or path is reported before any point runs.
    let origin = args.patch.display().to_string();
    let text = railsong::patch::read_text(args.patch).map_err(Failure::bad_input)?;
    let base_dir = match args.patch.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let src = PatchText {
        text: &text,
        origin: &origin,
        base_dir: &base_dir,
        variant: args.variant,
    };
    let mut first = args.with.to_vec();
    first.push(format!("{path}={}", values[0].text));
    let base = railsong::patch::parse_str_variant(&text, &origin, &base_dir, args.variant, &first)
        .map_err(Failure::bad_input)?;
    let pb = Progress::new(values.len() as u64, "sweep", "points", true);
    let tick = || pb.inc(1);
    let pts = sweep::run(
        &src,
        args.with,
        &path,
        &values,
        &Settings::default(),
        args.length,
        &tick,
    )
    .map_err(study_error)?;
    pb.finish();

    let mut folder = match &args.plots {
        Some((dir, force)) => {
            let dir = dir
                .clone()
                .unwrap_or_else(|| default_dir(&stem_of(args.patch)));
            let folder = super::common::open_folder(&dir, *force)?;
            // Every plot name is checked before the first is written.
            let names: Vec<String> = base
                .outputs
                .iter()
                .flat_map(|o| {
                    figures
                        .iter()
                        .map(move |f| format!("{}-sweep-{f}.svg", o.name))
                })
                .collect();
            folder.check_all(&names).map_err(signal_error)?;
            Some(folder)
        }
        None => None,
    };
    let mut json_out = serde_json::Map::new();
    if args.csv {
        say!("output,path,value,{}", figures.join(","));
    }
    for o in &base.outputs {
        let rows: Vec<(&Value, Vec<Option<f64>>)> = pts
            .iter()
            .map(|p| {
                let r = &p.measurement.outputs[&o.name];
                (
                    &p.value,
                    figures.iter().map(|f| sweep::figure(r, f)).collect(),
                )
            })
            .collect();
        let thd: Vec<(f64, f64)> = pts
            .iter()
            .filter_map(|p| {
                p.measurement.outputs[&o.name]
                    .figures
                    .thd_percent
                    .map(|t| (p.value.x, t))
            })
            .collect();
        // the crossings found on the circuit (extra renders inside the bracketing points)
        let xunit = sweep::parse_quantity(&values[0].text)
            .map(|q| q.1)
            .unwrap_or_default();
        let found = |th: f64| {
            sweep::find_thd_crossing(
                &src,
                args.with,
                &path,
                &xunit,
                &thd,
                th,
                railsong::analysis::sweep::CROSSING_TOLERANCE,
                &Settings::default(),
                &o.name,
                args.length,
            )
            .map_err(study_error)
        };
        let at1 = found(1.0)?;
        let at01 = found(0.1)?;
        // points where THD applied (a tone) but could not be measured (e.g. harmonics
        // above Nyquist): a sweep must not claim THD stays low there
        let unmeasured = pts
            .iter()
            .filter(|p| {
                p.measurement.outputs[&o.name]
                    .figures
                    .notes
                    .iter()
                    .any(|n| n.starts_with("thd:"))
            })
            .count();
        if let Some(folder) = folder.as_mut() {
            let log_x = args.log || args.series.is_some();
            for (k, f) in figures.iter().enumerate() {
                let pts: Vec<(f64, f64)> = rows
                    .iter()
                    .filter_map(|(v, fs)| fs[k].map(|y| (v.x, y)))
                    .filter(|(x, y)| x.is_finite() && y.is_finite())
                    .collect();
                let log_y = f == "thd_percent" && pts.iter().all(|p| p.1 > 0.0);
                if pts.len() < 2 || (log_x && pts.iter().any(|p| p.0 <= 0.0)) {
                    continue;
                }
                // axes named by what they show, with units and engineering ticks ("100k")
                let axis = |log: bool, label: &str, unit: &str| {
                    let mut a = if log {
                        railsong::plot::AxisSpec::log(label, unit)
                    } else {
                        railsong::plot::AxisSpec::linear(label, unit)
                    };
                    if !matches!(unit, "%" | "dB" | "dBFS" | "dBc") {
                        a.format = railsong::plot::TickFormat::Si;
                    }
                    a
                };
                let (y_label, y_unit) = measure::figure_label(f);
                // the crossings found on the circuit, marked only where found
                let crossings: Vec<railsong::plot::Crossing> = if f == "thd_percent" {
                    [(at01, 0.1), (at1, 1.0)]
                        .into_iter()
                        .filter_map(|(at, y)| {
                            at.map(|x| railsong::plot::Crossing {
                                x,
                                y,
                                label: format!(
                                    "{y} % THD at {}",
                                    fmt_eng(x, measure::key_unit(&path))
                                ),
                            })
                        })
                        .collect()
                } else {
                    Vec::new()
                };
                let title = format!("{}: {y_label} against {path}", o.name);
                let caption = format!("{} points; each a full render and measurement", pts.len());
                let series = [railsong::plot::SweepSeries {
                    name: f,
                    points: &pts,
                }];
                let svg = railsong::plot::sweep_svg(&railsong::plot::SweepPlot {
                    title: &title,
                    caption: &caption,
                    x: axis(log_x, &path, measure::key_unit(&path)),
                    y: axis(log_y, &y_label, y_unit),
                    series: &series,
                    crossings: &crossings,
                    threshold: (f == "thd_percent").then(|| railsong::plot::Threshold {
                        y: 1.0,
                        label: "1 % THD".into(),
                    }),
                });
                if let Ok(svg) = svg {
                    folder
                        .write_text(&format!("{}-sweep-{f}.svg", o.name), &svg)
                        .map_err(signal_error)?;
                }
            }
        }
        if args.json {
            let points: Vec<serde_json::Value> = rows
                .iter()
                .map(|(v, fs)| {
                    let mut m = serde_json::Map::new();
                    m.insert("value".into(), serde_json::json!(v.text));
                    m.insert("x".into(), serde_json::json!(v.x));
                    for (f, x) in figures.iter().zip(fs) {
                        m.insert(f.clone(), serde_json::json!(x));
                    }
                    serde_json::Value::Object(m)
                })
                .collect();
            json_out.insert(
                o.name.clone(),
                serde_json::json!({
                    "path": path,
                    "points": points,
                    "thd_1_percent_at": at1,
                    "thd_0_1_percent_at": at01,
                }),
            );
        } else if args.csv {
            for (v, fs) in &rows {
                let cells: Vec<String> = fs
                    .iter()
                    .map(|x| x.map_or(String::new(), |x| x.to_string()))
                    .collect();
                say!("{},{path},{},{}", o.name, v.x, cells.join(","));
            }
        } else {
            say!("output {}: sweep of {path}", o.name);
            let head: Vec<String> = figures.iter().map(|f| format!("{f:>16}")).collect();
            say!("  {:>14}  {}", "value", head.join(""));
            for (v, fs) in &rows {
                let cells: Vec<String> = fs
                    .iter()
                    .map(|x| x.map_or(format!("{:>16}", "-"), |x| format!("{x:>16.5}")))
                    .collect();
                let unit = sweep::parse_quantity(&v.text)
                    .map(|q| q.1)
                    .unwrap_or_default();
                say!("  {:>14}  {}", fmt_eng(v.x, &unit), cells.join(""));
            }
            if !thd.is_empty() || unmeasured > 0 {
                let say = |x: Option<f64>, th: &str| {
                    match x {
                    Some(l) => say!(
                        "  THD reaches {th} at {} ({path} = {l:.6}; found on the circuit within 0.1 %)",
                        fmt_eng(l, &xunit)
                    ),
                    None if unmeasured > 0 => say!(
                        "  THD does not cross {th} where it was measured (not measured at {unmeasured} of {} points; see measure's notes)",
                        pts.len()
                    ),
                    None => say!("  THD does not cross {th} in this range"),
                }
                };
                say(at01, "0.1 %");
                say(at1, "1 %");
            }
            say!();
        }
    }
    if args.json {
        say!(
            "{}",
            serde_json::to_string_pretty(&serde_json::Value::Object(json_out))
                .map_err(failure_io)?
        );
    }
    Ok(())
}
