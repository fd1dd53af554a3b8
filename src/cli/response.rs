//! `railsong response`: the small-signal frequency response from a source to each output.

use std::path::{Path, PathBuf};

use railsong::report::response_svgs;
use railsong::response::{log_grid, minus_3db, response};
use railsong::signal::OutputDir;
use railsong::units::{fmt_eng, parse_frequency};

use super::common::{failure_io, signal_error};
use super::{load, Failure};

/// Flags of `railsong response`.
pub(crate) struct ResponseArgs<'a> {
    pub patch: &'a Path,
    pub source: Option<&'a str>,
    pub from: &'a str,
    pub to: &'a str,
    pub points: usize,
    pub json: bool,
    pub csv: bool,
    pub plots: Option<(PathBuf, bool)>,
    pub sets: &'a [String],
}

pub(crate) fn cmd_response(a: &ResponseArgs) -> Result<(), Failure> {
    let patch = load(a.patch, a.sets)?;
    let freq = |flag: &str, v: &str| {
        parse_frequency(v)
            .map_err(|e| Failure::bad_input(format!("{flag} {v}: {e} (like 10Hz or 40kHz)")))
    };
    let from = freq("--from", a.from)?;
    let to = freq("--to", a.to)?;
    let grid = log_grid(from, to, a.points).map_err(Failure::bad_input)?;
    let names: Vec<&str> = patch.sources.iter().map(|s| s.name.as_str()).collect();
    let source = match a.source {
        Some(n) => names.iter().position(|s| *s == n).ok_or_else(|| {
            Failure::bad_input(format!(
                "--source {n}: no such source in {} (sources: {})",
                a.patch.display(),
                names.join(", ")
            ))
        })?,
        None if names.len() == 1 => 0,
        None => {
            return Err(Failure::bad_input(format!(
                "{} has several sources ({}): choose one with --source NAME",
                a.patch.display(),
                names.join(", ")
            )))
        }
    };
    let r = response(&patch, source, &grid).map_err(Failure::bad_input)?;
    if a.json {
        println!("{}", serde_json::to_string_pretty(&r).map_err(failure_io)?);
    } else if a.csv {
        println!("output,source,hz,gain_db,phase_deg");
        for (name, o) in &r.outputs {
            for p in &o.points {
                println!("{name},{},{},{},{}", o.source, p.hz, p.gain_db, p.phase_deg);
            }
        }
    } else {
        for (name, o) in &r.outputs {
            let peak = o
                .points
                .iter()
                .copied()
                .reduce(|x, y| if y.gain_db > x.gain_db { y } else { x });
            let corners: Vec<String> = minus_3db(&o.points)
                .into_iter()
                .map(|f| fmt_eng(f, "Hz"))
                .collect();
            println!(
                "output {name} from {}: {} to {}, {} points",
                o.source,
                fmt_eng(from, "Hz"),
                fmt_eng(to, "Hz"),
                o.points.len()
            );
            if let Some(p) = peak {
                println!(
                    "  largest gain {:.2} dB at {}; -3 dB at {}",
                    p.gain_db,
                    fmt_eng(p.hz, "Hz"),
                    if corners.is_empty() {
                        "none on the grid".to_string()
                    } else {
                        corners.join(", ")
                    }
                );
            }
            let step = (o.points.len() / 12).max(1);
            for p in o.points.iter().step_by(step) {
                println!(
                    "  {:>10}  {:>8.2} dB  {:>8.1} deg",
                    fmt_eng(p.hz, "Hz"),
                    p.gain_db,
                    p.phase_deg
                );
            }
        }
    }
    if let Some((dir, force)) = &a.plots {
        let mut folder = OutputDir::open(dir, *force).map_err(signal_error)?;
        for (name, o) in &r.outputs {
            for (kind, svg) in response_svgs(name, o, "").map_err(failure_io)? {
                folder
                    .write_text(&format!("{name}-{kind}.svg"), &svg)
                    .map_err(signal_error)?;
            }
        }
    }
    Ok(())
}
