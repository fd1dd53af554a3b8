//! The per-step solver of a compiled circuit: the rest (DC) state, the linear fast path and
//! the bounded nonlinear step.

use super::linalg::{lu_factor, lu_solve};
use super::plan::{
    assemble, assemble_step, val, AmpRow, CircuitError, CircuitPlan, GroupPlan, Lin, FAST_VD,
};
use super::{Circuit, NodeKind, CM_DELTA, REV_FAST_MARGIN};
use crate::engine::edges::{corner_weights, reversal_step, SlewStep, Stepped, Swing, SPAN};

/// Most iterations of one nonlinear step (or of the rest state) before giving up.
pub const MAX_ITER: usize = 200;
/// Largest change of an op-amp's state from one iteration to the next within a step, V
/// (damps the iteration when a diode switches inside a fast loop).
pub const V_STEP: f64 = 0.5;

/// Event counters of one op-amp, in steps.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct AmpEvents {
    /// At or past the start of the knee or the limit.
    pub clip: u64,
    /// |Vd| > Vov.
    pub slew: u64,
    /// V+ outside the common-mode range.
    pub cm: u64,
    /// Phase reversed.
    pub rev: u64,
    /// Time of the first step at or past the start of the knee, as given to the step, s.
    pub first_clip_s: Option<f64>,
}

/// Running state of one group, with its scratch buffers (sized once).
#[derive(Debug, Clone, PartialEq)]
pub struct GroupState {
    /// Capacitor histories, op-amp states `v`, op-amp `p` (see [`GroupPlan::nz`]).
    pub z: Vec<f64>,
    /// Last solution.
    pub y: Vec<f64>,
    m: Vec<f64>,
    rhs: Vec<f64>,
    tmp: Vec<f64>,
    pub(crate) ynew: Vec<f64>,
    perm: Vec<usize>,
    rows: Vec<AmpRow>,
    outs: Vec<(f64, f64)>,
    junc: Vec<(f64, f64)>,
    vj: Vec<f64>,
    pins: Vec<Option<f64>>,
    prev_pin: Vec<bool>,
    damped: Vec<bool>,
    fs: Vec<f64>,
    /// Loop factors at the current linearisation (diodes conducting change them).
    bdyn: Vec<f64>,
    sens_m: Vec<f64>,
    sens_rows: Vec<AmpRow>,
    sens_outs: Vec<(f64, f64)>,
    sens_junc: Vec<(f64, f64)>,
    /// The junction voltages the last nonlinear step started from (the step before's).
    vj_last: Vec<f64>,
    zvn: Vec<f64>,
    zj: Vec<f64>,
    /// This step's noise draws (see [`super::plan::GroupNoise`]; empty: no noise), set by
    /// the caller before each step.
    pub w: Vec<f64>,
    /// Block nodes' noise currents of this step, A.
    cur: Vec<f64>,
    /// Per op-amp: the stored `p` and state `v` after each of the last four nonlinear
    /// steps, oldest first (the stiff slew model's target, [`SlewStep`]).
    hist: Vec<[(f64, f64); 4]>,
    /// How many of the newest entries of `hist` belong to consecutive nonlinear steps
    /// ending with the previous step.
    hist_n: usize,
    /// Time of the last nonlinear step, s (NaN: none yet).
    last_t: f64,
    /// Per op-amp: the stiff slew model's mode at the end of the last nonlinear step
    /// (`1`, `-1` slewing, `0` tracking).
    mode: Vec<i8>,
    /// Per op-amp: where the stiff slew model holds it in this step's iteration.
    sharp: Vec<Option<f64>>,
    /// Per op-amp: the bracket of that hold's fixed point found so far in this step.
    brk: Vec<(f64, f64)>,
    /// Per op-amp: the stiff slew model's step (its corners) in the last nonlinear step,
    /// when that model took it.
    pub(crate) edge: Vec<Option<Stepped>>,
    /// The op-amp (index in the group) whose state is a network's drive (its output
    /// before the clamp), set by the network engine; the corners of the last nonlinear
    /// step as they reach it go to `drive_w`.
    pub(crate) drive: Option<usize>,
    /// The band-limited corrections of the last nonlinear step's slope corners on the
    /// drive, samples `t - 3 ..= t + 2` of a step ending at `t`
    /// ([`crate::engine::edges::corner_weights`]); `None` when it had none.
    pub(crate) drive_w: Option<[f64; SPAN]>,
    /// Whether the drive's own step in `drive_w` was a reversal edge (a rail-to-rail
    /// jump: its samples take the static clamp plus the corrections, as in the stage
    /// engine).
    pub(crate) drive_rev: bool,
    /// Per op-amp: whether its step was a reversal edge ([`SlewStep::enter_reversal`] and
    /// the others).
    edge_rev: Vec<bool>,
    /// Per reversing op-amp: whether its loop was reversed after the last nonlinear step,
    /// and V+ at the last two (NaN: not known).
    rv_on: Vec<bool>,
    /// Per reversing op-amp: whether its last step returned from a reversal and still
    /// ramped ([`Stepped::ret`]).
    rv_ret: Vec<bool>,
    rv_vp: Vec<[f64; 2]>,
    /// Per reversing op-amp: steps still in a reversal edge's window (the samples whose
    /// output is the static clamp of the drive plus the corners' corrections: the stage
    /// engine's `RevState::ofut`); its corners there go to that override, and only those
    /// the output shows ([`SlewStep::visible`]).
    rv_win: Vec<u8>,
}

