//! Static checks of a validated patch: what a designer would work out on paper before
//! powering anything up.
//!
//! Nothing here runs the engine. Each node gets a worst-case voltage span by interval
//! arithmetic from its sources (every input at its peak, in phase: the "all inputs hot" case),
//! propagated through the ideal gain formulas of each stage:
//! - inverting summer: `Vout = ref - sum(Rf / (Ri + Rs_i) * (Vi - ref))` (op-amp textbooks),
//!   with `Rs_i` the Thevenin resistance of the node driving input `i`; an input with a
//!   coupling capacitor passes only the AC part of its span, around the reference (the
//!   capacitor settles at the source's DC level less the reference, so the DC level of the
//!   source never reaches the output);
//! - non-inverting: `Vout = ref + (1 + Rf/Rg) (Vin - ref)`; follower: `Vout = Vin`;
//! - attenuator: the unloaded divider `Rb / (Rs + Rtrack)` (downstream loading is left to the
//!   engine, which models it).
//!
//! Gains are mid-band gains. The band of each active stage: its upper -3 dB point from the
//! op-amp's loop (`GBW / NG`, NG the noise gain) together with a capacitor across the
//! feedback resistor (inverting: a pole at `1 / (2 pi Rf Cf)`; non-inverting: the gain
//! `1 + Zf / Rg` falls from `1 + Rf / Rg` towards 1, a pole at `1 / (2 pi Rf Cf)` and a zero at
//! `1 / (2 pi (Rf || Rg) Cf)`), found on the product of the two magnitude responses; its
//! lower -3 dB point from coupling capacitors (`1 / (2 pi (Ri + Rs_i) Ci)` into the virtual
//! ground; the highest of a summer's coupled inputs). First-order RC networks, textbook.
//!
//! Noise sources count as +/-4 sigma. WAV file sources count as +/- their full scale.
//! A stage's span is clipped to its swing limits before it feeds the next stage, as the circuit
//! would. The warnings are advisory: `check` still succeeds when it finds some.

use std::f64::consts::TAU;

use crate::model::{Node, Patch, StageKind, Wave};
use crate::parts::eseries::Series;
use crate::parts::taper;
use crate::parts::OpAmp;
use crate::units::{fmt_eng, fmt_resistance};

/// What a warning is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WarningKind {
    /// Worst-case output swing beyond the part's output swing limits.
    Clipping,
    /// An input leaves the part's common-mode range.
    CommonMode,
    /// Supply span above the part's rating.
    Supply,
    /// Output current into the load above the part's limit.
    Current,
    /// A resistor that is not a preferred (E24 / E96) value.
    NonStandard,
    /// Closed-loop bandwidth inside the audio band.
    Bandwidth,
    /// Peak slope above the slew rate.
    Slew,
    /// A rendered file at the default depth would not fit in a WAV file (4 GiB).
    FileSize,
}

/// One static warning.
#[derive(Debug, Clone, PartialEq)]
pub struct Warning {
    /// Category.
    pub kind: WarningKind,
    /// Dotted key path in the patch the warning is about.
    pub key: String,
    /// One-line explanation with the numbers.
    pub message: String,
}

/// Worst-case voltage span of a node.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Span {
    /// Lowest voltage, V.
    pub lo: f64,
    /// Highest voltage, V.
    pub hi: f64,
    /// Mean (DC) level, V.
    pub dc: f64,
    /// Largest rate of change, V/s.
    pub slope: f64,
}

impl Span {
    fn ac(self) -> Span {
        Span {
            lo: self.lo - self.dc,
            hi: self.hi - self.dc,
            dc: 0.0,
            slope: self.slope,
        }
    }
    /// `ref + g (x - ref)` for a gain `g` of either sign.
    fn gain(self, g: f64, reference: f64) -> Span {
        let a = reference + g * (self.lo - reference);
        let b = reference + g * (self.hi - reference);
        Span {
            lo: a.min(b),
            hi: a.max(b),
            dc: reference + g * (self.dc - reference),
            slope: self.slope * g.abs(),
        }
    }
}

/// Static summary of one stage.
#[derive(Debug, Clone, PartialEq)]
pub struct StageSummary {
    /// Stage name.
    pub name: String,
    /// Topology as written in the patch.
    pub kind: &'static str,
    /// Part name for active stages.
    pub part: Option<String>,
    /// Ideal small-signal gain from each input (one entry per input).
    pub gains: Vec<f64>,
    /// Noise gain `1 + Rf / (R1 || R2 || ...)` (active stages).
    pub noise_gain: Option<f64>,
    /// Upper -3 dB point, Hz (active stages): the loop's `GBW / NG` with any feedback
    /// capacitor's roll-off.
    pub bandwidth: Option<f64>,
    /// The loop's own -3 dB point `GBW / NG`, Hz (active stages).
    pub loop_bandwidth: Option<f64>,
    /// Lower -3 dB point from coupling capacitors, Hz (`None`: DC-coupled).
    pub low_corner: Option<f64>,
    /// Worst-case output span before clipping.
    pub span: Span,
    /// Output swing limits `(low, high)`, V (active stages), after any current limit.
    pub swing: Option<(f64, f64)>,
    /// Static resistive load on the output, ohm (active stages; `None` = unloaded).
    pub load: Option<f64>,
}

