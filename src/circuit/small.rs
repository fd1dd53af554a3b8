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
use super::{Circuit, NodeKind, REV_FAST_MARGIN};

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
    /// The matrix, column-major (`m[c * rp + r]`), the constant column last; the state's
    /// rows and columns in the internal order (`zperm`), the state columns that do not
    /// feed back zero.
    pub m: Vec<f64>,
    /// Row of each check.
    pub chk_row: Vec<usize>,
    /// Lower limit of each check.
    pub chk_lo: Vec<f64>,
    /// Upper limit of each check.
    pub chk_hi: Vec<f64>,
    /// Per row (padded): its lower limit (`-f64::MAX` for a row that is not checked, so
    /// that an infinite value fails too).
    pub lo: Vec<f64>,
    /// Per row (padded): its upper limit.
    pub hi: Vec<f64>,
    /// Every unknown of the group from `u` (row-major, `ny x ncol`): the previous step's
    /// full solution when the nonlinear step takes over.
    pub full: Vec<f64>,
    /// Group nodes read outside the group: (circuit node, row).
    pub node_rows: Vec<(usize, usize)>,
    /// Per op-amp of the group: the row of its output (its peaks are taken from the
    /// rows' running extremes, not from a stored block).
    pub amp_rows: Vec<usize>,
    /// The state columns of `m` that feed back (`nsig` columns of `rp`), for the vector
    /// path.
    pub mz: Vec<f64>,
    /// State entries that feed back (the first `nsig` of the internal order).
    pub nsig: usize,
    /// The internal state order: `zperm[i]` is the canonical index (`GroupState::z`) of
    /// the kernel's state `i` (and of row `i` and column `i` of `m`).
    pub zperm: Vec<usize>,
    /// The fast nonlinear step of a diode group without op-amps (`circuit::diode`), taken
    /// instead of the generic one.
    pub diode: Option<super::diode::DiodeStep>,
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
            let (ka, kb) = gp.cap_update(q);
            let mut r = lin(ka * gc, &node_row(e.a), -ka * gc, &node_row(e.b));
            r[q] -= kb;
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
                let margin = if a.reversal { REV_FAST_MARGIN } else { 0.0 };
                chk_row.push(rows.len());
                chk_lo.push(cl + margin);
                chk_hi.push(ch - margin);
                rows.push(node_row(a.plus));
            }
        }
        for (q, &ei) in gp.junctions.iter().enumerate() {
            let e = &c.elems[ei];
            chk_row.push(rows.len());
            chk_lo.push(-f64::MAX);
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
        // A check row that cannot fail (no dependence on anything, its constant inside its
        // limits: the common-mode row of an op-amp whose V+ is ground) is dropped.
        let mut keep = vec![true; rows.len()];
        for ((&r, &l), &h) in chk_row.iter().zip(&chk_lo).zip(&chk_hi) {
            let row = &rows[r];
            if r >= nz && row[..kc].iter().all(|&x| x == 0.0) && row[kc] > l && row[kc] < h {
                keep[r] = false;
            }
        }
        // A state column whose every entry is below 1e-18 of its row's largest (an op-amp's
        // output state `v` after a step with `exp(-k G h)` far below rounding: the stiff
        // step forgets it) is left out of the product: its part of any row is far below
        // that row's rounding.
        let sig: Vec<bool> = (0..nz)
            .map(|col| {
                rows.iter().any(|r| {
                    let big = r.iter().fold(0.0f64, |a, &x| a.max(x.abs()));
                    r[col].abs() > 1e-18 * big
                })
            })
            .collect();
        for r in rows.iter_mut() {
            for (col, &s) in sig.iter().enumerate() {
                if !s {
                    r[col] = 0.0;
                }
            }
        }
        // internal state order: the state that feeds back first (`zperm[i]` is the
        // canonical index of internal state `i`)
        let zperm: Vec<usize> = (0..nz)
            .filter(|&i| sig[i])
            .chain((0..nz).filter(|&i| !sig[i]))
            .collect();
        let nsig = sig.iter().filter(|&&s| s).count();
        // rows in internal order: the state permuted, then the kept others
        let mut order: Vec<usize> = zperm.clone();
        order.extend((nz..rows.len()).filter(|&r| keep[r]));
        let mut new_row = vec![usize::MAX; rows.len()];
        for (i, &r) in order.iter().enumerate() {
            new_row[r] = i;
        }
        let colmap = |ci: usize| if ci < nz { zperm[ci] } else { ci };
        let nrows = order.len();
        let rp = nrows.div_ceil(4).max(1) * 4;
        let mut m = vec![0.0; ncol * rp];
        for (ri, &r) in order.iter().enumerate() {
            for ci in 0..ncol {
                m[ci * rp + ri] = rows[r][colmap(ci)];
            }
        }
        let mut lo = vec![-f64::MAX; rp];
        let mut hi = vec![f64::MAX; rp];
        let mut chk = (Vec::new(), Vec::new(), Vec::new());
        for ((&r, &l), &u) in chk_row.iter().zip(&chk_lo).zip(&chk_hi) {
            if !keep[r] {
                continue;
            }
            let r = new_row[r];
            lo[r] = lo[r].max(l);
            hi[r] = hi[r].min(u);
            chk.0.push(r);
            chk.1.push(l);
            chk.2.push(u);
        }
        let (chk_row, chk_lo, chk_hi) = chk;
        let node_rows = node_rows
            .into_iter()
            .map(|(n, r)| (n, new_row[r]))
            .collect();
        let amp_rows = (0..na).map(|j| new_row[nc + j]).collect();
        let mz = m[..nsig * rp].to_vec();
        let mut k = SmallKernel {
            diode: None,
            mz,
            nsig,
            zperm,
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
            lo,
            hi,
            full,
            node_rows,
            amp_rows,
        };
        k.diode = super::diode::DiodeStep::compile(c, gp, &k);
        Some(k)
    }

    /// Every row for the input vector `u` (its last entry 1, the state in the internal
    /// order) into `acc` (length `rp`): the constant column, then each column of `u`.
    pub fn rows(&self, u: &[f64], acc: &mut [f64]) {
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
    pub fn inside(&self, acc: &[f64]) -> bool {
        acc[..self.rp]
            .iter()
            .zip(self.lo.iter().zip(&self.hi))
            .all(|(&x, (&l, &h))| x >= l && x <= h)
    }

    /// The row (and internal state index) of canonical state entry `i`.
    pub fn state_row(&self, i: usize) -> usize {
        self.zperm.iter().position(|&c| c == i).unwrap_or(i)
    }
}

