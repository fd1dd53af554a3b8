//! Analytic noise budget: every noise source of a patch, carried to each output through the
//! small-signal gains of the network, with no simulation.
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
//! # Gains (op-amp textbooks)
//! Each node is held as a Thevenin equivalent: its open-circuit noise (one complex gain per
//! source, so a source that reaches an output along two paths adds in amplitude, not power) and
//! its source resistance `Rs` (0 for sources and op-amp outputs, the wiper resistance for an
//! attenuator). `Zf` is the feedback resistor with its optional capacitor across it,
//! `Zi = Ri + Rs_i + 1 / (j w Ci)` an input branch with its optional coupling capacitor.
//! Per stage, in the ideal-op-amp limit:
//! - inverting summer: each input `-Zf / Zi` (its node's noise and `Ri`'s own), `Rf`
//!   `Zf / Rf` (its noise as a current across the feedback element; 1 without a capacitor),
//!   `en` the noise gain `NG = 1 + Zf / Zpar` with `Zpar` all `Zi` in parallel (flat:
//!   `1 + Rf / Rpar`), `in-` times `Zf`; the non-inverting input sits at the ideal reference,
//!   so `in+` sees no resistance and is not listed;
//! - non-inverting: input and `en` times `NG = 1 + Zf / Rg`, `Rf` `Zf / Rf`, `Rg` `-Zf / Rg`,
//!   `in-` times `Zf`, `in+` times `Rs NG`;
//! - follower: input and `en` 1, `in+` times `Rs`;
//! - then every gain of an op-amp stage is multiplied by the single-pole closed-loop factor
//!   `1 / (1 + NG / A(f))`, `A = A0 / (1 + j f A0 / GBW)` (or `GBW / (j f)` without a DC gain),
//!   which gives `G0 / (1 + j f NG / GBW)` for a resistive network;
//! - attenuator with track `P` at fraction `y`, fed from `Rs`: upper segment
//!   `t = Rs + P (1 - y)`, lower `b = P y`; input and upper segment times `b / (t + b)`, lower
//!   segment times `t / (t + b)`; wiper resistance `t b / (t + b)` (the segments are the noisy
//!   resistors of that Thevenin resistance, so their powers add up to `4 k T Rs`);
//! - output with series `Rser` into load `RL`: node and `Rser` times `RL / (Rs + Rser + RL)`,
//!   `RL` times `(Rs + Rser) / (Rs + Rser + RL)`; an unloaded output passes everything at 1.
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
//! - Op-amps: single-pole open loop, zero output impedance; no slew or clipping (small signal).
//!   Stages whose closed-loop bandwidth `GBW / NG` falls inside the band are flagged.
//! - Capacitor corners inside the band are named in the notes (they are in the gains).
//! - Each consumer of an attenuator node sees its open-circuit Thevenin equivalent. This is
//!   exact when the attenuator drives a single load (the usual volume pot); when it drives
//!   several, the interaction between the loads is not modelled and the budget says so.
//! - Sources are ideal (noiseless, zero impedance); references (`ref`) are ideal voltages.
//! - The load resistor of an output belongs to the next module but is physically there: it is
//!   counted, labelled `outputs.NAME.load`, and the notes give the total without it.

use std::f64::consts::PI;

use rustfft::num_complex::Complex;
use serde::Serialize;

use crate::model::{Node, Patch, StageKind};
use crate::parts::taper;
use crate::parts::OpAmp;

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

/// A noise source referred to the place where it is injected.
struct NoiseSource {
    label: String,
    /// White density at the point of injection, V/sqrt(Hz) (already times any resistance for
    /// a current noise).
    density: f64,
    /// 1/f corner, Hz.
    corner: f64,
    /// Belongs to an output's load (the next module).
    load: bool,
}

/// Complex gain from every source (by index) to one node's open-circuit voltage, at one
/// frequency.
#[derive(Clone, Default)]
struct Transfer(Vec<C>);

