//! The alias estimate of a render: how much of each output is alias, measured on the patch's
//! own stages, at its own oversampling and its own (worst) drive.
//!
//! For an output whose test signal is one periodic source ([`measure::test_signal`]) the
//! patch is run again: circuit noise off, every source on from t = 0 with no envelope and no
//! stop (the full level throughout: the patch's worst drive), the periodic source's
//! frequency moved to the nearest odd bin `M` of a power-of-two capture of `N` base-rate
//! samples (at least [`MIN_N`], more for low tones so that `M >= MIN_BIN`), and an open
//! probe output (no load: the circuit is unchanged) on every op-amp stage that feeds the
//! output. After the settle time ([`measure::settle_time`]) one capture of `N` samples is
//! coherent: the output repeats with the tone's period, so its own content lies on the
//! multiples of `M`; a product folded back from the internal rate `K * rate` (`K N` bins, a
//! power of two) lands on `K N - j M`, which `M` (odd, > 1) never divides. Every other
//! in-band bin (20 Hz - 20 kHz, and below the decimator's pass edge) is therefore alias:
//! folded by a nonlinear event sampled on the internal grid, or passed by the decimator.
//! The figure is its power relative to the fundamental, for the output and for each stage's
//! own output, so the stage the alias comes from can be named.
//!
//! Outputs with another test signal (a two-tone pair, a mix, noise, a file, a sweep) are not
//! estimated (their products cover every bin); the note says so.

use crate::engine::halfband::PASS_EDGE;
use crate::measure::{self, Measurement};
use crate::model::{Node, Output, Patch, Wave};
use crate::render::{self, RenderError, RenderOptions};
use rustfft::{num_complex::Complex, FftPlanner};
use serde::Serialize;

/// Smallest capture, base-rate samples.
pub const MIN_N: usize = 1 << 14;
/// Largest capture, base-rate samples (a tone too low for it is not estimated).
pub const MAX_N: usize = 1 << 18;
/// Smallest bin of the moved tone (so the move is at most 1 / `MIN_BIN` of its frequency).
pub const MIN_BIN: usize = 31;
/// Alias above this, dBc, draws a warning.
pub const WARN_DBC: f64 = -60.0;
/// A stage whose alias is within this many dB of the worst one, upstream of it, is named
/// instead (the alias it makes passes on to the stages after it).
pub const NAME_WITHIN_DB: f64 = 1.0;
/// Band of the estimate, Hz.
pub const BAND_HZ: (f64, f64) = (20.0, 20_000.0);
/// Lowest figure given, dBc: below it a capture is clean to the arithmetic (f64 and the FFT
/// of a capture of this length leave about -280 dBc).
pub const FLOOR_DBC: f64 = -200.0;
/// Fundamentals below this (V peak) give no figure.
const MIN_FUNDAMENTAL_V: f64 = 1e-9;

/// What the estimate is (JSON `settings.alias`, and the README).
pub const METHOD: &str = "measured on this patch: its stages re-run at its own oversampling \
    with noise off, every source at full level from t = 0, the test tone moved to the nearest \
    odd bin of a power-of-two coherent capture taken after the settle time; in-band \
    (20 Hz - 20 kHz) power off the tone's harmonics, relative to the fundamental, for the \
    output and for each op-amp stage feeding it; only for outputs carrying one periodic test \
    signal";

/// Alias of one stage's own output.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StageAlias {
    /// Stage name.
    pub stage: String,
    /// In-band alias re the stage's fundamental, dBc (`None`: no fundamental there).
    pub dbc: Option<f64>,
}

/// The alias estimate of one output.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutputAlias {
    /// In-band alias re the fundamental, dBc; `None` when not estimated (see `note`).
    pub dbc: Option<f64>,
    /// The tone the stages were run with, Hz (the test tone moved to a coherent bin).
    pub tone_hz: Option<f64>,
    /// Every op-amp stage feeding the output, in patch order, with its own figure.
    pub stages: Vec<StageAlias>,
    /// The stage the alias comes from: the worst one, or the first one upstream of it within
    /// [`NAME_WITHIN_DB`].
    pub stage: Option<String>,
    /// Whether `dbc` is above [`WARN_DBC`].
    pub above_limit: bool,
    /// Why there is no figure, when there is none.
    pub note: Option<String>,
}

impl OutputAlias {
    fn none(note: &str) -> OutputAlias {
        OutputAlias {
            dbc: None,
            tone_hz: None,
            stages: Vec::new(),
            stage: None,
            above_limit: false,
            note: Some(note.to_string()),
        }
    }
}