/// Running state and scratch of one group's kernel (sized once for a block length).
#[derive(Debug, Clone, PartialEq)]
pub struct KernelRun {
    /// Per sample of the block: the known node values and the noise draws.
    xw: Vec<f64>,
    /// The values written out (node rows, then the drive), a block per output (swapped
    /// with the node's buffer when the kernel took the whole block).
    ob: Vec<Vec<f64>>,
    /// Rows written out.
    orow: Vec<usize>,
    /// The input vector `u` of the last kernel step (canonical order).
    uprev: Vec<f64>,
    /// The state and the last step's state in the internal order (scratch).
    zi: Vec<f64>,
    zpi: Vec<f64>,
    /// The input vector of a diode step.
    ucur: Vec<f64>,
    /// Junction voltages of the last diode steps.
    dhist: super::diode::DiodeHist,
    /// The last step was the kernel's: the group's full solution (`GroupState::y`, the node
    /// array) is not written.
    stale: bool,
    /// Scratch rows.
    acc: Vec<f64>,
    /// Every row's lowest (first `rp`) and highest (next `rp`) value over the last
    /// segment's steps (the vector segment: only the rows in vectors `pk`).
    ext: Vec<f64>,
    /// The (at most two) vectors of four rows that hold the op-amps' outputs
    /// (`usize::MAX`: none), whose extremes the vector segment keeps.
    pk: [usize; 2],
    /// Where the op-amps' outputs are written out instead (their rows spread over more
    /// than two vectors): the index in `ob` of the first.
    pk_ob: Option<usize>,
    /// Outputs copied to the node buffers (node rows, then the drive).
    nout: usize,
}

impl KernelRun {
    /// A run for kernel `k` with blocks of up to `block` samples; `drive` the op-amp (in
    /// the group) whose state is written out after the node rows.
    pub fn new(k: &SmallKernel, block: usize, drive: Option<usize>, nc: usize) -> KernelRun {
        let mut orow: Vec<usize> = k.node_rows.iter().map(|&(_, r)| r).collect();
        if let Some(j) = drive {
            orow.push(k.state_row(nc + j));
        }
        let nout = orow.len();
        // the op-amps' peaks: from the vector segment's running extremes when their rows
        // lie in at most two vectors, else from their rows written out
        let mut vecs: Vec<usize> = k.amp_rows.iter().map(|&r| r / 4).collect();
        vecs.sort_unstable();
        vecs.dedup();
        let (pk, pk_ob) = if vecs.len() <= 2 {
            let v = |i: usize| vecs.get(i).copied().unwrap_or(usize::MAX);
            ([v(0), v(1)], None)
        } else {
            orow.extend(&k.amp_rows);
            ([usize::MAX; 2], Some(nout))
        };
        KernelRun {
            xw: vec![0.0; block * (k.nk + k.nw)],
            ob: vec![vec![0.0; block]; orow.len()],
            orow,
            uprev: vec![0.0; k.ncol],
            zi: vec![0.0; k.nz],
            zpi: vec![0.0; k.nz],
            ucur: vec![0.0; k.ncol],
            dhist: super::diode::DiodeHist::default(),
            stale: false,
            acc: vec![0.0; k.rp],
            ext: vec![0.0; 2 * k.rp],
            pk,
            pk_ob,
            nout,
        }
    }

    /// Forget the last kernel step (after the group's state was set from elsewhere).
    pub fn reset(&mut self) {
        self.stale = false;
        self.dhist.n = 0;
        self.dhist.nc = 0;
    }
}

/// Lane `l` of `v` in every lane.
///
/// # Safety
/// The CPU must support AVX2.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[inline]
unsafe fn lane(v: std::arch::x86_64::__m256d, l: usize) -> std::arch::x86_64::__m256d {
    use std::arch::x86_64::_mm256_permute4x64_pd;
    match l {
        0 => _mm256_permute4x64_pd::<0x00>(v),
        1 => _mm256_permute4x64_pd::<0x55>(v),
        2 => _mm256_permute4x64_pd::<0xAA>(v),
        _ => _mm256_permute4x64_pd::<0xFF>(v),
    }
}

