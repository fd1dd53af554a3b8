//! Pictures of a render and the self-contained listening page.
//!
//! [`plots`] draws, per output: its spectrum (harmonics marked when the output carries a test
//! tone), a waveform window against the rails, the swing limits and the input range with the
//! event spans shaded, the transfer curve from a slow ramp with the linear-gain line, and THD
//! against input level when the output is fed by one periodic source. [`page`] puts the patch,
//! its figures, the plots (inline SVG) and an audio player per render (16-bit WAV as a
//! `data:` URI) into one HTML file that works offline from a `file://` URL: no network
//! fetches, no framework, one small inline script that marks which players loaded.
//!
//! Event spans in the waveform plot are *estimated* from node voltages at the base rate
//! (output within 1 % of a swing limit; slope above 90 % of the slew rate; V+ outside the
//! input range; reversed = outside the range on a reversing part); the durations in the
//! figures come from the engine's per-step flags.

use std::fmt::Write as _;

use crate::analysis::{self, Settings, Spectrum, TestSignal, Window};
use crate::engine::Run;
use crate::measure::{self, Measurement};
use crate::model::{Node, Output, Patch, StageKind, Wave};
use crate::plot::{
    self, AxisSpec, Crossing, DbScale, EventKind, EventSpan, HarmonicMark, SpectrumPlot, SweepPlot,
    SweepSeries, Threshold, Trace, TransferPlot, WaveformPlot,
};
use crate::render::{self, RenderError, RenderOptions};

/// One drawn plot.
#[derive(Debug, Clone, PartialEq)]
pub struct Figure {
    /// Output it belongs to.
    pub output: String,
    /// Side of an A/B comparison it belongs to (`"A"` or `"B"`), if any.
    pub side: Option<&'static str>,
    /// Kind: `spectrum`, `waveform`, `transfer`, `thd-vs-level`, `response-gain` or
    /// `response-phase`.
    pub kind: &'static str,
    /// The SVG document.
    pub svg: String,
}

impl Figure {
    /// File name for the figure (`NAME-KIND.svg`, or `NAME-SIDE-KIND.svg` for a side of an
    /// A/B comparison).
    pub fn file_name(&self) -> String {
        match self.side {
            Some(side) => format!("{}-{side}-{}.svg", self.output, self.kind),
            None => format!("{}-{}.svg", self.output, self.kind),
        }
    }
}

const PROBE: &str = "probe:";

/// The patch with an extra open (unloaded) output on every source and stage, named
/// `probe:NAME`, so node voltages can be read back without changing the circuit.
fn with_probes(patch: &Patch) -> Patch {
    let mut p = patch.clone();
    let nodes: Vec<(String, Node)> = (0..patch.sources.len())
        .map(|i| (patch.sources[i].name.clone(), Node::Source(i)))
        .chain((0..patch.stages.len()).map(|i| (patch.stages[i].name.clone(), Node::Stage(i))))
        .collect();
    for (name, node) in nodes {
        p.outputs.push(Output {
            name: format!("{PROBE}{name}"),
            from: node,
            inner: None,
            series: 0.0,
            load: None,
            file: None,
        });
    }
    p
}

fn signal<'a>(run: &'a Run, name: &str) -> Option<&'a [f64]> {
    run.outputs
        .iter()
        .find(|o| o.name == name)
        .map(|o| o.samples.as_slice())
}

fn node_signal<'a>(patch: &Patch, run: &'a Run, node: Node) -> Option<&'a [f64]> {
    signal(run, &format!("{PROBE}{}", patch.node_name(node)))
}

/// Coalesce a per-sample condition into spans (seconds).
fn spans_of(kind: EventKind, flags: impl Iterator<Item = bool>, rate: f64) -> Vec<EventSpan> {
    let mut out = Vec::new();
    let mut start = None;
    let mut n = 0;
    for (i, f) in flags.enumerate() {
        n = i + 1;
        match (f, start) {
            (true, None) => start = Some(i),
            (false, Some(s)) => {
                out.push(EventSpan {
                    kind,
                    start_s: s as f64 / rate,
                    end_s: i as f64 / rate,
                });
                start = None;
            }
            _ => {}
        }
    }
    if let Some(s) = start {
        out.push(EventSpan {
            kind,
            start_s: s as f64 / rate,
            end_s: n as f64 / rate,
        });
    }
    out
}

/// The input common-mode window of the stage driving `node`, if it has one.
fn cm_window(patch: &Patch, node: Node) -> Option<(f64, f64, bool, Node)> {
    let Node::Stage(i) = node else { return None };
    let st = &patch.stages[i];
    let part = st.part.as_ref()?;
    let plus = match &st.kind {
        StageKind::NonInverting { from, .. } | StageKind::Follower { from } => *from,
        _ => return None,
    };
    let lo = part
        .cm_low
        .map_or(f64::NEG_INFINITY, |d| patch.rails.neg + d);
    let hi = part.cm_high.map_or(f64::INFINITY, |d| patch.rails.pos - d);
    Some((lo, hi, part.reversal, plus))
}

