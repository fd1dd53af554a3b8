//! Command-line definitions and the pipeline behind each command.

use std::path::{Path, PathBuf};

use clap::{Parser, Subcommand};

use railsong::analysis::sweep::level_at_thd;
use railsong::analysis::{Harmonics, Settings, TestSignal, Weighting};
use railsong::check::{self, WarningKind};
use railsong::engine::Run;
use railsong::measure;
use railsong::model::{Patch, Wave};
use railsong::parts::{builtin, builtin_names, OpAmp};
use railsong::render::{self, RenderError, RenderOptions};
use railsong::report;
use railsong::signal::{self, Depth, OutputDir, SignalError, WavSpec};
use railsong::units::{self, fmt_eng, Level};

/// Exit code for bad input (patch, flags, input files).
pub const EXIT_BAD_INPUT: u8 = 2;
/// Exit code for failures that are not the user's input (I/O while writing, internal).
pub const EXIT_FAILURE: u8 = 1;

/// A failure with its exit code and a one-line message for stderr.
#[derive(Debug)]
pub struct Failure {
    /// Process exit code.
    pub code: u8,
    /// One line, no trailing newline.
    pub message: String,
}

impl Failure {
    pub(crate) fn bad_input(message: impl std::fmt::Display) -> Failure {
        Failure {
            code: EXIT_BAD_INPUT,
            message: message.to_string(),
        }
    }
}

