//! The validated patch: typed values in SI units, names resolved to indices, stages in
//! topological order.
//!
//! This is the contract between [`crate::patch`] (which builds it from TOML and checks it) and
//! [`crate::engine`] (which compiles and runs it). Nothing below `patch` sees TOML or raw
//! strings; every value here is already in volts, ohms, farads, hertz, seconds or kelvin.
//!
//! Invariants that [`crate::patch`] guarantees and the engine may rely on:
//! - `rate > 0`, `length > 0`, `oversample` is one of 1, 2, 4, 8, 16;
//! - `rails.pos > rails.neg`;
//! - every [`Node`] index is in range, and a stage refers only to sources or to stages that
//!   come *earlier* in [`Patch::stages`] (no cycles);
//! - every resistance is finite and `> 0`, every capacitance finite and `> 0` when present;
//! - op-amp stages carry `Some(part)`, passive stages `None`.

use crate::parts::{Diode, OpAmp};

/// A complete, validated patch.
#[derive(Debug, Clone, PartialEq)]
pub struct Patch {
    /// Human-readable title (defaults to the file stem).
    pub title: String,
    /// Base (file) sample rate in Hz.
    pub rate: f64,
    /// Render length in seconds.
    pub length: f64,
    /// Oversampling factor for the stages: 1, 2, 4, 8 or 16.
    pub oversample: usize,
    /// Seed for every pseudo-random process (noise sources, tolerance runs).
    pub seed: u64,
    /// Whether circuit noise (resistor thermal noise, op-amp noise) is simulated.
    pub noise: bool,
    /// Circuit temperature in kelvin (for thermal noise).
    pub temperature: f64,
    /// Supply rails.
    pub rails: Rails,
    /// Render calibration: the voltage that maps to digital full scale in WAV files, V peak.
    /// Default: the larger rail magnitude, so a rail-to-rail swing never clips the file.
    pub full_scale: f64,
    /// Signal sources, in file order.
    pub sources: Vec<Source>,
    /// Stages in topological order.
    pub stages: Vec<Stage>,
    /// Outputs (what gets rendered and measured), in file order.
    pub outputs: Vec<Output>,
    /// Component tolerances for tolerance studies.
    pub tolerances: Tolerances,
}

/// Component tolerances (fractions, 0.01 = 1 %) for tolerance studies: patch-level defaults
/// and per-stage overrides. `None`: not stated (the study's own default applies).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Tolerances {
    /// Default for every resistor (`[patch] tolerance`).
    pub resistor: Option<f64>,
    /// Default for every capacitor (`[patch] cap_tolerance`).
    pub capacitor: Option<f64>,
    /// Per-stage overrides (`[stages.NAME] tolerance` / `cap_tolerance`): (stage name,
    /// resistor, capacitor).
    pub stages: Vec<(String, Option<f64>, Option<f64>)>,
}

/// Supply rails in volts.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Rails {
    /// Positive rail, V.
    pub pos: f64,
    /// Negative rail, V (may be 0 for a single supply).
    pub neg: f64,
}

/// A reference to a signal node: a source or the output of a stage.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Node {
    /// Index into [`Patch::sources`].
    Source(usize),
    /// Index into [`Patch::stages`].
    Stage(usize),
}

/// A signal source: a voltage source with an optional output resistance.
#[derive(Debug, Clone, PartialEq)]
pub struct Source {
    /// Name from the patch (`[sources.NAME]`).
    pub name: String,
    /// The waveform.
    pub wave: Wave,
    /// DC offset added to the waveform, V.
    pub offset: f64,
    /// Time the source switches on, s (silent before).
    pub start: f64,
    /// Time the source switches off, s (`None`: never).
    pub stop: Option<f64>,
    /// Optional gating envelope.
    pub envelope: Option<Envelope>,
    /// Output resistance, ohm (0: an ideal source). Whatever reads the source sees it in
    /// series.
    pub r: f64,
}