/// Estimated event spans of the stage driving an output.
fn event_spans(patch: &Patch, probes: &Run, node: Node) -> Vec<EventSpan> {
    let Node::Stage(i) = node else {
        return Vec::new();
    };
    let Some(part) = patch.stages[i].part.as_ref() else {
        return Vec::new();
    };
    let Some(v) = node_signal(patch, probes, node) else {
        return Vec::new();
    };
    let rate = probes.rate;
    let (lo, hi) = crate::check::swing_limits(part, patch.rails.pos, patch.rails.neg);
    let mut spans = spans_of(
        EventKind::Clipping,
        v.iter()
            .map(|&x| x >= hi - 0.01 * hi.abs() || x <= lo + 0.01 * lo.abs()),
        rate,
    );
    let sr = part.slew;
    spans.extend(spans_of(
        EventKind::Slewing,
        (0..v.len()).map(|n| n > 0 && (v[n] - v[n - 1]).abs() * rate >= 0.9 * sr),
        rate,
    ));
    if let Some((clo, chi, reversal, plus)) = cm_window(patch, node) {
        if let Some(x) = node_signal(patch, probes, plus) {
            let out = |y: f64| y < clo || y > chi;
            spans.extend(spans_of(
                EventKind::OutOfInputRange,
                x.iter().map(|&y| out(y)),
                rate,
            ));
            if reversal {
                spans.extend(spans_of(
                    EventKind::Reversed,
                    x.iter().map(|&y| out(y)),
                    rate,
                ));
            }
        }
    }
    spans
}

/// A window of about 20 ms around the first event, or around the largest peak.
fn waveform_window(v: &[f64], rate: f64, spans: &[EventSpan]) -> (f64, f64) {
    let total = v.len() as f64 / rate;
    let width = 0.02f64.min(total);
    let centre = match spans.iter().map(|s| s.start_s).reduce(f64::min) {
        Some(t) => t + 0.004,
        None => {
            let (k, _) = v.iter().enumerate().fold((0, 0.0), |(bk, bv), (k, x)| {
                if x.abs() > bv {
                    (k, x.abs())
                } else {
                    (bk, bv)
                }
            });
            k as f64 / rate
        }
    };
    let t0 = (centre - width / 2.0).clamp(0.0, (total - width).max(0.0));
    (t0, t0 + width)
}

/// The input node of the stage at `node` (a summer's first input that carries more than DC,
/// else its first input); `None` for a source.
fn stage_input(patch: &Patch, node: Node) -> Option<Node> {
    let Node::Stage(i) = node else {
        return None;
    };
    match &patch.stages[i].kind {
        StageKind::InvertingSum { inputs, .. } => inputs
            .iter()
            .map(|inp| inp.from)
            .find(|&n| first_source(patch, n).is_some())
            .or_else(|| inputs.first().map(|inp| inp.from)),
        StageKind::NonInverting { from, .. }
        | StageKind::Follower { from }
        | StageKind::Attenuator { from, .. } => Some(*from),
        StageKind::Network(_) => patch.stages[i]
            .kind
            .reads()
            .into_iter()
            .find(|&n| first_source(patch, n).is_some()),
    }
}

fn first_source(patch: &Patch, node: Node) -> Option<usize> {
    measure::upstream_sources(patch, node)
        .into_iter()
        .find(|&s| !matches!(patch.sources[s].wave, Wave::Dc { .. }))
}

/// The response plots of one output: its gain (with the -3 dB points marked) and its phase
/// against frequency, as (`response-gain` / `response-phase`, SVG); `prefix` starts each
/// title (a side of a comparison).
pub fn response_svgs(
    name: &str,
    o: &crate::response::OutputResponse,
    prefix: &str,
) -> Result<Vec<(&'static str, String)>, plot::PlotError> {
    let gain: Vec<(f64, f64)> = o.points.iter().map(|p| (p.hz, p.gain_db)).collect();
    let phase: Vec<(f64, f64)> = o.points.iter().map(|p| (p.hz, p.phase_deg)).collect();
    let peak = gain.iter().map(|p| p.1).fold(f64::NEG_INFINITY, f64::max);
    let crossings: Vec<Crossing> = crate::response::minus_3db(&o.points)
        .into_iter()
        .map(|f| Crossing {
            x: f,
            y: peak - 3.0,
            label: format!("-3 dB at {}", crate::units::fmt_eng(f, "Hz")),
        })
        .collect();
    let caption = format!(
        "small-signal response from {} (complex nodal solve)",
        o.source
    );
    let mut out = Vec::new();
    for (kind, pts, label, unit, marks) in [
        ("response-gain", &gain, "gain", "dB", &crossings[..]),
        ("response-phase", &phase, "phase", "deg", &[][..]),
    ] {
        let title = format!("{prefix}{name}: {label} against frequency");
        let series = [SweepSeries {
            name: label,
            points: pts,
        }];
        out.push((
            kind,
            plot::sweep_svg(&SweepPlot {
                title: &title,
                caption: &caption,
                x: AxisSpec::log("frequency", "Hz"),
                y: AxisSpec::linear(label, unit),
                series: &series,
                crossings: marks,
                threshold: None,
            })?,
        ));
    }
    Ok(out)
}

