//! Figures of a rendered patch: which test signal each output carries, the swing limits its
//! headroom is measured against, the events of the stages that feed it, and the JSON/CSV
//! forms that scripts read. Pure functions over a [`Patch`] and an engine [`Run`].

use std::collections::BTreeMap;

use serde::Serialize;

use crate::analysis::{
    self, Levels, MeasureContext, OutputFigures, Settings, SwingLimits, TestSignal,
};
use crate::engine::{Run, StageEvents};

use crate::model::{Node, Patch, StageKind, Wave};

/// Events and the op-amp's own extremes of one stage (the JSON `events` entry).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct EventSeconds {
    /// At or past the output swing limit, s.
    pub clip_s: f64,
    /// Slewing (the output free to move and slew-limited; not held at a limit nor latched
    /// by a reversal), s.
    pub slew_s: f64,
    /// Input outside the common-mode range, s.
    pub cm_out_s: f64,
    /// Output phase reversed, s.
    pub reversed_s: f64,
    /// When the stage first clipped, s from t = 0 (`null`: never).
    pub first_clip_s: Option<f64>,
    /// Highest output of the op-amp itself (after its clamp, before any output divider), V.
    pub peak_pos_v: Option<f64>,
    /// Lowest output of the op-amp itself, V.
    pub peak_neg_v: Option<f64>,
    /// Headroom of that output to the stage's own positive swing limit, dB.
    pub headroom_pos_db: Option<f64>,
    /// Headroom to the stage's own negative swing limit, dB.
    pub headroom_neg_db: Option<f64>,
}

impl EventSeconds {
    /// The events of a stage, with headroom against its swing limits when known.
    pub fn new(e: &StageEvents, swing: Option<&SwingLimits>) -> Self {
        let (hp, hn) = match (swing, e.peak_pos_v, e.peak_neg_v) {
            (Some(lim), Some(hi), Some(lo)) => analysis::headroom_db(&peak_levels(hi, lo), lim),
            _ => (None, None),
        };
        EventSeconds {
            clip_s: e.clip_s,
            slew_s: e.slew_s,
            cm_out_s: e.cm_out_s,
            reversed_s: e.reversed_s,
            first_clip_s: e.first_clip_s,
            peak_pos_v: e.peak_pos_v,
            peak_neg_v: e.peak_neg_v,
            headroom_pos_db: hp,
            headroom_neg_db: hn,
        }
    }
}

impl From<&StageEvents> for EventSeconds {
    fn from(e: &StageEvents) -> Self {
        EventSeconds::new(e, None)
    }
}

/// Levels holding only the extremes `hi` and `lo` (for headroom).
fn peak_levels(hi: f64, lo: f64) -> Levels {
    Levels {
        peak_v: hi.abs().max(lo.abs()),
        peak_pos_v: hi,
        peak_neg_v: lo,
        rms_v: 0.0,
        ac_rms_v: 0.0,
        dc_v: 0.0,
        crest_db: None,
    }
}

/// Shortest settle time before a capture, s.
pub const SETTLE_MIN_S: f64 = 0.05;

/// Settle margin, in time constants: `exp(-14)` is 8.3e-7, -122 dB, below the numerical
/// floor a linear stage's THD+N reaches.
pub const SETTLE_TIME_CONSTANTS: f64 = 14.0;