impl GroupState {
    /// A state sized for group `gp` of a circuit of `nnodes` nodes (all zero).
    pub(crate) fn new(gp: &GroupPlan, nnodes: usize) -> GroupState {
        let ny = gp.ny();
        let na = gp.amps.len();
        GroupState {
            z: vec![0.0; gp.nz()],
            y: vec![0.0; ny],
            m: vec![0.0; ny * ny],
            rhs: vec![0.0; ny],
            tmp: vec![0.0; ny],
            ynew: vec![0.0; ny],
            perm: vec![0; ny],
            rows: vec![AmpRow::Pin(0.0); na],
            outs: vec![(1.0, 0.0); na],
            junc: vec![(0.0, 0.0); gp.junctions.len()],
            vj: vec![0.0; gp.junctions.len()],
            pins: vec![None; na],
            prev_pin: vec![false; na],
            damped: vec![false; na],
            fs: vec![1.0; na],
            bdyn: gp.amps.iter().map(|a| a.b).collect(),
            sens_m: vec![0.0; ny * ny],
            sens_rows: vec![AmpRow::Pin(0.0); na],
            sens_outs: vec![(1.0, 0.0); na],
            sens_junc: vec![(0.0, 0.0); gp.junctions.len()],
            vj_last: vec![f64::NAN; gp.junctions.len()],
            zvn: vec![0.0; nnodes],
            zj: vec![0.0; gp.caps.len()],
            w: if gp.noise.is_some() {
                vec![0.0; gp.n_kcl + na]
            } else {
                Vec::new()
            },
            cur: vec![0.0; if gp.noise.is_some() { gp.n_kcl } else { 0 }],
            hist: vec![[(0.0, 0.0); 4]; na],
            hist_n: 0,
            last_t: f64::NAN,
            mode: vec![0; na],
            sharp: vec![None; na],
            brk: vec![(0.0, 0.0); na],
            edge: vec![None; na],
            drive: None,
            drive_w: None,
            drive_rev: false,
            edge_rev: vec![false; na],
            rv_on: vec![false; na],
            rv_ret: vec![false; na],
            rv_vp: vec![[f64::NAN; 2]; na],
            rv_win: vec![0; na],
        }
    }

    /// Copy another state of the same group (no allocation).
    pub fn restore_from(&mut self, o: &GroupState) {
        self.z.copy_from_slice(&o.z);
        self.y.copy_from_slice(&o.y);
        self.hist.copy_from_slice(&o.hist);
        self.hist_n = o.hist_n;
        self.last_t = o.last_t;
        self.mode.copy_from_slice(&o.mode);
        self.edge.copy_from_slice(&o.edge);
        self.rv_on.copy_from_slice(&o.rv_on);
        self.rv_ret.copy_from_slice(&o.rv_ret);
        self.rv_vp.copy_from_slice(&o.rv_vp);
        self.rv_win.copy_from_slice(&o.rv_win);
    }
}

/// Running state of a circuit.
#[derive(Debug, Clone, PartialEq)]
pub struct CircuitState {
    /// Every node's voltage at the current step.
    pub vn: Vec<f64>,
    /// Per group.
    pub groups: Vec<GroupState>,
    /// Event counters per op-amp (circuit order).
    pub events: Vec<AmpEvents>,
    /// Steps taken by the fast path and by the nonlinear step.
    pub counts: (u64, u64),
}

/// `ln(sinh(z))` for `z > 0`, without overflow.
#[inline]
fn ln_sinh(z: f64) -> f64 {
    if z > 1.0 {
        z - std::f64::consts::LN_2 + (-(-2.0 * z).exp()).ln_1p()
    } else {
        z.sinh().ln()
    }
}

/// The engine's effective slew factor: for `dz/dt = -lam/h tanh z` from `z0`,
/// `phi = ln(z0 / z1) / lam` with `sinh z1 = sinh z0 exp(-lam)`.
#[inline]
fn phi_eff(z0: f64, lam: f64) -> f64 {
    if z0 < 1e-4 || lam <= 0.0 {
        return 1.0;
    }
    let l1 = ln_sinh(z0) - lam;
    let ln_z1 = if l1 < -20.0 {
        l1
    } else if l1 > 20.0 {
        (l1 + std::f64::consts::LN_2).ln()
    } else {
        l1.exp().asinh().ln()
    };
    ((z0.ln() - ln_z1) / lam).clamp(0.0, 1.0)
}

/// Junction step limiting (the classic logarithmic damping of a diode's Newton step).
#[inline]
pub(crate) fn limit_junction(vnew: f64, vold: f64, nvt: f64, vcrit: f64) -> f64 {
    if vnew > vcrit && (vnew - vold).abs() > 2.0 * nvt {
        if vold > 0.0 {
            let arg = 1.0 + (vnew - vold) / nvt;
            if arg > 0.0 {
                vold + nvt * arg.ln()
            } else {
                vcrit
            }
        } else {
            nvt * (vnew / nvt).ln()
        }
    } else {
        vnew
    }
}

/// Shockley current and conductance at `v` (exponent capped far above any real current).
#[inline]
fn junction(is: f64, nvt: f64, v: f64) -> (f64, f64) {
    let x = (v / nvt).min(200.0);
    let ex = x.exp();
    (is * (ex - 1.0), is * ex / nvt)
}

/// Output row `o = s v + c` of the static clipper at `v` (its tangent).
#[inline]
fn out_row(sh: &crate::engine::shaper::Shaper, v: f64) -> (f64, f64) {
    if v >= sh.lo + sh.w && v <= sh.hi - sh.w {
        return (1.0, 0.0);
    }
    let d = 1e-6;
    let s = (sh.apply(v + d) - sh.apply(v - d)) / (2.0 * d);
    (s, sh.apply(v) - s * v)
}

impl CircuitState {
    /// A state sized for `plan` (all zero; see [`CircuitState::rest`]).
    pub fn new(plan: &CircuitPlan) -> CircuitState {
        let c = &plan.circuit;
        let mut vn = vec![0.0; c.nodes.len()];
        for (i, n) in c.nodes.iter().enumerate() {
            if let NodeKind::Fixed(v) = n.kind {
                vn[i] = v;
            }
        }
        CircuitState {
            vn,
            groups: plan
                .groups
                .iter()
                .map(|g| GroupState::new(g, c.nodes.len()))
                .collect(),
            events: vec![AmpEvents::default(); c.amps.len()],
            counts: (0, 0),
        }
    }

    /// The rest (DC) state for the input values already in `vn`: capacitors open, op-amps
    /// at equilibrium (held at their swing where the loop cannot reach it), diodes by
    /// their Shockley law.
    pub fn rest(&mut self, plan: &CircuitPlan) -> Result<(), CircuitError> {
        let c = &plan.circuit;
        for (gp, st) in plan.groups.iter().zip(self.groups.iter_mut()) {
            rest_group(c, gp, &mut self.vn, st)?;
        }
        Ok(())
    }

    /// One step of every group; `time_s` names the step in an error.
    #[inline]
    pub fn step(
        &mut self,
        plan: &CircuitPlan,
        fast: bool,
        time_s: f64,
    ) -> Result<(), CircuitError> {
        let c = &plan.circuit;
        for (gp, st) in plan.groups.iter().zip(self.groups.iter_mut()) {
            step_group(
                c,
                gp,
                plan.h,
                fast,
                &mut self.vn,
                st,
                &mut self.events,
                &mut self.counts,
                time_s,
            )?;
        }
        Ok(())
    }