/// Whether the patch's circuit has a capacitor (then its response is worth a plot).
pub fn has_capacitors(patch: &Patch) -> bool {
    crate::circuit::build::patch_circuit(patch)
        .circuit
        .elems
        .iter()
        .any(|e| matches!(e.kind, crate::circuit::ElemKind::C(_)))
}

/// Longest stretch the plots are drawn from, s: a longer patch is plotted from its first
/// [`PLOT_MAX_S`] seconds (the plots show shapes, not the whole record).
pub const PLOT_MAX_S: f64 = 10.0;

/// Every plot of every output (`only`: one output by name). Renders the patch once more with
/// probes on every node (at most [`PLOT_MAX_S`] long).
pub fn plots(patch: &Patch, only: Option<&str>) -> Result<Vec<Figure>, RenderError> {
    side_plots(patch, only, None)
}

/// [`plots`] of one side of an A/B comparison: every title starts with `side` (and the
/// variant's name, `label`), and the figures carry the side.
pub fn side_plots(
    patch: &Patch,
    only: Option<&str>,
    side: Option<(&'static str, &str)>,
) -> Result<Vec<Figure>, RenderError> {
    let prefix = side.map_or(String::new(), |(s, label)| format!("{s} ({label}): "));
    let mut short = patch.clone();
    short.length = short.length.min(PLOT_MAX_S);
    let patch = &short;
    let probe_patch = with_probes(patch);
    let probes = render::render(&probe_patch, &RenderOptions::default(), &mut |_| {})?;
    let run = &probes;
    let with_caps = has_capacitors(patch);
    let mut figs = Vec::new();
    for (oi, o) in patch.outputs.iter().enumerate() {
        if only.is_some_and(|n| n != o.name) {
            continue;
        }
        let Some(v) = signal(run, &o.name) else {
            continue;
        };
        let swing = measure::swing_at(patch, oi);
        let test = measure::test_signal(patch, o.from);
        let mut push = |kind: &'static str, svg: Result<String, plot::PlotError>| {
            if let Ok(svg) = svg {
                figs.push(Figure {
                    output: o.name.clone(),
                    side: side.map(|(s, _)| s),
                    kind,
                    svg,
                });
            }
        };

        // Spectrum.
        let settings = Settings::default();
        let (spec, marks, caption) = match test {
            TestSignal::Tone(f) => match analysis::thd(v, run.rate, Some(f), &settings) {
                Ok(t) => {
                    let cap = plot::settings_caption(&t);
                    let tail = &v[v.len() - t.fft_len..];
                    (
                        Spectrum::compute(tail, run.rate, t.window).ok(),
                        HarmonicMark::from_levels(&t.harmonics),
                        cap,
                    )
                }
                Err(_) => (None, Vec::new(), String::new()),
            },
            _ => {
                let n = v.len().min(1 << 16);
                (
                    Spectrum::compute(&v[v.len() - n..], run.rate, Window::BlackmanHarris7).ok(),
                    Vec::new(),
                    format!("window blackman-harris-7, FFT {n}, last {n} samples"),
                )
            }
        };
        if let Some(spec) = spec {
            if let Ok((f, l)) = plot::spectrum_db(&spec, DbScale::Dbv) {
                let title = format!("{prefix}{}: spectrum", o.name);
                push(
                    "spectrum",
                    plot::spectrum_svg(&SpectrumPlot {
                        title: &title,
                        caption: &caption,
                        freq_hz: &f,
                        level_db: &l,
                        unit: "dBV",
                        band_hz: None,
                        db_range: None,
                        harmonics: &marks,
                        hide_below_dbc: Some(-160.0),
                        noise_floor_db: None,
                    }),
                );
            }
        }

        // Waveform.
        let spans = event_spans(patch, &probes, o.from);
        let win = waveform_window(v, run.rate, &spans);
        // the input trace is the driving stage's own input node
        let input = stage_input(patch, o.from).and_then(|n| {
            node_signal(patch, &probes, n).map(|x| Trace {
                samples: x,
                rate: run.rate,
                start_s: 0.0,
            })
        });
        let cm = cm_window(patch, o.from)
            .map(|(lo, hi, _, _)| (lo.max(patch.rails.neg), hi.min(patch.rails.pos)));
        let title = format!(
            "{prefix}{}: waveform (from {}{})",
            o.name,
            patch.node_name(o.from),
            stage_input(patch, o.from).map_or(String::new(), |n| format!(
                "; light: its input {}",
                patch.node_name(n)
            ))
        );
        let caption = "event spans estimated from node voltages; durations in the figures come from the engine";
        push(
            "waveform",
            plot::waveform_svg(&WaveformPlot {
                title: &title,
                caption,
                output: Trace {
                    samples: v,
                    rate: run.rate,
                    start_s: 0.0,
                },
                input,
                window_s: Some(win),
                rails: Some((patch.rails.neg, patch.rails.pos)),
                swing: Some((swing.neg, swing.pos)),
                common_mode: cm,
                spans: &spans,
            }),
        );

        // Transfer curve from a slow ramp through the first source, the others muted.
        if let Some(s) = first_source(patch, o.from) {
            if let Ok((x, y)) = transfer_run(patch, s, oi) {
                let (gain, offset) =
                    small_signal_fit(&x, &y, patch.rails.pos.abs().max(patch.rails.neg.abs()));
                let title = format!(
                    "{prefix}{}: transfer curve from {}",
                    o.name, patch.sources[s].name
                );
                let caption = format!(
                    "slow ramp rail to rail on {}, other sources muted; dashed: linear gain {gain:.3} fitted near 0 V",
                    patch.sources[s].name
                );
                push(
                    "transfer",
                    plot::transfer_svg(&TransferPlot {
                        title: &title,
                        caption: &caption,
                        input_v: &x,
                        output_v: &y,
                        gain,
                        offset_v: offset,
                        rails: Some((patch.rails.neg, patch.rails.pos)),
                    }),
                );
            }
        }

        // THD against level for a single-tone output.
        if let (TestSignal::Tone(_), Some(s)) = (test, first_source(patch, o.from)) {
            if let Some(pts) = level_sweep(patch, s, oi) {
                // the crossings found on the circuit (extra renders near each), marked only
                // where found
                let crossings: Vec<Crossing> = [0.1, 1.0]
                    .into_iter()
                    .filter_map(|th| {
                        let (lo, hi) = analysis::sweep::bracket(&pts, th)?;
                        let l = analysis::sweep::find_crossing(
                            lo,
                            hi,
                            th,
                            analysis::sweep::CROSSING_TOLERANCE,
                            &mut |a| thd_at(patch, s, oi, a),
                        )?;
                        Some(Crossing {
                            x: l,
                            y: th,
                            label: format!("{th} % THD at {l:.3} Vpk"),
                        })
                    })
                    .collect();
                let title = format!(
                    "{prefix}{}: THD against level of {}",
                    o.name, patch.sources[s].name
                );
                let caption = "harmonics 2-10, settle time + 0.45 s per point, coherent capture where possible; crossings found on the circuit within 0.1 % in level";
                let series = [SweepSeries {
                    name: "THD",
                    points: &pts,
                }];
                push(
                    "thd-vs-level",
                    plot::sweep_svg(&SweepPlot {
                        title: &title,
                        caption,
                        x: AxisSpec::log("Input level", "Vpk"),
                        y: AxisSpec::log("THD", "%"),
                        series: &series,
                        crossings: &crossings,
                        threshold: Some(Threshold {
                            y: 1.0,
                            label: "1 % THD".into(),
                        }),
                    }),
                );
            }
        }

        // Small-signal response from the output's first source, when the circuit has
        // capacitors (a flat response is no news).
        if let (true, Some(s)) = (with_caps, first_source(patch, o.from)) {
            let grid = crate::response::log_grid(10.0, 40e3, 200).unwrap_or_default();
            if let Ok(r) = crate::response::response(patch, s, &grid) {
                if let Some(or) = r.outputs.get(&o.name) {
                    if let Ok(svgs) = response_svgs(&o.name, or, &prefix) {
                        for (kind, svg) in svgs {
                            push(kind, Ok(svg));
                        }
                    }
                }
            }
        }
    }
    Ok(figs)
}