/// The slowest time constant of the circuit, s: every coupling capacitor with the resistance
/// it charges through (its input resistor plus, from a pot, the largest Thevenin resistance
/// of the track, a quarter of it), every capacitor across a feedback resistor with that
/// resistor, every op-amp's closed-loop pole `noise gain / (2 pi GBW)`, and for a network
/// the sum of its capacitors' open-circuit time constants
/// ([`crate::response::capacitor_time_constants`]).
pub fn slowest_time_constant(patch: &Patch) -> f64 {
    let source_r = |n: Node| match n {
        Node::Stage(j) => match &patch.stages[j].kind {
            StageKind::Attenuator { pot, .. } => pot / 4.0,
            _ => 0.0,
        },
        Node::Source(_) => 0.0,
    };
    let mut tau: f64 = 0.0;
    // per stage, the sum of its capacitors' open-circuit time constants (networks only)
    let network_tau: Option<Vec<f64>> = if patch
        .stages
        .iter()
        .any(|s| matches!(s.kind, StageKind::Network(_)))
    {
        crate::response::capacitor_time_constants(patch)
            .ok()
            .map(|(w, t)| {
                w.stage_elems
                    .iter()
                    .map(|r| t[r.clone()].iter().sum())
                    .collect()
            })
    } else {
        None
    };
    for (si, st) in patch.stages.iter().enumerate() {
        let (ng, caps) = match &st.kind {
            StageKind::InvertingSum {
                inputs, feedback, ..
            } => {
                let g: f64 = inputs.iter().map(|x| 1.0 / x.r).sum();
                let mut caps: Vec<f64> = inputs
                    .iter()
                    .filter_map(|x| x.c.map(|c| c * (x.r + source_r(x.from))))
                    .collect();
                caps.extend(feedback.c.map(|c| c * feedback.r));
                (1.0 + feedback.r * g, caps)
            }
            StageKind::NonInverting {
                r_fb, c_fb, r_g, ..
            } => (
                1.0 + r_fb / r_g,
                c_fb.map(|c| c * r_fb).into_iter().collect(),
            ),
            StageKind::Follower { .. } => (1.0, Vec::new()),
            StageKind::Attenuator { .. } => (0.0, Vec::new()),
            // a network: the sum of its capacitors' open-circuit time constants (from the
            // patch's one circuit; the slowest real pole's time constant is at most that
            // sum), and each op-amp's own pole at unity noise gain; without a circuit
            // solution, every RC product with the network's largest resistance
            StageKind::Network(n) if network_tau.is_some() => {
                for a in &n.amps {
                    tau = tau.max(1.0 / (std::f64::consts::TAU * a.part.gbw));
                }
                let sum = network_tau.as_ref().map_or(0.0, |t| t[si]);
                (0.0, vec![sum])
            }
            StageKind::Network(n) => {
                let rs: Vec<f64> = n
                    .parts
                    .iter()
                    .filter_map(|p| match &p.kind {
                        crate::model::NetPartKind::R(r) => Some(*r),
                        crate::model::NetPartKind::Pot { setting, .. } => Some(setting.track),
                        _ => None,
                    })
                    .collect();
                let rmax = rs.iter().copied().fold(0.0, f64::max);
                let caps = n
                    .parts
                    .iter()
                    .filter_map(|p| match p.kind {
                        crate::model::NetPartKind::C(c) => Some(c * rmax),
                        _ => None,
                    })
                    .collect();
                for a in &n.amps {
                    tau = tau.max(1.0 / (std::f64::consts::TAU * a.part.gbw));
                }
                (0.0, caps)
            }
        };
        if let Some(part) = &st.part {
            tau = tau.max(ng / (std::f64::consts::TAU * part.gbw));
        }
        for c in caps {
            tau = tau.max(c);
        }
    }
    tau
}

/// Settle time of a patch, s: where a capture may start without the switch-on. The latest
/// source switch-on within the record plus [`SETTLE_TIME_CONSTANTS`] of the slowest time
/// constant ([`slowest_time_constant`]), at least [`SETTLE_MIN_S`] after it. Pure and cheap:
/// a study that renders only settle time plus one capture calls it too.
pub fn settle_time(patch: &Patch) -> f64 {
    let on = patch
        .sources
        .iter()
        .map(|s| s.start)
        .filter(|t| t.is_finite() && *t < patch.length)
        .fold(0.0f64, f64::max);
    on + (SETTLE_TIME_CONSTANTS * slowest_time_constant(patch)).max(SETTLE_MIN_S)
}

/// SNR reference level: 10 Vpp, a full modular audio swing (common practice), as the RMS of
/// that sine: 5 / sqrt(2) V.
pub const SNR_REFERENCE_V_RMS: f64 = 5.0 / std::f64::consts::SQRT_2;

