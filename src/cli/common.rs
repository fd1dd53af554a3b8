//! Helpers shared by the commands: error mapping, folders, progress, render and measure steps.

use std::path::{Path, PathBuf};

use railsong::analysis::{Harmonics, Settings, Weighting};
use railsong::engine::Run;
use railsong::measure;
use railsong::model::Patch;
use railsong::render::{self, RenderError, RenderOptions};
use railsong::signal::{Depth, OutputDir, SignalError};
use railsong::study::StudyError;
use railsong::units::fmt_eng;

use super::{load, Failure, RenderFlags, EXIT_FAILURE};

pub(crate) fn failure_io(e: impl std::fmt::Display) -> Failure {
    Failure {
        code: EXIT_FAILURE,
        message: e.to_string(),
    }
}

pub(crate) fn render_error(e: RenderError) -> Failure {
    match e {
        // Writing failed (disk full, permissions): not the user's input.
        RenderError::Signal(s) => signal_error(s),
        // The patch or an input file: bad input.
        other => Failure::bad_input(other),
    }
}

pub(crate) fn signal_error(e: SignalError) -> Failure {
    match e {
        SignalError::Io { .. } | SignalError::Stream(_) => failure_io(e),
        other => Failure::bad_input(other),
    }
}

/// Open and lock an output folder; when another railsong run holds it, say so on stderr and
/// wait for it.
pub(crate) fn open_folder(dir: &Path, force: bool) -> Result<OutputDir, Failure> {
    OutputDir::open_with(dir, force, &mut |d| {
        use std::io::Write;
        let _ = writeln!(
            std::io::stderr(),
            "railsong: {} is busy (another railsong run is writing into it); waiting for it to finish",
            d.display()
        );
    })
    .map_err(signal_error)
}

pub(crate) fn analysis_settings(harmonics: usize, weighting: &str) -> Result<Settings, Failure> {
    if harmonics < 2 {
        return Err(Failure::bad_input(format!(
            "--harmonics {harmonics}: expected 2 or more"
        )));
    }
    Ok(Settings {
        harmonics: Harmonics::UpTo(harmonics),
        weighting: if weighting == "a" {
            Weighting::A
        } else {
            Weighting::Flat
        },
        ..Settings::default()
    })
}

/// The file stem of a patch path (`patch` when it has none).
pub(crate) fn stem_of(path: &Path) -> String {
    path.file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "patch".into())
}

/// The default output folder of a patch: `renders/<stem>/`.
pub(crate) fn default_dir(stem: &str) -> PathBuf {
    Path::new("renders").join(safe_stem(stem))
}

/// Keep only the characters allowed in file names.
pub(crate) fn safe_stem(s: &str) -> String {
    let t: String = s
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '_' || c == '-' {
                c
            } else {
                '-'
            }
        })
        .collect();
    if t.is_empty() {
        "patch".into()
    } else {
        t
    }
}

/// Run `f` with a progress callback: a bar on a terminal when asked and the patch is at least
/// 2 s long, lines on a piped stderr once the render has taken 2 s ([`super::progress`]),
/// nothing with `--quiet`.
pub(crate) fn with_progress<T>(
    patch: &Patch,
    show: bool,
    f: impl FnOnce(&mut dyn FnMut(f64)) -> Result<T, RenderError>,
) -> Result<T, Failure> {
    if !show {
        return f(&mut |_| {}).map_err(render_error);
    }
    let bar = (patch.frames() as f64) >= 2.0 * patch.rate;
    let seconds = (patch.frames() as f64 / patch.rate).round() as u64;
    let p = super::progress::Progress::new(seconds.max(1), "rendering", "s of audio", bar);
    let r = f(&mut |x| p.set_fraction(x));
    p.finish();
    r.map_err(render_error)
}

pub(crate) fn options(alias: bool) -> RenderOptions {
    RenderOptions {
        frames: None,
        alias_probe: alias,
        uncorrected: false,
    }
}

/// Render a patch keeping every sample.
pub(crate) fn run_patch(patch: &Patch, alias: bool, show_progress: bool) -> Result<Run, Failure> {
    with_progress(patch, show_progress, |p| {
        render::render(patch, &options(alias), p)
    })
}

/// Stream a patch through `sink`, with a progress bar when asked and the render is long.
pub(crate) fn stream_patch(
    patch: &Patch,
    alias: bool,
    show_progress: bool,
    sink: &mut render::Sink,
) -> Result<render::Streamed, Failure> {
    with_progress(patch, show_progress, |p| {
        render::render_streaming(patch, &options(alias), sink, p)
    })
}

/// Stream a patch through `sink`, render its idle channel when circuit noise is on, and
/// measure: figures from the kept tails, levels over the whole record, THD on the internal
/// signal where the file cannot hold it, and the alias estimate of each output.
pub(crate) fn measure_streamed(
    patch: &Patch,
    settings: &Settings,
    output: Option<&str>,
    show_progress: bool,
    sink: &mut render::Sink,
) -> Result<(render::Streamed, measure::Measurement), Failure> {
    let streamed = stream_patch(patch, false, show_progress, sink)?;
    let idle = if patch.noise {
        Some(render::render_idle(patch, false).map_err(render_error)?)
    } else {
        None
    };
    let mut m = measure::measure(
        patch,
        &streamed.run,
        idle.as_ref().map(|s| &s.run),
        settings,
        output,
        None,
    );
    measure::apply_full_levels(&mut m, patch, &streamed.levels);
    render::complete_thd(patch, &mut m, settings, None).map_err(render_error)?;
    railsong::alias::apply(patch, &mut m).map_err(render_error)?;
    Ok((streamed, m))
}

