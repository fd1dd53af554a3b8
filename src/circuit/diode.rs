//! The fast nonlinear step of a diode group: Newton on the reduced form, where only the
//! junction voltages are unknowns.
//!
//! A group without op-amps whose only nonlinear parts are diode junctions (a clipper after
//! an op-amp's output, a diode limiter on a passive node) is linear apart from the junction
//! currents. With every junction replaced by a current source `I_q` (anode to cathode), the
//! unknowns are `y = Y u + T (I + is)`, where `Y u` is the group's linear fast-path map
//! (junctions off: each carries `-is`; `u = [z, x, w, 1]` as in [`super::small`]) and
//! column `q` of `T` the response to a unit current through junction `q`. The junction
//! voltages are then `v = v0(u) + Z (I(v) + is)` with `Z = P T` (`P` picks anode minus
//! cathode): passive nodes, capacitor companions and the inputs are eliminated at compile
//! time, and the step solves only `F(v) = v - v0 - Z is exp(v / nvt) = 0` (one unknown per
//! junction, at most [`MAX_J`]) by Newton with the junction step limit, each iteration one
//! exponential per junction (the project's own `engine::fastmath::exp`, a few units in the
//! last place) and a `J x J` solve. Then `y` follows from the two precomputed maps and the
//! state advances as after the generic step (`circuit::step::commit`).
//!
//! The generic nonlinear step (`circuit::step::full_step`: assemble, factor and solve the
//! whole group per iteration) is its plain reference; both solve the same equations to
//! their convergence tolerance (tested in `tests/network_kernels.rs`). A step that does not
//! converge within [`super::step::MAX_ITER`] iterations is the same `NoConvergence` error.

use super::linalg::lu_solve;
use super::plan::{CircuitError, GroupPlan};
use super::small::SmallKernel;
use super::step::{commit, GroupState, MAX_ITER};
use super::{Circuit, ElemKind};
use crate::engine::fastmath;

/// Most junctions a group may have for the reduced step.
pub const MAX_J: usize = 4;

/// The junction voltages of the last two steps when both were reduced diode steps of
/// consecutive samples (their linear extrapolation is the next step's first guess).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct DiodeHist {
    /// Last step's junction voltages.
    pub v1: [f64; MAX_J],
    /// The step's before.
    pub v2: [f64; MAX_J],
    /// How many of them are valid (0, 1 or 2).
    pub n: u8,
    /// The junction currents `c = I + is` of the last three steps, newest first, when the
    /// last block ended in the table's loop (`nc > 0`).
    pub c: [[f64; MAX_J]; 3],
    /// Whether `c` is valid.
    pub nc: u8,
}

/// Largest Newton step (relative to `1 + |v|`) at which the iteration stops: Newton
/// converges quadratically there, so the accepted voltage is off by about the square of
/// it (far below 1e-12 V).
pub const STEP_TOL: f64 = 1e-8;

/// The compiled reduced form of a diode group.
#[derive(Debug, Clone, PartialEq)]
pub struct DiodeStep {
    /// Junctions.
    pub nj: usize,
    /// Per junction: saturation current, `n Vt` and the voltage above which a Newton step
    /// is limited.
    pub params: Vec<(f64, f64, f64)>,
    /// Junction voltages with every junction off (`P Y`, row-major `nj x ncol`).
    pub v0: Vec<f64>,
    /// `Z = P T` (row-major `nj x nj`).
    pub z: Vec<f64>,
    /// `T` (row-major `ny x nj`).
    pub t: Vec<f64>,
    /// Length of `u`.
    pub ncol: usize,
    /// Each junction's "off" threshold (the kernel's check: `v0 <= vth` is a linear step).
    pub vth: Vec<f64>,
    /// Per sample rows over `[u, c]` (`c = I + is`, row-major, `ncol + nj` wide): the new
    /// state (each capacitor's history), then every group node's value.
    pub rows: Vec<f64>,
    /// The tabulated solution along the input's line (see [`DiodeTable`]), when the group
    /// has one varying input and no noise.
    pub table: Option<DiodeTable>,
}

/// Target accuracy of the table at every unknown of the group, V (checked at compile time
/// at every sub-interval's midpoint against the converged Newton solution): ten thousand
/// times below a 24-bit sample at 15 V full scale. A tighter table only grows (2e-11 V
/// doubled the clipper's sub-intervals) and, out of the second-level cache, slows the loop.
pub const TABLE_TOL: f64 = 2e-10;
/// Largest distance of the junctions' open-circuit voltages `v0` from the table's line at
/// which the table's first-order correction is taken, V (beyond: the Newton step from the
/// table's value).
pub const TABLE_RMAX: f64 = 2e-6;
/// Most group nodes the table's block loop writes per sample.
pub const MAX_WRITES: usize = 4;
/// Most sub-intervals of one table cell.
const TABLE_MAX_SUB: usize = 4096;

/// The solution of a diode group with one varying input `x` (and no noise), tabulated at
/// compile time.
///
/// With the state at zero the junctions' open-circuit voltages lie on a line
/// `v0 = a s + b` (`a`: the input's column of `v0`, `s = x`), and the junction currents
/// `c(s) = I + is` solve `v = a s + b + Z c(v)` — a memoryless map of one variable. The
/// table holds `c` and `dc/ds` on a grid of `s` (cells of width `h`, each cut into a power
/// of two of equal sub-intervals, as many as the accuracy needs: fine at the knees,
/// coarse where the junctions are off or far into conduction) and is read by cubic
/// Hermite interpolation. Derivatives are exact, by implicit differentiation of the
/// reduced equations: `dc/dv0 = G (1 - Z G)^-1` with `G = diag(c / nvt)`, `dc/ds =
/// dc/dv0 a`. A state off the line (capacitor histories) moves `v0` by `r` off it: its part
/// along `a` is taken into `s` (`s = w (v0 - b)`, `w = a / |a|^2`), the rest (`r`,
/// orthogonal to `a`, small for junction capacitances) by the first-order term
/// `dc/dv0 r` (`dc/dv0` interpolated linearly), when `|r| <= TABLE_RMAX`. Every
/// sub-interval is checked at compile time at its midpoint, on the line and at `r =
/// +-TABLE_RMAX` along each direction orthogonal to `a`, against the converged Newton
/// solution: the table's error at every unknown (`T dc`) is within [`TABLE_TOL`].
#[derive(Debug, Clone, PartialEq)]
pub struct DiodeTable {
    /// `dv0/ds`.
    pub a: [f64; MAX_J],
    /// `a / |a|^2`.
    pub w: [f64; MAX_J],
    /// `v0` at `s = 0` with the state at zero.
    pub b: [f64; MAX_J],
    /// An orthonormal basis of the directions orthogonal to `a` (`nj - 1` vectors): the
    /// coordinates `rho_k = e_k (v0 - b)` of `r`.
    pub e: [[f64; MAX_J]; MAX_J],
    /// Start of the first cell.
    pub s0: f64,
    /// Cell width.
    pub h: f64,
    /// Cells.
    pub ncell: usize,
    /// Index slots per cell (a power of two: the most sub-intervals of any cell).
    pub per_cell: usize,
    /// `per_cell / h`.
    pub inv_hf: f64,
    /// Per index slot (width `h / per_cell`), the sub-interval that holds it.
    pub slot: Vec<u16>,
    /// Per sub-interval ([`seg_stride`] values): its start and `1 / width`, then per
    /// junction the cubic in the local `t` in `[0, 1]` (coefficients of `1, t, t^2, t^3`:
    /// the Hermite interpolant of `c`), then `dc/dv0 e_k` at its start and its change to
    /// the end (row-major `nj x (nj - 1)` each).
    pub seg: Vec<f64>,
    /// Values per sub-interval.
    pub stride: usize,
}