/// Noise figures of an output, from its idle render (sources muted, circuit noise on), over
/// 20 Hz - 20 kHz. Every field is `null` when there is no idle render (noise off).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize)]
pub struct NoiseFigures {
    /// Output noise, V rms, unweighted.
    pub noise_rms_v: Option<f64>,
    /// Output noise, dBu, unweighted.
    pub noise_dbu: Option<f64>,
    /// Output noise, V rms, A-weighted (IEC 61672-1).
    pub noise_a_rms_v: Option<f64>,
    /// Output noise, dBu, A-weighted.
    pub noise_a_dbu: Option<f64>,
    /// SNR against [`SNR_REFERENCE_V_RMS`] (10 Vpp sine), unweighted, dB.
    pub snr_ref_db: Option<f64>,
    /// SNR against the same reference, A-weighted, dB.
    pub snr_ref_a_db: Option<f64>,
}

/// Noise figures of an idle record.
pub fn noise_figures(idle: &[f64], rate: f64) -> NoiseFigures {
    let flat = Settings::default();
    let a = Settings {
        weighting: analysis::Weighting::A,
        ..Settings::default()
    };
    let rms = |s: &Settings| {
        analysis::band_rms(idle, rate, s)
            .ok()
            .map(|b| b.rms_v)
            .filter(|v| *v > 0.0)
    };
    let (n, na) = (rms(&flat), rms(&a));
    let db = |v: Option<f64>| v.map(|v| 20.0 * (SNR_REFERENCE_V_RMS / v).log10());
    NoiseFigures {
        noise_rms_v: n,
        noise_dbu: n.map(analysis::levels::v_to_dbu),
        noise_a_rms_v: na,
        noise_a_dbu: na.map(analysis::levels::v_to_dbu),
        snr_ref_db: db(n),
        snr_ref_a_db: db(na),
    }
}

/// Figures of one output plus the events of every op-amp stage upstream of it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutputReport {
    /// The analysis figures (flattened into the JSON object).
    #[serde(flatten)]
    pub figures: OutputFigures,
    /// Noise figures from the idle render (flattened).
    #[serde(flatten)]
    pub noise: NoiseFigures,
    /// Node the output is taken from.
    pub from: String,
    /// Events per upstream op-amp stage, by stage name.
    pub events: BTreeMap<String, EventSeconds>,
    /// The alias estimate of this output ([`crate::alias`]), when made (`null` otherwise).
    pub alias: Option<crate::alias::OutputAlias>,
}

/// Settings that apply to every figure of a run (the JSON `settings` object).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RunSettings {
    /// Patch title.
    pub patch: String,
    /// Base sample rate, Hz.
    pub rate_hz: f64,
    /// Oversampling factor of the stages.
    pub oversample: usize,
    /// Rendered length, s.
    pub length_s: f64,
    /// Calibration: volts at digital full scale.
    pub full_scale_v: f64,
    /// Analysis settings (window `null` = automatic).
    pub analysis: Settings,
    /// Whether circuit noise was simulated.
    pub noise: bool,
    /// Reference of `snr_ref_db`, V rms (a 10 Vpp sine).
    pub snr_reference_v_rms: f64,
    /// Start of every spectral capture, s: the circuit's settle time ([`settle_time`]).
    pub settle_s: f64,
    /// What each figure refers to.
    pub references: References,
    /// What each output's `alias` figure is ([`crate::alias::METHOD`]).
    pub alias: &'static str,
    /// Alias above this draws a warning, dBc.
    pub alias_limit_dbc: f64,
}

/// What each figure refers to (the JSON `settings.references`, also in the README).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct References {
    /// THD.
    pub thd: &'static str,
    /// THD+N.
    pub thdn: &'static str,
    /// SINAD.
    pub sinad: &'static str,
    /// ENOB.
    pub enob: &'static str,
    /// rms_v and the dB levels.
    pub rms: &'static str,
    /// dc_v.
    pub dc: &'static str,
    /// peak_v and headroom.
    pub peak: &'static str,
    /// file_peak_v, peak_dbfs.
    pub file_peak: &'static str,
    /// Spectral captures.
    pub capture: &'static str,
}

