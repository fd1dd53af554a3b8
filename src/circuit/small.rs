//! The small-group kernel: a group's linear step as one precomputed matrix, run a block at a
//! time, with the exact nonlinear step from the first sample that needs it.
//!
//! The generic fast path ([`super::plan::FastPath`]) computes every unknown of a group per
//! step from an affine map and then derives the new state (capacitor histories `J`, op-amp
//! states `v` and `p`) and the fast-path checks from those unknowns node by node. Here the
//! two are folded at compile time into one matrix acting on `u = [z, x, w, 1]` (the state,
//! the known node values, the group's noise draws, a constant): its rows are
//! - the new state `z' = A z + B x + W w + c` (`J' = 2 gc (Va - Vb) - J`, `v' = v`,
//!   `p' = Vd + b v` with `Vd = V+ - V- + vos + en`),
//! - the check rows: each op-amp's `Vd` (against `FAST_VD Vov`), its state `v` (inside the
//!   knee of its swing), its `V+` (inside the common-mode range, with the reversal margin),
//!   each diode's junction voltage (below the voltage where its "off" model holds),
//! - the values of the group's nodes that something outside the group reads (an op-amp's
//!   output is its `v` row: inside the knee the output row is `o = v`).
//!
//! [`run_block`] steps a group through a block of samples: while every check row is inside
//! its limits the step is this matrix product (no allocation, no dynamic dispatch, no
//! transcendental call); from the first sample outside them it rebuilds the full solution of
//! the previous step (from the kept input vector, with a second precomputed map) and takes
//! the exact nonlinear step of `circuit::step` for that sample, then resumes the matrix step.
//! The decision and the arithmetic are those of the generic path (its plain reference), so
//! both render the same samples to rounding (tested in `tests/network_engine.rs`).

use super::plan::{CircuitError, GroupPlan, FAST_VD};
use super::step::{full_step, step_group, AmpEvents, GroupState};
use super::{Circuit, NodeKind, CM_DELTA};

/// The compiled linear step of one group.
#[derive(Debug, Clone, PartialEq)]
pub struct SmallKernel {
    /// State length.
    pub nz: usize,
    /// Known node values read.
    pub nk: usize,
    /// Noise draws per step (0 without noise).
    pub nw: usize,
    /// Length of `u = [z, x, w, 1]`.
    pub ncol: usize,
    /// Rows, padded to a multiple of 4.
    pub rp: usize,
    /// Rows without the padding: state, checks, node values.
    pub nrows: usize,
    /// The matrix, column-major (`m[c * rp + r]`), the constant column last.
    pub m: Vec<f64>,
    /// Row of each check.
    pub chk_row: Vec<usize>,
    /// Lower limit of each check.
    pub chk_lo: Vec<f64>,
    /// Upper limit of each check.
    pub chk_hi: Vec<f64>,
    /// Every unknown of the group from `u` (row-major, `ny x ncol`): the previous step's
    /// full solution when the nonlinear step takes over.
    pub full: Vec<f64>,
    /// Group nodes read outside the group: (circuit node, row).
    pub node_rows: Vec<(usize, usize)>,
}

