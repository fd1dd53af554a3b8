//! Analytic noise budget (the paper figure; the engine's noise *generators*, which render
//! noise, are [`crate::engine`]'s `noise` module): every noise source of a patch, carried to
//! each output through the small-signal gains of the network, with no simulation.
//!
//! This is the paper half of railsong's noise feature. Its totals are defined so that they can
//! be set beside the rms of a simulated render's output noise measured over the same band: the
//! voltage at an output is the voltage across its load (after the series resistor), as the
//! engine renders it, and every figure is a one-sided density or an rms over `band`.
//!
//! # Sources
//! - Every resistor: Johnson-Nyquist thermal noise, a voltage source `sqrt(4 k T R)` in series
//!   with it, white ([`johnson_density`]; `k` = [`BOLTZMANN`], exact since the 2019 SI;
//!   `T` = [`Patch::temperature`]).
//! - Every op-amp: its input voltage noise `en` at the non-inverting input, with a 1/f corner
//!   `fc`: `density^2(f) = en^2 (1 + fc / f)`; and its input current noise `in` (white; the
//!   profiles carry no current-noise corner) into each input, flowing through the impedance
//!   that input sees.
//!
//! # Gains: nodal analysis at each frequency
//! The budget reads the patch's one circuit ([`crate::circuit::build::patch_circuit`], the
//! circuit the engine, `response` and `check` read): shorthand stages expanded into their
//! textbook parts, networks as written, every output's series resistor and load. Every node
//! of it is an unknown except the fixed ones (ground, rails, references) and the sources
//! (ideal and noiseless: 0 V for noise, their output resistance shorted). A pot segment at
//! its floor ([`POT_END_R`], the wiper at that end of the track) is a short, as the taper
//! says. Each resistor is a branch with its thermal noise as a voltage in series, entered as
//! its Norton current `e / R`; each capacitor a branch; each diode junction its
//! small-signal conductance at the patch's rest (DC) point, with its shot noise
//! `sqrt(2 q I)` at that current (Schottky, 1918) as a series voltage over that
//! conductance. Each op-amp is an ideal controlled voltage source
//! `Vout = A(f) (V+ + en - V-)` with a single-pole open loop `A = A0 / (1 + j f A0 / GBW)`
//! (or `GBW / (j f)` without a DC gain); its current noise enters as a current into each
//! input node that is not driven. Kirchhoff's current law at every undriven node plus one
//! op-amp equation per output is solved (complex LU with partial pivoting) for all sources
//! at once through the adjoint system, one solve per output. So a source that reaches an
//! output along two paths adds in amplitude, and a pot wiper with several loads on it is
//! solved with all of them (all outputs' loads are connected, as in a render). For a
//! resistive chain the result is the textbook set of noise gains:
//! - inverting summer: each input and its `Ri` at `-Rf / (Ri + Rs_i)` (`Rs_i` the driving
//!   wiper's resistance), `Rf` at 1, `en` at the noise gain `NG = 1 + Rf / Rpar` (all
//!   `Ri + Rs_i` in parallel), `in-` at `Rf`; the non-inverting input sits at the reference,
//!   so `in+` sees no resistance and is not listed;
//! - non-inverting: input and `en` at `1 + Rf / Rg`, `Rf` at 1, `Rg` at `Rf / Rg`, `in-` at
//!   `Rf`, `in+` at `Rs (1 + Rf / Rg)`; follower: input and `en` at 1, `in+` at `Rs`;
//! - attenuator, track `P` at fraction `y` (upper segment `P (1 - y)`, lower `P y`, both
//!   noisy resistors): the divider ratio; its wiper resistance is what the next stage sees;
//! - output with series `Rser` into load `RL`: divider `RL / (Rs + Rser + RL)`, the load's own
//!   noise at `(Rs + Rser) / (Rs + Rser + RL)`; an unloaded output passes everything at 1,
//!   `Rser` included;
//! - each op-amp stage's gains times `1 / (1 + NG / A(f))`: `G0 / (1 + j f NG / GBW)`.
//!
//! # Labels and notes
//! Every contributor is named by its patch key, which the circuit's element labels carry:
//! `stages.mix.inputs[2].r`, `stages.mix.feedback.r`, `stages.inv.r_in`,
//! `stages.vol.pot upper`, a network's `stages.lp.parts[2]` (a pot's `parts[4].lower`, a
//! diode's series resistance `parts[1].rs`), `stages.NAME en`, `in+` (with the resistance
//! it flows through), `in-` (with the feedback resistor), a network op-amp's
//! `stages.NAME.amps[0] en`, `outputs.NAME.series`, `outputs.NAME.load`. The notes name every
//! op-amp whose closed-loop bandwidth `GBW / NG` falls inside the band (`NG` the inverse of
//! its resistive feedback fraction) and every shorthand capacitor whose corner
//! `1 / (2 pi R C)` does (`R` the resistance it sees: its open-circuit time constant over
//! `C`); a network's interacting capacitors are left to `response`.