#[derive(Parser, Debug)]
#[command(
    name = "railsong",
    version,
    about = "Hear and measure op-amp audio stages before you build them",
    long_about = "railsong reads a patch (a TOML file of sources, rails, op-amp stages, parts and \
outputs), runs a sample-by-sample behavioural model of each op-amp, and tells you where it \
clips, slews, leaves its input range or reverses phase."
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Validate a patch and print static warnings (nothing is rendered).
    Check {
        /// The patch file.
        patch: PathBuf,
        /// Override a value by dotted path, e.g. --set stages.sum.feedback.r=47k (repeatable).
        #[arg(long = "set", value_name = "PATH=VALUE")]
        sets: Vec<String>,
    },
    /// Render every output to a WAV file, with a figures file beside them.
    Render {
        /// The patch file.
        patch: PathBuf,
        #[command(flatten)]
        out: RenderFlags,
        /// Render only this [variants.NAME] besides the base (repeatable; default: every
        /// variant). Its files are named <output>-<variant>.wav.
        #[arg(long = "variant", value_name = "NAME")]
        variants: Vec<String>,
        /// Override a value by dotted path (repeatable).
        #[arg(long = "set", value_name = "PATH=VALUE")]
        sets: Vec<String>,
    },
    /// Render the built-in demo patch (a four-voice mixer) and say what to listen for.
    Demo {
        #[command(flatten)]
        out: RenderFlags,
    },
    /// Run a patch and print its figures (THD, THD+N, SINAD, levels, headroom, events).
    Measure {
        /// The patch file.
        patch: PathBuf,
        /// Only this output.
        #[arg(long, value_name = "NAME")]
        output: Option<String>,
        /// Print one JSON object instead of the table.
        #[arg(long, conflicts_with = "csv")]
        json: bool,
        /// Print CSV instead of the table.
        #[arg(long)]
        csv: bool,
        /// Step one source's level and report THD and THD+N at each step, and the levels
        /// where THD crosses 1 % and 0.1 % (e.g. --level-sweep lead=0.5V..8V).
        #[arg(long, value_name = "SOURCE=FROM..TO")]
        level_sweep: Option<String>,
        /// Number of points of --level-sweep (equal steps in dB).
        #[arg(long, default_value_t = 13)]
        steps: usize,
        /// Highest harmonic counted by THD.
        #[arg(long, default_value_t = 10)]
        harmonics: usize,
        /// Weight THD+N and SNR: flat or a (IEC 61672-1 A-weighting).
        #[arg(long, default_value = "flat", value_parser = ["flat", "a"])]
        weighting: String,
        /// Also write the plots (SVG) into --plots-dir.
        #[arg(long)]
        plots: bool,
        /// Folder for --plots (default: renders/<patch name>/).
        #[arg(long, value_name = "DIR")]
        plots_dir: Option<PathBuf>,
        /// Overwrite plot files railsong did not write.
        #[arg(long)]
        force: bool,
        /// Allow patches longer than 10 minutes.
        #[arg(long)]
        long: bool,
        /// Override a value by dotted path (repeatable).
        #[arg(long = "set", value_name = "PATH=VALUE")]
        sets: Vec<String>,
    },
    /// Write one self-contained HTML page: the patch, its figures, plots and a player for
    /// each render (works offline from a file:// URL).
    Report {
        /// The patch file.
        patch: PathBuf,
        /// Compare: side A (`base` or a [variants.NAME]); needs --b.
        #[arg(long, value_name = "NAME", requires = "b")]
        a: Option<String>,
        /// Compare: side B (`base` or a [variants.NAME]); needs --a.
        #[arg(long, value_name = "NAME", requires = "a")]
        b: Option<String>,
        /// Segment length of the alternating A/B file.
        #[arg(long, default_value = "2 s")]
        segment: String,
        #[command(flatten)]
        out: RenderFlags,
        /// Override a value by dotted path (repeatable).
        #[arg(long = "set", value_name = "PATH=VALUE")]
        sets: Vec<String>,
    },
    /// Analytic noise budget at each output: every resistor's thermal noise and every
    /// op-amp's voltage and current noise, through the network's noise gains.
    Noise {
        /// The patch file.
        patch: PathBuf,
        /// Only this output.
        #[arg(long, value_name = "NAME")]
        output: Option<String>,
        /// Print JSON instead of the tables.
        #[arg(long)]
        json: bool,
        /// Override a value by dotted path (repeatable).
        #[arg(long = "set", value_name = "PATH=VALUE")]
        sets: Vec<String>,
    },
    /// List the built-in op-amp profiles (and a patch's own parts) with their figures.
    Parts {
        /// Also list the [parts.*] defined in this patch.
        patch: Option<PathBuf>,
        /// Override a value by dotted path (repeatable).
        #[arg(long = "set", value_name = "PATH=VALUE")]
        sets: Vec<String>,
    },
    /// Level-matched A/B of two variants: both renders, an alternating file, a difference
    /// file, and the figures side by side.
    Compare {
        /// The patch file.
        patch: PathBuf,
        /// Variant A (a [variants.NAME] or `base`).
        #[arg(long, value_name = "NAME")]
        a: String,
        /// Variant B (a [variants.NAME] or `base`).
        #[arg(long, value_name = "NAME")]
        b: String,
        /// Segment length of the alternating file.
        #[arg(long, default_value = "2s", value_name = "TIME")]
        segment: String,
        /// Level-match B to A by the RMS of the whole output or by integrated loudness
        /// (ITU-R BS.1770-4).
        #[arg(long = "match", default_value = "rms", value_parser = ["rms", "loudness"])]
        matching: String,
        /// Print the comparison as JSON (it is always written to compare.json).
        #[arg(long)]
        json: bool,
        #[command(flatten)]
        out: RenderFlags,
        /// Override a value by dotted path, applied to both sides (repeatable).
        #[arg(long = "set", value_name = "PATH=VALUE")]
        sets: Vec<String>,
    },
    /// Step one value (a level, a resistor, a frequency, a pot position) and tabulate
    /// figures at each step.
    Sweep {
        /// The patch file.
        patch: PathBuf,
        /// What to sweep: PATH=FROM..TO (with --steps), or PATH alone with --values or
        /// --series and --range.
        #[arg(long = "set", value_name = "PATH=FROM..TO")]
        set: String,
        /// Number of points of a FROM..TO range.
        #[arg(long, default_value_t = 11)]
        steps: usize,
        /// Equal ratios between the points instead of equal steps.
        #[arg(long)]
        log: bool,
        /// An explicit list of values, e.g. 10k,22k,47k.
        #[arg(long, value_name = "LIST")]
        values: Option<String>,
        /// Every IEC 60063 value of this series (E12, E24, E48, E96, E192) within --range.
        #[arg(long, value_name = "SERIES", requires = "range")]
        series: Option<String>,
        /// Range of --series, LO..HI.
        #[arg(long, value_name = "LO..HI")]
        range: Option<String>,
        /// Figures to tabulate, comma-separated (default thd_percent, thdn_db, peak_v,
        /// headroom_pos_db, headroom_neg_db).
        #[arg(long, value_name = "LIST")]
        figure: Option<String>,
        /// A fixed override for every point (repeatable).
        #[arg(long = "with", value_name = "PATH=VALUE")]
        with: Vec<String>,
        /// Sweep this [variants.NAME] instead of the base patch.
        #[arg(long, value_name = "NAME")]
        variant: Option<String>,
        /// Print CSV.
        #[arg(long, conflicts_with = "json")]
        csv: bool,
        /// Print JSON.
        #[arg(long)]
        json: bool,
        /// Also write a plot (SVG) of each figure against the swept value into --out.
        #[arg(long)]
        plots: bool,
        /// Folder for --plots (default: renders/<patch name>/).
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
        /// Overwrite plot files railsong did not write.
        #[arg(long)]
        force: bool,
    },
    /// Monte Carlo over every resistor and capacitor within its tolerance.
    Tolerance {
        /// The patch file.
        patch: PathBuf,
        /// Number of runs.
        #[arg(long, default_value_t = 200)]
        runs: usize,
        /// Resistor tolerance, e.g. 1% (default: that of --series, else 1 %).
        #[arg(long, value_name = "PERCENT")]
        tol: Option<String>,
        /// Capacitor tolerance (default: the resistor tolerance).
        #[arg(long, value_name = "PERCENT")]
        cap_tol: Option<String>,
        /// Take the resistor tolerance from a series: E12 10 %, E24 5 %, E48 2 %, E96 1 %,
        /// E192 0.5 %.
        #[arg(long, value_name = "SERIES")]
        series: Option<String>,
        /// Study seed (default: the patch seed).
        #[arg(long)]
        seed: Option<u64>,
        /// Render run N of the study (same --tol, --cap-tol and --seed) instead of running it.
        #[arg(long, value_name = "N")]
        render_run: Option<usize>,
        /// Print the whole study as JSON.
        #[arg(long)]
        json: bool,
        #[command(flatten)]
        out: RenderFlags,
        /// Override a value by dotted path (repeatable).
        #[arg(long = "set", value_name = "PATH=VALUE")]
        sets: Vec<String>,
    },
}

