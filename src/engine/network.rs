//! Network stages in the engine: the compiled circuit of each network, its inputs and
//! outputs as engine buffers, and its block processing.

use crate::circuit::diode::MAX_J;
use crate::circuit::plan::CircuitPlan;
use crate::circuit::small::{run_block, BlockIo, DriveEdges, KernelRun, SmallKernel};
use crate::circuit::step::CircuitState;
use crate::engine::knee::{tap as knee_tap, KneeAa, Tap, HIST as KNEE_HIST, REC as KNEE_REC};
use crate::engine::loopmap::{LoopMapAa, Out as MapOut, HIST as MAP_HIST};
use crate::engine::noise::{stream_seed, NoiseStream, FLICKER_MIN_RATE};
use crate::engine::shaper::{LOOKAHEAD, WINDOW};

/// The clamp's history: its window less the newest sample.
const H: usize = WINDOW - 1;

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
    /// Latency of that buffer relative to source time, internal samples (the clamp's
    /// lookahead, [`LOOKAHEAD`], or a plain delay as long for a passive output).
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
    /// Per group: its nodes read outside it (by later groups, as a passive output, as
    /// exports), written per sample. An op-amp's output read only for its peaks is not
    /// (its group's steps widen the peaks).
    pub writes: Vec<Vec<usize>>,
    /// The group and in-group index of the op-amp driving the output.
    pub drive: Option<(usize, usize)>,
    /// The band-limited diode knees of a passive output in a memoryless diode group.
    pub knee: Option<KneeAa>,
    /// The band-limited static map of the output's group when it holds op-amps and
    /// diodes and follows one input ([`crate::engine::loopmap`]).
    pub loopmap: Option<LoopMapAa>,
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
        // the output node, unless an op-amp drives it (the output is then read from the
        // drive, the op-amp's state); the op-amps' peaks are taken in the groups' steps
        if self.out_amp.is_none() {
            add(self.out, &mut needed);
        }
        for &(n, _) in &self.exports {
            add(n, &mut needed);
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
        self.knee = self.knee_of_output();
        self.drive = self.out_amp.and_then(|a| {
            self.circuit
                .groups
                .iter()
                .enumerate()
                .find_map(|(gi, g)| g.amps.iter().position(|ac| ac.amp == a).map(|j| (gi, j)))
        });
        self.loopmap = self.loopmap_of_output();
    }

    /// The static map's correction of the output, when the output (or the op-amp driving
    /// it) belongs to a group with op-amps (none without negative feedback) and diodes,
    /// one varying input, and no capacitor but the junctions' own.
    fn loopmap_of_output(&self) -> Option<LoopMapAa> {
        let c = &self.circuit.circuit;
        let (gi, gp, out) = match self.out_amp {
            Some(_) => {
                let (gi, j) = self.drive?;
                (gi, &self.circuit.groups[gi], MapOut::Amp(j))
            }
            None => {
                let (gi, gp) = self
                    .circuit
                    .groups
                    .iter()
                    .enumerate()
                    .find(|(_, g)| g.col[self.out].is_some_and(|i| i < g.nodes.len()))?;
                (gi, gp, MapOut::Node(self.out))
            }
        };
        if gp.amps.is_empty()
            || gp.junctions.is_empty()
            || gp.known.len() != 1
            || gp.fast.is_none()
            || gp.amps.iter().any(|ac| ac.explicit)
        {
            return None;
        }
        // every capacitor across a junction (its capacitance)
        let across = |ei: usize| {
            let e = &c.elems[ei];
            gp.junctions.iter().any(|&j| {
                let d = &c.elems[j];
                (d.a, d.b) == (e.a, e.b) || (d.a, d.b) == (e.b, e.a)
            })
        };
        if !gp.caps.iter().all(|&(ei, _)| across(ei)) {
            return None;
        }
        let span = 2.0
            * c.amps
                .iter()
                .map(|a| a.shaper.lo.abs().max(a.shaper.hi.abs()))
                .fold(1.0, f64::max);
        LoopMapAa::build(c, gp, gi, gp.known[0], out, span, &self.rest.vn)
    }

    /// The knee correction of the output, when the output is a node of a diode group with
    /// the table (no op-amp, one varying input, no noise) and no op-amp drives it.
    fn knee_of_output(&self) -> Option<KneeAa> {
        if self.out_amp.is_some() {
            return None;
        }
        let (gi, gp) = self
            .circuit
            .groups
            .iter()
            .enumerate()
            .find(|(_, g)| g.col[self.out].is_some_and(|i| i < g.nodes.len()))?;
        let k = self.kernels[gi].as_ref()?;
        let ds = k.diode.as_ref()?;
        let tab = ds.table.as_ref()?;
        if k.nk != 1 || k.nw != 0 {
            return None;
        }
        let nj = ds.nj;
        let (nz, ncol) = (ds.ncol - 2, ds.ncol);
        let w = ncol + nj;
        let row = &ds.rows[(nz + gp.col[self.out]?) * w..][..w];
        let mut g = [0.0; MAX_J];
        g[..nj].copy_from_slice(&row[ncol..]);
        Some(KneeAa::new(gi, nj, g, tab))
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
    /// The drive's last `WINDOW - 1` samples, oldest first (the clamp's window less its
    /// newest sample; the output is the window's centre, [`LOOKAHEAD`] samples late).
    pub xh: [f64; H],
    /// Band-limited corrections of the drive's slope corners over the block.
    pub(crate) edges: DriveEdges,
    /// For the samples of `xh`: the corrections of reversal edges and whether the sample's
    /// clamp window holds one ([`DriveEdges::mask`]).
    pub(crate) oh: [(f64, bool); H],
    /// Per exported node its last [`LOOKAHEAD`] values, oldest first (exports are as late
    /// as the output).
    pub ex_hist: Vec<[f64; LOOKAHEAD]>,
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
    /// The knee correction's record of the diode group's table loop
    /// ([`crate::engine::knee::tap`], [`KNEE_REC`] values per sample): its last
    /// [`KNEE_HIST`] samples, then the block's.
    pub(crate) knee_tap: Vec<f64>,
    /// The knee correction's scratch (`2 (block + 1)` values).
    pub(crate) knee_scr: Vec<f64>,
    /// The static map's input: its last [`MAP_HIST`] samples, then the block's.
    pub(crate) map_x: Vec<f64>,
    /// The static map's scratch (`block + 1` values).
    pub(crate) map_scr: Vec<f64>,
}

