//! Compilation of a validated [`Patch`] into a flat [`Plan`].

use super::halfband;
use super::network::{NetInput, NetPlan};
use super::shaper::{Shaper, LOOKAHEAD};
use super::EngineError;
use crate::circuit::build::NetCircuit;
use crate::circuit::build::{network_circuit_loaded, reader_loads, shorthand_circuit, InputRef};
use crate::circuit::kernel::{split_groups, stage_form, Feed, StageForm};
use crate::circuit::step::CircuitState;
use crate::circuit::Amp;
use crate::model::{Envelope, NetNode, Node, Patch, Rails, StageKind, Wave};
use crate::parts::taper;
use crate::parts::OpAmp;

/// Internal samples per processing block.
pub const BLOCK: usize = 512;
/// Softness of the common-mode reversal factor `tanh(m / delta)`, V.
pub const CM_DELTA: f64 = 0.2;
/// How far beyond the knee the integrator state may go before it is held, V.
pub const STATE_MARGIN: f64 = 0.1;
/// Fast-path guard: largest |Vd| / Vov for which the linear recursion is accepted.
pub const FAST_VD: f64 = 0.005;

/// The compiled patch: plain data, printable, no strings in the hot path.
#[derive(Debug, Clone, PartialEq)]
pub struct Plan {
    /// Patch title.
    pub title: String,
    /// Base rate, Hz.
    pub rate: f64,
    /// Oversampling factor K.
    pub oversample: usize,
    /// Internal rate K * rate, Hz.
    pub internal_rate: f64,
    /// Internal samples per block.
    pub block: usize,
    /// Buffer index of every patch source is its index; op-amp stages follow.
    pub sources: Vec<SourcePlan>,
    /// Op-amp stages in processing order.
    pub stages: Vec<StagePlan>,
    /// Network stages.
    pub networks: Vec<NetPlan>,
    /// Processing order of the op-amp and network stages.
    pub order: Vec<StageStep>,
    /// Number of buffers (sources, op-amp and network stage outputs, exported inner nodes).
    pub buffers: usize,
    /// Passive stages (folded into the inputs that read them).
    pub passives: Vec<PassivePlan>,
    /// Outputs in patch order.
    pub outputs: Vec<OutputPlan>,
    /// Length (total taps) of every decimation stage, internal rate first.
    pub filter_lengths: Vec<usize>,
    /// Decimator group delay, internal samples.
    pub decimator_delay: usize,
    /// Largest node latency among the outputs ([`super::shaper::LOOKAHEAD`] samples per
    /// op-amp stage in the path, for the clipper's lookahead), internal samples.
    pub latency: usize,
    /// Internal samples generated before t = 0.
    pub preroll: usize,
    /// Base-rate frames computed and dropped at the start.
    pub discard: usize,
    /// Buffer history length (largest input delay), internal samples.
    pub history: usize,
    /// Band-limited clipper evaluation (on by default; off gives the naive clip for
    /// comparison).
    pub antialias: bool,
    /// Whether circuit noise is simulated (`patch.noise`); the densities are in the stage and
    /// output plans either way.
    pub noise: bool,
    /// Circuit temperature, K (thermal noise).
    pub temperature: f64,
}

/// One step of the processing order.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum StageStep {
    /// An op-amp stage (index into [`Plan::stages`]).
    Op(usize),
    /// A network stage (index into [`Plan::networks`]).
    Net(usize),
}

/// A planned source.
#[derive(Debug, Clone, PartialEq)]
pub struct SourcePlan {
    /// Source name.
    pub name: String,
    /// Waveform the built-in generator produces.
    pub wave: SourceWave,
    /// DC offset, V.
    pub offset: f64,
    /// Switch-on time, s.
    pub start: f64,
    /// Switch-off time, s.
    pub stop: Option<f64>,
    /// Envelope, if any.
    pub envelope: Option<Envelope>,
    /// Value before t = 0 (the DC component when the source is on from the start), V.
    pub rest: f64,
}

/// Waveforms the engine generates itself.
#[derive(Debug, Clone, PartialEq)]
pub enum SourceWave {
    /// Sum of sines: (frequency Hz, peak V, phase rad).
    Tones {
        /// The tones.
        tones: Vec<(f64, f64, f64)>,
    },
    /// Constant level.
    Dc {
        /// Level, V.
        level: f64,
    },
}

/// One input of the inverting node of a stage (through its resistor, optional capacitor).
#[derive(Debug, Clone, PartialEq)]
pub struct MinusInput {
    /// Buffer read.
    pub node: usize,
    /// Delay applied to that buffer, internal samples.
    pub delay: usize,
    /// Thevenin gain of the tap (attenuators on the way), 1 for a direct connection.
    pub gain: f64,
    /// Total series resistance: input resistor plus the tap's Thevenin resistance, ohm.
    pub r: f64,
    /// Series capacitor, F.
    pub cap: Option<f64>,
    /// Per-step decay of the capacitor's history `(2rC/h - 1) / (2rC/h + 1)` (its trapezoidal
    /// companion in series with `r`; 1 without one).
    pub decay: f64,
    /// Millman weight `G' / G_total` of this branch.
    pub mu: f64,
}

/// The non-inverting input when it is driven by a node.
#[derive(Debug, Clone, PartialEq)]
pub struct PlusInput {
    /// Buffer read.
    pub node: usize,
    /// Delay, internal samples.
    pub delay: usize,
    /// Tap gain.
    pub gain: f64,
    /// Tap Thevenin resistance (bias current flows through it), ohm.
    pub rth: f64,
}

/// Capacitor across the feedback resistor.
#[derive(Debug, Clone, PartialEq)]
pub struct FeedbackCap {
    /// Capacitance, F.
    pub c: f64,
    /// Trapezoidal companion conductance `2C/h`, S; the history `vf` steps as
    /// `vf <- 2 (v - V-) - vf`.
    pub g: f64,
    /// Millman weight of its history source.
    pub mu: f64,
}

