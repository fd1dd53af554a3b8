//! Network stages in the engine: the compiled circuit of each network, its inputs and
//! outputs as engine buffers, and its block processing.

use crate::circuit::plan::CircuitPlan;
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
    pub drive: Vec<f64>,
    pub ex_prev: Vec<f64>,
    pub ex_vals: Vec<Vec<f64>>,
    /// Lowest and highest output of every op-amp (after its clamp), V.
    pub peaks: Vec<(f64, f64)>,
    /// Noise streams of the groups that have noise.
    pub(crate) noise: Vec<GroupNoiseRun>,
}

impl NetRun {
    pub(crate) fn new(np: &NetPlan, block: usize) -> NetRun {
        let mut r = NetRun {
            state: np.rest.clone(),
            x1: 0.0,
            x2: 0.0,
            drive: vec![0.0; block],
            ex_prev: vec![0.0; np.exports.len()],
            ex_vals: vec![vec![0.0; block]; np.exports.len()],
            peaks: vec![(f64::INFINITY, f64::NEG_INFINITY); np.circuit.circuit.amps.len()],
            noise: noise_runs(np, block),
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
/// sample late), the exported nodes' values (not yet delayed) into `nr.ex_vals`. Returns the error of a step that failed (the
/// rest of the block holds the last value).
#[allow(clippy::too_many_arguments)]
pub(crate) fn net_block(
    np: &NetPlan,
    nr: &mut NetRun,
    bufs: &[Vec<f64>],
    hist: usize,
    own: &mut [f64],
    fast: bool,
    antialias: bool,
    t0: f64,
    h: f64,
) -> Result<(), crate::circuit::plan::CircuitError> {
    let b = own.len();
    let mut err = None;
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
    for t in 0..b {
        if err.is_none() {
            for inp in &np.inputs {
                nr.state.vn[inp.cnode] = inp.gain * bufs[inp.buf][hist - inp.delay + t];
            }
            for g in &nr.noise {
                let w = &mut nr.state.groups[g.group].w;
                if g.nodes.is_some() {
                    w[..g.nk].copy_from_slice(&g.node_buf[t * g.nk..(t + 1) * g.nk]);
                }
                for (j, (s, buf)) in g.amps.iter().zip(&g.amp_buf).enumerate() {
                    if s.is_some() {
                        w[g.nk + j] = buf[t];
                    }
                }
            }
            if let Err(e) = nr.state.step(&np.circuit, fast, t0 + t as f64 * h) {
                err = Some(e);
            }
            for (pk, a) in nr.peaks.iter_mut().zip(&np.circuit.circuit.amps) {
                let x = nr.state.vn[a.out];
                pk.0 = pk.0.min(x);
                pk.1 = pk.1.max(x);
            }
        }
        nr.drive[t] = match np.out_amp {
            Some(a) => nr.state.amp_state(&np.circuit, a),
            None => nr.state.vn[np.out],
        };
        for (k, &(n, _)) in np.exports.iter().enumerate() {
            nr.ex_vals[k][t] = nr.state.vn[n];
        }
    }
    match np.out_amp {
        Some(a) => {
            let sh = np.circuit.circuit.amps[a].shaper;
            for (o, &xn) in own.iter_mut().zip(&nr.drive) {
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
            for (o, &xn) in own.iter_mut().zip(&nr.drive) {
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