/// Source waveforms. Levels are peak volts unless stated (the patch layer converts Vpp, Vrms,
/// dBu and dBV to these using the waveform's own crest factor).
#[derive(Debug, Clone, PartialEq)]
pub enum Wave {
    /// `amp * sin(2 pi freq t + phase)`.
    Sine {
        /// Frequency, Hz.
        freq: f64,
        /// Peak amplitude, V.
        amp: f64,
        /// Start phase, radians.
        phase: f64,
    },
    /// Square wave (+amp / -amp), 50 % duty.
    Square {
        /// Frequency, Hz.
        freq: f64,
        /// Peak amplitude, V.
        amp: f64,
        /// Start phase, radians.
        phase: f64,
        /// `true`: naive (aliasing, analog-style corners at the sample grid); `false`:
        /// band-limited.
        raw: bool,
    },
    /// Triangle wave.
    Triangle {
        /// Frequency, Hz.
        freq: f64,
        /// Peak amplitude, V.
        amp: f64,
        /// Start phase, radians.
        phase: f64,
        /// Naive instead of band-limited.
        raw: bool,
    },
    /// Rising sawtooth.
    Saw {
        /// Frequency, Hz.
        freq: f64,
        /// Peak amplitude, V.
        amp: f64,
        /// Start phase, radians.
        phase: f64,
        /// Naive instead of band-limited.
        raw: bool,
    },
    /// Pulse wave with the given duty cycle (high for `width` of each period), zero mean not
    /// enforced: it swings between +amp and -amp.
    Pulse {
        /// Frequency, Hz.
        freq: f64,
        /// Peak amplitude, V.
        amp: f64,
        /// Start phase, radians.
        phase: f64,
        /// Duty cycle, 0 < width < 1.
        width: f64,
        /// Naive instead of band-limited.
        raw: bool,
    },
    /// Sum of sines.
    Multitone {
        /// The tones.
        tones: Vec<Tone>,
    },
    /// Logarithmic (exponential) sine sweep from `from` to `to` over `duration`, then holds
    /// at `to`.
    Sweep {
        /// Start frequency, Hz.
        from: f64,
        /// End frequency, Hz.
        to: f64,
        /// Peak amplitude, V.
        amp: f64,
        /// Sweep time, s.
        duration: f64,
    },
    /// Gaussian noise, seeded from the patch seed and the source name.
    Noise {
        /// Pink (-3 dB/octave) instead of white.
        pink: bool,
        /// RMS level, V (over the generator's full band).
        rms: f64,
    },
    /// A constant voltage.
    Dc {
        /// Level, V.
        level: f64,
    },
    /// Control-voltage steps: each level held for `hold`, cycling.
    Steps {
        /// Levels, V.
        levels: Vec<f64>,
        /// Hold time per level, s.
        hold: f64,
    },
    /// Linear ramp from `from` to `to` over `duration`, then holds at `to`.
    Ramp {
        /// Start level, V.
        from: f64,
        /// End level, V.
        to: f64,
        /// Ramp time, s.
        duration: f64,
    },
    /// A WAV file, resampled to the patch rate.
    File {
        /// Absolute (resolved) path.
        path: std::path::PathBuf,
        /// Channel to use (0-based); `None` mixes all channels.
        channel: Option<usize>,
        /// Voltage that digital full scale maps to, V peak.
        full_scale: f64,
        /// Loop the file to the patch length (else pad with silence).
        looped: bool,
    },
}

/// One component of a [`Wave::Multitone`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Tone {
    /// Frequency, Hz.
    pub freq: f64,
    /// Peak amplitude, V.
    pub amp: f64,
    /// Phase, radians.
    pub phase: f64,
}

/// A retriggered attack/decay envelope that multiplies a source (a percussive voice).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Envelope {
    /// Linear rise time from 0 to 1, s.
    pub attack: f64,
    /// Exponential decay time constant after the peak, s.
    pub decay: f64,
    /// Retrigger period, s (`None`: one shot at the source's start).
    pub every: Option<f64>,
}

/// One stage of the circuit.
#[derive(Debug, Clone, PartialEq)]
pub struct Stage {
    /// Name from the patch (`[stages.NAME]`).
    pub name: String,
    /// The op-amp profile for active stages, `None` for passive ones.
    pub part: Option<OpAmp>,
    /// Topology and component values.
    pub kind: StageKind,
}