/// One op-amp stage, compiled: `V+ = plus_const + gain * in`, `V- = minus_const + sum mu_i
/// (g_i s_i - vc_i) - mu_c vf + b v`, so `Vd = p - b v`.
#[derive(Debug, Clone, PartialEq)]
pub struct StagePlan {
    /// Stage name.
    pub name: String,
    /// Part (profile) name.
    pub part: String,
    /// Topology.
    pub topology: String,
    /// Buffer this stage writes.
    pub node: usize,
    /// Latency of that buffer relative to source time, internal samples.
    pub latency: usize,
    /// Inverting-node inputs.
    pub minus: Vec<MinusInput>,
    /// Non-inverting input (non-inverting amplifier, follower).
    pub plus: Option<PlusInput>,
    /// Constant part of V+: reference + vos (- ib * rth), V.
    pub plus_const: f64,
    /// Constant part of V-: (G_g ref - ib) / G_total, V.
    pub minus_const: f64,
    /// Coefficient of the output in V- (Millman), 0 < b <= 1.
    pub b: f64,
    /// Feedback capacitor.
    pub fb_cap: Option<FeedbackCap>,
    /// Gain-bandwidth product, Hz.
    pub gbw: f64,
    /// Slew rate, V/s.
    pub slew: f64,
    /// Vov = SR / (2 pi GBW), V.
    pub vov: f64,
    /// 1 / A0 (0: infinite DC gain).
    pub eps: f64,
    /// Linear recursion: `v = e v + a1 p[n] + a0 p[n-1]`.
    pub lin_e: f64,
    /// Linear recursion coefficient of `p[n]`.
    pub lin_a1: f64,
    /// Linear recursion coefficient of `p[n-1]`.
    pub lin_a0: f64,
    /// Output clipper (swing after the current limit).
    pub shaper: Shaper,
    /// Swing from the profile alone (before the current limit), V.
    pub swing: (f64, f64),
    /// Static load conductance on the output (feedback network, downstream inputs, output
    /// loads), S.
    pub load_g: f64,
    /// Integrator state limits, V.
    pub state_lo: f64,
    /// Integrator state upper limit, V.
    pub state_hi: f64,
    /// Input common-mode range (absolute volts), if limited.
    pub cm: Option<(f64, f64)>,
    /// Whether the part reverses phase outside the range.
    pub reversal: bool,
    /// Rest (steady) output state, V.
    pub rest_v: f64,
    /// Rest capacitor voltages of the minus inputs (0 where no capacitor), V.
    pub rest_vc: Vec<f64>,
    /// Rest voltage across the feedback capacitor, V.
    pub rest_vf: f64,
    /// Rest value of p, V.
    pub rest_p: f64,
    /// One-sided density of the combined white noise in `p` (all resistors' thermal noise
    /// through their Millman weights, `en`, current noise through the resistances it sees),
    /// V/sqrt(Hz).
    pub noise_white: f64,
    /// 1/f part of the voltage noise: density^2 = `noise_flicker^2 / f` (`en sqrt(fc)`), V.
    pub noise_flicker: f64,
    /// Seed of this stage's noise stream.
    pub noise_seed: u64,
}

/// A passive stage (attenuator), folded into the taps of its consumers.
#[derive(Debug, Clone, PartialEq)]
pub struct PassivePlan {
    /// Stage name.
    pub name: String,
    /// Track resistance, ohm.
    pub pot: f64,
    /// Fraction of the track below the wiper.
    pub fraction: f64,
}

/// An output.
#[derive(Debug, Clone, PartialEq)]
pub struct OutputPlan {
    /// Output name.
    pub name: String,
    /// Buffer read.
    pub node: usize,
    /// Alignment delay, internal samples.
    pub delay: usize,
    /// Overall gain from the buffer: tap gain times load / (series + Rth + load).
    pub gain: f64,
    /// Thevenin resistance of the tap, ohm.
    pub rth: f64,
    /// Rest value, V.
    pub rest: f64,
    /// One-sided density of the output's thermal noise: the series side (series resistor
    /// plus the tap's Thevenin resistance) in parallel with the load, V/sqrt(Hz).
    pub noise_density: f64,
    /// Seed of this output's noise stream.
    pub noise_seed: u64,
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Consumer {
    Input(usize, usize),
    Output(usize),
}

#[derive(Debug, Clone, Copy)]
struct Tap {
    base: usize,
    gain: f64,
    rth: f64,
}

struct Ctx<'a> {
    patch: &'a Patch,
    /// buffer index of every base node: sources then op stages; None for passive stages
    stage_buf: Vec<Option<usize>>,
    /// consumers of every patch stage node with their (approximate, to ~0 V) conductance
    loads: Vec<Vec<(Consumer, f64)>>,
    /// input resistance of each attenuator (track top plus bottom || its loads)
    att_rin: Vec<f64>,
    /// loads on networks' inner nodes read as `stage.node`: ((stage, local node), S)
    inner_loads: Vec<((usize, usize), f64)>,
}

fn check_node(patch: &Patch, node: Node, before: usize, who: &str) -> Result<(), EngineError> {
    let ok = match node {
        Node::Source(i) => i < patch.sources.len(),
        Node::Stage(i) => i < before,
    };
    if ok {
        Ok(())
    } else {
        Err(EngineError::BadNode {
            consumer: who.to_string(),
        })
    }
}

fn positive(v: f64, what: impl FnOnce() -> String) -> Result<f64, EngineError> {
    if v.is_finite() && v > 0.0 {
        Ok(v)
    } else {
        Err(EngineError::BadValue {
            what: what(),
            expected: "a finite value > 0",
        })
    }
}