    /// The state `v` of op-amp `amp` (its output before the clipper).
    pub fn amp_state(&self, plan: &CircuitPlan, amp: usize) -> f64 {
        for (gp, st) in plan.groups.iter().zip(&self.groups) {
            if let Some(j) = gp.amps.iter().position(|a| a.amp == amp) {
                return st.z[gp.caps.len() + j];
            }
        }
        0.0
    }

    /// Copy another state of the same plan (no allocation).
    pub fn restore_from(&mut self, o: &CircuitState) {
        self.vn.copy_from_slice(&o.vn);
        for (a, b) in self.groups.iter_mut().zip(&o.groups) {
            a.restore_from(b);
        }
        self.events.copy_from_slice(&o.events);
        self.counts = o.counts;
    }
}

/// One step of one group (the generic path): the linear fast path when `fast` and nothing
/// is near a limit, else the nonlinear step; `counts` as [`CircuitState::counts`].
#[allow(clippy::too_many_arguments)]
#[inline]
pub(crate) fn step_group(
    c: &Circuit,
    gp: &GroupPlan,
    h: f64,
    fast: bool,
    vn: &mut [f64],
    st: &mut GroupState,
    events: &mut [AmpEvents],
    counts: &mut (u64, u64),
    time_s: f64,
) -> Result<(), CircuitError> {
    let done = fast
        && gp
            .fast
            .as_ref()
            .is_some_and(|fp| fast_step(c, gp, fp, vn, st));
    if done {
        counts.0 += 1;
    } else {
        counts.1 += 1;
        full_step(c, gp, h, vn, st, events, time_s)?;
    }
    Ok(())
}

fn rest_group(
    c: &Circuit,
    gp: &GroupPlan,
    vn: &mut [f64],
    st: &mut GroupState,
) -> Result<(), CircuitError> {
    dc_group(c, gp, vn, st, false)
}

/// [`rest_group`], from the solution already in `st` when `warm` (its node values and
/// junction voltages: a nearby input's, so that a loop closed through diodes stays closed
/// on the first linearisation instead of pinning its op-amp at a rail).
fn dc_group(
    c: &Circuit,
    gp: &GroupPlan,
    vn: &mut [f64],
    st: &mut GroupState,
    warm: bool,
) -> Result<(), CircuitError> {
    let ny = gp.ny();
    let nn = gp.nodes.len();
    let nc = gp.caps.len();
    let na = gp.amps.len();
    if !warm {
        st.y.fill(0.0);
        for (i, &n) in gp.nodes.iter().enumerate() {
            st.y[i] = vn[n];
        }
        // start every op-amp inside its linear region (at 0 V, or mid-swing when 0 V is outside
        // it, as on a single supply), so the first linearisation closes every loop
        for (j, ac) in gp.amps.iter().enumerate() {
            let sh = &c.amps[ac.amp].shaper;
            let (l, h) = (sh.lo + sh.w, sh.hi - sh.w);
            let v = if (l..=h).contains(&0.0) {
                0.0
            } else {
                0.5 * (sh.lo + sh.hi)
            };
            st.y[nn + j] = v;
            if let Some(i) = gp.col[c.amps[ac.amp].out] {
                st.y[i] = v;
            }
        }
        st.vj.fill(0.0);
    }
    st.pins.fill(None);
    st.hist_n = 0;
    st.last_t = f64::NAN;
    st.mode.fill(0);
    st.edge.fill(None);
    st.rv_on.fill(false);
    st.rv_ret.fill(false);
    st.rv_vp.fill([f64::NAN; 2]);
    st.rv_win.fill(0);
    let mut converged = false;
    for _ in 0..MAX_ITER {
        for (j, ac) in gp.amps.iter().enumerate() {
            let a = &c.amps[ac.amp];
            let v = st.y[nn + j];
            st.outs[j] = out_row(&a.shaper, v);
            if ac.explicit && st.pins[j].is_none() {
                // no negative feedback: the output sits at the rail its input points to
                let vd = val(gp, vn, &st.y, a.plus) - val(gp, vn, &st.y, a.minus) + a.vos;
                st.rows[j] = AmpRow::Pin(if vd >= 0.0 { a.shaper.hi } else { a.shaper.lo });
                continue;
            }
            st.rows[j] = match st.pins[j] {
                Some(x) => AmpRow::Pin(x),
                None => {
                    let vp = val(gp, vn, &st.y, a.plus);
                    let plus_fixed = match a.cm {
                        Some((cl, ch)) if !a.reversal && (vp < cl || vp > ch) => {
                            Some(vp.clamp(cl, ch.max(cl)))
                        }
                        _ => None,
                    };
                    AmpRow::Dc { plus_fixed }
                }
            };
        }
        for q in 0..gp.junctions.len() {
            let (is, nvt, _) = gp.jparams[q];
            let (i, g) = junction(is, nvt, st.vj[q]);
            st.junc[q] = (g, i - g * st.vj[q]);
        }
        let lin = Lin {
            rows: &st.rows,
            outs: &st.outs,
            junc: &st.junc,
            caps: None,
            consts: true,
        };
        assemble(c, gp, &lin, vn, &mut st.m, &mut st.rhs);
        if !lu_factor(&mut st.m, ny, &mut st.perm) {
            return Err(CircuitError::Singular {
                what: gp.describe(c),
            });
        }
        lu_solve(&st.m, ny, &st.perm, &mut st.rhs, &mut st.tmp);
        st.ynew.copy_from_slice(&st.rhs);
        let mut changed = false;
        for (j, ac) in gp.amps.iter().enumerate() {
            let a = &c.amps[ac.amp];
            let v = st.ynew[nn + j];
            if st.pins[j].is_none() && !ac.explicit && (v < a.shaper.lo || v > a.shaper.hi) {
                st.pins[j] = Some(v.clamp(a.shaper.lo, a.shaper.hi));
                changed = true;
            }
            if ac.explicit {
                let vd = val(gp, vn, &st.ynew, a.plus) - val(gp, vn, &st.ynew, a.minus) + a.vos;
                let want = if vd >= 0.0 { a.shaper.hi } else { a.shaper.lo };
                if (want - v).abs() > 1e-12 && st.pins[j].is_none() {
                    changed = true;
                }
            }
        }
        let mut jconv = true;
        for (q, &ei) in gp.junctions.iter().enumerate() {
            let e = &c.elems[ei];
            let (_, nvt, vcrit) = gp.jparams[q];
            let v = val(gp, vn, &st.ynew, e.a) - val(gp, vn, &st.ynew, e.b);
            let vl = limit_junction(v, st.vj[q], nvt, vcrit);
            if (vl - st.vj[q]).abs() > 1e-9 || vl != v {
                jconv = false;
            }
            st.vj[q] = vl;
        }
        let mut dy: f64 = 0.0;
        for (a, b) in st.y.iter().zip(&st.ynew) {
            dy = dy.max((a - b).abs() / (1.0 + b.abs()));
        }
        st.y.copy_from_slice(&st.ynew);
        if !changed && jconv && dy < 1e-10 {
            converged = true;
            break;
        }
    }
    if !converged {
        return Err(CircuitError::NoConvergence {
            what: gp.describe(c),
            time_s: 0.0,
        });
    }
    for (i, &n) in gp.nodes.iter().enumerate() {
        vn[n] = st.y[i];
    }
    for (q, &(ei, gc)) in gp.caps.iter().enumerate() {
        let e = &c.elems[ei];
        st.z[q] = gc * (vn[e.a] - vn[e.b]);
    }
    for (j, ac) in gp.amps.iter().enumerate() {
        let a = &c.amps[ac.amp];
        let v = st.y[nn + j];
        let vd = vn[a.plus] - vn[a.minus] + a.vos;
        st.z[nc + j] = v;
        st.z[nc + na + j] = vd + ac.b * v;
    }
    Ok(())
}