impl SmallKernel {
    /// Compile the kernel of group `gp` of circuit `c`; `needed` lists the circuit nodes
    /// whose values are read outside the group (rows are added for those in the group).
    /// `None` when the group has no linear fast path.
    pub fn compile(c: &Circuit, gp: &GroupPlan, needed: &[usize]) -> Option<SmallKernel> {
        let fp = gp.fast.as_ref()?;
        let ny = gp.ny();
        let nn = gp.nodes.len();
        let nc = gp.caps.len();
        let na = gp.amps.len();
        let nz = gp.nz();
        let nk = gp.known.len();
        let nw = if gp.noise.is_some() { gp.n_kcl + na } else { 0 };
        let ncol = nz + nk + nw + 1;
        let kc = ncol - 1;
        // every unknown as a row over u
        let mut full = vec![0.0; ny * ncol];
        for i in 0..ny {
            let r = &mut full[i * ncol..(i + 1) * ncol];
            r[..nz].copy_from_slice(&fp.ay_z[i * nz..(i + 1) * nz]);
            r[nz..nz + nk].copy_from_slice(&fp.ay_in[i * nk..(i + 1) * nk]);
            if let (Some(gn), true) = (&gp.noise, nw > 0) {
                r[nz + nk..nz + nk + nw].copy_from_slice(&gn.ay_w[i * nw..(i + 1) * nw]);
            }
            r[kc] = fp.y0[i];
        }
        let node_row = |n: usize| -> Vec<f64> {
            let mut r = vec![0.0; ncol];
            if let Some(i) = gp.col[n] {
                r.copy_from_slice(&full[i * ncol..(i + 1) * ncol]);
            } else if let NodeKind::Fixed(v) = c.nodes[n].kind {
                r[kc] = v;
            } else if let Some(k) = gp.known.iter().position(|&x| x == n) {
                r[nz + k] = 1.0;
            }
            r
        };
        let lin = |a: f64, x: &[f64], b: f64, y: &[f64]| -> Vec<f64> {
            x.iter().zip(y).map(|(p, q)| a * p + b * q).collect()
        };
        let mut rows: Vec<Vec<f64>> = Vec::new();
        // capacitor histories
        for (q, &(ei, gc)) in gp.caps.iter().enumerate() {
            let e = &c.elems[ei];
            let mut r = lin(2.0 * gc, &node_row(e.a), -2.0 * gc, &node_row(e.b));
            r[q] -= 1.0;
            rows.push(r);
        }
        // op-amp states
        for j in 0..na {
            rows.push(full[(nn + j) * ncol..(nn + j + 1) * ncol].to_vec());
        }
        // Vd of each op-amp (offset and voltage noise included)
        let mut vd_rows = Vec::new();
        for (j, ac) in gp.amps.iter().enumerate() {
            let a = &c.amps[ac.amp];
            let mut r = lin(1.0, &node_row(a.plus), -1.0, &node_row(a.minus));
            r[kc] += a.vos;
            if nw > 0 {
                r[nz + nk + gp.n_kcl + j] += 1.0;
            }
            vd_rows.push(r);
        }
        // p = Vd + b v
        for (j, ac) in gp.amps.iter().enumerate() {
            let r = lin(1.0, &vd_rows[j], ac.b, &rows[nc + j]);
            rows.push(r);
        }
        let mut chk_row = Vec::new();
        let mut chk_lo = Vec::new();
        let mut chk_hi = Vec::new();
        for (j, ac) in gp.amps.iter().enumerate() {
            let a = &c.amps[ac.amp];
            let sh = &a.shaper;
            chk_row.push(nc + j);
            chk_lo.push(sh.lo + sh.w);
            chk_hi.push(sh.hi - sh.w);
            chk_row.push(rows.len());
            chk_lo.push(-FAST_VD * a.vov);
            chk_hi.push(FAST_VD * a.vov);
            rows.push(vd_rows[j].clone());
            if let Some((cl, ch)) = a.cm {
                let margin = if a.reversal { 20.0 * CM_DELTA } else { 0.0 };
                chk_row.push(rows.len());
                chk_lo.push(cl + margin);
                chk_hi.push(ch - margin);
                rows.push(node_row(a.plus));
            }
        }
        for (q, &ei) in gp.junctions.iter().enumerate() {
            let e = &c.elems[ei];
            chk_row.push(rows.len());
            chk_lo.push(f64::NEG_INFINITY);
            chk_hi.push(fp.vth[q]);
            rows.push(lin(1.0, &node_row(e.a), -1.0, &node_row(e.b)));
        }
        // node values read outside the group
        let mut node_rows = Vec::new();
        for &n in needed {
            let Some(i) = gp.col[n] else { continue };
            if node_rows.iter().any(|&(x, _)| x == n) {
                continue;
            }
            if let Some(j) = gp.amps.iter().position(|ac| c.amps[ac.amp].out == n) {
                node_rows.push((n, nc + j));
            } else {
                node_rows.push((n, rows.len()));
                rows.push(full[i * ncol..(i + 1) * ncol].to_vec());
            }
        }
        let nrows = rows.len();
        let rp = nrows.div_ceil(4).max(1) * 4;
        let mut m = vec![0.0; ncol * rp];
        for (ri, r) in rows.iter().enumerate() {
            for (ci, &x) in r.iter().enumerate() {
                m[ci * rp + ri] = x;
            }
        }
        Some(SmallKernel {
            nz,
            nk,
            nw,
            ncol,
            rp,
            nrows,
            m,
            chk_row,
            chk_lo,
            chk_hi,
            full,
            node_rows,
        })
    }