/// The capture length `N` (a power of two) and the odd bin `M` of the tone nearest `f0`, or
/// `None` when no capture up to [`MAX_N`] holds it on a bin of at least 3 below `N / 2`.
pub fn coherent_bin(f0: f64, rate: f64) -> Option<(usize, usize)> {
    if !(f0 > 0.0 && rate > 0.0) {
        return None;
    }
    let mut n = MIN_N;
    while f0 * n as f64 / rate < MIN_BIN as f64 && n < MAX_N {
        n *= 2;
    }
    let exact = f0 * n as f64 / rate;
    let r = exact.round();
    let m = if r as usize % 2 == 1 {
        r
    } else if exact >= r {
        r + 1.0
    } else {
        r - 1.0
    };
    (m >= 3.0 && m < (n / 2) as f64).then_some((n, m as usize))
}

/// In-band alias of a coherent capture `x` (length `N`) of a tone on bin `m`: the power of
/// every bin in [`BAND_HZ`] (and below the decimator's pass edge) that is not a multiple of
/// `m`, relative to bin `m`, dB, at least [`FLOOR_DBC`]. `None` when the fundamental is below a nanovolt.
pub fn coherent_alias_dbc(x: &[f64], m: usize, rate: f64) -> Option<f64> {
    let n = x.len();
    if n < 4 || m == 0 || m >= n / 2 {
        return None;
    }
    let mut buf: Vec<Complex<f64>> = x.iter().map(|&v| Complex::new(v, 0.0)).collect();
    FftPlanner::new().plan_fft_forward(n).process(&mut buf);
    let pow = |k: usize| buf[k].norm_sqr();
    // a sine of peak A puts (A N / 2)^2 into its bin
    let fund = pow(m);
    if fund.sqrt() * 2.0 / (n as f64) < MIN_FUNDAMENTAL_V {
        return None;
    }
    let df = rate / n as f64;
    let lo = ((BAND_HZ.0 / df).ceil() as usize).max(1);
    let hi = ((BAND_HZ.1 / df).floor() as usize)
        .min((PASS_EDGE * n as f64).floor() as usize)
        .min(n / 2);
    let alias: f64 = (lo..=hi).filter(|k| k % m != 0).map(pow).sum();
    // a clean capture reads the floor of the arithmetic; held at FLOOR_DBC rather than -inf
    Some((10.0 * (alias / fund).log10()).max(FLOOR_DBC))
}

/// The source carrying an output's single periodic test signal, with its frequency.
fn tone_source(patch: &Patch, node: Node) -> Option<(usize, f64)> {
    let crate::analysis::TestSignal::Tone(f0) = measure::test_signal(patch, node) else {
        return None;
    };
    measure::upstream_sources(patch, node)
        .into_iter()
        .find(|&s| wave_freq(&patch.sources[s].wave).is_some_and(|f| f == f0))
        .map(|s| (s, f0))
}

/// The frequency of a periodic wave (a one-tone multitone included).
fn wave_freq(w: &Wave) -> Option<f64> {
    match w {
        Wave::Sine { freq, .. }
        | Wave::Square { freq, .. }
        | Wave::Triangle { freq, .. }
        | Wave::Saw { freq, .. }
        | Wave::Pulse { freq, .. } => Some(*freq),
        Wave::Multitone { tones } if tones.len() == 1 => Some(tones[0].freq),
        _ => None,
    }
}

fn set_freq(w: &mut Wave, f: f64) {
    match w {
        Wave::Sine { freq, .. }
        | Wave::Square { freq, .. }
        | Wave::Triangle { freq, .. }
        | Wave::Saw { freq, .. }
        | Wave::Pulse { freq, .. } => *freq = f,
        Wave::Multitone { tones } => tones.iter_mut().for_each(|t| t.freq = f),
        _ => {}
    }
}

const PROBE: &str = "alias-probe:";