/// Run the patch with source `s` replaced by a rail-to-rail ramp over 1 s and every other
/// source muted; returns (input, output) of output `oi`. The ramp starts a settle time
/// earlier, further down, and the points of that lead-in are dropped: the curve starts once
/// the circuit has followed the ramp from rest (no vertical line at the first sample).
fn transfer_run(patch: &Patch, s: usize, oi: usize) -> Result<(Vec<f64>, Vec<f64>), RenderError> {
    let mut p = render::muted(patch);
    let span = patch.rails.pos.abs().max(patch.rails.neg.abs());
    p.sources[s].offset = 0.0;
    p.sources[s].start = 0.0;
    p.sources[s].stop = None;
    p.sources[s].wave = Wave::Ramp {
        from: -span,
        to: span,
        duration: 1.0,
    };
    p.length = 1.0;
    // at most a quarter second of lead-in (a slow coupling capacitor would not settle on a
    // ramp anyway)
    let settle = measure::settle_time(&p).min(0.25);
    let slope = 2.0 * span; // V/s
    let from = -span - slope * settle;
    p.sources[s].wave = Wave::Ramp {
        from,
        to: span,
        duration: 1.0 + settle,
    };
    p.length = 1.0 + settle;
    let run = render::render(&p, &RenderOptions::default(), &mut |_| {})?;
    let skip = ((settle * p.rate).ceil() as usize).min(run.outputs[oi].samples.len());
    let y = run.outputs[oi].samples[skip..].to_vec();
    let x = (skip..skip + y.len())
        .map(|k| (from + slope * k as f64 / p.rate).min(span))
        .collect();
    Ok((x, y))
}