    /// Every row for the input vector `u` (its last entry 1) into `acc` (length `rp`).
    /// The common sizes run with the rows in registers (a fixed-size accumulator); the
    /// sums are taken in the same order either way.
    #[inline(always)]
    pub fn rows(&self, u: &[f64], acc: &mut [f64]) {
        match self.rp {
            4 => rows_fixed::<4>(&self.m, u, self.ncol, acc),
            8 => rows_fixed::<8>(&self.m, u, self.ncol, acc),
            12 => rows_fixed::<12>(&self.m, u, self.ncol, acc),
            16 => rows_fixed::<16>(&self.m, u, self.ncol, acc),
            20 => rows_fixed::<20>(&self.m, u, self.ncol, acc),
            24 => rows_fixed::<24>(&self.m, u, self.ncol, acc),
            28 => rows_fixed::<28>(&self.m, u, self.ncol, acc),
            32 => rows_fixed::<32>(&self.m, u, self.ncol, acc),
            _ => self.rows_any(u, acc),
        }
    }

    /// [`SmallKernel::rows`] for any size.
    #[inline(always)]
    fn rows_any(&self, u: &[f64], acc: &mut [f64]) {
        let rp = self.rp;
        let kc = self.ncol - 1;
        let acc = &mut acc[..rp];
        acc.copy_from_slice(&self.m[kc * rp..(kc + 1) * rp]);
        for (col, &x) in self.m[..kc * rp].chunks_exact(rp).zip(&u[..kc]) {
            for (a, m) in acc.iter_mut().zip(col) {
                *a += m * x;
            }
        }
    }

    /// Whether every check row in `acc` is inside its limits (a NaN is not).
    #[inline(always)]
    pub fn inside(&self, acc: &[f64]) -> bool {
        let mut ok = true;
        for ((&r, &lo), &hi) in self.chk_row.iter().zip(&self.chk_lo).zip(&self.chk_hi) {
            let x = acc[r];
            ok &= x >= lo && x <= hi;
        }
        ok
    }
}

/// The rows of a kernel with `R` (padded) rows: the constant column, then each column of
/// `u` in order, accumulated in a local array the compiler keeps in registers.
#[inline(always)]
fn rows_fixed<const R: usize>(m: &[f64], u: &[f64], ncol: usize, acc: &mut [f64]) {
    let kc = ncol - 1;
    let mut a = [0.0f64; R];
    a.copy_from_slice(&m[kc * R..(kc + 1) * R]);
    for (col, &x) in m[..kc * R].chunks_exact(R).zip(&u[..kc]) {
        for (ar, &mr) in a.iter_mut().zip(col) {
            *ar += mr * x;
        }
    }
    acc[..R].copy_from_slice(&a);
}

/// Running state of one group's kernel: two input vectors (the current step's and the
/// previous one's, alternating) and the row buffer.
#[derive(Debug, Clone, PartialEq)]
pub struct KernelRun {
    u: Vec<f64>,
    cur: usize,
    acc: Vec<f64>,
    /// `u[cur]` holds the group's state (else it is in [`GroupState::z`]).
    loaded: bool,
    /// The last step was the kernel's: the group's full solution (`GroupState::y`, the node
    /// array) is not written.
    stale: bool,
}

impl KernelRun {
    /// A run for kernel `k`.
    pub fn new(k: &SmallKernel) -> KernelRun {
        let mut u = vec![0.0; 2 * k.ncol];
        u[k.ncol - 1] = 1.0;
        u[2 * k.ncol - 1] = 1.0;
        KernelRun {
            u,
            cur: 0,
            acc: vec![0.0; k.rp],
            loaded: false,
            stale: false,
        }
    }

    /// Forget the kept state (after the group's state was set from elsewhere).
    pub fn reset(&mut self) {
        self.loaded = false;
        self.stale = false;
    }
}

