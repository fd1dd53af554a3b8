//! Network stages in the engine: the compiled circuit of each network, its inputs and
//! outputs as engine buffers, and its block processing.

use crate::circuit::plan::CircuitPlan;
use crate::circuit::small::{run_block, BlockIo, KernelRun, SmallKernel};
use crate::circuit::step::CircuitState;
use crate::engine::noise::{stream_seed, NoiseStream, FLICKER_MIN_RATE};

/// One input node of a network, read from an engine buffer.
#[derive(Debug, Clone, PartialEq)]
pub struct NetInput {
    /// Circuit node it sets.
    pub cnode: usize,
    /// Buffer read.
    pub buf: usize,
    /// Delay applied to that buffer, internal samples.
    pub delay: usize,
    /// Gain of the tap (a pot's wiper), 1 for a direct connection.
    pub gain: f64,
}

/// A compiled network stage.
#[derive(Debug, Clone, PartialEq)]
pub struct NetPlan {
    /// Stage name.
    pub name: String,
    /// Buffer of the stage's output.
    pub node: usize,
    /// Latency of that buffer relative to source time, internal samples (one: the clipper's
    /// lookahead, or a plain one-sample delay for a passive output).
    pub latency: usize,
    /// Inputs.
    pub inputs: Vec<NetInput>,
    /// The compiled circuit.
    pub circuit: CircuitPlan,
    /// Circuit node of the output.
    pub out: usize,
    /// The op-amp driving the output (its band-limited clipper makes the output).
    pub out_amp: Option<usize>,
    /// Inner nodes other stages read: (circuit node, buffer).
    pub exports: Vec<(usize, usize)>,
    /// Rest state.
    pub rest: CircuitState,
    /// Rest value of the output, V.
    pub rest_out: f64,
    /// Seed of the network's noise streams (each group's and op-amp's stream derives its
    /// own from it); used only when a group has noise.
    pub noise_seed: u64,
    /// Per group of the circuit: its small-group kernel (none without a linear fast path).
    pub kernels: Vec<Option<SmallKernel>>,
    /// Per group: its nodes read outside it (by later groups, as the output, as exports,
    /// an op-amp's output for its peaks), written per sample.
    pub writes: Vec<Vec<usize>>,
    /// The group and in-group index of the op-amp driving the output.
    pub drive: Option<(usize, usize)>,
}

impl NetPlan {
    /// Compile the small-group kernels (after the circuit's noise is added).
    pub fn attach_kernels(&mut self) {
        let c = &self.circuit.circuit;
        let mut needed: Vec<usize> = Vec::new();
        let add = |n: usize, v: &mut Vec<usize>| {
            if !v.contains(&n) {
                v.push(n);
            }
        };
        for g in &self.circuit.groups {
            for &n in &g.known {
                add(n, &mut needed);
            }
        }
        add(self.out, &mut needed);
        for &(n, _) in &self.exports {
            add(n, &mut needed);
        }
        for a in &c.amps {
            add(a.out, &mut needed);
        }
        self.writes = self
            .circuit
            .groups
            .iter()
            .map(|g| {
                needed
                    .iter()
                    .copied()
                    .filter(|&n| g.col[n].is_some_and(|i| i < g.nodes.len()))
                    .collect()
            })
            .collect();
        self.kernels = self
            .circuit
            .groups
            .iter()
            .map(|g| SmallKernel::compile(c, g, &needed))
            .collect();
        self.drive = self.out_amp.and_then(|a| {
            self.circuit
                .groups
                .iter()
                .enumerate()
                .find_map(|(gi, g)| g.amps.iter().position(|ac| ac.amp == a).map(|j| (gi, j)))
        });
    }
}