/// The kernel's steps from sample `from` while every check row stays inside its limits,
/// with AVX2 vectors: the state (internal order) in `zi` (updated; the state before the
/// last step taken into `zpi`), the per-sample inputs in `xw`, output `i` of sample `t`
/// into `ob[i][t]`. Returns the first sample outside the checks
/// (or `n`).
///
/// Each step is the constant and the inputs' part (independent of the state, so it
/// overlaps) plus the state that feeds back (`nsig` entries) times its column, in four
/// partial sums with fused multiply-adds; the rows stay in `G` vectors of four. With `NS`
/// (`k.nsig` fixed at compile time) each state entry is broadcast from the last step's rows
/// held in registers (a permute: the loop-carried chain is a permute and `NS / 4 + 1`
/// multiply-adds, about 3 % on the network bench's clipper); with `NS` = 0 (read from `k`)
/// from the rows stored (a store and a reload on the chain). The sums are taken in another
/// order than [`segment_any`] (both agree with the generic path to rounding).
///
/// # Safety
/// The CPU must support AVX2 and FMA; `k.rp == 4 G`.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
#[allow(clippy::too_many_arguments)]
unsafe fn segment_avx2<const G: usize, const NS: usize>(
    k: &SmallKernel,
    zi: &mut [f64],
    zpi: &mut [f64],
    xw: &[f64],
    ob: &mut [Vec<f64>],
    orow: &[usize],
    pk: [usize; 2],
    ext: &mut [f64],
    from: usize,
    n: usize,
) -> usize {
    use std::arch::x86_64::{
        _mm256_add_pd, _mm256_and_pd, _mm256_broadcast_sd, _mm256_cmp_pd, _mm256_fmadd_pd,
        _mm256_loadu_pd, _mm256_max_pd, _mm256_min_pd, _mm256_movemask_pd, _mm256_mul_pd,
        _mm256_set1_pd, _mm256_setzero_pd, _mm256_storeu_pd, _CMP_GE_OQ, _CMP_LE_OQ,
    };
    let r = 4 * G;
    let nz = k.nz;
    let ns = if NS > 0 { NS } else { k.nsig };
    assert!(NS == 0 || NS == k.nsig);
    let no = orow.len();
    assert!(k.rp == r && k.lo.len() >= r && k.hi.len() >= r && k.mz.len() >= ns * r);
    assert!(k.m.len() >= k.ncol * r && xw.len() >= n * (k.nk + k.nw));
    assert!(ob.len() >= no && no <= 8 && ob.iter().all(|o| o.len() >= n));
    assert!(zi.len() >= nz && zpi.len() >= nz && nz <= r && orow.iter().all(|&o| o < r));
    assert!(ext.len() >= 2 * r);
    let mzp = k.mz.as_ptr();
    let mp = k.m.as_ptr();
    let xwp = xw.as_ptr();
    let nx = k.nk + k.nw;
    let kc = k.ncol - 1;
    let mut lo = [_mm256_setzero_pd(); G];
    let mut hi = [_mm256_setzero_pd(); G];
    let mut cst = [_mm256_setzero_pd(); G];
    for g in 0..G {
        // SAFETY: the limit rows hold `r` entries, the constant column is inside `m`
        // (checked above).
        lo[g] = _mm256_loadu_pd(k.lo.as_ptr().add(4 * g));
        hi[g] = _mm256_loadu_pd(k.hi.as_ptr().add(4 * g));
        cst[g] = _mm256_loadu_pd(mp.add(kc * r + 4 * g));
    }
    // the lowest and highest value over the steps taken of the rows in vectors `pk[0]`
    // and `pk[1]` (the op-amps' outputs, for their peaks; `usize::MAX`: none): two pairs
    // of registers, not one per vector (those would spill)
    let mut mn = [_mm256_set1_pd(f64::INFINITY); 2];
    let mut mx = [_mm256_set1_pd(f64::NEG_INFINITY); 2];
    // the last two steps' rows (state first) and the step being taken, in rotation
    let mut rows = [[0.0f64; 32]; 3];
    rows[0][..nz].copy_from_slice(&zi[..nz]);
    rows[1][..nz].copy_from_slice(&zpi[..nz]);
    let (mut cur, mut prev, mut next) = (0, 1, 2);
    // the row vectors stored per step: the state's (handed back at the end) and those the
    // outputs read; the rest (check rows only) stay in registers
    let gs = nz
        .div_ceil(4)
        .max(orow.iter().map(|&o| o / 4 + 1).max().unwrap_or(0))
        .min(G);
    // the last step's rows in registers (the state's part reads them)
    let mut zr = [_mm256_setzero_pd(); G];
    for (g, z) in zr.iter_mut().enumerate() {
        // SAFETY: 4 g + 3 < r <= 32: inside the row.
        *z = _mm256_loadu_pd(rows[cur].as_ptr().add(4 * g));
    }
    // the output buffers' pointers (at most eight outputs, else the plain segment)
    let mut optr = [(std::ptr::null_mut::<f64>(), 0usize); 8];
    for ((p, o), &row) in optr.iter_mut().zip(ob.iter_mut()).zip(orow) {
        *p = (o.as_mut_ptr(), row);
    }
    let mut t = from;
    while t < n {
        let zs = rows[cur].as_ptr();
        // the inputs' part (off the loop-carried chain)
        let mut a0 = cst;
        let mut a1 = [_mm256_setzero_pd(); G];
        for c in 0..nx {
            // SAFETY: t < n and c < nx: inside `xw`; column nz + c < kc, row 4 g + 3 < r.
            let xv = _mm256_broadcast_sd(&*xwp.add(t * nx + c));
            for (g, a) in a1.iter_mut().enumerate() {
                let m = _mm256_loadu_pd(mp.add((nz + c) * r + 4 * g));
                *a = _mm256_fmadd_pd(m, xv, *a);
            }
        }
        if NS > 0 {
            // The state's part from the last step's rows held in registers (`zr`), each
            // entry broadcast from its lane (a permute, not a store and a reload): the
            // chain from one step's rows to the next is a permute and `NS / 4 + 1`
            // multiply-adds, the constant and the inputs' part folded into the first.
            let mut q = [[_mm256_setzero_pd(); G]; 4];
            for ii in 0..NS {
                let v = lane(zr[ii / 4], ii % 4);
                for g in 0..G {
                    // SAFETY: ii < NS == nsig <= nz <= 32: column ii of `mz`, row 4 g + 3 < r.
                    let m = _mm256_loadu_pd(mzp.add(ii * r + 4 * g));
                    q[ii % 4][g] = if ii == 0 {
                        _mm256_fmadd_pd(m, v, _mm256_add_pd(a0[g], a1[g]))
                    } else if ii < 4 {
                        _mm256_mul_pd(m, v)
                    } else {
                        _mm256_fmadd_pd(m, v, q[ii % 4][g])
                    };
                }
            }
            for g in 0..G {
                a0[g] = match NS {
                    1 => q[0][g],
                    2 => _mm256_add_pd(q[0][g], q[1][g]),
                    3 => _mm256_add_pd(q[0][g], _mm256_add_pd(q[1][g], q[2][g])),
                    _ => _mm256_add_pd(
                        _mm256_add_pd(q[0][g], q[1][g]),
                        _mm256_add_pd(q[2][g], q[3][g]),
                    ),
                };
            }
        } else {
            // the state's part in two more partial sums, four columns at a time (the chain
            // is then about `nsig / 4` multiply-adds deep)
            let mut a2 = [_mm256_setzero_pd(); G];
            let mut a3 = [_mm256_setzero_pd(); G];
            let mut i = 0;
            while i + 3 < ns {
                // SAFETY: i + 3 < ns <= nz <= 32; columns i .. i + 3 of `mz`.
                let v0 = _mm256_broadcast_sd(&*zs.add(i));
                let v1 = _mm256_broadcast_sd(&*zs.add(i + 1));
                let v2 = _mm256_broadcast_sd(&*zs.add(i + 2));
                let v3 = _mm256_broadcast_sd(&*zs.add(i + 3));
                for g in 0..G {
                    a0[g] = _mm256_fmadd_pd(_mm256_loadu_pd(mzp.add(i * r + 4 * g)), v0, a0[g]);
                    a1[g] =
                        _mm256_fmadd_pd(_mm256_loadu_pd(mzp.add((i + 1) * r + 4 * g)), v1, a1[g]);
                    a2[g] =
                        _mm256_fmadd_pd(_mm256_loadu_pd(mzp.add((i + 2) * r + 4 * g)), v2, a2[g]);
                    a3[g] =
                        _mm256_fmadd_pd(_mm256_loadu_pd(mzp.add((i + 3) * r + 4 * g)), v3, a3[g]);
                }
                i += 4;
            }
            while i < ns {
                // SAFETY: as above.
                let v = _mm256_broadcast_sd(&*zs.add(i));
                for g in 0..G {
                    let m = _mm256_loadu_pd(mzp.add(i * r + 4 * g));
                    if i % 2 == 0 {
                        a2[g] = _mm256_fmadd_pd(m, v, a2[g]);
                    } else {
                        a3[g] = _mm256_fmadd_pd(m, v, a3[g]);
                    }
                }
                i += 1;
            }
            for g in 0..G {
                a0[g] = _mm256_add_pd(a0[g], a2[g]);
                a1[g] = _mm256_add_pd(a1[g], a3[g]);
            }
        }
        let mut bad = 0;
        let nxt = rows[next].as_mut_ptr();
        let mut av = [_mm256_setzero_pd(); G];
        for g in 0..G {
            let a = if NS > 0 {
                a0[g]
            } else {
                _mm256_add_pd(a0[g], a1[g])
            };
            av[g] = a;
            let ok = _mm256_and_pd(
                _mm256_cmp_pd::<_CMP_GE_OQ>(a, lo[g]),
                _mm256_cmp_pd::<_CMP_LE_OQ>(a, hi[g]),
            );
            bad |= _mm256_movemask_pd(ok) ^ 0xf;
            if g < gs {
                // SAFETY: 4 g + 3 < r <= 32.
                _mm256_storeu_pd(nxt.add(4 * g), a);
            }
        }
        if bad != 0 {
            break;
        }
        zr = av;
        for (g, &a) in av.iter().enumerate() {
            // (loop-invariant tests on an unrolled loop)
            for q in 0..2 {
                if g == pk[q] {
                    mn[q] = _mm256_min_pd(mn[q], a);
                    mx[q] = _mm256_max_pd(mx[q], a);
                }
            }
        }
        let out = &rows[next];
        for (&(dst, row), _) in optr.iter().zip(0..no) {
            // SAFETY: t < n <= the length of every output buffer (checked above), row < r.
            *dst.add(t) = *out.get_unchecked(row);
        }
        (cur, prev, next) = (next, cur, prev);
        t += 1;
    }
    if t > from {
        zi[..nz].copy_from_slice(&rows[cur][..nz]);
        zpi[..nz].copy_from_slice(&rows[prev][..nz]);
    }
    for q in 0..2 {
        if pk[q] < G {
            // SAFETY: `ext` holds 2 r entries (checked above), 4 pk + 3 < r.
            _mm256_storeu_pd(ext.as_mut_ptr().add(4 * pk[q]), mn[q]);
            _mm256_storeu_pd(ext.as_mut_ptr().add(r + 4 * pk[q]), mx[q]);
        }
    }
    t
}