impl Transfer {
    fn add(&mut self, id: usize, g: C) {
        if self.0.len() <= id {
            self.0.resize(id + 1, C::new(0.0, 0.0));
        }
        self.0[id] += g;
    }
    fn add_scaled(&mut self, other: &Transfer, k: C) {
        for (id, g) in other.0.iter().enumerate() {
            if g.re != 0.0 || g.im != 0.0 {
                self.add(id, g * k);
            }
        }
    }
    fn scale(&mut self, k: C) {
        for g in &mut self.0 {
            *g *= k;
        }
    }
    fn get(&self, id: usize) -> C {
        self.0.get(id).copied().unwrap_or_default()
    }
}

/// A node as its consumers see it: open-circuit noise and (resistive) source resistance.
#[derive(Clone, Default)]
struct Thevenin {
    noise: Transfer,
    r: f64,
}

/// The network at one frequency: every source, and its gain to every output.
struct Network {
    sources: Vec<NoiseSource>,
    /// Per output, in output order.
    outputs: Vec<Transfer>,
    /// Per output: the notes about it and the stages upstream of it.
    notes: Vec<Vec<String>>,
}

/// Everything collected while walking the stages.
struct Walk {
    sources: Vec<NoiseSource>,
    nodes: Vec<Thevenin>,
    /// Per stage: notes about it (bandwidth, capacitors, loading) and its upstream stages.
    stage_notes: Vec<Vec<String>>,
    upstream: Vec<Vec<bool>>,
}

impl Walk {
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
    fn node(&self, node: Node) -> Thevenin {
        match node {
            Node::Source(_) => Thevenin::default(),
            Node::Stage(i) => self.nodes[i].clone(),
        }
    }
}

fn real(x: f64) -> C {
    C::new(x, 0.0)
}

/// Impedance of a capacitor `c` at `f`: `1 / (j 2 pi f C)`.
fn z_cap(c: f64, f: f64) -> C {
    C::new(0.0, -1.0 / (2.0 * PI * f * c))
}

/// A resistor with an optional capacitor across it, at `f`.
fn z_parallel(r: f64, c: Option<f64>, f: f64) -> C {
    match c {
        Some(c) => real(r) / C::new(1.0, 2.0 * PI * f * r * c),
        None => real(r),
    }
}