impl Ctx<'_> {
    fn base_of(&self, node: Node) -> Option<usize> {
        match node {
            Node::Source(i) => Some(i),
            Node::Stage(i) => self.stage_buf[i],
        }
    }

    fn tap(&self, consumer: Consumer, node: Node) -> Tap {
        if let Some(base) = self.base_of(node) {
            let rth = match node {
                Node::Source(s) => self.patch.sources[s].r.max(0.0),
                Node::Stage(_) => 0.0,
            };
            return Tap {
                base,
                gain: 1.0,
                rth,
            };
        }
        let Node::Stage(a) = node else {
            unreachable!("sources are base nodes")
        };
        let StageKind::Attenuator {
            from,
            pot,
            taper: t,
            at,
        } = &self.patch.stages[a].kind
        else {
            unreachable!("non-base stages are attenuators")
        };
        let up = self.tap(Consumer::Input(a, 0), *from);
        let frac = taper::fraction(*t, *at);
        let r_top = pot * (1.0 - frac) + up.rth;
        let r_bot = pot * frac;
        let other: f64 = self.loads[a]
            .iter()
            .filter(|(c, _)| *c != consumer)
            .map(|(_, g)| g)
            .sum();
        let r_bot2 = if r_bot > 0.0 {
            1.0 / (1.0 / r_bot + other)
        } else {
            0.0
        };
        let sum = r_bot2 + r_top;
        let (gain, rth) = if sum > 0.0 {
            (r_bot2 / sum, r_bot2 * r_top / sum)
        } else {
            (0.0, 0.0)
        };
        Tap {
            base: up.base,
            gain: up.gain * gain,
            rth,
        }
    }
}

/// Static load the rest of the patch puts on stage `i`'s output (to about 0 V), S.
fn stage_load(ctx: &Ctx, i: usize) -> f64 {
    let mut load_g = 0.0;
    for (c, g) in &ctx.loads[i] {
        load_g += match c {
            Consumer::Input(j, _) => match ctx.patch.stages[*j].kind {
                StageKind::Attenuator { .. } => {
                    if ctx.att_rin[*j] > 0.0 {
                        1.0 / ctx.att_rin[*j]
                    } else {
                        0.0
                    }
                }
                _ => *g,
            },
            Consumer::Output(_) => *g,
        };
    }
    load_g
}

/// One op-amp stage for the stage kernel: a shorthand stage, or one op-amp group of a
/// network, with its reduced form.
struct Job<'p> {
    name: String,
    topology: &'static str,
    part: &'p OpAmp,
    amp: Amp,
    form: StageForm,
    /// (input node of the form's circuit, buffer, tap gain)
    feeds: Vec<(usize, usize, f64)>,
    buf: usize,
}

/// Compile network stage `i` into buffer `buf`.
#[allow(clippy::too_many_arguments)]
fn compile_network(
    ctx: &Ctx,
    i: usize,
    buf: usize,
    h: f64,
    export_buf: &[((usize, usize), usize)],
    node_lat: &mut [usize],
    rest_node: &mut [f64],
    history: &mut usize,
) -> Result<NetPlan, EngineError> {
    let patch = ctx.patch;
    let name = patch.stages[i].name.clone();
    let tap = |n: Node| {
        let t = ctx.tap(Consumer::Input(i, usize::MAX), n);
        (t.gain, t.rth)
    };
    let node_loads: Vec<(usize, f64)> = ctx
        .inner_loads
        .iter()
        .filter(|((s, _), _)| *s == i)
        .map(|&((_, l), g)| (l, g))
        .collect();
    let nc = network_circuit_loaded(patch, i, &tap, stage_load(ctx, i), &node_loads);
    let circ_err = |e: crate::circuit::plan::CircuitError| EngineError::Circuit {
        stage: name.clone(),
        message: e.to_string(),
    };
    let mut plan = crate::circuit::plan::compile(nc.circuit, h).map_err(circ_err)?;
    // circuit noise: every resistor's thermal noise, each op-amp's en (with its 1/f part)
    // and in, as extra inputs of its group's step (see `circuit::plan::GroupNoise`)
    if patch.noise {
        let four_kt = if patch.temperature.is_finite() && patch.temperature > 0.0 {
            4.0 * crate::budget::BOLTZMANN * patch.temperature
        } else {
            0.0
        };
        let nonneg = |x: f64| if x.is_finite() && x > 0.0 { x } else { 0.0 };
        let amps: Vec<crate::circuit::plan::AmpNoise> = match &patch.stages[i].kind {
            StageKind::Network(net) => net
                .amps
                .iter()
                .map(|a| crate::circuit::plan::AmpNoise {
                    en: nonneg(a.part.en),
                    fc: nonneg(a.part.en_corner),
                    inoise: nonneg(a.part.inoise),
                })
                .collect(),
            _ => Vec::new(),
        };
        crate::circuit::plan::add_noise(&mut plan, four_kt, &amps);
    }
    let mut inputs = Vec::new();
    let mut lat_in = 0;
    for &(cnode, r, gain) in &nc.inputs {
        let b = match r {
            InputRef::Node(n) => ctx.tap(Consumer::Input(i, usize::MAX), n).base,
            InputRef::Inner(s, l) => export_buf
                .iter()
                .find(|(k, _)| *k == (s, l))
                .map_or(0, |(_, b)| *b),
        };
        lat_in = lat_in.max(node_lat[b]);
        inputs.push(NetInput {
            cnode,
            buf: b,
            delay: 0,
            gain,
        });
    }
    let lat = LOOKAHEAD + lat_in;
    for inp in &mut inputs {
        inp.delay = lat - LOOKAHEAD - node_lat[inp.buf];
        *history = (*history).max(inp.delay);
    }
    node_lat[buf] = lat;
    let mut rest = CircuitState::new(&plan);
    for inp in &inputs {
        rest.vn[inp.cnode] = inp.gain * rest_node[inp.buf];
    }
    rest.rest(&plan).map_err(circ_err)?;
    let rest_out = match nc.out_amp {
        Some(a) => plan.circuit.amps[a].shaper.apply(rest.amp_state(&plan, a)),
        None => rest.vn[nc.out],
    };
    rest_node[buf] = rest_out;
    let mut exports = Vec::new();
    for &((s, l), b) in export_buf {
        if s == i {
            if let Some(&cn) = nc.locals.get(l) {
                exports.push((cn, b));
                node_lat[b] = lat;
                rest_node[b] = rest.vn[cn];
            }
        }
    }
    let noise_seed = super::noise::stream_seed(patch.seed, &format!("stages.{name}"), "circuit");
    let mut np = NetPlan {
        name,
        node: buf,
        latency: lat,
        inputs,
        out: nc.out,
        out_amp: nc.out_amp,
        exports,
        rest,
        rest_out,
        noise_seed,
        circuit: plan,
        kernels: Vec::new(),
        writes: Vec::new(),
        drive: None,
        knee: None,
        loopmap: None,
    };
    np.attach_kernels();
    Ok(np)
}