/// Where a block of one group reads and writes: per circuit node a buffer of samples (the
/// known nodes are read from it, the group's nodes listed in `writes` or in the kernel's
/// node rows are written to it), and one more buffer (index `nodes`) for the state `v` of
/// the group's op-amp `drive` when given.
pub struct BlockIo<'a> {
    /// Per circuit node (and the drive buffer last).
    pub slots: &'a mut [Vec<f64>],
    /// Group nodes to write after a generic step.
    pub writes: &'a [usize],
    /// Op-amp of the group (index in the group) whose state goes to the drive buffer.
    pub drive: Option<usize>,
    /// Noise draws, `nw` per sample (empty without noise).
    pub w: &'a [f64],
}

/// Step group `gp` through samples `0..n`: with `kern` (and `fast`), the kernel with the
/// nonlinear step where needed; without it, the generic path
/// ([`super::step::step_group`]). On a failed step, the error and the sample.
#[allow(clippy::too_many_arguments)]
pub fn run_block(
    c: &Circuit,
    gp: &GroupPlan,
    mut kern: Option<(&SmallKernel, &mut KernelRun)>,
    h: f64,
    fast: bool,
    vn: &mut [f64],
    st: &mut GroupState,
    events: &mut [AmpEvents],
    counts: &mut (u64, u64),
    io: &mut BlockIo,
    n: usize,
    t0: f64,
) -> Result<(), (CircuitError, usize)> {
    let nnodes = c.nodes.len();
    let nc = gp.caps.len();
    let nw = st.w.len();
    if !fast {
        kern = None;
    }
    for t in 0..n {
        if let Some((k, kr)) = kern.as_mut() {
            let ncol = k.ncol;
            let nz = k.nz;
            let base = kr.cur * ncol;
            if !kr.loaded {
                kr.u[base..base + nz].copy_from_slice(&st.z);
                kr.loaded = true;
            }
            {
                let u = &mut kr.u[base..base + ncol];
                for (x, &node) in u[nz..nz + k.nk].iter_mut().zip(&gp.known) {
                    *x = io.slots[node][t];
                }
                if k.nw > 0 {
                    u[nz + k.nk..nz + k.nk + k.nw].copy_from_slice(&io.w[t * nw..(t + 1) * nw]);
                }
            }
            k.rows(&kr.u[base..base + ncol], &mut kr.acc);
            if k.inside(&kr.acc) {
                let nb = (1 - kr.cur) * ncol;
                kr.u[nb..nb + nz].copy_from_slice(&kr.acc[..nz]);
                for &(node, row) in &k.node_rows {
                    io.slots[node][t] = kr.acc[row];
                }
                if let Some(j) = io.drive {
                    io.slots[nnodes][t] = kr.acc[nc + j];
                }
                kr.cur = 1 - kr.cur;
                kr.stale = true;
                counts.0 += 1;
                continue;
            }
            // the nonlinear step takes this sample: hand over the state and the previous
            // step's full solution
            st.z.copy_from_slice(&kr.u[base..base + nz]);
            if kr.stale {
                let prev = (1 - kr.cur) * ncol;
                let up = &kr.u[prev..prev + ncol];
                for (i, y) in st.y.iter_mut().enumerate() {
                    let r = &k.full[i * ncol..(i + 1) * ncol];
                    *y = r.iter().zip(up).map(|(a, b)| a * b).sum();
                }
                for (i, &node) in gp.nodes.iter().enumerate() {
                    vn[node] = st.y[i];
                }
            }
            kr.stale = false;
            kr.loaded = false;
        }
        for &node in &gp.known {
            vn[node] = io.slots[node][t];
        }
        if nw > 0 {
            st.w.copy_from_slice(&io.w[t * nw..(t + 1) * nw]);
        }
        let time_s = t0 + t as f64 * h;
        let r = if kern.is_some() {
            counts.1 += 1;
            full_step(c, gp, h, vn, st, events, time_s)
        } else {
            step_group(c, gp, h, fast, vn, st, events, counts, time_s)
        };
        if let Err(e) = r {
            return Err((e, t));
        }
        for &node in io.writes {
            io.slots[node][t] = vn[node];
        }
        if let Some(j) = io.drive {
            io.slots[nnodes][t] = st.z[nc + j];
        }
    }
    if let Some((k, kr)) = kern {
        if kr.loaded {
            let base = kr.cur * k.ncol;
            st.z.copy_from_slice(&kr.u[base..base + k.nz]);
        }
    }
    Ok(())
}
