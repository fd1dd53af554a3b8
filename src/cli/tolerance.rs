//! `railsong tolerance`: Monte Carlo over component tolerances.

use std::path::Path;

use railsong::analysis::Settings;
use railsong::model::Patch;
use railsong::parts::eseries::Series;
use railsong::study::length::StudyLength;
use railsong::study::tolerance::{self, Spread, Tolerances};
use railsong::units;

use super::common::{default_dir, failure_io, signal_error, stem_of, study_error};
use super::progress::Progress;
use super::render::render_to;
use super::{load, Failure, RenderFlags};

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
    /// Settle time plus one capture per run, or the whole length (`--full`).
    pub length: StudyLength,
}

pub(crate) fn series_tolerance(s: Series) -> f64 {
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
pub(crate) fn tolerances(args: &ToleranceArgs, patch: &Patch) -> Result<Tolerances, Failure> {
    // The flags take percent: "5%" and a bare "5" both mean 5 % (a bare number is never a
    // fraction here: `--tol 5` must not become 500 %).
    let pct = |flag: &str, s: &str| -> Result<f64, Failure> {
        let v =
            units::parse_percent(s).map_err(|e| Failure::bad_input(format!("{flag} {s}: {e}")))?;
        let v = if s.trim_end().ends_with('%') {
            v
        } else {
            v / 100.0
        };
        if !(v.is_finite() && (0.0..1.0).contains(&v)) {
            return Err(Failure::bad_input(format!(
                "{flag} {s}: expected a tolerance from 0 % to below 100 %, e.g. 1% or 5"
            )));
        }
        Ok(v)
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

pub(crate) fn fmt_spread(s: &Option<Spread>, scale: f64, digits: usize) -> String {
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
    // Every run renders the whole patch: the length limit holds here as in render.
    super::common::check_length(&patch, args.flags.long)?;
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
        say!(
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
            fade: args.flags.fade.clone(),
        };
        return render_to(&p, &stem_of(args.patch), &flags, Some(&format!("run{i}"))).map(|_| ());
    }
    if args.runs == 0 {
        return Err(Failure::bad_input("--runs 0: expected 1 or more"));
    }
    let pb = Progress::new(args.runs as u64, "tolerance", "runs", true);
    let tick = || pb.inc(1);
    let rep = tolerance::study(
        &patch,
        &tol,
        args.runs,
        seed,
        &Settings::default(),
        args.length,
        &tick,
    )
    .map_err(study_error)?;
    pb.finish();
    if args.flags.plots {
        let dir = args
            .flags
            .out
            .clone()
            .unwrap_or_else(|| default_dir(&stem_of(args.patch)));
        let mut folder = super::common::open_folder(&dir, args.flags.force)?;
        let names: Vec<String> = patch
            .outputs
            .iter()
            .map(|o| format!("{}-tolerance-gain.svg", o.name))
            .collect();
        folder.check_all(&names).map_err(signal_error)?;
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
        say!(
            "{}",
            serde_json::to_string_pretty(&rep).map_err(failure_io)?
        );
        return Ok(());
    }
    say!(
        "{}: {} runs, resistors uniform within +/-{} %, capacitors within +/-{} %, seed {seed}",
        patch.title,
        args.runs,
        tol.resistor * 100.0,
        tol.capacitor * 100.0
    );
    say!("  spreads are min / 5th pct / median / 95th pct / max");
    for o in &rep.outputs {
        say!();
        say!("output {}", o.output);
        say!(
            "  gain over nominal (output RMS)  {} dB",
            fmt_spread(&o.gain_db, 1.0, 3)
        );
        if o.thd_percent.is_some() {
            say!(
                "  THD at the patch level         {} %",
                fmt_spread(&o.thd_percent, 1.0, 4)
            );
        }
        say!(
            "  DC offset                      {} mV",
            fmt_spread(&o.dc_v, 1e3, 3)
        );
    }
    if !rep.channels.is_empty() {
        say!();
        say!("mixer channels: small-signal gain -Rf / (Ri + Rs) of each input path, from the perturbed values (closed form)");
        for c in &rep.channels {
            say!(
                "  {}[{}] from {} (nominal {:+.4}): {} %",
                c.nominal.stage,
                c.nominal.input,
                c.nominal.from,
                c.nominal.gain,
                fmt_spread(&c.deviation_percent, 1.0, 3)
            );
        }
        for m in &rep.mismatch {
            say!(
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
        say!();
        say!(
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
        say!("{cmd}");
    }
    Ok(())
}
