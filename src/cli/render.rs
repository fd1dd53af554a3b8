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
    let suffix = variant.map_or(String::new(), |v| format!("-{v}"));
    let names: Vec<String> = patch
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
    let figures_name = format!("figures{suffix}.json");
    let mut folder = OutputDir::open(&dir, flags.force).map_err(signal_error)?;
    for n in names
        .iter()
        .map(String::as_str)
        .chain([figures_name.as_str()])
    {
        folder.check_writable(n).map_err(signal_error)?;
    }
    check_length(patch, flags.long)?;
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
        let spec = WavSpec {
            rate: patch.rate.round() as u32,
            channels: 1,
            depth,
            full_scale: patch.full_scale,
            dither_seed: signal::source_seed(patch.seed, &o.name),
        };
        files.push(folder.create(name, spec).map_err(signal_error)?);
    }
    let mut scratch: Vec<f64> = Vec::new();
    let (_, m) = measure_streamed(patch, &Settings::default(), None, true, &mut |i, x| {
        if gains[i] == 1.0 {
            files[i].write(x)
        } else {
            scratch.clear();
            scratch.extend(x.iter().map(|v| v * gains[i]));
            files[i].write(&scratch)
        }
    })?;
    let mut stats = Vec::new();
    for f in files {
        stats.push(f.finish().map_err(signal_error)?);
    }

    match variant {
        Some(v) => println!("{} (variant {v}) -> {}", patch.title, dir.display()),
        None => println!("{} -> {}", patch.title, dir.display()),
    }
    println!(
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
        println!(
            "  {}: peak {}{}  rms {} (AC)  headroom {} / {}{}{}",
            name,
            f.peak_v.map_or("-".into(), |v| fmt_eng(v, "V")),
            file_peak_note(f),
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
        println!(
            "  first clip: stage {stage} at {}",
            fmt_eng(t.max(0.0), "s")
        );
    }
    print_alias(&m, patch);
    folder
        .write_text(&figures_name, &measure::to_json(&m))
        .map_err(signal_error)?;
    if flags.plots && variant.is_none() {
        let figs = report::plots(patch, None).map_err(render_error)?;
        for f in &figs {
            folder
                .write_text(&f.file_name(), &f.svg)
                .map_err(signal_error)?;
        }
        println!("  {} plot(s) written", figs.len());
    }
    Ok(dir)
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
    };
    for v in &names {
        let p = railsong::patch::load_variant(path, Some(v), sets).map_err(Failure::bad_input)?;
        render_to(&p, &stem_of(path), &flags, Some(v))?;
    }
    Ok(())
}