/// One group's DC solution for the known node values in `vn` (as the rest state takes it:
/// capacitors open, op-amps at equilibrium or held at their swing, diodes by their Shockley
/// law), from a cold start or, when `warm`, from the solution in `st` (a nearby input's);
/// the group's nodes are written to `vn` and the solution kept in `st`. Returns, per op-amp
/// of the group, its state and whether it is held at its swing. A static map of the group
/// (`engine::loopmap`) is tabulated from these.
pub fn static_point(
    c: &Circuit,
    gp: &GroupPlan,
    vn: &mut [f64],
    st: &mut GroupState,
    warm: bool,
) -> Result<Vec<(f64, bool)>, CircuitError> {
    dc_group(c, gp, vn, st, warm)?;
    let nn = gp.nodes.len();
    Ok((0..gp.amps.len())
        .map(|j| (st.y[nn + j], st.pins[j].is_some()))
        .collect())
}

/// The linear step; false (nothing changed) when something came near a limit.
#[inline]
fn fast_step(
    c: &Circuit,
    gp: &GroupPlan,
    fp: &super::plan::FastPath,
    vn: &mut [f64],
    st: &mut GroupState,
) -> bool {
    let ny = gp.ny();
    let nk = gp.known.len();
    let nz = gp.nz();
    for i in 0..ny {
        let mut s = fp.y0[i];
        let ri = &fp.ay_in[i * nk..(i + 1) * nk];
        for (w, &n) in ri.iter().zip(&gp.known) {
            s += w * vn[n];
        }
        let rz = &fp.ay_z[i * nz..(i + 1) * nz];
        for (w, z) in rz.iter().zip(&st.z) {
            s += w * z;
        }
        st.ynew[i] = s;
    }
    if let (Some(gn), false) = (&gp.noise, st.w.is_empty()) {
        let nw = st.w.len();
        for (i, yi) in st.ynew.iter_mut().enumerate() {
            let ri = &gn.ay_w[i * nw..(i + 1) * nw];
            let mut s = 0.0;
            for (a, b) in ri.iter().zip(&st.w) {
                s += a * b;
            }
            *yi += s;
        }
    }
    let nn = gp.nodes.len();
    let y = &st.ynew;
    for (j, ac) in gp.amps.iter().enumerate() {
        let a = &c.amps[ac.amp];
        let v = y[nn + j];
        let vp = val(gp, vn, y, a.plus);
        let vd = vp - val(gp, vn, y, a.minus) + a.vos + en_of(gp, st, j);
        let sh = &a.shaper;
        let mut ok = vd.abs() <= FAST_VD * a.vov && v >= sh.lo + sh.w && v <= sh.hi - sh.w;
        if let Some((cl, ch)) = a.cm {
            let margin = if a.reversal { REV_FAST_MARGIN } else { 0.0 };
            ok &= vp >= cl + margin && vp <= ch - margin;
        }
        if !ok || !v.is_finite() {
            return false;
        }
    }
    for (q, &ei) in gp.junctions.iter().enumerate() {
        let e = &c.elems[ei];
        if val(gp, vn, y, e.a) - val(gp, vn, y, e.b) > fp.vth[q] {
            return false;
        }
    }
    commit(c, gp, vn, st);
    true
}

/// The voltage noise of op-amp `j` of the group at this step (0 without noise).
#[inline]
fn en_of(gp: &GroupPlan, st: &GroupState, j: usize) -> f64 {
    if st.w.is_empty() {
        0.0
    } else {
        st.w[gp.n_kcl + j]
    }
}

/// Add this step's noise to an assembled right-hand side: the block nodes' currents
/// (`st.cur`, from [`noise_currents`]) and each op-amp's `en` beside its offset.
fn add_noise_rhs(gp: &GroupPlan, st: &mut GroupState) {
    if st.w.is_empty() {
        return;
    }
    for (r, i) in st.rhs.iter_mut().zip(&st.cur) {
        *r += i;
    }
    let nn = gp.nodes.len();
    for j in 0..gp.amps.len() {
        let en = st.w[gp.n_kcl + j];
        st.rhs[nn + j] += match st.rows[j] {
            AmpRow::Step { k, .. } => k * en,
            AmpRow::Dc { .. } => en,
            AmpRow::Pin(_) => 0.0,
        };
    }
}

/// This step's block-node noise currents `chol g` into `st.cur`.
fn noise_currents(gp: &GroupPlan, st: &mut GroupState) {
    let Some(gn) = &gp.noise else { return };
    if st.w.is_empty() {
        return;
    }
    let nk = gp.n_kcl;
    for (r, cr) in st.cur.iter_mut().enumerate() {
        let row = &gn.chol[r * nk..r * nk + r + 1];
        *cr = row.iter().zip(&st.w).map(|(a, b)| a * b).sum();
    }
}