/// Flags shared by the commands that write renders.
#[derive(clap::Args, Debug)]
pub(crate) struct RenderFlags {
    /// Folder to write into (default: renders/<patch name>/).
    #[arg(long, value_name = "DIR")]
    pub(crate) out: Option<PathBuf>,
    /// Sample format of the WAV files: 16 (TPDF-dithered), 24 or float.
    #[arg(long, default_value = "24", value_parser = ["16", "24", "float"])]
    pub(crate) depth: String,
    /// Scale each file so its RMS sits at this level in dBFS (peaks kept below -1 dBFS)
    /// instead of the patch calibration; for listening, e.g. --listen -18.
    #[arg(long, value_name = "DBFS", allow_negative_numbers = true)]
    pub(crate) listen: Option<f64>,
    /// Overwrite files in the folder that railsong did not write.
    #[arg(long)]
    pub(crate) force: bool,
    /// Also write the plots (SVG: spectrum, waveform, transfer curve, THD against level).
    #[arg(long)]
    pub(crate) plots: bool,
    /// Allow renders longer than 10 minutes.
    #[arg(long)]
    pub(crate) long: bool,
}

/// Parse the command line and run the command.
pub fn run() -> Result<(), Failure> {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            use clap::error::ErrorKind;
            if matches!(e.kind(), ErrorKind::DisplayHelp | ErrorKind::DisplayVersion) {
                print!("{e}");
                return Ok(());
            }
            let text = e.to_string();
            let first = text
                .lines()
                .find(|l| !l.trim().is_empty())
                .unwrap_or("bad command line")
                .trim_start_matches("error: ")
                .to_string();
            return Err(Failure::bad_input(format!("{first} (see railsong --help)")));
        }
    };
    match cli.command {
        Command::Check { patch, sets } => cmd_check(&patch, &sets),
        Command::Parts { patch, sets } => cmd_parts(patch.as_deref(), &sets),
        Command::Render {
            patch,
            out,
            variants,
            sets,
        } => {
            let p = load(&patch, &sets)?;
            crate::cli_study::check_variants(&patch, &variants)?;
            render_to(&p, &stem_of(&patch), &out, None)?;
            crate::cli_study::render_variants(&patch, &sets, &variants, &out)
        }
        Command::Demo { out } => cmd_demo(&out),
        Command::Report {
            patch,
            a,
            b,
            segment,
            out,
            sets,
        } => {
            let ab = a.zip(b);
            cmd_report(
                &patch,
                &out,
                &sets,
                ab.as_ref()
                    .map(|(a, b)| (a.as_str(), b.as_str(), segment.as_str())),
            )
        }
        Command::Noise {
            patch,
            output,
            json,
            sets,
        } => cmd_noise(&patch, &sets, output.as_deref(), json),
        Command::Measure {
            patch,
            output,
            json,
            csv,
            level_sweep,
            steps,
            harmonics,
            weighting,
            plots,
            plots_dir,
            force,
            long,
            sets,
        } => {
            let settings = analysis_settings(harmonics, &weighting)?;
            let plots = plots.then(|| plots_dir.unwrap_or_else(|| default_dir(&stem_of(&patch))));
            match level_sweep {
                Some(spec) => cmd_level_sweep(&patch, &sets, &spec, steps, &settings, json, csv),
                None => cmd_measure(
                    &patch,
                    &sets,
                    output.as_deref(),
                    (json, csv, long),
                    &settings,
                    plots.map(|d| (d, force)),
                ),
            }
        }
        Command::Compare {
            patch,
            a,
            b,
            segment,
            matching,
            json,
            out,
            sets,
        } => crate::cli_study::cmd_compare(&crate::cli_study::CompareArgs {
            patch: &patch,
            a: &a,
            b: &b,
            segment: &segment,
            matching: &matching,
            sets: &sets,
            flags: &out,
            json,
        }),
        Command::Sweep {
            patch,
            set,
            steps,
            log,
            values,
            series,
            range,
            figure,
            with,
            variant,
            csv,
            json,
            plots,
            out,
            force,
        } => crate::cli_study::cmd_sweep(&crate::cli_study::SweepArgs {
            patch: &patch,
            set: &set,
            steps,
            log,
            values: values.as_deref(),
            series: series.as_deref(),
            range: range.as_deref(),
            figures: figure.as_deref(),
            with: &with,
            variant: variant.as_deref(),
            csv,
            json,
            plots: plots.then_some((out, force)),
        }),
        Command::Tolerance {
            patch,
            runs,
            tol,
            cap_tol,
            series,
            seed,
            render_run,
            json,
            out,
            sets,
        } => crate::cli_study::cmd_tolerance(&crate::cli_study::ToleranceArgs {
            patch: &patch,
            runs,
            tol: tol.as_deref(),
            cap_tol: cap_tol.as_deref(),
            series: series.as_deref(),
            seed,
            render_run,
            sets: &sets,
            flags: &out,
            json,
        }),
    }
}

