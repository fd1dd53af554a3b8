//! Tolerance (Monte Carlo) studies over a validated patch.
//!
//! Run `i` (1-based) perturbs every resistor and capacitor of the patch independently and
//! uniformly within `+/- tol` of its nominal value, drawing from a SplitMix64 generator
//! seeded with [`run_seed`]`(seed, i)`; the draws are taken in a fixed order (stages in patch
//! order, then outputs), so a run's numbers depend only on `(seed, i)`, never on the thread
//! that computed it.
//!
//! Resistors: summer inputs, feedback resistors (a feedback pot's track, its effective
//! resistance following from the taper), `r_fb` and `r_g`, attenuator tracks, and output
//! series resistors. Capacitors: input coupling and feedback capacitors. Loads are the next
//! module's input, not a part of the circuit, and are left alone.
//!
//! Channel gains of an inverting summer are computed in closed form from the perturbed
//! values (textbook inverting gain, with the driving node's Thevenin resistance in series
//! with the input resistor): `G_i = -Rf / (Ri + Rs_i)`.

use super::length::{study_frames, StudyLength};
use rayon::prelude::*;
use serde::Serialize;

use super::{db, rms, StudyError};
use crate::analysis::Settings;
use crate::measure;
use crate::model::{Node, Patch, StageKind, POT_END_R};
use crate::parts::taper;
use crate::render::{self, RenderOptions};

/// The SplitMix64 generator (Steele, Lea and Flood, OOPSLA 2014): tiny, fast, and the same
/// sequence on every platform.
#[derive(Debug, Clone)]
pub struct SplitMix64(u64);

impl SplitMix64 {
    /// A generator starting from `seed`.
    pub fn new(seed: u64) -> Self {
        SplitMix64(seed)
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        crate::rng::splitmix64(&mut self.0)
    }

    /// Uniform in `[-1, 1)`.
    pub fn symmetric(&mut self) -> f64 {
        let u = (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64;
        2.0 * u - 1.0
    }
}

/// The seed of run `run` of a study seeded with `seed`.
pub fn run_seed(seed: u64, run: usize) -> u64 {
    let mut g = SplitMix64::new(seed ^ (run as u64).wrapping_mul(0xD1B5_4A32_D192_ED03));
    g.next_u64()
}

/// Tolerances as fractions (0.01 = 1 %).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Tolerances {
    /// Every resistor.
    pub resistor: f64,
    /// Every capacitor.
    pub capacitor: f64,
}

impl Tolerances {
    /// Check both are in `[0, 0.5]`.
    pub fn check(&self) -> Result<(), StudyError> {
        for (flag, v) in [("--tol", self.resistor), ("--cap-tol", self.capacitor)] {
            if !(0.0..=0.5).contains(&v) {
                return Err(StudyError::arg(
                    flag,
                    format!("{} %", v * 100.0),
                    "a tolerance from 0 % to 50 %",
                ));
            }
        }
        Ok(())
    }
}

/// The patch of one run: every resistor and capacitor scaled by `1 + tol * u`, `u` uniform
/// in [-1, 1), drawn from a generator seeded with `seed` (use [`run_seed`]). A stage with its
/// own `tolerance` / `cap_tolerance` in the patch ([`crate::model::Tolerances`]) uses those
/// for its components; everything else uses `tol`.
pub fn perturb(patch: &Patch, tol: &Tolerances, seed: u64) -> Patch {
    let mut g = SplitMix64::new(seed);
    let mut p = patch.clone();
    for st in &mut p.stages {
        let own = patch
            .tolerances
            .stages
            .iter()
            .find(|(n, _, _)| *n == st.name);
        let tr = own.and_then(|o| o.1).unwrap_or(tol.resistor);
        let tc = own.and_then(|o| o.2).unwrap_or(tol.capacitor);
        let r = |x: f64, g: &mut SplitMix64| x * (1.0 + tr * g.symmetric());
        let c = |x: f64, g: &mut SplitMix64| x * (1.0 + tc * g.symmetric());
        match &mut st.kind {
            StageKind::InvertingSum {
                inputs, feedback, ..
            } => {
                for i in inputs.iter_mut() {
                    i.r = r(i.r, &mut g);
                    if let Some(cap) = i.c {
                        i.c = Some(c(cap, &mut g));
                    }
                }
                match &mut feedback.pot {
                    Some(pot) => {
                        pot.track = r(pot.track, &mut g);
                        feedback.r =
                            (pot.track * taper::fraction(pot.taper, pot.at)).max(POT_END_R);
                    }
                    None => feedback.r = r(feedback.r, &mut g),
                }
                if let Some(cap) = feedback.c {
                    feedback.c = Some(c(cap, &mut g));
                }
            }
            StageKind::NonInverting {
                r_fb, c_fb, r_g, ..
            } => {
                *r_fb = r(*r_fb, &mut g);
                *r_g = r(*r_g, &mut g);
                if let Some(cap) = *c_fb {
                    *c_fb = Some(c(cap, &mut g));
                }
            }
            StageKind::Attenuator { pot, .. } => *pot = r(*pot, &mut g),
            StageKind::Follower { .. } => {}
        }
    }
    for o in &mut p.outputs {
        if o.series > 0.0 {
            o.series *= 1.0 + tol.resistor * g.symmetric();
        }
    }
    p
}