/// Write the solution in `st.ynew` to the node array and advance the state.
#[inline]
pub(crate) fn commit(c: &Circuit, gp: &GroupPlan, vn: &mut [f64], st: &mut GroupState) {
    let nn = gp.nodes.len();
    let nc = gp.caps.len();
    let na = gp.amps.len();
    st.y.copy_from_slice(&st.ynew);
    for (i, &n) in gp.nodes.iter().enumerate() {
        vn[n] = st.y[i];
    }
    for (q, &(ei, gc)) in gp.caps.iter().enumerate() {
        let e = &c.elems[ei];
        let (ka, kb) = gp.cap_update(q);
        st.z[q] = ka * gc * (vn[e.a] - vn[e.b]) - kb * st.z[q];
    }
    for (j, ac) in gp.amps.iter().enumerate() {
        let a = &c.amps[ac.amp];
        let v = st.y[nn + j];
        let vp = match a.cm {
            Some((cl, ch)) if !a.reversal => vn[a.plus].clamp(cl, ch.max(cl)),
            _ => vn[a.plus],
        };
        let vd = vp - vn[a.minus] + a.vos + en_of(gp, st, j);
        st.z[nc + j] = v;
        st.z[nc + na + j] = vd + ac.b * v;
    }
}

/// Each op-amp's loop factor `-dVd/dv` at the current linearisation of the diodes, into
/// `st.bdyn`.
fn loop_factors(c: &Circuit, gp: &GroupPlan, st: &mut GroupState) -> Result<(), CircuitError> {
    let ny = gp.ny();
    let nn = gp.nodes.len();
    for (d, s) in st.sens_junc.iter_mut().zip(&st.junc) {
        *d = (s.0, 0.0);
    }
    // through the network as if every output were linear (a clipped output is the state
    // clamp's business, not a broken loop)
    st.sens_outs.fill((1.0, 0.0));
    st.sens_rows.fill(AmpRow::Pin(0.0));
    let lin = Lin {
        rows: &st.sens_rows,
        outs: &st.sens_outs,
        junc: &st.sens_junc,
        caps: Some(&st.zj),
        consts: false,
    };
    assemble_step(c, gp, &lin, &st.zvn, &mut st.sens_m, &mut st.rhs);
    if !lu_factor(&mut st.sens_m, ny, &mut st.perm) {
        return Err(CircuitError::Singular {
            what: gp.describe(c),
        });
    }
    for (j, ac) in gp.amps.iter().enumerate() {
        st.rhs.fill(0.0);
        st.rhs[nn + j] = 1.0;
        lu_solve(&st.sens_m, ny, &st.perm, &mut st.rhs, &mut st.tmp);
        let a = &c.amps[ac.amp];
        let vd = val(gp, &st.zvn, &st.rhs, a.plus) - val(gp, &st.zvn, &st.rhs, a.minus);
        st.bdyn[j] = -vd;
    }
    Ok(())
}

/// The nonlinear step's Newton iteration ends when no junction voltage moved by more than
/// this (relative to `1 + |v|`, V) and no unknown by more than [`STEP_TOL`]: the iteration
/// converges quadratically there, so the solution kept is far closer than that (a
/// microvolt on a 10 V signal is -140 dB; the alias and THD tests read the same figures
/// as with 1e-9 and 1e-10, which took one more iteration on most steps).
const JUNCTION_TOL: f64 = 1e-7;

/// The unknowns' largest change (relative to `1 + |y|`) of an iteration that ends the
/// nonlinear step, and below which the stiff slew model reads the solution as settled.
const STEP_TOL: f64 = 1e-7;