/// Noise streams of one group of a network: the node draws (unit density, `n_kcl` per
/// step, interleaved) and each op-amp's voltage noise, filled a block at a time.
#[derive(Debug, Clone)]
pub(crate) struct GroupNoiseRun {
    group: usize,
    nk: usize,
    nodes: Option<NoiseStream>,
    node_buf: Vec<f64>,
    amps: Vec<Option<NoiseStream>>,
    amp_buf: Vec<Vec<f64>>,
}

/// Running state of one network stage.
#[derive(Debug, Clone)]
pub(crate) struct NetRun {
    pub state: CircuitState,
    pub x1: f64,
    pub x2: f64,
    pub ex_prev: Vec<f64>,
    pub ex_vals: Vec<Vec<f64>>,
    /// Lowest and highest output of every op-amp (after its clamp), V.
    pub peaks: Vec<(f64, f64)>,
    /// Noise streams of the groups that have noise.
    pub(crate) noise: Vec<GroupNoiseRun>,
    /// Per group: its kernel's running state.
    pub(crate) kruns: Vec<Option<KernelRun>>,
    /// Per circuit node a block of samples (inputs, values read across groups), then the
    /// drive (the output op-amp's state).
    pub(crate) slots: Vec<Vec<f64>>,
    /// One group's noise draws for the block, interleaved.
    pub(crate) wbuf: Vec<f64>,
}

impl NetRun {
    pub(crate) fn new(np: &NetPlan, block: usize) -> NetRun {
        let mut r = NetRun {
            state: np.rest.clone(),
            x1: 0.0,
            x2: 0.0,
            ex_prev: vec![0.0; np.exports.len()],
            ex_vals: vec![vec![0.0; block]; np.exports.len()],
            peaks: vec![(f64::INFINITY, f64::NEG_INFINITY); np.circuit.circuit.amps.len()],
            noise: noise_runs(np, block),
            kruns: np
                .kernels
                .iter()
                .enumerate()
                .map(|(gi, k)| {
                    k.as_ref().map(|k| {
                        let drive = np.drive.filter(|d| d.0 == gi).map(|d| d.1);
                        KernelRun::new(k, block, drive, np.circuit.groups[gi].caps.len())
                    })
                })
                .collect(),
            slots: vec![vec![0.0; block]; np.circuit.circuit.nodes.len() + 1],
            wbuf: vec![
                0.0;
                block
                    * np.circuit
                        .groups
                        .iter()
                        .map(|g| g.n_kcl + g.amps.len())
                        .max()
                        .unwrap_or(0)
            ],
        };
        r.reset(np);
        r
    }

    pub(crate) fn reset(&mut self, np: &NetPlan) {
        self.state.restore_from(&np.rest);
        let x = match np.out_amp {
            Some(a) => self.state.amp_state(&np.circuit, a),
            None => self.state.vn[np.out],
        };
        self.x1 = x;
        self.x2 = x;
        for (p, &(n, _)) in self.ex_prev.iter_mut().zip(&np.exports) {
            *p = np.rest.vn[n];
        }
        self.peaks.fill((f64::INFINITY, f64::NEG_INFINITY));
        for k in self.kruns.iter_mut().flatten() {
            k.reset();
        }
        for g in &mut self.noise {
            if let Some(s) = &mut g.nodes {
                s.reset();
            }
            for s in g.amps.iter_mut().flatten() {
                s.reset();
            }
        }
    }
}