/// The references of every figure railsong prints.
pub const REFERENCES: References = References {
    thd: "relative to the fundamental: rss of harmonics 2..10 below Nyquist over the fundamental; \
          when the third harmonic lies above the file's Nyquist frequency, taken on the \
          engine's internal oversampled signal (the model's steps without the corrections \
          that band-limit the file; see notes), else null",
    thdn: "AES17: rms of what remains without the fundamental, over the rms of the whole \
           signal, both in the band and weighting stated",
    sinad: "the whole signal over what remains without the fundamental, in the same band: \
            -THD+N in dB, never negative",
    enob: "(SINAD - 1.76) / 6.02",
    rms: "AC: rms about the mean (DC excluded); rms_dbu, rms_dbv and rms_dbfs likewise",
    dc: "mean of the record",
    peak: "the circuit: the op-amp's own output after its swing clamp, through the output \
           divider; headroom against the stage's swing limits",
    file_peak:
        "the output at the file's rate: band-limited, so it may overshoot the circuit's peak; \
                before the edge fade and any listening gain",
    capture: "spectral figures skip the settle time (14 slowest time constants of the \
              circuit after the last source switch-on, at least 50 ms) and take a coherent \
              capture from what follows; levels cover the whole record",
};

/// The stage upstream of the measured outputs that clips first, and when (s from t = 0).
pub fn first_clip(m: &Measurement) -> Option<(String, f64)> {
    m.outputs
        .values()
        .flat_map(|o| o.events.iter())
        .filter_map(|(name, e)| e.first_clip_s.map(|t| (name.clone(), t)))
        .min_by(|a, b| a.1.total_cmp(&b.1))
}

/// The whole measurement: `{"outputs": {...}, "settings": {...}}`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Measurement {
    /// Figures per output, by output name (file order kept by the caller's iteration).
    pub outputs: BTreeMap<String, OutputReport>,
    /// Settings used.
    pub settings: RunSettings,
}

/// Op-amp stages upstream of a node (including it), in topological order.
pub fn upstream(patch: &Patch, node: Node) -> Vec<usize> {
    let mut mark = vec![false; patch.stages.len()];
    let mut todo = vec![node];
    while let Some(n) = todo.pop() {
        let Node::Stage(i) = n else { continue };
        if mark[i] {
            continue;
        }
        mark[i] = true;
        todo.extend(patch.stages[i].kind.reads());
    }
    (0..patch.stages.len()).filter(|i| mark[*i]).collect()
}

/// Sources upstream of a node.
pub fn upstream_sources(patch: &Patch, node: Node) -> Vec<usize> {
    let mut out = Vec::new();
    let mut visit = |n: Node| {
        if let Node::Source(s) = n {
            if !out.contains(&s) {
                out.push(s);
            }
        }
    };
    visit(node);
    for i in upstream(patch, node) {
        patch.stages[i]
            .kind
            .reads()
            .into_iter()
            .for_each(&mut visit);
    }
    out.sort();
    out
}

/// The test signal an output carries, from the sources that feed it: one sine (or one
/// periodic wave) gives its frequency; a two-tone multitone at about 4:1 with the low tone
/// below 500 Hz is an SMPTE pair; two equal high tones 1 kHz or less apart are a twin tone;
/// anything else (a mix, noise, a sweep) gets level figures only.
pub fn test_signal(patch: &Patch, node: Node) -> TestSignal {
    let srcs: Vec<&Wave> = upstream_sources(patch, node)
        .into_iter()
        .map(|i| &patch.sources[i].wave)
        .filter(|w| !matches!(w, Wave::Dc { .. }) && !silent(w))
        .collect();
    if srcs.len() != 1 {
        return TestSignal::None;
    }
    match srcs[0] {
        Wave::Sine { freq, .. }
        | Wave::Square { freq, .. }
        | Wave::Triangle { freq, .. }
        | Wave::Saw { freq, .. }
        | Wave::Pulse { freq, .. } => TestSignal::Tone(*freq),
        Wave::Multitone { tones } if tones.len() == 1 => TestSignal::Tone(tones[0].freq),
        Wave::Multitone { tones } if tones.len() == 2 => {
            let (a, b) = if tones[0].freq < tones[1].freq {
                (tones[0], tones[1])
            } else {
                (tones[1], tones[0])
            };
            let ratio = a.amp / b.amp;
            if a.freq < 500.0 && (3.0..=5.0).contains(&ratio) {
                TestSignal::Smpte {
                    low: a.freq,
                    high: b.freq,
                }
            } else if b.freq - a.freq <= 1000.0 && a.freq >= 5000.0 && (0.9..=1.1).contains(&ratio)
            {
                TestSignal::TwinTone {
                    f1: a.freq,
                    f2: b.freq,
                }
            } else {
                TestSignal::None
            }
        }
        _ => TestSignal::None,
    }
}

