//! One circuit: nodes, two-terminal parts, op-amps; the partition into groups, the compiled
//! per-group solve and the per-step solver. No I/O.
//!
//! # The circuit
//! A [`Circuit`] has nodes of three kinds: *fixed* (ground and the rails: a constant
//! voltage), *inputs* (sources and other stages' outputs: a voltage given at every step) and
//! *free* nodes (solved). Parts are two-terminal elements between two nodes: resistors,
//! capacitors and diode junctions (a diode profile expands into its junction, a series
//! resistance with an inner node, and its junction capacitance; a pot expands into its two
//! track segments meeting at the wiper node). An op-amp is three pins (`plus`, `minus`,
//! `out`) plus its compiled model ([`Amp`]): its output drives its `out` node, which is
//! therefore not a free node for Kirchhoff's current law. A source with an output
//! resistance is an input node with a resistor to the node the parts see.
//!
//! # Partition ([`partition`])
//! Driven nodes (fixed, inputs, op-amp outputs) cut the graph into *blocks* of free nodes
//! joined by parts. An op-amp reads the blocks (or driven nodes) its inputs sit on and
//! drives the blocks its output touches. Op-amps and blocks that feed back into each other
//! form a strongly connected component, a *group*, solved jointly; groups run in
//! topological order (a chain of inverting stages is a chain of one-op-amp groups; a
//! state-variable filter is one group of three op-amps). A block that feeds no op-amp back
//! is a passive group of its own.
//!
//! # Discretisation (see [`plan`])
//! Per group and step, the unknowns are the block node voltages, each op-amp's output node
//! and each op-amp's integrator state `v`. Capacitors are trapezoidal companions (conductance
//! `2C/h` and a history current `J`; no phase error, only the bilinear frequency warp, far
//! below 1 degree at 20 kHz at K = 4 for audio RC values). Each op-amp obeys
//! `dv/dt = SR tanh(f Vd / Vov) - 2 pi GBW v / A0` (the engine's model), taken with its own
//! exact exponential first-order-hold step: with `b` its loop factor through the group
//! (`-dVd/dv`, computed at compile time) and `p = Vd + b v`,
//! `v[n+1] = e v[n] + inv (a1 p[n+1] + a0 p[n])`, which is L-stable (`e -> 0` for the stiff
//! loop of a fast part, the virtual short) and, for a one-op-amp resistive stage, exactly
//! the engine's recursion. When nothing is near a limit the whole step is linear: a matrix
//! inverted once at compile time maps the inputs and the state (`J`, `v`, `p`) to the new
//! unknowns (the fast path, no iteration). Otherwise the nonlinear step iterates (bounded)
//! on the same equations: each diode by its Shockley law with a limited junction step,
//! each op-amp with the engine's closed-form slew factor, its common-mode clamp or reversal,
//! its soft output knee and its state clamp; an op-amp whose loop is not negative
//! (`b <= 0`: a comparator, positive feedback, a reversed input) takes the explicit slew
//! step. A step that does not converge is an error naming the stage and time.

pub mod build;
pub mod diode;
pub mod kernel;
pub mod linalg;
pub mod partition;
pub mod plan;
pub mod small;
pub mod step;

use crate::engine::plan::{amp_limits, AmpLimits};
use crate::engine::shaper::Shaper;
use crate::model::Rails;
use crate::parts::{Diode, OpAmp};

/// Softness of the common-mode reversal factor `tanh(m / delta)`, V (as the engine).
pub const CM_DELTA: f64 = crate::engine::plan::CM_DELTA;
/// Distance of `V+` from the common-mode limit of an op-amp with phase reversal beyond which
/// the linear fast path of a network group takes the reversal factor `tanh(m / CM_DELTA)`
/// as 1: at 12 `CM_DELTA` it differs from 1 by `2 exp(-24)`, below 1e-10, which scales the
/// op-amp's drive only (far below the fast path's other approximations, e.g. a diode's
/// "off" current within `plan::DIODE_TOL`). The stage engine keeps its own 20 `CM_DELTA`.
pub const REV_FAST_MARGIN: f64 = 12.0 * CM_DELTA;
/// How far beyond the knee the integrator state may go before it is held, V.
pub const STATE_MARGIN: f64 = crate::engine::plan::STATE_MARGIN;
/// Conductance across every diode junction (keeps a node joined only through diodes
/// defined when they are off), S.
pub const GMIN: f64 = 1e-12;

/// Kinds of nodes.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum NodeKind {
    /// A constant voltage (ground, a rail), V.
    Fixed(f64),
    /// An external input (index into the circuit's inputs): a voltage given at every step.
    Input(usize),
    /// Solved (a passive node, or an op-amp's output node).
    Free,
}