/// The nonlinear step of one group.
#[allow(clippy::too_many_arguments)]
pub(crate) fn full_step(
    c: &Circuit,
    gp: &GroupPlan,
    h: f64,
    vn: &mut [f64],
    st: &mut GroupState,
    events: &mut [AmpEvents],
    time_s: f64,
) -> Result<(), CircuitError> {
    let ny = gp.ny();
    let nn = gp.nodes.len();
    let nc = gp.caps.len();
    let na = gp.amps.len();
    noise_currents(gp, st);
    // the reversal factor from the previous values, fixed for the step
    for (j, ac) in gp.amps.iter().enumerate() {
        let a = &c.amps[ac.amp];
        st.fs[j] = reversing(a).map_or(1.0, |cm| input_factor(cm, vn[a.plus]));
        st.prev_pin[j] = false;
    }
    let consecutive = st.last_t.is_finite() && ((time_s - st.last_t) - h).abs() < 0.25 * h;
    for (q, &ei) in gp.junctions.iter().enumerate() {
        let e = &c.elems[ei];
        let v = val(gp, vn, &st.y, e.a) - val(gp, vn, &st.y, e.b);
        // Newton starts each junction from the line through its last two solutions (at most
        // two n Vt from the last: an exponential is not extrapolated far)
        let (_, nvt, _) = gp.jparams[q];
        let d = if consecutive { v - st.vj_last[q] } else { 0.0 };
        st.vj[q] = if d.is_finite() {
            v + d.clamp(-2.0 * nvt, 2.0 * nvt)
        } else {
            v
        };
        st.vj_last[q] = v;
    }
    // the stiff slew model's history holds only consecutive nonlinear steps
    if !consecutive {
        // after linear steps (or the rest state): tracking, reversed as the factor from
        // the previous values says (inside the range after linear steps, whose fast path
        // keeps `REV_FAST_MARGIN` from its ends)
        st.hist_n = 0;
        st.mode.fill(0);
        for (on, &f) in st.rv_on.iter_mut().zip(&st.fs) {
            *on = f <= 0.0;
        }
        st.rv_ret.fill(false);
        st.rv_vp.fill([f64::NAN; 2]);
        st.rv_win.fill(0);
    }
    st.sharp.fill(None);
    st.edge.fill(None);
    st.edge_rev.fill(false);
    st.drive_w = None;
    st.drive_rev = false;
    st.brk.fill((f64::NEG_INFINITY, f64::INFINITY));
    let mut converged = false;
    for iter in 0..MAX_ITER {
        for q in 0..gp.junctions.len() {
            let (is, nvt, _) = gp.jparams[q];
            let (i, g) = junction(is, nvt, st.vj[q]);
            st.junc[q] = (g, i - g * st.vj[q]);
        }
        for (j, ac) in gp.amps.iter().enumerate() {
            let a = &c.amps[ac.amp];
            st.outs[j] = out_row(&a.shaper, st.y[nn + j]);
            st.bdyn[j] = ac.b;
        }
        if !gp.junctions.is_empty() && na > 0 {
            loop_factors(c, gp, st)?;
        }
        // each op-amp's row: explicit (no negative loop) or the exact step
        for (j, ac) in gp.amps.iter().enumerate() {
            let a = &c.amps[ac.amp];
            let vg = st.y[nn + j];
            let v0 = st.z[nc + j];
            let bd = st.bdyn[j];
            // the stored p uses the compiled loop factor: re-split it with this one
            let p0 = st.z[nc + na + j] - ac.b * v0 + bd * v0;
            let f = st.fs[j];
            st.pins[j] = None;
            if let Some(x) = st.sharp[j] {
                st.pins[j] = Some(x);
                st.rows[j] = AmpRow::Pin(x);
                continue;
            }
            if ac.explicit || bd * f <= super::plan::BMIN {
                let vd = f * (p0 - bd * v0);
                let k = std::f64::consts::TAU * a.gbw;
                let v1 = v0 + h * (a.slew * (vd / a.vov).tanh() - k * a.eps * v0);
                let v1 = if v1.is_finite() { v1 } else { v0 };
                let x = v1.clamp(a.state_lo, a.state_hi);
                st.pins[j] = Some(x);
                st.rows[j] = AmpRow::Pin(x);
                continue;
            }
            let vp = val(gp, vn, &st.y, a.plus);
            let plus_fixed = match a.cm {
                Some((cl, ch)) if !a.reversal && (vp < cl || vp > ch) => {
                    Some(vp.clamp(cl, ch.max(cl)))
                }
                _ => None,
            };
            let pe = plus_fixed.unwrap_or(vp);
            let pg = pe - val(gp, vn, &st.y, a.minus) + a.vos + en_of(gp, st, j) + bd * vg;
            let z0 = (f * (0.5 * (pg + p0) - bd * v0) / a.vov).abs();
            let phi = phi_eff(z0, ac.kh * f * bd);
            let g = f * phi;
            let cc = g * bd + a.eps;
            let (e, a1, a0) = crate::engine::plan::foh(ac.kh * cc);
            let inv = g / cc;
            st.rows[j] = AmpRow::Step {
                k: inv * a1,
                b: bd,
                r: e * v0 + inv * a0 * p0,
                plus_fixed,
            };
        }
        // solve; an op-amp past its slew bound or state limit is held there and the
        // group solved again (at most once per op-amp); a state that would move by more
        // than V_STEP from this iteration's guess is held at that distance (damping)
        st.damped.fill(false);
        for _ in 0..=na {
            let lin = Lin {
                rows: &st.rows,
                outs: &st.outs,
                junc: &st.junc,
                caps: Some(&st.z[..nc]),
                consts: true,
            };
            assemble_step(c, gp, &lin, vn, &mut st.m, &mut st.rhs);
            add_noise_rhs(gp, st);
            if !lu_factor(&mut st.m, ny, &mut st.perm) {
                return Err(CircuitError::Singular {
                    what: gp.describe(c),
                });
            }
            lu_solve(&st.m, ny, &st.perm, &mut st.rhs, &mut st.tmp);
            st.ynew.copy_from_slice(&st.rhs);
            if st.ynew.iter().any(|x| !x.is_finite()) {
                return Err(CircuitError::NoConvergence {
                    what: gp.describe(c),
                    time_s,
                });
            }
            let mut new_pin = false;
            for (j, ac) in gp.amps.iter().enumerate() {
                if st.pins[j].is_some() {
                    continue;
                }
                let a = &c.amps[ac.amp];
                let v0 = st.z[nc + j];
                let v = st.ynew[nn + j];
                let dmax = ac.kh * (a.vov + a.eps * v0.abs());
                let mut pin = None;
                if (v - v0).abs() > dmax * (1.0 + 1e-9) {
                    pin = Some(v0 + (v - v0).clamp(-dmax, dmax));
                }
                let vv = pin.unwrap_or(v);
                if vv < a.state_lo || vv > a.state_hi {
                    pin = Some(vv.clamp(a.state_lo, a.state_hi));
                }
                let vg = st.y[nn + j];
                let target = pin.unwrap_or(v);
                if (target - vg).abs() > V_STEP {
                    pin = Some(vg + (target - vg).clamp(-V_STEP, V_STEP));
                    st.damped[j] = true;
                }
                if let Some(x) = pin {
                    st.pins[j] = Some(x);
                    st.rows[j] = AmpRow::Pin(x);
                    new_pin = true;
                }
            }
            if !new_pin {
                break;
            }
        }
        let mut same_pins = true;
        for (j, p) in st.pins.iter().enumerate() {
            let now = p.is_some() && !st.damped[j];
            if now != st.prev_pin[j] {
                same_pins = false;
            }
            st.prev_pin[j] = now;
        }
        let mut jconv = true;
        for (q, &ei) in gp.junctions.iter().enumerate() {
            let e = &c.elems[ei];
            let (_, nvt, vcrit) = gp.jparams[q];
            let v = val(gp, vn, &st.ynew, e.a) - val(gp, vn, &st.ynew, e.b);
            let vl = limit_junction(v, st.vj[q], nvt, vcrit);
            if (vl - st.vj[q]).abs() > JUNCTION_TOL * (1.0 + vl.abs()) || vl != v {
                jconv = false;
            }
            st.vj[q] = vl;
        }
        let mut dy: f64 = 0.0;
        for (a, b) in st.y.iter().zip(&st.ynew) {
            dy = dy.max((a - b).abs() / (1.0 + b.abs()));
        }
        // the stiff slew model reads the solution once the rest of the group has settled
        // on it (junctions, holds, no damping): the target read from a solution still on
        // its way can point the wrong way
        let settled = same_pins && jconv && dy < STEP_TOL && !st.damped.contains(&true);
        if settled && sharp_steps(c, gp, h, vn, st, iter >= SHARP_SETTLE) {
            same_pins = false;
        }
        st.y.copy_from_slice(&st.ynew);
        if same_pins && jconv && dy < STEP_TOL {
            converged = true;
            break;
        }
    }
    if !converged {
        return Err(CircuitError::NoConvergence {
            what: gp.describe(c),
            time_s,
        });
    }
    commit(c, gp, vn, st);
    for j in 0..na {
        st.mode[j] = match (st.sharp[j], st.edge[j]) {
            (Some(_), Some(r)) => r.mode,
            _ => 0,
        };
        st.rv_ret[j] = matches!((st.sharp[j], st.edge[j]), (Some(_), Some(r)) if r.ret);
        if st.sharp[j].is_none() {
            st.edge[j] = None;
        }
        let a = &c.amps[gp.amps[j].amp];
        // as if the output were linear (see `sharp_steps`)
        let v = st.z[nc + j];
        let mut p = st.z[nc + na + j] - gp.amps[j].b * (v - vn[a.out]);
        if let Some(cm) = reversing(a) {
            let vp = vn[a.plus];
            let on = input_factor(cm, vp) <= 0.0;
            // the step of an edge (the factor changed sign): its solution's target holds
            // the rest of the loop's response to the jump (a buffer after it slewing to
            // follow), not the target; the extrapolation the edge was taken with stands
            // in (the steps after it read their target from it)
            if on != st.rv_on[j] && st.edge_rev[j] && st.hist_n >= 4 {
                let h = &st.hist[j];
                p = cubic_next([h[0].0, h[1].0, h[2].0, h[3].0]);
            }
            st.rv_on[j] = on;
            st.rv_vp[j] = [st.rv_vp[j][1], vp];
        }
        st.hist[j].rotate_left(1);
        st.hist[j][3] = (p, v);
    }
    st.hist_n = (st.hist_n + 1).min(4);
    st.last_t = time_s;
    drive_corners(gp, st);
    for j in 0..na {
        let corners = st.edge[j].is_some_and(|r| r.n > 0);
        st.rv_win[j] = if corners && (st.edge_rev[j] || st.rv_win[j] > 0) {
            2
        } else {
            st.rv_win[j].saturating_sub(1)
        };
    }
    for (j, ac) in gp.amps.iter().enumerate() {
        let a = &c.amps[ac.amp];
        let ev = &mut events[ac.amp];
        let v = st.z[nc + j];
        let p = st.z[nc + na + j];
        let f = st.fs[j];
        // slewing only while free to move: not held at the swing (or current) limit, nor
        // latched by a phase reversal (f <= 0), as the stage engine counts it
        let held = v <= a.state_lo || v >= a.state_hi;
        if f > 0.0 && !held && (f * (p - ac.b * v)).abs() > a.vov {
            ev.slew += 1;
        }
        if let Some((cl, ch)) = a.cm {
            let vp = vn[a.plus];
            if vp < cl || vp > ch {
                ev.cm += 1;
            }
        }
        if f < 0.0 {
            ev.rev += 1;
        }
        if a.shaper.clipping(v) {
            ev.clip += 1;
            ev.first_clip_s.get_or_insert(time_s);
        }
    }
    Ok(())
}