impl NetRun {
    pub(crate) fn new(np: &NetPlan, block: usize) -> NetRun {
        let mut r = NetRun {
            state: np.rest.clone(),
            xh: [0.0; H],
            edges: DriveEdges::new(block),
            oh: [(0.0, false); H],
            ex_hist: vec![[0.0; LOOKAHEAD]; np.exports.len()],
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
            knee_tap: vec![
                0.0;
                if np.knee.is_some() {
                    KNEE_REC * (block + KNEE_HIST)
                } else {
                    0
                }
            ],
            knee_scr: vec![
                0.0;
                if np.knee.is_some() {
                    2 * (block + 1)
                } else {
                    0
                }
            ],
            map_x: vec![
                0.0;
                if np.loopmap.is_some() {
                    block + MAP_HIST
                } else {
                    0
                }
            ],
            map_scr: vec![0.0; if np.loopmap.is_some() { block + 1 } else { 0 }],
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
        if let Some((gi, j)) = np.drive {
            r.state.groups[gi].drive = Some(j);
        }
        r.reset(np);
        r
    }

    pub(crate) fn reset(&mut self, np: &NetPlan) {
        self.state.restore_from(&np.rest);
        let x = match np.out_amp {
            Some(a) => self.state.amp_state(&np.circuit, a),
            None => self.state.vn[np.out],
        };
        self.xh = [x; H];
        self.edges.clear();
        self.oh = [(0.0, false); H];
        for (p, &(n, _)) in self.ex_hist.iter_mut().zip(&np.exports) {
            *p = [np.rest.vn[n]; LOOKAHEAD];
        }
        self.peaks.fill((f64::INFINITY, f64::NEG_INFINITY));
        // nothing recorded yet: no correction until the table's loop has run
        for r in self.knee_tap.chunks_exact_mut(KNEE_REC) {
            r.copy_from_slice(&[0.0, knee_tap::OTHER, 0.0]);
        }
        if let Some(lm) = &np.loopmap {
            self.map_x.fill(np.rest.vn[lm.input]);
        }
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
        let drive = np.drive.filter(|d| d.0 == gi).map(|d| d.1);
        // the knee correction's record of this block (marked "not from the table" until
        // the table's loop writes it)
        let knee = match &np.knee {
            Some(kn) if antialias && kn.group == gi => {
                let rec = &mut nr.knee_tap[KNEE_REC * KNEE_HIST..KNEE_REC * (KNEE_HIST + b)];
                for r in rec.chunks_exact_mut(KNEE_REC) {
                    r[1] = knee_tap::OTHER;
                }
                Some(Tap { rec, g: kn.g })
            }
            _ => None,
        };
        let mut io = BlockIo {
            slots: &mut nr.slots,
            writes: &np.writes[gi],
            drive,
            w: &nr.wbuf[..b * nw],
            edges: (antialias && drive.is_some()).then_some(&mut nr.edges),
            knee,
            peaks: &mut nr.peaks,
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
    for (k, &(n, _)) in np.exports.iter().enumerate() {
        nr.ex_vals[k][..b].copy_from_slice(&nr.slots[n][..b]);
    }
    // the diode knees of a passive output (after the exports: they read the solved node)
    if let (Some(kn), true, true) = (&np.knee, antialias, limit == b) {
        let tab = np.kernels[kn.group]
            .as_ref()
            .and_then(|k| k.diode.as_ref())
            .and_then(|d| d.table.as_ref());
        if let Some(tab) = tab {
            let mut pending = [nr.xh[H - 2], nr.xh[H - 1]];
            kn.apply(
                tab,
                &nr.knee_tap[..KNEE_REC * (b + KNEE_HIST)],
                &mut pending,
                &mut nr.slots[np.out][..b],
                &mut nr.knee_scr,
            );
            [nr.xh[H - 2], nr.xh[H - 1]] = pending;
        }
        nr.knee_tap
            .copy_within(KNEE_REC * b..KNEE_REC * (b + KNEE_HIST), 0);
    }
    let drive_slot = match np.drive {
        Some(_) => nnodes,
        None => np.out,
    };
    // the static map's knees of a group with op-amps and diodes (before the clamp), taken
    // along the input the output implies (`engine::loopmap`: the loop's own lag included)
    if let (Some(lm), true, true) = (&np.loopmap, antialias, limit == b) {
        let mut guess = nr.map_x[MAP_HIST - 1];
        for t in 0..b {
            let x = nr.slots[lm.input][t];
            let start = if guess.is_finite() { guess } else { x };
            guess = lm
                .inverse(nr.slots[drive_slot][t], start)
                .unwrap_or(f64::NAN);
            nr.map_x[MAP_HIST + t] = guess;
        }
        let mut pending = [nr.xh[H - 2], nr.xh[H - 1]];
        lm.apply(
            &nr.map_x[..MAP_HIST + b],
            &mut pending,
            &mut nr.slots[drive_slot][..b],
            &mut nr.map_scr,
        );
        [nr.xh[H - 2], nr.xh[H - 1]] = pending;
        nr.map_x.copy_within(b..b + MAP_HIST, 0);
    }
    let x = &mut nr.slots[drive_slot][..b];
    let edges = antialias && np.drive.is_some();
    let mut marked = false;
    if edges && nr.edges.live {
        // the corners' corrections: the three samples before the block are still in the
        // clamp's history (not yet shaped), the two after it carry to the next block
        let e = &nr.edges;
        for i in 0..LOOKAHEAD {
            let k = H - LOOKAHEAD + i;
            nr.xh[k] += e.corr[i];
            nr.oh[k].0 += e.ocorr[i];
            nr.oh[k].1 |= e.mask[i];
        }
        for (xv, c) in x.iter_mut().zip(&e.corr[LOOKAHEAD..LOOKAHEAD + b]) {
            *xv += c;
        }
        marked = e.mask[LOOKAHEAD..LOOKAHEAD + b].contains(&true);
    }
    marked |= nr.oh.iter().any(|o| o.1);
    let x = &nr.slots[drive_slot][..b];
    match np.out_amp {
        Some(a) => {
            let sh = np.circuit.circuit.amps[a].shaper;
            // The whole block inside the linear region (the stage engine's cheap test: the
            // middle samples widened by the bound on every window's reach): the output is
            // the drive, LOOKAHEAD samples late.
            let mut done = false;
            if b >= 2 * H && !marked {
                let mut e = [0.0; 2 * H];
                e[..H].copy_from_slice(&nr.xh);
                e[H..].copy_from_slice(&x[..H]);
                if crate::engine::run::cheap_inside(&e, x, sh.lo + sh.w, sh.hi - sh.w).is_some() {
                    own[..LOOKAHEAD].copy_from_slice(&nr.xh[H - LOOKAHEAD..]);
                    own[LOOKAHEAD..].copy_from_slice(&x[..b - LOOKAHEAD]);
                    nr.xh.copy_from_slice(&x[b - H..]);
                    nr.oh = [(0.0, false); H];
                    done = true;
                }
            }
            if !done {
                let mut h = nr.xh;
                let mut oh = nr.oh;
                for (t, (o, &xn)) in own.iter_mut().zip(x).enumerate() {
                    let win: [f64; WINDOW] = std::array::from_fn(|i| if i < H { h[i] } else { xn });
                    // a reversal edge in the window: the static clamp plus its corrections
                    let (add, edge) = oh[LOOKAHEAD];
                    let over = edge.then(|| sh.apply(h[LOOKAHEAD]) + add);
                    *o = sh.output7(&win, over, antialias);
                    h.copy_within(1.., 0);
                    h[H - 1] = xn;
                    oh.copy_within(1.., 0);
                    oh[H - 1] = if edges {
                        (nr.edges.ocorr[LOOKAHEAD + t], nr.edges.mask[LOOKAHEAD + t])
                    } else {
                        (0.0, false)
                    };
                }
                nr.xh = h;
                nr.oh = oh;
            }
        }
        None => {
            // a passive output: the drive, LOOKAHEAD samples late
            delay_block(&mut nr.xh, LOOKAHEAD, x, own);
        }
    }
    if edges {
        nr.edges.carry(b);
    }
    match err {
        Some(e) => Err(e),
        None => Ok(()),
    }
}

/// `out` is `x` delayed by `d <= N` samples: the first from the newest of `hist` (the last
/// `N` samples before the block, oldest first), which then takes the block's last.
pub(crate) fn delay_block<const N: usize>(
    hist: &mut [f64; N],
    d: usize,
    x: &[f64],
    out: &mut [f64],
) {
    let b = x.len();
    if b >= N {
        out[..d].copy_from_slice(&hist[N - d..]);
        out[d..b].copy_from_slice(&x[..b - d]);
        hist.copy_from_slice(&x[b - N..]);
    } else {
        for (o, &xn) in out.iter_mut().zip(x) {
            *o = hist[N - d];
            hist.copy_within(1.., 0);
            hist[N - 1] = xn;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The block copy and the sample-by-sample shift agree, over blocks of any length.
    #[test]
    fn delay_block_is_a_plain_delay() {
        let xs: Vec<f64> = (0..200).map(|i| (i as f64 * 0.37).sin()).collect();
        for d in [LOOKAHEAD, H] {
            let mut hist = [0.0; H];
            let mut out = Vec::new();
            let mut at = 0;
            for b in [1, 2, 7, 6, 40, 3, 100, 41] {
                let mut o = vec![0.0; b];
                delay_block(&mut hist, d, &xs[at..at + b], &mut o);
                out.extend(o);
                at += b;
            }
            for (i, &o) in out.iter().enumerate() {
                let want = if i >= d { xs[i - d] } else { 0.0 };
                assert_eq!(o, want, "delay {d}, sample {i}");
            }
        }
    }
}
