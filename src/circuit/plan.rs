//! The compiled circuit: per group, the unknowns, the op-amps' loop factors and step
//! coefficients, and the linear fast path's matrices. Plain data, printable.

use super::linalg::{lu_factor, lu_solve};
use super::partition;
use super::{Circuit, ElemKind, NodeKind};

/// An op-amp whose loop factor `b = -dVd/dv` is at or below this takes the explicit slew
/// step (positive feedback, a comparator).
pub const BMIN: f64 = 1e-9;
/// Fast-path guard: largest |Vd| / Vov for which the linear step is accepted.
pub const FAST_VD: f64 = crate::engine::plan::FAST_VD;
/// Largest error a diode's "off" model (a constant `-is`) may make at the diode's port on
/// the fast path, V.
pub const DIODE_TOL: f64 = 1e-8;

/// Errors from compiling a circuit.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CircuitError {
    /// The group's equations are singular (a node without a DC path, or an op-amp pin that
    /// nothing drives).
    #[error("the circuit around {what} has no unique solution (a floating node or pin?)")]
    Singular {
        /// Nodes or op-amps involved.
        what: String,
    },
    /// A step did not converge.
    #[error("the nonlinear step did not converge at t = {time_s:.6} s (in the group of {what})")]
    NoConvergence {
        /// Nodes or op-amps of the group.
        what: String,
        /// Time of the step, s.
        time_s: f64,
    },
}

/// Step coefficients of one op-amp in its group.
#[derive(Debug, Clone, PartialEq)]
pub struct AmpCoef {
    /// Index into [`Circuit::amps`].
    pub amp: usize,
    /// Loop factor `b = -dVd/dv` through the group (capacitors as their companions).
    pub b: f64,
    /// Whether the op-amp takes the explicit slew step (`b <= BMIN`).
    pub explicit: bool,
    /// `2 pi GBW h`.
    pub kh: f64,
    /// Linear step: `e` of `v[n+1] = e v[n] + a1p p[n+1] + a0p p[n]`.
    pub e: f64,
    /// Linear step coefficient of `p[n+1]`.
    pub a1p: f64,
    /// Linear step coefficient of `p[n]`.
    pub a0p: f64,
}

/// The linear fast path of a group: `y = y0 + ay_in x + ay_z z`.
#[derive(Debug, Clone, PartialEq)]
pub struct FastPath {
    /// Unknowns from the known node values (row-major, `ny x nk`).
    pub ay_in: Vec<f64>,
    /// Unknowns from the state (row-major, `ny x nz`).
    pub ay_z: Vec<f64>,
    /// Constant part (rails, offsets, bias currents, diode reverse currents).
    pub y0: Vec<f64>,
    /// Largest junction voltage of each diode for which its "off" model holds, V.
    pub vth: Vec<f64>,
    /// The LU factor of the fast path's matrix (op-amp rows as compiled, junctions off),
    /// row-major `ny x ny`, and its row permutation: what the noise map and the reduced
    /// diode step solve with.
    pub lu: Vec<f64>,
    /// Row permutation of `lu`.
    pub perm: Vec<usize>,
}

/// One compiled group.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupPlan {
    /// Unknown nodes: `y[i]` is node `nodes[i]` (block nodes, then op-amp outputs).
    pub nodes: Vec<usize>,
    /// Number of block (KCL) nodes at the start of `nodes`.
    pub n_kcl: usize,
    /// Op-amps: `y[nodes.len() + j]` is the state of `amps[j]`.
    pub amps: Vec<AmpCoef>,
    /// Elements of the group's blocks.
    pub elems: Vec<usize>,
    /// Capacitors: (element, companion conductance: `2C/h` under the trapezoidal rule,
    /// `C/h` under backward Euler); `z[i]` is the history `J`.
    pub caps: Vec<(usize, f64)>,
    /// Per capacitor: stepped by backward Euler (`J' = gc (Va - Vb)`), else by the
    /// trapezoidal rule (`J' = 2 gc (Va - Vb) - J`). A junction's own capacitance takes
    /// backward Euler: with the conducting junction its mode is far faster than a step,
    /// and the trapezoidal rule would leave it ringing at half the step rate (its pole
    /// near -1) at every knee; the capacitors of the circuit keep the trapezoidal rule
    /// (their phase is exact to the warping of the frequency axis).
    pub cap_be: Vec<bool>,
    /// Diode junctions (elements).
    pub junctions: Vec<usize>,
    /// The part of the group's system no step changes ([`assemble_step`]).
    pub base: Base,
    /// Per junction: saturation current, `n Vt` and the critical voltage of the Newton
    /// step's limit (`n Vt ln(n Vt / (sqrt 2 Is))`), computed once.
    pub jparams: Vec<(f64, f64, f64)>,
    /// Non-fixed nodes read as known values (inputs, other groups' nodes).
    pub known: Vec<usize>,
    /// Column of every circuit node in `y`, if it is an unknown here.
    pub col: Vec<Option<usize>>,
    /// The linear fast path (none when an op-amp is explicit).
    pub fast: Option<FastPath>,
    /// Circuit noise of the group (none: noise off, or nothing in the group makes noise).
    pub noise: Option<GroupNoise>,
}

