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
//! The patch becomes a small linear network: a node voltage for each op-amp output, each
//! inverting input, each pot wiper and each series-resistor/load junction; sources and
//! references are fixed (0 V for noise). Resistors are branches (with an input's coupling
//! capacitor in series, a feedback capacitor across); each resistor's noise is a voltage in
//! series with it, entered as its Norton current. Each op-amp is an ideal controlled voltage
//! source `Vout = A(f) (V+ + en - V-)` with a single-pole open loop
//! `A = A0 / (1 + j f A0 / GBW)` (or `GBW / (j f)` without a DC gain); current noise enters as
//! a current into each input node that has a resistance to it. Kirchhoff's current law at
//! every undriven node plus one op-amp equation per output is solved (complex LU with partial
//! pivoting) for all sources at once through the adjoint system, one solve per output. So a
//! source that reaches an output along two paths adds in amplitude, and a pot wiper with
//! several loads on it is solved with all of them (all outputs' loads are connected, as in a
//! render). For a resistive chain the result is the textbook set of noise gains:
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
//! # Network stages
//! A network stage is read from the patch's one circuit
//! ([`crate::circuit::build::patch_circuit`], the circuit `response` and `check` solve):
//! every resistor of the stage (a pot's two track segments, a diode's series resistance)
//! with its thermal noise, labelled by its key (`stages.NAME.parts[2]`,
//! `stages.NAME.parts[4].lower`), every capacitor, every diode junction as its small-signal
//! conductance at the patch's rest (DC) point with its shot noise `sqrt(2 q I)` at that
//! current (Schottky, 1918), and every op-amp with its `en` and its `in` into each input
//! (`stages.NAME.amps[0] en`, `in+`, `in-`). What the network reads is loaded by it, as in
//! `response`. The shorthand stages keep their own netlist above (their labels name the
//! shorthand keys, `inputs[2].r`, `feedback.r`); the two agree on the same circuit
//! (`tests/network_examples.rs`).
//!
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
//! - Sources are ideal (noiseless, zero impedance); references (`ref`) are ideal voltages.
//! - The load resistor of an output belongs to the next module but is physically there: it is
//!   counted, labelled `outputs.NAME.load`, and the notes (and
//!   [`OutputBudget::rms_without_load`]) give the total without it.

use std::f64::consts::PI;

use rustfft::num_complex::Complex;
use serde::Serialize;

