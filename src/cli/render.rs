//! `railsong render`: WAV files and figures of every output (and of variants).

use std::path::{Path, PathBuf};

use railsong::analysis::Settings;
use railsong::measure;
use railsong::model::Patch;
use railsong::report;
use railsong::signal::{self, Depth, OutputDir, WavSpec};
use railsong::units::fmt_eng;

use super::common::{
    check_length, db_or_dash, default_dir, file_peak_note, measure_streamed, print_alias,
    print_events, render_error, signal_error, stem_of, stream_patch, variant_names,
};
use super::{Failure, RenderFlags};

/// Render a patch into its folder; returns the folder. A `variant` render names its files
/// `<output>-<variant>.wav` and `figures-<variant>.json`.
pub(crate) fn render_to(
    patch: &Patch,
    stem: &str,
    flags: &RenderFlags,
    variant: Option<&str>,
) -> Result<PathBuf, Failure> {
    let dir = flags.out.clone().unwrap_or_else(|| default_dir(stem));
    let depth = match flags.depth.as_str() {
        "16" => Depth::Pcm16,
        "float" => Depth::Float32,
        _ => Depth::Pcm24,
    };
    // Check every file name (and the overwrite guard) before spending time on the render.
    let (names, figures_name) = file_names(patch, variant);
    let spec_of = |o: &railsong::model::Output| WavSpec {
        rate: patch.rate.round() as u32,
        channels: 1,
        depth,
        full_scale: patch.full_scale,
        dither_seed: signal::source_seed(patch.seed, &o.name),
    };
    // Limits before work: a file a WAV cannot hold is refused before anything is written.
    check_length(patch, flags.long)?;
    for (o, name) in patch.outputs.iter().zip(&names) {
        signal::check_fits(name, &spec_of(o), patch.frames() as u64)
            .map_err(|e| Failure::bad_input(format!("outputs.{}: {e}", o.name)))?;
    }
    let mut folder = super::common::open_folder(&dir, flags.force)?;
    // The plots are computed first so that every file name (and the overwrite guard) is
    // checked before any file is written.
    let figs = if flags.plots && variant.is_none() {
        report::plots(patch, None).map_err(render_error)?
    } else {
        Vec::new()
    };
    let mut all: Vec<String> = names.clone();
    all.push(figures_name.clone());
    all.extend(figs.iter().map(|f| f.file_name()));
    folder.check_all(&all).map_err(signal_error)?;
    // Listening gains need each output's RMS and peak first: one extra pass without files.
    let gains: Vec<f64> = match flags.listen {
        Some(target) => {
            let first = stream_patch(patch, false, true, &mut |_, _| Ok(()))?;
            first
                .levels
                .iter()
                .map(|l| {
                    l.map_or(1.0, |l| {
                        signal::listen_gain_from(l.rms_v, l.peak_v, target, patch.full_scale)
                    })
                })
                .collect()
        }
        None => vec![1.0; names.len()],
    };
    let mut files = Vec::new();
    for (o, name) in patch.outputs.iter().zip(&names) {
        files.push(folder.create(name, spec_of(o)).map_err(signal_error)?);
    }
    // The files fade in and out at their edges; the figures see the unfaded signal.
    let fade = flags.edge_fade(patch.frames(), patch.rate)?;
    let mut written = vec![0usize; files.len()];
    // the peak of the samples written, V at the file's calibration
    let mut file_peak = vec![0.0f64; files.len()];
    let mut scratch: Vec<f64> = Vec::new();
    let (_, m) = measure_streamed(patch, &Settings::default(), None, true, &mut |i, x| {
        let start = written[i];
        written[i] += x.len();
        let w: &[f64] = if gains[i] == 1.0 && !fade.touches(start, x.len()) {
            x
        } else {
            scratch.clear();
            scratch.extend(x.iter().map(|v| v * gains[i]));
            fade.apply(start, &mut scratch);
            &scratch
        };
        file_peak[i] = w.iter().fold(file_peak[i], |a, &v| a.max(v.abs()));
        files[i].write(w)
    })?;
    let mut stats = Vec::new();
    for f in files {
        stats.push(f.finish().map_err(signal_error)?);
    }

    match variant {
        Some(v) => say!("{} (variant {v}) -> {}", patch.title, dir.display()),
        None => say!("{} -> {}", patch.title, dir.display()),
    }
    say!(
        "  calibration: {} = 0 dBFS peak{}",
        fmt_eng(patch.full_scale, "V"),
        if flags.listen.is_some() {
            " (files scaled for listening, see below)"
        } else {
            ""
        }
    );
    for (k, (o, name)) in patch.outputs.iter().zip(&names).enumerate() {
        let note = if flags.listen.is_some() {
            format!(", listening gain {:+.1} dB", 20.0 * gains[k].log10())
        } else {
            String::new()
        };
        let f = &m.outputs[&o.name].figures;
        say!(
            "  {}: peak {}{}  rms {} (AC)  headroom {} / {}{}{}",
            name,
            f.peak_v.map_or("-".into(), |v| fmt_eng(v, "V")),
            file_peak_note(f, Some(file_peak[k])),
            f.rms_v.map_or("-".into(), |v| fmt_eng(v, "V")),
            db_or_dash(f.headroom_pos_db, "to +swing"),
            db_or_dash(f.headroom_neg_db, "to -swing"),
            note,
            if stats[k].clipped > 0 {
                format!(", {} samples clipped in the file", stats[k].clipped)
            } else {
                String::new()
            }
        );
        print_events(&m.outputs[&o.name].events);
    }
    if let Some((stage, t)) = measure::first_clip(&m) {
        say!(
            "  first clip: stage {stage} at {}",
            fmt_eng(t.max(0.0), "s")
        );
    }
    print_alias(&m, patch);
    folder
        .write_text(&figures_name, &measure::to_json(&m))
        .map_err(signal_error)?;
    if flags.plots && variant.is_none() {
        for f in &figs {
            folder
                .write_text(&f.file_name(), &f.svg)
                .map_err(signal_error)?;
        }
        say!("  {} plot(s) written", figs.len());
    }
    Ok(dir)
}