//! # Band
//! Spot densities are `|H(1 kHz)|` times the source density at 1 kHz. Band powers are
//! `d^2 (integral of |H|^2 df + fc * integral of |H|^2 / f df)`; with a flat gain these are the
//! closed forms `d^2 (f2 - f1 + fc ln(f2 / f1))`. Between points of a logarithmic grid
//! (400 per decade) `|H|^2` is taken as linear in `f` and the `1/f` weight is integrated
//! exactly, so flat gains give the closed form to rounding and one-pole responses agree with
//! their `atan` closed forms to about 1e-5 in power. Shares are of the total power over the
//! band, in %; items are sorted by share, largest first.
//!
//! # Assumptions (stated in every budget's notes where they matter)
//! - Op-amps: single-pole open loop, zero output impedance, small signal (no slewing,
//!   clipping or common-mode effects). Stages whose closed-loop bandwidth `GBW / NG` falls
//!   inside the band are flagged (their roll-off is in the gains).
//! - Capacitor corners `1 / (2 pi R C)` inside the band are named in the notes (they are in
//!   the gains too).
//! - Sources are noiseless voltages; a source's output resistance (`[sources.X] r`) is a
//!   resistor with its thermal noise (`sources.X.r`); references (`ref`) are ideal voltages.
//! - The load resistor of an output belongs to the next module but is physically there: it is
//!   counted, labelled `outputs.NAME.load`, and the notes (and
//!   [`OutputBudget::rms_without_load`]) give the total without it.

use std::f64::consts::PI;

use rustfft::num_complex::Complex;
use serde::Serialize;

use crate::model::{Node, Patch, StageKind, POT_END_R};
use crate::parts::diodes::ELEMENTARY_CHARGE;

type C = Complex<f64>;
use crate::units::{fmt_eng, fmt_resistance};

/// Boltzmann constant, J/K (exact by definition in the SI since 2019; BIPM SI Brochure,
/// 9th ed.).
pub const BOLTZMANN: f64 = 1.380649e-23;

/// Default noise band, Hz: 20 Hz to 20 kHz (the audio band, as in AES17 measurements).
pub const DEFAULT_BAND: (f64, f64) = (20.0, 20e3);

/// Frequency at which spot densities are reported, Hz.
pub const SPOT_FREQUENCY: f64 = 1e3;

/// Thermal (Johnson-Nyquist) noise density of a resistance `r` (ohm) at temperature `t` (K):
/// `sqrt(4 k T R)`, V/sqrt(Hz). Non-positive or non-finite inputs give 0.
pub fn johnson_density(r: f64, t: f64) -> f64 {
    if r.is_finite() && t.is_finite() && r > 0.0 && t > 0.0 {
        (4.0 * BOLTZMANN * t * r).sqrt()
    } else {
        0.0
    }
}

/// Mean-square value over `band` of a density `d^2 (1 + fc / f)` (V^2): `d^2 (f2 - f1 +
/// fc ln(f2 / f1))`. `fc = 0` is white noise.
pub fn band_power(density: f64, corner: f64, band: (f64, f64)) -> f64 {
    let (f1, f2) = band;
    let flicker = if corner > 0.0 {
        corner * (f2 / f1).ln()
    } else {
        0.0
    };
    density * density * (f2 - f1 + flicker)
}

/// Why a noise budget could not be made.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum NoiseError {
    /// The band is not a finite range above 0 Hz.
    #[error("noise band {low} Hz .. {high} Hz: expected finite frequencies with 0 < low < high")]
    Band {
        /// Lower edge given, Hz.
        low: f64,
        /// Upper edge given, Hz.
        high: f64,
    },
    /// The nodal equations of the noise network have no unique solution.
    #[error("the noise network of the patch has no unique solution at {frequency} Hz")]
    Singular {
        /// Frequency of the failed solve, Hz.
        frequency: f64,
    },
}

/// One contributor to the noise at an output.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Contribution {
    /// What it is, by patch key path, e.g. `"stages.mix.inputs[2].r (100k, thermal)"`.
    pub label: String,
    /// Its density at the output at 1 kHz, V/sqrt(Hz).
    pub density_1k: f64,
    /// Its rms at the output over the band, V.
    pub rms: f64,
    /// Its share of the total noise power over the band, % (0 when the total is 0).
    pub share: f64,
}

/// The noise budget of one output.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutputBudget {
    /// Output name (`[outputs.NAME]`).
    pub output: String,
    /// Total rms noise at the output over the band, V (all contributors, powers added).
    pub total_rms: f64,
    /// Total density at the output at 1 kHz, V/sqrt(Hz).
    pub total_density_1k: f64,
    /// Every non-zero contributor, largest share first.
    pub items: Vec<Contribution>,
    /// Band, temperature, the load resistor's part, and every assumption that matters here.
    pub notes: Vec<String>,
}

impl OutputBudget {
    /// The total rms without the output's load resistor (`outputs.NAME.load`), V: the figure to
    /// compare with a render that does not simulate the next module's input resistor.
    pub fn rms_without_load(&self) -> f64 {
        let prefix = format!("outputs.{}.load (", self.output);
        self.items
            .iter()
            .filter(|c| !c.label.starts_with(&prefix))
            .map(|c| c.rms * c.rms)
            .sum::<f64>()
            .sqrt()
    }
}