/// A node.
#[derive(Debug, Clone, PartialEq)]
pub struct CNode {
    /// Name for messages and plan printouts.
    pub name: String,
    /// Its kind.
    pub kind: NodeKind,
}

/// Element kinds.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ElemKind {
    /// Resistor, ohm.
    R(f64),
    /// Capacitor, F.
    C(f64),
    /// Diode junction `I = is (exp(V / nvt) - 1)` from `a` (anode) to `b` (cathode).
    Junction {
        /// Saturation current, A.
        is: f64,
        /// Emission coefficient times the thermal voltage, V.
        nvt: f64,
    },
}

/// A two-terminal element.
#[derive(Debug, Clone, PartialEq)]
pub struct Elem {
    /// What it is.
    pub kind: ElemKind,
    /// First node (anode for a junction).
    pub a: usize,
    /// Second node (cathode for a junction).
    pub b: usize,
    /// Where it comes from (`parts[2]`, `parts[4].wiper`...).
    pub label: String,
}

/// An op-amp: three pins and its compiled model.
#[derive(Debug, Clone, PartialEq)]
pub struct Amp {
    /// Name (events, plots, messages).
    pub name: String,
    /// Profile name.
    pub part: String,
    /// Non-inverting input node.
    pub plus: usize,
    /// Inverting input node.
    pub minus: usize,
    /// Output node (free, driven by this op-amp).
    pub out: usize,
    /// Gain-bandwidth product, Hz.
    pub gbw: f64,
    /// Slew rate, V/s.
    pub slew: f64,
    /// Vov = SR / (2 pi GBW), V.
    pub vov: f64,
    /// 1 / A0 (0: infinite DC gain).
    pub eps: f64,
    /// Input offset voltage (at V+), V.
    pub vos: f64,
    /// Bias current out of each input, A.
    pub ib: f64,
    /// Output clipper (swing after the current limit, knee).
    pub shaper: Shaper,
    /// Swing from the profile alone, V.
    pub swing: (f64, f64),
    /// Integrator state lower limit, V.
    pub state_lo: f64,
    /// Integrator state upper limit, V.
    pub state_hi: f64,
    /// Input common-mode range (absolute volts), if limited.
    pub cm: Option<(f64, f64)>,
    /// Whether the part reverses phase outside the range.
    pub reversal: bool,
    /// Static resistive load on the output (to about 0 V), S.
    pub load_g: f64,
}

impl Amp {
    /// The model of `part` on `rails`, its output loaded by `load_g` (the current limit
    /// narrows the swing to `isc / load_g`), as the engine compiles a stage.
    pub fn new(name: &str, part: &OpAmp, rails: Rails, load_g: f64) -> Amp {
        let gbw = if part.gbw.is_finite() && part.gbw > 0.0 {
            part.gbw
        } else {
            1e12
        };
        let slew = if part.slew.is_finite() && part.slew > 0.0 {
            part.slew
        } else {
            1e12
        };
        let vov = slew / (std::f64::consts::TAU * gbw);
        let eps = match part.a0 {
            Some(a) if a.is_finite() && a > 0.0 => 1.0 / a,
            _ => 0.0,
        };
        let AmpLimits { swing, shaper, cm } = amp_limits(part, rails, load_g);
        let Shaper { lo, hi, w } = shaper;
        Amp {
            name: name.to_string(),
            part: part.name.clone(),
            plus: 0,
            minus: 0,
            out: 0,
            gbw,
            slew,
            vov,
            eps,
            vos: if part.vos.is_finite() { part.vos } else { 0.0 },
            ib: if part.ib.is_finite() { part.ib } else { 0.0 },
            shaper,
            swing,
            state_lo: lo - w - STATE_MARGIN,
            state_hi: hi + w + STATE_MARGIN,
            cm,
            reversal: part.reversal,
            load_g,
        }
    }
}

/// A circuit: nodes, elements, op-amps.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Circuit {
    /// Nodes.
    pub nodes: Vec<CNode>,
    /// Two-terminal elements.
    pub elems: Vec<Elem>,
    /// Op-amps.
    pub amps: Vec<Amp>,
    /// Number of input nodes.
    pub n_inputs: usize,
}

impl Circuit {
    /// An empty circuit.
    pub fn new() -> Circuit {
        Circuit::default()
    }

    /// Add a node.
    pub fn node(&mut self, name: &str, kind: NodeKind) -> usize {
        self.nodes.push(CNode {
            name: name.to_string(),
            kind,
        });
        self.nodes.len() - 1
    }

    /// Add an input node (its input index is the next one).
    pub fn input(&mut self, name: &str) -> usize {
        let k = self.n_inputs;
        self.n_inputs += 1;
        self.node(name, NodeKind::Input(k))
    }

    /// Add a resistor.
    pub fn r(&mut self, a: usize, b: usize, r: f64, label: &str) {
        self.elem(ElemKind::R(r), a, b, label);
    }