pub(crate) fn load(path: &Path, sets: &[String]) -> Result<Patch, Failure> {
    railsong::patch::load(path, sets).map_err(Failure::bad_input)
}

fn cmd_check(path: &Path, sets: &[String]) -> Result<(), Failure> {
    let patch = load(path, sets)?;
    let report = check::check(&patch);
    println!("{} ({})", patch.title, path.display());
    println!(
        "  rails {} / {}, {} x{}, {} long, {} source(s), {} stage(s), {} output(s)",
        fmt_eng(patch.rails.pos, "V"),
        fmt_eng(patch.rails.neg, "V"),
        fmt_eng(patch.rate, "Hz"),
        patch.oversample,
        fmt_eng(patch.length, "s"),
        patch.sources.len(),
        patch.stages.len(),
        patch.outputs.len()
    );
    println!();
    println!("  stage                 type            part               gain      NG     bandwidth  worst-case span        swing");
    for s in &report.stages {
        let gain = match s.gains.as_slice() {
            [g] => format!("{g:+.3}"),
            gs => format!("{:+.3}x{}", gs[0], gs.len()),
        };
        println!(
            "  {:<21} {:<15} {:<18} {:<9} {:<6} {:<10} {:<22} {}",
            s.name,
            s.kind,
            s.part.as_deref().unwrap_or("-"),
            gain,
            s.noise_gain.map_or("-".into(), |g| format!("{g:.2}")),
            s.bandwidth.map_or("-".into(), |b| fmt_eng(b, "Hz")),
            format!("{} .. {}", fmt_eng(s.span.lo, "V"), fmt_eng(s.span.hi, "V")),
            s.swing.map_or("-".into(), |(lo, hi)| format!(
                "{} .. {}",
                fmt_eng(lo, "V"),
                fmt_eng(hi, "V")
            )),
        );
    }
    println!();
    if report.warnings.is_empty() {
        println!("  no warnings");
    } else {
        println!("  {} warning(s):", report.warnings.len());
        for w in &report.warnings {
            println!("  [{}] {}: {}", tag(w.kind), w.key, w.message);
        }
    }
    Ok(())
}

fn tag(kind: WarningKind) -> &'static str {
    match kind {
        WarningKind::Clipping => "clip",
        WarningKind::CommonMode => "input range",
        WarningKind::Supply => "supply",
        WarningKind::Current => "current",
        WarningKind::NonStandard => "value",
        WarningKind::Bandwidth => "bandwidth",
        WarningKind::Slew => "slew",
    }
}