/// Values before the polynomials in a sub-interval of [`DiodeTable::seg`].
pub const SEG_HEAD: usize = 2;

/// Values per sub-interval of [`DiodeTable::seg`] for `nj` junctions.
pub const fn seg_stride(nj: usize) -> usize {
    SEG_HEAD + 4 * nj + 2 * nj * (nj - 1)
}

impl DiodeStep {
    /// The reduced form of group `gp` with kernel `k`, when the group has no op-amp, at
    /// least one and at most [`MAX_J`] junctions, and a nonsingular linear part.
    pub fn compile(c: &Circuit, gp: &GroupPlan, k: &SmallKernel) -> Option<DiodeStep> {
        let nj = gp.junctions.len();
        if !gp.amps.is_empty() || nj == 0 || nj > MAX_J {
            return None;
        }
        let ny = gp.ny();
        let nk = gp.n_kcl;
        // the fast path's factor (junctions as GMIN only), as `plan::compile` left it
        let fp = gp.fast.as_ref()?;
        let (m, perm) = (&fp.lu, &fp.perm);
        let mut rhs = vec![0.0; ny];
        let mut tmp = vec![0.0; ny];
        let mut params = Vec::new();
        let mut t = vec![0.0; ny * nj];
        for (q, &ei) in gp.junctions.iter().enumerate() {
            let e = &c.elems[ei];
            let ElemKind::Junction { is, nvt } = e.kind else {
                return None;
            };
            params.push((is, nvt, nvt * (nvt / (std::f64::consts::SQRT_2 * is)).ln()));
            rhs.fill(0.0);
            if let Some(i) = gp.col[e.a].filter(|&i| i < nk) {
                rhs[i] -= 1.0;
            }
            if let Some(i) = gp.col[e.b].filter(|&i| i < nk) {
                rhs[i] += 1.0;
            }
            lu_solve(m, ny, perm, &mut rhs, &mut tmp);
            for i in 0..ny {
                t[i * nj + q] = rhs[i];
            }
        }
        let ncol = k.ncol;
        // P: anode minus cathode (a node outside the group is a known input or fixed: its
        // part is in the linear map's own columns, not in T)
        let mut v0 = vec![0.0; nj * ncol];
        let mut z = vec![0.0; nj * nj];
        for (q, &ei) in gp.junctions.iter().enumerate() {
            let e = &c.elems[ei];
            for (node, sign) in [(e.a, 1.0), (e.b, -1.0)] {
                match gp.col[node] {
                    Some(i) => {
                        for col in 0..ncol {
                            v0[q * ncol + col] += sign * k.full[i * ncol + col];
                        }
                        for r in 0..nj {
                            z[q * nj + r] += sign * t[i * nj + r];
                        }
                    }
                    None => {
                        if let super::NodeKind::Fixed(v) = c.nodes[node].kind {
                            v0[q * ncol + ncol - 1] += sign * v;
                        } else if let Some(kk) = gp.known.iter().position(|&x| x == node) {
                            v0[q * ncol + k.nz + kk] += sign;
                        }
                    }
                }
            }
        }
        // Y u already holds the "off" currents -is: v = v0 u + Z (I + is)
        let w = ncol + nj;
        let nc = gp.caps.len();
        let nn = gp.nodes.len();
        let mut rows = vec![0.0; (nc + nn) * w];
        // every group node: Y u + T c
        let node_row = |node: usize| -> Vec<f64> {
            let mut r = vec![0.0; w];
            match gp.col[node] {
                Some(i) => {
                    r[..ncol].copy_from_slice(&k.full[i * ncol..(i + 1) * ncol]);
                    r[ncol..].copy_from_slice(&t[i * nj..(i + 1) * nj]);
                }
                None => {
                    if let super::NodeKind::Fixed(v) = c.nodes[node].kind {
                        r[ncol - 1] = v;
                    } else if let Some(kk) = gp.known.iter().position(|&x| x == node) {
                        r[k.nz + kk] = 1.0;
                    }
                }
            }
            r
        };
        // J' = 2 gc (Va - Vb) - J (trapezoidal), gc (Va - Vb) (backward Euler)
        for (q, &(ei, gc)) in gp.caps.iter().enumerate() {
            let e = &c.elems[ei];
            let (ra, rb) = (node_row(e.a), node_row(e.b));
            let (ka, kb) = gp.cap_update(q);
            for j in 0..w {
                rows[q * w + j] = ka * gc * (ra[j] - rb[j]);
            }
            rows[q * w + q] -= kb;
        }
        for (i, &node) in gp.nodes.iter().enumerate() {
            rows[(nc + i) * w..(nc + i + 1) * w].copy_from_slice(&node_row(node));
        }
        let mut ds = DiodeStep {
            nj,
            params,
            v0,
            z,
            t,
            ncol,
            vth: fp.vth.clone(),
            rows,
            table: None,
        };
        if k.nw == 0 && k.nk == 1 && Self::table_shape(nj, gp.caps.len()) && k.nz == gp.caps.len() {
            let known = gp.known[0];
            let vmax = c
                .nodes
                .iter()
                .filter_map(|n| match n.kind {
                    super::NodeKind::Fixed(v) => Some(v.abs()),
                    _ => None,
                })
                .fold(1.0f64, f64::max);
            // an op-amp's output stays inside its swing; anything else inside the rails
            let (lo, hi) = c
                .amps
                .iter()
                .find(|a| a.out == known)
                .map_or((-vmax, vmax), |a| (a.shaper.lo, a.shaper.hi));
            ds.table = ds.build_table(lo - 0.5, hi + 0.5);
        }
        Some(ds)
    }