/// First-order-hold coefficients of the exact exponential step with rate `lam = k h c`:
/// returns (E, alpha1, alpha0) with E + alpha1 + alpha0 = 1.
#[inline]
pub fn foh(lam: f64) -> (f64, f64, f64) {
    let e = (-lam).exp();
    let r = if lam < 1e-9 {
        1.0 - 0.5 * lam
    } else {
        -(-lam).exp_m1() / lam
    };
    (e, 1.0 - r, r - e)
}

/// An op-amp's output and input limits on its rails.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AmpLimits {
    /// The profile's swing (rails less the drops), V.
    pub swing: (f64, f64),
    /// The output clipper: the swing narrowed by the current limit into the static load.
    pub shaper: Shaper,
    /// The input common-mode range, V (`None`: no limit).
    pub cm: Option<(f64, f64)>,
}

/// The limits of `part` on `rails` with its output loaded by `load_g` (S): the swing
/// (drops that cross leave a single point in the middle), narrowed to `isc / load_g` by the
/// current limit, with the knee at most a quarter of what is left; the input range from the
/// profile's distances to the rails. One definition for stage plans and circuit op-amps.
pub fn amp_limits(part: &OpAmp, rails: Rails, load_g: f64) -> AmpLimits {
    let mut lo = rails.neg + part.drop_neg.max(0.0);
    let mut hi = rails.pos - part.drop_pos.max(0.0);
    if hi < lo {
        let mid = 0.5 * (hi + lo);
        hi = mid;
        lo = mid;
    }
    let swing = (lo, hi);
    if let Some(isc) = part.isc {
        if isc.is_finite() && isc > 0.0 && load_g > 0.0 {
            let vmax = isc / load_g;
            hi = hi.min(vmax).max(lo);
            lo = lo.max(-vmax).min(hi);
        }
    }
    let w = part.knee.max(0.0).min(0.25 * (hi - lo));
    let cm = match (part.cm_low, part.cm_high) {
        (None, None) => None,
        (l, u) => Some((
            l.map_or(f64::NEG_INFINITY, |l| rails.neg + l),
            u.map_or(f64::INFINITY, |u| rails.pos - u),
        )),
    };
    AmpLimits {
        swing,
        shaper: Shaper { lo, hi, w },
        cm,
    }
}

