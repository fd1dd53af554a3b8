//! The binary side of the design-study commands: `render --variant`, `compare`, `sweep` and
//! `tolerance`. Flags are parsed in `cli.rs`; the studies themselves live in
//! `railsong::study`; this file prints, shows progress and writes through `OutputDir`.

use std::path::{Path, PathBuf};

use railsong::analysis::Settings;
use railsong::engine::Run;
use railsong::measure;
use railsong::measure::Measurement;
use railsong::model::Patch;
use railsong::parts::eseries::Series;
use railsong::signal::{self, Depth, OutputDir, WavSpec};
use railsong::study::compare::{self, Alternation, OutputComparison};
use railsong::study::sweep::{self, PatchText, Spacing, Value};
use railsong::study::tolerance::{self, Spread, Tolerances};
use railsong::study::StudyError;
use railsong::units::{self, fmt_eng};

use crate::cli::{
    default_dir, failure_io, load, render_to, run_patch, signal_error, stem_of, Failure,
    RenderFlags,
};

/// Crossfade length of the alternating A/B file, s.
const FADE_S: f64 = 0.010;

fn study_error(e: StudyError) -> Failure {
    match e {
        StudyError::Render(r) => crate::cli::render_error(r),
        other => Failure::bad_input(other),
    }
}

fn depth_of(flags: &RenderFlags) -> Depth {
    match flags.depth.as_str() {
        "16" => Depth::Pcm16,
        "float" => Depth::Float32,
        _ => Depth::Pcm24,
    }
}

fn bar(n: usize, what: &str) -> indicatif::ProgressBar {
    // The stderr target draws nothing when stderr is not a terminal.
    let b = indicatif::ProgressBar::with_draw_target(
        Some(n as u64),
        indicatif::ProgressDrawTarget::stderr(),
    );
    b.set_style(
        indicatif::ProgressStyle::with_template(&format!(
            "{what} {{bar:40}} {{pos}}/{{len}} {{eta}}"
        ))
        .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    b
}

fn variant_names(path: &Path) -> Result<Vec<String>, Failure> {
    Ok(railsong::patch::load_variants(path)
        .map_err(Failure::bad_input)?
        .into_iter()
        .map(|v| v.name)
        .collect())
}

fn load_side(path: &Path, name: &str, sets: &[String]) -> Result<Patch, Failure> {
    if name == "base" {
        load(path, sets)
    } else {
        railsong::patch::load_variant(path, Some(name), sets).map_err(Failure::bad_input)
    }
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
    let dir = args.flags.out.clone().unwrap_or_else(|| {
        default_dir(&format!("{}-{}-vs-{}", stem_of(args.patch), args.a, args.b))
    });
    let mut folder = OutputDir::open(&dir, args.flags.force).map_err(signal_error)?;
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
            if g == 1.0 {
                folder.write(name, spec, data)
            } else {
                let s: Vec<f64> = data.iter().map(|x| x * g).collect();
                folder.write(name, spec, &s)
            }
            .map_err(signal_error)?;
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
    if args.flags.plots {
        for (side, p) in [("A", &pa), ("B", &pb)] {
            let figs = railsong::report::plots(p, None).map_err(crate::cli::render_error)?;
            for f in figs {
                folder
                    .write_text(&format!("{}-{side}-{}.svg", f.output, f.kind), &f.svg)
                    .map_err(signal_error)?;
            }
        }
    }
    if args.json {
        println!("{text}");
        return Ok(());
    }
    println!(
        "{}: A = {}, B = {} -> {}",
        pa.title,
        args.a,
        args.b,
        dir.display()
    );
    for c in &results {
        println!();
        println!("output {}", c.output);
        println!(
            "  B matched to A by {}: gain {:+.2} dB",
            match c.matched_by {
                compare::Matching::Rms => "RMS of the whole output",
                compare::Matching::Loudness => "integrated loudness (ITU-R BS.1770-4)",
            },
            c.gain_db
        );
        match c.difference_below_db {
            Some(d) => println!(
                "  difference (A minus matched B) sits {d:.1} dB below the signal ({:.1} dBFS)",
                c.difference_dbfs.unwrap_or(f64::NEG_INFINITY)
            ),
            None => println!("  difference (A minus matched B) is silent: the two are identical"),
        }
        println!(
            "  {}-AB.wav alternates in {} segments with {} equal-power crossfades:",
            c.output,
            fmt_eng(seg, "s"),
            fmt_eng(FADE_S, "s")
        );
        let key: Vec<String> = c
            .segments
            .iter()
            .map(|s| format!("{} {:.2}-{:.2} s", s.side.label(), s.start_s, s.end_s))
            .collect();
        for line in key.chunks(6) {
            println!("    {}", line.join(", "));
        }
        println!("  {:<16} {:>12} {:>12} {:>12}", "figure", "A", "B", "B - A");
        for r in &c.figures {
            let v = |x: Option<f64>| x.map_or("-".to_string(), |x| format!("{x:.4}"));
            println!(
                "  {:<16} {:>12} {:>12} {:>12}  {}",
                r.figure,
                v(r.a),
                v(r.b),
                r.delta.map_or("-".to_string(), |d| format!("{d:+.4}")),
                r.unit
            );
        }
        if c.changes.is_empty() {
            println!("  no figure moved beyond its threshold");
        }
        for s in &c.changes {
            println!("  - {s}");
        }
    }
    Ok(())
}

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
}