/// The alias estimate of every output of `patch` (`output`: one by name), in patch order.
/// Pure: renders the patch again (see the module documentation) and writes nothing.
pub fn estimate(
    patch: &Patch,
    output: Option<&str>,
) -> Result<Vec<(String, OutputAlias)>, RenderError> {
    let chosen: Vec<usize> = (0..patch.outputs.len())
        .filter(|&i| output.is_none_or(|n| n == patch.outputs[i].name))
        .collect();
    let mut result: Vec<(String, OutputAlias)> = Vec::new();
    // outputs grouped by the source of their tone: one run per source
    let mut groups: Vec<(usize, f64, Vec<usize>)> = Vec::new();
    for &i in &chosen {
        let o = &patch.outputs[i];
        match tone_source(patch, o.from) {
            Some((s, f0)) => match groups.iter_mut().find(|g| g.0 == s) {
                Some(g) => g.2.push(i),
                None => groups.push((s, f0, vec![i])),
            },
            None => result.push((
                o.name.clone(),
                OutputAlias::none(
                    "not estimated: the output carries no single periodic test signal",
                ),
            )),
        }
    }
    for (src, f0, outs) in groups {
        let Some((n, m)) = coherent_bin(f0, patch.rate) else {
            for i in outs {
                result.push((
                    patch.outputs[i].name.clone(),
                    OutputAlias::none(
                        "not estimated: the test tone has no coherent bin (too low or too high)",
                    ),
                ));
            }
            continue;
        };
        let tone = m as f64 * patch.rate / n as f64;
        let mut p = patch.clone();
        p.noise = false;
        for (k, s) in p.sources.iter_mut().enumerate() {
            s.start = 0.0;
            s.stop = None;
            s.envelope = None;
            if k == src {
                set_freq(&mut s.wave, tone);
            } else if !matches!(s.wave, Wave::Dc { .. }) {
                // not upstream of these outputs, or silent (the test signal is one source)
                s.wave = Wave::Dc { level: 0.0 };
            }
        }
        let mut stages: Vec<usize> = Vec::new();
        for &i in &outs {
            for s in measure::upstream(patch, patch.outputs[i].from) {
                if patch.stages[s].part.is_some() && !stages.contains(&s) {
                    stages.push(s);
                }
            }
        }
        stages.sort();
        for &s in &stages {
            p.outputs.push(Output {
                name: format!("{PROBE}{}", patch.stages[s].name),
                from: Node::Stage(s),
                series: 0.0,
                load: None,
                file: None,
            });
        }
        let settle = (measure::settle_time(&p) * p.rate).round() as usize;
        let frames = settle + n;
        p.length = frames as f64 / p.rate;
        let run = render::render(
            &p,
            &RenderOptions {
                frames: Some(frames),
                alias_probe: false,
            },
            &mut |_| {},
        )?;
        let figure = |name: &str| {
            run.outputs
                .iter()
                .find(|o| o.name == name)
                .and_then(|o| o.samples.get(settle..settle + n))
                .and_then(|x| coherent_alias_dbc(x, m, p.rate))
        };
        let per_stage: Vec<StageAlias> = stages
            .iter()
            .map(|&s| StageAlias {
                stage: patch.stages[s].name.clone(),
                dbc: figure(&format!("{PROBE}{}", patch.stages[s].name)),
            })
            .collect();
        for i in outs {
            let o = &patch.outputs[i];
            let up = measure::upstream(patch, o.from);
            let mine: Vec<StageAlias> = per_stage
                .iter()
                .filter(|a| up.iter().any(|&s| patch.stages[s].name == a.stage))
                .cloned()
                .collect();
            let dbc = figure(&o.name);
            result.push((
                o.name.clone(),
                OutputAlias {
                    dbc,
                    tone_hz: Some(tone),
                    stage: culprit(&mine),
                    above_limit: dbc.is_some_and(|d| d > WARN_DBC),
                    note: dbc
                        .is_none()
                        .then(|| "not estimated: no fundamental at the output".to_string()),
                    stages: mine,
                },
            ));
        }
    }
    let order = |name: &str| patch.outputs.iter().position(|o| o.name == name);
    result.sort_by_key(|(name, _)| order(name));
    Ok(result)
}

/// The stage the alias comes from: the worst stage, or the first one (in patch order, so
/// upstream) within [`NAME_WITHIN_DB`] of it.
pub fn culprit(stages: &[StageAlias]) -> Option<String> {
    let worst = stages
        .iter()
        .filter_map(|s| s.dbc)
        .fold(f64::NEG_INFINITY, f64::max);
    stages
        .iter()
        .find(|s| s.dbc.is_some_and(|d| d >= worst - NAME_WITHIN_DB))
        .map(|s| s.stage.clone())
}

/// Estimate the alias of every output in `m` ([`estimate`]) and store it in each output's
/// `alias`.
pub fn apply(patch: &Patch, m: &mut Measurement) -> Result<(), RenderError> {
    let only = (m.outputs.len() == 1)
        .then(|| m.outputs.keys().next().cloned())
        .flatten();
    for (name, a) in estimate(patch, only.as_deref())? {
        if let Some(r) = m.outputs.get_mut(&name) {
            r.alias = Some(a);
        }
    }
    Ok(())
}
