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
        Some(DiodeStep {
            nj,
            params,
            v0,
            z,
            t,
            ncol,
        })
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
        let mut g = [0.0f64; MAX_J];
        let mut converged = false;
        for _ in 0..MAX_ITER {
            // F(v) = v - v0 - Z is exp(v / nvt); J = 1 - Z diag(g)
            for q in 0..nj {
                let (is, nvt, _) = self.params[q];
                let ex = fastmath::exp((v[q] / nvt).min(200.0));
                cur[q] = is * ex;
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
            let Some(dv) = solve_small(&mut jm, &mut f, nj) else {
                break;
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
                break;
            }
            if done {
                converged = true;
                break;
            }
        }
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