    /// Add a capacitor.
    pub fn c(&mut self, a: usize, b: usize, c: f64, label: &str) {
        self.elem(ElemKind::C(c), a, b, label);
    }

    fn elem(&mut self, kind: ElemKind, a: usize, b: usize, label: &str) {
        self.elems.push(Elem {
            kind,
            a,
            b,
            label: label.to_string(),
        });
    }

    /// Add a diode from `a` (anode) to `b` (cathode) at thermal voltage `vt`: its junction,
    /// its series resistance (with an inner node) and its junction capacitance.
    pub fn diode(&mut self, a: usize, b: usize, d: &Diode, vt: f64, label: &str) {
        let j = if d.rs > 0.0 {
            let m = self.node(&format!("{label}.junction"), NodeKind::Free);
            self.r(a, m, d.rs, &format!("{label}.rs"));
            m
        } else {
            a
        };
        self.elem(
            ElemKind::Junction {
                is: d.is,
                nvt: d.n * vt,
            },
            j,
            b,
            label,
        );
        if d.cj > 0.0 {
            self.c(j, b, d.cj, &format!("{label}.cj"));
        }
    }

    /// Add an op-amp on the given pins.
    pub fn amp(&mut self, mut amp: Amp, plus: usize, minus: usize, out: usize) -> usize {
        amp.plus = plus;
        amp.minus = minus;
        amp.out = out;
        self.amps.push(amp);
        self.amps.len() - 1
    }

    /// Whether a node is driven (fixed, an input, or an op-amp output).
    pub fn driven(&self, n: usize) -> bool {
        !matches!(self.nodes[n].kind, NodeKind::Free) || self.amps.iter().any(|a| a.out == n)
    }

    /// DC voltages of every node with node `n` at 1 V and every node in `held` (and every
    /// fixed or input node) at 0 V, through the resistors alone (capacitors and diodes
    /// open; a node left floating sits at 0 V). `None` when the resistor network is
    /// singular.
    pub fn dc_voltages(&self, n: usize, held: &[usize]) -> Option<Vec<f64>> {
        let is_held =
            |k: usize| k == n || held.contains(&k) || !matches!(self.nodes[k].kind, NodeKind::Free);
        let free: Vec<usize> = (0..self.nodes.len()).filter(|&k| !is_held(k)).collect();
        let m = free.len();
        let mut col = vec![usize::MAX; self.nodes.len()];
        for (i, &k) in free.iter().enumerate() {
            col[k] = i;
        }
        let mut a = vec![0.0; m * m];
        let mut b = vec![0.0; m];
        for (i, row) in a.chunks_mut(m.max(1)).enumerate().take(m) {
            // a tiny leak to ground keeps a floating island defined (it then sits at 0 V)
            row[i] += 1e-15;
        }
        for e in &self.elems {
            let ElemKind::R(r) = e.kind else { continue };
            if r <= 0.0 {
                continue;
            }
            let g = 1.0 / r;
            for (x, y) in [(e.a, e.b), (e.b, e.a)] {
                let i = col[x];
                if i == usize::MAX {
                    continue;
                }
                a[i * m + i] += g;
                match col[y] {
                    usize::MAX if y == n => b[i] += g,
                    usize::MAX => {}
                    j => a[i * m + j] -= g,
                }
            }
        }
        if m > 0 {
            let mut perm = vec![0; m];
            let mut tmp = vec![0.0; m];
            if !linalg::lu_factor(&mut a, m, &mut perm) {
                return None;
            }
            linalg::lu_solve(&a, m, &perm, &mut b, &mut tmp);
        }
        let mut v = vec![0.0; self.nodes.len()];
        v[n] = 1.0;
        for (i, &k) in free.iter().enumerate() {
            v[k] = b[i];
        }
        Some(v)
    }

    /// Static resistive load on node `n`: the conductance into the resistors around it with
    /// every node in `driven` (and every fixed or input node) at 0 V, capacitors and diodes
    /// open (a diode's series resistance leads nowhere), S.
    pub fn load_conductance(&self, n: usize, driven: &[usize]) -> f64 {
        let at_n = || {
            self.elems.iter().filter_map(|e| match e.kind {
                ElemKind::R(r) if r > 0.0 && (e.a == n || e.b == n) => Some((e, r)),
                _ => None,
            })
        };
        let Some(v) = self.dc_voltages(n, driven) else {
            return at_n().map(|(_, r)| 1.0 / r).sum();
        };
        // current out of n: sum over resistors at n of g (1 - v_other)
        let i_out: f64 = at_n()
            .map(|(e, r)| {
                let other = if e.a == n { e.b } else { e.a };
                (1.0 - if other == n { 1.0 } else { v[other] }) / r
            })
            .sum();
        i_out.max(0.0)
    }
}