use crate::model::{Node, Patch, StageKind};
use crate::parts::diodes::ELEMENTARY_CHARGE;
use crate::parts::taper;

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
    /// A resistor in series with a capacitor (an input with a coupling capacitor).
    Series(f64, f64),
    /// A resistor with a capacitor across it (a feedback element).
    Parallel(f64, f64),
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
            Imp::Series(r, c) => C::new(r, -1.0 / (w * c)),
            Imp::Parallel(r, c) => real(r) / C::new(1.0, w * r * c),
            Imp::Cap(c) => C::new(0.0, -1.0 / (w * c)),
            Imp::G(g) => real(1.0 / g),
        }
    }
    /// Norton current of the resistor's series noise voltage, per volt: `1 / Z` when the
    /// voltage is in series with the whole branch, `1 / R` when a capacitor is across it.
    fn norton(self, f: f64) -> C {
        match self {
            Imp::R(r) | Imp::Parallel(r, _) => real(1.0 / r),
            Imp::Series(..) | Imp::Cap(_) | Imp::G(_) => real(1.0) / self.z(f),
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

fn corner_note(key: &str, r: f64, c: f64, band: (f64, f64), what: &str) -> Option<String> {
    let f = 1.0 / (2.0 * PI * r * c);
    (f > band.0 && f < band.1).then(|| {
        format!(
            "{key}: {what} corner 1 / (2 pi R C) = {} is inside the band (included in the gains)",
            fmt_eng(f, "Hz")
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
            Imp::R(r) | Imp::Series(r, _) | Imp::Parallel(r, _) => r,
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
        // per stage: its output unknown, unloaded Thevenin resistance (for labels and the flat
        // noise gain), notes and upstream stages
        let mut outs: Vec<Option<usize>> = Vec::with_capacity(n);
        let mut rth: Vec<f64> = Vec::with_capacity(n);
        let mut stage_notes: Vec<Vec<String>> = Vec::with_capacity(n);
        let mut upstream: Vec<Vec<bool>> = Vec::with_capacity(n);
        // Network stages come from the patch's one circuit (`circuit::build::patch_circuit`,
        // with its rest point for the diodes): each of its nodes becomes an unknown when
        // first met; sources are ideal (as for the shorthand), a shorthand stage's output is
        // its unknown here.
        let whole = patch
            .stages
            .iter()
            .any(|s| matches!(s.kind, StageKind::Network(_)))
            .then(|| crate::response::node_gains(patch, &[]));
        let mut node_map: Vec<Option<Option<usize>>> = Vec::new();
        if let Some(Ok(ng)) = &whole {
            node_map = vec![None; ng.circuit.circuit.nodes.len()];
            for &k in ng.circuit.sources.iter().chain(&ng.circuit.source_nodes) {
                node_map[k] = Some(None);
            }
        }
        for (si, stage) in patch.stages.iter().enumerate() {
            let key = format!("stages.{}", stage.name);
            let node_of = |node: Node, outs: &Vec<Option<usize>>| match node {
                Node::Source(_) => None,
                Node::Stage(j) => outs[j],
            };
            let rth_of = |node: Node, rth: &Vec<f64>| match node {
                Node::Source(_) => 0.0,
                Node::Stage(j) => rth[j],
            };
            let mut up = vec![false; n];
            let mut mark = |node: Node| {
                if let Node::Stage(j) = node {
                    up[j] = true;
                    for (k, u) in upstream[j].iter().enumerate() {
                        up[k] |= *u;
                    }
                }
            };
            let mut notes = Vec::new();
            let mut out_node = None;
            let mut out_r = 0.0;
            let mut ng_flat = None;
            let part = stage.part.as_ref();
            match &stage.kind {
                StageKind::InvertingSum {
                    inputs,
                    feedback,
                    single,
                    ..
                } => {
                    let out = net.unknown(true);
                    let minus = net.unknown(false);
                    let rf = feedback.r;
                    let mut g_flat = 0.0;
                    for (k, inp) in inputs.iter().enumerate() {
                        mark(inp.from);
                        let r_tot = inp.r + rth_of(inp.from, &rth);
                        g_flat += 1.0 / r_tot;
                        let (rkey, ckey) = if *single {
                            (format!("{key}.r_in"), format!("{key}.c_in"))
                        } else {
                            (
                                format!("{key}.inputs[{k}].r"),
                                format!("{key}.inputs[{k}].c"),
                            )
                        };
                        let imp = match inp.c {
                            Some(c) => {
                                notes.extend(corner_note(&ckey, r_tot, c, band, "high-pass"));
                                Imp::Series(inp.r, c)
                            }
                            None => Imp::R(inp.r),
                        };
                        let from = node_of(inp.from, &outs);
                        net.resistor(from, Some(minus), imp, thermal_label(&rkey, inp.r), t);
                    }
                    let fb_label = match (&feedback.pot, single) {
                        (Some(_), _) => {
                            format!("{key}.feedback.pot ({} set, thermal)", fmt_resistance(rf))
                        }
                        (None, true) => thermal_label(&format!("{key}.r_fb"), rf),
                        (None, false) => thermal_label(&format!("{key}.feedback.r"), rf),
                    };
                    let imp = match feedback.c {
                        Some(c) => {
                            let ckey = if *single && feedback.pot.is_none() {
                                format!("{key}.c_fb")
                            } else {
                                format!("{key}.feedback.c")
                            };
                            notes.extend(corner_note(&ckey, rf, c, band, "low-pass"));
                            Imp::Parallel(rf, c)
                        }
                        None => Imp::R(rf),
                    };
                    net.resistor(Some(minus), Some(out), imp, fb_label, t);
                    ng_flat = Some(1.0 + rf * g_flat);
                    let mut en = None;
                    if let Some(p) = part {
                        en = net.register(format!("{key} en ({})", p.name), p.en, p.en_corner);
                        let label = format!("{key} in- ({}, into {})", p.name, fmt_resistance(rf));
                        net.inject(Some(minus), label, p.inoise);
                    }
                    net.amps.push(Amp {
                        out,
                        plus: None,
                        minus: Some(minus),
                        gbw: part.map_or(f64::INFINITY, |p| p.gbw),
                        a0: part.and_then(|p| p.a0),
                        en,
                    });
                    out_node = Some(out);
                }
                StageKind::NonInverting {
                    from,
                    r_fb,
                    c_fb,
                    r_g,
                    ..
                } => {
                    mark(*from);
                    let plus = node_of(*from, &outs);
                    let rs = rth_of(*from, &rth);
                    let out = net.unknown(true);
                    let minus = net.unknown(false);
                    let imp = match c_fb {
                        Some(c) => {
                            notes.extend(corner_note(
                                &format!("{key}.c_fb"),
                                *r_fb,
                                *c,
                                band,
                                "low-pass",
                            ));
                            Imp::Parallel(*r_fb, *c)
                        }
                        None => Imp::R(*r_fb),
                    };
                    let fb = thermal_label(&format!("{key}.r_fb"), *r_fb);
                    net.resistor(Some(minus), Some(out), imp, fb, t);
                    let rg = thermal_label(&format!("{key}.r_g"), *r_g);
                    net.resistor(Some(minus), None, Imp::R(*r_g), rg, t);
                    ng_flat = Some(1.0 + r_fb / r_g);
                    let mut en = None;
                    if let Some(p) = part {
                        en = net.register(format!("{key} en ({})", p.name), p.en, p.en_corner);
                        let label =
                            format!("{key} in- ({}, into {})", p.name, fmt_resistance(*r_fb));
                        net.inject(Some(minus), label, p.inoise);
                        let label =
                            format!("{key} in+ ({}, through {})", p.name, fmt_resistance(rs));
                        net.inject(plus, label, p.inoise);
                    }
                    net.amps.push(Amp {
                        out,
                        plus,
                        minus: Some(minus),
                        gbw: part.map_or(f64::INFINITY, |p| p.gbw),
                        a0: part.and_then(|p| p.a0),
                        en,
                    });
                    out_node = Some(out);
                }
                StageKind::Follower { from } => {
                    mark(*from);
                    let plus = node_of(*from, &outs);
                    let rs = rth_of(*from, &rth);
                    let out = net.unknown(true);
                    ng_flat = Some(1.0);
                    let mut en = None;
                    if let Some(p) = part {
                        en = net.register(format!("{key} en ({})", p.name), p.en, p.en_corner);
                        let label =
                            format!("{key} in+ ({}, through {})", p.name, fmt_resistance(rs));
                        net.inject(plus, label, p.inoise);
                    }
                    net.amps.push(Amp {
                        out,
                        plus,
                        minus: Some(out),
                        gbw: part.map_or(f64::INFINITY, |p| p.gbw),
                        a0: part.and_then(|p| p.a0),
                        en,
                    });
                    out_node = Some(out);
                }
                StageKind::Attenuator {
                    from,
                    pot,
                    taper: law,
                    at,
                } => {
                    mark(*from);
                    let src = node_of(*from, &outs);
                    let y = taper::fraction(*law, *at);
                    let upper = pot * (1.0 - y);
                    let lower = pot * y;
                    let ul = thermal_label(&format!("{key}.pot upper"), upper);
                    let ll = thermal_label(&format!("{key}.pot lower"), lower);
                    if lower <= 0.0 {
                        // wiper at the ground end
                        if upper > 0.0 {
                            net.resistor(src, None, Imp::R(upper), ul, t);
                        }
                    } else if upper <= 0.0 {
                        // wiper at the top: the input node itself
                        net.resistor(src, None, Imp::R(lower), ll, t);
                        out_node = src;
                    } else {
                        let w = net.unknown(false);
                        net.resistor(src, Some(w), Imp::R(upper), ul, t);
                        net.resistor(Some(w), None, Imp::R(lower), ll, t);
                        out_node = Some(w);
                    }
                    let top = rth_of(*from, &rth) + upper;
                    out_r = if top + lower > 0.0 {
                        top * lower / (top + lower)
                    } else {
                        0.0
                    };
                }
                StageKind::Network(nw) => {
                    for x in nw.reads() {
                        mark(x);
                    }
                    match &whole {
                        Some(Ok(ng)) => {
                            out_node = net.network(ng, si, nw, &key, &mut node_map, t);
                            if nw
                                .parts
                                .iter()
                                .any(|p| matches!(p.kind, crate::model::NetPartKind::Diode(_)))
                            {
                                notes.push(format!(
                                    "{key}: diodes at their small-signal conductance at the \
                                     rest (DC) point, with their shot noise 2 q I there"
                                ));
                            }
                        }
                        _ => notes.push(format!(
                            "{key}: the patch's circuit has no rest point, so this network \
                             is not in the budget"
                        )),
                    }
                }
            }
            if let (Some(p), Some(ng)) = (part, ng_flat) {
                let bw = p.gbw / ng;
                if bw < band.1 {
                    notes.push(format!(
                        "{key}: closed-loop bandwidth GBW / noise gain = {} / {:.2} = {} is \
                         inside the band (its single-pole roll-off is included in the gains)",
                        fmt_eng(p.gbw, "Hz"),
                        ng,
                        fmt_eng(bw, "Hz")
                    ));
                }
            }
            outs.push(out_node);
            if let Some(Ok(ng)) = &whole {
                let k = ng.circuit.stages[si];
                if node_map[k].is_none() {
                    node_map[k] = Some(out_node);
                }
            }
            rth.push(out_r);
            stage_notes.push(notes);
            upstream.push(up);
        }

        for out in &patch.outputs {
            let key = format!("outputs.{}", out.name);
            let from = match (out.from, out.inner, &whole) {
                // a network's inner node
                (Node::Stage(_), Some(_), Some(Ok(ng))) => {
                    let k = ng.circuit.outputs[net.probes.len()];
                    let k = ng
                        .circuit
                        .circuit
                        .elems
                        .get(ng.circuit.output_elems[net.probes.len()].clone())
                        .and_then(|e| e.iter().find(|e| e.label == "series"))
                        .map_or(k, |e| e.a);
                    node_map[k].flatten()
                }
                (Node::Source(_), _, _) => None,
                (Node::Stage(j), _, _) => outs[j],
            };
            let mut notes = vec![format!(
                "band {} .. {}, spot densities at {}, {t:.2} K; powers of independent sources \
                 added",
                fmt_eng(band.0, "Hz"),
                fmt_eng(band.1, "Hz"),
                fmt_eng(SPOT_FREQUENCY, "Hz")
            )];
            let series_label = thermal_label(&format!("{key}.series"), out.series);
            let probe = match out.load {
                Some(rl) => {
                    let load_label = format!(
                        "{key}.load ({}, thermal, next module's input)",
                        fmt_resistance(rl)
                    );
                    let node = if out.series > 0.0 {
                        let o = net.unknown(false);
                        net.resistor(from, Some(o), Imp::R(out.series), series_label, t);
                        Some(o)
                    } else {
                        from
                    };
                    let before = net.sources.len();
                    // straight across an ideal source the load's noise is shorted: not listed
                    net.resistor(node, None, Imp::R(rl), load_label, t);
                    for s in &mut net.sources[before..] {
                        s.load = true;
                    }
                    Probe {
                        node,
                        direct: Vec::new(),
                    }
                }
                None => {
                    notes.push(format!(
                        "{key}: unloaded; the open-circuit voltage is budgeted"
                    ));
                    let direct = net
                        .register(series_label, johnson_density(out.series, t), 0.0)
                        .into_iter()
                        .collect();
                    Probe { node: from, direct }
                }
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

    /// Network stage `si` from the patch's circuit `ng`: every element of the stage a branch
    /// (resistors with their thermal noise labelled `KEY.parts[i]`, capacitors, each diode
    /// junction as its rest conductance with its shot noise), every op-amp with its `en` and
    /// its `in` into each input. Returns the unknown of the stage's output node.
    fn network(
        &mut self,
        ng: &crate::response::NodeGains,
        si: usize,
        nw: &crate::model::Network,
        key: &str,
        node_map: &mut [Option<Option<usize>>],
        t: f64,
    ) -> Option<usize> {
        use crate::circuit::{ElemKind, NodeKind};
        let pc = &ng.circuit;
        let c = &pc.circuit;
        let amp_outs: Vec<usize> = c.amps.iter().map(|a| a.out).collect();
        let mut map = |k: usize, net: &mut Netlist| -> Option<usize> {
            if let Some(m) = node_map[k] {
                return m;
            }
            let m = match c.nodes[k].kind {
                NodeKind::Free => Some(net.unknown(amp_outs.contains(&k))),
                _ => None,
            };
            node_map[k] = Some(m);
            m
        };
        for e in &c.elems[pc.stage_elems[si].clone()] {
            let (a, b) = (map(e.a, self), map(e.b, self));
            let ekey = format!("{key}.{}", e.label);
            match e.kind {
                ElemKind::R(r) => self.resistor(a, b, Imp::R(r), thermal_label(&ekey, r), t),
                ElemKind::C(cap) => self.branch(a, b, Imp::Cap(cap), None),
                ElemKind::Junction { is, nvt } => {
                    let v = (ng.rest[e.a] - ng.rest[e.b]).min(200.0 * nvt);
                    let x = (v / nvt).exp();
                    let i = is * (x - 1.0);
                    let g = is / nvt * x + crate::circuit::GMIN;
                    // shot noise of the junction current, sqrt(2 q |I|) A/sqrt(Hz) (Schottky
                    // 1918), as a series voltage over its conductance
                    let dens = (2.0 * ELEMENTARY_CHARGE * i.abs()).sqrt() / g;
                    let label = format!("{ekey} (diode, shot noise at {} rest)", fmt_eng(i, "A"));
                    self.branch(a, b, Imp::G(g), Some((label, dens)));
                }
            }
        }
        for (j, ai) in pc.stage_amps[si].clone().enumerate() {
            let ca = &c.amps[ai];
            let Some(na) = nw.amps.get(j) else { continue };
            let p = &na.part;
            let (out, plus, minus) = (map(ca.out, self), map(ca.plus, self), map(ca.minus, self));
            let akey = format!("{key}.amps[{j}]");
            let en = self.register(
                format!("{akey} en ({}, {})", na.name, p.name),
                p.en,
                p.en_corner,
            );
            self.inject(
                plus,
                format!("{akey} in+ ({}, {})", na.name, p.name),
                p.inoise,
            );
            if minus != out {
                self.inject(
                    minus,
                    format!("{akey} in- ({}, {})", na.name, p.name),
                    p.inoise,
                );
            }
            if let Some(out) = out {
                self.amps.push(Amp {
                    out,
                    plus,
                    minus,
                    gbw: p.gbw,
                    a0: p.a0,
                    en,
                });
            }
        }
        map(pc.stages[si], self)
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