/// Least-squares line through the points with |x| below 10 % of `span`.
fn small_signal_fit(x: &[f64], y: &[f64], span: f64) -> (f64, f64) {
    let (mut n, mut sx, mut sy, mut sxx, mut sxy) = (0.0, 0.0, 0.0, 0.0, 0.0);
    for (&a, &b) in x.iter().zip(y) {
        if a.abs() < 0.1 * span {
            n += 1.0;
            sx += a;
            sy += b;
            sxx += a * a;
            sxy += a * b;
        }
    }
    let d = n * sxx - sx * sx;
    if n < 2.0 || d == 0.0 {
        return (1.0, 0.0);
    }
    let g = (n * sxy - sx * sy) / d;
    (g, (sy - g * sx) / n)
}

/// THD (%) of output `oi` at nine levels of source `s`, from a tenth to twice its level
/// (points where THD is not measured are left out).
fn level_sweep(patch: &Patch, s: usize, oi: usize) -> Option<Vec<(f64, f64)>> {
    let amp = match &patch.sources[s].wave {
        Wave::Sine { amp, .. } => *amp,
        _ => return None,
    };
    let pts: Vec<(f64, f64)> = (0..9)
        .filter_map(|k| {
            let a = amp * 0.1 * 20f64.powf(k as f64 / 8.0);
            thd_at(patch, s, oi, a).map(|t| (a, t))
        })
        .collect();
    (pts.len() >= 2).then_some(pts)
}

/// THD (%) of output `oi` with sine source `s` at peak level `a`: a render of the settle time
/// plus 0.45 s (at most the patch length). `None` when THD is not measured (or is 0).
fn thd_at(patch: &Patch, s: usize, oi: usize, a: f64) -> Option<f64> {
    let mut p = patch.clone();
    if let Wave::Sine { amp, .. } = &mut p.sources[s].wave {
        *amp = a;
    }
    p.length = p.length.min(measure::settle_time(&p) + 0.45);
    let run = render::render(&p, &RenderOptions::default(), &mut |_| {}).ok()?;
    let mut m = measure::measure(&p, &run, None, &Settings::default(), None, None);
    render::complete_thd(&p, &mut m, &Settings::default(), None).ok()?;
    m.outputs
        .get(&p.outputs[oi].name)
        .and_then(|r| r.figures.thd_percent)
        .filter(|t| *t > 0.0)
}

/// XML/HTML text escape.
pub fn escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// Standard base64 (RFC 4648) of `bytes`.
pub fn base64(bytes: &[u8]) -> String {
    const T: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut out = String::with_capacity(bytes.len().div_ceil(3) * 4);
    for c in bytes.chunks(3) {
        let b = [c[0], *c.get(1).unwrap_or(&0), *c.get(2).unwrap_or(&0)];
        let n = (u32::from(b[0]) << 16) | (u32::from(b[1]) << 8) | u32::from(b[2]);
        for (i, shift) in [18, 12, 6, 0].into_iter().enumerate() {
            if i <= c.len() {
                out.push(T[((n >> shift) & 63) as usize] as char);
            } else {
                out.push('=');
            }
        }
    }
    out
}

/// The WAV format of a player: 16-bit mono at the patch calibration, dither seeded by its
/// place on the page (the same bytes whether embedded or written beside the page).
pub fn player_spec(rate: f64, full_scale: f64, seed: u64) -> crate::signal::WavSpec {
    crate::signal::WavSpec {
        rate: rate.round() as u32,
        channels: 1,
        depth: crate::signal::Depth::Pcm16,
        full_scale,
        dither_seed: seed,
    }
}

/// A 16-bit WAV file of `samples` (volts) at the patch calibration, as bytes.
pub fn wav_bytes(samples: &[f64], rate: f64, full_scale: f64, seed: u64) -> Vec<u8> {
    use crate::signal::WavWriter;
    let spec = player_spec(rate, full_scale, seed);
    let cur = std::io::Cursor::new(Vec::new());
    let Ok(mut w) = WavWriter::new(cur, spec) else {
        return Vec::new();
    };
    if w.write(samples).is_err() {
        return Vec::new();
    }
    w.finish().map(|(c, _)| c.into_inner()).unwrap_or_default()
}

/// A render on the page: a label and its samples.
pub struct Player<'a> {
    /// Heading of the player.
    pub label: String,
    /// One line under it.
    pub note: String,
    /// Samples, volts.
    pub samples: &'a [f64],
    /// Fade at the edges of the embedded file (the figures come from the unfaded signal).
    pub fade: crate::signal::EdgeFade,
}