/// Circuit noise of one group, as extra inputs of its step. Per step the group takes a
/// vector `w` of `n_kcl + na` draws: `n_kcl` unit-density white draws `g` that make the
/// block nodes' noise currents `i = chol g` (every resistor's thermal noise as its Norton
/// current into its two nodes, every op-amp's current noise into its input nodes; `chol`
/// the Cholesky factor of their one-sided covariance density, A^2/Hz), then each op-amp's
/// voltage noise `en` (V, white and 1/f), which enters beside its offset.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupNoise {
    /// Lower-triangular factor of the node-current covariance density (row-major,
    /// `n_kcl x n_kcl`), A/sqrt(Hz).
    pub chol: Vec<f64>,
    /// The fast path's map from `w` to the unknowns (row-major, `ny x (n_kcl + na)`):
    /// unit-current columns times `chol`, then each op-amp's `en` column.
    pub ay_w: Vec<f64>,
    /// Each op-amp's `en` (white density, V/sqrt(Hz)) and `en sqrt(fc)` (its 1/f part).
    pub en: Vec<(f64, f64)>,
}

/// Noise densities of one op-amp of a circuit: `en` (V/sqrt(Hz)), its 1/f corner (Hz) and
/// `in` (A/sqrt(Hz)).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AmpNoise {
    /// White voltage noise density, V/sqrt(Hz).
    pub en: f64,
    /// 1/f corner of the voltage noise, Hz.
    pub fc: f64,
    /// Current noise density at each input, A/sqrt(Hz).
    pub inoise: f64,
}

/// Cholesky factor of a positive semi-definite matrix (row-major `n x n`), lower
/// triangular; a pivot at or below a relative `1e-14` of the largest diagonal (a node no
/// noise reaches, or a combination of nodes that is noise-free) leaves its column zero.
pub fn cholesky_psd(s: &[f64], n: usize) -> Vec<f64> {
    let mut l = vec![0.0; n * n];
    let dmax = (0..n).map(|i| s[i * n + i]).fold(0.0f64, f64::max);
    let tiny = 1e-14 * dmax;
    for j in 0..n {
        let mut d = s[j * n + j];
        for k in 0..j {
            d -= l[j * n + k] * l[j * n + k];
        }
        if d <= tiny {
            continue;
        }
        let dj = d.sqrt();
        l[j * n + j] = dj;
        for i in j + 1..n {
            let mut x = s[i * n + j];
            for k in 0..j {
                x -= l[i * n + k] * l[j * n + k];
            }
            l[i * n + j] = x / dj;
        }
    }
    l
}