/// Stage topologies.
#[derive(Debug, Clone, PartialEq)]
pub enum StageKind {
    /// Inverting summer: `Vout = ref - Rf * sum((Vi - ref) / Ri)` in the ideal case. The
    /// one-input inverting amplifier (`type = "inverting"`) is this with one input.
    InvertingSum {
        /// The inputs, each through its own resistor (and optional series capacitor).
        inputs: Vec<SumInput>,
        /// The feedback element.
        feedback: Feedback,
        /// Voltage at the non-inverting input, V (0 = ground).
        reference: f64,
        /// True when the patch wrote `type = "inverting"` (for display only).
        single: bool,
    },
    /// Non-inverting amplifier: `Vout = Vin * (1 + Rf / Rg)` ideally, Rg to `reference`.
    NonInverting {
        /// Input node (drives the non-inverting input).
        from: Node,
        /// Feedback resistor, ohm.
        r_fb: f64,
        /// Optional capacitor across the feedback resistor, F.
        c_fb: Option<f64>,
        /// Resistor from the inverting input to `reference`, ohm.
        r_g: f64,
        /// Voltage the gain resistor returns to, V.
        reference: f64,
    },
    /// Voltage follower (unity-gain buffer).
    Follower {
        /// Input node.
        from: Node,
    },
    /// Passive potentiometer used as a volume control: track from the input to ground, output
    /// at the wiper.
    Attenuator {
        /// Input node (top of the track).
        from: Node,
        /// Track resistance, ohm.
        pot: f64,
        /// Taper law.
        taper: Taper,
        /// Wiper position, 0 (ground end) to 1 (top).
        at: f64,
    },
    /// Any circuit of resistors, capacitors, pots and diodes around one or more op-amps.
    Network(Network),
}

impl StageKind {
    /// Every patch node this stage reads (sources and other stages, each once).
    pub fn reads(&self) -> Vec<Node> {
        let mut v: Vec<Node> = match self {
            StageKind::InvertingSum { inputs, .. } => inputs.iter().map(|i| i.from).collect(),
            StageKind::NonInverting { from, .. }
            | StageKind::Follower { from }
            | StageKind::Attenuator { from, .. } => vec![*from],
            StageKind::Network(n) => n.reads(),
        };
        let mut seen = Vec::new();
        v.retain(|n| {
            if seen.contains(n) {
                false
            } else {
                seen.push(*n);
                true
            }
        });
        v
    }
}

/// A network stage: named local nodes, two-terminal parts between nodes, op-amps bound to
/// nodes. `gnd` is 0 V, `pos` and `neg` the rails; a source's or another stage's name is the
/// node it drives; `stage.node` is another network's inner node.
#[derive(Debug, Clone, PartialEq)]
pub struct Network {
    /// Local node names ([`NetNode::Local`] indexes this).
    pub nodes: Vec<String>,
    /// The op-amps.
    pub amps: Vec<NetAmp>,
    /// The parts, in patch order (`parts[i]`).
    pub parts: Vec<NetPart>,
    /// The local node the stage's output is (what readers of the stage's name see).
    pub out: usize,
}

impl Network {
    /// Every patch node the network reads.
    pub fn reads(&self) -> Vec<Node> {
        let mut v = Vec::new();
        let mut add = |n: &NetNode| match n {
            NetNode::Ext(x) => v.push(*x),
            NetNode::Inner(s, _) => v.push(Node::Stage(*s)),
            _ => {}
        };
        for a in &self.amps {
            add(&a.plus);
            add(&a.minus);
        }
        for p in &self.parts {
            add(&p.ends[0]);
            add(&p.ends[1]);
            if let NetPartKind::Pot { wiper, .. } = &p.kind {
                add(wiper);
            }
        }
        v
    }

    /// Whether a local node is driven by an op-amp output.
    pub fn amp_driven(&self, local: usize) -> bool {
        self.amps.iter().any(|a| a.out == local)
    }
}

/// A node as a network sees it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum NetNode {
    /// 0 V.
    Gnd,
    /// The positive rail.
    Pos,
    /// The negative rail.
    Neg,
    /// A node of this network (index into [`Network::nodes`]).
    Local(usize),
    /// A source or another stage's output.
    Ext(Node),
    /// Another network stage's inner node: (stage index, its local node index).
    Inner(usize, usize),
}

/// One op-amp of a network.
#[derive(Debug, Clone, PartialEq)]
pub struct NetAmp {
    /// Name for events, plots and reports (default `<stage>.amp<i>`).
    pub name: String,
    /// Profile.
    pub part: OpAmp,
    /// Non-inverting input.
    pub plus: NetNode,
    /// Inverting input.
    pub minus: NetNode,
    /// Output: a local node this op-amp drives.
    pub out: usize,
    /// Its supply (default the patch rails).
    pub rails: Rails,
}