fn split_range<'s>(flag: &str, s: &'s str) -> Result<(&'s str, &'s str), Failure> {
    match s.split_once("..") {
        Some((a, b)) if !a.trim().is_empty() && !b.trim().is_empty() => Ok((a.trim(), b.trim())),
        _ => Err(Failure::bad_input(format!(
            "{flag} {s}: expected FROM..TO, e.g. 10k..100k"
        ))),
    }
}

fn sweep_values(args: &SweepArgs) -> Result<(String, Vec<Value>), Failure> {
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
    let text = std::fs::read_to_string(args.patch)
        .map_err(|e| Failure::bad_input(format!("{origin}: cannot read: {e}")))?;
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
    let pb = bar(values.len(), "sweeping");
    let tick = || pb.inc(1);
    let pts = sweep::run(&src, args.with, &path, &values, &Settings::default(), &tick)
        .map_err(study_error)?;
    pb.finish_and_clear();

    let mut folder = match &args.plots {
        Some((dir, force)) => {
            let dir = dir
                .clone()
                .unwrap_or_else(|| default_dir(&stem_of(args.patch)));
            Some(OutputDir::open(&dir, *force).map_err(signal_error)?)
        }
        None => None,
    };
    let mut json_out = serde_json::Map::new();
    if args.csv {
        println!("output,path,value,{}", figures.join(","));
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
        let at1 = sweep::crossing(&thd, 1.0);
        let at01 = sweep::crossing(&thd, 0.1);
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
                let axis = |log: bool, label: &str, unit: &str| {
                    if log {
                        railsong::plot::AxisSpec::log(label, unit)
                    } else {
                        railsong::plot::AxisSpec::linear(label, unit)
                    }
                };
                let crossings: Vec<railsong::plot::Crossing> = if f == "thd_percent" {
                    at1.map(|x| railsong::plot::Crossing {
                        x,
                        y: 1.0,
                        label: format!("1 % THD at {}", fmt_eng(x, "")),
                    })
                    .into_iter()
                    .collect()
                } else {
                    Vec::new()
                };
                let title = format!("{}: {f} against {path}", o.name);
                let caption = format!("{} points; each a full render and measurement", pts.len());
                let series = [railsong::plot::SweepSeries {
                    name: f,
                    points: &pts,
                }];
                let svg = railsong::plot::sweep_svg(&railsong::plot::SweepPlot {
                    title: &title,
                    caption: &caption,
                    x: axis(log_x, &path, ""),
                    y: axis(log_y, f, ""),
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
                println!("{},{path},{},{}", o.name, v.x, cells.join(","));
            }
        } else {
            println!("output {}: sweep of {path}", o.name);
            let head: Vec<String> = figures.iter().map(|f| format!("{f:>16}")).collect();
            println!("  {:>14}  {}", "value", head.join(""));
            for (v, fs) in &rows {
                let cells: Vec<String> = fs
                    .iter()
                    .map(|x| x.map_or(format!("{:>16}", "-"), |x| format!("{x:>16.5}")))
                    .collect();
                let unit = sweep::parse_quantity(&v.text)
                    .map(|q| q.1)
                    .unwrap_or_default();
                println!("  {:>14}  {}", fmt_eng(v.x, &unit), cells.join(""));
            }
            if !thd.is_empty() {
                let xunit = sweep::parse_quantity(&values[0].text)
                    .map(|q| q.1)
                    .unwrap_or_default();
                let say = |x: Option<f64>, th: &str| match x {
                    Some(l) => println!(
                        "  THD reaches {th} at {} ({path} = {l:.6})",
                        fmt_eng(l, &xunit)
                    ),
                    None => println!("  THD does not cross {th} in this range"),
                };
                say(at01, "0.1 %");
                say(at1, "1 %");
            }
            println!();
        }
    }
    if args.json {
        println!(
            "{}",
            serde_json::to_string_pretty(&serde_json::Value::Object(json_out))
                .map_err(failure_io)?
        );
    }
    Ok(())
}