/// Result of [`check`].
#[derive(Debug, Clone, PartialEq)]
pub struct Report {
    /// One summary per stage, in topological order.
    pub stages: Vec<StageSummary>,
    /// Every warning found.
    pub warnings: Vec<Warning>,
}

/// Output swing limits of a part on the given rails, `(low, high)`.
pub fn swing_limits(part: &OpAmp, pos: f64, neg: f64) -> (f64, f64) {
    (neg + part.drop_neg, pos - part.drop_pos)
}

/// Static span of a source.
pub fn source_span(wave: &Wave, offset: f64, rate: f64) -> Span {
    let sym = |amp: f64, slope: f64| Span {
        lo: offset - amp.abs(),
        hi: offset + amp.abs(),
        dc: offset,
        slope,
    };
    let two_pi = 2.0 * std::f64::consts::PI;
    match wave {
        Wave::Sine { freq, amp, .. } => sym(*amp, two_pi * freq * amp.abs()),
        Wave::Triangle { freq, amp, .. } => sym(*amp, 4.0 * freq * amp.abs()),
        // A band-limited edge of height H rises at about H * rate (ideal low-pass step).
        Wave::Square { amp, .. } | Wave::Saw { amp, .. } | Wave::Pulse { amp, .. } => {
            sym(*amp, 2.0 * amp.abs() * rate)
        }
        Wave::Multitone { tones } => {
            let a: f64 = tones.iter().map(|t| t.amp.abs()).sum();
            let s: f64 = tones.iter().map(|t| two_pi * t.freq * t.amp.abs()).sum();
            sym(a, s)
        }
        Wave::Sweep { from, to, amp, .. } => sym(*amp, two_pi * from.max(*to) * amp.abs()),
        Wave::Noise { rms, .. } => sym(4.0 * rms, 4.0 * rms * rate),
        Wave::Dc { level } => Span {
            lo: offset + level,
            hi: offset + level,
            dc: offset + level,
            slope: 0.0,
        },
        Wave::Steps { levels, .. } => {
            let lo = levels
                .iter()
                .cloned()
                .fold(f64::INFINITY, f64::min)
                .min(0.0);
            let hi = levels
                .iter()
                .cloned()
                .fold(f64::NEG_INFINITY, f64::max)
                .max(0.0);
            let mean = if levels.is_empty() {
                0.0
            } else {
                levels.iter().sum::<f64>() / levels.len() as f64
            };
            Span {
                lo: offset + lo,
                hi: offset + hi,
                dc: offset + mean,
                slope: (hi - lo) * rate,
            }
        }
        Wave::Ramp { from, to, duration } => Span {
            lo: offset + from.min(*to).min(0.0),
            hi: offset + from.max(*to).max(0.0),
            dc: offset + 0.5 * (from + to),
            slope: (to - from).abs() / duration.max(1.0 / rate),
        },
        Wave::File { full_scale, .. } => sym(*full_scale, 2.0 * full_scale * rate),
    }
}