fn cmd_parts(path: Option<&Path>, sets: &[String]) -> Result<(), Failure> {
    let mut parts: Vec<(OpAmp, &str)> = builtin_names()
        .iter()
        .filter_map(|n| builtin(n))
        .map(|p| (p, "built-in"))
        .collect();
    if let Some(path) = path {
        let patch = load(path, sets)?;
        let mut seen: Vec<String> = parts.iter().map(|(p, _)| p.name.clone()).collect();
        for st in &patch.stages {
            if let Some(p) = &st.part {
                if !seen.contains(&p.name) {
                    seen.push(p.name.clone());
                    parts.push((p.clone(), "patch"));
                }
            }
        }
    }
    println!(
        "op-amp profiles (built-in figures are typical of their class, not of any one product)"
    );
    println!();
    for (p, origin) in &parts {
        println!("{} ({origin}): {}", p.name, p.about);
        let lim = |v: Option<f64>, side: &str| {
            v.map_or("no limit".to_string(), |d| {
                if d >= 0.0 {
                    format!("{} inside {side}", fmt_eng(d, "V"))
                } else {
                    format!("{} beyond {side}", fmt_eng(-d, "V"))
                }
            })
        };
        println!(
            "    GBW {}  slew {}/us  A0 {}  swing short of rails +{} / -{}  knee {}",
            fmt_eng(p.gbw, "Hz"),
            fmt_eng(p.slew * 1e-6, "V"),
            p.a0.map_or("infinite".into(), |a| format!("{:.0} dB", 20.0 * a.log10())),
            fmt_eng(p.drop_pos, "V"),
            fmt_eng(p.drop_neg, "V"),
            fmt_eng(p.knee, "V"),
        );
        println!(
            "    input range: {} / {}{}",
            lim(p.cm_low, "V-"),
            lim(p.cm_high, "V+"),
            if p.reversal {
                ", reverses phase outside"
            } else {
                ""
            }
        );
        println!(
            "    Vos {}  Ib {}  en {}/rtHz (1/f corner {})  in {}/rtHz  Isc {}  max supply {}",
            fmt_eng(p.vos, "V"),
            fmt_eng(p.ib, "A"),
            fmt_eng(p.en, "V"),
            fmt_eng(p.en_corner, "Hz"),
            fmt_eng(p.inoise, "A"),
            p.isc.map_or("unlimited".into(), |i| fmt_eng(i, "A")),
            if p.supply_max.is_finite() {
                fmt_eng(p.supply_max, "V")
            } else {
                "unlimited".into()
            }
        );
    }
    Ok(())
}

/// The demo patch, compiled into the binary (the same file as patches/demo.toml).
const DEMO: &str = include_str!("../patches/demo.toml");

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

fn analysis_settings(harmonics: usize, weighting: &str) -> Result<Settings, Failure> {
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

fn progress_bar(frames: usize, rate: f64) -> Option<indicatif::ProgressBar> {
    if (frames as f64) < 2.0 * rate {
        return None;
    }
    let bar = indicatif::ProgressBar::new(1000);
    bar.set_style(
        indicatif::ProgressStyle::with_template("rendering {bar:40} {percent:>3}% {eta}")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    Some(bar)
}

/// Run `f` with a progress callback that drives a bar on stderr when asked and the patch is
/// long enough to need one.
fn with_progress<T>(
    patch: &Patch,
    show: bool,
    f: impl FnOnce(&mut dyn FnMut(f64)) -> Result<T, RenderError>,
) -> Result<T, Failure> {
    let bar = if show {
        progress_bar(patch.frames(), patch.rate)
    } else {
        None
    };
    let r = f(&mut |x| {
        if let Some(b) = &bar {
            b.set_position((x * 1000.0) as u64);
        }
    });
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    r.map_err(render_error)
}

fn options(alias: bool) -> RenderOptions {
    RenderOptions {
        frames: None,
        alias_probe: alias,
    }
}

/// Render a patch keeping every sample.
pub(crate) fn run_patch(patch: &Patch, alias: bool, show_progress: bool) -> Result<Run, Failure> {
    with_progress(patch, show_progress, |p| {
        render::render(patch, &options(alias), p)
    })
}

/// Stream a patch through `sink`, with a progress bar when asked and the render is long.
fn stream_patch(
    patch: &Patch,
    alias: bool,
    show_progress: bool,
    sink: &mut render::Sink,
) -> Result<render::Streamed, Failure> {
    with_progress(patch, show_progress, |p| {
        render::render_streaming(patch, &options(alias), sink, p)
    })
}

/// Stream a patch through `sink` (with the alias probe), render its idle channel when
/// circuit noise is on, and measure: figures from the kept tails, levels over the whole
/// record.
fn measure_streamed(
    patch: &Patch,
    settings: &Settings,
    output: Option<&str>,
    show_progress: bool,
    sink: &mut render::Sink,
) -> Result<(render::Streamed, measure::Measurement), Failure> {
    let streamed = stream_patch(patch, true, show_progress, sink)?;
    let idle = if patch.noise {
        Some(stream_patch(
            &render::muted(patch),
            false,
            false,
            &mut |_, _| Ok(()),
        )?)
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
    Ok((streamed, m))
}

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
    let (streamed, m) = measure_streamed(patch, &Settings::default(), None, true, &mut |i, x| {
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
    let run = &streamed.run;

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
            "  {}: peak {}  rms {}  headroom {} / {}{}{}",
            name,
            f.peak_v.map_or("-".into(), |v| fmt_eng(v, "V")),
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
    for a in &run.alias {
        println!(
            "  alias figure of '{}' in {} at x{}: {:.1} dBc (5 kHz tone 7 dB past the swing)",
            a.part, a.stage, run.oversample, a.dbc
        );
    }
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

/// Longest render without `--long`, s.
const LONG_RENDER_S: f64 = 600.0;

fn check_length(patch: &Patch, long: bool) -> Result<(), Failure> {
    if patch.length > LONG_RENDER_S && !long {
        return Err(Failure::bad_input(format!(
            "patch.length = {} is longer than {} minutes: pass --long to render it (memory stays flat, but it takes a while)",
            fmt_eng(patch.length, "s"),
            LONG_RENDER_S / 60.0
        )));
    }
    Ok(())
}

/// Longest stretch the listening page embeds, s.
const REPORT_MAX_S: f64 = 60.0;

fn cmd_report(
    path: &Path,
    flags: &RenderFlags,
    sets: &[String],
    ab: Option<(&str, &str, &str)>,
) -> Result<(), Failure> {
    let mut patch = load(path, sets)?;
    if patch.length > REPORT_MAX_S {
        println!(
            "the page plays and measures the first {REPORT_MAX_S} s of this {} patch",
            fmt_eng(patch.length, "s")
        );
        patch.length = REPORT_MAX_S;
    }
    let text = std::fs::read_to_string(path)
        .map_err(|e| Failure::bad_input(format!("{}: {e}", path.display())))?;
    let dir = flags
        .out
        .clone()
        .unwrap_or_else(|| default_dir(&stem_of(path)));
    let mut folder = OutputDir::open(&dir, flags.force).map_err(signal_error)?;
    folder.check_writable("report.html").map_err(signal_error)?;
    let (patch, run, m, comparison) = match ab {
        None => {
            let run = run_patch(&patch, true, true)?;
            let m = measure::measure(&patch, &run, None, &Settings::default(), None, None);
            (patch, run, m, None)
        }
        Some((a, b, segment)) => {
            let seg = units::parse_time(segment)
                .map_err(|e| Failure::bad_input(format!("--segment {segment}: {e}")))?;
            let mut sets = sets.to_vec();
            if patch.length < REPORT_MAX_S {
                sets.push(format!("patch.length={} s", patch.length));
            }
            let c = crate::cli_study::compare_sides(path, a, b, &sets, seg, "rms", true)?;
            (c.pa, c.ra, c.ma, Some((c.results, a, b)))
        }
    };
    let figs = report::plots(&patch, None).map_err(render_error)?;
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
                });
            }
        }
        Some((results, a, b)) => {
            for (o, c) in run.outputs.iter().zip(results) {
                players.push(report::Player {
                    label: format!("{} A", o.name),
                    note: format!("A = {a}"),
                    samples: &o.samples,
                });
                players.push(report::Player {
                    label: format!("{} B", o.name),
                    note: format!("B = {b}, matched: {:+.2} dB", c.gain_db),
                    samples: &c.b_matched,
                });
                players.push(report::Player {
                    label: format!("{} A/B", o.name),
                    note: "alternating A, B, A, B ...".into(),
                    samples: &c.alternating,
                });
                players.push(report::Player {
                    label: format!("{} difference", o.name),
                    note: match c.difference_below_db {
                        Some(d) => format!("A minus matched B, {d:.1} dB below the signal"),
                        None => "A minus matched B: silent".into(),
                    },
                    samples: &c.difference,
                });
            }
            sections.push(report::comparison_section(results, a, b));
        }
    }
    let html = report::page(&patch, &text, &m, &figs, &players, &sections);
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
    println!(
        "{}: report with {} plot(s) and {} player(s) -> {}",
        patch.title,
        figs.len(),
        players.len(),
        dir.join("report.html").display()
    );
    Ok(())
}