/// Closed-loop factor `1 / (1 + NG / A(f))` of a stage with noise gain `ng` (single-pole
/// open loop `A = A0 / (1 + j f A0 / GBW)`, or `GBW / (j f)` without a DC gain).
fn loop_factor(part: &OpAmp, ng: C, f: f64) -> C {
    if !(part.gbw.is_finite() && part.gbw > 0.0) {
        return real(1.0);
    }
    let a = match part.a0 {
        Some(a0) if a0.is_finite() && a0 > 0.0 => real(a0) / C::new(1.0, f * a0 / part.gbw),
        _ => C::new(0.0, -part.gbw / f),
    };
    real(1.0) / (real(1.0) + ng / a)
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

/// Number of finite-impedance loads on each stage's output: summer inputs, attenuator tracks
/// and loaded outputs (op-amp inputs and open outputs draw no current).
fn load_counts(patch: &Patch) -> Vec<usize> {
    let mut n = vec![0usize; patch.stages.len()];
    let mut bump = |node: Node| {
        if let Node::Stage(j) = node {
            n[j] += 1;
        }
    };
    for stage in &patch.stages {
        match &stage.kind {
            StageKind::InvertingSum { inputs, .. } => inputs.iter().for_each(|i| bump(i.from)),
            StageKind::Attenuator { from, .. } => bump(*from),
            StageKind::NonInverting { .. } | StageKind::Follower { .. } => {}
        }
    }
    for out in patch.outputs.iter().filter(|o| o.load.is_some()) {
        bump(out.from);
    }
    n
}

/// Walk the stages at frequency `f` (Hz, > 0).
fn walk(patch: &Patch, band: (f64, f64), f: f64) -> Walk {
    let t = patch.temperature;
    let n = patch.stages.len();
    let mut w = Walk {
        sources: Vec::new(),
        nodes: Vec::with_capacity(n),
        stage_notes: Vec::with_capacity(n),
        upstream: Vec::with_capacity(n),
    };
    let loads = load_counts(patch);
    let one = real(1.0);
    for (si, stage) in patch.stages.iter().enumerate() {
        let key = format!("stages.{}", stage.name);
        let mut notes = Vec::new();
        let mut up = vec![false; n];
        let mark = |node: Node, up: &mut Vec<bool>, w: &Walk| {
            if let Node::Stage(j) = node {
                up[j] = true;
                for (k, u) in w.upstream[j].iter().enumerate() {
                    up[k] |= *u;
                }
            }
        };
        let mut out = Thevenin::default();
        // (noise gain at f, flat-band noise gain) of active stages
        let mut noise_gain: Option<(C, f64)> = None;
        let part = stage.part.as_ref();
        let en_label = |p: &str| format!("{key} en ({p})");
        match &stage.kind {
            StageKind::InvertingSum {
                inputs,
                feedback,
                single,
                ..
            } => {
                let rf = feedback.r;
                let zf = z_parallel(rf, feedback.c, f);
                let mut y_par = C::new(0.0, 0.0);
                let mut g_flat = 0.0;
                for (k, inp) in inputs.iter().enumerate() {
                    mark(inp.from, &mut up, &w);
                    let src = w.node(inp.from);
                    let r_tot = inp.r + src.r;
                    let z_in = match inp.c {
                        Some(c) => real(r_tot) + z_cap(c, f),
                        None => real(r_tot),
                    };
                    y_par += one / z_in;
                    g_flat += 1.0 / r_tot;
                    let g = -zf / z_in;
                    out.noise.add_scaled(&src.noise, g);
                    let rkey = if *single {
                        format!("{key}.r_in")
                    } else {
                        format!("{key}.inputs[{k}].r")
                    };
                    if let Some(id) =
                        w.register(thermal_label(&rkey, inp.r), johnson_density(inp.r, t), 0.0)
                    {
                        out.noise.add(id, g);
                    }
                    if let Some(c) = inp.c {
                        let ckey = if *single {
                            format!("{key}.c_in")
                        } else {
                            format!("{key}.inputs[{k}].c")
                        };
                        notes.extend(corner_note(&ckey, r_tot, c, band, "high-pass"));
                    }
                }
                let fb_label = match (&feedback.pot, single) {
                    (Some(_), _) => {
                        format!("{key}.feedback.pot ({} set, thermal)", fmt_resistance(rf))
                    }
                    (None, true) => thermal_label(&format!("{key}.r_fb"), rf),
                    (None, false) => thermal_label(&format!("{key}.feedback.r"), rf),
                };
                // Rf's noise as a current e / Rf across the whole feedback element
                if let Some(id) = w.register(fb_label, johnson_density(rf, t), 0.0) {
                    out.noise.add(id, zf / rf);
                }
                if let Some(c) = feedback.c {
                    let ckey = if *single && feedback.pot.is_none() {
                        format!("{key}.c_fb")
                    } else {
                        format!("{key}.feedback.c")
                    };
                    notes.extend(corner_note(&ckey, rf, c, band, "low-pass"));
                }
                let ng = one + zf * y_par;
                noise_gain = Some((ng, 1.0 + rf * g_flat));
                if let Some(p) = part {
                    if let Some(id) = w.register(en_label(&p.name), p.en, p.en_corner) {
                        out.noise.add(id, ng);
                    }
                    let label = format!("{key} in- ({}, into {})", p.name, fmt_resistance(rf));
                    if let Some(id) = w.register(label, p.inoise * rf, 0.0) {
                        out.noise.add(id, zf / rf);
                    }
                }
            }
            StageKind::NonInverting {
                from,
                r_fb,
                c_fb,
                r_g,
                ..
            } => {
                mark(*from, &mut up, &w);
                let src = w.node(*from);
                let zf = z_parallel(*r_fb, *c_fb, f);
                let ng = one + zf / *r_g;
                noise_gain = Some((ng, 1.0 + r_fb / r_g));
                out.noise.add_scaled(&src.noise, ng);
                let fb = thermal_label(&format!("{key}.r_fb"), *r_fb);
                if let Some(id) = w.register(fb, johnson_density(*r_fb, t), 0.0) {
                    out.noise.add(id, zf / *r_fb);
                }
                let rg = thermal_label(&format!("{key}.r_g"), *r_g);
                if let Some(id) = w.register(rg, johnson_density(*r_g, t), 0.0) {
                    out.noise.add(id, -zf / *r_g);
                }
                if let Some(c) = c_fb {
                    notes.extend(corner_note(
                        &format!("{key}.c_fb"),
                        *r_fb,
                        *c,
                        band,
                        "low-pass",
                    ));
                }
                if let Some(p) = part {
                    if let Some(id) = w.register(en_label(&p.name), p.en, p.en_corner) {
                        out.noise.add(id, ng);
                    }
                    let label = format!("{key} in- ({}, into {})", p.name, fmt_resistance(*r_fb));
                    if let Some(id) = w.register(label, p.inoise * r_fb, 0.0) {
                        out.noise.add(id, zf / *r_fb);
                    }
                    if src.r > 0.0 {
                        let label =
                            format!("{key} in+ ({}, through {})", p.name, fmt_resistance(src.r));
                        if let Some(id) = w.register(label, p.inoise * src.r, 0.0) {
                            out.noise.add(id, ng);
                        }
                    }
                }
            }
            StageKind::Follower { from } => {
                mark(*from, &mut up, &w);
                let src = w.node(*from);
                noise_gain = Some((one, 1.0));
                out.noise.add_scaled(&src.noise, one);
                if let Some(p) = part {
                    if let Some(id) = w.register(en_label(&p.name), p.en, p.en_corner) {
                        out.noise.add(id, one);
                    }
                    if src.r > 0.0 {
                        let label =
                            format!("{key} in+ ({}, through {})", p.name, fmt_resistance(src.r));
                        if let Some(id) = w.register(label, p.inoise * src.r, 0.0) {
                            out.noise.add(id, one);
                        }
                    }
                }
            }
            StageKind::Attenuator {
                from,
                pot,
                taper: law,
                at,
            } => {
                mark(*from, &mut up, &w);
                let src = w.node(*from);
                let y = taper::fraction(*law, *at);
                let upper = pot * (1.0 - y);
                let lower = pot * y;
                let top = src.r + upper;
                let sum = top + lower;
                let (ratio, rest) = if sum > 0.0 {
                    (lower / sum, top / sum)
                } else {
                    (0.0, 0.0)
                };
                out.noise.add_scaled(&src.noise, real(ratio));
                let ul = thermal_label(&format!("{key}.pot upper"), upper);
                if let Some(id) = w.register(ul, johnson_density(upper, t), 0.0) {
                    out.noise.add(id, real(ratio));
                }
                let ll = thermal_label(&format!("{key}.pot lower"), lower);
                if let Some(id) = w.register(ll, johnson_density(lower, t), 0.0) {
                    out.noise.add(id, real(rest));
                }
                out.r = if sum > 0.0 { top * lower / sum } else { 0.0 };
                if loads[si] > 1 && out.r > 0.0 {
                    notes.push(format!(
                        "{key}: the wiper ({} source resistance) drives {} resistive loads; each \
                         is taken as seeing the unloaded wiper, so their interaction is not \
                         modelled",
                        fmt_resistance(out.r),
                        loads[si]
                    ));
                }
            }
        }
        if let (Some(p), Some((ng, ng_flat))) = (part, noise_gain) {
            out.noise.scale(loop_factor(p, ng, f));
            let bw = p.gbw / ng_flat;
            if bw < band.1 {
                notes.push(format!(
                    "{key}: closed-loop bandwidth GBW / noise gain = {} / {:.2} = {} is inside \
                     the band (its single-pole roll-off is included in the gains)",
                    fmt_eng(p.gbw, "Hz"),
                    ng_flat,
                    fmt_eng(bw, "Hz")
                ));
            }
        }
        w.nodes.push(out);
        w.stage_notes.push(notes);
        w.upstream.push(up);
    }
    w
}

/// The whole network at frequency `f`: stages, then each output's series resistor and load.
fn network(patch: &Patch, band: (f64, f64), f: f64) -> Network {
    let mut w = walk(patch, band, f);
    let t = patch.temperature;
    let mut outputs = Vec::with_capacity(patch.outputs.len());
    let mut all_notes = Vec::with_capacity(patch.outputs.len());
    for out in &patch.outputs {
        let key = format!("outputs.{}", out.name);
        let node = w.node(out.from);
        let mut noise = Transfer::default();
        let mut notes = vec![format!(
            "band {} .. {}, spot densities at {}, {t:.2} K; powers of independent sources added",
            fmt_eng(band.0, "Hz"),
            fmt_eng(band.1, "Hz"),
            fmt_eng(SPOT_FREQUENCY, "Hz")
        )];
        let series_label = thermal_label(&format!("{key}.series"), out.series);
        match out.load {
            Some(rl) => {
                let ahead = node.r + out.series;
                let div = real(rl / (ahead + rl));
                noise.add_scaled(&node.noise, div);
                if let Some(id) = w.register(series_label, johnson_density(out.series, t), 0.0) {
                    noise.add(id, div);
                }
                let ll = format!(
                    "{key}.load ({}, thermal, next module's input)",
                    fmt_resistance(rl)
                );
                if let Some(id) = w.register(ll, johnson_density(rl, t), 0.0) {
                    w.sources[id].load = true;
                    noise.add(id, real(ahead / (ahead + rl)));
                }
            }
            None => {
                noise.add_scaled(&node.noise, real(1.0));
                if let Some(id) = w.register(series_label, johnson_density(out.series, t), 0.0) {
                    noise.add(id, real(1.0));
                }
                notes.push(format!(
                    "{key}: unloaded; the open-circuit voltage is budgeted"
                ));
            }
        }
        if let Node::Stage(j) = out.from {
            for (k, stage_notes) in w.stage_notes.iter().enumerate() {
                if k == j || w.upstream[j][k] {
                    notes.extend(stage_notes.iter().cloned());
                }
            }
        }
        outputs.push(noise);
        all_notes.push(notes);
    }
    Network {
        sources: w.sources,
        outputs,
        notes: all_notes,
    }
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
    let spot = network(patch, band, SPOT_FREQUENCY);
    let n_src = spot.sources.len();
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
    let h2_at = |f: f64| -> Vec<Vec<f64>> {
        let net = network(patch, band, f);
        net.outputs
            .iter()
            .map(|tr| (0..n_src).map(|id| tr.get(id).norm_sqr()).collect())
            .collect()
    };
    let mut prev = h2_at(f1);
    let mut fa = f1;
    for i in 1..=segments {
        let fb = freq(i);
        let next = h2_at(fb);
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
        let mut notes = spot.notes[o].clone();
        let mut items = Vec::new();
        let mut total_power = 0.0;
        let mut total_d2 = 0.0;
        let mut load_power = 0.0;
        for (id, s) in spot.sources.iter().enumerate() {
            let d0 = s.density * s.density;
            let power = d0 * (white[o][id] + s.corner * flicker[o][id]);
            let d2 = d0 * spot.outputs[o].get(id).norm_sqr() * (1.0 + s.corner / SPOT_FREQUENCY);
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

    #[test]
    fn transfer_adds_amplitudes() {
        let mut a = Transfer::default();
        a.add(2, real(1.0));
        let mut b = Transfer::default();
        b.add_scaled(&a, real(2.0));
        b.add_scaled(&a, real(-0.5));
        assert_eq!(b.get(2), real(1.5));
        assert_eq!(b.get(0), real(0.0));
        assert_eq!(b.get(7), real(0.0));
    }

    // Single-pole closed loop G = G0 / (1 + j f NG / GBW) (op-amp textbooks, CHECKS.md [S]):
    // at f = GBW / NG the factor is 1 / (1 + j), |.|^2 = 1/2.
    #[test]
    fn loop_factor_is_single_pole() {
        let mut p = crate::parts::builtin("ideal").unwrap();
        p.gbw = 1e6;
        p.a0 = None;
        let k = loop_factor(&p, real(11.0), 1e6 / 11.0);
        assert!((k.norm_sqr() - 0.5).abs() < 1e-12);
        assert!((k.arg() + std::f64::consts::FRAC_PI_4).abs() < 1e-12);
        // finite DC gain: G = G_ideal / (1 + NG / A0) at low frequency (CHECKS.md [M])
        p.a0 = Some(1e3);
        let k = loop_factor(&p, real(10.0), 1e-3);
        assert!((k.re - 1.0 / (1.0 + 10.0 / 1e3)).abs() < 1e-9);
    }
}