/// Add circuit noise to a compiled plan: `four_kt` (4 k T, V^2/(Hz ohm)) for every
/// resistor, `amps[i]` the densities of circuit op-amp `i`. A group with no noise source
/// keeps `noise: None`. The fast path's noise columns come from the factor the fast path
/// was compiled with.
pub fn add_noise(plan: &mut CircuitPlan, four_kt: f64, amps: &[AmpNoise]) {
    let c = &plan.circuit;
    for gp in &mut plan.groups {
        let nk = gp.n_kcl;
        let na = gp.amps.len();
        let ny = gp.ny();
        let kcl = |n: usize| gp.col[n].filter(|&i| i < nk);
        let mut s = vec![0.0; nk * nk];
        for &ei in &gp.elems {
            let e = &c.elems[ei];
            if let ElemKind::R(r) = e.kind {
                if !(r > 0.0 && r.is_finite()) {
                    continue;
                }
                let g = four_kt / r;
                let (a, b) = (kcl(e.a), kcl(e.b));
                for (x, sx) in [(a, 1.0), (b, -1.0)] {
                    for (y, sy) in [(a, 1.0), (b, -1.0)] {
                        if let (Some(x), Some(y)) = (x, y) {
                            s[x * nk + y] += sx * sy * g;
                        }
                    }
                }
            }
        }
        for (ai, a) in c.amps.iter().enumerate() {
            let inoise = amps.get(ai).map_or(0.0, |n| n.inoise.max(0.0));
            for pin in [a.plus, a.minus] {
                if let Some(x) = kcl(pin) {
                    s[x * nk + x] += inoise * inoise;
                }
            }
        }
        let en: Vec<(f64, f64)> = gp
            .amps
            .iter()
            .map(|ac| {
                let n = amps.get(ac.amp).copied().unwrap_or(AmpNoise {
                    en: 0.0,
                    fc: 0.0,
                    inoise: 0.0,
                });
                let e = n.en.max(0.0);
                (e, e * n.fc.max(0.0).sqrt())
            })
            .collect();
        if s.iter().all(|&x| x == 0.0) && en.iter().all(|&(w, f)| w == 0.0 && f == 0.0) {
            continue;
        }
        let chol = cholesky_psd(&s, nk);
        let nw = nk + na;
        let mut ay_w = vec![0.0; ny * nw];
        if let Some(fp) = &gp.fast {
            // the fast path's factor (op-amp rows as compiled), unit sources one at a time
            let (lu, perm) = (&fp.lu, &fp.perm);
            let mut rhs = vec![0.0; ny];
            let mut tmp = vec![0.0; ny];
            // unit current into each block node
            let mut unit = vec![0.0; ny * nk];
            for r in 0..nk {
                rhs.fill(0.0);
                rhs[r] = 1.0;
                lu_solve(lu, ny, perm, &mut rhs, &mut tmp);
                for i in 0..ny {
                    unit[i * nk + r] = rhs[i];
                }
            }
            for i in 0..ny {
                for q in 0..nk {
                    ay_w[i * nw + q] = (q..nk).map(|r| unit[i * nk + r] * chol[r * nk + q]).sum();
                }
            }
            // en of op-amp j beside its offset: `k vos` in its row
            for (j, ac) in gp.amps.iter().enumerate() {
                rhs.fill(0.0);
                rhs[gp.nodes.len() + j] = ac.a1p;
                lu_solve(lu, ny, perm, &mut rhs, &mut tmp);
                for i in 0..ny {
                    ay_w[i * nw + nk + j] = rhs[i];
                }
            }
        }
        gp.noise = Some(GroupNoise { chol, ay_w, en });
    }
}

impl GroupPlan {
    /// Capacitor `q`'s history update `J' = a gc (Va - Vb) - b J` as `(a, b)`: `(2, 1)`
    /// under the trapezoidal rule, `(1, 0)` under backward Euler ([`GroupPlan::cap_be`]).
    #[inline]
    pub fn cap_update(&self, q: usize) -> (f64, f64) {
        if self.cap_be[q] {
            (1.0, 0.0)
        } else {
            (2.0, 1.0)
        }
    }

    /// Number of unknowns.
    pub fn ny(&self) -> usize {
        self.nodes.len() + self.amps.len()
    }

    /// State length: histories of capacitors, then each op-amp's `v`, then its `p`.
    pub fn nz(&self) -> usize {
        self.caps.len() + 2 * self.amps.len()
    }

    /// Names of the group's op-amps, or of its nodes when it has none (for messages).
    pub fn describe(&self, c: &Circuit) -> String {
        if self.amps.is_empty() {
            self.nodes
                .iter()
                .map(|&n| c.nodes[n].name.clone())
                .collect::<Vec<_>>()
                .join(", ")
        } else {
            self.amps
                .iter()
                .map(|a| c.amps[a.amp].name.clone())
                .collect::<Vec<_>>()
                .join(", ")
        }
    }
}

/// A compiled circuit.
#[derive(Debug, Clone, PartialEq)]
pub struct CircuitPlan {
    /// The circuit.
    pub circuit: Circuit,
    /// Time step, s.
    pub h: f64,
    /// Groups in solving order.
    pub groups: Vec<GroupPlan>,
}

/// How one op-amp's row reads in an assembly.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum AmpRow {
    /// `v (1 - k b) - k (P - M) = r + k vos` (P replaced by `plus_fixed` when clamped).
    Step {
        /// Weight of `p[n+1]`.
        k: f64,
        /// The loop factor that splits `p = Vd + b v`.
        b: f64,
        /// History part.
        r: f64,
        /// V+ clamped to the common-mode range.
        plus_fixed: Option<f64>,
    },
    /// `v = value`.
    Pin(f64),
    /// DC: `eps v - (P - M) = vos`.
    Dc {
        /// V+ clamped to the common-mode range.
        plus_fixed: Option<f64>,
    },
}

/// The linearisation of one assembly.
pub(crate) struct Lin<'a> {
    pub rows: &'a [AmpRow],
    /// Output rows `o = s v + c`.
    pub outs: &'a [(f64, f64)],
    /// Junctions `i = g v + ieq` (GMIN added by the assembly).
    pub junc: &'a [(f64, f64)],
    /// Capacitor histories (`None`: DC, capacitors open).
    pub caps: Option<&'a [f64]>,
    /// Include constants (offsets, bias currents).
    pub consts: bool,
}