/// A noise source where it is injected.
struct NoiseSource {
    label: String,
    /// White density: V/sqrt(Hz) for a voltage source, A/sqrt(Hz) for a current source.
    density: f64,
    /// 1/f corner, Hz.
    corner: f64,
    /// Belongs to an output's load (the next module).
    load: bool,
}

/// Complex gain from every source (by index) to one output, at one frequency (V per unit of
/// the source: V/V or V/A).
#[derive(Clone, Default)]
struct Transfer(Vec<C>);

impl Transfer {
    fn get(&self, id: usize) -> C {
        self.0.get(id).copied().unwrap_or_default()
    }
}

fn real(x: f64) -> C {
    C::new(x, 0.0)
}

/// The impedance of a two-terminal branch.
#[derive(Debug, Clone, Copy)]
enum Imp {
    /// A resistor.
    R(f64),
    /// A capacitor (a network's part).
    Cap(f64),
    /// A conductance (a network's diode at its rest point), S.
    G(f64),
}

impl Imp {
    fn z(self, f: f64) -> C {
        let w = 2.0 * PI * f;
        match self {
            Imp::R(r) => real(r),
            Imp::Cap(c) => C::new(0.0, -1.0 / (w * c)),
            Imp::G(g) => real(1.0 / g),
        }
    }
    /// Norton current of the resistor's series noise voltage, per volt: `1 / Z` when the
    /// voltage is in series with the whole branch, `1 / R` when a capacitor is across it.
    fn norton(self, f: f64) -> C {
        match self {
            Imp::R(r) => real(1.0 / r),
            Imp::Cap(_) | Imp::G(_) => real(1.0) / self.z(f),
        }
    }
}

/// A branch between two unknowns (`None`: ground, a source or a reference: fixed for noise).
struct Branch {
    a: Option<usize>,
    b: Option<usize>,
    imp: Imp,
    /// The resistor's thermal noise, a voltage in series from `a` to `b`.
    noise: Option<usize>,
}

/// An op-amp: `Vout = A(f) (V+ + en - V-)`, an ideal controlled voltage source at `out`.
struct Amp {
    out: usize,
    plus: Option<usize>,
    minus: Option<usize>,
    gbw: f64,
    a0: Option<f64>,
    en: Option<usize>,
}

/// An output: the voltage of `node`, plus sources seen at gain 1 (an unloaded series resistor).
struct Probe {
    node: Option<usize>,
    direct: Vec<usize>,
}

/// The small-signal noise network of a patch: unknown node voltages, branches, op-amps and
/// current injections, built once and solved at each frequency.
struct Netlist {
    /// Per unknown: true when it is an op-amp output (its row is the op-amp's equation).
    driven: Vec<bool>,
    branches: Vec<Branch>,
    amps: Vec<Amp>,
    /// Current noise sources: (node, source) with 1 A per unit density into the node.
    injections: Vec<(usize, usize)>,
    probes: Vec<Probe>,
    sources: Vec<NoiseSource>,
    /// Per output: notes about it and the stages upstream of it.
    notes: Vec<Vec<String>>,
}

/// `1 / A(f)` of a single-pole open loop `A = A0 / (1 + j f A0 / GBW)`, or `GBW / (j f)`
/// without a DC gain.
fn inv_open_loop(gbw: f64, a0: Option<f64>, f: f64) -> C {
    if !(gbw.is_finite() && gbw > 0.0) {
        return real(0.0);
    }
    match a0 {
        Some(a0) if a0.is_finite() && a0 > 0.0 => C::new(1.0 / a0, f / gbw),
        _ => C::new(0.0, f / gbw),
    }
}

fn thermal_label(key: &str, r: f64) -> String {
    format!("{key} ({}, thermal)", fmt_resistance(r))
}

/// A capacitor's corner `1 / (2 pi R C)`, `R` the resistance it sees (its open-circuit time
/// constant over `C`), when it falls inside the band.
fn corner_note(key: &str, r: f64, c: f64, band: (f64, f64)) -> Option<String> {
    let f = 1.0 / (2.0 * PI * r * c);
    (f > band.0 && f < band.1).then(|| {
        format!(
            "{key}: corner 1 / (2 pi R C) = {} (R = {}, the resistance it sees) is inside the \
             band (included in the gains)",
            fmt_eng(f, "Hz"),
            fmt_resistance(r)
        )
    })
}

impl Netlist {
    fn unknown(&mut self, driven: bool) -> usize {
        self.driven.push(driven);
        self.driven.len() - 1
    }

    fn register(&mut self, label: String, density: f64, corner: f64) -> Option<usize> {
        if !(density.is_finite() && density > 0.0) {
            return None;
        }
        self.sources.push(NoiseSource {
            label,
            density,
            corner: if corner.is_finite() {
                corner.max(0.0)
            } else {
                0.0
            },
            load: false,
        });
        Some(self.sources.len() - 1)
    }

    /// A resistor (with its optional capacitor) between `a` and `b`, with its thermal noise.
    fn resistor(&mut self, a: Option<usize>, b: Option<usize>, imp: Imp, label: String, t: f64) {
        let r = match imp {
            Imp::R(r) => r,
            Imp::Cap(_) => 0.0,
            Imp::G(g) => 1.0 / g,
        };
        if a.is_none() && b.is_none() {
            return;
        }
        let noise = self.register(label, johnson_density(r, t), 0.0);
        self.branches.push(Branch { a, b, imp, noise });
    }