/// The closed-form small-signal gain of one input path of an inverting summer.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ChannelGain {
    /// Stage name.
    pub stage: String,
    /// Input index (0-based).
    pub input: usize,
    /// Node driving the input.
    pub from: String,
    /// `-Rf / (Ri + Rs)`, Rs the Thevenin resistance of the driving node (0 for a source or
    /// an op-amp output; `R_top || R_bottom` at an attenuator's wiper).
    pub gain: f64,
}

/// Thevenin resistance of a node: 0 for sources and op-amp outputs; a pot's wiper sees its
/// two track sections in parallel.
fn thevenin(patch: &Patch, node: Node) -> f64 {
    match node {
        Node::Source(_) => 0.0,
        Node::Stage(i) => match &patch.stages[i].kind {
            StageKind::Attenuator {
                pot, taper: t, at, ..
            } => {
                let y = taper::fraction(*t, *at);
                pot * y * (1.0 - y)
            }
            _ => 0.0,
        },
    }
}

/// Every input path of every inverting summer with two or more inputs (the mixer channels),
/// in patch order.
pub fn channel_gains(patch: &Patch) -> Vec<ChannelGain> {
    let mut out = Vec::new();
    for st in &patch.stages {
        if let StageKind::InvertingSum {
            inputs, feedback, ..
        } = &st.kind
        {
            if inputs.len() < 2 {
                continue;
            }
            for (k, i) in inputs.iter().enumerate() {
                out.push(ChannelGain {
                    stage: st.name.clone(),
                    input: k,
                    from: patch.node_name(i.from).to_string(),
                    gain: -feedback.r / (i.r + thevenin(patch, i.from)),
                });
            }
        }
    }
    out
}

/// Spread of a set of numbers.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Spread {
    /// Smallest.
    pub min: f64,
    /// 5th percentile.
    pub p5: f64,
    /// Median.
    pub median: f64,
    /// 95th percentile.
    pub p95: f64,
    /// Largest.
    pub max: f64,
}

/// Percentile `q` (0..=1) of sorted data, linear interpolation between closest ranks
/// (Hyndman and Fan type 7, the default of most statistics packages).
pub fn percentile(sorted: &[f64], q: f64) -> Option<f64> {
    if sorted.is_empty() {
        return None;
    }
    let h = (sorted.len() - 1) as f64 * q.clamp(0.0, 1.0);
    let lo = h.floor() as usize;
    let hi = h.ceil() as usize;
    Some(sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo]))
}

/// The spread of the finite values in `values` (`None` when there are none).
pub fn spread(values: &[f64]) -> Option<Spread> {
    let mut v: Vec<f64> = values.iter().copied().filter(|x| x.is_finite()).collect();
    v.sort_by(f64::total_cmp);
    Some(Spread {
        min: *v.first()?,
        p5: percentile(&v, 0.05)?,
        median: percentile(&v, 0.5)?,
        p95: percentile(&v, 0.95)?,
        max: *v.last()?,
    })
}

/// One output of one run.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RunOutput {
    /// Output RMS over the nominal run's, dB.
    pub gain_db: f64,
    /// THD at the patch's own level, %.
    pub thd_percent: Option<f64>,
    /// DC offset, V.
    pub dc_v: Option<f64>,
}

/// One run.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RunResult {
    /// Run number (1-based).
    pub run: usize,
    /// Its seed ([`run_seed`]).
    pub seed: u64,
    /// Per output, in patch order.
    pub outputs: Vec<RunOutput>,
    /// Closed-form channel gains, in the order of [`channel_gains`].
    pub channels: Vec<f64>,
}

/// Spread of one output's figures over the runs.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutputSpread {
    /// Output name.
    pub output: String,
    /// Gain relative to the nominal run, dB.
    pub gain_db: Option<Spread>,
    /// THD, %.
    pub thd_percent: Option<Spread>,
    /// DC offset, V.
    pub dc_v: Option<Spread>,
}

/// Spread of one mixer channel's closed-form gain.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ChannelSpread {
    /// The nominal channel.
    pub nominal: ChannelGain,
    /// Deviation from the nominal gain, % (`100 (G / G_nominal - 1)`).
    pub deviation_percent: Option<Spread>,
}

/// Spread of the mismatch between the channels of one summer.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StageMismatch {
    /// Stage name.
    pub stage: String,
    /// `20 log10(max |G_i| / min |G_i|)` over the channels of the stage, dB.
    pub mismatch_db: Option<Spread>,
}

/// A whole tolerance study.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ToleranceReport {
    /// Study seed.
    pub seed: u64,
    /// Tolerances used.
    pub tolerances: Tolerances,
    /// Per run, in run order.
    pub runs: Vec<RunResult>,
    /// Per output.
    pub outputs: Vec<OutputSpread>,
    /// Per mixer channel.
    pub channels: Vec<ChannelSpread>,
    /// Per summer with two or more inputs.
    pub mismatch: Vec<StageMismatch>,
    /// The run whose largest |gain_db| over the outputs is largest.
    pub worst_run: Option<usize>,
}