/// A waveform whose amplitude is zero contributes nothing.
fn silent(w: &Wave) -> bool {
    match w {
        Wave::Sine { amp, .. }
        | Wave::Square { amp, .. }
        | Wave::Triangle { amp, .. }
        | Wave::Saw { amp, .. }
        | Wave::Pulse { amp, .. }
        | Wave::Sweep { amp, .. } => *amp == 0.0,
        Wave::Multitone { tones } => tones.iter().all(|t| t.amp == 0.0),
        Wave::Noise { rms, .. } => *rms == 0.0,
        _ => false,
    }
}

/// Swing limits of an op-amp stage's own output: its part's limits narrowed by its output
/// current limit into its static load ([`crate::check::static_loads`]). `None` for a passive
/// stage.
pub fn stage_swing(patch: &Patch, stage: usize) -> Option<SwingLimits> {
    // a network's output: the swing of the op-amp that drives its output node, on that
    // op-amp's own supply
    if let crate::model::StageKind::Network(n) = &patch.stages[stage].kind {
        let a = n.amps.iter().find(|a| a.out == n.out)?;
        let (lo, hi) = crate::check::swing_limits(&a.part, a.rails.pos, a.rails.neg);
        return Some(SwingLimits {
            pos: hi,
            neg: lo,
            centre: 0.0,
        });
    }
    let part = patch.stages[stage].part.as_ref()?;
    let (mut lo, mut hi) = crate::check::swing_limits(part, patch.rails.pos, patch.rails.neg);
    if let (Some(isc), Some(load)) = (part.isc, crate::check::static_loads(patch)[stage]) {
        lo = lo.max(-isc * load);
        hi = hi.min(isc * load);
    }
    Some(SwingLimits {
        pos: hi,
        neg: lo,
        centre: 0.0,
    })
}

/// What drives an output, by name: a source, a stage, or `stage.node` for a network's inner
/// node.
pub fn output_source_name(patch: &Patch, o: &crate::model::Output) -> String {
    match (o.from, o.inner) {
        (Node::Stage(s), Some(l)) => match &patch.stages[s].kind {
            crate::model::StageKind::Network(n) => {
                format!("{}.{}", patch.stages[s].name, n.nodes[l])
            }
            _ => patch.stages[s].name.clone(),
        },
        _ => patch.node_name(o.from).to_string(),
    }
}

/// The output's series/load divider (1 for an open output).
fn output_divider(patch: &Patch, out: usize) -> f64 {
    let o = &patch.outputs[out];
    o.load.map_or(1.0, |l| l / (l + o.series))
}

/// Swing limits seen at an output: the driving op-amp's limits ([`stage_swing`]; the rails
/// for a source or passive node), scaled by the output's series/load divider.
pub fn swing_at(patch: &Patch, out: usize) -> SwingLimits {
    let o = &patch.outputs[out];
    let (lo, hi) = match o.from {
        // an inner node: the swing of the op-amp driving it, the rails for a passive one
        Node::Stage(i) if o.inner.is_some() => match &patch.stages[i].kind {
            crate::model::StageKind::Network(n) => n
                .amps
                .iter()
                .find(|a| Some(a.out) == o.inner)
                .map_or((patch.rails.neg, patch.rails.pos), |a| {
                    crate::check::swing_limits(&a.part, a.rails.pos, a.rails.neg)
                }),
            _ => (patch.rails.neg, patch.rails.pos),
        },
        Node::Stage(i) => {
            stage_swing(patch, i).map_or((patch.rails.neg, patch.rails.pos), |s| (s.neg, s.pos))
        }
        Node::Source(_) => (patch.rails.neg, patch.rails.pos),
    };
    let d = output_divider(patch, out);
    SwingLimits {
        pos: hi * d,
        neg: lo * d,
        centre: 0.0,
    }
}