/// The WAV file of each output and the figures file of a render (of `variant`).
fn file_names(patch: &Patch, variant: Option<&str>) -> (Vec<String>, String) {
    let suffix = variant.map_or(String::new(), |v| format!("-{v}"));
    let names = patch
        .outputs
        .iter()
        .map(|o| {
            let stem = o
                .file
                .clone()
                .map(|f| f.strip_suffix(".wav").map(str::to_string).unwrap_or(f))
                .unwrap_or_else(|| o.name.clone());
            format!("{stem}{suffix}.wav")
        })
        .collect();
    (names, format!("figures{suffix}.json"))
}

/// Before the base render: the size limit and the overwrite guard for every file of the
/// base and of every variant `render` will write, so that a refusal comes before the first
/// file is written. Returns the opened folder: holding it keeps the folder locked for the
/// whole command, variants included (the later opens in this process share the lock).
pub(crate) fn preflight(
    path: &Path,
    base: &Patch,
    sets: &[String],
    chosen: &[String],
    flags: &RenderFlags,
) -> Result<OutputDir, Failure> {
    let variants = if chosen.is_empty() {
        variant_names(path)?
    } else {
        chosen.to_vec()
    };
    let mut sides: Vec<(Patch, Option<&str>)> = vec![(base.clone(), None)];
    for v in &variants {
        let p = railsong::patch::load_variant(path, Some(v), sets).map_err(Failure::bad_input)?;
        sides.push((p, Some(v.as_str())));
    }
    let depth = super::common::depth_of(flags);
    let mut all = Vec::new();
    let file = path.display();
    for (p, v) in &sides {
        check_length(p, flags.long)
            .map_err(|e| Failure::bad_input(format!("{file}: {}", e.message)))?;
        let (names, figures) = file_names(p, *v);
        for (o, name) in p.outputs.iter().zip(&names) {
            let spec = WavSpec {
                rate: p.rate.round() as u32,
                channels: 1,
                depth,
                full_scale: p.full_scale,
                dither_seed: 0,
            };
            signal::check_fits(name, &spec, p.frames() as u64)
                .map_err(|e| Failure::bad_input(format!("{file}: outputs.{}: {e}", o.name)))?;
        }
        all.extend(names);
        all.push(figures);
    }
    let dir = flags
        .out
        .clone()
        .unwrap_or_else(|| default_dir(&stem_of(path)));
    let folder = super::common::open_folder(&dir, flags.force)?;
    folder.check_all(&all).map_err(signal_error)?;
    Ok(folder)
}

/// Check the names given to `render --variant` before anything is rendered.
pub(crate) fn check_variants(path: &Path, chosen: &[String]) -> Result<(), Failure> {
    if chosen.is_empty() {
        return Ok(());
    }
    let all = variant_names(path)?;
    for v in chosen {
        if !all.contains(v) {
            return Err(Failure::bad_input(format!(
                "--variant {v}: {} has no [variants.{v}] (variants: {})",
                path.display(),
                if all.is_empty() {
                    "none".to_string()
                } else {
                    all.join(", ")
                }
            )));
        }
    }
    Ok(())
}

/// `render --variant`: after the base render, render the chosen variants (all of them when
/// `chosen` is empty) into the same folder, each output's file named `<file>-<variant>.wav`
/// and the figures `figures-<variant>.json`.
pub(crate) fn render_variants(
    path: &Path,
    sets: &[String],
    chosen: &[String],
    flags: &RenderFlags,
) -> Result<(), Failure> {
    let all = variant_names(path)?;
    let names: Vec<String> = if chosen.is_empty() {
        all
    } else {
        chosen.to_vec()
    };
    let dir = flags
        .out
        .clone()
        .unwrap_or_else(|| default_dir(&stem_of(path)));
    let flags = RenderFlags {
        out: Some(dir),
        depth: flags.depth.clone(),
        listen: flags.listen,
        force: flags.force,
        plots: false,
        long: flags.long,
        fade: flags.fade.clone(),
    };
    for v in &names {
        let p = railsong::patch::load_variant(path, Some(v), sets).map_err(Failure::bad_input)?;
        render_to(&p, &stem_of(path), &flags, Some(v))?;
    }
    Ok(())
}
