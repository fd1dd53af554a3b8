//! Figures of a rendered patch: which test signal each output carries, the swing limits its
//! headroom is measured against, the events of the stages that feed it, and the JSON/CSV
//! forms that scripts read. Pure functions over a [`Patch`] and an engine [`Run`].

use std::collections::BTreeMap;

use serde::Serialize;

use crate::analysis::{self, MeasureContext, OutputFigures, Settings, SwingLimits, TestSignal};
use crate::engine::{Run, StageEvents};
use crate::model::{Node, Patch, Wave};

/// Event durations of one stage, seconds (the JSON `events` entry).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct EventSeconds {
    /// At or past the output swing limit.
    pub clip_s: f64,
    /// Slew-limited.
    pub slew_s: f64,
    /// Input outside the common-mode range.
    pub cm_out_s: f64,
    /// Output phase reversed.
    pub reversed_s: f64,
}

impl From<&StageEvents> for EventSeconds {
    fn from(e: &StageEvents) -> Self {
        EventSeconds {
            clip_s: e.clip_s,
            slew_s: e.slew_s,
            cm_out_s: e.cm_out_s,
            reversed_s: e.reversed_s,
        }
    }
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
    /// Alias figure (dBc) of each op-amp stage's part at this oversampling, when measured.
    pub alias_dbc: BTreeMap<String, f64>,
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

/// Swing limits seen at an output: the driving op-amp's limits (or the rails, for a source
/// or passive node), narrowed by its output current limit into its static load
/// ([`crate::check::static_loads`]), scaled by the output's series/load divider.
pub fn swing_at(patch: &Patch, out: usize) -> SwingLimits {
    let o = &patch.outputs[out];
    let (mut lo, mut hi) = (patch.rails.neg, patch.rails.pos);
    if let Node::Stage(i) = o.from {
        if let Some(part) = &patch.stages[i].part {
            let (l, h) = crate::check::swing_limits(part, patch.rails.pos, patch.rails.neg);
            lo = l;
            hi = h;
            if let (Some(isc), Some(load)) = (part.isc, crate::check::static_loads(patch)[i]) {
                lo = lo.max(-isc * load);
                hi = hi.min(isc * load);
            }
        }
    }
    let d = o.load.map_or(1.0, |l| l / (l + o.series));
    SwingLimits {
        pos: hi * d,
        neg: lo * d,
        centre: 0.0,
    }
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
        };
        let figures = analysis::measure_output(&sig.samples, run.rate, &ctx);
        // op-amp stages by their name, every op-amp of a network by its own name
        let events = upstream(patch, o.from)
            .into_iter()
            .flat_map(|s| {
                let st = &patch.stages[s];
                match &st.kind {
                    crate::model::StageKind::Network(n) => {
                        n.amps.iter().map(|a| a.name.clone()).collect::<Vec<_>>()
                    }
                    _ if st.part.is_some() => vec![st.name.clone()],
                    _ => Vec::new(),
                }
            })
            .filter_map(|name| {
                run.events
                    .iter()
                    .find(|e| e.stage == name)
                    .map(|e| (name.clone(), EventSeconds::from(e)))
            })
            .collect();
        let noise = idle_samples
            .map(|x| noise_figures(x, run.rate))
            .unwrap_or_default();
        map.insert(
            o.name.clone(),
            OutputReport {
                figures,
                noise,
                from: patch.node_name(o.from).to_string(),
                events,
            },
        );
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
            alias_dbc: run.alias.iter().map(|a| (a.stage.clone(), a.dbc)).collect(),
        },
    }
}

/// Columns of the CSV form, in order.
pub const CSV_COLUMNS: [&str; 16] = [
    "output",
    "fundamental_hz",
    "thd_percent",
    "thd_db",
    "thdn_db",
    "sinad_db",
    "enob",
    "snr_db",
    "peak_v",
    "rms_v",
    "dc_v",
    "crest_db",
    "headroom_pos_db",
    "headroom_neg_db",
    "imd_smpte_percent",
    "imd_ccif_percent",
];

/// The CSV form: a header row and one row per output; empty cells where a figure does not
/// apply.
pub fn to_csv(m: &Measurement) -> String {
    let mut s = CSV_COLUMNS.join(",");
    s.push('\n');
    let cell = |v: Option<f64>| v.map_or(String::new(), |x| format!("{x}"));
    for (name, o) in &m.outputs {
        let f = &o.figures;
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
            cell(f.rms_v),
            cell(f.dc_v),
            cell(f.crest_db),
            cell(f.headroom_pos_db),
            cell(f.headroom_neg_db),
            cell(f.imd_smpte_percent),
            cell(f.imd_ccif_percent),
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
    }
    if !levels.is_empty() {
        m.settings.length_s = patch.length.min(patch.frames() as f64 / patch.rate);
    }
}