/// Replace an output's `peak_v` and headroom with the circuit's own values when an op-amp
/// drives it: its output's extremes after its clamp, through the output divider (the file's
/// band-limited peak, which may overshoot, stays in `file_peak_v`).
fn apply_circuit_peaks(r: &mut OutputReport, patch: &Patch, out: usize) {
    let Node::Stage(i) = patch.outputs[out].from else {
        return;
    };
    if patch.outputs[out].inner.is_some() {
        return;
    }
    // a network: the op-amp driving its output node, by its name
    let name = match &patch.stages[i].kind {
        StageKind::Network(n) => match n.amps.iter().find(|a| a.out == n.out) {
            Some(a) => a.name.clone(),
            None => return,
        },
        _ => patch.stages[i].name.clone(),
    };
    let Some(e) = r.events.get(&name) else {
        return;
    };
    let (Some(hi), Some(lo)) = (e.peak_pos_v, e.peak_neg_v) else {
        return;
    };
    let d = output_divider(patch, out);
    let l = peak_levels(hi * d, lo * d);
    r.figures.peak_v = Some(l.peak_v);
    let (p, n) = analysis::headroom_db(&l, &swing_at(patch, out));
    r.figures.headroom_pos_db = p;
    r.figures.headroom_neg_db = n;
}

/// Measure every output of a run. `idle` is a render of the same patch with its sources
/// muted (for SNR), when available; `outputs` picks one output by name; `test` overrides the
/// test signal found by [`test_signal`].
pub fn measure(
    patch: &Patch,
    run: &Run,
    idle: Option<&Run>,
    settings: &Settings,
    outputs: Option<&str>,
    test: Option<TestSignal>,
) -> Measurement {
    let mut map = BTreeMap::new();
    let settle_s = settle_time(patch);
    let settle_frames = (settle_s * run.rate).round() as usize;
    let skip_in = |r: &Run| settle_frames.saturating_sub(r.first_frame);
    for (i, o) in patch.outputs.iter().enumerate() {
        if outputs.is_some_and(|n| n != o.name) {
            continue;
        }
        let Some(sig) = run.outputs.iter().find(|s| s.name == o.name) else {
            continue;
        };
        let idle_samples = idle
            .and_then(|r| r.outputs.iter().find(|s| s.name == o.name))
            .map(|s| s.samples.as_slice());
        let ctx = MeasureContext {
            swing: Some(swing_at(patch, i)),
            full_scale_v: Some(patch.full_scale),
            idle: idle_samples,
            snr_reference_v: None,
            test: test.unwrap_or_else(|| test_signal(patch, o.from)),
            settings: *settings,
            skip: skip_in(run),
            idle_skip: idle.map_or(0, skip_in),
        };
        let figures = analysis::measure_output(&sig.samples, run.rate, &ctx);
        // op-amp stages by their name, every op-amp of a network by its own name
        let events = upstream(patch, o.from)
            .into_iter()
            .flat_map(|s| {
                let st = &patch.stages[s];
                match &st.kind {
                    // each against its own swing, on its own supply
                    StageKind::Network(n) => n
                        .amps
                        .iter()
                        .map(|a| {
                            let (lo, hi) =
                                crate::check::swing_limits(&a.part, a.rails.pos, a.rails.neg);
                            let lim = SwingLimits {
                                pos: hi,
                                neg: lo,
                                centre: 0.0,
                            };
                            (a.name.clone(), Some(lim))
                        })
                        .collect::<Vec<_>>(),
                    _ if st.part.is_some() => vec![(st.name.clone(), stage_swing(patch, s))],
                    _ => Vec::new(),
                }
            })
            .filter_map(|(name, swing)| {
                run.events
                    .iter()
                    .find(|e| e.stage == name)
                    .map(|e| (name.clone(), EventSeconds::new(e, swing.as_ref())))
            })
            .collect();
        let noise = idle_samples
            .map(|x| noise_figures(&x[ctx.idle_skip.min(x.len())..], run.rate))
            .unwrap_or_default();
        let mut report = OutputReport {
            figures,
            noise,
            from: output_source_name(patch, o),
            events,
            alias: None,
        };
        apply_circuit_peaks(&mut report, patch, i);
        map.insert(o.name.clone(), report);
    }
    Measurement {
        outputs: map,
        settings: RunSettings {
            patch: patch.title.clone(),
            rate_hz: run.rate,
            oversample: run.oversample,
            length_s: run.outputs.first().map_or(0.0, |s| s.samples.len() as f64) / run.rate,
            full_scale_v: patch.full_scale,
            analysis: *settings,
            noise: patch.noise,
            snr_reference_v_rms: SNR_REFERENCE_V_RMS,
            settle_s,
            references: REFERENCES,
            alias: crate::alias::METHOD,
            alias_limit_dbc: crate::alias::WARN_DBC,
        },
    }
}