/// The next sample of the cubic through four equally spaced ones (oldest first): the
/// stand-in for a reversal edge's target (the fourth difference set to zero).
#[inline]
fn cubic_next(p: [f64; 4]) -> f64 {
    4.0 * (p[3] + p[1]) - 6.0 * p[2] - p[0]
}

/// The common-mode range of a part whose phase reverses outside it.
#[inline]
fn reversing(a: &super::Amp) -> Option<(f64, f64)> {
    a.cm.filter(|_| a.reversal)
}

/// The reversal factor `tanh(m / CM_DELTA)` of V+ at `vp`, `m` its margin inside the
/// common-mode range (negative outside), as the stage engine takes it.
#[inline]
fn input_factor((cl, ch): (f64, f64), vp: f64) -> f64 {
    ((vp - cl).min(ch - vp) * (1.0 / CM_DELTA)).tanh()
}

/// Iterations of a nonlinear step after which the stiff slew model no longer lets an
/// op-amp go back to the effective-`phi` row once it holds it (no limit cycle between the
/// two).
const SHARP_SETTLE: usize = 12;

/// Largest relative difference between an op-amp's loop factor through the group as its
/// other op-amps now respond (held ones do not) and the one its step uses, for the stiff
/// slew model to take the step.
const LOOP_AGREE: f64 = 0.05;