/// Compile a validated patch.
pub fn compile(patch: &Patch) -> Result<Plan, EngineError> {
    let k = patch.oversample;
    if !matches!(k, 1 | 2 | 4 | 8 | 16) {
        return Err(EngineError::BadOversample { value: k });
    }
    if !(patch.rate.is_finite() && patch.rate > 0.0) {
        return Err(EngineError::BadValue {
            what: "patch.rate".into(),
            expected: "a finite rate > 0 Hz",
        });
    }
    if patch.rails.pos.partial_cmp(&patch.rails.neg) != Some(std::cmp::Ordering::Greater) {
        return Err(EngineError::BadValue {
            what: "rails".into(),
            expected: "rails.pos above rails.neg",
        });
    }
    let fs = patch.rate * k as f64;
    let h = 1.0 / fs;
    let ns = patch.sources.len();
    // 4 k T: thermal noise density^2 per ohm, V^2/(Hz ohm).
    let four_kt = if patch.temperature.is_finite() && patch.temperature > 0.0 {
        4.0 * crate::budget::BOLTZMANN * patch.temperature
    } else {
        0.0
    };

    // Sources.
    let mut sources = Vec::new();
    for s in &patch.sources {
        let wave = match &s.wave {
            Wave::Sine { freq, amp, phase } => SourceWave::Tones {
                tones: vec![(*freq, *amp, *phase)],
            },
            Wave::Multitone { tones } => SourceWave::Tones {
                tones: tones.iter().map(|t| (t.freq, t.amp, t.phase)).collect(),
            },
            Wave::Dc { level } => SourceWave::Dc { level: *level },
            other => {
                return Err(EngineError::UnsupportedWave {
                    source_name: s.name.clone(),
                    wave: wave_name(other),
                })
            }
        };
        let dc = match wave {
            SourceWave::Dc { level } => level + s.offset,
            SourceWave::Tones { .. } => s.offset,
        };
        let rest = if s.start <= 0.0 && s.envelope.is_none() {
            dc
        } else {
            0.0
        };
        sources.push(SourcePlan {
            name: s.name.clone(),
            wave,
            offset: s.offset,
            start: s.start,
            stop: s.stop,
            envelope: s.envelope,
            rest,
        });
    }

    // Validate references and assign buffers.
    let mut stage_buf = Vec::new();
    let mut next = ns;
    for (i, st) in patch.stages.iter().enumerate() {
        let who = format!("stage `{}`", st.name);
        match &st.kind {
            StageKind::InvertingSum {
                inputs, feedback, ..
            } => {
                if inputs.is_empty() {
                    return Err(EngineError::BadValue {
                        what: format!("{who} inputs"),
                        expected: "at least one input",
                    });
                }
                for (j, inp) in inputs.iter().enumerate() {
                    check_node(patch, inp.from, i, &who)?;
                    positive(inp.r, || format!("{who} inputs[{j}].r"))?;
                    if let Some(c) = inp.c {
                        positive(c, || format!("{who} inputs[{j}].c"))?;
                    }
                }
                positive(feedback.r, || format!("{who} feedback.r"))?;
                if let Some(c) = feedback.c {
                    positive(c, || format!("{who} feedback.c"))?;
                }
            }
            StageKind::NonInverting {
                from,
                r_fb,
                c_fb,
                r_g,
                ..
            } => {
                check_node(patch, *from, i, &who)?;
                positive(*r_fb, || format!("{who} r_fb"))?;
                positive(*r_g, || format!("{who} r_g"))?;
                if let Some(c) = c_fb {
                    positive(*c, || format!("{who} c_fb"))?;
                }
            }
            StageKind::Follower { from } => check_node(patch, *from, i, &who)?,
            StageKind::Network(net) => {
                for n in net.reads() {
                    check_node(patch, n, i, &who)?;
                }
            }
            StageKind::Attenuator { from, pot, .. } => {
                check_node(patch, *from, i, &who)?;
                positive(*pot, || format!("{who} pot"))?;
            }
        }
        if matches!(st.kind, StageKind::Attenuator { .. }) {
            stage_buf.push(None);
        } else if matches!(st.kind, StageKind::Network(_)) {
            stage_buf.push(Some(next));
            next += 1;
        } else {
            if st.part.is_none() {
                return Err(EngineError::MissingPart {
                    stage: st.name.clone(),
                });
            }
            stage_buf.push(Some(next));
            next += 1;
        }
    }
    for o in &patch.outputs {
        check_node(
            patch,
            o.from,
            patch.stages.len(),
            &format!("output `{}`", o.name),
        )?;
        if !(o.series.is_finite() && o.series >= 0.0) {
            return Err(EngineError::BadValue {
                what: format!("output `{}` series", o.name),
                expected: "a finite resistance >= 0",
            });
        }
        if let Some(l) = o.load {
            positive(l, || format!("output `{}` load", o.name))?;
        }
    }

    // Loads of every stage node, and attenuator input resistances (reverse order: consumers
    // come later).
    let n_st = patch.stages.len();
    let mut loads: Vec<Vec<(Consumer, f64)>> = vec![Vec::new(); n_st];
    let mut att_rin = vec![0.0; n_st];
    let mut inner_loads: Vec<((usize, usize), f64)> = Vec::new();
    for (o, out) in patch.outputs.iter().enumerate() {
        match (out.from, out.load, out.inner) {
            (Node::Stage(i), Some(l), None) => {
                loads[i].push((Consumer::Output(o), 1.0 / (out.series + l)));
            }
            (Node::Stage(i), Some(l), Some(k)) => {
                inner_loads.push(((i, k), 1.0 / (out.series + l)));
            }
            _ => {}
        }
    }
    for i in (0..n_st).rev() {
        let st = &patch.stages[i];
        match &st.kind {
            StageKind::InvertingSum { inputs, .. } => {
                for (j, inp) in inputs.iter().enumerate() {
                    if let Node::Stage(a) = inp.from {
                        loads[a].push((Consumer::Input(i, j), 1.0 / inp.r));
                    }
                }
            }
            StageKind::Attenuator {
                from,
                pot,
                taper: t,
                at,
            } => {
                let frac = taper::fraction(*t, *at);
                let g_loads: f64 = loads[i].iter().map(|(_, g)| g).sum();
                let r_bot = pot * frac;
                let bot = if r_bot > 0.0 {
                    1.0 / (1.0 / r_bot + g_loads)
                } else {
                    0.0
                };
                att_rin[i] = pot * (1.0 - frac) + bot;
                if let Node::Stage(a) = from {
                    if att_rin[i] > 0.0 {
                        loads[*a].push((Consumer::Input(i, 0), 1.0 / att_rin[i]));
                    }
                }
            }
            // whatever a network reads, it loads (its inputs into its circuit, op-amp
            // outputs and inverting inputs held at 0 V)
            StageKind::Network(_) => {
                for (r, g) in reader_loads(patch, i) {
                    if !(g.is_finite() && g > 0.0) {
                        continue;
                    }
                    match r {
                        InputRef::Node(Node::Stage(a)) => {
                            loads[a].push((Consumer::Input(i, usize::MAX), g));
                        }
                        InputRef::Inner(a, l) => inner_loads.push(((a, l), g)),
                        InputRef::Node(Node::Source(_)) => {}
                    }
                }
            }
            _ => {}
        }
    }
    let ctx = Ctx {
        patch,
        stage_buf,
        loads,
        att_rin,
        inner_loads,
    };

    // Inner nodes other networks read get buffers of their own.
    let mut export_buf: Vec<((usize, usize), usize)> = Vec::new();
    for st in &patch.stages {
        if let StageKind::Network(net) = &st.kind {
            let mut refs: Vec<NetNode> = Vec::new();
            for a in &net.amps {
                refs.push(a.plus);
                refs.push(a.minus);
            }
            for p in &net.parts {
                refs.extend_from_slice(&p.ends);
                if let crate::model::NetPartKind::Pot { wiper, .. } = &p.kind {
                    refs.push(*wiper);
                }
            }
            for r in refs {
                if let NetNode::Inner(s, l) = r {
                    if !export_buf.iter().any(|(k, _)| *k == (s, l)) {
                        export_buf.push(((s, l), next));
                        next += 1;
                    }
                }
            }
        }
    }
    // ... and inner nodes outputs read
    for out in &patch.outputs {
        if let (Node::Stage(s), Some(l)) = (out.from, out.inner) {
            if !export_buf.iter().any(|(k, _)| *k == (s, l)) {
                export_buf.push(((s, l), next));
                next += 1;
            }
        }
    }

    // Latencies of base nodes.
    let nb = next;
    let mut node_lat = vec![0usize; nb];
    let mut stages = Vec::new();
    let mut passives = Vec::new();
    let mut rest_node = vec![0.0; nb];
    for (i, s) in sources.iter().enumerate() {
        rest_node[i] = s.rest;
    }
    let mut history = 1;
    let mut networks = Vec::new();
    let mut order = Vec::new();
    for (i, st) in patch.stages.iter().enumerate() {
        // Kernel selection: every op-amp stage becomes a circuit; the stage kernel runs it
        // when it has the stage shape (`circuit::kernel`), the circuit group kernel
        // otherwise.
        let Some(buf) = ctx.stage_buf[i] else {
            if let StageKind::Attenuator {
                pot, taper: t, at, ..
            } = &st.kind
            {
                passives.push(PassivePlan {
                    name: st.name.clone(),
                    pot: *pot,
                    fraction: taper::fraction(*t, *at),
                });
            }
            continue;
        };
        // every input node of the stage's circuit: (buffer, tap gain)
        let feeds_of = |nc: &NetCircuit| -> Vec<(usize, usize, f64)> {
            nc.inputs
                .iter()
                .map(|&(cnode, r, gain)| {
                    let b = match r {
                        InputRef::Node(n) => ctx.tap(Consumer::Input(i, usize::MAX), n).base,
                        InputRef::Inner(s, l) => export_buf
                            .iter()
                            .find(|(k, _)| *k == (s, l))
                            .map_or(0, |(_, b)| *b),
                    };
                    (cnode, b, gain)
                })
                .collect()
        };
        let mut jobs: Vec<Job> = Vec::new();
        if let StageKind::Network(net) = &st.kind {
            let exported = export_buf.iter().any(|((s, _), _)| *s == i);
            let tap = |n: Node| {
                let t = ctx.tap(Consumer::Input(i, usize::MAX), n);
                (t.gain, t.rth)
            };
            let nc = (!exported)
                .then(|| network_circuit_loaded(patch, i, &tap, stage_load(&ctx, i), &[]))
                .filter(|nc| nc.out_amp.is_some());
            let pieces = nc.as_ref().and_then(|nc| split_groups(&nc.circuit, h));
            match (nc, pieces) {
                (Some(nc), Some(pieces)) => {
                    let outer = feeds_of(&nc);
                    // the op-amp driving `out` writes the stage's buffer; the others get
                    // buffers of their own
                    let mut amp_buf = vec![usize::MAX; nc.circuit.amps.len()];
                    for pc in &pieces {
                        amp_buf[pc.amp] = if Some(pc.amp) == nc.out_amp {
                            buf
                        } else {
                            node_lat.push(0);
                            rest_node.push(0.0);
                            node_lat.len() - 1
                        };
                    }
                    for pc in pieces {
                        let feeds = pc
                            .feeds
                            .iter()
                            .map(|&(k, f)| match f {
                                Feed::Input(n) => outer
                                    .iter()
                                    .find(|x| x.0 == n)
                                    .map_or((k, 0, 0.0), |x| (k, x.1, x.2)),
                                Feed::Amp(a) => (k, amp_buf[a], 1.0),
                            })
                            .collect();
                        let amp = pc.circuit.amps[0].clone();
                        jobs.push(Job {
                            name: amp.name.clone(),
                            topology: "network",
                            part: &net.amps[pc.amp].part,
                            amp,
                            form: pc.form,
                            feeds,
                            buf: amp_buf[pc.amp],
                        });
                    }
                }
                _ => {
                    let np = compile_network(
                        &ctx,
                        i,
                        buf,
                        h,
                        &export_buf,
                        &mut node_lat,
                        &mut rest_node,
                        &mut history,
                    )?;
                    order.push(StageStep::Net(networks.len()));
                    networks.push(np);
                    continue;
                }
            }
        } else {
            let part = st.part.as_ref().ok_or_else(|| EngineError::MissingPart {
                stage: st.name.clone(),
            })?;
            positive(part.gbw, || format!("part `{}` gbw", part.name))?;
            positive(part.slew, || format!("part `{}` slew", part.name))?;
            // The static load of the feedback network on the output (the inverting node
            // taken as a virtual ground).
            let (topology, g_fb_load) = match &st.kind {
                StageKind::InvertingSum {
                    feedback, single, ..
                } => (
                    if *single {
                        "inverting"
                    } else {
                        "inverting-sum"
                    },
                    1.0 / feedback.r,
                ),
                StageKind::NonInverting { r_fb, r_g, .. } => ("non-inverting", 1.0 / (r_fb + r_g)),
                _ => ("follower", 0.0),
            };
            let mut load_g = g_fb_load;
            for (c, g) in &ctx.loads[i] {
                load_g += match c {
                    Consumer::Input(j, _) => match patch.stages[*j].kind {
                        StageKind::Attenuator { .. } => {
                            if ctx.att_rin[*j] > 0.0 {
                                1.0 / ctx.att_rin[*j]
                            } else {
                                0.0
                            }
                        }
                        _ => *g,
                    },
                    Consumer::Output(_) => *g,
                };
            }
            let amp = Amp::new(&st.name, part, patch.rails, load_g);
            let tap = |j: usize, n: Node| {
                let t = ctx.tap(Consumer::Input(i, j), n);
                (t.gain, t.rth)
            };
            let nc = shorthand_circuit(patch, i, &tap, amp);
            let form = stage_form(&nc.circuit, h).ok_or_else(|| EngineError::Circuit {
                stage: st.name.clone(),
                message: "the stage's circuit does not reduce to one op-amp stage".into(),
            })?;
            jobs.push(Job {
                name: st.name.clone(),
                topology,
                part,
                amp: nc.circuit.amps[form.amp].clone(),
                feeds: feeds_of(&nc),
                form,
                buf,
            });
        }
        for job in jobs {
            let Job {
                name,
                topology,
                part,
                amp,
                form,
                feeds,
                buf,
            } = job;
            let feed_of = |cnode: usize| -> (usize, f64) {
                feeds
                    .iter()
                    .find(|x| x.0 == cnode)
                    .map_or((0, 0.0), |x| (x.1, x.2))
            };
            let (gbw, slew, vov, eps, load_g) = (amp.gbw, amp.slew, amp.vov, amp.eps, amp.load_g);
            let kgain = std::f64::consts::TAU * gbw;
            let nonneg = |x: f64| if x.is_finite() && x > 0.0 { x } else { 0.0 };
            let (en, fc, inoise) = (nonneg(part.en), nonneg(part.en_corner), nonneg(part.inoise));
            let mut taps = Vec::new();
            let mut minus = Vec::new();
            for br in &form.minus {
                let (node, gain) = feed_of(br.node);
                taps.push(node);
                minus.push(MinusInput {
                    node,
                    delay: 0,
                    gain,
                    r: br.r,
                    cap: br.cap,
                    decay: br.decay,
                    mu: br.mu,
                });
            }
            let mut plus = None;
            let mut vp_rest = form.plus_const;
            if let Some((cnode, w)) = form.plus {
                let (node, gain) = feed_of(cnode);
                taps.push(node);
                vp_rest += w * gain * rest_node[node];
                plus = Some(PlusInput {
                    node,
                    delay: 0,
                    gain: w * gain,
                    rth: form.plus_rth,
                });
            }
            let (plus_const, minus_const, b) = (form.plus_const, form.minus_const, form.b);
            let fb_cap = form.fb_cap.map(|(c, g, mu)| FeedbackCap { c, g, mu });
            // DC (caps open) for the rest state: V- = a_dc + beta_dc v.
            let a_dc = form.dc_const
                + form
                    .dc_minus
                    .iter()
                    .map(|&(cnode, w)| {
                        let (node, gain) = feed_of(cnode);
                        w * gain * rest_node[node]
                    })
                    .sum::<f64>();
            let beta_dc = form.dc_b;
            // White noise power densities at V+ and V- (V^2/Hz): every resistor through its
            // transfer, en at V+, the current noise through the resistance each input sees.
            let n_plus = en * en + four_kt * form.noise_plus_r + (inoise * form.plus_rth).powi(2);
            let n_minus = four_kt * form.noise_minus_r + (inoise * form.z_minus).powi(2);
            let (swing, shaper, cm, reversal) = (amp.swing, amp.shaper, amp.cm, amp.reversal);
            let Shaper { lo, hi, w } = shaper;

            // Rest state.
            let vp_eff = match cm {
                Some((cl, ch)) if !reversal => vp_rest.clamp(cl, ch.max(cl)),
                _ => vp_rest,
            };
            let v_lin = (vp_eff - a_dc) / (beta_dc + eps);
            let rest_v = if v_lin.is_finite() {
                v_lin.clamp(lo, hi)
            } else {
                0.0
            };
            let vminus = a_dc + beta_dc * rest_v;
            let rest_vc: Vec<f64> = minus
                .iter()
                .map(|m| {
                    if m.cap.is_some() {
                        m.gain * rest_node[m.node] - vminus
                    } else {
                        0.0
                    }
                })
                .collect();
            let rest_vf = if fb_cap.is_some() {
                rest_v - vminus
            } else {
                0.0
            };
            let mrest = minus_const
                + minus
                    .iter()
                    .zip(&rest_vc)
                    .map(|(m, vc)| m.mu * (m.gain * rest_node[m.node] - vc))
                    .sum::<f64>()
                - fb_cap.as_ref().map_or(0.0, |f| f.mu * rest_vf);
            let rest_p = vp_eff - mrest;
            rest_node[buf] = shaper.apply(rest_v);

            let lat = LOOKAHEAD + taps.iter().map(|&t| node_lat[t]).max().unwrap_or(0);
            node_lat[buf] = lat;
            for m in &mut minus {
                m.delay = lat - LOOKAHEAD - node_lat[m.node];
                history = history.max(m.delay);
            }
            if let Some(p) = &mut plus {
                p.delay = lat - LOOKAHEAD - node_lat[p.node];
                history = history.max(p.delay);
            }
            let (e, a1, a0) = foh(kgain * h * (b + eps));
            order.push(StageStep::Op(stages.len()));
            stages.push(StagePlan {
                part: part.name.clone(),
                topology: topology.to_string(),
                node: buf,
                latency: lat,
                minus,
                plus,
                plus_const,
                minus_const,
                b,
                fb_cap,
                gbw,
                slew,
                vov,
                eps,
                lin_e: e,
                lin_a1: a1 / (b + eps),
                lin_a0: a0 / (b + eps),
                shaper,
                swing,
                load_g,
                state_lo: lo - w - STATE_MARGIN,
                state_hi: hi + w + STATE_MARGIN,
                cm,
                reversal,
                rest_v,
                rest_vc,
                rest_vf,
                rest_p,
                noise_white: (n_plus + n_minus).sqrt(),
                noise_flicker: en * fc.sqrt(),
                noise_seed: super::noise::stream_seed(patch.seed, &format!("stages.{name}"), "vd"),
                name,
            });
        }
    }

    // Outputs.
    let mut outputs = Vec::new();
    let mut latency = 0;
    let mut taps = Vec::new();
    for (o, out) in patch.outputs.iter().enumerate() {
        let mut t = ctx.tap(Consumer::Output(o), out.from);
        if let (Node::Stage(s), Some(l)) = (out.from, out.inner) {
            // an inner node: its own buffer, the output's load already in the circuit
            if let Some(&(_, b)) = export_buf.iter().find(|(k, _)| *k == (s, l)) {
                t = Tap {
                    base: b,
                    gain: 1.0,
                    rth: 0.0,
                };
            }
        }
        latency = latency.max(node_lat[t.base]);
        taps.push(t);
    }
    for (out, t) in patch.outputs.iter().zip(&taps) {
        let div = match out.load {
            Some(l) => l / (out.series + t.rth + l),
            None => 1.0,
        };
        let rs = (out.series + t.rth).max(0.0);
        let r_out = match out.load {
            Some(l) if l > 0.0 && rs > 0.0 => rs * l / (rs + l),
            Some(_) => 0.0,
            None => rs,
        };
        let delay = latency - node_lat[t.base];
        history = history.max(delay);
        outputs.push(OutputPlan {
            name: out.name.clone(),
            node: t.base,
            delay,
            gain: t.gain * div,
            rth: t.rth,
            rest: t.gain * div * rest_node[t.base],
            noise_density: (four_kt * r_out).sqrt(),
            noise_seed: super::noise::stream_seed(
                patch.seed,
                &format!("outputs.{}", out.name),
                "thermal",
            ),
        });
    }

    let chain = halfband::chain(k);
    let filter_lengths: Vec<usize> = chain.iter().map(|t| 4 * t.len() - 1).collect();
    let mut gdelay = 0;
    let mut step = 1;
    for t in &chain {
        gdelay += (2 * t.len() - 1) * step;
        step *= 2;
    }
    let total = gdelay + latency;
    let discard = total.div_ceil(k);
    let preroll = discard * k - total;
    Ok(Plan {
        title: patch.title.clone(),
        rate: patch.rate,
        oversample: k,
        internal_rate: fs,
        block: BLOCK,
        sources,
        stages,
        networks,
        order,
        buffers: node_lat.len(),
        passives,
        outputs,
        filter_lengths,
        decimator_delay: gdelay,
        latency,
        preroll,
        discard,
        history,
        antialias: true,
        noise: patch.noise,
        temperature: patch.temperature,
    })
}