/// Longest render without `--long`, s.
pub(crate) const LONG_RENDER_S: f64 = 600.0;

pub(crate) fn check_length(patch: &Patch, long: bool) -> Result<(), Failure> {
    if patch.length > LONG_RENDER_S && !long {
        return Err(Failure::bad_input(format!(
            "patch.length = {} is longer than {} minutes: pass --long to render it (memory stays flat, but it takes a while)",
            fmt_eng(patch.length, "s"),
            LONG_RENDER_S / 60.0
        )));
    }
    Ok(())
}

pub(crate) fn db_or_dash(v: Option<f64>, what: &str) -> String {
    match v {
        Some(d) if d.is_finite() => format!("{d:+.1} dB {what}"),
        _ => format!("- {what}"),
    }
}

pub(crate) fn print_events(events: &std::collections::BTreeMap<String, measure::EventSeconds>) {
    for (stage, e) in events {
        let mut parts = Vec::new();
        for (label, s) in [
            ("clipping", e.clip_s),
            ("slewing", e.slew_s),
            ("outside input range", e.cm_out_s),
            ("phase reversed", e.reversed_s),
        ] {
            if s > 0.0 {
                parts.push(format!("{label} {}", fmt_eng(s, "s")));
            }
        }
        if let Some(t) = e.first_clip_s {
            parts.push(format!("first clip at {}", fmt_eng(t.max(0.0), "s")));
        }
        say!(
            "      {stage}: {}",
            if parts.is_empty() {
                "clean".to_string()
            } else {
                parts.join(", ")
            }
        );
    }
}

pub(crate) fn study_error(e: StudyError) -> Failure {
    match e {
        StudyError::Render(r) => render_error(r),
        other => Failure::bad_input(other),
    }
}

pub(crate) fn depth_of(flags: &RenderFlags) -> Depth {
    match flags.depth.as_str() {
        "16" => Depth::Pcm16,
        "float" => Depth::Float32,
        _ => Depth::Pcm24,
    }
}

pub(crate) fn variant_names(path: &Path) -> Result<Vec<String>, Failure> {
    Ok(railsong::patch::load_variants(path)
        .map_err(Failure::bad_input)?
        .into_iter()
        .map(|v| v.name)
        .collect())
}

pub(crate) fn load_side(path: &Path, name: &str, sets: &[String]) -> Result<Patch, Failure> {
    if name == "base" {
        load(path, sets)
    } else {
        railsong::patch::load_variant(path, Some(name), sets).map_err(Failure::bad_input)
    }
}

/// `" (band-limited X)"` when the peak of the output at the file's rate (band-limited, so it
/// may overshoot; before any edge fade) differs from the circuit's by more than 0.1 %, and
/// `", file Y"` inside it when `file` (the peak of the samples written, V at the file's
/// calibration) differs from that by more than 0.1 % (an edge fade or a listening gain);
/// else nothing.
pub(crate) fn file_peak_note(f: &railsong::analysis::OutputFigures, file: Option<f64>) -> String {
    let differs = |a: f64, b: f64| (a - b).abs() > 1e-3 * b.abs().max(1e-9);
    let Some(p) = f.file_peak_v else {
        return String::new();
    };
    let written = file
        .filter(|&w| differs(w, p))
        .map(|w| format!(", file {}", fmt_eng(w, "V")))
        .unwrap_or_default();
    match f.peak_v {
        Some(c) if differs(p, c) || !written.is_empty() => {
            format!(" (band-limited {}{written})", fmt_eng(p, "V"))
        }
        _ => String::new(),
    }
}

/// The alias estimate of each output measured, and a warning for each one above the limit
/// naming the stage it comes from.
pub(crate) fn print_alias(m: &measure::Measurement, patch: &Patch) {
    let k = patch.oversample;
    for o in &patch.outputs {
        let Some(a) = m.outputs.get(&o.name).and_then(|r| r.alias.as_ref()) else {
            continue;
        };
        let Some(dbc) = a.dbc else {
            say!(
                "  alias of {}: {}",
                o.name,
                a.note.as_deref().unwrap_or("not estimated")
            );
            continue;
        };
        let stages: Vec<String> = a
            .stages
            .iter()
            .filter_map(|s| s.dbc.map(|d| format!("{} {d:.1}", s.stage)))
            .collect();
        let how = if a.method == Some("coherent") {
            format!(
                "dBc in band, measured on this patch (its stages re-run at full level with the tone at {}, coherent capture, power off the harmonics 20 Hz - 20 kHz re the fundamental or the strongest harmonic)",
                fmt_eng(a.tone_hz.unwrap_or(0.0), "Hz")
            )
        } else {
            "dB in band, measured on this patch (a stretch after the settle time against the same stretch with stages stepping 4 times finer: the in-band difference re the signal, smooth linear differences taken out, an upper bound; floor about -80 to -100 dB)".to_string()
        };
        say!(
            "  alias of {} at x{k}: {dbc:.1} {how}{}",
            o.name,
            if stages.is_empty() {
                String::new()
            } else {
                format!("; stages (dB): {}", stages.join(", "))
            }
        );
        if a.above_limit {
            let stage = a
                .stage
                .as_deref()
                .map_or(String::new(), |s| format!(", mostly from stage {s}"));
            let advice = if k < 16 {
                format!("raise patch.oversample (now {k}; try {})", (4 * k).min(16))
            } else {
                "already at the highest patch.oversample (16)".to_string()
            };
            say!(
                "  warning: {} holds {dbc:.1} dB of alias, above {:.0} dB{stage}: {advice}",
                o.name,
                railsong::alias::WARN_DBC
            );
        }
    }
}