    /// The table over `s` in `[lo, hi]`; `None` when the input does not reach the
    /// junctions or a cell would need more than `TABLE_MAX_SUB` sub-intervals.
    fn build_table(&self, lo: f64, hi: f64) -> Option<DiodeTable> {
        let nj = self.nj;
        let ncol = self.ncol;
        let nz = ncol - 2;
        let mut a = [0.0f64; MAX_J];
        let mut b = [0.0f64; MAX_J];
        for q in 0..nj {
            a[q] = self.v0[q * ncol + nz];
            b[q] = self.v0[q * ncol + ncol - 1];
        }
        let a2: f64 = a.iter().map(|x| x * x).sum();
        if !(a2 > 1e-12 && hi > lo) {
            return None;
        }
        let mut w = [0.0f64; MAX_J];
        for q in 0..nj {
            w[q] = a[q] / a2;
        }
        // an orthonormal basis of the directions orthogonal to a
        let mut basis: Vec<[f64; MAX_J]> = Vec::new();
        let an = a2.sqrt();
        for d in 0..nj {
            let mut e = [0.0f64; MAX_J];
            e[d] = 1.0;
            let pa: f64 = (0..nj).map(|q| e[q] * a[q] / an).sum();
            for q in 0..nj {
                e[q] -= pa * a[q] / an;
            }
            for o in &basis {
                let p: f64 = (0..nj).map(|q| e[q] * o[q]).sum();
                for q in 0..nj {
                    e[q] -= p * o[q];
                }
            }
            let n: f64 = e.iter().map(|x| x * x).sum::<f64>().sqrt();
            if n > 1e-6 && basis.len() + 1 < nj {
                for x in e.iter_mut() {
                    *x /= n;
                }
                basis.push(e);
            }
        }
        if basis.len() + 1 != nj {
            return None;
        }
        let ne = nj - 1;
        let mut eb = [[0.0f64; MAX_J]; MAX_J];
        for (k, e) in basis.iter().enumerate() {
            eb[k] = *e;
        }
        let nvt_min = self.params[..nj]
            .iter()
            .map(|p| p.1)
            .fold(f64::INFINITY, f64::min);
        let h = 4.0 * nvt_min;
        let ncell = ((hi - lo) / h).ceil() as usize;
        if ncell == 0 || ncell > 100_000 {
            return None;
        }
        let nstride = 2 * nj + nj * nj;
        let stride = seg_stride(nj);
        let ny = self.t.len() / nj;
        // per cell: its first sub-interval and their count
        let mut cells: Vec<(usize, usize)> = Vec::with_capacity(ncell);
        let mut seg: Vec<f64> = Vec::new();
        let mut nodes: Vec<f64> = Vec::new();
        let line = |s: f64, r: &[f64; MAX_J]| -> [f64; MAX_J] {
            let mut v0 = [0.0f64; MAX_J];
            for q in 0..nj {
                v0[q] = a[q] * s + b[q] + r[q];
            }
            v0
        };
        let zero = [0.0f64; MAX_J];
        // (r, its coordinates in the basis)
        let mut dirs: Vec<([f64; MAX_J], [f64; MAX_J])> = vec![(zero, zero)];
        for (k, e) in basis.iter().enumerate() {
            for sign in [1.0, -1.0] {
                let mut r = [0.0f64; MAX_J];
                for q in 0..nj {
                    r[q] = sign * TABLE_RMAX * e[q];
                }
                let mut rho = [0.0f64; MAX_J];
                rho[k] = sign * TABLE_RMAX;
                dirs.push((r, rho));
            }
        }
        // the converged solution at the start of the current cell (continuation)
        let mut guess = line(lo, &zero);
        let mut node = vec![0.0; nstride];
        for ci in 0..ncell {
            let sa = lo + ci as f64 * h;
            let mut m = 1usize;
            let start = guess;
            loop {
                let hs = h / m as f64;
                nodes.clear();
                let mut g = start;
                for kk in 0..=m {
                    let s = sa + kk as f64 * hs;
                    let (c, jm) = self.solve_exact(&line(s, &zero), &mut g)?;
                    node[..nj].copy_from_slice(&c[..nj]);
                    for q in 0..nj {
                        node[nj + q] = (0..nj).map(|p| jm[q * MAX_J + p] * a[p]).sum();
                        for p in 0..nj {
                            node[2 * nj + q * nj + p] = jm[q * MAX_J + p];
                        }
                    }
                    nodes.extend_from_slice(&node);
                }
                let end_guess = g;
                // the sub-intervals
                let off = seg.len();
                for kk in 0..m {
                    let n0 = &nodes[kk * nstride..(kk + 1) * nstride];
                    let n1 = &nodes[(kk + 1) * nstride..(kk + 2) * nstride];
                    seg.push(sa + kk as f64 * hs);
                    seg.push(1.0 / hs);
                    for q in 0..nj {
                        let (c0, c1) = (n0[q], n1[q]);
                        let (d0, d1) = (hs * n0[nj + q], hs * n1[nj + q]);
                        seg.extend_from_slice(&[
                            c0,
                            d0,
                            3.0 * (c1 - c0) - 2.0 * d0 - d1,
                            2.0 * (c0 - c1) + d0 + d1,
                        ]);
                    }
                    // dc/dv0 e_k at both ends: its start, then its change
                    let jme = |nd: &[f64], q: usize, k: usize| -> f64 {
                        (0..nj).map(|p| nd[2 * nj + q * nj + p] * eb[k][p]).sum()
                    };
                    for q in 0..nj {
                        for k in 0..ne {
                            seg.push(jme(n0, q, k));
                        }
                    }
                    for q in 0..nj {
                        for k in 0..ne {
                            seg.push(jme(n1, q, k) - jme(n0, q, k));
                        }
                    }
                }
                // check every sub-interval's midpoint, on the line and off it
                let mut ok = true;
                let mut gm = start;
                'check: for kk in 0..m {
                    let s = sa + (kk as f64 + 0.5) * hs;
                    let sg = &seg[off + kk * stride..off + (kk + 1) * stride];
                    let tt = (s - sg[0]) * sg[1];
                    for (di, (r, rho)) in dirs.iter().enumerate() {
                        let v0 = line(s, r);
                        let mut gg = gm;
                        let (c, _) = self.solve_exact(&v0, &mut gg)?;
                        if di == 0 {
                            gm = gg;
                        }
                        let ct = seg_eval(sg, nj, tt, rho);
                        for i in 0..ny {
                            let e: f64 = (0..nj).map(|q| self.t[i * nj + q] * (ct[q] - c[q])).sum();
                            if e.is_nan() || e.abs() > TABLE_TOL {
                                ok = false;
                                break 'check;
                            }
                        }
                    }
                }
                if ok {
                    cells.push((off / stride, m));
                    // the next cell starts at this one's last node: continue from it
                    guess = end_guess;
                    break;
                }
                seg.truncate(off);
                m *= 2;
                if m > TABLE_MAX_SUB {
                    return None;
                }
            }
        }
        let per_cell = cells.iter().map(|c| c.1).max().unwrap_or(1);
        if seg.len() / stride > u16::MAX as usize {
            return None;
        }
        let mut slot = Vec::with_capacity(ncell * per_cell);
        for &(first, m) in &cells {
            for i in 0..per_cell {
                slot.push((first + i / (per_cell / m)) as u16);
            }
        }
        Some(DiodeTable {
            a,
            w,
            b,
            e: eb,
            s0: lo,
            h,
            ncell,
            per_cell,
            inv_hf: per_cell as f64 / h,
            slot,
            seg,
            stride,
        })
    }

    /// The converged solution of `v = v0 + Z c(v)` (Newton with the junction step limit
    /// and the library's `exp`, compile time only) from `guess` (updated): `c` and
    /// `dc/dv0 = G (1 - Z G)^-1` (row stride `MAX_J`).
    fn solve_exact(
        &self,
        v0: &[f64; MAX_J],
        guess: &mut [f64; MAX_J],
    ) -> Option<([f64; MAX_J], [f64; MAX_J * MAX_J])> {
        let nj = self.nj;
        let mut v = *guess;
        let mut small = 0;
        for _ in 0..400 {
            let mut cur = [0.0f64; MAX_J];
            let mut g = [0.0f64; MAX_J];
            let (mut jm, mut f) = self.system(&v, v0, f64::exp, &mut cur, &mut g);
            let dv = solve_small(&mut jm, &mut f, nj)?;
            let mut big = false;
            for q in 0..nj {
                let (_, nvt, vcrit) = self.params[q];
                let vnew = v[q] - dv[q];
                let vl = super::step::limit_junction(vnew, v[q], nvt, vcrit);
                if vl != vnew || (vl - v[q]).abs() > 1e-14 * (1.0 + vl.abs()) {
                    big = true;
                }
                v[q] = vl;
            }
            if !v[..nj].iter().all(|x| x.is_finite()) {
                return None;
            }
            if !big {
                small += 1;
                if small >= 2 {
                    break;
                }
            }
        }
        if small < 2 {
            return None;
        }
        *guess = v;
        let mut cur = [0.0f64; MAX_J];
        let mut g = [0.0f64; MAX_J];
        for q in 0..nj {
            let (is, nvt, _) = self.params[q];
            cur[q] = is * (v[q] / nvt).exp();
            g[q] = cur[q] / nvt;
        }
        // dc/dv0 = G (1 - Z G)^-1, column by column
        let mut out = [0.0f64; MAX_J * MAX_J];
        for col in 0..nj {
            let mut mm = [0.0f64; MAX_J * MAX_J];
            for q in 0..nj {
                for r in 0..nj {
                    mm[q * MAX_J + r] = -self.z[q * nj + r] * g[r];
                }
                mm[q * MAX_J + q] += 1.0;
            }
            let mut e = [0.0f64; MAX_J];
            e[col] = 1.0;
            let x = solve_small(&mut mm, &mut e, nj)?;
            for q in 0..nj {
                out[q * MAX_J + col] = g[q] * x[q];
            }
        }
        Some((cur, out))
    }

    /// One nonlinear step for the input vector `u` (the state before the step, this step's
    /// known values and draws, 1): solves the junction voltages from the guess in
    /// `st.y` (the previous step's solution), then writes the new solution and advances the
    /// state (as the generic step does). `vn` must hold this step's known values; the first
    /// guess is the extrapolation of `hist` when it holds the two steps before, else the
    /// previous step's solution in `st.y`.
    #[allow(clippy::too_many_arguments, clippy::needless_range_loop)]
    pub fn step(
        &self,
        c: &Circuit,
        gp: &GroupPlan,
        k: &SmallKernel,
        u: &[f64],
        vn: &mut [f64],
        st: &mut GroupState,
        hist: &mut DiodeHist,
        time_s: f64,
    ) -> Result<(), CircuitError> {
        let nj = self.nj;
        let ncol = self.ncol;
        let mut v0 = [0.0f64; MAX_J];
        let mut v = [0.0f64; MAX_J];
        for q in 0..nj {
            v0[q] = self.v0[q * ncol..(q + 1) * ncol]
                .iter()
                .zip(u)
                .map(|(a, b)| a * b)
                .sum();
            v[q] = if hist.n >= 2 {
                2.0 * hist.v1[q] - hist.v2[q]
            } else if hist.n == 1 {
                hist.v1[q]
            } else {
                let e = &c.elems[gp.junctions[q]];
                let at = |n: usize| match gp.col[n] {
                    Some(i) => st.y[i],
                    None => vn[n],
                };
                at(e.a) - at(e.b)
            };
        }
        let mut cur = [0.0f64; MAX_J];
        let converged = self.newton(&v0, &mut v, &mut cur);
        if !converged {
            hist.n = 0;
            return Err(CircuitError::NoConvergence {
                what: gp.describe(c),
                time_s,
            });
        }
        hist.v2 = hist.v1;
        hist.v1 = v;
        hist.n = (hist.n + 1).min(2);
        // y = Y u + T is exp(v / nvt)
        for (i, y) in st.ynew.iter_mut().enumerate() {
            let mut s: f64 = k.full[i * ncol..(i + 1) * ncol]
                .iter()
                .zip(u)
                .map(|(a, b)| a * b)
                .sum();
            for q in 0..nj {
                s += self.t[i * nj + q] * cur[q];
            }
            *y = s;
        }
        commit(c, gp, vn, st);
        Ok(())
    }
    /// Whether [`DiodeStep::run_table_block`] takes groups of this shape (junctions and
    /// state length; at most [`MAX_WRITES`] nodes written).
    pub fn table_shape(nj: usize, nz: usize) -> bool {
        matches!(
            (nj, nz),
            (1, 0) | (1, 1) | (1, 2) | (2, 0) | (2, 1) | (2, 2) | (3, 0) | (3, 3) | (4, 0) | (4, 4)
        )
    }

    /// Step the group through a block of `n` samples with the table (see [`DiodeTable`]):
    /// `xs` the input's values per sample, the group's nodes in `writes` written to
    /// `slots` per sample. Each sample takes the same decision as the small-group kernel
    /// (every junction's open-circuit voltage at or below its "off" threshold: the linear
    /// step, `c = 0`), else the table's currents, or the Newton step from the previous
    /// sample's currents outside it; then the new state and node values are rows over
    /// `[u, c]`. At the end the group's full solution and node voltages are written as the
    /// generic step leaves them. `false` (nothing done) when the group's shape is not one
    /// of [`DiodeStep::table_shape`] or it writes more than [`MAX_WRITES`] nodes; on a
    /// failed step, the error and the sample.
    #[allow(clippy::too_many_arguments)]
    pub fn run_table_block(
        &self,
        c: &Circuit,
        gp: &GroupPlan,
        tab: &DiodeTable,
        xs: &[f64],
        vn: &mut [f64],
        st: &mut GroupState,
        counts: &mut (u64, u64),
        slots: &mut [Vec<f64>],
        hist: &mut DiodeHist,
        writes: &[usize],
        n: usize,
        t0: f64,
        h: f64,
        tap: Option<&mut crate::engine::knee::Tap>,
    ) -> Result<bool, (CircuitError, usize)> {
        let nz = self.ncol - 2;
        let nc = gp.caps.len();
        let mut wr = [(0usize, 0usize); MAX_WRITES];
        let mut nw = 0;
        for &node in writes {
            if let Some(i) = gp.col[node].filter(|&i| i < gp.nodes.len()) {
                if nw == MAX_WRITES {
                    return Ok(false);
                }
                wr[nw] = (node, nc + i);
                nw += 1;
            }
        }
        if xs.len() < n
            || nc != nz
            || st.z.len() != nz
            || tap
                .as_ref()
                .is_some_and(|t| t.rec.len() < crate::engine::knee::REC * n)
        {
            return Ok(false);
        }
        let a = TableRun {
            c,
            gp,
            tab,
            xs,
            wr: &wr[..nw],
            n,
            t0,
            h,
        };
        let small = nz + nw <= 4;
        let io = TableIo {
            vn,
            st,
            counts,
            slots,
            hist,
            tap,
        };
        macro_rules! go {
            ($nj:literal, $nz:literal, $nc:literal, $w:literal, $p:literal) => {
                if small {
                    self.table_loop_fast::<$nj, $nz, $nc, $w, $p, 4>(&a, io)
                } else {
                    self.table_loop_fast::<$nj, $nz, $nc, $w, $p, 8>(&a, io)
                }
            };
        }
        let r = match (self.nj, nz) {
            (1, 0) => go!(1, 0, 2, 3, 4),
            (1, 1) => go!(1, 1, 3, 4, 4),
            (1, 2) => go!(1, 2, 4, 5, 4),
            (2, 0) => go!(2, 0, 2, 4, 4),
            (2, 1) => go!(2, 1, 3, 5, 4),
            (2, 2) => go!(2, 2, 4, 6, 4),
            (3, 0) => go!(3, 0, 2, 5, 4),
            (3, 3) => go!(3, 3, 5, 8, 4),
            (4, 0) => go!(4, 0, 2, 6, 8),
            (4, 4) => go!(4, 4, 6, 10, 8),
            _ => return Ok(false),
        };
        r.map(|()| true)
    }

    /// [`DiodeStep::table_loop`] in the copy compiled for AVX2 and FMA where the CPU has
    /// them (fused multiply-adds; about 3 % on the network bench's clipper), else the plain
    /// one.
    #[inline(always)]
    fn table_loop_fast<
        const NJ: usize,
        const NZ: usize,
        const NC: usize,
        const W: usize,
        const P: usize,
        const Q: usize,
    >(
        &self,
        a: &TableRun,
        io: TableIo,
    ) -> Result<(), (CircuitError, usize)> {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
            {
                // SAFETY: the CPU supports AVX2 and FMA (checked just above).
                return unsafe { self.table_loop_avx2::<NJ, NZ, NC, W, P, Q>(a, io) };
            }
        }
        self.table_loop::<NJ, NZ, NC, W, P, Q, false>(a, io)
    }

    /// [`DiodeStep::table_loop`] compiled for AVX2 and FMA (fused multiply-adds).
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma")]
    unsafe fn table_loop_avx2<
        const NJ: usize,
        const NZ: usize,
        const NC: usize,
        const W: usize,
        const P: usize,
        const Q: usize,
    >(
        &self,
        a: &TableRun,
        io: TableIo,
    ) -> Result<(), (CircuitError, usize)> {
        self.table_loop::<NJ, NZ, NC, W, P, Q, true>(a, io)
    }

    /// [`DiodeStep::run_table_block`] for `NJ` junctions and `NZ` states (`NC = NZ + 2`
    /// columns of `u`, `W = NC + NJ` of `[u, c]`), the per-sample maps as columns of `P`
    /// (projections: `NJ + 1` used) and `Q` (new state and written nodes) lanes in
    /// fixed-size arrays (the compiler's vector code); `io.tap` records each sample for the knee
    /// correction (`engine::knee`).
    /// `F`: fused multiply-adds (only in the copy compiled for a CPU that has them).
    #[allow(clippy::needless_range_loop)]
    #[inline(always)]
    fn table_loop<
        const NJ: usize,
        const NZ: usize,
        const NC: usize,
        const W: usize,
        const P: usize,
        const Q: usize,
        const F: bool,
    >(
        &self,
        a: &TableRun,
        io: TableIo,
    ) -> Result<(), (CircuitError, usize)> {
        let TableIo {
            vn,
            st,
            counts,
            slots,
            hist,
            tap,
        } = io;
        let nw = a.wr.len();
        assert!(NC == NZ + 2 && W == NC + NJ && NJ <= MAX_J && self.nj == NJ && self.ncol == NC);
        assert!(NJ < P && NZ + nw <= Q);
        let tab = a.tab;
        let gp = a.gp;
        let n = a.n;
        let nn = gp.nodes.len();
        if n == 0 {
            return Ok(());
        }
        let mut v0m = [[0.0f64; NC]; NJ];
        let mut vth = [0.0f64; NJ];
        let mut bb = [0.0f64; NJ];
        let mut aa = [0.0f64; NJ];
        for q in 0..NJ {
            v0m[q].copy_from_slice(&self.v0[q * NC..(q + 1) * NC]);
            vth[q] = self.vth[q];
            bb[q] = tab.b[q];
            aa[q] = tab.a[q];
        }
        // rows of the new state and the written nodes over [u, c], as columns
        let mut rc = [[0.0f64; Q]; W];
        for q in 0..NZ {
            for j in 0..W {
                rc[j][q] = self.rows[q * W + j];
            }
        }
        for (i, &(_, row)) in a.wr.iter().enumerate() {
            for j in 0..W {
                rc[j][NZ + i] = self.rows[row * W + j];
            }
        }
        // The table's coordinates of the next sample straight from this one (the chain from
        // one sample's currents to the next sample's lookup kept short):
        // s' = w (v0' - b) with v0' = V0z z' + V0x x' + V01 and z' = Sn u + Sc c, so
        // s' = ps u + ks c + sx x' + s1 (u = [z, x, 1]), and likewise r' = (1 - a w) (v0' - b).
        // Projection rows: 0 is s (w), 1 + p is r_p (row p of 1 - a w).
        let mut pw = [[0.0f64; NJ]; P];
        for q in 0..NJ {
            pw[0][q] = tab.w[q];
        }
        for k in 0..NJ - 1 {
            for q in 0..NJ {
                pw[1 + k][q] = tab.e[k][q];
            }
        }
        // as columns: over u (NC), over c (NJ), x' and the constant
        let mut pu = [[0.0f64; P]; NC];
        let mut pc = [[0.0f64; P]; NJ];
        let mut px = [0.0f64; P];
        let mut p1 = [0.0f64; P];
        for k in 0..NJ {
            for q in 0..NJ {
                let wk = pw[k][q];
                for j in 0..NZ {
                    for i in 0..NC {
                        pu[i][k] += wk * v0m[q][j] * rc[i][j];
                    }
                    for i in 0..NJ {
                        pc[i][k] += wk * v0m[q][j] * rc[NC + i][j];
                    }
                }
                px[k] += wk * v0m[q][NZ];
                p1[k] += wk * (v0m[q][NC - 1] - bb[q]);
            }
        }
        let stride = seg_stride(NJ);
        debug_assert_eq!(stride, tab.stride);
        let mut eb = [[0.0f64; NJ]; NJ];
        for k in 0..NJ - 1 {
            eb[k].copy_from_slice(&tab.e[k][..NJ]);
        }
        let mut uc = [0.0f64; W];
        uc[..NZ].copy_from_slice(&st.z[..NZ]);
        uc[NZ] = a.xs[0];
        uc[NC - 1] = 1.0;
        // this sample's projections without its predecessor's currents (the first sample:
        // straight from v0)
        let mut pre = [0.0f64; P];
        for k in 0..NJ {
            let mut acc = 0.0;
            for q in 0..NJ {
                let v: f64 = (0..NC).map(|j| v0m[q][j] * uc[j]).sum();
                acc += pw[k][q] * (v - bb[q]);
            }
            pre[k] = acc;
        }
        // the last steps' currents, when the block before ended in this loop
        let mut cprev = [0.0f64; NJ];
        let mut cpp = [0.0f64; NJ];
        let mut cppp = [0.0f64; NJ];
        let mut warm = hist.nc > 0;
        let tg = tap.as_ref().map_or([0.0; MAX_J], |t| t.g);
        if warm {
            cprev.copy_from_slice(&hist.c[0][..NJ]);
            cpp.copy_from_slice(&hist.c[1][..NJ]);
            cppp.copy_from_slice(&hist.c[2][..NJ]);
            // the first sample's coordinate carries its predecessor's currents
            for k in 0..NJ {
                for q in 0..NJ {
                    pre[k] -= pc[q][k] * cprev[q];
                }
            }
        }
        hist.nc = 0;
        let (mut nlin, mut nnl) = (0u64, 0u64);
        // the knee correction's record, one array of `REC` values per sample
        let mut recs = tap.map(|tp| {
            tp.rec[..crate::engine::knee::REC * n]
                .as_chunks_mut::<{ crate::engine::knee::REC }>()
                .0
                .iter_mut()
        });
        for t in 0..n {
            let x = uc[NZ];
            // this sample's coordinate predicted from the currents two and three samples
            // back (extrapolated), to find its sub-interval early
            let mut sp = pre[0];
            for q in 0..NJ {
                sp = madd::<F>(pc[q][0], 2.0 * cpp[q] - cppp[q], sp);
            }
            let guess = tab.slot_of(sp);
            let mut proj = pre;
            for q in 0..NJ {
                for k in 0..P {
                    proj[k] = madd::<F>(pc[q][k], cprev[q], proj[k]);
                }
            }
            // the next sample's projections without this sample's currents
            if t + 1 < n {
                let xn = a.xs[t + 1];
                let mut e = [0.0f64; P];
                for k in 0..P {
                    e[k] = madd::<F>(px[k], xn, p1[k]);
                }
                for j in 0..NC {
                    for k in 0..P {
                        e[k] = madd::<F>(pu[j][k], uc[j], e[k]);
                    }
                }
                pre = e;
            }
            // the linear step's check (the kernel's check rows: v0 = b + a s + rho e)
            let mut lin = true;
            for q in 0..NJ {
                let mut v = madd::<F>(aa[q], proj[0], bb[q]);
                for k in 0..NJ - 1 {
                    v = madd::<F>(eb[k][q], proj[1 + k], v);
                }
                lin &= v <= vth[q];
            }
            let mut cc = [0.0f64; NJ];
            // the record for the knee correction: the coordinate, and how the step went
            let mut kind = crate::engine::knee::tap::OFF;
            let mut rline = 0.0;
            if lin {
                nlin += 1;
            } else {
                nnl += 1;
                let sv = proj[0];
                let mut r = [0.0f64; MAX_J];
                let mut near = true;
                for k in 0..NJ - 1 {
                    r[k] = proj[1 + k];
                    near &= r[k].abs() <= TABLE_RMAX;
                }
                // the sub-interval from the predicted coordinate (known before this
                // sample's predecessor is), confirmed with the exact one
                let mut found = None;
                if let Some(base) = guess {
                    let tt = (sv - tab.seg[base]) * tab.seg[base + 1];
                    if (0.0..=1.0).contains(&tt) {
                        found = Some((base, tt));
                    }
                }
                if found.is_none() {
                    found = tab.locate(sv);
                }
                if let (Some((base, tt)), true) = (found, near) {
                    let sg = &tab.seg[base..base + stride];
                    let (c4, line) = seg_eval_line::<NJ, F>(sg, tt, &r);
                    cc = c4;
                    kind = crate::engine::knee::tap::ON;
                    // the currents' part of the output along the line (zero weights
                    // without a record)
                    for q in 0..NJ {
                        rline = madd::<F>(tg[q], line[q], rline);
                    }
                } else {
                    kind = crate::engine::knee::tap::OTHER;
                    let mut v04 = [0.0f64; MAX_J];
                    for q in 0..NJ {
                        v04[q] = (0..NC).map(|j| v0m[q][j] * uc[j]).sum();
                    }
                    let mut cp4 = [0.0f64; MAX_J];
                    cp4[..NJ].copy_from_slice(&cprev);
                    match self.newton_from(&v04, &cp4, warm) {
                        Some(c4) => cc.copy_from_slice(&c4[..NJ]),
                        None => {
                            counts.0 += nlin;
                            counts.1 += nnl;
                            return Err((
                                CircuitError::NoConvergence {
                                    what: gp.describe(a.c),
                                    time_s: a.t0 + t as f64 * a.h,
                                },
                                t,
                            ));
                        }
                    }
                }
            }
            if let Some(rec) = recs.as_mut().and_then(|r| r.next()) {
                *rec = [proj[0], kind, rline];
            }
            uc[NC..].copy_from_slice(&cc);
            cppp = cpp;
            cpp = cprev;
            cprev = cc;
            warm = true;
            // the new state and the written nodes (the currents' part last: the rest
            // does not wait for them)
            let mut out = [0.0f64; Q];
            for j in 0..W {
                for k in 0..Q {
                    out[k] = madd::<F>(rc[j][k], uc[j], out[k]);
                }
            }
            for i in 0..nw {
                slots[a.wr[i].0][t] = out[NZ + i];
            }
            if t + 1 == n {
                // the full solution of the last step, as the generic step leaves it
                for i in 0..nn {
                    let r = &self.rows[(NZ + i) * W..(NZ + i + 1) * W];
                    let y: f64 = r.iter().zip(&uc).map(|(p, q)| p * q).sum();
                    st.y[i] = y;
                    st.ynew[i] = y;
                    vn[gp.nodes[i]] = y;
                }
                for &node in &gp.known {
                    vn[node] = x;
                }
            }
            uc[..NZ].copy_from_slice(&out[..NZ]);
            if t + 1 < n {
                uc[NZ] = a.xs[t + 1];
            }
        }
        counts.0 += nlin;
        counts.1 += nnl;
        st.z[..NZ].copy_from_slice(&uc[..NZ]);
        hist.c[0][..NJ].copy_from_slice(&cprev);
        hist.c[1][..NJ].copy_from_slice(&cpp);
        hist.c[2][..NJ].copy_from_slice(&cppp);
        hist.nc = 1;
        Ok(())
    }

    /// The Newton step for `v0` from the guess `v = v0 + Z cprev` (off the table; `warm`:
    /// `cprev` are the last step's currents): the currents `c`, or `None` when it does not
    /// converge.
    #[cold]
    #[inline(never)]
    #[allow(clippy::needless_range_loop)]
    fn newton_from(
        &self,
        v0: &[f64; MAX_J],
        cprev: &[f64; MAX_J],
        warm: bool,
    ) -> Option<[f64; MAX_J]> {
        let nj = self.nj;
        let mut v = [0.0f64; MAX_J];
        for q in 0..nj {
            let mut s = v0[q];
            for r in 0..nj {
                s += self.z[q * nj + r] * cprev[r];
            }
            v[q] = s;
        }
        if !warm {
            // no last step: each junction from at most its critical voltage (the step
            // limit takes it up from there)
            for q in 0..nj {
                v[q] = v[q].min(self.params[q].2);
            }
        }
        let mut cur = [0.0f64; MAX_J];
        self.newton(v0, &mut v, &mut cur).then_some(cur)
    }

    /// The reduced equations at `v`: the junction currents into `cur` and their
    /// conductances into `g` (with `exp` for the exponential), and the Newton system
    /// `F(v) = v - v0 - Z is exp(v / nvt)`, `J = 1 - Z diag(g)` (row stride `MAX_J`).
    #[inline(always)]
    fn system(
        &self,
        v: &[f64; MAX_J],
        v0: &[f64; MAX_J],
        exp: impl Fn(f64) -> f64,
        cur: &mut [f64; MAX_J],
        g: &mut [f64; MAX_J],
    ) -> ([f64; MAX_J * MAX_J], [f64; MAX_J]) {
        let nj = self.nj;
        for q in 0..nj {
            let (is, nvt, _) = self.params[q];
            cur[q] = is * exp((v[q] / nvt).min(200.0));
            g[q] = cur[q] / nvt;
        }
        let mut jm = [0.0f64; MAX_J * MAX_J];
        let mut f = [0.0f64; MAX_J];
        for q in 0..nj {
            let mut s = v[q] - v0[q];
            for r in 0..nj {
                let zqr = self.z[q * nj + r];
                s -= zqr * cur[r];
                jm[q * MAX_J + r] = -zqr * g[r];
            }
            jm[q * MAX_J + q] += 1.0;
            f[q] = s;
        }
        (jm, f)
    }

    /// Newton on `F(v) = v - v0 - Z c(v)` from `v` (the first guess) with the junction
    /// step limit: the solution in `v` and `c = is exp(v / nvt)` in `cur`; false when it
    /// does not converge within `MAX_ITER` iterations.
    #[inline]
    pub fn newton(&self, v0: &[f64; MAX_J], v: &mut [f64; MAX_J], cur: &mut [f64; MAX_J]) -> bool {
        let nj = self.nj;
        let mut g = [0.0f64; MAX_J];
        for _ in 0..MAX_ITER {
            let (mut jm, mut f) = self.system(v, v0, fastmath::exp, cur, &mut g);
            let Some(dv) = solve_small(&mut jm, &mut f, nj) else {
                return false;
            };
            let mut done = true;
            for q in 0..nj {
                let (_, nvt, vcrit) = self.params[q];
                let vnew = v[q] - dv[q];
                let vl = limit(vnew, v[q], nvt, vcrit);
                if vl != vnew || (vl - v[q]).abs() > STEP_TOL * (1.0 + vl.abs()) {
                    done = false;
                }
                // the current at the accepted voltage, to first order (the step is tiny
                // when done: its square is far below rounding)
                cur[q] += g[q] * (vl - v[q]);
                v[q] = vl;
            }
            if !v[..nj].iter().all(|x| x.is_finite()) {
                return false;
            }
            if done {
                return true;
            }
        }
        false
    }
}