/// One part of a network.
#[derive(Debug, Clone, PartialEq)]
pub struct NetPart {
    /// The two ends (anode, cathode for a diode; for a pot, the track's ends: `at` = 0 puts
    /// the wiper at `ends[0]`, 1 at `ends[1]`).
    pub ends: [NetNode; 2],
    /// What it is.
    pub kind: NetPartKind,
    /// Tolerance for tolerance studies (fraction), if stated.
    pub tolerance: Option<f64>,
}

/// Kinds of network parts.
#[derive(Debug, Clone, PartialEq)]
pub enum NetPartKind {
    /// Resistor, ohm.
    R(f64),
    /// Capacitor, F.
    C(f64),
    /// Potentiometer: the track between the ends, the wiper a node.
    Pot {
        /// Track, taper and position (`at` resolved from the knob when there is one).
        setting: PotSetting,
        /// The wiper node.
        wiper: NetNode,
        /// The knob that turns it, if any.
        knob: Option<KnobRef>,
    },
    /// Diode from `ends[0]` (anode) to `ends[1]` (cathode).
    Diode(Diode),
}

/// A pot's binding to a `[knobs]` entry.
#[derive(Debug, Clone, PartialEq)]
pub struct KnobRef {
    /// Knob name.
    pub name: String,
    /// Track turned the other way on the same shaft (`at = 1 - knob`).
    pub reverse: bool,
}

/// One input of an inverting summer.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SumInput {
    /// Node driving this input.
    pub from: Node,
    /// Input resistor, ohm.
    pub r: f64,
    /// Optional series (coupling) capacitor, F.
    pub c: Option<f64>,
}

/// Feedback element of an inverting stage: a resistance (fixed, or a pot wired as a variable
/// resistor) with an optional capacitor across it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Feedback {
    /// Effective resistance, ohm (for a pot: track * taper(at), floored at [`POT_END_R`]).
    pub r: f64,
    /// Optional capacitor in parallel, F.
    pub c: Option<f64>,
    /// The pot this resistance comes from, if any.
    pub pot: Option<PotSetting>,
}

/// Smallest resistance a pot presents at the end of its track (wiper and end-terminal
/// resistance), ohm. Keeps a fully-down feedback pot finite.
pub const POT_END_R: f64 = 1.0;

/// A pot used as a variable resistor.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PotSetting {
    /// Track resistance, ohm.
    pub track: f64,
    /// Taper law.
    pub taper: Taper,
    /// Position, 0 to 1.
    pub at: f64,
}

/// Potentiometer taper laws. See [`crate::parts::taper`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Taper {
    /// Resistance proportional to rotation.
    Linear,
    /// Audio ("log") taper with the given fraction of the track at mid-rotation (e.g. 0.1).
    Log {
        /// Fraction of the resistance at mid-rotation, 0 < mid < 0.5.
        mid: f64,
    },
    /// Reverse-audio taper: the mirror image of [`Taper::Log`].
    AntiLog {
        /// Fraction of the resistance at mid-rotation, 0.5 < mid < 1.
        mid: f64,
    },
}

/// An output: a node seen through a series resistor into a load (the next module's input).
#[derive(Debug, Clone, PartialEq)]
pub struct Output {
    /// Name from the patch (`[outputs.NAME]`).
    pub name: String,
    /// Node that drives this output.
    pub from: Node,
    /// An inner node of the network stage `from` (`from = "stage.node"`: index into that
    /// network's local nodes) read instead of the stage's output; the output's series
    /// resistor and load then hang on that node.
    pub inner: Option<usize>,
    /// Series (output) resistor, ohm (0 allowed).
    pub series: f64,
    /// Load resistance to ground, ohm; `None` for an open (unloaded) output.
    pub load: Option<f64>,
    /// File name override for the render (without folder), if given.
    pub file: Option<String>,
}

impl Patch {
    /// Name of a node, for messages.
    pub fn node_name(&self, node: Node) -> &str {
        match node {
            Node::Source(i) => &self.sources[i].name,
            Node::Stage(i) => &self.stages[i].name,
        }
    }

    /// Number of base-rate samples the patch renders.
    pub fn frames(&self) -> usize {
        (self.length * self.rate).round().max(0.0) as usize
    }
}