/// Value of a node: the unknown, else the node array.
#[inline]
pub(crate) fn val(gp: &GroupPlan, vn: &[f64], y: &[f64], n: usize) -> f64 {
    match gp.col[n] {
        Some(i) => y[i],
        None => vn[n],
    }
}

/// The part of a group's system that no step changes: the resistors' and the capacitors'
/// companion conductances in the matrix (without and with the capacitors), and the
/// right-hand side's coefficients of nodes outside the group, as `(row, node, g)`.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Base {
    m_r: Vec<f64>,
    m_rc: Vec<f64>,
    known_r: Vec<(usize, usize, f64)>,
    known_c: Vec<(usize, usize, f64)>,
}

impl Base {
    /// Group `gp`'s base, stamped as [`assemble`] stamps its resistors and capacitors.
    pub fn of(c: &Circuit, gp: &GroupPlan) -> Base {
        let ny = gp.ny();
        let kcl = |n: usize| gp.col[n].filter(|&i| i < gp.n_kcl);
        let mut b = Base {
            m_r: vec![0.0; ny * ny],
            m_rc: vec![0.0; ny * ny],
            known_r: Vec::new(),
            known_c: Vec::new(),
        };
        let mut ci = 0;
        for &ei in &gp.elems {
            let e = &c.elems[ei];
            let (g, cap) = match e.kind {
                ElemKind::R(r) => (1.0 / r, false),
                ElemKind::C(_) => {
                    ci += 1;
                    (gp.caps[ci - 1].1, true)
                }
                ElemKind::Junction { .. } => continue,
            };
            for (x, o) in [(e.a, e.b), (e.b, e.a)] {
                if let Some(r) = kcl(x) {
                    let ms: &mut [&mut Vec<f64>] = if cap {
                        &mut [&mut b.m_rc]
                    } else {
                        &mut [&mut b.m_r, &mut b.m_rc]
                    };
                    for m in ms.iter_mut() {
                        m[r * ny + r] += g;
                        if let Some(ci) = gp.col[o] {
                            m[r * ny + ci] -= g;
                        }
                    }
                    if gp.col[o].is_none() {
                        if cap {
                            b.known_c.push((r, o, g));
                        } else {
                            b.known_r.push((r, o, g));
                        }
                    }
                }
            }
        }
        b
    }
}

/// Assemble `m y = rhs` for a group.
pub(crate) fn assemble(
    c: &Circuit,
    gp: &GroupPlan,
    lin: &Lin,
    vn: &[f64],
    m: &mut [f64],
    rhs: &mut [f64],
) {
    let ny = gp.ny();
    m[..ny * ny].fill(0.0);
    rhs[..ny].fill(0.0);
    let kcl = |n: usize| gp.col[n].filter(|&i| i < gp.n_kcl);
    let stamp = |m: &mut [f64], rhs: &mut [f64], a: usize, b: usize, g: f64| {
        stamp_g(gp, vn, m, rhs, a, b, g)
    };
    let mut ci = 0;
    let mut ji = 0;
    for &ei in &gp.elems {
        let e = &c.elems[ei];
        match e.kind {
            ElemKind::R(r) => stamp(m, rhs, e.a, e.b, 1.0 / r),
            ElemKind::C(_) => {
                let (_, gc) = gp.caps[ci];
                if let Some(js) = lin.caps {
                    stamp(m, rhs, e.a, e.b, gc);
                    let j = js[ci];
                    if let Some(r) = kcl(e.a) {
                        rhs[r] += j;
                    }
                    if let Some(r) = kcl(e.b) {
                        rhs[r] -= j;
                    }
                }
                ci += 1;
            }
            ElemKind::Junction { .. } => {
                let (g, ieq) = lin.junc[ji];
                stamp(m, rhs, e.a, e.b, g + super::GMIN);
                if let Some(r) = kcl(e.a) {
                    rhs[r] -= ieq;
                }
                if let Some(r) = kcl(e.b) {
                    rhs[r] += ieq;
                }
                ji += 1;
            }
        }
    }
    stamp_active(c, gp, lin, vn, m, rhs);
}