impl DiodeTable {
    /// The sub-interval that holds `s` (its offset in `seg`) and the local `t`, `None`
    /// outside the table.
    #[inline(always)]
    pub fn locate(&self, s: f64) -> Option<(usize, f64)> {
        let xf = (s - self.s0) * self.inv_hf;
        if !(xf >= 0.0 && xf < self.slot.len() as f64) {
            return None;
        }
        // SAFETY: 0 <= xf < slot.len() (checked just above): the cast is exact.
        let i = unsafe { xf.to_int_unchecked::<i64>() } as usize;
        let base = self.slot[i] as usize * self.stride;
        let t = ((s - self.seg[base]) * self.seg[base + 1]).clamp(0.0, 1.0);
        Some((base, t))
    }

    /// The offset in `seg` of the sub-interval that holds `s`, `None` outside the table.
    #[inline(always)]
    pub fn slot_of(&self, s: f64) -> Option<usize> {
        let xf = (s - self.s0) * self.inv_hf;
        if !(xf >= 0.0 && xf < self.slot.len() as f64) {
            return None;
        }
        // SAFETY: 0 <= xf < slot.len() (checked just above): the cast is exact.
        let i = unsafe { xf.to_int_unchecked::<i64>() } as usize;
        Some(self.slot[i] as usize * self.stride)
    }