/// The stiff slew model ([`SlewStep`], as the stage engine takes it) for each op-amp of the
/// group after one solve of the iteration (`st.ynew`): the target's newest sample `p` read
/// from the solution, the older ones from the history. Where the model takes the step (the
/// loop stiff, and the step slewing or reaching the slew rate), the op-amp is held at the
/// model's end value in the next solve (`st.sharp`) and its corners kept (`st.edge`); the
/// slew corners then fall between samples where the tone puts them instead of on the grid.
/// True when a hold was set, moved or released (the iteration has not settled).
fn sharp_steps(
    c: &Circuit,
    gp: &GroupPlan,
    h: f64,
    vn: &[f64],
    st: &mut GroupState,
    settle: bool,
) -> bool {
    let ny = gp.ny();
    let nn = gp.nodes.len();
    let nc = gp.caps.len();
    let na = gp.amps.len();
    let mut moved = false;
    for (j, ac) in gp.amps.iter().enumerate() {
        let a = &c.amps[ac.amp];
        let rev = reversing(a);
        let vp = val(gp, vn, &st.ynew, a.plus);
        // the input factor at the step's end (the stage engine's convention); 1 unless
        // the part reverses
        let f = rev.map_or(st.fs[j], |cm| input_factor(cm, vp));
        if ac.explicit || (f <= 0.0 && rev.is_none()) {
            continue;
        }
        let bd = st.bdyn[j];
        let v0 = st.z[nc + j];
        let vend = st.ynew[nn + j];
        // The model takes the target `p = Vd + b v` as independent of the op-amp's own
        // output, which holds while the other op-amps of its loop follow it as the loop
        // factor assumes. Not when one of them is held (slewing itself, or at its swing):
        // the loop is then open, and the effective-phi step takes it. The op-amp's own
        // output past its clamp's knee is the state clamp's business, not an open loop (as
        // the loop factor is taken): the target is read as if the output were linear.
        let own_flat = st.outs[j].0 < 1.0;
        let open = na > 1 && !own_flat && {
            st.rhs.fill(0.0);
            st.rhs[nn + j] = 1.0;
            lu_solve(&st.m, ny, &st.perm, &mut st.rhs, &mut st.tmp);
            let dv = st.rhs[nn + j];
            let dvd = val(gp, &st.zvn, &st.rhs, a.plus) - val(gp, &st.zvn, &st.rhs, a.minus);
            let b_act = -dvd / dv;
            !b_act.is_finite() || (b_act - bd).abs() > LOOP_AGREE * bd.abs()
        };
        let pe = match a.cm {
            Some((cl, ch)) if !a.reversal => vp.clamp(cl, ch.max(cl)),
            _ => vp,
        };
        let pend = pe - val(gp, vn, &st.ynew, a.minus) + a.vos + en_of(gp, st, j) + bd * vend
            - bd * (vend - val(gp, vn, &st.ynew, a.out));
        // the stored p of each step uses the compiled loop factor: re-split with this one
        let resplit = |(zp, v): (f64, f64)| zp + (bd - ac.b) * v;
        let mut p = [0.0; 5];
        p[4] = pend;
        for i in (0..4).rev() {
            p[i] = if i + st.hist_n >= 4 {
                resplit(st.hist[j][i])
            } else if i == 3 {
                // no nonlinear step before: the state the linear steps left
                resplit((st.z[nc + na + j], v0))
            } else {
                // before the history: the line through the later two
                2.0 * p[i + 1] - p[i + 2]
            };
        }
        let ev = SlewStep {
            p,
            f,
            b: bd,
            eps: a.eps,
            kh: ac.kh,
            srh: a.slew * h,
        };
        let edge = match rev {
            Some(cm) => {
                let (sw, hold) = Swing::pair(a.shaper.lo, a.shaper.hi, a.state_lo, a.state_hi);
                // An edge's own jump drives the rest of its loop within the step (a buffer
                // after it slews to follow), so the solution's `p` holds that response,
                // not the target: the cubic through the last four samples stands in.
                let mut evx = ev;
                if st.hist_n >= 4 {
                    evx.p[4] = cubic_next([p[0], p[1], p[2], p[3]]);
                }
                reversal_step(
                    &evx,
                    cm,
                    st.rv_on[j],
                    st.rv_ret[j],
                    st.rv_vp[j],
                    vp,
                    v0,
                    st.mode[j],
                    sw,
                    hold,
                )
            }
            None => None,
        };
        if edge.is_some() && st.edge_rev[j] && st.sharp[j].is_some() {
            // a reversal edge is taken once per step, from the first settled solution:
            // its ramps run at the slew rate whatever the target, and the direction they
            // take flips with the hold on either side of the unstable balance (no fixed
            // point to iterate to)
            continue;
        }
        if edge.is_none() && open {
            // the slew model's target needs the loop closed (a reversal edge's ramps do
            // not)
            if st.sharp[j].is_some() && !settle {
                st.sharp[j] = None;
                st.edge[j] = None;
                st.edge_rev[j] = false;
                moved = true;
            }
            continue;
        }
        st.edge_rev[j] = edge.is_some();
        let r = edge.or_else(|| {
            let r = ev.step_if_eventful(v0, st.mode[j])?;
            // in an edge's window, only the corners the output shows
            Some(match rev {
                Some(_) if st.rv_win[j] > 0 => ev.visible(
                    &r,
                    Swing {
                        lo: a.shaper.lo,
                        hi: a.shaper.hi,
                    },
                ),
                _ => r,
            })
        });
        let want = r.map(|r| {
            let x = if r.v.is_finite() { r.v } else { v0 };
            x.clamp(a.state_lo, a.state_hi)
        });
        match (want, st.sharp[j]) {
            (Some(x), Some(y)) => {
                // the hold `y` gave `x`: the fixed point lies above `y` when `x > y`
                let tol = 1e-12 * (1.0 + y.abs());
                let (lo, hi) = &mut st.brk[j];
                if x > y {
                    *lo = lo.max(y);
                } else {
                    *hi = hi.min(y);
                }
                let (lo, hi) = (*lo, *hi);
                if (x - y).abs() > tol && hi - lo > tol {
                    // past the settling iterations, bisect the bracket: the end value can
                    // jump with the target (a ramp that just meets its curve at the
                    // step's end, or just misses it), and the plain iteration then
                    // alternates across the jump
                    let next = if settle && lo.is_finite() && hi.is_finite() {
                        0.5 * (lo + hi)
                    } else {
                        x
                    };
                    st.sharp[j] = Some(next);
                    moved = true;
                }
                st.edge[j] = r;
            }
            (Some(x), None) => {
                st.sharp[j] = Some(x);
                st.edge[j] = r;
                moved = true;
            }
            (None, Some(_)) => {
                if !settle {
                    st.sharp[j] = None;
                    st.edge[j] = None;
                    moved = true;
                }
            }
            (None, None) => {}
        }
    }
    moved
}

/// The slope corners of this step as they reach the drive (`st.drive`): the drive's own,
/// and each other op-amp's scaled by the drive's sensitivity to it within the step (the
/// last solve's factors: a follower passes a corner whole, an integrator a small part). Into
/// `st.drive_w`.
fn drive_corners(gp: &GroupPlan, st: &mut GroupState) {
    let Some(d) = st.drive else { return };
    let ny = gp.ny();
    let nn = gp.nodes.len();
    let mut w = [0.0; SPAN];
    let mut any = false;
    for j in 0..gp.amps.len() {
        let Some(r) = st.edge[j] else { continue };
        if r.n == 0 {
            continue;
        }
        let s = if j == d {
            1.0
        } else if st.pins[d].is_some() {
            // the drive is held (at its swing, or by the model): no corner reaches it
            0.0
        } else {
            st.rhs.fill(0.0);
            st.rhs[nn + j] = 1.0;
            lu_solve(&st.m, ny, &st.perm, &mut st.rhs, &mut st.tmp);
            st.rhs[nn + d]
        };
        if s != 0.0 && s.is_finite() {
            let cw = corner_weights(&r);
            for (a, b) in w.iter_mut().zip(cw) {
                *a += s * b;
            }
            any = true;
        }
    }
    st.drive_w = any.then_some(w);
    st.drive_rev = any && st.edge[d].is_some() && (st.edge_rev[d] || st.rv_win[d] > 0);
}