pub(crate) fn db_or_dash(v: Option<f64>, what: &str) -> String {
    v.map_or(format!("- {what}"), |d| format!("{d:+.1} dB {what}"))
}

pub(crate) fn print_events(events: &std::collections::BTreeMap<String, measure::EventSeconds>) {
    for (stage, e) in events {
        let mut parts = Vec::new();
        for (label, s) in [
            ("clipping", e.clip_s),
            ("slew-limited", e.slew_s),
            ("outside input range", e.cm_out_s),
            ("phase reversed", e.reversed_s),
        ] {
            if s > 0.0 {
                parts.push(format!("{label} {}", fmt_eng(s, "s")));
            }
        }
        println!(
            "      {stage}: {}",
            if parts.is_empty() {
                "clean".to_string()
            } else {
                parts.join(", ")
            }
        );
    }
}

fn cmd_demo(flags: &RenderFlags) -> Result<(), Failure> {
    let patch = railsong::patch::parse_str(DEMO, "demo.toml", Path::new("."), &[])
        .map_err(Failure::bad_input)?;
    let dir = render_to(&patch, "demo", flags, None)?;
    println!();
    println!("What to listen for (start quietly: the last two are harsh):");
    println!(
        "  {}  the mixer as designed: four voices, nothing happening to them.",
        dir.join("clean.wav").display()
    );
    println!(
        "  {}  the same voices at gain -3: squared-off, buzzy peaks where the mix hits the rails.",
        dir.join("rails.wav").display()
    );
    println!(
        "  {}  a JFET-input follower driven below its input range: upward spikes where it reverses phase.",
        dir.join("reversal.wav").display()
    );
    Ok(())
}