    /// The antiderivative along the table's line of each junction's `c` at `s` (on the
    /// line: the state at zero), from the table's start, A V: exact for the interpolant
    /// (the integral of its cubic over every sub-interval before `s` and over the part of
    /// its own up to `s`). `None` outside the table. The plain reference of the knee
    /// correction's weighted table (`engine::knee::KneeAa::rtab`): it sums the
    /// sub-intervals each time.
    pub fn integral(&self, nj: usize, s: f64) -> Option<[f64; MAX_J]> {
        let (base, t) = self.locate(s)?;
        let mut out = [0.0f64; MAX_J];
        for (j, sg) in self.seg.chunks_exact(self.stride).enumerate() {
            let last = j * self.stride == base;
            let part = seg_integral(sg, nj, if last { t } else { 1.0 });
            for (o, p) in out.iter_mut().zip(&part).take(nj) {
                *o += p;
            }
            if last {
                break;
            }
        }
        Some(out)
    }

    /// The junction currents `c = I + is` for open-circuit junction voltages `v0` (see the
    /// type): `None` outside the table or farther than `TABLE_RMAX` from its line.
    #[allow(clippy::needless_range_loop)]
    pub fn eval(&self, nj: usize, v0: &[f64; MAX_J]) -> Option<[f64; MAX_J]> {
        let mut s = 0.0;
        for q in 0..nj {
            s += self.w[q] * (v0[q] - self.b[q]);
        }
        let mut rho = [0.0f64; MAX_J];
        for k in 0..nj - 1 {
            rho[k] = (0..nj).map(|q| self.e[k][q] * (v0[q] - self.b[q])).sum();
            if rho[k].is_nan() || rho[k].abs() > TABLE_RMAX {
                return None;
            }
        }
        let (base, t) = self.locate(s)?;
        Some(seg_eval(&self.seg[base..base + self.stride], nj, t, &rho))
    }
}

