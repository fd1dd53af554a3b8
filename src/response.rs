//! Small-signal frequency response of a patch, from one source to each output: every stage
//! expanded into one circuit ([`crate::circuit`]), solved as a complex nodal system at each
//! frequency, each op-amp with its single-pole open loop `A(s) = A0 / (1 + s A0 / (2 pi GBW))`
//! (`2 pi GBW / s` without a finite `a0`), each diode as its small-signal conductance at the
//! patch's rest (DC) operating point.
//!
//! One circuit for the whole patch, so whatever reads a node loads it, as in the engine's
//! networks (the shorthand stages' engine treats a pot's loads by their Thevenin view: the
//! same currents).

use std::collections::BTreeMap;

use rustfft::num_complex::Complex64;
use serde::Serialize;

use crate::circuit::build::{patch_circuit, PatchCircuit};
use crate::circuit::step::CircuitState;
use crate::circuit::{ElemKind, NodeKind};
use crate::model::{Patch, Wave};

/// Errors of a response computation.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ResponseError {
    /// A bad frequency grid.
    #[error("{0}")]
    Grid(String),
    /// The circuit has no unique solution at a frequency.
    #[error("the circuit has no unique solution at {hz} Hz")]
    Singular {
        /// The frequency.
        hz: f64,
    },
    /// The rest (DC) operating point could not be found.
    #[error("{0}")]
    Circuit(String),
}

/// One point of a response.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Point {
    /// Frequency, Hz.
    pub hz: f64,
    /// Gain, dB.
    pub gain_db: f64,
    /// Phase, degrees (-180 to 180).
    pub phase_deg: f64,
}

/// The response at one output.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutputResponse {
    /// The source driven.
    pub source: String,
    /// Points on the grid.
    pub points: Vec<Point>,
}

/// `{"outputs": {"<out>": {"source": ..., "points": [...]}}}`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Response {
    /// Per output name.
    pub outputs: BTreeMap<String, OutputResponse>,
}

/// `points` frequencies from `from` to `to`, evenly spaced in log frequency.
pub fn log_grid(from: f64, to: f64, points: usize) -> Result<Vec<f64>, ResponseError> {
    if !(from.is_finite() && to.is_finite() && from > 0.0 && to > from) {
        return Err(ResponseError::Grid(format!(
            "expected 0 < --from < --to, got {from} Hz and {to} Hz"
        )));
    }
    if !(2..=100_000).contains(&points) {
        return Err(ResponseError::Grid(format!(
            "--points: expected 2 to 100000, got {points}"
        )));
    }
    let (a, b) = (from.ln(), to.ln());
    Ok((0..points)
        .map(|i| (a + (b - a) * i as f64 / (points - 1) as f64).exp())
        .collect())
}

fn dc_level(w: &Wave, offset: f64) -> f64 {
    match w {
        Wave::Dc { level } => level + offset,
        _ => offset,
    }
}

/// Solve `a x = b` in place (complex, partial pivoting); false when singular.
fn csolve(a: &mut [Complex64], b: &mut [Complex64], n: usize) -> bool {
    for k in 0..n {
        let mut piv = k;
        for i in k + 1..n {
            if a[i * n + k].norm() > a[piv * n + k].norm() {
                piv = i;
            }
        }
        let d = a[piv * n + k];
        if !(d.norm() > 0.0 && d.norm().is_finite()) {
            return false;
        }
        if piv != k {
            for j in 0..n {
                a.swap(k * n + j, piv * n + j);
            }
            b.swap(k, piv);
        }
        for i in k + 1..n {
            let f = a[i * n + k] / a[k * n + k];
            if f != Complex64::new(0.0, 0.0) {
                for j in k..n {
                    let t = a[k * n + j];
                    a[i * n + j] -= f * t;
                }
                let t = b[k];
                b[i] -= f * t;
            }
        }
    }
    for i in (0..n).rev() {
        let mut s = b[i];
        for j in i + 1..n {
            s -= a[i * n + j] * b[j];
        }
        b[i] = s / a[i * n + i];
    }
    true
}