/// Options of `tolerance`.
pub(crate) struct ToleranceArgs<'a> {
    pub patch: &'a Path,
    pub runs: usize,
    pub tol: Option<&'a str>,
    pub cap_tol: Option<&'a str>,
    pub series: Option<&'a str>,
    pub seed: Option<u64>,
    pub render_run: Option<usize>,
    pub sets: &'a [String],
    pub flags: &'a RenderFlags,
    pub json: bool,
}

fn series_tolerance(s: Series) -> f64 {
    // IEC 60063 tolerance classes of the series (common practice of the trade).
    match s {
        Series::E12 => 0.10,
        Series::E24 => 0.05,
        Series::E48 => 0.02,
        Series::E96 => 0.01,
        Series::E192 => 0.005,
    }
}

/// The study's tolerances: `--tol` (or the class of `--series`), else the patch's
/// `[patch] tolerance`, else 1 %; capacitors: `--cap-tol`, else `[patch] cap_tolerance`, else
/// the resistor tolerance. Per-stage keys in the patch override both for their stage.
fn tolerances(args: &ToleranceArgs, patch: &Patch) -> Result<Tolerances, Failure> {
    let pct = |flag: &str, s: &str| {
        units::parse_percent(s).map_err(|e| Failure::bad_input(format!("{flag} {s}: {e}")))
    };
    let resistor = match (args.tol, args.series) {
        (Some(t), _) => pct("--tol", t)?,
        (None, Some(s)) => series_tolerance(Series::parse(s).ok_or_else(|| {
            Failure::bad_input(format!("--series {s}: expected E12, E24, E48, E96 or E192"))
        })?),
        (None, None) => patch.tolerances.resistor.unwrap_or(0.01),
    };
    let capacitor = match args.cap_tol {
        Some(t) => pct("--cap-tol", t)?,
        None => patch.tolerances.capacitor.unwrap_or(resistor),
    };
    let t = Tolerances {
        resistor,
        capacitor,
    };
    t.check().map_err(study_error)?;
    Ok(t)
}

fn fmt_spread(s: &Option<Spread>, scale: f64, digits: usize) -> String {
    match s {
        Some(s) => format!(
            "{:+.d$} / {:+.d$} / {:+.d$} / {:+.d$} / {:+.d$}",
            s.min * scale,
            s.p5 * scale,
            s.median * scale,
            s.p95 * scale,
            s.max * scale,
            d = digits
        ),
        None => "-".into(),
    }
}