fn wave_name(w: &Wave) -> &'static str {
    match w {
        Wave::Sine { .. } => "sine",
        Wave::Square { .. } => "square",
        Wave::Triangle { .. } => "triangle",
        Wave::Saw { .. } => "saw",
        Wave::Pulse { .. } => "pulse",
        Wave::Multitone { .. } => "multitone",
        Wave::Sweep { .. } => "sweep",
        Wave::Noise { .. } => "noise",
        Wave::Dc { .. } => "dc",
        Wave::Steps { .. } => "steps",
        Wave::Ramp { .. } => "ramp",
        Wave::File { .. } => "file",
    }
}

impl std::fmt::Display for Plan {
    /// A compact, human-readable summary: rates, stage order and coefficients, limits,
    /// latencies and filter lengths.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        writeln!(
            f,
            "plan `{}`: rate {} Hz, oversample {} (internal {} Hz), block {}",
            self.title, self.rate, self.oversample, self.internal_rate, self.block
        )?;
        let node_name = |n: usize| -> String {
            if n < self.sources.len() {
                format!("source `{}`", self.sources[n].name)
            } else {
                self.stages
                    .iter()
                    .find(|s| s.node == n)
                    .map_or_else(|| format!("node {n}"), |s| format!("stage `{}`", s.name))
            }
        };
        for (i, s) in self.sources.iter().enumerate() {
            let wave = match &s.wave {
                SourceWave::Tones { tones } => tones
                    .iter()
                    .map(|(fr, a, _)| format!("{fr} Hz {a} V"))
                    .collect::<Vec<_>>()
                    .join(" + "),
                SourceWave::Dc { level } => format!("dc {level} V"),
            };
            writeln!(
                f,
                "  source {i} `{}`: {wave}, offset {} V, start {} s",
                s.name, s.offset, s.start
            )?;
        }
        for (i, s) in self.stages.iter().enumerate() {
            writeln!(
                f,
                "  stage {i} `{}` ({}, part {}): Vd = p - {:.6} v, latency {}",
                s.name, s.topology, s.part, s.b, s.latency
            )?;
            for m in &s.minus {
                writeln!(
                    f,
                    "    V- input {}: weight {:.6}, tap gain {:.6}, R {:.1} ohm{}, delay {}",
                    node_name(m.node),
                    m.mu,
                    m.gain,
                    m.r,
                    m.cap.map_or(String::new(), |c| format!(", C {c:e} F")),
                    m.delay
                )?;
            }
            if let Some(p) = &s.plus {
                writeln!(
                    f,
                    "    V+ input {}: tap gain {:.6}, Rth {:.1} ohm, delay {}",
                    node_name(p.node),
                    p.gain,
                    p.rth,
                    p.delay
                )?;
            }
            writeln!(
                f,
                "    swing [{:.4}, {:.4}] V (profile [{:.4}, {:.4}]), knee {} V, load {:.3e} S",
                s.shaper.lo, s.shaper.hi, s.swing.0, s.swing.1, s.shaper.w, s.load_g
            )?;
            if let Some((lo, hi)) = s.cm {
                writeln!(
                    f,
                    "    input range [{lo}, {hi}] V{}",
                    if s.reversal { ", reverses" } else { "" }
                )?;
            }
            writeln!(
                f,
                "    GBW {:e} Hz, SR {:e} V/s, Vov {:.4} V, recursion e {:.3e}",
                s.gbw, s.slew, s.vov, s.lin_e
            )?;
        }
        for o in &self.outputs {
            writeln!(
                f,
                "  output `{}` <- {} x {:.6} (Rth {:.1} ohm), delay {}",
                o.name,
                node_name(o.node),
                o.gain,
                o.rth,
                o.delay
            )?;
        }
        if self.noise {
            writeln!(f, "  noise at {} K:", self.temperature)?;
            for s in &self.stages {
                writeln!(
                    f,
                    "    stage `{}`: white {:.3} nV/rtHz in Vd, 1/f {:.3} nV/rtHz at 1 Hz",
                    s.name,
                    s.noise_white * 1e9,
                    s.noise_flicker * 1e9
                )?;
            }
            for o in &self.outputs {
                writeln!(
                    f,
                    "    output `{}`: thermal {:.3} nV/rtHz",
                    o.name,
                    o.noise_density * 1e9
                )?;
            }
        }
        write!(
            f,
            "  decimator {:?} taps, delay {} + latency {} internal samples; pre-roll {}, \
             {} frames dropped",
            self.filter_lengths, self.decimator_delay, self.latency, self.preroll, self.discard
        )
    }
}