/// Run every static check on a patch.
pub fn check(patch: &Patch) -> Report {
    let n = patch.stages.len();
    let mut spans: Vec<Span> = Vec::with_capacity(n);
    let mut thevenin: Vec<f64> = Vec::with_capacity(n);
    let mut stages = Vec::with_capacity(n);
    let mut warnings = Vec::new();
    let (pos, neg) = (patch.rails.pos, patch.rails.neg);
    let loads = static_loads(patch);

    let src_spans: Vec<Span> = patch
        .sources
        .iter()
        .map(|s| source_span(&s.wave, s.offset, patch.rate))
        .collect();
    let span_of = |node: Node, spans: &Vec<Span>| match node {
        Node::Source(i) => src_spans[i],
        Node::Stage(i) => spans[i],
    };
    let rth_of = |node: Node, th: &Vec<f64>| match node {
        Node::Source(_) => 0.0,
        Node::Stage(i) => th[i],
    };

    // networks: the whole patch solved as one circuit (rest point, DC gains, largest gains
    // over the audio band) for the span of any node
    let net_nodes = if patch
        .stages
        .iter()
        .any(|s| matches!(s.kind, StageKind::Network(_)))
    {
        let band = crate::response::log_grid(10.0, 20e3, 25).unwrap_or_default();
        crate::response::node_gains(patch, &band).ok()
    } else {
        None
    };
    // each source's largest excursion from its rest level, and its largest slope
    let excursions: Vec<(f64, f64)> = match &net_nodes {
        Some(ng) => src_spans
            .iter()
            .zip(&ng.circuit.sources)
            .map(|(sp, &n)| {
                let d = ng.rest[n];
                ((sp.hi - d).abs().max((sp.lo - d).abs()), sp.slope)
            })
            .collect(),
        None => Vec::new(),
    };
    for (si, stage) in patch.stages.iter().enumerate() {
        let key = format!("stages.{}", stage.name);
        let mut gains = Vec::new();
        let mut noise_gain = None;
        let mut rth = 0.0;
        let mut cm_span: Option<Span> = None;
        let mut low_corner: Option<f64> = None;
        // |H(j w)|^2 of the feedback network relative to its mid-band gain
        let mut network: Option<Box<dyn Fn(f64) -> f64>> = None;
        let (kind, span) = match &stage.kind {
            StageKind::InvertingSum {
                inputs,
                feedback,
                reference,
                single,
            } => {
                let mut total = Span {
                    lo: *reference,
                    hi: *reference,
                    dc: *reference,
                    slope: 0.0,
                };
                let mut g_par = 0.0;
                for (k, inp) in inputs.iter().enumerate() {
                    let r = inp.r + rth_of(inp.from, &thevenin);
                    g_par += 1.0 / r;
                    let g = -feedback.r / r;
                    gains.push(g);
                    let s = span_of(inp.from, &spans);
                    let t = match inp.c {
                        // AC only, around the reference: the capacitor holds the DC
                        Some(c) => {
                            let fc = 1.0 / (std::f64::consts::TAU * r * c);
                            low_corner = Some(low_corner.map_or(fc, |l: f64| l.max(fc)));
                            let a = s.ac().gain(g, 0.0);
                            Span {
                                lo: reference + a.lo,
                                hi: reference + a.hi,
                                dc: *reference,
                                slope: a.slope,
                            }
                        }
                        None => s.gain(g, *reference),
                    };
                    total.lo += t.lo - reference;
                    total.hi += t.hi - reference;
                    total.dc += t.dc - reference;
                    total.slope += t.slope;
                    let rkey = if *single {
                        format!("{key}.r_in")
                    } else {
                        format!("{key}.inputs[{k}].r")
                    };
                    standard_value(&mut warnings, &rkey, inp.r);
                }
                if feedback.pot.is_none() {
                    let fkey = if *single {
                        format!("{key}.r_fb")
                    } else {
                        format!("{key}.feedback.r")
                    };
                    standard_value(&mut warnings, &fkey, feedback.r);
                }
                noise_gain = Some(1.0 + feedback.r * g_par);
                if let Some(c) = feedback.c {
                    let tau = feedback.r * c;
                    network = Some(Box::new(move |w: f64| 1.0 / (1.0 + (w * tau).powi(2))));
                }
                cm_span = Some(Span {
                    lo: *reference,
                    hi: *reference,
                    dc: *reference,
                    slope: 0.0,
                });
                (
                    if *single {
                        "inverting"
                    } else {
                        "inverting-sum"
                    },
                    total,
                )
            }
            StageKind::NonInverting {
                from,
                r_fb,
                c_fb,
                r_g,
                reference,
            } => {
                let g = 1.0 + r_fb / r_g;
                if let Some(c) = c_fb {
                    // 1 + Zf / Rg = G (1 + j w tz) / (1 + j w tp), relative to G
                    let tp = r_fb * c;
                    let tz = r_fb * r_g / (r_fb + r_g) * c;
                    network = Some(Box::new(move |w: f64| {
                        (1.0 + (w * tz).powi(2)) / (1.0 + (w * tp).powi(2))
                    }));
                }
                gains.push(g);
                noise_gain = Some(g);
                standard_value(&mut warnings, &format!("{key}.r_fb"), *r_fb);
                standard_value(&mut warnings, &format!("{key}.r_g"), *r_g);
                let s = span_of(*from, &spans);
                cm_span = Some(s);
                ("non-inverting", s.gain(g, *reference))
            }
            StageKind::Follower { from } => {
                gains.push(1.0);
                noise_gain = Some(1.0);
                let s = span_of(*from, &spans);
                cm_span = Some(s);
                ("follower", s)
            }
            StageKind::Attenuator {
                from,
                pot,
                taper: t,
                at,
            } => {
                let y = taper::fraction(*t, *at);
                let rs = rth_of(*from, &thevenin);
                let bottom = pot * y;
                let top = rs + pot * (1.0 - y);
                let ratio = bottom / (top + bottom);
                rth = if bottom <= 0.0 {
                    0.0
                } else {
                    top * bottom / (top + bottom)
                };
                gains.push(ratio);
                ("attenuator", span_of(*from, &spans).gain(ratio, 0.0))
            }
            StageKind::Network(_) => {
                // static gain from each source (the whole patch solved as one circuit at
                // 0 Hz; capacitors open, op-amps with their DC gain); the span is the rest
                // level plus each source's excursion through its largest gain over the band
                match &net_nodes {
                    Some(ng) => {
                        let node = ng.circuit.stages[si];
                        for d in &ng.dc {
                            if d[node].abs() >= 1e-9 {
                                gains.push(d[node]);
                            }
                        }
                        ("network", node_span(ng, &excursions, node))
                    }
                    None => (
                        "network",
                        Span {
                            lo: neg,
                            hi: pos,
                            dc: 0.0,
                            slope: 0.0,
                        },
                    ),
                }
            }
        };

        let mut out_span = span;
        let mut swing = None;
        let mut bandwidth = None;
        let mut loop_bandwidth = None;
        if let Some(part) = &stage.part {
            let (mut lo, mut hi) = swing_limits(part, pos, neg);
            if let (Some(isc), Some(load)) = (part.isc, loads[si]) {
                // The current limit narrows the window; when it leaves none (a part that
                // cannot swing below its drop into a tiny load), the window closes at the
                // nearer swing limit, as in the engine.
                let vmax = isc * load;
                hi = hi.min(vmax).max(lo);
                lo = lo.max(-vmax).min(hi);
                let peak = span.hi.max(-span.lo);
                if peak > vmax {
                    warnings.push(Warning {
                        kind: WarningKind::Current,
                        key: key.clone(),
                        message: format!(
                            "a {} peak into {} of total load draws {}, above the {} output limit of '{}'",
                            fmt_eng(peak, "V"),
                            fmt_resistance(load),
                            fmt_eng(peak / load, "A"),
                            fmt_eng(isc, "A"),
                            part.name
                        ),
                    });
                }
            }
            swing = Some((lo, hi));
            if span.hi > hi || span.lo < lo {
                // how far past the swing, measured from the swing's centre (single-supply
                // swings do not straddle 0 V)
                let mid = 0.5 * (lo + hi);
                let half = (0.5 * (hi - lo)).max(1e-12);
                let over = (span.hi - mid).max(mid - span.lo) / half;
                warnings.push(Warning {
                    kind: WarningKind::Clipping,
                    key: key.clone(),
                    message: format!(
                        "worst-case output {} .. {} (all inputs at their peaks) exceeds the swing {} .. {} of '{}'{}: expect clipping",
                        fmt_eng(span.lo, "V"),
                        fmt_eng(span.hi, "V"),
                        fmt_eng(lo, "V"),
                        fmt_eng(hi, "V"),
                        part.name,
                        excess_db(over)
                    ),
                });
            }
            out_span.lo = span.lo.clamp(lo, hi);
            out_span.hi = span.hi.clamp(lo, hi);
            if pos - neg > part.supply_max {
                warnings.push(Warning {
                    kind: WarningKind::Supply,
                    key: format!("{key}.part"),
                    message: format!(
                        "rails span {} but '{}' is rated for {} total supply",
                        fmt_eng(pos - neg, "V"),
                        part.name,
                        fmt_eng(part.supply_max, "V")
                    ),
                });
            }
            if let Some(cs) = cm_span {
                let cm_lo = part.cm_low.map(|d| neg + d);
                let cm_hi = part.cm_high.map(|d| pos - d);
                let below = cm_lo.filter(|l| cs.lo < *l);
                let above = cm_hi.filter(|h| cs.hi > *h);
                if below.is_some() || above.is_some() {
                    let what = if part.reversal {
                        "the output reverses phase while it is outside"
                    } else {
                        "the input stage clips while it is outside"
                    };
                    warnings.push(Warning {
                        kind: WarningKind::CommonMode,
                        key: key.clone(),
                        message: format!(
                            "input common-mode span {} .. {} leaves the range {} .. {} of '{}': {}",
                            fmt_eng(cs.lo, "V"),
                            fmt_eng(cs.hi, "V"),
                            cm_lo.map_or("rail".into(), |v| fmt_eng(v, "V")),
                            cm_hi.map_or("rail".into(), |v| fmt_eng(v, "V")),
                            part.name,
                            what
                        ),
                    });
                }
            }
            if let Some(ng) = noise_gain {
                let bw = part.gbw / ng;
                loop_bandwidth = Some(bw);
                bandwidth = Some(match &network {
                    Some(h2) => upper_corner(&|w: f64| h2(w) / (1.0 + (w / (TAU * bw)).powi(2))),
                    None => bw,
                });
                if bw < 20e3 {
                    warnings.push(Warning {
                        kind: WarningKind::Bandwidth,
                        key: key.clone(),
                        message: format!(
                            "closed-loop bandwidth GBW / noise gain = {} / {:.2} = {} is inside the audio band",
                            fmt_eng(part.gbw, "Hz"),
                            ng,
                            fmt_eng(bw, "Hz")
                        ),
                    });
                }
            }
            let slope = span.slope.min(f64::MAX);
            if slope > part.slew && slope.is_finite() {
                warnings.push(Warning {
                    kind: WarningKind::Slew,
                    key: key.clone(),
                    message: format!(
                        "peak output slope about {}/us exceeds the slew rate {}/us of '{}': expect slew limiting",
                        fmt_eng(slope * 1e-6, "V"),
                        fmt_eng(part.slew * 1e-6, "V"),
                        part.name
                    ),
                });
            }
        }
        if let (StageKind::Network(net), Some(ng)) = (&stage.kind, &net_nodes) {
            let w = network_checks(&key, si, net, ng, &excursions, &mut warnings);
            if let Some((lo, hi)) = w {
                swing = Some((lo, hi));
                out_span.lo = span.lo.clamp(lo, hi);
                out_span.hi = span.hi.clamp(lo, hi);
            }
        }
        stages.push(StageSummary {
            name: stage.name.clone(),
            kind,
            part: stage.part.as_ref().map(|p| p.name.clone()),
            gains,
            noise_gain,
            bandwidth,
            loop_bandwidth,
            low_corner,
            span,
            swing,
            load: if stage.part.is_some() {
                loads[si]
            } else {
                None
            },
        });
        spans.push(out_span);
        thevenin.push(rth);
    }
    for out in &patch.outputs {
        if out.series > 0.0 {
            standard_value(
                &mut warnings,
                &format!("outputs.{}.series", out.name),
                out.series,
            );
        }
    }
    // The patch accepts any length a 16-bit file holds; the default 24-bit render needs less.
    let spec = crate::signal::WavSpec {
        rate: patch.rate.round() as u32,
        channels: 1,
        depth: crate::signal::Depth::Pcm24,
        full_scale: patch.full_scale,
        dither_seed: 0,
    };
    if let Err(e) = crate::signal::check_fits("every output", &spec, patch.frames() as u64) {
        warnings.push(Warning {
            kind: WarningKind::FileSize,
            key: "patch.length".into(),
            message: format!("{e}; render with --depth 16"),
        });
    }
    Report { stages, warnings }
}

