//! `railsong measure`: figures as a table, JSON or CSV, and the level sweep.

use std::path::{Path, PathBuf};

use railsong::analysis::sweep;
use railsong::analysis::{Settings, TestSignal};
use railsong::measure;
use railsong::model::{Patch, Wave};
use railsong::report;
use railsong::units::{self, fmt_eng, Level};

use super::common::{
    check_length, file_peak_note, load_side, measure_streamed, print_alias, print_events,
    render_error, run_patch, signal_error,
};
use super::Failure;

pub(crate) fn cmd_measure(
    path: &Path,
    variant: Option<&str>,
    sets: &[String],
    output: Option<&str>,
    (json, csv, long): (bool, bool, bool),
    settings: &Settings,
    plots: Option<(PathBuf, bool)>,
) -> Result<(), Failure> {
    let patch = load_side(path, variant.unwrap_or("base"), sets)?;
    check_length(&patch, long)?;
    let mut folder = match &plots {
        Some((dir, force)) => Some(super::common::open_folder(dir, *force)?),
        None => None,
    };
    if let Some(name) = output {
        if !patch.outputs.iter().any(|o| o.name == name) {
            let names: Vec<&str> = patch.outputs.iter().map(|o| o.name.as_str()).collect();
            return Err(Failure::bad_input(format!(
                "--output {name}: no such output in {} (outputs: {})",
                path.display(),
                names.join(", ")
            )));
        }
    }
    let (_, m) = measure_streamed(&patch, settings, output, !json && !csv, &mut |_, _| Ok(()))?;
    if let Some(folder) = folder.as_mut() {
        let figs = report::plots(&patch, output).map_err(render_error)?;
        for f in &figs {
            folder
                .check_writable(&f.file_name())
                .map_err(signal_error)?;
        }
        for f in &figs {
            folder
                .write_text(&f.file_name(), &f.svg)
                .map_err(signal_error)?;
        }
        if !json && !csv {
            say!(
                "{} plot(s) written to {}",
                figs.len(),
                folder.path().display()
            );
        }
    }
    if json {
        say!("{}", measure::to_json(&m));
    } else if csv {
        say_raw!("{}", measure::to_csv(&m));
    } else {
        print_table(&patch, &m);
    }
    Ok(())
}

pub(crate) fn opt(v: Option<f64>, unit: &str, digits: usize) -> String {
    match v {
        Some(x) if x.is_finite() => format!("{x:.digits$}{unit}"),
        _ => "-".into(),
    }
}