/// Columns of the CSV form, in order.
pub const CSV_COLUMNS: [&str; 23] = [
    "output",
    "fundamental_hz",
    "thd_percent",
    "thd_db",
    "thdn_db",
    "sinad_db",
    "enob",
    "snr_db",
    "peak_v",
    "file_peak_v",
    "rms_v",
    "dc_v",
    "crest_db",
    "headroom_pos_db",
    "headroom_neg_db",
    "imd_smpte_percent",
    "imd_ccif_percent",
    "clip_s",
    "slew_s",
    "cm_out_s",
    "reversed_s",
    "first_clip_s",
    "first_clip_stage",
];

/// The CSV form: a header row and one row per output; empty cells where a figure does not
/// apply. The event columns (`clip_s`, `slew_s`, `cm_out_s`, `reversed_s`) are summed over the
/// op-amp stages upstream of the output; `first_clip_s` and `first_clip_stage` name the first
/// of them to clip.
pub fn to_csv(m: &Measurement) -> String {
    let mut s = CSV_COLUMNS.join(",");
    s.push('\n');
    let cell = |v: Option<f64>| v.map_or(String::new(), |x| format!("{x}"));
    for (name, o) in &m.outputs {
        let f = &o.figures;
        let first = o
            .events
            .iter()
            .filter_map(|(st, e)| e.first_clip_s.map(|t| (st.as_str(), t)))
            .min_by(|a, b| a.1.total_cmp(&b.1));
        let row = [
            name.clone(),
            cell(f.fundamental_hz),
            cell(f.thd_percent),
            cell(f.thd_db),
            cell(f.thdn_db),
            cell(f.sinad_db),
            cell(f.enob),
            cell(f.snr_db),
            cell(f.peak_v),
            cell(f.file_peak_v),
            cell(f.rms_v),
            cell(f.dc_v),
            cell(f.crest_db),
            cell(f.headroom_pos_db),
            cell(f.headroom_neg_db),
            cell(f.imd_smpte_percent),
            cell(f.imd_ccif_percent),
            // events summed over the op-amp stages upstream of the output, and the first
            // of them to clip
            cell(Some(o.events.values().map(|e| e.clip_s).sum())),
            cell(Some(o.events.values().map(|e| e.slew_s).sum())),
            cell(Some(o.events.values().map(|e| e.cm_out_s).sum())),
            cell(Some(o.events.values().map(|e| e.reversed_s).sum())),
            cell(first.map(|(_, t)| t)),
            first.map_or(String::new(), |(st, _)| st.to_string()),
        ];
        s.push_str(&row.join(","));
        s.push('\n');
    }
    s
}

/// The JSON form (pretty-printed).
pub fn to_json(m: &Measurement) -> String {
    serde_json::to_string_pretty(m).unwrap_or_else(|e| format!("{{\"error\": \"{e}\"}}"))
}