/// The patch as one circuit, ready for complex solves: its rest (DC) state found once.
struct Solver {
    w: PatchCircuit,
    rest: CircuitState,
    col: Vec<usize>,
    amp_out: Vec<bool>,
    n: usize,
    /// Per op-amp: in negative feedback and in a group without diodes (its small-signal
    /// gains hold over its whole range, up to its limits).
    amp_linear: Vec<bool>,
}

impl Solver {
    /// Open-circuit time constant of every capacitor (see [`capacitor_time_constants`]).
    fn time_constants(&self) -> Result<Vec<f64>, ResponseError> {
        let mut tau = vec![0.0; self.w.circuit.elems.len()];
        for (k, e) in self.w.circuit.elems.iter().enumerate() {
            if let ElemKind::C(x) = e.kind {
                let v = self.solve_driven(None, Some((e.a, e.b)), 0.0)?;
                tau[k] = x * (v[e.a].re - v[e.b].re).abs();
            }
        }
        Ok(tau)
    }

    fn new(patch: &Patch) -> Result<Solver, ResponseError> {
        let w = patch_circuit(patch);
        let c = &w.circuit;
        let h = 1.0 / (patch.rate * patch.oversample as f64);
        let plan = crate::circuit::plan::compile(c.clone(), h)
            .map_err(|e| ResponseError::Circuit(e.to_string()))?;
        let mut rest = CircuitState::new(&plan);
        for (k, s) in patch.sources.iter().enumerate() {
            rest.vn[w.sources[k]] = dc_level(&s.wave, s.offset);
        }
        rest.rest(&plan)
            .map_err(|e| ResponseError::Circuit(e.to_string()))?;
        let free: Vec<usize> = (0..c.nodes.len())
            .filter(|&i| matches!(c.nodes[i].kind, NodeKind::Free))
            .collect();
        let mut col = vec![usize::MAX; c.nodes.len()];
        for (k, &n) in free.iter().enumerate() {
            col[n] = k;
        }
        let amp_out = (0..c.nodes.len())
            .map(|n| c.amps.iter().any(|a| a.out == n))
            .collect();
        let amp_linear = (0..c.amps.len())
            .map(|k| {
                plan.groups.iter().any(|g| {
                    g.junctions.is_empty() && g.amps.iter().any(|a| a.amp == k && !a.explicit)
                })
            })
            .collect();
        Ok(Solver {
            n: free.len(),
            w,
            rest,
            col,
            amp_out,
            amp_linear,
        })
    }

    /// Every node's complex value at `hz` for a unit signal at `source` (0 Hz: DC gains).
    fn solve(&self, source: usize, hz: f64) -> Result<Vec<Complex64>, ResponseError> {
        self.solve_driven(Some(source), None, hz)
    }