pub(crate) fn print_table(patch: &Patch, m: &measure::Measurement) {
    say!("{}", patch.title);
    for o in &patch.outputs {
        let Some(r) = m.outputs.get(&o.name) else {
            continue;
        };
        let f = &r.figures;
        say!();
        say!("output {} (from {})", o.name, r.from);
        say!(
            "  level       peak {}{}  rms {} (AC)  dc {}  crest {}  ({} / {} / {})",
            opt(f.peak_v, " V", 3),
            file_peak_note(f, None),
            opt(f.rms_v, " V", 3),
            opt(f.dc_v.map(|d| d * 1e3), " mV", 2),
            opt(f.crest_db, " dB", 1),
            opt(f.rms_dbu, " dBu", 1),
            opt(f.rms_dbv, " dBV", 1),
            opt(f.rms_dbfs, " dBFS", 1),
        );
        say!(
            "  headroom    {} to the positive swing, {} to the negative",
            opt(f.headroom_pos_db, " dB", 1),
            opt(f.headroom_neg_db, " dB", 1)
        );
        if f.thd_percent.is_some() || f.thdn_db.is_some() {
            say!(
                "  distortion  fundamental {}  THD {} ({})  THD+N {}  SINAD {}  ENOB {}",
                opt(f.fundamental_hz, " Hz", 2),
                opt(f.thd_percent, " %", 4),
                opt(f.thd_db, " dB", 1),
                opt(f.thdn_db, " dB", 1),
                opt(f.sinad_db, " dB", 1),
                opt(f.enob, "", 1),
            );
            let h: Vec<String> = f
                .harmonics_dbc
                .iter()
                .enumerate()
                .map(|(i, d)| {
                    if d.is_finite() {
                        format!("H{} {d:.1}", i + 2)
                    } else {
                        format!("H{} -", i + 2)
                    }
                })
                .collect();
            if !h.is_empty() {
                say!("  harmonics   {} (dBc)", h.join("  "));
            }
        }
        if f.imd_smpte_percent.is_some() {
            say!(
                "  IMD         SMPTE RP120 {} ({})",
                opt(f.imd_smpte_percent, " %", 4),
                opt(f.imd_smpte_db, " dB", 1)
            );
        }
        if f.imd_ccif_percent.is_some() {
            say!(
                "  IMD         twin tone d2 {} ({}), 2f1-f2 {}, 2f2-f1 {}",
                opt(f.imd_ccif_percent, " %", 4),
                opt(f.imd_ccif_db, " dB", 1),
                opt(f.imd_ccif_d3_low_dbc, " dBc", 1),
                opt(f.imd_ccif_d3_high_dbc, " dBc", 1)
            );
        }
        let n = &r.noise;
        if n.noise_rms_v.is_some() {
            say!(
                "  noise       {} ({}), A-weighted {} ({}); idle channel, 20 Hz - 20 kHz",
                opt(n.noise_rms_v.map(|v| v * 1e6), " uV rms", 2),
                opt(n.noise_dbu, " dBu", 1),
                opt(n.noise_a_rms_v.map(|v| v * 1e6), " uV rms", 2),
                opt(n.noise_a_dbu, " dBu", 1),
            );
            say!(
                "  SNR         {} re 10 Vpp ({} A-weighted){}",
                opt(n.snr_ref_db, " dB", 1),
                opt(n.snr_ref_a_db, " dB", 1),
                f.snr_db
                    .map_or(String::new(), |d| format!(", {d:.1} dB re this signal"))
            );
        }
        say!("  events");
        print_events(&r.events);
        for n in &f.notes {
            say!("  note        {n}");
        }
        if f.window.is_none() {
            continue;
        }
        say!(
            "  taken with  window {}, FFT {}, band {}, weighting {}",
            f.window.as_deref().unwrap_or("-"),
            f.fft_len.map_or("-".into(), |n| n.to_string()),
            f.bandwidth_hz
                .map_or("-".into(), |[a, b]| format!("{a} Hz - {b} Hz")),
            f.weighting.as_deref().unwrap_or("flat")
        );
    }
    let s = &m.settings;
    say!();
    say!(
        "settings: {} x{}, {} rendered, calibration {} = 0 dBFS, circuit noise {}",
        fmt_eng(s.rate_hz, "Hz"),
        s.oversample,
        fmt_eng(s.length_s, "s"),
        fmt_eng(s.full_scale_v, "V"),
        if s.noise { "on" } else { "off" }
    );
    say!(
        "  spectral captures start at {} (settle time); THD re the fundamental, THD+N and SINAD re the whole signal in band (SINAD = -THD+N), rms is AC",
        fmt_eng(s.settle_s, "s")
    );
    print_alias(m, patch);
}

/// Parse `SOURCE=FROM..TO`.
pub(crate) fn parse_sweep_spec(spec: &str) -> Result<(String, String, String), Failure> {
    let bad = || {
        Failure::bad_input(format!(
            "--level-sweep {spec}: expected SOURCE=FROM..TO, e.g. lead=0.5V..8V"
        ))
    };
    let (src, range) = spec.split_once('=').ok_or_else(bad)?;
    let (from, to) = range.split_once("..").ok_or_else(bad)?;
    if src.trim().is_empty() || from.trim().is_empty() || to.trim().is_empty() {
        return Err(bad());
    }
    Ok((
        src.trim().to_string(),
        from.trim().to_string(),
        to.trim().to_string(),
    ))
}