/// A sub-interval's value at local `t` in `[0, 1]`, at `rho` off the line (coordinates in
/// the basis `e`): the cubic (Estrin's scheme) plus the first-order term with `dc/dv0 e_k`
/// interpolated linearly.
#[inline(always)]
pub fn seg_eval(sg: &[f64], nj: usize, t: f64, rho: &[f64; MAX_J]) -> [f64; MAX_J] {
    let ne = nj - 1;
    let jb = SEG_HEAD + 4 * nj;
    let db = jb + nj * ne;
    let mut c = [0.0f64; MAX_J];
    for q in 0..nj {
        let poly = seg_line(sg, q, t);
        let mut corr = 0.0;
        for k in 0..ne {
            corr += (sg[jb + q * ne + k] + t * sg[db + q * ne + k]) * rho[k];
        }
        c[q] = poly + corr;
    }
    c
}

/// `a b + c`, fused when `F` (only in code compiled for a CPU that has the instruction:
/// without it the library's software fused multiply-add would run).
#[inline(always)]
pub(crate) fn madd<const F: bool>(a: f64, b: f64, c: f64) -> f64 {
    if F {
        a.mul_add(b, c)
    } else {
        a * b + c
    }
}

/// [`seg_eval`] for `NJ` junctions, with each junction's value on the line beside it (the
/// knee correction's record reads them), fused multiply-adds when `F`.
#[inline(always)]
fn seg_eval_line<const NJ: usize, const F: bool>(
    sg: &[f64],
    t: f64,
    rho: &[f64; MAX_J],
) -> ([f64; NJ], [f64; NJ]) {
    let ne = NJ - 1;
    let jb = SEG_HEAD + 4 * NJ;
    let db = jb + NJ * ne;
    let mut c = [0.0f64; NJ];
    let mut line = [0.0f64; NJ];
    let t2 = t * t;
    for q in 0..NJ {
        let p = &sg[SEG_HEAD + 4 * q..SEG_HEAD + 4 * q + 4];
        let poly = madd::<F>(t2, madd::<F>(p[3], t, p[2]), madd::<F>(p[1], t, p[0]));
        let mut corr = 0.0;
        for k in 0..ne {
            corr = madd::<F>(
                madd::<F>(t, sg[db + q * ne + k], sg[jb + q * ne + k]),
                rho[k],
                corr,
            );
        }
        line[q] = poly;
        c[q] = poly + corr;
    }
    (c, line)
}