/// The noise streams of a network's groups, as the stage kernel makes its own: white at
/// the internal rate (bandwidth half that rate), the 1/f part at a rate of at least
/// [`FLICKER_MIN_RATE`], held.
fn noise_runs(np: &NetPlan, block: usize) -> Vec<GroupNoiseRun> {
    let rate = 1.0 / np.circuit.h;
    let hold = ((rate / FLICKER_MIN_RATE).floor() as usize).max(1);
    let mut v = Vec::new();
    for (gi, gp) in np.circuit.groups.iter().enumerate() {
        let Some(gn) = &gp.noise else { continue };
        let nk = gp.n_kcl;
        let nodes = (nk > 0 && gn.chol.iter().any(|&x| x != 0.0)).then(|| {
            let seed = stream_seed(np.noise_seed, &format!("group{gi}"), "nodes");
            NoiseStream::with_hold(1.0, 0.0, rate, seed, block * nk, hold)
        });
        let amps: Vec<Option<NoiseStream>> = gp
            .amps
            .iter()
            .zip(&gn.en)
            .map(|(ac, &(white, flicker))| {
                let name = &np.circuit.circuit.amps[ac.amp].name;
                let seed = stream_seed(np.noise_seed, name, "en");
                let s = NoiseStream::with_hold(white, flicker, rate, seed, block, hold);
                (!s.is_silent()).then_some(s)
            })
            .collect();
        v.push(GroupNoiseRun {
            group: gi,
            nk,
            node_buf: vec![0.0; if nodes.is_some() { block * nk } else { 0 }],
            nodes,
            amp_buf: amps
                .iter()
                .map(|s| vec![0.0; if s.is_some() { block } else { 0 }])
                .collect(),
            amps,
        });
    }
    v
}