/// Run `runs` perturbed copies of `patch` (in parallel on the current rayon pool, each on
/// its own: nothing shared but `tick`) and the nominal patch (once); each renders the settle
/// time plus one capture for a stationary patch unless `length` is [`StudyLength::Full`]
/// (the nominal run and every perturbed run at the same length, so gains compare like with
/// like). `tick` is called once per finished run.
pub fn study(
    patch: &Patch,
    tol: &Tolerances,
    runs: usize,
    seed: u64,
    settings: &Settings,
    length: StudyLength,
    tick: &(dyn Fn() + Sync),
) -> Result<ToleranceReport, StudyError> {
    tol.check()?;
    if runs == 0 {
        return Err(StudyError::arg("--runs", "0", "1 or more"));
    }
    let render_rms = |p: &Patch| -> Result<(Vec<f64>, measure::Measurement), StudyError> {
        let opts = RenderOptions {
            frames: study_frames(patch, length),
            ..RenderOptions::default()
        };
        let run = render::render(p, &opts, &mut |_| {})?;
        let m = measure::measure(p, &run, None, settings, None, None);
        Ok((run.outputs.iter().map(|o| rms(&o.samples)).collect(), m))
    };
    let (nominal_rms, _) = render_rms(patch)?;
    let names: Vec<String> = patch.outputs.iter().map(|o| o.name.clone()).collect();
    for (n, r) in names.iter().zip(&nominal_rms) {
        if *r == 0.0 {
            return Err(StudyError::Silent {
                output: n.clone(),
                which: "the nominal run".into(),
                what: "no level to refer the gain spread to".into(),
            });
        }
    }
    let results: Vec<RunResult> = (1..=runs)
        .into_par_iter()
        .map(|i| {
            let s = run_seed(seed, i);
            let p = perturb(patch, tol, s);
            let (r, m) = render_rms(&p)?;
            let outputs = names
                .iter()
                .zip(r.iter().zip(&nominal_rms))
                .map(|(n, (x, x0))| {
                    let f = m.outputs.get(n).map(|o| &o.figures);
                    RunOutput {
                        gain_db: db(x / x0),
                        thd_percent: f.and_then(|f| f.thd_percent),
                        dc_v: f.and_then(|f| f.dc_v),
                    }
                })
                .collect();
            tick();
            Ok(RunResult {
                run: i,
                seed: s,
                outputs,
                channels: channel_gains(&p).into_iter().map(|c| c.gain).collect(),
            })
        })
        .collect::<Result<_, StudyError>>()?;

    let outputs = names
        .iter()
        .enumerate()
        .map(|(k, n)| {
            let col = |f: &dyn Fn(&RunOutput) -> Option<f64>| -> Option<Spread> {
                let v: Vec<f64> = results.iter().filter_map(|r| f(&r.outputs[k])).collect();
                spread(&v)
            };
            OutputSpread {
                output: n.clone(),
                gain_db: col(&|o| Some(o.gain_db)),
                thd_percent: col(&|o| o.thd_percent),
                dc_v: col(&|o| o.dc_v),
            }
        })
        .collect();
    let nominal_channels = channel_gains(patch);
    let channels = nominal_channels
        .iter()
        .enumerate()
        .map(|(k, c)| {
            let v: Vec<f64> = results
                .iter()
                .map(|r| 100.0 * (r.channels[k] / c.gain - 1.0))
                .collect();
            ChannelSpread {
                nominal: c.clone(),
                deviation_percent: spread(&v),
            }
        })
        .collect();
    let mut stages: Vec<String> = Vec::new();
    for c in &nominal_channels {
        if !stages.contains(&c.stage) {
            stages.push(c.stage.clone());
        }
    }
    let mismatch = stages
        .into_iter()
        .map(|s| {
            let idx: Vec<usize> = nominal_channels
                .iter()
                .enumerate()
                .filter(|(_, c)| c.stage == s)
                .map(|(k, _)| k)
                .collect();
            let v: Vec<f64> = results
                .iter()
                .map(|r| {
                    let g = idx.iter().map(|&k| r.channels[k].abs());
                    let hi = g.clone().fold(0.0, f64::max);
                    let lo = g.fold(f64::INFINITY, f64::min);
                    db(hi / lo)
                })
                .collect();
            StageMismatch {
                stage: s,
                mismatch_db: spread(&v),
            }
        })
        .collect();
    let worst_run = results
        .iter()
        .map(|r| {
            let w = r
                .outputs
                .iter()
                .map(|o| o.gain_db.abs())
                .fold(0.0, f64::max);
            (r.run, w)
        })
        .max_by(|a, b| a.1.total_cmp(&b.1).then(b.0.cmp(&a.0)))
        .map(|(r, _)| r);
    Ok(ToleranceReport {
        seed,
        tolerances: *tol,
        runs: results,
        outputs,
        channels,
        mismatch,
        worst_run,
    })
}