/// The kernel's steps from sample `from` while every check row stays inside its limits,
/// plain (every column of the matrix through a slice): see `segment_avx2`.
#[allow(clippy::too_many_arguments)]
fn segment_any(
    k: &SmallKernel,
    zi: &mut [f64],
    zpi: &mut [f64],
    xw: &[f64],
    ob: &mut [Vec<f64>],
    orow: &[usize],
    acc: &mut [f64],
    ext: &mut [f64],
    from: usize,
    n: usize,
) -> usize {
    let nz = k.nz;
    let nx = k.nk + k.nw;
    let kc = k.ncol - 1;
    let rp = k.rp;
    let (lo, hi) = ext[..2 * rp].split_at_mut(rp);
    lo.fill(f64::INFINITY);
    hi.fill(f64::NEG_INFINITY);
    let mut t = from;
    while t < n {
        acc[..rp].copy_from_slice(&k.m[kc * rp..(kc + 1) * rp]);
        for (q, col) in k.m[..kc * rp].chunks_exact(rp).enumerate() {
            let x = if q < nz { zi[q] } else { xw[t * nx + q - nz] };
            for (a, m) in acc.iter_mut().zip(col) {
                *a += m * x;
            }
        }
        if !k.inside(acc) {
            break;
        }
        for ((l, h), &a) in lo.iter_mut().zip(hi.iter_mut()).zip(&acc[..rp]) {
            *l = l.min(a);
            *h = h.max(a);
        }
        for (i, &r) in orow.iter().enumerate() {
            ob[i][t] = acc[r];
        }
        zpi[..nz].copy_from_slice(&zi[..nz]);
        zi[..nz].copy_from_slice(&acc[..nz]);
        t += 1;
    }
    t
}