fn cmd_measure(
    path: &Path,
    sets: &[String],
    output: Option<&str>,
    (json, csv, long): (bool, bool, bool),
    settings: &Settings,
    plots: Option<(PathBuf, bool)>,
) -> Result<(), Failure> {
    let patch = load(path, sets)?;
    check_length(&patch, long)?;
    let mut folder = match &plots {
        Some((dir, force)) => Some(OutputDir::open(dir, *force).map_err(signal_error)?),
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
            println!(
                "{} plot(s) written to {}",
                figs.len(),
                folder.path().display()
            );
        }
    }
    if json {
        println!("{}", measure::to_json(&m));
    } else if csv {
        print!("{}", measure::to_csv(&m));
    } else {
        print_table(&patch, &m);
    }
    Ok(())
}

fn opt(v: Option<f64>, unit: &str, digits: usize) -> String {
    v.map_or("-".into(), |x| format!("{x:.digits$}{unit}"))
}

fn print_table(patch: &Patch, m: &measure::Measurement) {
    println!("{}", patch.title);
    for o in &patch.outputs {
        let Some(r) = m.outputs.get(&o.name) else {
            continue;
        };
        let f = &r.figures;
        println!();
        println!("output {} (from {})", o.name, r.from);
        println!(
            "  level       peak {}  rms {}  dc {}  crest {}  ({} / {} / {})",
            opt(f.peak_v, " V", 3),
            opt(f.rms_v, " V", 3),
            opt(f.dc_v.map(|d| d * 1e3), " mV", 2),
            opt(f.crest_db, " dB", 1),
            opt(f.rms_dbu, " dBu", 1),
            opt(f.rms_dbv, " dBV", 1),
            opt(f.rms_dbfs, " dBFS", 1),
        );
        println!(
            "  headroom    {} to the positive swing, {} to the negative",
            opt(f.headroom_pos_db, " dB", 1),
            opt(f.headroom_neg_db, " dB", 1)
        );
        if f.thd_percent.is_some() {
            println!(
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
            println!("  harmonics   {} (dBc)", h.join("  "));
        }
        if f.imd_smpte_percent.is_some() {
            println!(
                "  IMD         SMPTE RP120 {} ({})",
                opt(f.imd_smpte_percent, " %", 4),
                opt(f.imd_smpte_db, " dB", 1)
            );
        }
        if f.imd_ccif_percent.is_some() {
            println!(
                "  IMD         twin tone d2 {} ({}), 2f1-f2 {}, 2f2-f1 {}",
                opt(f.imd_ccif_percent, " %", 4),
                opt(f.imd_ccif_db, " dB", 1),
                opt(f.imd_ccif_d3_low_dbc, " dBc", 1),
                opt(f.imd_ccif_d3_high_dbc, " dBc", 1)
            );
        }
        let n = &r.noise;
        if n.noise_rms_v.is_some() {
            println!(
                "  noise       {} ({}), A-weighted {} ({}); idle channel, 20 Hz - 20 kHz",
                opt(n.noise_rms_v.map(|v| v * 1e6), " uV rms", 2),
                opt(n.noise_dbu, " dBu", 1),
                opt(n.noise_a_rms_v.map(|v| v * 1e6), " uV rms", 2),
                opt(n.noise_a_dbu, " dBu", 1),
            );
            println!(
                "  SNR         {} re 10 Vpp ({} A-weighted){}",
                opt(n.snr_ref_db, " dB", 1),
                opt(n.snr_ref_a_db, " dB", 1),
                f.snr_db
                    .map_or(String::new(), |d| format!(", {d:.1} dB re this signal"))
            );
        }
        println!("  events");
        print_events(&r.events);
        for n in &f.notes {
            println!("  note        {n}");
        }
        if f.window.is_none() {
            continue;
        }
        println!(
            "  taken with  window {}, FFT {}, band {}, weighting {}",
            f.window.as_deref().unwrap_or("-"),
            f.fft_len.map_or("-".into(), |n| n.to_string()),
            f.bandwidth_hz
                .map_or("-".into(), |[a, b]| format!("{a} Hz - {b} Hz")),
            f.weighting.as_deref().unwrap_or("flat")
        );
    }
    let s = &m.settings;
    println!();
    println!(
        "settings: {} x{}, {} rendered, calibration {} = 0 dBFS, circuit noise {}",
        fmt_eng(s.rate_hz, "Hz"),
        s.oversample,
        fmt_eng(s.length_s, "s"),
        fmt_eng(s.full_scale_v, "V"),
        if s.noise { "on" } else { "off" }
    );
    for (stage, dbc) in &s.alias_dbc {
        println!("  alias figure at this oversampling, {stage}: {dbc:.1} dBc");
    }
}

/// Parse `SOURCE=FROM..TO`.
fn parse_sweep_spec(spec: &str) -> Result<(String, String, String), Failure> {
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

fn cmd_level_sweep(
    path: &Path,
    sets: &[String],
    spec: &str,
    steps: usize,
    settings: &Settings,
    json: bool,
    csv: bool,
) -> Result<(), Failure> {
    let (src, from, to) = parse_sweep_spec(spec)?;
    if steps < 2 {
        return Err(Failure::bad_input(format!(
            "--steps {steps}: expected 2 or more"
        )));
    }
    let base = load(path, sets)?;
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
    let mut rows = Vec::new();
    for k in 0..steps {
        let v = va * (vb / va).powf(k as f64 / (steps - 1) as f64);
        let mut s = sets.to_vec();
        s.push(format!("sources.{src}.amp={v} {unit}"));
        let patch = load(path, &s)?;
        let run = run_patch(&patch, false, false)?;
        let m = measure::measure(&patch, &run, None, settings, None, tone);
        rows.push((v, m));
    }
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
        let at1 = level_at_thd(&thd_pts, 0.01);
        let at01 = level_at_thd(&thd_pts, 0.001);
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
                }),
            );
        } else if csv {
            println!("output,level_{},thd_percent,thdn_db", unit.replace(' ', ""));
            for (v, t, n) in &pts {
                println!(
                    "{name},{v},{},{}",
                    t.map_or(String::new(), |x| x.to_string()),
                    n.map_or(String::new(), |x| x.to_string())
                );
            }
        } else {
            println!("output {name}: level sweep of source {src}");
            println!(
                "  {:>12}  {:>12}  {:>10}",
                format!("level {unit}"),
                "THD %",
                "THD+N dB"
            );
            for (v, t, n) in &pts {
                println!(
                    "  {:>12.4}  {:>12}  {:>10}",
                    v,
                    t.map_or("-".into(), |x| format!("{x:.5}")),
                    n.map_or("-".into(), |x| format!("{x:.1}"))
                );
            }
            let say = |x: Option<f64>, th: &str| match x {
                Some(l) => println!("  THD reaches {th} at {l:.4} {unit}"),
                None => println!("  THD does not cross {th} in this range"),
            };
            say(at01, "0.1 %");
            say(at1, "1 %");
            println!();
        }
    }
    if json {
        println!(
            "{}",
            serde_json::to_string_pretty(&serde_json::Value::Object(json_out)).unwrap_or_default()
        );
    }
    Ok(())
}