/// [`assemble`] from the group's [`Base`]: the resistors' and capacitors' conductances
/// copied instead of stamped (the same system, summed in another order, so equal to
/// rounding), then the junctions and the op-amps as [`assemble`] stamps them.
pub(crate) fn assemble_step(
    c: &Circuit,
    gp: &GroupPlan,
    lin: &Lin,
    vn: &[f64],
    m: &mut [f64],
    rhs: &mut [f64],
) {
    let ny = gp.ny();
    let b = &gp.base;
    m[..ny * ny].copy_from_slice(if lin.caps.is_some() { &b.m_rc } else { &b.m_r });
    rhs[..ny].fill(0.0);
    for &(r, o, g) in &b.known_r {
        rhs[r] += g * vn[o];
    }
    let kcl = |n: usize| gp.col[n].filter(|&i| i < gp.n_kcl);
    if let Some(js) = lin.caps {
        for &(r, o, g) in &b.known_c {
            rhs[r] += g * vn[o];
        }
        for (&(ei, _), &j) in gp.caps.iter().zip(js) {
            let e = &c.elems[ei];
            if let Some(r) = kcl(e.a) {
                rhs[r] += j;
            }
            if let Some(r) = kcl(e.b) {
                rhs[r] -= j;
            }
        }
    }
    for (&ei, &(g, ieq)) in gp.junctions.iter().zip(lin.junc) {
        let e = &c.elems[ei];
        stamp_g(gp, vn, m, rhs, e.a, e.b, g + super::GMIN);
        if let Some(r) = kcl(e.a) {
            rhs[r] -= ieq;
        }
        if let Some(r) = kcl(e.b) {
            rhs[r] += ieq;
        }
    }
    stamp_active(c, gp, lin, vn, m, rhs);
}

/// A conductance `g` between nodes `a` and `b` into the rows of the group's KCL nodes (the
/// far node's voltage to the right-hand side when it is outside the group).
fn stamp_g(gp: &GroupPlan, vn: &[f64], m: &mut [f64], rhs: &mut [f64], a: usize, b: usize, g: f64) {
    let ny = gp.ny();
    for (x, o) in [(a, b), (b, a)] {
        if let Some(r) = gp.col[x].filter(|&i| i < gp.n_kcl) {
            m[r * ny + r] += g;
            match gp.col[o] {
                Some(ci) => m[r * ny + ci] -= g,
                None => rhs[r] += g * vn[o],
            }
        }
    }
}

/// The op-amps' part of [`assemble`]: their input bias currents (with `consts`), output
/// rows and state rows.
fn stamp_active(
    c: &Circuit,
    gp: &GroupPlan,
    lin: &Lin,
    vn: &[f64],
    m: &mut [f64],
    rhs: &mut [f64],
) {
    let ny = gp.ny();
    let nn = gp.nodes.len();
    let kcl = |n: usize| gp.col[n].filter(|&i| i < gp.n_kcl);
    if lin.consts {
        for a in &c.amps {
            for pin in [a.plus, a.minus] {
                if let Some(r) = kcl(pin) {
                    rhs[r] -= a.ib;
                }
            }
        }
    }
    for (j, ac) in gp.amps.iter().enumerate() {
        let a = &c.amps[ac.amp];
        let rv = nn + j;
        // output row: o - s v = c
        if let Some(ro) = gp.col[a.out] {
            let (s, cc) = lin.outs[j];
            m[ro * ny + ro] += 1.0;
            m[ro * ny + rv] -= s;
            rhs[ro] += cc;
        }
        let vos = if lin.consts { a.vos } else { 0.0 };
        let (kv, kd, r, plus_fixed) = match lin.rows[j] {
            AmpRow::Pin(x) => {
                m[rv * ny + rv] = 1.0;
                rhs[rv] = x;
                continue;
            }
            AmpRow::Step {
                k,
                b,
                r,
                plus_fixed,
            } => (1.0 - k * b, k, r + k * vos, plus_fixed),
            AmpRow::Dc { plus_fixed } => (a.eps, 1.0, vos, plus_fixed),
        };
        m[rv * ny + rv] += kv;
        rhs[rv] += r;
        // - kd (P - M)
        match plus_fixed {
            Some(x) => rhs[rv] += kd * x,
            None => match gp.col[a.plus] {
                Some(i) => m[rv * ny + i] -= kd,
                None => rhs[rv] += kd * vn[a.plus],
            },
        }
        match gp.col[a.minus] {
            Some(i) => m[rv * ny + i] += kd,
            None => rhs[rv] -= kd * vn[a.minus],
        }
    }
}

