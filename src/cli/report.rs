//! `railsong report`: the self-contained listening page.

use std::path::Path;

use railsong::analysis::Settings;
use railsong::measure;
use railsong::report;
use railsong::units::{self, fmt_eng};

use super::common::load_side;
use super::common::{default_dir, render_error, run_patch, signal_error, stem_of};
use super::compare::compare_sides;
use super::{Failure, RenderFlags};

/// Longest stretch the listening page embeds, s.
pub(crate) const REPORT_MAX_S: f64 = 60.0;

pub(crate) fn cmd_report(
    path: &Path,
    variant: Option<&str>,
    flags: &RenderFlags,
    sets: &[String],
    ab: Option<(&str, &str, &str)>,
) -> Result<(), Failure> {
    let mut patch = load_side(path, variant.unwrap_or("base"), sets)?;
    if patch.length > REPORT_MAX_S {
        say!(
            "the page plays and measures the first {REPORT_MAX_S} s of this {} patch",
            fmt_eng(patch.length, "s")
        );
        patch.length = REPORT_MAX_S;
    }
    let fade = flags.edge_fade(patch.frames(), patch.rate)?;
    let text = railsong::patch::read_text(path).map_err(Failure::bad_input)?;
    let dir = flags
        .out
        .clone()
        .unwrap_or_else(|| default_dir(&stem_of(path)));
    let mut folder = super::common::open_folder(&dir, flags.force)?;
    folder.check_writable("report.html").map_err(signal_error)?;
    let (patch, run, m, comparison, side_b) = match ab {
        None => {
            let run = run_patch(&patch, false, true)?;
            let mut m = measure::measure(&patch, &run, None, &Settings::default(), None, None);
            railsong::render::complete_thd(&patch, &mut m, &Settings::default(), None)
                .map_err(render_error)?;
            (patch, run, m, None, None)
        }
        Some((a, b, segment)) => {
            let seg = units::parse_time(segment)
                .map_err(|e| Failure::bad_input(format!("--segment {segment}: {e}")))?;
            let mut sets = sets.to_vec();
            if patch.length < REPORT_MAX_S {
                sets.push(format!("patch.length={} s", patch.length));
            }
            let c = compare_sides(path, a, b, &sets, seg, "rms", true)?;
            (
                c.pa,
                c.ra,
                c.ma,
                Some((c.results, a, b)),
                Some((c.pb, c.mb)),
            )
        }
    };
    let figs = match (&comparison, &side_b) {
        (Some((_, a, b)), Some((pb, _))) => {
            let mut f = report::side_plots(&patch, None, Some(("A", a))).map_err(render_error)?;
            f.extend(report::side_plots(pb, None, Some(("B", b))).map_err(render_error)?);
            f
        }
        _ => report::plots(&patch, None).map_err(render_error)?,
    };
    let mut players: Vec<report::Player> = Vec::new();
    let mut sections = Vec::new();
    match &comparison {
        None => {
            for o in &run.outputs {
                let f = &m.outputs[&o.name].figures;
                players.push(report::Player {
                    label: o.name.clone(),
                    note: format!(
                        "peak {}, rms {}",
                        f.peak_v.map_or("-".into(), |v| fmt_eng(v, "V")),
                        f.rms_v.map_or("-".into(), |v| fmt_eng(v, "V"))
                    ),
                    samples: &o.samples,
                    fade,
                });
            }
        }
        Some((results, a, b)) => {
            for (o, c) in run.outputs.iter().zip(results) {
                players.push(report::Player {
                    label: format!("{} A", o.name),
                    note: format!("A = {a}"),
                    samples: &o.samples,
                    fade,
                });
                players.push(report::Player {
                    label: format!("{} B", o.name),
                    note: format!("B = {b}, matched: {:+.2} dB", c.gain_db),
                    samples: &c.b_matched,
                    fade,
                });
                players.push(report::Player {
                    label: format!("{} A/B", o.name),
                    note: "alternating A, B, A, B ...".into(),
                    samples: &c.alternating,
                    fade,
                });
                players.push(report::Player {
                    label: format!("{} difference", o.name),
                    note: match c.difference_below_db {
                        Some(d) => format!("A minus matched B, {d:.1} dB below the signal"),
                        None => "A minus matched B: silent".into(),
                    },
                    samples: &c.difference,
                    fade,
                });
            }
            sections.push(report::comparison_section(results, a, b));
        }
    }
    // A light page: above report::EMBED_MAX_BYTES of audio the players link WAV files
    // written beside the page (before it, so the page never points at a missing file). Every
    // file name is checked before anything is written.
    let linked = report::linked_audio(&players);
    let mut names: Vec<String> = linked.clone().unwrap_or_default();
    if flags.plots {
        names.extend(figs.iter().map(|f| f.file_name()));
    }
    folder.check_all(&names).map_err(signal_error)?;
    if let Some(names) = &linked {
        for (i, (name, p)) in names.iter().zip(&players).enumerate() {
            let spec =
                report::player_spec(m.settings.rate_hz, m.settings.full_scale_v, i as u64 + 1);
            folder
                .write(name, spec, &p.fade.applied(p.samples))
                .map_err(signal_error)?;
        }
    }
    let (main, other) = match (&comparison, &side_b) {
        (Some((_, a, b)), Some((_, mb))) => (
            report::FigureTable {
                side: Some(("A", a)),
                m: &m,
            },
            Some(report::FigureTable {
                side: Some(("B", b)),
                m: mb,
            }),
        ),
        _ => (report::FigureTable { side: None, m: &m }, None),
    };
    let html = report::page(
        &patch,
        &text,
        main,
        other,
        &figs,
        &players,
        linked.as_deref(),
        &sections,
    );
    folder
        .write_text("report.html", &html)
        .map_err(signal_error)?;
    if flags.plots {
        for f in &figs {
            folder
                .write_text(&f.file_name(), &f.svg)
                .map_err(signal_error)?;
        }
    }
    say!(
        "{}: report with {} plot(s) and {} player(s) -> {}",
        patch.title,
        figs.len(),
        players.len(),
        dir.join("report.html").display()
    );
    Ok(())
}