fn level_volts(l: Level) -> f64 {
    match l {
        Level::Peak(v) | Level::PeakToPeak(v) | Level::Rms(v) => v,
    }
}

fn level_unit(l: Level) -> &'static str {
    match l {
        Level::Peak(_) => "Vpk",
        Level::PeakToPeak(_) => "Vpp",
        Level::Rms(_) => "Vrms",
    }
}

fn cmd_noise(
    path: &Path,
    sets: &[String],
    output: Option<&str>,
    json: bool,
) -> Result<(), Failure> {
    let patch = load(path, sets)?;
    let budgets = railsong::noise::try_budget(&patch, railsong::noise::DEFAULT_BAND)
        .map_err(Failure::bad_input)?;
    let picked: Vec<_> = budgets
        .iter()
        .filter(|b| output.is_none_or(|n| n == b.output))
        .collect();
    if picked.is_empty() {
        return Err(Failure::bad_input(format!(
            "--output {}: no such output in {}",
            output.unwrap_or(""),
            path.display()
        )));
    }
    if json {
        println!(
            "{}",
            serde_json::to_string_pretty(&picked).map_err(failure_io)?
        );
        return Ok(());
    }
    println!(
        "{}: noise budget over 20 Hz - 20 kHz at {:.1} C (analytic, from the network's noise gains)",
        patch.title,
        patch.temperature - railsong::units::ZERO_CELSIUS
    );
    // The simulated counterpart: the idle render (sources muted) with circuit noise on.
    let mut idle = render::muted(&patch);
    idle.noise = true;
    idle.length = idle.length.max(2.0);
    let sim = stream_patch(&idle, false, false, &mut |_, _| Ok(()))?;
    for b in picked {
        println!();
        print!("{}", railsong::noise::format_budget(b));
        let k = patch.outputs.iter().position(|o| o.name == b.output);
        let simulated = k
            .and_then(|k| sim.run.outputs.get(k))
            .map(|o| measure::noise_figures(&o.samples, sim.run.rate));
        if let Some(n) = simulated.and_then(|n| n.noise_rms_v) {
            println!(
                "simulated: {:.4} uV rms over 20 Hz - 20 kHz from a {} idle render ({:+.2} dB against the budget)",
                n * 1e6,
                fmt_eng(idle.length, "s"),
                20.0 * (n / b.total_rms).log10()
            );
        }
    }
    Ok(())
}