    /// A branch with a noise source of its own (`density`: a voltage in series with it), or
    /// none (a capacitor).
    fn branch(
        &mut self,
        a: Option<usize>,
        b: Option<usize>,
        imp: Imp,
        noise: Option<(String, f64)>,
    ) {
        if a.is_none() && b.is_none() {
            return;
        }
        let noise = noise.and_then(|(label, d)| self.register(label, d, 0.0));
        self.branches.push(Branch { a, b, imp, noise });
    }

    /// A current noise into `node`, when that node has a resistance to take it.
    fn inject(&mut self, node: Option<usize>, label: String, density: f64) {
        if let Some(n) = node.filter(|n| !self.driven[*n]) {
            if let Some(id) = self.register(label, density, 0.0) {
                self.injections.push((n, id));
            }
        }
    }

    fn build(patch: &Patch, band: (f64, f64)) -> Netlist {
        use crate::circuit::{ElemKind, NodeKind};
        let t = patch.temperature;
        let n = patch.stages.len();
        let mut net = Netlist {
            driven: Vec::new(),
            branches: Vec::new(),
            amps: Vec::new(),
            injections: Vec::new(),
            probes: Vec::new(),
            sources: Vec::new(),
            notes: Vec::new(),
        };
        // The patch's one circuit (`circuit::build::patch_circuit`, the circuit `response`,
        // `check` and the engine read) with its rest point (for the diodes' conductances).
        let mut global_notes = Vec::new();
        let (pc, rest, tau) = match crate::response::rest_and_time_constants(patch) {
            // open-circuit time constant of every capacitor: the corner it sets
            Ok((ng, tau)) => (ng.circuit, ng.rest, tau),
            Err(e) => {
                let pc = crate::circuit::build::patch_circuit(patch);
                if pc
                    .circuit
                    .elems
                    .iter()
                    .any(|e| matches!(e.kind, ElemKind::Junction { .. }))
                {
                    global_notes.push(format!(
                        "the patch's circuit has no rest point ({e}), so its diodes are taken \
                         at 0 V"
                    ));
                }
                let rest = vec![0.0; pc.circuit.nodes.len()];
                (pc, rest, Vec::new())
            }
        };
        let c = &pc.circuit;
        let nn = c.nodes.len();
        // A pot segment at its floor (`POT_END_R`: the taper puts the wiper at that end) is
        // a short for the budget, as the taper says: its nodes are one.
        let short = |e: &crate::circuit::Elem| match e.kind {
            ElemKind::R(r) => {
                r <= POT_END_R
                    && (e.label.starts_with("pot ")
                        || e.label.ends_with(".lower")
                        || e.label.ends_with(".upper"))
            }
            _ => false,
        };
        let mut root: Vec<usize> = (0..nn).collect();
        fn find(root: &mut [usize], mut x: usize) -> usize {
            while root[x] != x {
                root[x] = root[root[x]];
                x = root[x];
            }
            x
        }
        for e in c.elems.iter().filter(|e| short(e)) {
            let (ra, rb) = (find(&mut root, e.a), find(&mut root, e.b));
            if ra != rb {
                root[ra] = rb;
            }
        }
        let root: Vec<usize> = (0..nn).map(|k| find(&mut root, k)).collect();
        // fixed for noise: ground, rails, references, the sources' ideal voltages
        let mut fixed = vec![false; nn];
        for k in 0..nn {
            if !matches!(c.nodes[k].kind, NodeKind::Free) {
                fixed[root[k]] = true;
            }
        }
        let mut driven = vec![false; nn];
        for a in &c.amps {
            driven[root[a.out]] = true;
        }
        let mut unknown: Vec<Option<Option<usize>>> = vec![None; nn];
        let mut map = |k: usize, net: &mut Netlist| -> Option<usize> {
            let r = root[k];
            if let Some(m) = unknown[r] {
                return m;
            }
            let m = (!fixed[r]).then(|| net.unknown(driven[r]));
            unknown[r] = Some(m);
            m
        };
        let amp_outs: Vec<usize> = c.amps.iter().map(|a| a.out).collect();
        let mut virtual_grounds = amp_outs.clone();
        virtual_grounds.extend(c.amps.iter().map(|a| a.minus));

        // a source's output resistance (`[sources.X] r`): a resistor like any other, with
        // its thermal noise
        for e in c.elems.iter().filter(|e| e.label.starts_with("sources.")) {
            if let ElemKind::R(r) = e.kind {
                let (a, b) = (map(e.a, &mut net), map(e.b, &mut net));
                net.resistor(a, b, Imp::R(r), thermal_label(&e.label, r), t);
            }
        }
        let mut stage_notes: Vec<Vec<String>> = Vec::with_capacity(n);
        let mut upstream: Vec<Vec<bool>> = Vec::with_capacity(n);
        for (si, stage) in patch.stages.iter().enumerate() {
            let key = format!("stages.{}", stage.name);
            let mut up = vec![false; n];
            for x in stage.kind.reads() {
                if let Node::Stage(j) = x {
                    up[j] = true;
                    for (k, u) in upstream[j].iter().enumerate() {
                        up[k] |= *u;
                    }
                }
            }
            let mut notes = Vec::new();
            let mut diodes = false;
            for ei in pc.stage_elems[si].clone() {
                let e = &c.elems[ei];
                if short(e) {
                    continue;
                }
                let (a, b) = (map(e.a, &mut net), map(e.b, &mut net));
                let ekey = format!("{key}.{}", e.label);
                match e.kind {
                    ElemKind::R(r) => {
                        let label = if e.label == "feedback.pot" {
                            format!("{ekey} ({} set, thermal)", fmt_resistance(r))
                        } else {
                            thermal_label(&ekey, r)
                        };
                        net.resistor(a, b, Imp::R(r), label, t);
                    }
                    ElemKind::C(cap) => {
                        net.branch(a, b, Imp::Cap(cap), None);
                        // a shorthand's capacitor sets one corner (its open-circuit time
                        // constant); in a network several interact (`response` shows them)
                        let tc = tau.get(ei).copied().unwrap_or(0.0);
                        let network = matches!(stage.kind, StageKind::Network(_));
                        if !network && tc > 0.0 && tc.is_finite() {
                            notes.extend(corner_note(&ekey, tc / cap, cap, band));
                        }
                    }
                    ElemKind::Junction { is, nvt } => {
                        diodes = true;
                        let v = (rest[e.a] - rest[e.b]).min(200.0 * nvt);
                        let x = (v / nvt).exp();
                        let i = is * (x - 1.0);
                        let g = is / nvt * x + crate::circuit::GMIN;
                        // shot noise of the junction current, sqrt(2 q |I|) A/sqrt(Hz)
                        // (Schottky 1918), as a series voltage over its conductance
                        let dens = (2.0 * ELEMENTARY_CHARGE * i.abs()).sqrt() / g;
                        let label =
                            format!("{ekey} (diode, shot noise at {} rest)", fmt_eng(i, "A"));
                        net.branch(a, b, Imp::G(g), Some((label, dens)));
                    }
                }
            }
            if diodes {
                notes.push(format!(
                    "{key}: diodes at their small-signal conductance at the rest (DC) point, \
                     with their shot noise 2 q I there"
                ));
            }
            for (j, ai) in pc.stage_amps[si].clone().enumerate() {
                let ca = &c.amps[ai];
                // the part's noise figures (the circuit's op-amp carries its dynamics only)
                let (part, akey, who) = match &stage.kind {
                    StageKind::Network(nw) => {
                        let Some(na) = nw.amps.get(j) else { continue };
                        (Some(&na.part), format!("{key}.amps[{j}]"), Some(&na.name))
                    }
                    _ => (stage.part.as_ref(), key.clone(), None),
                };
                let (out, plus, minus) = (
                    map(ca.out, &mut net),
                    map(ca.plus, &mut net),
                    map(ca.minus, &mut net),
                );
                let mut en = None;
                if let Some(p) = part {
                    let tag = match who {
                        Some(name) => format!("{name}, {}", p.name),
                        None => p.name.clone(),
                    };
                    en = net.register(format!("{akey} en ({tag})"), p.en, p.en_corner);
                    // shorthand labels say what the current flows through: the feedback
                    // resistor (into the virtual ground), the source's resistance at V+
                    let into = match &stage.kind {
                        StageKind::InvertingSum { feedback, .. } => {
                            format!(", into {}", fmt_resistance(feedback.r))
                        }
                        StageKind::NonInverting { r_fb, .. } => {
                            format!(", into {}", fmt_resistance(*r_fb))
                        }
                        _ => String::new(),
                    };
                    let through = if who.is_none() {
                        let g = c.load_conductance(ca.plus, &virtual_grounds);
                        let rs = if g > 0.0 { 1.0 / g } else { 0.0 };
                        format!(", through {}", fmt_resistance(rs))
                    } else {
                        String::new()
                    };
                    net.inject(plus, format!("{akey} in+ ({tag}{through})"), p.inoise);
                    if minus != out {
                        net.inject(minus, format!("{akey} in- ({tag}{into})"), p.inoise);
                    }
                    // closed-loop bandwidth: GBW over the noise gain 1 / beta, beta the
                    // resistive feedback fraction from the output to the inputs
                    let others: Vec<usize> =
                        amp_outs.iter().copied().filter(|&o| o != ca.out).collect();
                    if let Some(v) = c.dc_voltages(ca.out, &others) {
                        let beta = v[ca.minus] - v[ca.plus];
                        let ng = 1.0 / beta;
                        let bw = p.gbw / ng;
                        if beta > 1e-9 && bw.is_finite() && bw < band.1 {
                            notes.push(format!(
                                "{akey}: closed-loop bandwidth GBW / noise gain = {} / {:.2} = \
                                 {} is inside the band (its single-pole roll-off is included \
                                 in the gains)",
                                fmt_eng(p.gbw, "Hz"),
                                ng,
                                fmt_eng(bw, "Hz")
                            ));
                        }
                    }
                }
                if let Some(out) = out {
                    net.amps.push(Amp {
                        out,
                        plus,
                        minus,
                        gbw: part.map_or(f64::INFINITY, |p| p.gbw),
                        a0: part.and_then(|p| p.a0),
                        en,
                    });
                }
            }
            stage_notes.push(notes);
            upstream.push(up);
        }

        for (o, out) in patch.outputs.iter().enumerate() {
            let key = format!("outputs.{}", out.name);
            let mut notes = vec![format!(
                "band {} .. {}, spot densities at {}, {t:.2} K; powers of independent sources \
                 added",
                fmt_eng(band.0, "Hz"),
                fmt_eng(band.1, "Hz"),
                fmt_eng(SPOT_FREQUENCY, "Hz")
            )];
            notes.extend(global_notes.iter().cloned());
            let node = map(pc.outputs[o], &mut net);
            let series_label = thermal_label(&format!("{key}.series"), out.series);
            let probe = if out.load.is_some() {
                // the series resistor and the load, as the circuit has them: all outputs'
                // loads are connected, as in a render
                for e in &c.elems[pc.output_elems[o].clone()] {
                    let ElemKind::R(r) = e.kind else { continue };
                    let (a, b) = (map(e.a, &mut net), map(e.b, &mut net));
                    if e.label == "load" {
                        let label = format!(
                            "{key}.load ({}, thermal, next module's input)",
                            fmt_resistance(r)
                        );
                        let before = net.sources.len();
                        // straight across an ideal source the load's noise is shorted: not
                        // listed
                        net.resistor(a, b, Imp::R(r), label, t);
                        for s in &mut net.sources[before..] {
                            s.load = true;
                        }
                    } else {
                        net.resistor(a, b, Imp::R(r), series_label.clone(), t);
                    }
                }
                Probe {
                    node,
                    direct: Vec::new(),
                }
            } else {
                notes.push(format!(
                    "{key}: unloaded; the open-circuit voltage is budgeted"
                ));
                let direct = net
                    .register(series_label, johnson_density(out.series, t), 0.0)
                    .into_iter()
                    .collect();
                Probe { node, direct }
            };
            if let Node::Stage(j) = out.from {
                for (k, sn) in stage_notes.iter().enumerate() {
                    if k == j || upstream[j][k] {
                        notes.extend(sn.iter().cloned());
                    }
                }
            }
            net.probes.push(probe);
            net.notes.push(notes);
        }
        net
    }