/// Junction `q`'s value on the table's line in a sub-interval at local `t` in `[0, 1]` (its
/// cubic, Estrin's scheme).
#[inline(always)]
pub fn seg_line(sg: &[f64], q: usize, t: f64) -> f64 {
    let p = &sg[SEG_HEAD + 4 * q..SEG_HEAD + 4 * q + 4];
    (p[0] + p[1] * t) + t * t * (p[2] + p[3] * t)
}

/// The integral of each junction's cubic over a sub-interval from its start to local `t`,
/// A V: the quartic `width (p0 t + p1 t^2 / 2 + p2 t^3 / 3 + p3 t^4 / 4)`.
pub fn seg_integral(sg: &[f64], nj: usize, t: f64) -> [f64; MAX_J] {
    let width = 1.0 / sg[1];
    let mut out = [0.0f64; MAX_J];
    for (q, o) in out.iter_mut().enumerate().take(nj) {
        let p = &sg[SEG_HEAD + 4 * q..SEG_HEAD + 4 * q + 4];
        *o = width * t * (p[0] + t * (p[1] / 2.0 + t * (p[2] / 3.0 + t * p[3] / 4.0)));
    }
    out
}

/// What one table block writes: the node values, the group's state, the step counts, the
/// nodes' sample buffers, the junction currents' history and the knee correction's record.
struct TableIo<'a, 'b> {
    vn: &'a mut [f64],
    st: &'a mut GroupState,
    counts: &'a mut (u64, u64),
    slots: &'a mut [Vec<f64>],
    hist: &'a mut DiodeHist,
    tap: Option<&'a mut crate::engine::knee::Tap<'b>>,
}