#[allow(clippy::too_many_arguments)]
pub(crate) fn cmd_level_sweep(
    path: &Path,
    variant: Option<&str>,
    sets: &[String],
    spec: &str,
    steps: usize,
    settings: &Settings,
    (json, csv): (bool, bool),
    plots: Option<(PathBuf, bool)>,
) -> Result<(), Failure> {
    let side = variant.unwrap_or("base");
    let (src, from, to) = parse_sweep_spec(spec)?;
    if steps < 2 {
        return Err(Failure::bad_input(format!(
            "--steps {steps}: expected 2 or more"
        )));
    }
    let base = load_side(path, side, sets)?;
    let mut folder = match &plots {
        Some((dir, force)) => Some(super::common::open_folder(dir, *force)?),
        None => None,
    };
    if !base.sources.iter().any(|s| s.name == src) {
        return Err(Failure::bad_input(format!(
            "--level-sweep: no source '{src}' in {}",
            path.display()
        )));
    }
    let lvl = |t: &str| {
        units::parse_level(t).map_err(|e| Failure::bad_input(format!("--level-sweep {spec}: {e}")))
    };
    let (a, b) = (lvl(&from)?, lvl(&to)?);
    let (va, vb) = (level_volts(a), level_volts(b));
    if !(va > 0.0 && vb > 0.0) {
        return Err(Failure::bad_input(format!(
            "--level-sweep {spec}: both levels must be above 0 V"
        )));
    }
    let unit = level_unit(a);
    // THD is measured at the swept source's own frequency, whatever else is in the mix.
    let tone = base
        .sources
        .iter()
        .find(|s| s.name == src)
        .and_then(|s| match &s.wave {
            Wave::Sine { freq, .. }
            | Wave::Square { freq, .. }
            | Wave::Triangle { freq, .. }
            | Wave::Saw { freq, .. }
            | Wave::Pulse { freq, .. } => Some(TestSignal::Tone(*freq)),
            _ => None,
        });
    if tone.is_none() {
        return Err(Failure::bad_input(format!(
            "--level-sweep: source '{src}' is not a periodic wave (sine, square, triangle, saw or pulse), so THD has no fundamental"
        )));
    }
    let at_level = |v: f64| -> Result<measure::Measurement, Failure> {
        let mut s = sets.to_vec();
        s.push(format!("sources.{src}.amp={v} {unit}"));
        let patch = load_side(path, side, &s)?;
        let run = run_patch(&patch, false, false)?;
        let mut m = measure::measure(&patch, &run, None, settings, None, tone);
        railsong::render::complete_thd(&patch, &mut m, settings, tone).map_err(render_error)?;
        Ok(m)
    };
    let mut rows = Vec::new();
    for k in 0..steps {
        let v = va * (vb / va).powf(k as f64 / (steps - 1) as f64);
        rows.push((v, at_level(v)?));
    }
    // THD (ratio) of one output at a level, for the bisection (errors end it: None)
    let thd_of = |name: &str, v: f64| {
        at_level(v)
            .ok()
            .and_then(|m| m.outputs.get(name).and_then(|r| r.figures.thd_percent))
            .map(|t| t / 100.0)
    };
    // one table per output
    let outputs: Vec<String> = base.outputs.iter().map(|o| o.name.clone()).collect();
    let mut json_out = serde_json::Map::new();
    for name in &outputs {
        let pts: Vec<(f64, Option<f64>, Option<f64>)> = rows
            .iter()
            .map(|(v, m)| {
                let f = &m.outputs[name].figures;
                (*v, f.thd_percent, f.thdn_db)
            })
            .collect();
        let thd_pts: Vec<(f64, f64)> = pts
            .iter()
            .filter_map(|(v, t, _)| t.map(|t| (*v, t / 100.0)))
            .collect();
        // found on the circuit: renders inside the bracketing points, within 0.1 % in level
        let found = |th: f64| {
            let (lo, hi) = sweep::bracket(&thd_pts, th)?;
            sweep::find_crossing(lo, hi, th, sweep::CROSSING_TOLERANCE, &mut |v| {
                thd_of(name, v)
            })
        };
        let at1 = found(0.01);
        let at01 = found(0.001);
        if let Some(folder) = folder.as_mut() {
            let pts: Vec<(f64, f64)> = thd_pts
                .iter()
                .map(|&(v, t)| (v, 100.0 * t))
                .filter(|&(_, t)| t > 0.0)
                .collect();
            // the crossings found on the circuit, marked only where found
            let crossings: Vec<railsong::plot::Crossing> = [(at01, 0.1), (at1, 1.0)]
                .into_iter()
                .filter_map(|(at, y)| {
                    at.map(|x| railsong::plot::Crossing {
                        x,
                        y,
                        label: format!("{y} % THD at {}", fmt_eng(x, unit)),
                    })
                })
                .collect();
            let title = format!("{name}: THD against level of {src}");
            let caption = format!(
                "{} points; crossings found on the circuit within 0.1 % in level",
                pts.len()
            );
            let series = [railsong::plot::SweepSeries {
                name: "THD",
                points: &pts,
            }];
            if pts.len() >= 2 {
                let svg = railsong::plot::sweep_svg(&railsong::plot::SweepPlot {
                    title: &title,
                    caption: &caption,
                    x: railsong::plot::AxisSpec::log(&format!("Level of {src}"), unit),
                    y: railsong::plot::AxisSpec::log("THD", "%"),
                    series: &series,
                    crossings: &crossings,
                    threshold: Some(railsong::plot::Threshold {
                        y: 1.0,
                        label: "1 % THD".into(),
                    }),
                });
                if let Ok(svg) = svg {
                    let file = format!("{name}-level-sweep.svg");
                    folder.write_text(&file, &svg).map_err(signal_error)?;
                    if !json && !csv {
                        say!("plot written to {}", folder.path().join(&file).display());
                    }
                }
            }
        }
        let unmeasured = rows
            .iter()
            .filter(|(_, m)| {
                m.outputs[name]
                    .figures
                    .notes
                    .iter()
                    .any(|n| n.starts_with("thd:"))
            })
            .count();
        if json {
            json_out.insert(
                name.clone(),
                serde_json::json!({
                    "source": src,
                    "level_unit": unit,
                    "points": pts.iter().map(|(v, t, n)| serde_json::json!({
                        "level": v, "thd_percent": t, "thdn_db": n})).collect::<Vec<_>>(),
                    "level_at_1_percent": at1,
                    "level_at_0_1_percent": at01,
                    "crossings": "found on the circuit by bisection within 0.1 % in level; null where THD does not cross",
                    "points_thd_not_measured": unmeasured,
                }),
            );
        } else if csv {
            say!("output,level_{},thd_percent,thdn_db", unit.replace(' ', ""));
            for (v, t, n) in &pts {
                say!(
                    "{name},{v},{},{}",
                    t.map_or(String::new(), |x| x.to_string()),
                    n.map_or(String::new(), |x| x.to_string())
                );
            }
        } else {
            say!("output {name}: level sweep of source {src}");
            say!(
                "  {:>12}  {:>12}  {:>10}",
                format!("level {unit}"),
                "THD %",
                "THD+N dB"
            );
            for (v, t, n) in &pts {
                say!(
                    "  {:>12.4}  {:>12}  {:>10}",
                    v,
                    t.map_or("-".into(), |x| format!("{x:.5}")),
                    n.map_or("-".into(), |x| format!("{x:.1}"))
                );
            }
            let say = |x: Option<f64>, th: &str| {
                match x {
                Some(l) => say!(
                    "  THD reaches {th} at {l:.4} {unit} (found on the circuit within 0.1 %)"
                ),
                None if unmeasured > 0 => say!(
                    "  THD does not cross {th} where it was measured (not measured at {unmeasured} of {} levels; see measure's notes)",
                    rows.len()
                ),
                None => say!("  THD does not cross {th} in this range"),
            }
            };
            say(at01, "0.1 %");
            say(at1, "1 %");
            say!();
        }
    }
    if json {
        say!(
            "{}",
            serde_json::to_string_pretty(&serde_json::Value::Object(json_out)).unwrap_or_default()
        );
    }
    Ok(())
}

pub(crate) fn level_volts(l: Level) -> f64 {
    match l {
        Level::Peak(v) | Level::PeakToPeak(v) | Level::Rms(v) => v,
    }
}

pub(crate) fn level_unit(l: Level) -> &'static str {
    match l {
        Level::Peak(_) => "Vpk",
        Level::PeakToPeak(_) => "Vpp",
        Level::Rms(_) => "Vrms",
    }
}