    /// Gains from every source to every output at frequency `f`; `None` if the network
    /// matrix is singular there.
    fn transfers(&self, f: f64) -> Option<Vec<Transfer>> {
        let n = self.driven.len();
        let n_src = self.sources.len();
        // Nodal equations Y v = B s: a KCL row per undriven node, the op-amp equation
        // (1/A) Vout - V+ + V- = en per driven one.
        let mut y = vec![C::new(0.0, 0.0); n * n];
        let mut b: Vec<(usize, usize, C)> = Vec::new();
        for br in &self.branches {
            let adm = real(1.0) / br.imp.z(f);
            let norton = br.imp.norton(f);
            for (this, other, sign) in [(br.a, br.b, -1.0), (br.b, br.a, 1.0)] {
                let Some(i) = this.filter(|i| !self.driven[*i]) else {
                    continue;
                };
                y[i * n + i] += adm;
                if let Some(j) = other {
                    y[i * n + j] -= adm;
                }
                if let Some(id) = br.noise {
                    b.push((i, id, norton * sign));
                }
            }
        }
        for amp in &self.amps {
            let r = amp.out;
            y[r * n + r] += inv_open_loop(amp.gbw, amp.a0, f);
            if let Some(p) = amp.plus {
                y[r * n + p] -= real(1.0);
            }
            if let Some(m) = amp.minus {
                y[r * n + m] += real(1.0);
            }
            if let Some(id) = amp.en {
                b.push((r, id, real(1.0)));
            }
        }
        for (node, id) in &self.injections {
            b.push((*node, *id, real(1.0)));
        }
        // Adjoint: solve Y^T z = e_k for each probed node; the gain of source s is z . B[:, s].
        let probed: Vec<usize> = self.probes.iter().filter_map(|p| p.node).collect();
        let mut yt = vec![C::new(0.0, 0.0); n * n];
        for i in 0..n {
            for j in 0..n {
                yt[j * n + i] = y[i * n + j];
            }
        }
        let mut rhs = vec![C::new(0.0, 0.0); n * probed.len()];
        for (k, node) in probed.iter().enumerate() {
            rhs[node * probed.len() + k] = real(1.0);
        }
        solve_in_place(&mut yt, &mut rhs, n, probed.len())?;
        let mut result = Vec::with_capacity(self.probes.len());
        let mut k = 0;
        for probe in &self.probes {
            let mut g = vec![C::new(0.0, 0.0); n_src];
            if probe.node.is_some() {
                for (row, id, v) in &b {
                    g[*id] += rhs[row * probed.len() + k] * v;
                }
                k += 1;
            }
            for id in &probe.direct {
                g[*id] += real(1.0);
            }
            result.push(Transfer(g));
        }
        Some(result)
    }
}