/// Replace the level figures of each output (peak, RMS, DC, crest factor, dBu/dBV/dBFS,
/// headroom) with full-record levels, for a streamed render whose samples were only kept as
/// a tail. `levels` is in patch output order.
pub fn apply_full_levels(
    m: &mut Measurement,
    patch: &Patch,
    levels: &[Option<crate::analysis::Levels>],
) {
    for (i, o) in patch.outputs.iter().enumerate() {
        let (Some(r), Some(Some(l))) = (m.outputs.get_mut(&o.name), levels.get(i)) else {
            continue;
        };
        let swing = swing_at(patch, i);
        analysis::set_level_figures(&mut r.figures, l, Some(&swing), Some(patch.full_scale));
        apply_circuit_peaks(r, patch, i);
    }
    if !levels.is_empty() {
        m.settings.length_s = patch.length.min(patch.frames() as f64 / patch.rate);
    }
}

/// A figure's name as a reader says it and its unit, from its JSON key: `thd_percent` ->
/// ("THD", "%"), `thdn_db` -> ("THD+N", "dB"), `headroom_pos_db` -> ("headroom pos", "dB"),
/// `peak_v` -> ("peak", "V"). Unknown keys keep their name, without a unit.
pub fn figure_label(key: &str) -> (String, &'static str) {
    const UNITS: [(&str, &str); 7] = [
        ("_percent", "%"),
        ("_dbfs", "dBFS"),
        ("_dbc", "dBc"),
        ("_db", "dB"),
        ("_hz", "Hz"),
        ("_v", "V"),
        ("_s", "s"),
    ];
    let (stem, unit) = UNITS
        .iter()
        .find_map(|(suf, u)| key.strip_suffix(suf).map(|s| (s, *u)))
        .unwrap_or((key, ""));
    let words: Vec<String> = stem
        .split('_')
        .map(|w| match w {
            "thd" => "THD".to_string(),
            "thdn" => "THD+N".to_string(),
            "sinad" => "SINAD".to_string(),
            "snr" => "SNR".to_string(),
            "imd" => "IMD".to_string(),
            "enob" => "ENOB".to_string(),
            "rms" => "RMS".to_string(),
            "dc" => "DC".to_string(),
            "pos" => "+".to_string(),
            "neg" => "-".to_string(),
            w => w.to_string(),
        })
        .collect();
    (words.join(" "), unit)
}

/// The unit of the value a patch key path holds, from its last key: resistors, pots and
/// loads in ohm, capacitors in F, frequencies in Hz, levels in V, times in s; `""` for a
/// pot position or anything else.
pub fn key_unit(path: &str) -> &'static str {
    let last = path.rsplit('.').next().unwrap_or(path);
    match last {
        "pot" | "load" | "series" | "r" | "track" => "ohm",
        k if k.starts_with("r_") => "ohm",
        "c" => "F",
        k if k.starts_with("c_") => "F",
        "freq" | "from" | "to" => "Hz",
        "amp" => "Vpk",
        "offset" | "level" | "ref" | "pos" | "neg" => "V",
        "rms" => "Vrms",
        "start" | "stop" | "length" | "attack" | "decay" | "every" | "duration" => "s",
        _ => "",
    }
}

#[cfg(test)]
mod label_tests {
    use super::*;

    // Names of the figures contract (README) read back as a designer says them [D].
    #[test]
    fn figure_and_key_labels() {
        assert_eq!(figure_label("thd_percent"), ("THD".to_string(), "%"));
        assert_eq!(figure_label("thdn_db"), ("THD+N".to_string(), "dB"));
        assert_eq!(
            figure_label("headroom_pos_db"),
            ("headroom +".to_string(), "dB")
        );
        assert_eq!(figure_label("peak_v"), ("peak".to_string(), "V"));
        assert_eq!(figure_label("mystery"), ("mystery".to_string(), ""));
        assert_eq!(key_unit("stages.amp.r_fb"), "ohm");
        assert_eq!(key_unit("stages.tone.feedback.c"), "F");
        assert_eq!(key_unit("sources.lead.amp"), "Vpk");
        assert_eq!(key_unit("sources.lead.freq"), "Hz");
        assert_eq!(key_unit("stages.vol.at"), "");
    }
}