/// The fixed inputs of one table block.
pub struct TableRun<'a> {
    c: &'a Circuit,
    gp: &'a GroupPlan,
    tab: &'a DiodeTable,
    xs: &'a [f64],
    wr: &'a [(usize, usize)],
    n: usize,
    t0: f64,
    h: f64,
}

/// The junction step limit of the generic step (logarithmic damping of a step far up the
/// exponential), with the project's own `ln`.
#[inline]
fn limit(vnew: f64, vold: f64, nvt: f64, vcrit: f64) -> f64 {
    if vnew > vcrit && (vnew - vold).abs() > 2.0 * nvt {
        if vold > 0.0 {
            let arg = 1.0 + (vnew - vold) / nvt;
            if arg > 0.0 {
                vold + nvt * fastmath::ln(arg)
            } else {
                vcrit
            }
        } else {
            nvt * fastmath::ln(vnew / nvt)
        }
    } else {
        vnew
    }
}

/// Solve `a x = b` (`n <= MAX_J`, `a` stored with row stride `MAX_J`) by Gaussian
/// elimination with partial pivoting; `None` when singular.
#[inline]
fn solve_small(
    a: &mut [f64; MAX_J * MAX_J],
    b: &mut [f64; MAX_J],
    n: usize,
) -> Option<[f64; MAX_J]> {
    if n == 1 {
        let d = a[0];
        return (d != 0.0 && d.is_finite()).then(|| [b[0] / d, 0.0, 0.0, 0.0]);
    }
    for col in 0..n {
        let mut piv = col;
        for r in col + 1..n {
            if a[r * MAX_J + col].abs() > a[piv * MAX_J + col].abs() {
                piv = r;
            }
        }
        let d = a[piv * MAX_J + col];
        if !(d != 0.0 && d.is_finite()) {
            return None;
        }
        if piv != col {
            for j in 0..n {
                a.swap(col * MAX_J + j, piv * MAX_J + j);
            }
            b.swap(col, piv);
        }
        for r in col + 1..n {
            let f = a[r * MAX_J + col] / d;
            for j in col..n {
                a[r * MAX_J + j] -= f * a[col * MAX_J + j];
            }
            b[r] -= f * b[col];
        }
    }
    let mut x = [0.0f64; MAX_J];
    for r in (0..n).rev() {
        let mut s = b[r];
        for j in r + 1..n {
            s -= a[r * MAX_J + j] * x[j];
        }
        x[r] = s / a[r * MAX_J + r];
    }
    Some(x)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The table loop's evaluation (`seg_eval_line`, plain and fused) against the plain
    /// reference `seg_eval` and `seg_line` on an arbitrary sub-interval: the same cubic and
    /// first-order term, so equal to rounding (the fused form rounds once per multiply-add).
    #[test]
    fn fused_sub_interval_evaluation_matches_the_plain_one() {
        const NJ: usize = 3;
        let stride = seg_stride(NJ);
        let sg: Vec<f64> = (0..stride)
            .map(|i| ((i as f64 * 0.37).sin() + 0.1) * 1e-3)
            .collect();
        let rho = [0.013, -0.021, 0.0, 0.0];
        for k in 0..=20 {
            let t = k as f64 / 20.0;
            let c = seg_eval(&sg, NJ, t, &rho);
            for (cf, lf) in [
                seg_eval_line::<NJ, false>(&sg, t, &rho),
                seg_eval_line::<NJ, true>(&sg, t, &rho),
            ] {
                for q in 0..NJ {
                    assert!((cf[q] - c[q]).abs() <= 1e-15 * (1.0 + c[q].abs()), "t {t}");
                    let l = seg_line(&sg, q, t);
                    assert!((lf[q] - l).abs() <= 1e-15 * (1.0 + l.abs()), "t {t}");
                }
            }
        }
    }
}