/// Solve `A X = B` in place by Gaussian elimination with partial pivoting (`A` is `n x n`,
/// `B` is `n x m`, both row-major); `B` becomes `X`. `None` when `A` is singular.
fn solve_in_place(a: &mut [C], b: &mut [C], n: usize, m: usize) -> Option<()> {
    let scale = a.iter().map(|v| v.norm()).fold(0.0, f64::max);
    for col in 0..n {
        let (piv, best) = (col..n)
            .map(|r| (r, a[r * n + col].norm()))
            .fold((col, -1.0), |acc, x| if x.1 > acc.1 { x } else { acc });
        if best.is_nan() || best <= scale * 1e-300 || best == 0.0 || !best.is_finite() {
            return None;
        }
        if piv != col {
            for j in 0..n {
                a.swap(piv * n + j, col * n + j);
            }
            for j in 0..m {
                b.swap(piv * m + j, col * m + j);
            }
        }
        let d = a[col * n + col];
        for r in col + 1..n {
            let factor = a[r * n + col] / d;
            if factor.re == 0.0 && factor.im == 0.0 {
                continue;
            }
            for j in col..n {
                let v = a[col * n + j];
                a[r * n + j] -= factor * v;
            }
            for j in 0..m {
                let v = b[col * m + j];
                b[r * m + j] -= factor * v;
            }
        }
    }
    for col in (0..n).rev() {
        let d = a[col * n + col];
        for j in 0..m {
            let mut v = b[col * m + j];
            for k in col + 1..n {
                v -= a[col * n + k] * b[k * m + j];
            }
            b[col * m + j] = v / d;
        }
    }
    Some(())
}