    /// Every node's complex value at `hz` with a unit signal at `source` (when given) and a
    /// unit current injected into node `inject.0` and drawn from `inject.1` (when given);
    /// every other source at 0.
    fn solve_driven(
        &self,
        source: Option<usize>,
        inject: Option<(usize, usize)>,
        hz: f64,
    ) -> Result<Vec<Complex64>, ResponseError> {
        let (c, col, n) = (&self.w.circuit, &self.col, self.n);
        let zero = Complex64::new(0.0, 0.0);
        let src = source.map_or(usize::MAX, |k| self.w.sources[k]);
        let s = Complex64::new(0.0, std::f64::consts::TAU * hz);
        let mut a = vec![zero; n * n];
        let mut b = vec![zero; n];
        let known = |node: usize| -> Complex64 {
            if node == src {
                Complex64::new(1.0, 0.0)
            } else {
                zero
            }
        };
        let stamp =
            |a: &mut Vec<Complex64>, b: &mut Vec<Complex64>, x: usize, y: usize, g: Complex64| {
                for (p, q) in [(x, y), (y, x)] {
                    if col[p] == usize::MAX || self.amp_out[p] {
                        continue;
                    }
                    let r = col[p];
                    a[r * n + r] += g;
                    if col[q] != usize::MAX {
                        a[r * n + col[q]] -= g;
                    } else {
                        b[r] += g * known(q);
                    }
                }
            };
        for e in &c.elems {
            let g = match e.kind {
                ElemKind::R(r) => Complex64::new(1.0 / r, 0.0),
                ElemKind::C(x) => s * x,
                ElemKind::Junction { is, nvt } => {
                    let v = (self.rest.vn[e.a] - self.rest.vn[e.b]).min(200.0 * nvt);
                    Complex64::new(is / nvt * (v / nvt).exp() + crate::circuit::GMIN, 0.0)
                }
            };
            stamp(&mut a, &mut b, e.a, e.b, g);
        }
        for amp in &c.amps {
            let r = col[amp.out];
            // o / A(s) - (P - M) = 0, 1/A(s) = s / (2 pi GBW) + 1 / A0
            let inv_a = s / (std::f64::consts::TAU * amp.gbw) + amp.eps;
            a[r * n + r] += inv_a;
            for (pin, sign) in [(amp.plus, -1.0), (amp.minus, 1.0)] {
                if col[pin] != usize::MAX {
                    a[r * n + col[pin]] += sign;
                } else {
                    b[r] -= known(pin) * sign;
                }
            }
        }
        if let Some((into, from)) = inject {
            for (node, i) in [(into, 1.0), (from, -1.0)] {
                if col[node] != usize::MAX && !self.amp_out[node] {
                    b[col[node]] += Complex64::new(i, 0.0);
                }
            }
        }
        if !csolve(&mut a, &mut b, n) {
            return Err(ResponseError::Singular { hz });
        }
        Ok((0..c.nodes.len())
            .map(|k| {
                if col[k] != usize::MAX {
                    b[col[k]]
                } else {
                    known(k)
                }
            })
            .collect())
    }
}

/// The response from source `source` (index into `patch.sources`) to every output at the
/// given frequencies.
pub fn response(patch: &Patch, source: usize, freqs: &[f64]) -> Result<Response, ResponseError> {
    let sv = Solver::new(patch)?;
    let mut curves: Vec<Vec<Point>> = vec![Vec::with_capacity(freqs.len()); sv.w.outputs.len()];
    for &hz in freqs {
        let v = sv.solve(source, hz)?;
        for (k, &o) in sv.w.outputs.iter().enumerate() {
            curves[k].push(Point {
                hz,
                gain_db: 20.0 * v[o].norm().max(1e-300).log10(),
                phase_deg: v[o].arg().to_degrees(),
            });
        }
    }
    let mut outputs = BTreeMap::new();
    for (k, o) in patch.outputs.iter().enumerate() {
        outputs.insert(
            o.name.clone(),
            OutputResponse {
                source: patch.sources[source].name.clone(),
                points: std::mem::take(&mut curves[k]),
            },
        );
    }
    Ok(Response { outputs })
}

/// Open-circuit time constant of every capacitor of the patch's one circuit, s, indexed
/// like `circuit.elems` (0 for the other parts): the capacitance times the resistance it
/// sees at 0 Hz with every other capacitor open, every source at rest and each op-amp as
/// its DC gain (the zero-value time-constant method: Gray, Hurst, Lewis and Meyer,
/// "Analysis and Design of Analog Integrated Circuits", 2009, section 7.3). Their sum over
/// the capacitors of a section is the `s` coefficient of its characteristic polynomial, an
/// upper bound on the slowest time constant when the poles are real.
pub fn capacitor_time_constants(patch: &Patch) -> Result<(PatchCircuit, Vec<f64>), ResponseError> {
    let sv = Solver::new(patch)?;
    let tau = sv.time_constants()?;
    Ok((sv.w, tau))
}

