//! Command-line definitions and dispatch; each command's pipeline lives in its own file.

use std::path::{Path, PathBuf};

use clap::{Parser, Subcommand};

#[macro_use]
pub(crate) mod out;

mod check;
mod common;
mod compare;
mod demo;
mod measure;
mod noise;
mod parts;
mod progress;
mod render;
mod report;
mod sweep;
mod tolerance;

use common::{analysis_settings, default_dir, stem_of};
use railsong::model::Patch;

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
    /// No progress output on stderr (by default a bar on a terminal; on a pipe or log, a
    /// line every few seconds once a run has taken 2 s).
    #[arg(long, global = true)]
    quiet: bool,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Validate a patch and print static warnings (nothing is rendered).
    Check {
        /// The patch file.
        patch: PathBuf,
        /// Use this [variants.NAME] of the patch instead of the base.
        #[arg(long, value_name = "NAME")]
        variant: Option<String>,
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
        /// Use this [variants.NAME] of the patch instead of the base.
        #[arg(long, value_name = "NAME")]
        variant: Option<String>,
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
        /// Use this [variants.NAME] of the patch instead of the base.
        #[arg(long, value_name = "NAME", conflicts_with_all = ["a", "b"])]
        variant: Option<String>,
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
        /// Render every point at the patch's whole length (default for a stationary patch:
        /// the settle time plus one capture, same figures, faster).
        #[arg(long)]
        full: bool,
    },
    /// Monte Carlo over every resistor and capacitor within its tolerance.
    #[command(
        after_help = "With --plots, tolerance writes one SVG per output into --out (default \
renders/<patch name>/): <output>-tolerance-gain.svg, a histogram of the output's gain change \
(dB) over the runs. With --render-run N, --plots is ignored and run N is rendered like \
`render` (WAV files and figures)."
    )]
    Tolerance {
        /// The patch file.
        patch: PathBuf,
        /// Number of runs.
        #[arg(long, default_value_t = 200)]
        runs: usize,
        /// Resistor tolerance in percent, e.g. 1% or 5 (a bare number is percent; default:
        /// that of --series, else 1 %).
        #[arg(long, value_name = "PERCENT")]
        tol: Option<String>,
        /// Capacitor tolerance in percent (default: the resistor tolerance).
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
        /// Render every run at the patch's whole length (default for a stationary patch: the
        /// settle time plus one capture, same figures, faster).
        #[arg(long)]
        full: bool,
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
    /// Scale each file so its RMS sits at this level in dBFS, as the figures give it (a
    /// full-scale sine is 0 dBFS; peaks kept below -1 dBFS) instead of the patch calibration;
    /// for listening, e.g. --listen -18.
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
    /// Fade each written file in and out over this time so it does not click at its start
    /// and end (0 switches it off); the figures come from the unfaded signal.
    #[arg(long, value_name = "TIME", default_value = "5ms")]
    pub(crate) fade: String,
}

impl RenderFlags {
    /// The edge fade of a file of `frames` frames at `rate` Hz.
    pub(crate) fn edge_fade(
        &self,
        frames: usize,
        rate: f64,
    ) -> Result<railsong::signal::EdgeFade, Failure> {
        let t = railsong::units::parse_time(&self.fade).map_err(|e| {
            Failure::bad_input(format!(
                "--fade {}: {e}; expected a time of 0 or more, e.g. 5ms",
                self.fade
            ))
        })?;
        if !(t.is_finite() && t >= 0.0) {
            return Err(Failure::bad_input(format!(
                "--fade {}: expected a time of 0 or more, e.g. 5ms",
                self.fade
            )));
        }
        Ok(railsong::signal::EdgeFade::new(frames, rate, t))
    }
}