/// Grid points per decade for the band integral.
const POINTS_PER_DECADE: f64 = 400.0;

/// The noise budget of every output of `patch` over `band` (Hz, `(low, high)`), in output
/// order. See the module docs for the model. Returns an empty list when the band is not a
/// finite range with `0 < low < high`; [`try_budget`] says why.
pub fn budget(patch: &Patch, band: (f64, f64)) -> Vec<OutputBudget> {
    try_budget(patch, band).unwrap_or_default()
}

/// [`budget`], with a typed error for a band that is not a finite range above 0 Hz.
pub fn try_budget(patch: &Patch, band: (f64, f64)) -> Result<Vec<OutputBudget>, NoiseError> {
    let (f1, f2) = band;
    if !(f1.is_finite() && f2.is_finite() && f1 > 0.0 && f2 > f1) {
        return Err(NoiseError::Band { low: f1, high: f2 });
    }
    let net = Netlist::build(patch, band);
    let singular = |f: f64| NoiseError::Singular { frequency: f };
    let spot = net
        .transfers(SPOT_FREQUENCY)
        .ok_or_else(|| singular(SPOT_FREQUENCY))?;
    let n_src = net.sources.len();
    let n_out = patch.outputs.len();
    // Per output and source: integral of |H|^2 df and of |H|^2 / f df over the band, with
    // |H|^2 linear in f between grid points and the 1/f weight integrated exactly, so a flat
    // gain gives the closed forms (f2 - f1) and ln(f2 / f1) exactly.
    let mut white = vec![vec![0.0f64; n_src]; n_out];
    let mut flicker = vec![vec![0.0f64; n_src]; n_out];
    let segments = ((f2 / f1).log10() * POINTS_PER_DECADE).ceil().max(16.0) as usize;
    let freq = |i: usize| {
        if i == segments {
            f2
        } else {
            f1 * (f2 / f1).powf(i as f64 / segments as f64)
        }
    };
    let h2_at = |f: f64| -> Result<Vec<Vec<f64>>, NoiseError> {
        let tr = net.transfers(f).ok_or_else(|| singular(f))?;
        Ok(tr
            .iter()
            .map(|tr| (0..n_src).map(|id| tr.get(id).norm_sqr()).collect())
            .collect())
    };
    let mut prev = h2_at(f1)?;
    let mut fa = f1;
    for i in 1..=segments {
        let fb = freq(i);
        let next = h2_at(fb)?;
        let (df, ln) = (fb - fa, (fb / fa).ln());
        for o in 0..n_out {
            for id in 0..n_src {
                let (ha, hb) = (prev[o][id], next[o][id]);
                let slope = (hb - ha) / df;
                white[o][id] += 0.5 * (ha + hb) * df;
                flicker[o][id] += (ha - slope * fa) * ln + slope * df;
            }
        }
        prev = next;
        fa = fb;
    }

    let mut result = Vec::with_capacity(n_out);
    for (o, out) in patch.outputs.iter().enumerate() {
        let key = format!("outputs.{}", out.name);
        let mut notes = net.notes[o].clone();
        let mut items = Vec::new();
        let mut total_power = 0.0;
        let mut total_d2 = 0.0;
        let mut load_power = 0.0;
        for (id, s) in net.sources.iter().enumerate() {
            let d0 = s.density * s.density;
            let power = d0 * (white[o][id] + s.corner * flicker[o][id]);
            let d2 = d0 * spot[o].get(id).norm_sqr() * (1.0 + s.corner / SPOT_FREQUENCY);
            if power.is_nan() || power <= 0.0 {
                continue;
            }
            total_power += power;
            total_d2 += d2;
            if s.load {
                load_power += power;
            }
            items.push(Contribution {
                label: s.label.clone(),
                density_1k: d2.sqrt(),
                rms: power.sqrt(),
                share: power,
            });
        }
        for it in &mut items {
            it.share = if total_power > 0.0 {
                100.0 * it.share / total_power
            } else {
                0.0
            };
        }
        items.sort_by(|a, b| {
            b.share
                .total_cmp(&a.share)
                .then_with(|| a.label.cmp(&b.label))
        });
        if load_power > 0.0 {
            notes.push(format!(
                "{key}.load belongs to the next module but is physically there, so it is \
                 counted ({:.4} uV rms); without it the total is {:.4} uV rms",
                load_power.sqrt() * 1e6,
                (total_power - load_power).max(0.0).sqrt() * 1e6
            ));
        }
        if items.is_empty() {
            notes.push(format!("{key}: no noise source reaches this output"));
        }
        result.push(OutputBudget {
            output: out.name.clone(),
            total_rms: total_power.sqrt(),
            total_density_1k: total_d2.sqrt(),
            items,
            notes,
        });
    }
    Ok(result)
}

