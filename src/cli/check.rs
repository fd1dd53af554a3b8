//! `railsong check`: validate a patch and print its static warnings.

use std::path::Path;

use railsong::check::{self, WarningKind};
use railsong::units::fmt_eng;

use super::common::load_side;
use super::Failure;

pub(crate) fn cmd_check(
    path: &Path,
    variant: Option<&str>,
    sets: &[String],
) -> Result<(), Failure> {
    let patch = load_side(path, variant.unwrap_or("base"), sets)?;
    // WAV inputs as render will read them: whatever render refuses, check refuses too.
    let k = patch.oversample.max(1);
    for s in &patch.sources {
        if matches!(s.wave, railsong::model::Wave::File { .. }) {
            railsong::signal::file_stream(s, patch.rate * k as f64, (patch.frames() + 1) * k)
                .map_err(|e| Failure::bad_input(format!("sources.{}.path: {e}", s.name)))?;
        }
    }
    let report = check::check(&patch);
    say!("{} ({})", patch.title, path.display());
    say!(
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
    say!();
    say!("  stage                 type            part               gain      NG     band (-3 dB)          worst-case span        swing");
    for s in &report.stages {
        let gain = match s.gains.as_slice() {
            [g] => format!("{g:+.3}"),
            gs => format!("{:+.3}x{}", gs[0], gs.len()),
        };
        say!(
            "  {:<21} {:<15} {:<18} {:<9} {:<6} {:<21} {:<22} {}",
            s.name,
            s.kind,
            s.part.as_deref().unwrap_or("-"),
            gain,
            s.noise_gain.map_or("-".into(), |g| format!("{g:.2}")),
            band(s.low_corner, s.bandwidth),
            format!("{} .. {}", fmt_eng(s.span.lo, "V"), fmt_eng(s.span.hi, "V")),
            s.swing.map_or("-".into(), |(lo, hi)| format!(
                "{} .. {}",
                fmt_eng(lo, "V"),
                fmt_eng(hi, "V")
            )),
        );
    }
    say!();
    if report.warnings.is_empty() {
        say!("  no warnings");
    } else {
        say!("  {} warning(s):", report.warnings.len());
        for w in &report.warnings {
            say!("  [{}] {}: {}", tag(w.kind), w.key, w.message);
        }
    }
    Ok(())
}

/// The stage's band: `LOW .. HIGH`, or the upper -3 dB point alone for a DC-coupled stage.
fn band(low: Option<f64>, high: Option<f64>) -> String {
    let hi = |h: f64| {
        if h.is_finite() {
            fmt_eng(h, "Hz")
        } else {
            "-".to_string()
        }
    };
    match (low, high) {
        (Some(l), Some(h)) => format!("{} .. {}", fmt_eng(l, "Hz"), hi(h)),
        (Some(l), None) => format!("from {}", fmt_eng(l, "Hz")),
        (None, Some(h)) => hi(h),
        (None, None) => "-".into(),
    }
}

pub(crate) fn tag(kind: WarningKind) -> &'static str {
    match kind {
        WarningKind::Clipping => "clip",
        WarningKind::CommonMode => "input range",
        WarningKind::Supply => "supply",
        WarningKind::Current => "current",
        WarningKind::NonStandard => "value",
        WarningKind::Bandwidth => "bandwidth",
        WarningKind::Slew => "slew",
        WarningKind::FileSize => "file size",
    }
}