/// The kernel's steps from sample `from` while every check row stays inside its limits
/// (AVX2 vectors for up to 32 rows where the CPU has them, else [`segment_any`]); the
/// group's state `z` in the canonical order, updated, and `uprev` the input vector of the
/// last step taken.
fn run_segment(k: &SmallKernel, z: &mut [f64], kr: &mut KernelRun, from: usize, n: usize) -> usize {
    let KernelRun {
        xw,
        ob,
        orow,
        uprev,
        zi,
        zpi,
        acc,
        ext,
        pk,
        ..
    } = kr;
    let nz = k.nz;
    for (d, &c) in zi.iter_mut().zip(&k.zperm) {
        *d = z[c];
    }
    let mut done = None;
    #[cfg(target_arch = "x86_64")]
    {
        if orow.len() <= 8
            && std::arch::is_x86_feature_detected!("avx2")
            && std::arch::is_x86_feature_detected!("fma")
        {
            // SAFETY: the CPU supports AVX2 and FMA (checked just above); `rp == 4 G` by the
            // match.
            unsafe {
                // up to 16 rows, the count of state entries that feed back fixed at compile
                // time where it is small (the step's loops then unroll: about 7 % on the
                // state-variable filter of the network bench)
                macro_rules! by_ns {
                    ($g:literal) => {
                        match k.nsig {
                            1 => segment_avx2::<$g, 1>(k, zi, zpi, xw, ob, orow, *pk, ext, from, n),
                            2 => segment_avx2::<$g, 2>(k, zi, zpi, xw, ob, orow, *pk, ext, from, n),
                            3 => segment_avx2::<$g, 3>(k, zi, zpi, xw, ob, orow, *pk, ext, from, n),
                            4 => segment_avx2::<$g, 4>(k, zi, zpi, xw, ob, orow, *pk, ext, from, n),
                            5 => segment_avx2::<$g, 5>(k, zi, zpi, xw, ob, orow, *pk, ext, from, n),
                            6 => segment_avx2::<$g, 6>(k, zi, zpi, xw, ob, orow, *pk, ext, from, n),
                            7 => segment_avx2::<$g, 7>(k, zi, zpi, xw, ob, orow, *pk, ext, from, n),
                            8 => segment_avx2::<$g, 8>(k, zi, zpi, xw, ob, orow, *pk, ext, from, n),
                            _ => segment_avx2::<$g, 0>(k, zi, zpi, xw, ob, orow, *pk, ext, from, n),
                        }
                    };
                }
                done = match k.rp {
                    4 => Some(by_ns!(1)),
                    8 => Some(by_ns!(2)),
                    12 => Some(by_ns!(3)),
                    16 => Some(by_ns!(4)),
                    20 => Some(segment_avx2::<5, 0>(
                        k, zi, zpi, xw, ob, orow, *pk, ext, from, n,
                    )),
                    24 => Some(segment_avx2::<6, 0>(
                        k, zi, zpi, xw, ob, orow, *pk, ext, from, n,
                    )),
                    28 => Some(segment_avx2::<7, 0>(
                        k, zi, zpi, xw, ob, orow, *pk, ext, from, n,
                    )),
                    32 => Some(segment_avx2::<8, 0>(
                        k, zi, zpi, xw, ob, orow, *pk, ext, from, n,
                    )),
                    _ => None,
                };
            }
        }
    }
    let t = match done {
        Some(t) => t,
        None => segment_any(k, zi, zpi, xw, ob, orow, acc, ext, from, n),
    };
    if t > from {
        let nx = k.nk + k.nw;
        for (i, &c) in k.zperm.iter().enumerate() {
            z[c] = zi[i];
            uprev[c] = zpi[i];
        }
        uprev[nz..nz + nx].copy_from_slice(&xw[(t - 1) * nx..t * nx]);
        uprev[nz + nx] = 1.0;
    }
    t
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
    /// Band-limited corrections of the drive's slope corners (none: not taken).
    pub edges: Option<&'a mut DriveEdges>,
    /// Where a diode group's table loop records each sample for the knee correction
    /// (`engine::knee::Tap`), when it is taken.
    pub knee: Option<crate::engine::knee::Tap<'a>>,
    /// Per op-amp of the circuit: its lowest and highest output so far (the group's
    /// op-amps' entries are widened by the block's steps).
    pub peaks: &'a mut [(f64, f64)],
}

