//! Kernel selection by shape: which engine kernel runs a stage's circuit.
//!
//! Every op-amp stage reaches the engine as a [`Circuit`] (a shorthand stage as its
//! textbook circuit, [`super::build::shorthand_circuit`]; a network as written,
//! [`super::build::network_circuit`]). Like a transform planner that picks a specialised
//! butterfly for the sizes it knows, [`stage_form`] recognises the one shape the engine's
//! scalar stage kernel (`engine::run`: the block-checked linear recursion, the hybrid
//! per-sample full model, the band-limited clamp, noise) runs, and derives that kernel's
//! coefficients from the circuit by nodal elimination. Anything else runs on the circuit
//! group kernel (`circuit::step`). So a shorthand stage and the same circuit written as a
//! network run the same kernel and the same samples.
//!
//! # The stage shape
//! One op-amp, no diode, and:
//! - the inverting input `M` is the output itself (a follower), or a passive node whose
//!   resistive network (every resistor between passive nodes reachable from `M` without
//!   crossing a driven node) reduces onto `M`: `V- = minus_const + sum mu_i s_i + b v`
//!   with `v` the op-amp's output and `s_i` the input nodes' values;
//! - capacitors on that side only in the two first-order forms the kernel steps with
//!   trapezoidal companions: across `M` and the output (a feedback capacitor, conductance
//!   `2C/h`), or in a series chain from an input node to `M` (resistors and one capacitor
//!   through nodes with no other connection: conductance `1 / (R + h/2C)`);
//! - the non-inverting input `P` a fixed node, an input node, or a passive node whose
//!   resistive network (no capacitor, not touching the output or `M`'s side) reads at most
//!   one input: `V+ = plus_const + w s` with Thevenin resistance `rth`;
//! - negative feedback (`b > 0`) and a DC path at `M` (the rest state).
//!
//! Passive nodes that touch neither side (an unread divider on the output) only load the
//! output, which the op-amp's static load already counts.

use super::linalg::{lu_factor, lu_solve};
use super::{Circuit, ElemKind, NodeKind};

/// One branch of the inverting node's reduced form.
#[derive(Debug, Clone, PartialEq)]
pub struct FormBranch {
    /// Circuit input node read.
    pub node: usize,
    /// Weight of the node's value in `V-` (a capacitor branch: its companion weight
    /// `g_b / G_total`).
    pub mu: f64,
    /// Resistance of the branch: a capacitor chain's series resistance; for a resistive
    /// input the equivalent `1 / (mu G_total)`, ohm.
    pub r: f64,
    /// Series capacitor of a chain, F.
    pub cap: Option<f64>,
    /// Per-step decay of the capacitor's history (1 without one).
    pub decay: f64,
}

/// A one-op-amp circuit reduced to the engine's stage kernel form:
/// `V- = minus_const + sum mu_i (s_i - h_i) + b v - mu_c h_f`,
/// `V+ = plus_const + plus.1 s_plus`, so `Vd = p - b v`.
#[derive(Debug, Clone, PartialEq)]
pub struct StageForm {
    /// The op-amp (index into the circuit's amps).
    pub amp: usize,
    /// Branches into the inverting node.
    pub minus: Vec<FormBranch>,
    /// Constant part of `V-` (fixed nodes, the bias current out of `M`), V.
    pub minus_const: f64,
    /// Coefficient of the output in `V-`.
    pub b: f64,
    /// Feedback capacitor: (C, companion conductance `2C/h`, weight in `V-`).
    pub fb_cap: Option<(f64, f64, f64)>,
    /// Total conductance at `M` (companions included), S; infinite for a follower.
    pub g_total: f64,
    /// The input read at `V+` with its weight.
    pub plus: Option<(usize, f64)>,
    /// Constant part of `V+` (fixed nodes, offset, the bias current through `rth`), V.
    pub plus_const: f64,
    /// Thevenin resistance at `P`, ohm.
    pub plus_rth: f64,
    /// `V-` at DC (capacitors open): inputs' weights.
    pub dc_minus: Vec<(usize, f64)>,
    /// `V-` at DC: constant part, V.
    pub dc_const: f64,
    /// `V-` at DC: coefficient of the output.
    pub dc_b: f64,
    /// White noise power at `V-` from every resistor, per `4 k T`: sum of (transfer)^2 / R
    /// (ohm); times `4 k T` in V^2/Hz.
    pub noise_minus_r: f64,
    /// The same at `V+`.
    pub noise_plus_r: f64,
    /// `V-` per ampere injected at `M` (`1 / G_total`; 0 for a follower), ohm.
    pub z_minus: f64,
}