/// Compile a circuit at time step `h`.
pub fn compile(circuit: Circuit, h: f64) -> Result<CircuitPlan, CircuitError> {
    let c = &circuit;
    let nnodes = c.nodes.len();
    let mut groups = Vec::new();
    for g in partition::groups(c) {
        let n_kcl = g.nodes.len() - g.amps.len();
        let mut col = vec![None; nnodes];
        for (i, &n) in g.nodes.iter().enumerate() {
            col[n] = Some(i);
        }
        let mut caps = Vec::new();
        let mut cap_be = Vec::new();
        let mut junctions = Vec::new();
        let mut known = Vec::new();
        let note_known = |n: usize, known: &mut Vec<usize>| {
            if col[n].is_none()
                && !matches!(c.nodes[n].kind, NodeKind::Fixed(_))
                && !known.contains(&n)
            {
                known.push(n);
            }
        };
        for &ei in &g.elems {
            let e = &c.elems[ei];
            match e.kind {
                ElemKind::C(cap) => {
                    let across = c.elems.iter().any(|d| {
                        matches!(d.kind, ElemKind::Junction { .. })
                            && ((d.a, d.b) == (e.a, e.b) || (d.a, d.b) == (e.b, e.a))
                    });
                    caps.push((ei, if across { cap / h } else { 2.0 * cap / h }));
                    cap_be.push(across);
                }
                ElemKind::Junction { .. } => junctions.push(ei),
                ElemKind::R(_) => {}
            }
            note_known(e.a, &mut known);
            note_known(e.b, &mut known);
        }
        for &a in &g.amps {
            note_known(c.amps[a].plus, &mut known);
            note_known(c.amps[a].minus, &mut known);
        }
        let mut gp = GroupPlan {
            nodes: g.nodes.clone(),
            n_kcl,
            amps: g
                .amps
                .iter()
                .map(|&a| AmpCoef {
                    amp: a,
                    b: 0.0,
                    explicit: false,
                    kh: std::f64::consts::TAU * c.amps[a].gbw * h,
                    e: 0.0,
                    a1p: 0.0,
                    a0p: 0.0,
                })
                .collect(),
            elems: g.elems.clone(),
            caps,
            cap_be,
            junctions,
            known,
            col,
            fast: None,
            noise: None,
            base: Base::default(),
            jparams: Vec::new(),
        };
        gp.jparams = gp
            .junctions
            .iter()
            .map(|&ei| {
                // (the list holds junctions only; the step's own fallback otherwise)
                let (is, nvt) = match c.elems[ei].kind {
                    ElemKind::Junction { is, nvt } => (is, nvt),
                    _ => (1e-14, 0.025),
                };
                (is, nvt, nvt * (nvt / (std::f64::consts::SQRT_2 * is)).ln())
            })
            .collect();
        gp.base = Base::of(c, &gp);
        let ny = gp.ny();
        let na = gp.amps.len();
        let mut m = vec![0.0; ny * ny];
        let mut rhs = vec![0.0; ny];
        let mut perm = vec![0; ny];
        let mut tmp = vec![0.0; ny];
        let zeros_vn = vec![0.0; nnodes];
        let zj = vec![0.0; gp.caps.len()];
        let outs = vec![(1.0, 0.0); na];
        let junc0 = vec![(0.0, 0.0); gp.junctions.len()];
        let singular = |gp: &GroupPlan| CircuitError::Singular {
            what: gp.describe(c),
        };
        // loop factors: `b = -dVd/dv` of op-amp `j` with its output set to 1 V and the other
        // op-amps as `others` says (None when the group is then singular)
        let mut loop_factor = |j: usize, others: AmpRow| -> Option<f64> {
            let rows: Vec<AmpRow> = (0..na)
                .map(|q| if q == j { AmpRow::Pin(1.0) } else { others })
                .collect();
            let lin = Lin {
                rows: &rows,
                outs: &outs,
                junc: &junc0,
                caps: Some(&zj),
                consts: false,
            };
            assemble(c, &gp, &lin, &zeros_vn, &mut m, &mut rhs);
            if !lu_factor(&mut m, ny, &mut perm) {
                return None;
            }
            lu_solve(&m, ny, &perm, &mut rhs, &mut tmp);
            let a = &c.amps[gp.amps[j].amp];
            Some(val(&gp, &zeros_vn, &rhs, a.minus) - val(&gp, &zeros_vn, &rhs, a.plus))
        };
        let mut bs = vec![0.0; na];
        for (j, b) in bs.iter_mut().enumerate() {
            *b = loop_factor(j, AmpRow::Pin(0.0)).ok_or_else(|| singular(&gp))?;
        }
        // An op-amp whose negative loop closes only through other op-amps of the group (a
        // composite amplifier: the feedback taken after a buffer) has no loop with the
        // others held at 0 V; its loop factor is then taken with the others in their linear
        // (DC) relation, as they follow within the step. Without that it would take the
        // explicit step of an op-amp without negative feedback and run to a rail.
        for (j, bj) in bs.iter_mut().enumerate() {
            if *bj > BMIN {
                continue;
            }
            if let Some(b) = loop_factor(j, AmpRow::Dc { plus_fixed: None }) {
                if b > BMIN && b.is_finite() {
                    *bj = b;
                }
            }
        }
        for (ac, &b) in gp.amps.iter_mut().zip(&bs) {
            let eps = c.amps[ac.amp].eps;
            ac.b = b;
            ac.explicit = b <= BMIN;
            if !ac.explicit {
                let (e, a1, a0) = crate::engine::plan::foh(ac.kh * (b + eps));
                ac.e = e;
                ac.a1p = a1 / (b + eps);
                ac.a0p = a0 / (b + eps);
            }
        }
        // the fast path
        if gp.amps.iter().all(|a| !a.explicit) {
            let nk = gp.known.len();
            let nz = gp.nz();
            let nc = gp.caps.len();
            let rows_lin = |r: &dyn Fn(usize) -> f64| -> Vec<AmpRow> {
                (0..na)
                    .map(|j| AmpRow::Step {
                        k: gp.amps[j].a1p,
                        b: gp.amps[j].b,
                        r: r(j),
                        plus_fixed: None,
                    })
                    .collect()
            };
            let junc_off: Vec<(f64, f64)> = gp
                .junctions
                .iter()
                .map(|&ei| match c.elems[ei].kind {
                    ElemKind::Junction { is, .. } => (0.0, -is),
                    _ => (0.0, 0.0),
                })
                .collect();
            // factor once
            let rows0 = rows_lin(&|_| 0.0);
            let lin0 = Lin {
                rows: &rows0,
                outs: &outs,
                junc: &junc0,
                caps: Some(&zj),
                consts: false,
            };
            let mut lu = vec![0.0; ny * ny];
            assemble(c, &gp, &lin0, &zeros_vn, &mut lu, &mut rhs);
            if !lu_factor(&mut lu, ny, &mut perm) {
                return Err(singular(&gp));
            }
            let mut ay_in = vec![0.0; ny * nk];
            let mut ay_z = vec![0.0; ny * nz];
            let mut vn1 = zeros_vn.clone();
            for k in 0..nk {
                vn1[gp.known[k]] = 1.0;
                assemble(c, &gp, &lin0, &vn1, &mut m, &mut rhs);
                vn1[gp.known[k]] = 0.0;
                lu_solve(&lu, ny, &perm, &mut rhs, &mut tmp);
                for i in 0..ny {
                    ay_in[i * nk + k] = rhs[i];
                }
            }
            let mut zj1 = zj.clone();
            for q in 0..nz {
                let rows = if q < nc {
                    zj1[q] = 1.0;
                    rows0.clone()
                } else if q < nc + na {
                    let jj = q - nc;
                    rows_lin(&|j| if j == jj { gp.amps[j].e } else { 0.0 })
                } else {
                    let jj = q - nc - na;
                    rows_lin(&|j| if j == jj { gp.amps[j].a0p } else { 0.0 })
                };
                let lin = Lin {
                    rows: &rows,
                    outs: &outs,
                    junc: &junc0,
                    caps: Some(&zj1),
                    consts: false,
                };
                assemble(c, &gp, &lin, &zeros_vn, &mut m, &mut rhs);
                if q < nc {
                    zj1[q] = 0.0;
                }
                lu_solve(&lu, ny, &perm, &mut rhs, &mut tmp);
                for i in 0..ny {
                    ay_z[i * nz + q] = rhs[i];
                }
            }
            // constants: fixed nodes, offsets, bias, reverse currents
            let mut vnc = zeros_vn.clone();
            for (i, nd) in c.nodes.iter().enumerate() {
                if let NodeKind::Fixed(v) = nd.kind {
                    vnc[i] = v;
                }
            }
            let linc = Lin {
                rows: &rows0,
                outs: &outs,
                junc: &junc_off,
                caps: Some(&zj),
                consts: true,
            };
            assemble(c, &gp, &linc, &vnc, &mut m, &mut rhs);
            lu_solve(&lu, ny, &perm, &mut rhs, &mut tmp);
            let y0 = rhs.clone();
            // each junction's port resistance: a unit current into its anode, out of its
            // cathode
            let mut vth = Vec::new();
            for &ei in &gp.junctions {
                let e = &c.elems[ei];
                let ElemKind::Junction { is, nvt } = e.kind else {
                    continue;
                };
                let mut r = vec![0.0; ny];
                if let Some(i) = gp.col[e.a].filter(|&i| i < n_kcl) {
                    r[i] += 1.0;
                }
                if let Some(i) = gp.col[e.b].filter(|&i| i < n_kcl) {
                    r[i] -= 1.0;
                }
                lu_solve(&lu, ny, &perm, &mut r, &mut tmp);
                let va = gp.col[e.a].map_or(0.0, |i| r[i]);
                let vb = gp.col[e.b].map_or(0.0, |i| r[i]);
                let rport = (va - vb).abs().max(1e-3);
                vth.push(nvt * (DIODE_TOL / (is * rport)).ln());
            }
            gp.fast = Some(FastPath {
                ay_in,
                ay_z,
                y0,
                vth,
                lu,
                perm: perm.clone(),
            });
        }
        groups.push(gp);
    }
    Ok(CircuitPlan { circuit, h, groups })
}