/// One line from a clap error that keeps its detail: the message, the arguments it names
/// (a missing argument), and "did you mean" for a misspelt command or flag.
fn clap_message(e: &clap::Error) -> String {
    use clap::error::{ContextKind, ContextValue};
    let text = e.to_string();
    let mut parts: Vec<String> = Vec::new();
    for line in text.lines() {
        let l = line.trim();
        if l.starts_with("Usage:") {
            break;
        }
        if l.is_empty() || l.starts_with("tip:") || l.starts_with("For more information") {
            continue;
        }
        parts.push(
            l.trim_start_matches("error: ")
                .trim_end_matches(':')
                .to_string(),
        );
    }
    let mut msg = match parts.split_first() {
        Some((head, rest)) if !rest.is_empty() => format!("{head}: {}", rest.join(", ")),
        Some((head, _)) => head.clone(),
        None => "bad command line".to_string(),
    };
    let suggestions: Vec<String> = [ContextKind::SuggestedSubcommand, ContextKind::SuggestedArg]
        .into_iter()
        .filter_map(|k| e.get(k))
        .flat_map(|v| match v {
            ContextValue::String(s) => vec![s.clone()],
            ContextValue::Strings(v) => v.clone(),
            _ => Vec::new(),
        })
        .collect();
    if !suggestions.is_empty() {
        let list: Vec<String> = suggestions.iter().map(|s| format!("'{s}'")).collect();
        msg.push_str(&format!(" (did you mean {}?)", list.join(" or ")));
    }
    msg
}

/// Parse the command line and run the command.
pub fn run() -> Result<(), Failure> {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            use clap::error::ErrorKind;
            if matches!(e.kind(), ErrorKind::DisplayHelp | ErrorKind::DisplayVersion) {
                say_raw!("{e}");
                return Ok(());
            }
            return Err(Failure::bad_input(format!(
                "{} (see railsong --help)",
                clap_message(&e)
            )));
        }
    };
    progress::set_quiet(cli.quiet);
    match cli.command {
        Command::Check {
            patch,
            variant,
            sets,
        } => check::cmd_check(&patch, variant.as_deref(), &sets),
        Command::Parts { patch, sets } => parts::cmd_parts(patch.as_deref(), &sets),
        Command::Render {
            patch,
            out,
            variants,
            sets,
        } => {
            let p = load(&patch, &sets)?;
            render::check_variants(&patch, &variants)?;
            // Held to the end: the folder stays locked for the base and every variant.
            let _folder = render::preflight(&patch, &p, &sets, &variants, &out)?;
            render::render_to(&p, &stem_of(&patch), &out, None)?;
            render::render_variants(&patch, &sets, &variants, &out)
        }
        Command::Demo { out } => demo::cmd_demo(&out),
        Command::Report {
            patch,
            variant,
            a,
            b,
            segment,
            out,
            sets,
        } => {
            let ab = a.zip(b);
            report::cmd_report(
                &patch,
                variant.as_deref(),
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
        } => noise::cmd_noise(&patch, &sets, output.as_deref(), json),
        Command::Measure {
            patch,
            variant,
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
                Some(spec) => measure::cmd_level_sweep(
                    &patch,
                    variant.as_deref(),
                    &sets,
                    &spec,
                    steps,
                    &settings,
                    (json, csv),
                    plots.map(|d| (d, force)),
                ),
                None => measure::cmd_measure(
                    &patch,
                    variant.as_deref(),
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
        } => compare::cmd_compare(&compare::CompareArgs {
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
            full,
        } => sweep::cmd_sweep(&sweep::SweepArgs {
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
            length: study_length(full),
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
            full,
            out,
            sets,
        } => tolerance::cmd_tolerance(&tolerance::ToleranceArgs {
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
            length: study_length(full),
        }),
    }
}

fn study_length(full: bool) -> railsong::study::length::StudyLength {
    if full {
        railsong::study::length::StudyLength::Full
    } else {
        railsong::study::length::StudyLength::Short
    }
}

pub(crate) fn load(path: &Path, sets: &[String]) -> Result<Patch, Failure> {
    railsong::patch::load(path, sets).map_err(Failure::bad_input)
}