/// A linear resistive reduction onto one node: the node's voltage as weights of the driven
/// nodes around it, and its transfer from a current injected at each passive node.
struct Reduction {
    /// Weight of every driven node (by circuit node index; 0 for passive nodes).
    w: Vec<f64>,
    /// Volts at the target per ampere injected at every node (0 at driven nodes).
    z: Vec<f64>,
}

/// Reduce the resistors among `set` (passive nodes) onto `target`, with an extra
/// conductance `g_extra` at the target; `None` when singular.
fn reduce(
    c: &Circuit,
    set: &[usize],
    target: usize,
    g_extra: f64,
    skip: &[bool],
) -> Option<Reduction> {
    let n = set.len();
    let nn = c.nodes.len();
    let mut col = vec![usize::MAX; nn];
    for (k, &x) in set.iter().enumerate() {
        col[x] = k;
    }
    let mut g = vec![0.0; n * n];
    for (k, e) in c.elems.iter().enumerate() {
        let ElemKind::R(r) = e.kind else { continue };
        if skip[k] || r.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater) {
            continue;
        }
        let y = 1.0 / r;
        for (p, q) in [(e.a, e.b), (e.b, e.a)] {
            if col[p] != usize::MAX {
                let i = col[p];
                g[i * n + i] += y;
                if col[q] != usize::MAX {
                    g[i * n + col[q]] -= y;
                }
            }
        }
    }
    let t = col[target];
    g[t * n + t] += g_extra;
    let mut perm = vec![0; n];
    if !lu_factor(&mut g, n, &mut perm) {
        return None;
    }
    // G symmetric: the target's row of G^-1 is G^-1 e_target
    let mut zs = vec![0.0; n];
    zs[t] = 1.0;
    let mut tmp = vec![0.0; n];
    lu_solve(&g, n, &perm, &mut zs, &mut tmp);
    if !zs.iter().all(|x| x.is_finite()) {
        return None;
    }
    let mut z = vec![0.0; nn];
    for (k, &x) in set.iter().enumerate() {
        z[x] = zs[k];
    }
    let mut w = vec![0.0; nn];
    for (k, e) in c.elems.iter().enumerate() {
        let ElemKind::R(r) = e.kind else { continue };
        if skip[k] || r.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater) {
            continue;
        }
        for (p, q) in [(e.a, e.b), (e.b, e.a)] {
            if col[p] != usize::MAX && col[q] == usize::MAX {
                w[q] += z[p] / r;
            }
        }
    }
    Some(Reduction { w, z })
}

/// White noise power at the target per `4 k T` (sum over the resistors in play of the
/// squared transfer of their noise current over their resistance).
fn noise_r(c: &Circuit, z: &[f64], skip: &[bool]) -> f64 {
    let mut s = 0.0;
    for (k, e) in c.elems.iter().enumerate() {
        let ElemKind::R(r) = e.kind else { continue };
        if skip[k] || r.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater) {
            continue;
        }
        let t = z[e.a] - z[e.b];
        s += t * t / r;
    }
    s
}