/// [`node_gains`] (with no band) and [`capacitor_time_constants`] from one solve of the
/// patch's circuit and its rest point (no time constants, an empty list, when their solve
/// is singular).
pub fn rest_and_time_constants(patch: &Patch) -> Result<(NodeGains, Vec<f64>), ResponseError> {
    let sv = Solver::new(patch)?;
    let tau = sv.time_constants().unwrap_or_default();
    Ok((gains_of(sv, &[])?, tau))
}

/// Static (DC, small-signal) gain from every source to every stage's output:
/// `gains[stage][source]`.
pub fn dc_gains(patch: &Patch) -> Result<Vec<Vec<f64>>, ResponseError> {
    let sv = Solver::new(patch)?;
    let per_source: Vec<Vec<Complex64>> = (0..patch.sources.len())
        .map(|s| sv.solve(s, 0.0))
        .collect::<Result<_, _>>()?;
    Ok(sv
        .w
        .stages
        .iter()
        .map(|&node| per_source.iter().map(|v| v[node].re).collect())
        .collect())
}

/// The whole patch's circuit with, for every node, its rest (DC operating) voltage and,
/// per source, its DC gain and its largest gain over a band: what `check` needs for the
/// worst-case span of any node, network op-amps' outputs and inputs included.
#[derive(Debug, Clone)]
pub struct NodeGains {
    /// The circuit (node indices below index `circuit.circuit.nodes`).
    pub circuit: PatchCircuit,
    /// Rest voltage of every node with every source at its DC level, V.
    pub rest: Vec<f64>,
    /// `dc[source][node]`: small-signal gain at 0 Hz.
    pub dc: Vec<Vec<f64>>,
    /// `band[source][node]`: the largest `|H|` at 0 Hz and over the band's frequencies.
    pub band: Vec<Vec<f64>>,
    /// Per op-amp of the circuit: in negative feedback with no diode in its group, so
    /// its small-signal gains describe it up to its limits (a comparator, a loop with
    /// positive feedback or a diode only near its rest point).
    pub amp_linear: Vec<bool>,
}

/// Rest voltages, DC gains and largest gains over `band_hz` of every node of the patch.
pub fn node_gains(patch: &Patch, band_hz: &[f64]) -> Result<NodeGains, ResponseError> {
    gains_of(Solver::new(patch)?, band_hz)
}

fn gains_of(sv: Solver, band_hz: &[f64]) -> Result<NodeGains, ResponseError> {
    let nn = sv.w.circuit.nodes.len();
    let mut dc = Vec::with_capacity(sv.w.sources.len());
    let mut band = Vec::with_capacity(sv.w.sources.len());
    for k in 0..sv.w.sources.len() {
        let d: Vec<f64> = sv.solve(k, 0.0)?.iter().map(|v| v.re).collect();
        let mut b: Vec<f64> = d.iter().map(|x| x.abs()).collect();
        for &hz in band_hz {
            for (m, v) in b.iter_mut().zip(sv.solve(k, hz)?) {
                *m = m.max(v.norm());
            }
        }
        debug_assert_eq!(b.len(), nn);
        dc.push(d);
        band.push(b);
    }
    Ok(NodeGains {
        amp_linear: sv.amp_linear.clone(),
        rest: sv.rest.vn.clone(),
        circuit: sv.w,
        dc,
        band,
    })
}

/// Frequencies where the gain crosses 3 dB below its largest value on the grid (log
/// interpolation between grid points).
pub fn minus_3db(points: &[Point]) -> Vec<f64> {
    let Some(peak) = points.iter().map(|p| p.gain_db).reduce(f64::max) else {
        return Vec::new();
    };
    let level = peak - 3.0;
    let mut out = Vec::new();
    for w in points.windows(2) {
        let (a, b) = (w[0].gain_db - level, w[1].gain_db - level);
        if a == 0.0 {
            out.push(w[0].hz);
        } else if a * b < 0.0 {
            let t = a / (a - b);
            out.push((w[0].hz.ln() + t * (w[1].hz.ln() - w[0].hz.ln())).exp());
        }
    }
    out
}