/// Largest total size of the audio a page embeds (the base64 text of every player's WAV),
/// bytes: above it the page links WAV files written beside it instead (issue 13: a light
/// page; embedded audio costs about 11.5 MB per minute of 48 kHz audio).
pub const EMBED_MAX_BYTES: usize = 5_000_000;

/// Size of the `data:` URIs that would embed every player (16-bit mono WAV, base64), bytes.
pub fn embedded_audio_bytes(players: &[Player]) -> usize {
    // header (at most 64 bytes for plain 16-bit PCM) plus two bytes a sample, in base64
    players
        .iter()
        .map(|p| 4 * (64 + 2 * p.samples.len()).div_ceil(3))
        .sum()
}

/// Where the page's players take their audio: `None` embeds every WAV in the page (small
/// pages); `Some(names)` links one WAV file per player, written beside the page under those
/// names (`listen-N-LABEL.wav`, N from 1 in player order), when embedding would take more
/// than [`EMBED_MAX_BYTES`].
pub fn linked_audio(players: &[Player]) -> Option<Vec<String>> {
    (embedded_audio_bytes(players) > EMBED_MAX_BYTES).then(|| {
        players
            .iter()
            .enumerate()
            .map(|(i, p)| {
                let stem: String = p
                    .label
                    .chars()
                    .map(|c| if c.is_ascii_alphanumeric() { c } else { '-' })
                    .collect();
                format!("listen-{}-{}.wav", i + 1, stem.trim_matches('-'))
            })
            .collect()
    })
}

/// The comment lines at the top of a patch file (its title and job), without the `#`.
pub fn header_comment(text: &str) -> Vec<String> {
    text.lines()
        .take_while(|l| l.trim_start().starts_with('#') || l.trim().is_empty())
        .filter_map(|l| l.trim_start().strip_prefix('#'))
        .map(|l| l.trim().to_string())
        .collect()
}

fn fmt_opt(v: Option<f64>, digits: usize) -> String {
    v.map_or("&ndash;".into(), |x| format!("{x:.digits$}"))
}

/// One table of figures on the page: a render's measurement, labelled with its side of an
/// A/B comparison (`"A (base)"`) or not.
#[derive(Debug, Clone, Copy)]
pub struct FigureTable<'a> {
    /// `None` for a single render; `Some(("A", "base"))` for a side and its variant.
    pub side: Option<(&'static str, &'a str)>,
    /// The figures.
    pub m: &'a Measurement,
}

