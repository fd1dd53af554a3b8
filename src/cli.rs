//! Command-line definitions and the pipeline behind each command.

use std::path::{Path, PathBuf};

use clap::{Parser, Subcommand};

use railsong::check::{self, WarningKind};
use railsong::model::Patch;
use railsong::parts::{builtin, builtin_names, OpAmp};
use railsong::units::fmt_eng;

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
    fn bad_input(message: impl std::fmt::Display) -> Failure {
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
    /// List the built-in op-amp profiles (and a patch's own parts) with their figures.
    Parts {
        /// Also list the [parts.*] defined in this patch.
        patch: Option<PathBuf>,
        /// Override a value by dotted path (repeatable).
        #[arg(long = "set", value_name = "PATH=VALUE")]
        sets: Vec<String>,
    },
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
    }
}

fn load(path: &Path, sets: &[String]) -> Result<Patch, Failure> {
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