/// A plain-text table of one budget: share %, density in nV/rtHz at 1 kHz, rms in uV over the
/// band, contributor; then the total and the notes.
pub fn format_budget(b: &OutputBudget) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let _ = writeln!(s, "noise at output '{}'", b.output);
    let _ = writeln!(
        s,
        "{:>8}  {:>10}  {:>10}  contributor",
        "share %", "nV/rtHz", "uV rms"
    );
    for it in &b.items {
        let _ = writeln!(
            s,
            "{:>8.2}  {:>10.3}  {:>10.4}  {}",
            it.share,
            it.density_1k * 1e9,
            it.rms * 1e6,
            it.label
        );
    }
    let total_share = if b.items.is_empty() { 0.0 } else { 100.0 };
    let _ = writeln!(
        s,
        "{:>8.2}  {:>10.3}  {:>10.4}  total",
        total_share,
        b.total_density_1k * 1e9,
        b.total_rms * 1e6
    );
    for n in &b.notes {
        let _ = writeln!(s, "note: {n}");
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    // Johnson-Nyquist e = sqrt(4 k T R), CHECKS.md [D]: 100 kOhm at 300 K is 40.70 nV/rtHz.
    #[test]
    fn johnson_hundred_k() {
        let e = johnson_density(100e3, 300.0);
        assert!((e - (4.0 * 1.380649e-23 * 300.0 * 100e3f64).sqrt()).abs() < 1e-20);
        assert!((e * 1e9 - 40.70).abs() < 0.005);
        assert_eq!(johnson_density(0.0, 300.0), 0.0);
        assert_eq!(johnson_density(-1.0, 300.0), 0.0);
    }

    // White noise power over a band is S (f2 - f1) [D]; a corner adds fc ln(f2/f1) [D].
    #[test]
    fn band_power_closed_forms() {
        let p = band_power(2.0, 0.0, (10.0, 110.0));
        assert!((p - 400.0).abs() < 1e-9);
        let p = band_power(1.0, 100.0, (10.0, 1000.0));
        assert!((p - (990.0 + 100.0 * 100f64.ln())).abs() < 1e-9);
    }

    // Single-pole closed loop G = G0 / (1 + j f NG / GBW) (op-amp textbooks, CHECKS.md [S]):
    // at f = GBW / NG the factor 1 / (1 + NG / A) is 1 / (1 + j), |.|^2 = 1/2.
    #[test]
    fn open_loop_is_single_pole() {
        let ng = 11.0;
        let k = real(1.0) / (real(1.0) + inv_open_loop(1e6, None, 1e6 / ng) * ng);
        assert!((k.norm_sqr() - 0.5).abs() < 1e-12);
        assert!((k.arg() + std::f64::consts::FRAC_PI_4).abs() < 1e-12);
        // finite DC gain: G = G_ideal / (1 + NG / A0) at low frequency (CHECKS.md [M])
        let k = real(1.0) / (real(1.0) + inv_open_loop(1e6, Some(1e3), 1e-3) * 10.0);
        assert!((k.re - 1.0 / (1.0 + 10.0 / 1e3)).abs() < 1e-9);
    }

    // A plain 2 x 2 complex system with a known solution [D].
    #[test]
    fn solver_recovers_a_known_solution() {
        let x = [C::new(1.0, -2.0), C::new(0.5, 3.0)];
        let a0 = [
            C::new(0.0, 0.0),
            C::new(2.0, 1.0),
            C::new(3.0, 0.0),
            C::new(-1.0, 1.0),
        ];
        let mut b: Vec<C> = (0..2)
            .map(|i| a0[2 * i] * x[0] + a0[2 * i + 1] * x[1])
            .collect();
        let mut a = a0.to_vec();
        solve_in_place(&mut a, &mut b, 2, 1).unwrap();
        assert!((b[0] - x[0]).norm() < 1e-12 && (b[1] - x[1]).norm() < 1e-12);
        let mut singular = vec![real(1.0), real(2.0), real(2.0), real(4.0)];
        assert!(solve_in_place(&mut singular, &mut b, 2, 1).is_none());
    }
}
