//! `railsong compare`: level-matched A/B of two variants.

use std::path::Path;

use railsong::analysis::Settings;
use railsong::engine::Run;
use railsong::measure;
use railsong::measure::Measurement;
use railsong::model::Patch;
use railsong::signal::{self, WavSpec};
use railsong::study::compare::{self, Alternation, OutputComparison};
use railsong::units::{self, fmt_eng};

use super::common::{
    default_dir, depth_of, failure_io, load_side, render_error, run_patch, signal_error, stem_of,
    study_error,
};
use super::{Failure, RenderFlags};

/// Crossfade length of the alternating A/B file, s.
pub(crate) const FADE_S: f64 = 0.010;

/// Options of `compare`.
pub(crate) struct CompareArgs<'a> {
    pub patch: &'a Path,
    pub a: &'a str,
    pub b: &'a str,
    pub segment: &'a str,
    pub matching: &'a str,
    pub sets: &'a [String],
    pub flags: &'a RenderFlags,
    pub json: bool,
}

/// `railsong compare`.
/// Both sides of a comparison, rendered, measured and compared output by output.
pub(crate) struct Compared {
    /// Patch A.
    pub pa: Patch,
    /// Render of A.
    pub ra: Run,
    /// Figures of A.
    pub ma: Measurement,
    /// Patch B.
    pub pb: Patch,
    /// Figures of B.
    pub mb: Measurement,
    /// One comparison per output.
    pub results: Vec<OutputComparison>,
    /// How B was matched.
    pub matching: compare::Matching,
    /// The alternating file's layout.
    pub layout: Alternation,
}

/// Load, render, measure and compare the two sides `a` and `b` (`base` or a variant).
pub(crate) fn compare_sides(
    path: &Path,
    a: &str,
    b: &str,
    sets: &[String],
    segment_s: f64,
    matching: &str,
    progress: bool,
) -> Result<Compared, Failure> {
    let pa = load_side(path, a, sets)?;
    let pb = load_side(path, b, sets)?;
    if pa.rate != pb.rate || pa.frames() != pb.frames() {
        return Err(Failure::bad_input(format!(
            "compare {a} and {b}: both need the same rate and length (found {} / {} and {} / {})",
            fmt_eng(pa.rate, "Hz"),
            fmt_eng(pa.length, "s"),
            fmt_eng(pb.rate, "Hz"),
            fmt_eng(pb.length, "s")
        )));
    }
    let names = |p: &Patch| p.outputs.iter().map(|o| o.name.clone()).collect::<Vec<_>>();
    if names(&pa) != names(&pb) {
        return Err(Failure::bad_input(format!(
            "compare {a} and {b}: both need the same outputs (found {} and {})",
            names(&pa).join(", "),
            names(&pb).join(", ")
        )));
    }
    let matching = if matching == "loudness" {
        compare::Matching::Loudness
    } else {
        compare::Matching::Rms
    };
    let layout = Alternation::new(pa.frames(), pa.rate, segment_s, FADE_S).map_err(study_error)?;
    let (ra, rb) = (
        run_patch(&pa, false, progress)?,
        run_patch(&pb, false, progress)?,
    );
    let settings = Settings::default();
    let ma = measure::measure(&pa, &ra, None, &settings, None, None);
    let mb = measure::measure(&pb, &rb, None, &settings, None, None);
    let mut results = Vec::new();
    for (oa, ob) in ra.outputs.iter().zip(&rb.outputs) {
        results.push(
            compare::compare_output(
                &oa.name,
                &oa.samples,
                &ob.samples,
                &ma.outputs[&oa.name],
                &mb.outputs[&ob.name],
                &layout,
                pa.full_scale,
                matching,
            )
            .map_err(study_error)?,
        );
    }
    Ok(Compared {
        pa,
        ra,
        ma,
        pb,
        mb,
        results,
        matching,
        layout,
    })
}