/// The stage kernel form of `c` at time step `h`, when the circuit has the stage shape
/// (see the module docs); `None` otherwise (it then runs on the circuit group kernel).
pub fn stage_form(c: &Circuit, h: f64) -> Option<StageForm> {
    if c.amps.len() != 1 || h.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater) {
        return None;
    }
    if c.elems
        .iter()
        .any(|e| matches!(e.kind, ElemKind::Junction { .. }))
    {
        return None;
    }
    let amp = &c.amps[0];
    let (p, m, o) = (amp.plus, amp.minus, amp.out);
    let nn = c.nodes.len();
    let passive = |n: usize| n != o && matches!(c.nodes[n].kind, NodeKind::Free);
    let fixed = |n: usize| match c.nodes[n].kind {
        NodeKind::Fixed(v) => Some(v),
        _ => None,
    };
    let input = |n: usize| matches!(c.nodes[n].kind, NodeKind::Input(_));
    if p == o || !matches!(c.nodes[o].kind, NodeKind::Free) {
        return None;
    }
    // connected components of passive nodes (through any element)
    let mut comp = vec![usize::MAX; nn];
    let mut ncomp = 0;
    for s in 0..nn {
        if !passive(s) || comp[s] != usize::MAX {
            continue;
        }
        let mut stack = vec![s];
        comp[s] = ncomp;
        while let Some(x) = stack.pop() {
            for e in &c.elems {
                let y = if e.a == x {
                    e.b
                } else if e.b == x {
                    e.a
                } else {
                    continue;
                };
                if passive(y) && comp[y] == usize::MAX {
                    comp[y] = ncomp;
                    stack.push(y);
                }
            }
        }
        ncomp += 1;
    }
    let in_comp = |n: usize, k: usize| k != usize::MAX && comp[n] == k;
    let cm = if m == o { usize::MAX } else { comp[m] };
    let cp = if passive(p) { comp[p] } else { usize::MAX };
    if m != o && !passive(m) {
        return None;
    }
    if cm != usize::MAX && cm == cp {
        return None;
    }
    let mut deg = vec![0usize; nn];
    for e in &c.elems {
        deg[e.a] += 1;
        deg[e.b] += 1;
    }
    let ne = c.elems.len();
    let mut used = vec![false; ne];
    let mut fb_c = 0.0;
    // capacitor chains: (input node, total R, C)
    let mut chains: Vec<(usize, f64, f64)> = Vec::new();
    let mut interior = vec![false; nn];
    for (k, e) in c.elems.iter().enumerate() {
        let ElemKind::C(cap) = e.kind else { continue };
        if used[k] {
            continue;
        }
        let touches = |n: usize| in_comp(n, cm) || in_comp(n, cp);
        if !touches(e.a) && !touches(e.b) {
            continue; // load only
        }
        if cm != usize::MAX && ((e.a == m && e.b == o) || (e.a == o && e.b == m)) {
            fb_c += cap;
            used[k] = true;
            continue;
        }
        if in_comp(e.a, cp) || in_comp(e.b, cp) || cm == usize::MAX {
            return None;
        }
        // walk both ways through passive nodes of degree 2 (not M)
        let mut r_total = 0.0;
        let mut chain_elems = vec![k];
        let mut ends = [e.a, e.b];
        for end in &mut ends {
            let mut prev = k;
            loop {
                let n = *end;
                if !(passive(n) && n != m && deg[n] == 2) {
                    break;
                }
                let Some(next) =
                    (0..ne).find(|&j| j != prev && (c.elems[j].a == n || c.elems[j].b == n))
                else {
                    break;
                };
                if chain_elems.contains(&next) {
                    return None; // a loop of capacitors and resistors only
                }
                match c.elems[next].kind {
                    ElemKind::R(r) => r_total += r,
                    _ => return None, // a second capacitor in the chain
                }
                interior[n] = true;
                chain_elems.push(next);
                prev = next;
                let x = &c.elems[next];
                *end = if x.a == n { x.b } else { x.a };
            }
        }
        let (from, to) = if ends[1] == m {
            (ends[0], ends[1])
        } else {
            (ends[1], ends[0])
        };
        if to != m
            || !input(from)
            || r_total.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater)
            || cap.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater)
        {
            return None;
        }
        for j in chain_elems {
            used[j] = true;
        }
        chains.push((from, r_total, cap));
    }
    let vos = amp.vos;
    let ib = amp.ib;

    // Inverting side.
    let mut minus = Vec::new();
    let (b, minus_const, g_total, z_minus, noise_minus_r, fb_cap, dc_minus, dc_const, dc_b);
    if m == o {
        if !chains.is_empty() {
            return None;
        }
        b = 1.0;
        minus_const = 0.0;
        g_total = f64::INFINITY;
        z_minus = 0.0;
        noise_minus_r = 0.0;
        fb_cap = None;
        dc_minus = Vec::new();
        dc_const = 0.0;
        dc_b = 1.0;
    } else {
        let set: Vec<usize> = (0..nn)
            .filter(|&n| in_comp(n, cm) && !interior[n])
            .collect();
        let gc = 2.0 * fb_c / h;
        let gb: Vec<f64> = chains
            .iter()
            .map(|&(_, r, cap)| 1.0 / (r + 0.5 * h / cap))
            .collect();
        let extra = gc + gb.iter().sum::<f64>();
        // resistors of the reduced side only (chains and the other side skipped)
        let mut skip: Vec<bool> = used.clone();
        for (k, e) in c.elems.iter().enumerate() {
            if !(set.contains(&e.a) || set.contains(&e.b)) {
                skip[k] = true;
            }
        }
        let red = reduce(c, &set, m, extra, &skip)?;
        let zm = red.z[m];
        if !(zm > 0.0 && zm.is_finite()) {
            return None;
        }
        let mut mc = -ib * zm;
        for n in 0..nn {
            let w = red.w[n];
            if w == 0.0 {
                continue;
            }
            if let Some(v) = fixed(n) {
                mc += w * v;
            } else if input(n) {
                minus.push(FormBranch {
                    node: n,
                    mu: w,
                    r: 1.0 / (w / zm),
                    cap: None,
                    decay: 1.0,
                });
            } else if n != o {
                return None;
            }
        }
        let mut nr = noise_r(c, &red.z, &skip);
        for (&(from, r, cap), &g) in chains.iter().zip(&gb) {
            let mu = g * zm;
            let gcr = 2.0 * cap * r / h;
            minus.push(FormBranch {
                node: from,
                mu,
                r,
                cap: Some(cap),
                decay: (gcr - 1.0) / (gcr + 1.0),
            });
            nr += mu * mu * r;
        }
        b = red.w[o] + gc * zm;
        minus_const = mc;
        g_total = 1.0 / zm;
        z_minus = zm;
        noise_minus_r = nr;
        fb_cap = (fb_c > 0.0).then_some((fb_c, gc, gc * zm));
        // DC: capacitors open
        let dc = reduce(c, &set, m, 0.0, &skip)?;
        let zd = dc.z[m];
        if !(zd > 0.0 && zd.is_finite()) {
            return None;
        }
        let mut dcc = -ib * zd;
        let mut dcm = Vec::new();
        for n in 0..nn {
            let w = dc.w[n];
            if w == 0.0 {
                continue;
            }
            if let Some(v) = fixed(n) {
                dcc += w * v;
            } else if input(n) {
                dcm.push((n, w));
            }
        }
        dc_minus = dcm;
        dc_const = dcc;
        dc_b = dc.w[o];
    }
    if !(b > 0.0 && b.is_finite()) {
        return None;
    }

    // Non-inverting side.
    let (plus, plus_const, plus_rth, noise_plus_r);
    if let Some(v) = fixed(p) {
        plus = None;
        plus_const = v + vos;
        plus_rth = 0.0;
        noise_plus_r = 0.0;
    } else if input(p) {
        plus = Some((p, 1.0));
        plus_const = vos;
        plus_rth = 0.0;
        noise_plus_r = 0.0;
    } else if p == m {
        return None;
    } else {
        let set: Vec<usize> = (0..nn).filter(|&n| in_comp(n, cp)).collect();
        let mut skip = vec![false; ne];
        for (k, e) in c.elems.iter().enumerate() {
            if !(set.contains(&e.a) || set.contains(&e.b)) {
                skip[k] = true;
            }
        }
        let red = reduce(c, &set, p, 0.0, &skip)?;
        let mut pc = 0.0;
        let mut pl = None;
        for n in 0..nn {
            let w = red.w[n];
            if w == 0.0 {
                continue;
            }
            if let Some(v) = fixed(n) {
                pc += w * v;
            } else if input(n) && pl.is_none() {
                pl = Some((n, w));
            } else {
                return None; // the output, M's side, or a second input
            }
        }
        plus_rth = red.z[p];
        plus = pl;
        plus_const = pc + vos - ib * plus_rth;
        noise_plus_r = noise_r(c, &red.z, &skip);
    }
    Some(StageForm {
        amp: 0,
        minus,
        minus_const,
        b,
        fb_cap,
        g_total,
        plus,
        plus_const,
        plus_rth,
        dc_minus,
        dc_const,
        dc_b,
        noise_minus_r,
        noise_plus_r,
        z_minus,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::circuit::Amp;

    fn ideal_amp() -> Amp {
        Amp::new(
            "a",
            &crate::parts::profiles::ideal(),
            crate::model::Rails {
                pos: 12.0,
                neg: -12.0,
            },
            0.0,
        )
    }

    const H: f64 = 1.0 / 192_000.0;

    // Inverting summer (Millman's theorem at the inverting node [S], textbook nodal
    // analysis): mu_i = G_i / G_total, b = G_f / G_total.
    #[test]
    fn inverting_summer_reduces_to_millman_weights() {
        let mut c = Circuit::new();
        let gnd = c.node("gnd", NodeKind::Fixed(0.0));
        let a = c.input("a");
        let b = c.input("b");
        let m = c.node("m", NodeKind::Free);
        let y = c.node("y", NodeKind::Free);
        c.r(a, m, 10e3, "r1");
        c.r(b, m, 22e3, "r2");
        c.r(m, y, 33e3, "rf");
        c.amp(ideal_amp(), gnd, m, y);
        let f = stage_form(&c, H).expect("stage shape");
        let gt = 1.0 / 10e3 + 1.0 / 22e3 + 1.0 / 33e3;
        assert!((f.b - 1.0 / 33e3 / gt).abs() < 1e-12);
        assert_eq!(f.minus.len(), 2);
        for br in &f.minus {
            let r = if br.node == a { 10e3 } else { 22e3 };
            assert!((br.mu - 1.0 / r / gt).abs() < 1e-12, "{br:?}");
        }
        assert!(f.plus.is_none() && f.plus_const.abs() < 1e-15);
        // noise per 4kT: sum (G_i / G_total)^2 R_i over the three resistors
        let want: f64 = [10e3, 22e3, 33e3]
            .iter()
            .map(|r| (1.0 / r / gt).powi(2) * r)
            .sum();
        assert!((f.noise_minus_r - want).abs() < 1e-9 * want);
    }

    // Difference amplifier (textbook): V+ = in2 R4 / (R3 + R4), Thevenin R3 || R4 at V+;
    // V- = (in1 / R1 + v / R2) / (1/R1 + 1/R2).
    #[test]
    fn difference_amplifier_reduces_both_inputs() {
        let mut c = Circuit::new();
        let gnd = c.node("gnd", NodeKind::Fixed(0.0));
        let i1 = c.input("i1");
        let i2 = c.input("i2");
        let m = c.node("m", NodeKind::Free);
        let p = c.node("p", NodeKind::Free);
        let y = c.node("y", NodeKind::Free);
        let (r1, r2, r3, r4) = (10e3, 47e3, 10e3, 47e3);
        c.r(i1, m, r1, "r1");
        c.r(m, y, r2, "r2");
        c.r(i2, p, r3, "r3");
        c.r(p, gnd, r4, "r4");
        c.amp(ideal_amp(), p, m, y);
        let f = stage_form(&c, H).expect("stage shape");
        let (node, w) = f.plus.expect("a V+ input");
        assert_eq!(node, i2);
        assert!((w - r4 / (r3 + r4)).abs() < 1e-12);
        assert!((f.plus_rth - r3 * r4 / (r3 + r4)).abs() < 1e-6);
        assert!((f.b - r1 / (r1 + r2)).abs() < 1e-12);
        assert!((f.minus[0].mu - r2 / (r1 + r2)).abs() < 1e-12);
    }

    // Shapes the stage kernel does not run stay on the circuit kernel: a capacitor on the
    // non-inverting side (Sallen-Key), positive feedback (Schmitt trigger), a diode.
    #[test]
    fn other_shapes_are_not_stage_forms() {
        let mut sk = Circuit::new();
        let gnd = sk.node("gnd", NodeKind::Fixed(0.0));
        let x = sk.input("x");
        let a = sk.node("a", NodeKind::Free);
        let b = sk.node("b", NodeKind::Free);
        let y = sk.node("y", NodeKind::Free);
        sk.r(x, a, 10e3, "r1");
        sk.r(a, b, 10e3, "r2");
        sk.c(a, y, 22e-9, "c1");
        sk.c(b, gnd, 10e-9, "c2");
        sk.amp(ideal_amp(), b, y, y);
        assert!(stage_form(&sk, H).is_none());

        let mut st = Circuit::new();
        let gnd = st.node("gnd", NodeKind::Fixed(0.0));
        let x = st.input("x");
        let p = st.node("p", NodeKind::Free);
        let y = st.node("y", NodeKind::Free);
        st.r(gnd, p, 10e3, "r1");
        st.r(p, y, 100e3, "r2");
        st.amp(ideal_amp(), p, x, y);
        assert!(stage_form(&st, H).is_none());

        let mut dc = Circuit::new();
        let gnd = dc.node("gnd", NodeKind::Fixed(0.0));
        let x = dc.input("x");
        let m = dc.node("m", NodeKind::Free);
        let y = dc.node("y", NodeKind::Free);
        dc.r(x, m, 10e3, "r1");
        dc.r(m, y, 100e3, "r2");
        let d = crate::parts::diodes::builtin("silicon-signal").expect("a built-in diode");
        dc.diode(m, y, &d, 0.025, "d");
        dc.amp(ideal_amp(), gnd, m, y);
        assert!(stage_form(&dc, H).is_none());
    }

    // A coupling capacitor in series with an input resistor and a feedback capacitor: the
    // trapezoidal companions (conductance 2C/h; the branch 1 / (R + h/2C)).
    #[test]
    fn capacitor_forms_take_trapezoidal_companions() {
        let mut c = Circuit::new();
        let gnd = c.node("gnd", NodeKind::Fixed(0.0));
        let x = c.input("x");
        let mid = c.node("mid", NodeKind::Free);
        let m = c.node("m", NodeKind::Free);
        let y = c.node("y", NodeKind::Free);
        let (r, ci, rf, cf) = (10e3, 1e-6, 47e3, 1e-9);
        c.c(x, mid, ci, "ci");
        c.r(mid, m, r, "r");
        c.r(m, y, rf, "rf");
        c.c(m, y, cf, "cf");
        c.amp(ideal_amp(), gnd, m, y);
        let f = stage_form(&c, H).expect("stage shape");
        let gb = 1.0 / (r + 0.5 * H / ci);
        let gc = 2.0 * cf / H;
        let gt = gb + 1.0 / rf + gc;
        assert!((f.g_total - gt).abs() < 1e-9 * gt);
        assert!((f.b - (1.0 / rf + gc) / gt).abs() < 1e-12);
        let (cc, g, mu) = f.fb_cap.expect("a feedback capacitor");
        assert!(cc == cf && g == gc && (mu - gc / gt).abs() < 1e-12);
        assert_eq!(f.minus.len(), 1);
        assert!((f.minus[0].mu - gb / gt).abs() < 1e-12);
        // DC: the coupling capacitor open, V- = v (no other path)
        assert!(f.dc_minus.is_empty() && (f.dc_b - 1.0).abs() < 1e-12);
    }
}