impl std::fmt::Display for CircuitPlan {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let c = &self.circuit;
        let name = |n: usize| c.nodes[n].name.clone();
        for (gi, g) in self.groups.iter().enumerate() {
            let nodes: Vec<String> = g.nodes.iter().map(|&n| name(n)).collect();
            let known: Vec<String> = g.known.iter().map(|&n| name(n)).collect();
            writeln!(
                f,
                "    group {gi}: unknowns [{}], reads [{}], {} capacitor(s), {} diode(s), {}",
                nodes.join(", "),
                known.join(", "),
                g.caps.len(),
                g.junctions.len(),
                if g.fast.is_some() {
                    "linear fast path"
                } else {
                    "nonlinear step only"
                }
            )?;
            for a in &g.amps {
                let amp = &c.amps[a.amp];
                writeln!(
                    f,
                    "      amp `{}` ({}): + {}, - {}, out {}; loop factor b {:.6}{}, recursion e {:.3e}",
                    amp.name,
                    amp.part,
                    name(amp.plus),
                    name(amp.minus),
                    name(amp.out),
                    a.b,
                    if a.explicit { " (explicit step)" } else { "" },
                    a.e
                )?;
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::circuit::{Amp, NodeKind};
    use crate::model::Rails;

    /// [`assemble_step`] (the resistors and capacitors from the group's [`Base`]) against the
    /// plain [`assemble`] on a feedback-diode clipper with a capacitor to ground and an input
    /// resistor (every kind of element, known nodes on both sides): the same system to
    /// rounding, for arbitrary linearisations, histories and op-amp rows, with and without
    /// the capacitors.
    #[test]
    fn the_base_assembly_matches_the_plain_one() {
        let mut c = Circuit::new();
        let gnd = c.node("gnd", NodeKind::Fixed(0.0));
        let x = c.input("x");
        let m = c.node("m", NodeKind::Free);
        let y = c.node("y", NodeKind::Free);
        let part = crate::parts::profiles::builtin("jfet-general").expect("profile");
        let rails = Rails {
            pos: 12.0,
            neg: -12.0,
        };
        c.r(x, m, 10e3, "rin");
        c.r(m, y, 100e3, "rfb");
        c.c(m, gnd, 100e-12, "cm");
        let d = crate::parts::diodes::builtin("silicon-signal").expect("diode");
        let vt = crate::parts::diodes::thermal_voltage(300.0);
        c.diode(m, y, &d, vt, "d1");
        c.diode(y, m, &d, vt, "d2");
        c.amp(Amp::new("u1", &part, rails, 0.0), gnd, m, y);
        let plan = compile(c.clone(), 1.0 / 192e3).expect("compiles");
        let mut seen = 0;
        for gp in &plan.groups {
            if gp.junctions.is_empty() {
                continue;
            }
            seen += 1;
            let ny = gp.ny();
            let vn: Vec<f64> = (0..c.nodes.len()).map(|i| 0.3 * i as f64 - 0.7).collect();
            let junc: Vec<(f64, f64)> = (0..gp.junctions.len())
                .map(|q| (1e-3 * (q + 1) as f64, -2e-4 * q as f64))
                .collect();
            let z: Vec<f64> = (0..gp.caps.len())
                .map(|q| 1e-5 * (q as f64 - 0.5))
                .collect();
            let outs = vec![(0.9, 0.01); gp.amps.len()];
            for rows in [
                vec![AmpRow::Pin(0.4); gp.amps.len()],
                vec![
                    AmpRow::Step {
                        k: 0.3,
                        b: 0.08,
                        r: 0.02,
                        plus_fixed: None
                    };
                    gp.amps.len()
                ],
            ] {
                for caps in [Some(&z[..]), None] {
                    let lin = Lin {
                        rows: &rows,
                        outs: &outs,
                        junc: &junc,
                        caps,
                        consts: true,
                    };
                    let (mut m1, mut r1) = (vec![0.0; ny * ny], vec![0.0; ny]);
                    let (mut m2, mut r2) = (vec![1.0; ny * ny], vec![1.0; ny]);
                    assemble(&c, gp, &lin, &vn, &mut m1, &mut r1);
                    assemble_step(&c, gp, &lin, &vn, &mut m2, &mut r2);
                    for (a, b) in m1.iter().zip(&m2).chain(r1.iter().zip(&r2)) {
                        assert!((a - b).abs() <= 1e-15 * (1.0 + a.abs()), "{a} against {b}");
                    }
                }
            }
        }
        assert!(seen > 0, "a group with junctions");
    }
}