pub(crate) fn cmd_compare(args: &CompareArgs) -> Result<(), Failure> {
    let seg = units::parse_time(args.segment)
        .map_err(|e| Failure::bad_input(format!("--segment {}: {e}", args.segment)))?;
    // Refuse early, before rendering, when the folder holds files railsong did not write.
    let pa = load_side(args.patch, args.a, args.sets)?;
    // Both sides are held in memory whole: the length limit holds here as in render.
    super::common::check_length(&pa, args.flags.long)?;
    let fade = args.flags.edge_fade(pa.frames(), pa.rate)?;
    let dir = args.flags.out.clone().unwrap_or_else(|| {
        default_dir(&format!("{}-{}-vs-{}", stem_of(args.patch), args.a, args.b))
    });
    let mut folder = super::common::open_folder(&dir, args.flags.force)?;
    let files = |o: &str| {
        [
            format!("{o}-A.wav"),
            format!("{o}-B-matched.wav"),
            format!("{o}-AB.wav"),
            format!("{o}-difference.wav"),
        ]
    };
    for o in &pa.outputs {
        for f in files(&o.name) {
            folder.check_writable(&f).map_err(signal_error)?;
        }
    }
    folder
        .check_writable("compare.json")
        .map_err(signal_error)?;
    for o in &pa.outputs {
        let spec = WavSpec {
            rate: pa.rate.round() as u32,
            channels: 1,
            depth: depth_of(args.flags),
            full_scale: pa.full_scale,
            dither_seed: 0,
        };
        signal::check_fits(&format!("{}-A.wav", o.name), &spec, pa.frames() as u64)
            .map_err(|e| Failure::bad_input(format!("outputs.{}: {e}", o.name)))?;
    }

    let Compared {
        ra,
        pb,
        results: compared,
        matching,
        layout,
        ..
    } = compare_sides(
        args.patch,
        args.a,
        args.b,
        args.sets,
        seg,
        args.matching,
        !args.json,
    )?;
    // The plots first, so that their names are checked before any file is written.
    let mut plots = Vec::new();
    if args.flags.plots {
        for (side, p, label) in [("A", &pa, args.a), ("B", &pb, args.b)] {
            for f in
                railsong::report::side_plots(p, None, Some((side, label))).map_err(render_error)?
            {
                folder
                    .check_writable(&f.file_name())
                    .map_err(signal_error)?;
                plots.push(f);
            }
        }
    }
    let mut results: Vec<OutputComparison> = Vec::new();
    for (oa, c) in ra.outputs.iter().zip(compared) {
        let spec = WavSpec {
            rate: pa.rate.round() as u32,
            channels: 1,
            depth: depth_of(args.flags),
            full_scale: pa.full_scale,
            dither_seed: signal::source_seed(pa.seed, &oa.name),
        };
        // One listening gain (from A) for all four files keeps their levels comparable.
        let g = args
            .flags
            .listen
            .map_or(1.0, |t| signal::listen_gain(&oa.samples, t, pa.full_scale));
        let [fa, fb, fab, fd] = files(&oa.name);
        for (name, data) in [
            (&fa, &oa.samples),
            (&fb, &c.b_matched),
            (&fab, &c.alternating),
            (&fd, &c.difference),
        ] {
            // faded at the edges (the comparison's figures come from the unfaded renders)
            let mut s: Vec<f64> = data.iter().map(|x| x * g).collect();
            fade.apply(0, &mut s);
            folder.write(name, spec, &s).map_err(signal_error)?;
        }
        results.push(c);
    }
    let json = serde_json::json!({
        "a": args.a,
        "b": args.b,
        "matched_by": matching,
        "crossfade_s": layout.fade_frames() as f64 / pa.rate,
        "outputs": results,
    });
    let text = serde_json::to_string_pretty(&json).map_err(failure_io)?;
    folder
        .write_text("compare.json", &text)
        .map_err(signal_error)?;
    for f in &plots {
        folder
            .write_text(&f.file_name(), &f.svg)
            .map_err(signal_error)?;
    }
    if args.json {
        say!("{text}");
        return Ok(());
    }
    say!(
        "{}: A = {}, B = {} -> {}",
        pa.title,
        args.a,
        args.b,
        dir.display()
    );
    for c in &results {
        say!();
        say!("output {}", c.output);
        say!(
            "  B matched to A by {}: gain {:+.2} dB",
            match c.matched_by {
                compare::Matching::Rms => "RMS of the whole output",
                compare::Matching::Loudness => "integrated loudness (ITU-R BS.1770-4)",
            },
            c.gain_db
        );
        match c.difference_below_db {
            Some(d) => say!(
                "  difference (A minus matched B) sits {d:.1} dB below the signal ({:.1} dBFS)",
                c.difference_dbfs.unwrap_or(f64::NEG_INFINITY)
            ),
            None => say!("  difference (A minus matched B) is silent: the two are identical"),
        }
        say!(
            "  {}-AB.wav alternates in {} segments with {} crossfades for sides of correlation \
             {:.3} (1: equal gain, 0: equal power):",
            c.output,
            fmt_eng(seg, "s"),
            fmt_eng(FADE_S, "s"),
            c.crossfade_correlation
        );
        let key: Vec<String> = c
            .segments
            .iter()
            .map(|s| format!("{} {:.2}-{:.2} s", s.side.label(), s.start_s, s.end_s))
            .collect();
        for line in key.chunks(6) {
            say!("    {}", line.join(", "));
        }
        say!("  {:<16} {:>12} {:>12} {:>12}", "figure", "A", "B", "B - A");
        for r in &c.figures {
            let v = |x: Option<f64>| x.map_or("-".to_string(), |x| format!("{x:.4}"));
            say!(
                "  {:<16} {:>12} {:>12} {:>12}  {}",
                r.figure,
                v(r.a),
                v(r.b),
                r.delta.map_or("-".to_string(), |d| format!("{d:+.4}")),
                r.unit
            );
        }
        if c.changes.is_empty() {
            say!("  no figure moved beyond its threshold");
        }
        for s in &c.changes {
            say!("  - {s}");
        }
    }
    Ok(())
}