/// `railsong tolerance`.
pub(crate) fn cmd_tolerance(args: &ToleranceArgs) -> Result<(), Failure> {
    let patch = load(args.patch, args.sets)?;
    let tol = tolerances(args, &patch)?;
    let seed = args.seed.unwrap_or(patch.seed);
    if let Some(i) = args.render_run {
        if i == 0 {
            return Err(Failure::bad_input(
                "--render-run 0: runs are numbered from 1",
            ));
        }
        let p = tolerance::perturb(&patch, &tol, tolerance::run_seed(seed, i));
        let dir = args
            .flags
            .out
            .clone()
            .unwrap_or_else(|| default_dir(&stem_of(args.patch)));
        println!(
            "tolerance run {i} (seed {seed}, run seed {}, resistors +/-{} %, capacitors +/-{} %)",
            tolerance::run_seed(seed, i),
            tol.resistor * 100.0,
            tol.capacitor * 100.0
        );
        let flags = RenderFlags {
            out: Some(dir),
            depth: args.flags.depth.clone(),
            listen: args.flags.listen,
            force: args.flags.force,
            plots: false,
            long: args.flags.long,
        };
        return render_to(&p, &stem_of(args.patch), &flags, Some(&format!("run{i}"))).map(|_| ());
    }
    if args.runs == 0 {
        return Err(Failure::bad_input("--runs 0: expected 1 or more"));
    }
    let pb = bar(args.runs, "tolerance runs");
    let tick = || pb.inc(1);
    let rep = tolerance::study(&patch, &tol, args.runs, seed, &Settings::default(), &tick)
        .map_err(study_error)?;
    pb.finish_and_clear();
    if args.flags.plots {
        let dir = args
            .flags
            .out
            .clone()
            .unwrap_or_else(|| default_dir(&stem_of(args.patch)));
        let mut folder = OutputDir::open(&dir, args.flags.force).map_err(signal_error)?;
        for (k, o) in patch.outputs.iter().enumerate() {
            let gains: Vec<f64> = rep.runs.iter().map(|r| r.outputs[k].gain_db).collect();
            let title = format!("{}: gain spread over {} runs", o.name, rep.runs.len());
            let caption = format!(
                "resistors +/-{} %, capacitors +/-{} % (uniform), seed {}; Freedman-Diaconis bins",
                tol.resistor * 100.0,
                tol.capacitor * 100.0,
                rep.seed
            );
            let svg = railsong::plot::histogram_svg(&railsong::plot::HistogramPlot {
                title: &title,
                caption: &caption,
                values: &gains,
                x: railsong::plot::AxisSpec::linear("Gain change", "dB"),
                rule: railsong::plot::BinRule::FreedmanDiaconis,
            });
            if let Ok(svg) = svg {
                folder
                    .write_text(&format!("{}-tolerance-gain.svg", o.name), &svg)
                    .map_err(signal_error)?;
            }
        }
    }
    if args.json {
        println!(
            "{}",
            serde_json::to_string_pretty(&rep).map_err(failure_io)?
        );
        return Ok(());
    }
    println!(
        "{}: {} runs, resistors uniform within +/-{} %, capacitors within +/-{} %, seed {seed}",
        patch.title,
        args.runs,
        tol.resistor * 100.0,
        tol.capacitor * 100.0
    );
    println!("  spreads are min / 5th pct / median / 95th pct / max");
    for o in &rep.outputs {
        println!();
        println!("output {}", o.output);
        println!(
            "  gain over nominal (output RMS)  {} dB",
            fmt_spread(&o.gain_db, 1.0, 3)
        );
        if o.thd_percent.is_some() {
            println!(
                "  THD at the patch level         {} %",
                fmt_spread(&o.thd_percent, 1.0, 4)
            );
        }
        println!(
            "  DC offset                      {} mV",
            fmt_spread(&o.dc_v, 1e3, 3)
        );
    }
    if !rep.channels.is_empty() {
        println!();
        println!("mixer channels: small-signal gain -Rf / (Ri + Rs) of each input path, from the perturbed values (closed form)");
        for c in &rep.channels {
            println!(
                "  {}[{}] from {} (nominal {:+.4}): {} %",
                c.nominal.stage,
                c.nominal.input,
                c.nominal.from,
                c.nominal.gain,
                fmt_spread(&c.deviation_percent, 1.0, 3)
            );
        }
        for m in &rep.mismatch {
            println!(
                "  {}: mismatch between channels (largest over smallest |gain|) {} dB",
                m.stage,
                fmt_spread(&m.mismatch_db, 1.0, 3)
            );
        }
    }
    if let Some(w) = rep.worst_run {
        let r = &rep.runs[w - 1];
        let worst =
            r.outputs
                .iter()
                .map(|o| o.gain_db)
                .fold(0.0f64, |a, b| if b.abs() > a.abs() { b } else { a });
        println!();
        println!(
            "worst run: {w} (run seed {}), gain {worst:+.3} dB; render it with",
            r.seed
        );
        let mut cmd = format!(
            "  railsong tolerance {} --tol {}% --cap-tol {}% --seed {seed}",
            args.patch.display(),
            tol.resistor * 100.0,
            tol.capacitor * 100.0
        );
        for s in args.sets {
            cmd.push_str(&format!(" --set {s}"));
        }
        cmd.push_str(&format!(" --render-run {w}"));
        println!("{cmd}");
    }
    Ok(())
}