/// The listening page: the figures of `main` (whose settings set the rate and calibration of
/// the players) and of `other` (side B of a comparison); `sections` are extra HTML blocks
/// (e.g. an A/B comparison). `linked` ([`linked_audio`]): the file names of the players'
/// WAVs beside the page, or `None` to embed them as `data:` URIs.
#[allow(clippy::too_many_arguments)]
pub fn page(
    patch: &Patch,
    patch_text: &str,
    main: FigureTable,
    other: Option<FigureTable>,
    figures: &[Figure],
    players: &[Player],
    linked: Option<&[String]>,
    sections: &[String],
) -> String {
    let m = main.m;
    let tables: Vec<FigureTable> = std::iter::once(main).chain(other).collect();
    let mut h = String::new();
    let title = escape(&patch.title);
    let _ = write!(
        h,
        "<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
<title>{title}</title>\n<style>\
body{{font-family:sans-serif;color:#222;max-width:1100px;margin:2em auto;padding:0 1em;line-height:1.4}}\
h1{{font-weight:600;border-bottom:2px solid #3d6a8a}}h2{{color:#3d6a8a;margin-top:2em}}\
table{{border-collapse:collapse;font-size:90%}}td,th{{border:1px solid #ccc;padding:3px 8px;text-align:right}}\
th{{background:#eef2f5}}td:first-child,th:first-child{{text-align:left}}\
.job{{color:#555;white-space:pre-line}}pre{{background:#f6f6f4;padding:1em;overflow:auto;font-size:85%}}\
.players{{display:flex;flex-wrap:wrap;gap:1em}}.player{{border:1px solid #ddd;padding:.6em;border-radius:4px}}\
figure{{margin:1em 0}}figure svg{{max-width:100%;height:auto}}.caution{{color:#8a4b2a}}\
</style></head>\n<body data-players=\"{}\">\n<h1>{title}</h1>\n",
        players.len()
    );
    let job = header_comment(patch_text);
    if !job.is_empty() {
        let _ = writeln!(h, "<p class=\"job\">{}</p>", escape(&job.join("\n")));
    }
    let _ = writeln!(
        h,
        "<p class=\"caution\">Start playback quietly: clipped and reversed renders are harsh.</p>"
    );
    // Players.
    let _ = writeln!(h, "<h2>Listen</h2>\n<div class=\"players\">");
    for (i, p) in players.iter().enumerate() {
        let src = match linked.and_then(|l| l.get(i)) {
            Some(name) => escape(name),
            None => {
                let wav = wav_bytes(
                    &p.fade.applied(p.samples),
                    m.settings.rate_hz,
                    m.settings.full_scale_v,
                    i as u64 + 1,
                );
                format!("data:audio/wav;base64,{}", base64(&wav))
            }
        };
        let _ = writeln!(
            h,
            "<div class=\"player\"><div><b>{}</b></div><div>{}</div>\
<audio controls preload=\"auto\" data-name=\"{}\" src=\"{src}\"></audio></div>",
            escape(&p.label),
            escape(&p.note),
            escape(&p.label),
        );
    }
    if linked.is_some() {
        let _ = writeln!(
            h,
            "<p class=\"note\">The players read the WAV files beside this page (keep them in \
the same folder).</p>"
        );
    }
    let _ = writeln!(h, "</div>");
    for s in sections {
        h.push_str(s);
        h.push('\n');
    }
    // Figures tables.
    for (ti, t) in tables.iter().enumerate() {
        let (heading, side) = match t.side {
            Some((sd, label)) => (format!("Figures: {sd} ({})", escape(label)), sd),
            None => ("Figures".to_string(), ""),
        };
        let id = if ti == 0 {
            "figures".to_string()
        } else {
            format!("figures-{}", side.to_lowercase())
        };
        let _ = writeln!(
            h,
            "<h2>{heading}</h2>\n<table id=\"{id}\" data-side=\"{side}\"><tr><th>output</th><th>peak V (circuit)</th><th>rms V (AC)</th>\
<th>headroom + dB</th><th>headroom &minus; dB</th><th>THD %</th><th>THD+N dB</th><th>SINAD dB</th><th>events</th></tr>"
        );
        for (name, r) in &t.m.outputs {
            figure_row(&mut h, name, r);
        }
        let _ = writeln!(h, "</table>");
    }
    let s = &m.settings;
    let _ = writeln!(
        h,
        "<p>{} Hz &times;{} oversampling, {:.2} s rendered, calibration {} V = 0 dBFS; \
THD over harmonics 2&ndash;10 re the fundamental; THD+N and SINAD re the whole signal in \
the band 20 Hz &ndash; 20 kHz (AES17: SINAD = &minus;THD+N); spectral captures start after \
a settle time of {:.3} s; peak is the op-amp's own output, headroom against its swing; \
0 dBu = 0.7746 V rms, 0 dBV = 1 V rms.</p>",
        s.rate_hz, s.oversample, s.length_s, s.full_scale_v, s.settle_s
    );
    // Plots.
    let _ = writeln!(h, "<h2>Plots</h2>");
    for f in figures {
        let _ = writeln!(
            h,
            "<figure class=\"plot\" data-output=\"{}\" data-kind=\"{}\"{}>{}</figure>",
            escape(&f.output),
            f.kind,
            f.side
                .map_or(String::new(), |sd| format!(" data-side=\"{sd}\"")),
            strip_xml_prolog(&f.svg)
        );
    }
    // The patch itself.
    let _ = writeln!(
        h,
        "<h2>The patch</h2>\n<pre id=\"patch\">{}</pre>",
        escape(patch_text)
    );
    // Mark players whose source loaded (for checking the page in a browser).
    h.push_str(
        "<script>\n(function(){var a=document.querySelectorAll('audio');\
function count(){var ok=0,bad=0;a.forEach(function(x){if(x.error){bad++;}else if(x.readyState>=1){ok++;}});\
document.body.setAttribute('data-audio-loaded',String(ok));\
document.body.setAttribute('data-audio-failed',String(bad));}\
a.forEach(function(x){x.addEventListener('loadedmetadata',count);x.addEventListener('error',count);});\
count();setInterval(count,200);})();\n</script>\n",
    );
    h.push_str("</body></html>\n");
    h
}

/// One row of a figures table.
fn figure_row(h: &mut String, name: &str, r: &crate::measure::OutputReport) {
    let f = &r.figures;
    let ev: Vec<String> = r
        .events
        .iter()
        .map(|(st, e)| {
            format!(
                "{st}: clip {:.3} s, slew {:.3} s, out of range {:.3} s, reversed {:.3} s",
                e.clip_s, e.slew_s, e.cm_out_s, e.reversed_s
            )
        })
        .collect();
    let _ = writeln!(
        h,
        "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td style=\"text-align:left\">{}</td></tr>",
        escape(name),
        fmt_opt(f.peak_v, 3),
        fmt_opt(f.rms_v, 3),
        fmt_opt(f.headroom_pos_db, 1),
        fmt_opt(f.headroom_neg_db, 1),
        fmt_opt(f.thd_percent, 4),
        fmt_opt(f.thdn_db, 1),
        fmt_opt(f.sinad_db, 1),
        escape(&ev.join("; "))
    );
}

fn strip_xml_prolog(svg: &str) -> &str {
    match svg.find("<svg") {
        Some(i) => &svg[i..],
        None => svg,
    }
}

/// The A/B block of the page: per output, the matching gain, the difference level, the key
/// of the alternating file, the figures side by side and the sentences for what moved.
pub fn comparison_section(
    results: &[crate::study::compare::OutputComparison],
    a: &str,
    b: &str,
) -> String {
    use crate::study::compare::Matching;
    let mut h = String::new();
    let _ = writeln!(h, "<h2>A/B: {} against {}</h2>", escape(a), escape(b));
    for c in results {
        let _ = writeln!(
            h,
            "<section class=\"comparison\" data-output=\"{}\"><h3>output {}</h3>",
            escape(&c.output),
            escape(&c.output)
        );
        let by = match c.matched_by {
            Matching::Rms => "RMS of the whole output",
            Matching::Loudness => "integrated loudness (ITU-R BS.1770-4)",
        };
        let _ = writeln!(
            h,
            "<p class=\"matching\">B matched to A by {by}: gain <b>{:+.2} dB</b>. {}</p>",
            c.gain_db,
            match c.difference_below_db {
                Some(d) =>
                    format!("The difference (A minus matched B) sits {d:.1} dB below the signal."),
                None =>
                    "The difference (A minus matched B) is silent: the two are identical.".into(),
            }
        );
        let key: Vec<String> = c
            .segments
            .iter()
            .map(|s| format!("{} {:.2}&ndash;{:.2} s", s.side.label(), s.start_s, s.end_s))
            .collect();
        let _ = writeln!(
            h,
            "<p class=\"key\">Alternating file: {}</p>",
            key.join(", ")
        );
        let _ = writeln!(
            h,
            "<table class=\"ab\"><tr><th>figure</th><th>A</th><th>B</th><th>B &minus; A</th><th>unit</th></tr>"
        );
        for r in &c.figures {
            let v = |x: Option<f64>| x.map_or("&ndash;".to_string(), |x| format!("{x:.4}"));
            let _ = writeln!(
                h,
                "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                r.figure,
                v(r.a),
                v(r.b),
                r.delta
                    .map_or("&ndash;".to_string(), |d| format!("{d:+.4}")),
                escape(r.unit)
            );
        }
        let _ = writeln!(h, "</table><ul class=\"changes\">");
        if c.changes.is_empty() {
            let _ = writeln!(h, "<li>no figure moved beyond its threshold</li>");
        }
        for s in &c.changes {
            let _ = writeln!(h, "<li>{}</li>", escape(s));
        }
        let _ = writeln!(h, "</ul></section>");
    }
    h
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A unity inverter (ideal part, +/-12 V rails) fed by `osc` through `pre`, a follower.
    fn chain() -> Patch {
        let text = r#"
[patch]
length = "0.2 s"
noise = false

[rails]
pos = "12 V"
neg = "-12 V"

[sources.osc]
wave = "sine"
freq = "1 kHz"
amp = "1 Vpk"

[stages.pre]
type = "non-inverting"
part = "ideal"
from = "osc"
r_fb = "10k"
r_g = "10k"

[stages.inv]
type = "inverting"
part = "ideal"
from = "pre"
r_in = "10k"
r_fb = "10k"

[outputs.out]
from = "inv"
"#;
        crate::patch::parse_str(text, "chain.toml", std::path::Path::new("."), &[]).unwrap()
    }

    // The transfer curve starts once the circuit follows the ramp: its first point already
    // lies on the stage's transfer function, here -2 x through the gain-of-two stage and the
    // unity inverter (op-amp textbook gains), clipped at the rails; no jump from rest at
    // the first sample.
    #[test]
    fn transfer_curve_starts_settled() {
        let p = chain();
        let (x, y) = transfer_run(&p, 0, 0).unwrap();
        assert!(
            (x[0] + 12.0).abs() < 0.01,
            "ramp from the lower rail: {}",
            x[0]
        );
        for k in [0usize, 1, 10, x.len() / 2, x.len() - 1] {
            let want = (-2.0 * x[k]).clamp(-12.0, 12.0);
            assert!(
                (y[k] - want).abs() < 0.05,
                "point {k}: {} at {}",
                y[k],
                x[k]
            );
        }
    }

    // The waveform plot's light trace is the driving stage's own input (`pre`), not the
    // source two stages up.
    #[test]
    fn waveform_input_is_the_stages_own_input() {
        let p = chain();
        assert_eq!(stage_input(&p, Node::Stage(1)), Some(Node::Stage(0)));
        assert_eq!(stage_input(&p, Node::Stage(0)), Some(Node::Source(0)));
        let figs = plots(&p, None).unwrap();
        let w = figs.iter().find(|f| f.kind == "waveform").unwrap();
        assert!(w.svg.contains("light: its input pre"), "{}", &w.svg[..400]);
    }
}