/// The band-limited corrections of a network drive's slope corners over a block, entry `i`
/// for sample `i - 3` of the block (a corner in the step ending at sample `t` touches
/// samples `t - 3 ..= t + 2`, [`crate::engine::edges::corner6`]).
#[derive(Debug, Clone)]
pub struct DriveEdges {
    /// Corrections added to the drive before the clamp.
    pub corr: Vec<f64>,
    /// Corrections of reversal edges, added after the static clamp of the drive.
    pub ocorr: Vec<f64>,
    /// Samples whose clamp window holds a reversal edge: their output is the static clamp
    /// of the drive plus `ocorr` (the band-limited clamp's local polynomial cannot follow a
    /// rail-to-rail jump).
    pub mask: Vec<bool>,
    /// Whether any entry may be set (none: a block with no corner or edge skips them).
    pub live: bool,
}

impl DriveEdges {
    /// Room for blocks of `block` samples.
    pub fn new(block: usize) -> DriveEdges {
        let n = block + crate::engine::edges::SPAN;
        DriveEdges {
            corr: vec![0.0; n],
            ocorr: vec![0.0; n],
            mask: vec![false; n],
            live: false,
        }
    }

    /// Nothing pending.
    pub fn clear(&mut self) {
        self.corr.fill(0.0);
        self.ocorr.fill(0.0);
        self.mask.fill(false);
        self.live = false;
    }

    /// The corrections `w` of the step ending at sample `t`; `rev`: a reversal edge.
    #[inline]
    pub fn add(&mut self, t: usize, w: &[f64; crate::engine::edges::SPAN], rev: bool) {
        let n = w.len();
        if t + n > self.corr.len() {
            return;
        }
        self.live = true;
        if rev {
            for (a, b) in self.ocorr[t..t + n].iter_mut().zip(w) {
                *a += b;
            }
            self.mask[t..t + n].fill(true);
        } else {
            for (a, b) in self.corr[t..t + n].iter_mut().zip(w) {
                *a += b;
            }
        }
    }