/// Run one block of a network stage: inputs from `bufs`, the output into `own` (one
/// sample late), the exported nodes' values (not yet delayed) into `nr.ex_vals`. Group by
/// group in solving order, each through the whole block (`circuit::small::run_block`: its
/// small-group kernel when `kernels`, else the generic path). Returns the error of a step
/// that failed (the rest of the block holds the last value).
#[allow(clippy::too_many_arguments)]
pub(crate) fn net_block(
    np: &NetPlan,
    nr: &mut NetRun,
    bufs: &[Vec<f64>],
    hist: usize,
    own: &mut [f64],
    fast: bool,
    kernels: bool,
    antialias: bool,
    t0: f64,
) -> Result<(), crate::circuit::plan::CircuitError> {
    let b = own.len();
    let c = &np.circuit.circuit;
    let nnodes = c.nodes.len();
    for g in &mut nr.noise {
        if let Some(s) = &mut g.nodes {
            s.fill(&mut g.node_buf[..b * g.nk]);
        }
        for (s, buf) in g.amps.iter_mut().zip(&mut g.amp_buf) {
            if let Some(s) = s {
                s.fill(&mut buf[..b]);
            }
        }
    }
    for inp in &np.inputs {
        let src = &bufs[inp.buf][hist - inp.delay..hist - inp.delay + b];
        for (d, &x) in nr.slots[inp.cnode][..b].iter_mut().zip(src) {
            *d = inp.gain * x;
        }
    }
    let mut err = None;
    let mut limit = b;
    for (gi, gp) in np.circuit.groups.iter().enumerate() {
        let st = &mut nr.state.groups[gi];
        let nw = st.w.len();
        if nw > 0 {
            let w = &mut nr.wbuf[..b * nw];
            w.fill(0.0);
            if let Some(g) = nr.noise.iter().find(|g| g.group == gi) {
                if g.nodes.is_some() {
                    for t in 0..b {
                        w[t * nw..t * nw + g.nk]
                            .copy_from_slice(&g.node_buf[t * g.nk..(t + 1) * g.nk]);
                    }
                }
                for (j, (s, buf)) in g.amps.iter().zip(&g.amp_buf).enumerate() {
                    if s.is_some() {
                        for t in 0..b {
                            w[t * nw + g.nk + j] = buf[t];
                        }
                    }
                }
            }
        }
        let kern = match (&np.kernels[gi], &mut nr.kruns[gi], kernels) {
            (Some(k), Some(kr), true) => Some((k, kr)),
            _ => None,
        };
        let mut io = BlockIo {
            slots: &mut nr.slots,
            writes: &np.writes[gi],
            drive: np.drive.filter(|d| d.0 == gi).map(|d| d.1),
            w: &nr.wbuf[..b * nw],
        };
        let r = run_block(
            c,
            gp,
            kern,
            np.circuit.h,
            fast,
            &mut nr.state.vn,
            st,
            &mut nr.state.events,
            &mut nr.state.counts,
            &mut io,
            limit,
            t0,
        );
        if let Err((e, t)) = r {
            // this group stopped at `t`: later groups and the outputs hold from there
            limit = t;
            err.get_or_insert(e);
        }
    }
    // the samples after a failed step hold the last value
    if limit < b {
        for w in &np.writes {
            for &n in w {
                let last = if limit > 0 {
                    nr.slots[n][limit - 1]
                } else {
                    nr.state.vn[n]
                };
                nr.slots[n][limit..b].fill(last);
            }
        }
        if let Some(a) = np.out_amp {
            let last = if limit > 0 {
                nr.slots[nnodes][limit - 1]
            } else {
                nr.state.amp_state(&np.circuit, a)
            };
            nr.slots[nnodes][limit..b].fill(last);
        }
    }
    for (pk, a) in nr.peaks.iter_mut().zip(&c.amps) {
        let (lo, hi) = crate::engine::run::min_max(&nr.slots[a.out][..limit]);
        *pk = (pk.0.min(lo), pk.1.max(hi));
    }
    for (k, &(n, _)) in np.exports.iter().enumerate() {
        nr.ex_vals[k][..b].copy_from_slice(&nr.slots[n][..b]);
    }
    let drive_slot = match np.drive {
        Some(_) => nnodes,
        None => np.out,
    };
    let drive = &nr.slots[drive_slot][..b];
    match np.out_amp {
        Some(a) => {
            let sh = np.circuit.circuit.amps[a].shaper;
            // The whole block inside the linear region (the per-sample test's bound, taken
            // over the block at once: its lowest and highest drive and its largest second
            // difference): the output is the drive one sample late.
            let (lo, hi) = crate::engine::run::min_max(drive);
            let (lo, hi) = (lo.min(nr.x1).min(nr.x2), hi.max(nr.x1).max(nr.x2));
            if b >= 2 && lo.is_finite() && hi.is_finite() {
                let e = max_second_diff(nr.x2, nr.x1, drive);
                let m = 0.25 * 0.5 * e;
                if lo - m > sh.lo + sh.w && hi + m < sh.hi - sh.w {
                    own[0] = nr.x1;
                    own[1..].copy_from_slice(&drive[..b - 1]);
                    nr.x2 = drive[b - 2];
                    nr.x1 = drive[b - 1];
                    return match err {
                        Some(e) => Err(e),
                        None => Ok(()),
                    };
                }
            }
            for (o, &xn) in own.iter_mut().zip(drive) {
                let (x2, x1) = (nr.x2, nr.x1);
                *o = if sh.inside(x2, x1, xn) {
                    x1
                } else if antialias {
                    sh.smooth(x2, x1, xn)
                } else {
                    sh.apply(x1)
                };
                nr.x2 = x1;
                nr.x1 = xn;
            }
        }
        None => {
            for (o, &xn) in own.iter_mut().zip(drive) {
                *o = nr.x1;
                nr.x1 = xn;
            }
        }
    }
    match err {
        Some(e) => Err(e),
        None => Ok(()),
    }
}

/// The largest `|x0 + x2 - 2 x1|` over the windows of three of `[x2, x1, d...]` (the
/// clamp's windows over a block whose history is `x2`, `x1`); NaN when any is not finite.
fn max_second_diff(x2: f64, x1: f64, d: &[f64]) -> f64 {
    let mut e = (x2 + d[0] - 2.0 * x1).abs();
    if d.len() >= 2 {
        e = e.max((x1 + d[1] - 2.0 * d[0]).abs());
    }
    let rest = crate::engine::run::max_abs_second_diff(d);
    if !e.is_finite() || !rest.is_finite() {
        return f64::NAN;
    }
    e.max(rest)
}