/// The frequency where a low-pass magnitude response `h2(w)` (`|H(j w)|^2` relative to its
/// value at DC, `w` in rad/s, falling with frequency) first reaches 1/2 (-3 dB), Hz: bisection
/// on a log scale between 1 mHz and 1 PHz (`f64::INFINITY` when it never does).
fn upper_corner(h2: &dyn Fn(f64) -> f64) -> f64 {
    let (mut lo, mut hi) = (1e-3f64.ln(), 1e15f64.ln());
    if h2(TAU * hi.exp()) > 0.5 {
        return f64::INFINITY;
    }
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if h2(TAU * mid.exp()) > 0.5 {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    (0.5 * (lo + hi)).exp()
}

/// Static resistive load on each stage's output (to roughly 0 V): its own feedback network,
/// every downstream summing resistor (into a virtual ground), attenuator track and output.
/// `None` where nothing loads the output.
pub fn static_loads(patch: &Patch) -> Vec<Option<f64>> {
    let mut g = vec![0.0f64; patch.stages.len()];
    for (i, stage) in patch.stages.iter().enumerate() {
        match &stage.kind {
            StageKind::InvertingSum {
                inputs, feedback, ..
            } => {
                g[i] += 1.0 / feedback.r;
                for inp in inputs {
                    if let Node::Stage(j) = inp.from {
                        g[j] += 1.0 / inp.r;
                    }
                }
            }
            StageKind::NonInverting { r_fb, r_g, .. } => g[i] += 1.0 / (r_fb + r_g),
            StageKind::Attenuator { from, pot, .. } => {
                if let Node::Stage(j) = from {
                    g[*j] += 1.0 / pot;
                }
            }
            StageKind::Follower { .. } => {}
            StageKind::Network(net) => {
                for p in &net.parts {
                    if let crate::model::NetPartKind::R(r) = p.kind {
                        for e in p.ends {
                            if let crate::model::NetNode::Ext(Node::Stage(j)) = e {
                                g[j] += 1.0 / r;
                            }
                        }
                    }
                }
            }
        }
    }
    for out in &patch.outputs {
        if let (Node::Stage(j), Some(load), None) = (out.from, out.load, out.inner) {
            g[j] += 1.0 / (out.series + load);
        }
    }
    g.into_iter()
        .map(|x| if x > 0.0 { Some(1.0 / x) } else { None })
        .collect()
}

/// Worst-case span of a node of the whole patch's circuit: its rest level plus every
/// source's excursion (`excursions[k]`: largest distance from its rest level, largest slope)
/// through the largest gain from that source over the band, all in phase.
fn node_span(ng: &crate::response::NodeGains, excursions: &[(f64, f64)], node: usize) -> Span {
    let rest = ng.rest[node];
    let mut dev = 0.0;
    let mut slope = 0.0;
    for (b, &(a, sl)) in ng.band.iter().zip(excursions) {
        dev += a * b[node];
        slope += sl * b[node];
    }
    Span {
        lo: rest - dev,
        hi: rest + dev,
        dc: rest,
        slope,
    }
}

/// The paper checks of every op-amp of network stage `si` (its worst-case output span
/// against its swing after the current limit into its static load, its input span against
/// its common-mode range, its own supply against the part's maximum, its slope against its
/// slew rate) and of its resistors' values. Returns the swing of the op-amp driving the
/// stage's output node, if one does. The span checks need the op-amp's small-signal gains
/// to hold up to its limits: an op-amp without negative feedback (a comparator, a Schmitt
/// trigger) or with a diode in its loop (a precision rectifier) gets the supply check only.
fn network_checks(
    key: &str,
    si: usize,
    net: &crate::model::Network,
    ng: &crate::response::NodeGains,
    excursions: &[(f64, f64)],
    warnings: &mut Vec<Warning>,
) -> Option<(f64, f64)> {
    let pc = &ng.circuit;
    let c = &pc.circuit;
    let held: Vec<usize> = c
        .amps
        .iter()
        .map(|a| a.out)
        .chain(c.amps.iter().map(|a| a.minus))
        .collect();
    let mut out_swing = None;
    for (j, a) in net.amps.iter().enumerate() {
        let Some(ca) = c.amps.get(pc.stage_amps[si].start + j) else {
            continue;
        };
        let akey = format!("{key}.amps[{j}]");
        let part = &a.part;
        let (pos, neg) = (a.rails.pos, a.rails.neg);
        let (mut lo, mut hi) = swing_limits(part, pos, neg);
        let linear = ng
            .amp_linear
            .get(pc.stage_amps[si].start + j)
            .copied()
            .unwrap_or(false);
        let span = node_span(ng, excursions, ca.out);
        let peak = span.hi.max(-span.lo);
        if let (Some(isc), true) = (part.isc, linear) {
            let g = c.load_conductance(ca.out, &held);
            if g > 0.0 && g.is_finite() {
                let vmax = isc / g;
                hi = hi.min(vmax).max(lo);
                lo = lo.max(-vmax).min(hi);
                if peak > vmax {
                    warnings.push(Warning {
                        kind: WarningKind::Current,
                        key: akey.clone(),
                        message: format!(
                            "op-amp '{}': a {} peak into {} of total load draws {}, above the {} output limit of '{}'",
                            a.name,
                            fmt_eng(peak, "V"),
                            fmt_resistance(1.0 / g),
                            fmt_eng(peak * g, "A"),
                            fmt_eng(isc, "A"),
                            part.name
                        ),
                    });
                }
            }
        }
        if linear && (span.hi > hi || span.lo < lo) {
            let mid = 0.5 * (lo + hi);
            let half = (0.5 * (hi - lo)).max(1e-12);
            let over = (span.hi - mid).max(mid - span.lo) / half;
            warnings.push(Warning {
                kind: WarningKind::Clipping,
                key: akey.clone(),
                message: format!(
                    "op-amp '{}': worst-case output {} .. {} (all inputs at their peaks, largest gain in the band) exceeds the swing {} .. {} of '{}'{}: expect clipping",
                    a.name,
                    fmt_eng(span.lo, "V"),
                    fmt_eng(span.hi, "V"),
                    fmt_eng(lo, "V"),
                    fmt_eng(hi, "V"),
                    part.name,
                    excess_db(over)
                ),
            });
        }
        if pos - neg > part.supply_max {
            warnings.push(Warning {
                kind: WarningKind::Supply,
                key: format!("{akey}.part"),
                message: format!(
                    "op-amp '{}': its supply spans {} but '{}' is rated for {} total supply",
                    a.name,
                    fmt_eng(pos - neg, "V"),
                    part.name,
                    fmt_eng(part.supply_max, "V")
                ),
            });
        }
        let cs = node_span(ng, excursions, ca.plus);
        let cm_lo = part.cm_low.map(|d| neg + d);
        let cm_hi = part.cm_high.map(|d| pos - d);
        if linear && (cm_lo.is_some_and(|l| cs.lo < l) || cm_hi.is_some_and(|h| cs.hi > h)) {
            let what = if part.reversal {
                "the output reverses phase while it is outside"
            } else {
                "the input stage clips while it is outside"
            };
            warnings.push(Warning {
                kind: WarningKind::CommonMode,
                key: akey.clone(),
                message: format!(
                    "op-amp '{}': input common-mode span {} .. {} leaves the range {} .. {} of '{}': {}",
                    a.name,
                    fmt_eng(cs.lo, "V"),
                    fmt_eng(cs.hi, "V"),
                    cm_lo.map_or("rail".into(), |v| fmt_eng(v, "V")),
                    cm_hi.map_or("rail".into(), |v| fmt_eng(v, "V")),
                    part.name,
                    what
                ),
            });
        }
        if linear && span.slope.is_finite() && span.slope > part.slew {
            warnings.push(Warning {
                kind: WarningKind::Slew,
                key: akey.clone(),
                message: format!(
                    "op-amp '{}': peak output slope about {}/us exceeds the slew rate {}/us of '{}': expect slew limiting",
                    a.name,
                    fmt_eng(span.slope * 1e-6, "V"),
                    fmt_eng(part.slew * 1e-6, "V"),
                    part.name
                ),
            });
        }
        if a.out == net.out {
            out_swing = Some((lo, hi));
        }
    }
    for (i, p) in net.parts.iter().enumerate() {
        if let crate::model::NetPartKind::R(r) = p.kind {
            standard_value(warnings, &format!("{key}.parts[{i}].r"), r);
        }
    }
    out_swing
}

fn standard_value(warnings: &mut Vec<Warning>, key: &str, r: f64) {
    if Series::E24.contains(r) || Series::E96.contains(r) {
        return;
    }
    warnings.push(Warning {
        kind: WarningKind::NonStandard,
        key: key.to_string(),
        message: format!(
            "{} is not an E24 or E96 value (IEC 60063); nearest E24 {}, nearest E96 {}",
            fmt_resistance(r),
            fmt_resistance(Series::E24.nearest(r)),
            fmt_resistance(Series::E96.nearest(r))
        ),
    });
}

/// `" by N dB"` for a worst-case span `over` times the half swing (nothing when it is not
/// past the swing or not finite): the clipping warnings' suffix.
fn excess_db(over: f64) -> String {
    if over.is_finite() && over > 1.0 {
        format!(" by {:.1} dB", 20.0 * over.log10())
    } else {
        String::new()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::*;
    use crate::parts::builtin;

    fn sine(name: &str, amp: f64) -> Source {
        Source {
            name: name.into(),
            wave: Wave::Sine {
                freq: 1000.0,
                amp,
                phase: 0.0,
            },
            offset: 0.0,
            start: 0.0,
            stop: None,
            envelope: None,
            r: 0.0,
        }
    }

    fn patch(sources: Vec<Source>, stages: Vec<Stage>) -> Patch {
        Patch {
            title: "t".into(),
            rate: 48e3,
            length: 1.0,
            oversample: 4,
            seed: 1,
            noise: false,
            temperature: 298.15,
            rails: Rails {
                pos: 12.0,
                neg: -12.0,
            },
            full_scale: 12.0,
            tolerances: Default::default(),
            outputs: vec![Output {
                name: "out".into(),
                from: Node::Stage(stages.len() - 1),
                inner: None,
                series: 1000.0,
                load: Some(100e3),
                file: None,
            }],
            sources,
            stages,
        }
    }

    fn summer(n: usize, part: &str, rin: f64, rf: f64) -> Stage {
        Stage {
            name: "sum".into(),
            part: builtin(part),
            kind: StageKind::InvertingSum {
                inputs: (0..n)
                    .map(|i| SumInput {
                        from: Node::Source(i),
                        r: rin,
                        c: None,
                    })
                    .collect(),
                feedback: Feedback {
                    r: rf,
                    c: None,
                    pot: None,
                },
                reference: 0.0,
                single: false,
            },
        }
    }

    // Summer gain -Rf/Ri per input (op-amp textbooks); four 5 Vpk inputs in phase make a
    // 20 V peak, beyond a 12 V rail minus a 1.5 V swing drop.
    #[test]
    fn four_hot_inputs_warn_of_clipping() {
        let srcs = (0..4).map(|i| sine(&format!("s{i}"), 5.0)).collect();
        let p = patch(srcs, vec![summer(4, "jfet-general", 100e3, 100e3)]);
        let r = check(&p);
        assert_eq!(r.stages[0].gains, vec![-1.0; 4]);
        assert!((r.stages[0].span.hi - 20.0).abs() < 1e-9);
        // noise gain 1 + Rf/(Ri/4) = 5 (textbook)
        assert!((r.stages[0].noise_gain.unwrap() - 5.0).abs() < 1e-12);
        assert!(r.warnings.iter().any(|w| w.kind == WarningKind::Clipping));
        // one quiet input does not clip
        let p = patch(
            vec![sine("a", 2.0)],
            vec![summer(1, "jfet-general", 100e3, 100e3)],
        );
        assert!(!check(&p)
            .warnings
            .iter()
            .any(|w| w.kind == WarningKind::Clipping));
    }

    // Common practice: JFET-input parts lose their input range ~4 V above V- (-8 V on +/-12 V).
    #[test]
    fn follower_below_common_mode_range_warns() {
        let st = Stage {
            name: "buf".into(),
            part: builtin("jfet-general"),
            kind: StageKind::Follower {
                from: Node::Source(0),
            },
        };
        let p = patch(vec![sine("a", 10.0)], vec![st.clone()]);
        let w = check(&p).warnings;
        assert!(w
            .iter()
            .any(|w| w.kind == WarningKind::CommonMode && w.message.contains("reverses")));
        let p = patch(vec![sine("a", 5.0)], vec![st]);
        assert!(!check(&p)
            .warnings
            .iter()
            .any(|w| w.kind == WarningKind::CommonMode));
    }

    // IEC 60063: 45k is in neither E24 nor E96; nearest E24 value is 47k.
    #[test]
    fn non_standard_resistor_named_with_nearest() {
        let p = patch(vec![sine("a", 1.0)], vec![summer(1, "ideal", 45e3, 100e3)]);
        let w = check(&p).warnings;
        let ns: Vec<_> = w
            .iter()
            .filter(|w| w.kind == WarningKind::NonStandard)
            .collect();
        assert_eq!(ns.len(), 1);
        assert_eq!(ns[0].key, "stages.sum.inputs[0].r");
    }

    #[test]
    fn low_voltage_part_on_twelve_volt_rails() {
        let p = patch(
            vec![sine("a", 1.0)],
            vec![summer(1, "rail-to-rail-cmos", 100e3, 100e3)],
        );
        assert!(check(&p)
            .warnings
            .iter()
            .any(|w| w.kind == WarningKind::Supply));
    }

    // Full-power bandwidth f = SR / (2 pi Vp) (textbook): 10 V peak at 1 kHz needs 62.8 mV/us,
    // far below 0.35 V/us; at 10 kHz with gain 10 it needs 6.3 V/us.
    #[test]
    fn slew_warning_follows_full_power_bandwidth() {
        let mut s = sine("a", 1.0);
        s.wave = Wave::Sine {
            freq: 10e3,
            amp: 1.0,
            phase: 0.0,
        };
        let p = patch(vec![s], vec![summer(1, "single-supply", 10e3, 100e3)]);
        assert!(check(&p)
            .warnings
            .iter()
            .any(|w| w.kind == WarningKind::Slew));
        let p = patch(
            vec![sine("a", 1.0)],
            vec![summer(1, "single-supply", 10e3, 100e3)],
        );
        assert!(!check(&p)
            .warnings
            .iter()
            .any(|w| w.kind == WarningKind::Slew));
    }

    fn inverting(part: &str, c_in: Option<f64>, rf: f64, cf: Option<f64>, reference: f64) -> Stage {
        Stage {
            name: "inv".into(),
            part: builtin(part),
            kind: StageKind::InvertingSum {
                inputs: vec![SumInput {
                    from: Node::Source(0),
                    r: 10e3,
                    c: c_in,
                }],
                feedback: Feedback {
                    r: rf,
                    c: cf,
                    pot: None,
                },
                reference,
                single: true,
            },
        }
    }

    // A capacitor across the feedback resistor: -Rf/Ri / (1 + j w Rf Cf), a pole at
    // 1 / (2 pi Rf Cf) = 1.59 kHz for 100k || 1n (first-order RC, textbook), cascaded with the
    // loop's own pole GBW / NG; the -3 dB point of two poles solves
    // (1 + (f/f1)^2)(1 + (f/f2)^2) = 2, a quadratic in f^2 [D]. The gain listed stays the
    // mid-band -Rf/Ri.
    #[test]
    fn feedback_capacitor_sets_the_bandwidth() {
        let p = patch(
            vec![sine("s", 0.1)],
            vec![inverting("jfet-general", None, 100e3, Some(1e-9), 0.0)],
        );
        let st = &check(&p).stages[0];
        let f1 = 1.0 / (TAU * 100e3 * 1e-9);
        let f2 = builtin("jfet-general").unwrap().gbw / 11.0;
        let (a, b) = (1.0 / (f1 * f1 * f2 * f2), 1.0 / (f1 * f1) + 1.0 / (f2 * f2));
        let want = ((-b + (b * b + 4.0 * a).sqrt()) / (2.0 * a)).sqrt();
        let got = st.bandwidth.unwrap();
        assert!((got / want - 1.0).abs() < 1e-6, "{got} vs {want}");
        assert!((got - 1591.5).abs() < 2.0, "{got}");
        assert!((st.loop_bandwidth.unwrap() - f2).abs() < 1e-6);
        assert_eq!(st.gains, vec![-10.0]);
        assert_eq!(st.low_corner, None);
    }

    // Non-inverting with Cf across Rf: 1 + Zf/Rg = G (1 + j w tz) / (1 + j w tp), tp = Rf Cf,
    // tz = (Rf || Rg) Cf; |H/G|^2 = 1/2 at w^2 = 1 / (tp^2 - 2 tz^2) (algebra on the
    // first-order network, textbook) [D]. Ideal part: the loop adds nothing.
    #[test]
    fn non_inverting_feedback_capacitor_closed_form() {
        let st = Stage {
            name: "ni".into(),
            part: builtin("ideal"),
            kind: StageKind::NonInverting {
                from: Node::Source(0),
                r_fb: 90e3,
                c_fb: Some(1e-9),
                r_g: 10e3,
                reference: 0.0,
            },
        };
        let p = patch(vec![sine("s", 0.1)], vec![st]);
        let got = check(&p).stages[0].bandwidth.unwrap();
        let (tp, tz): (f64, f64) = (90e3 * 1e-9, 9e3 * 1e-9);
        let want = (1.0 / (tp * tp - 2.0 * tz * tz)).sqrt() / TAU;
        assert!((got / want - 1.0).abs() < 1e-6, "{got} vs {want}");
    }

    // A capacitor-coupled input on a single supply: the capacitor holds the source's DC
    // (0 V) against the reference (4.5 V), so the output swings around the reference and
    // does not clip (10 x 0.3 Vpk = 3 Vpk around 4.5 V inside 0.05 .. 8.95 V); the same input
    // DC-coupled would sit 45 V away. Its corner is 1 / (2 pi R C) = 15.9 Hz for 10k and
    // 1 uF (first-order RC into a virtual ground, textbook) [D].
    #[test]
    fn coupled_input_settles_at_the_reference() {
        let mut p = patch(
            vec![sine("s", 0.3)],
            vec![inverting("rail-to-rail-cmos", Some(1e-6), 100e3, None, 4.5)],
        );
        p.rails = Rails { pos: 9.0, neg: 0.0 };
        let r = check(&p);
        assert!(
            !r.warnings.iter().any(|w| w.kind == WarningKind::Clipping),
            "{:?}",
            r.warnings
        );
        let st = &r.stages[0];
        assert!((st.span.lo - 1.5).abs() < 1e-9 && (st.span.hi - 7.5).abs() < 1e-9);
        let fc = 1.0 / (TAU * 10e3 * 1e-6);
        assert!((st.low_corner.unwrap() - fc).abs() < 1e-9);
        // DC-coupled: the reference sees the source's 0 V: clipping, by the right amount
        p.stages = vec![inverting("rail-to-rail-cmos", None, 100e3, None, 4.5)];
        let r = check(&p);
        assert!(r.warnings.iter().any(|w| w.kind == WarningKind::Clipping));
    }
}