    /// Move what falls past a block of `b` samples to the head (the next block's first
    /// samples) and clear the rest.
    pub fn carry(&mut self, b: usize) {
        if !self.live {
            return;
        }
        // a step ending at the block's last sample touches two samples past it
        let la = crate::engine::shaper::LOOKAHEAD;
        let c: [f64; 2] = [self.corr[b + la], self.corr[b + la + 1]];
        let o: [f64; 2] = [self.ocorr[b + la], self.ocorr[b + la + 1]];
        let m: [bool; 2] = [self.mask[b + la], self.mask[b + la + 1]];
        self.clear();
        self.corr[la..la + 2].copy_from_slice(&c);
        self.ocorr[la..la + 2].copy_from_slice(&o);
        self.mask[la..la + 2].copy_from_slice(&m);
        self.live = c.iter().chain(&o).any(|&x| x != 0.0) || m.contains(&true);
    }
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
        if let Some((_, kr)) = kern.as_mut() {
            kr.dhist.nc = 0;
        }
        kern = None;
    }
    if let Some((k, kr)) = kern.as_mut() {
        // the block's inputs, per sample: known nodes, then noise draws
        let nx = k.nk + k.nw;
        for (q, &node) in gp.known.iter().enumerate() {
            for (d, &x) in kr
                .xw
                .iter_mut()
                .skip(q)
                .step_by(nx)
                .zip(&io.slots[node][..n])
            {
                *d = x;
            }
        }
        if k.nw > 0 {
            for t in 0..n {
                kr.xw[t * nx + k.nk..(t + 1) * nx].copy_from_slice(&io.w[t * nw..(t + 1) * nw]);
            }
        }
    }
    // a diode group with its table: the whole block in one loop
    if let Some((k, kr)) = kern.as_mut() {
        if let Some((ds, tab)) = k
            .diode
            .as_ref()
            .and_then(|d| d.table.as_ref().map(|t| (d, t)))
        {
            if k.nk + k.nw == 1 && io.drive.is_none() {
                let done = ds.run_table_block(
                    c,
                    gp,
                    tab,
                    &kr.xw[..n],
                    vn,
                    st,
                    counts,
                    io.slots,
                    &mut kr.dhist,
                    io.writes,
                    n,
                    t0,
                    h,
                    io.knee.as_mut(),
                )?;
                if done {
                    kr.stale = false;
                    kr.dhist.n = 0;
                    return Ok(());
                }
            }
        }
    }
    if let Some((_, kr)) = kern.as_mut() {
        // the table's loop did not take this block: its currents go stale
        kr.dhist.nc = 0;
    }
    let mut t = 0;
    while t < n {
        if let Some((k, kr)) = kern.as_mut() {
            let from = t;
            t = run_segment(k, &mut st.z, kr, from, n);
            if t > from {
                kr.stale = true;
                kr.dhist.n = 0;
                counts.0 += (t - from) as u64;
                for (j, (ac, &row)) in gp.amps.iter().zip(&k.amp_rows).enumerate() {
                    let (lo, hi) = match kr.pk_ob {
                        Some(i) => kr.ob[i + j][from..t]
                            .iter()
                            .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &x| {
                                (l.min(x), h.max(x))
                            }),
                        None => (kr.ext[row], kr.ext[k.rp + row]),
                    };
                    let pk = &mut io.peaks[ac.amp];
                    *pk = (pk.0.min(lo), pk.1.max(hi));
                }
                let mut targets = k.node_rows.iter().map(|&(node, _)| node);
                for ob in kr.ob[..kr.nout].iter_mut() {
                    let node = targets.next().unwrap_or(nnodes);
                    if from == 0 && t == n && ob.len() == io.slots[node].len() {
                        std::mem::swap(ob, &mut io.slots[node]);
                    } else {
                        io.slots[node][from..t].copy_from_slice(&ob[from..t]);
                    }
                }
            }
            if t >= n {
                break;
            }
            // the nonlinear step takes this sample: hand over the previous step's full
            // solution (the state is already in `st.z`)
            if kr.stale {
                let ncol = k.ncol;
                for (i, y) in st.y.iter_mut().enumerate() {
                    let r = &k.full[i * ncol..(i + 1) * ncol];
                    *y = r.iter().zip(&kr.uprev).map(|(a, b)| a * b).sum();
                }
                for (i, &node) in gp.nodes.iter().enumerate() {
                    vn[node] = st.y[i];
                }
                kr.stale = false;
            }
        }
        for &node in &gp.known {
            vn[node] = io.slots[node][t];
        }
        if nw > 0 {
            st.w.copy_from_slice(&io.w[t * nw..(t + 1) * nw]);
        }
        let time_s = t0 + t as f64 * h;
        let r = if let Some((k, kr)) = kern.as_mut() {
            counts.1 += 1;
            match &k.diode {
                Some(ds) => {
                    let (nz, nx) = (k.nz, k.nk + k.nw);
                    kr.ucur[..nz].copy_from_slice(&st.z);
                    kr.ucur[nz..nz + nx].copy_from_slice(&kr.xw[t * nx..(t + 1) * nx]);
                    kr.ucur[nz + nx] = 1.0;
                    ds.step(c, gp, k, &kr.ucur, vn, st, &mut kr.dhist, time_s)
                }
                None => full_step(c, gp, h, vn, st, events, time_s),
            }
        } else {
            step_group(c, gp, h, fast, vn, st, events, counts, time_s)
        };
        if let Err(e) = r {
            return Err((e, t));
        }
        for &node in io.writes {
            io.slots[node][t] = vn[node];
        }
        for ac in &gp.amps {
            let v = vn[c.amps[ac.amp].out];
            let pk = &mut io.peaks[ac.amp];
            *pk = (pk.0.min(v), pk.1.max(v));
        }
        if let Some(j) = io.drive {
            io.slots[nnodes][t] = st.z[nc + j];
        }
        if let Some(w) = st.drive_w.take() {
            if let Some(e) = io.edges.as_deref_mut() {
                e.add(t, &w, st.drive_rev);
            }
        }
        t += 1;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A three-op-amp state-variable loop (the network bench's), driven by a slow random
    /// walk that stays in the linear region.
    const SVF: &str = r#"[patch]
length = "1 s"
noise = false
[rails]
pos = "12 V"
neg = "-12 V"
[sources.in]
wave = "sine"
freq = "997 Hz"
amp = "1 V"
[stages.svf]
type = "network"
amps = [{ part = "jfet-general", plus = "q", minus = "s", out = "hp" }, { part = "jfet-general", plus = "gnd", minus = "i1", out = "bp" }, { part = "jfet-general", plus = "gnd", minus = "i2", out = "lp" }]
parts = [{ r = "10k", ends = ["in", "s"] }, { r = "10k", ends = ["lp", "s"] }, { r = "10k", ends = ["s", "hp"] }, { r = "50k", ends = ["bp", "q"] }, { r = "10k", ends = ["q", "gnd"] }, { r = "15k9", ends = ["hp", "i1"] }, { c = "10n", ends = ["i1", "bp"] }, { r = "15k9", ends = ["bp", "i2"] }, { c = "10n", ends = ["i2", "lp"] }]
out = "lp"
[outputs.out]
from = "svf"
"#;

    // The vector segment against the plain one (a plain reference beside the fast path):
    // the same steps taken, the same outputs and state to rounding; and the state columns
    // left out (an op-amp's `v` after a stiff step) are the ones the plain matrix holds as
    // zero.
    #[test]
    fn vector_segment_matches_the_plain_one() {
        let p = crate::patch::parse_str(SVF, "t.toml", std::path::Path::new("."), &[]).unwrap();
        let plan = crate::engine::compile(&p).unwrap();
        let k = plan.networks[0].kernels[0].as_ref().expect("kernel");
        assert!(k.nsig < k.nz, "some state should not feed back");
        assert_eq!(k.nsig, 5, "the two capacitors and the three op-amps' `p`");
        assert_eq!(k.rp, 12, "the two constant common-mode rows are dropped");
        let n = 2000;
        let nx = k.nk + k.nw;
        let mut rng = crate::rng::Rng::new(3);
        let mut x = 0.0;
        let xw: Vec<f64> = (0..n * nx)
            .map(|_| {
                x = 0.999 * x + 0.05 * (2.0 * rng.uniform() - 1.0);
                x
            })
            .collect();
        let mut kr = KernelRun::new(k, n, Some(2), 2);
        kr.xw.copy_from_slice(&xw);
        let z0 = vec![0.0; k.nz];
        let mut z_any = z0.clone();
        let mut zp_any = z0.clone();
        let mut ob_any = vec![vec![0.0; n]; kr.orow.len()];
        let mut acc = vec![0.0; k.rp];
        let mut ext_any = vec![0.0; 2 * k.rp];
        let t_any = segment_any(
            k,
            &mut z_any,
            &mut zp_any,
            &xw,
            &mut ob_any,
            &kr.orow,
            &mut acc,
            &mut ext_any,
            0,
            n,
        );
        assert_eq!(t_any, n);
        #[cfg(target_arch = "x86_64")]
        if kr.orow.len() <= 8
            && std::arch::is_x86_feature_detected!("avx2")
            && std::arch::is_x86_feature_detected!("fma")
        {
            // the count of state entries read from the kernel, and fixed at compile time
            for fixed in [false, true] {
                let mut z_v = z0.clone();
                let mut zp_v = z0.clone();
                let mut ob_v = vec![vec![0.0; n]; kr.orow.len()];
                let mut ext_v = vec![0.0; 2 * k.rp];
                // SAFETY: the CPU has AVX2 and FMA (checked); rp is 12.
                let t_v = unsafe {
                    if fixed {
                        segment_avx2::<3, 5>(
                            k, &mut z_v, &mut zp_v, &xw, &mut ob_v, &kr.orow, kr.pk, &mut ext_v, 0,
                            n,
                        )
                    } else {
                        segment_avx2::<3, 0>(
                            k, &mut z_v, &mut zp_v, &xw, &mut ob_v, &kr.orow, kr.pk, &mut ext_v, 0,
                            n,
                        )
                    }
                };
                assert_eq!(t_v, n);
                for (a, b) in ob_any.iter().flatten().zip(ob_v.iter().flatten()) {
                    assert!((a - b).abs() <= 1e-12 * (1.0 + a.abs()), "{a} {b}");
                }
                // the op-amps' rows' extremes (their peaks) are those of the plain segment
                assert!(kr.pk_ob.is_none(), "three op-amps' rows fit two vectors");
                for &row in &k.amp_rows {
                    for (a, b) in [
                        (ext_any[row], ext_v[row]),
                        (ext_any[k.rp + row], ext_v[k.rp + row]),
                    ] {
                        assert!((a - b).abs() <= 1e-12 * (1.0 + a.abs()), "{a} {b}");
                    }
                }
                for (a, b) in z_any.iter().zip(&z_v).chain(zp_any.iter().zip(&zp_v)) {
                    assert!((a - b).abs() <= 1e-12 * (1.0 + a.abs()), "{a} {b}");
                }
            }
        }
        let big = ob_any.iter().flatten().fold(0.0f64, |a, &x| a.max(x.abs()));
        assert!(big > 0.01, "the walk moves the outputs: {big}");
        // the plain segment's extremes against the outputs it wrote (the drive is the
        // low-pass op-amp's output row)
        let row = *kr.orow.last().expect("the drive's row");
        let (lo, hi) = ob_any
            .last()
            .expect("the drive")
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &x| {
                (l.min(x), h.max(x))
            });
        assert_eq!((ext_any[row], ext_any[k.rp + row]), (lo, hi));
    }
}
