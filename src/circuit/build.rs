//! A network stage of the validated patch as a [`Circuit`].

use std::ops::Range;

use super::{Amp, Circuit, ElemKind, NodeKind};
use crate::model::{NetNode, NetPartKind, Node, Patch, StageKind, POT_END_R};
use crate::parts::diodes::thermal_voltage;
use crate::parts::taper;

/// What feeds one input node of a network's circuit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum InputRef {
    /// A source or another stage's output.
    Node(Node),
    /// Another network's inner node (stage index, its local node index).
    Inner(usize, usize),
}

/// A network stage as a circuit.
#[derive(Debug, Clone, PartialEq)]
pub struct NetCircuit {
    /// The circuit.
    pub circuit: Circuit,
    /// Input nodes: (circuit node, what feeds it, gain of the feed), in input order.
    pub inputs: Vec<(usize, InputRef, f64)>,
    /// Circuit node of every local node of the network.
    pub locals: Vec<usize>,
    /// The stage's output node.
    pub out: usize,
    /// The op-amp driving the output node, if one does.
    pub out_amp: Option<usize>,
}

/// How a network sees an external node: (gain, Thevenin resistance) of the tap.
pub type Tap<'a> = &'a dyn Fn(Node) -> (f64, f64);

/// Build the circuit of network stage `stage` of `patch`. `tap` gives the Thevenin view of
/// a source or stage it reads (a source's output resistance, a pot's wiper); `out_load` is
/// the resistive load the rest of the patch puts on the output node (to 0 V), S.
///
/// Panics never; a stage that is not a network gives an empty circuit.
pub fn network_circuit(patch: &Patch, stage: usize, tap: Tap, out_load: f64) -> NetCircuit {
    network_circuit_loaded(patch, stage, tap, out_load, &[])
}

/// [`network_circuit`] with static loads (to 0 V, S) on local nodes that other stages or
/// outputs read (`stage.node`): `(local node, conductance)`. On an op-amp's output node a
/// load counts towards its current limit, as `out_load` does; on a passive node it is a
/// resistor to ground in the circuit.
pub fn network_circuit_loaded(
    patch: &Patch,
    stage: usize,
    tap: Tap,
    out_load: f64,
    node_loads: &[(usize, f64)],
) -> NetCircuit {
    let st = &patch.stages[stage];
    let mut c = Circuit::new();
    let StageKind::Network(net) = &st.kind else {
        let g = c.node("gnd", NodeKind::Fixed(0.0));
        return NetCircuit {
            circuit: c,
            inputs: Vec::new(),
            locals: Vec::new(),
            out: g,
            out_amp: None,
        };
    };
    let gnd = c.node("gnd", NodeKind::Fixed(0.0));
    let pos = c.node("pos", NodeKind::Fixed(patch.rails.pos));
    let neg = c.node("neg", NodeKind::Fixed(patch.rails.neg));
    let locals: Vec<usize> = net
        .nodes
        .iter()
        .map(|n| c.node(n, NodeKind::Free))
        .collect();
    let mut inputs: Vec<(usize, InputRef, f64)> = Vec::new();
    let mut ext_nodes: Vec<(InputRef, usize)> = Vec::new();
    let vt = thermal_voltage(patch.temperature);
    let mut resolve = |c: &mut Circuit, n: NetNode| -> usize {
        let key = match n {
            NetNode::Gnd => return gnd,
            NetNode::Pos => return pos,
            NetNode::Neg => return neg,
            NetNode::Local(i) => return locals[i],
            NetNode::Ext(x) => InputRef::Node(x),
            NetNode::Inner(s, l) => InputRef::Inner(s, l),
        };
        if let Some((_, k)) = ext_nodes.iter().find(|(r, _)| *r == key) {
            return *k;
        }
        let (name, gain, rth) = match key {
            InputRef::Node(x) => {
                let (g, r) = tap(x);
                (patch.node_name(x).to_string(), g, r)
            }
            InputRef::Inner(s, l) => {
                let name = match &patch.stages[s].kind {
                    StageKind::Network(n) => n.nodes.get(l).cloned().unwrap_or_default(),
                    _ => String::new(),
                };
                (format!("{}.{name}", patch.stages[s].name), 1.0, 0.0)
            }
        };
        let k = if rth > 0.0 {
            let ideal = c.input(&format!("{name} (ideal)"));
            inputs.push((ideal, key, gain));
            let node = c.node(&name, NodeKind::Free);
            c.r(ideal, node, rth, &format!("{name}.r"));
            node
        } else {
            let node = c.input(&name);
            inputs.push((node, key, gain));
            node
        };
        ext_nodes.push((key, k));
        k
    };
    for (i, p) in net.parts.iter().enumerate() {
        let label = format!("parts[{i}]");
        let a = resolve(&mut c, p.ends[0]);
        let b = resolve(&mut c, p.ends[1]);
        match &p.kind {
            NetPartKind::R(r) => c.r(a, b, *r, &label),
            NetPartKind::C(cap) => c.c(a, b, *cap, &label),
            NetPartKind::Pot { setting, wiper, .. } => {
                let w = resolve(&mut c, *wiper);
                let frac = taper::fraction(setting.taper, setting.at);
                let r0 = (setting.track * frac).max(POT_END_R);
                let r1 = (setting.track * (1.0 - frac)).max(POT_END_R);
                c.r(a, w, r0, &format!("{label}.lower"));
                c.r(w, b, r1, &format!("{label}.upper"));
            }
            NetPartKind::Diode(d) => c.diode(a, b, d, vt, &label),
        }
    }
    let pins: Vec<(usize, usize)> = net
        .amps
        .iter()
        .map(|a| (resolve(&mut c, a.plus), resolve(&mut c, a.minus)))
        .collect();
    let out = locals[net.out];
    let mut out_amp = None;
    let amp_outs: Vec<usize> = net.amps.iter().map(|a| locals[a.out]).collect();
    let extra = |local: usize| -> f64 {
        node_loads
            .iter()
            .filter(|(l, g)| *l == local && *g > 0.0)
            .map(|(_, g)| g)
            .sum()
    };
    for (k, (a, (plus, minus))) in net.amps.iter().zip(pins).enumerate() {
        let o = locals[a.out];
        let mut load = c.load_conductance(o, &amp_outs) + extra(a.out);
        if o == out {
            load += out_load;
            out_amp = Some(k);
        }
        let amp = Amp::new(&a.name, &a.part, a.rails, load);
        c.amp(amp, plus, minus, o);
    }
    if out_amp.is_none() && out_load > 0.0 {
        c.r(out, gnd, 1.0 / out_load, "loads");
    }
    for (l, name) in net.nodes.iter().enumerate() {
        let g = extra(l);
        if g > 0.0 && !net.amp_driven(l) {
            c.r(locals[l], gnd, 1.0 / g, &format!("{name}.readers"));
        }
    }
    NetCircuit {
        circuit: c,
        inputs,
        locals,
        out,
        out_amp,
    }
}

/// The static load network stage `stage` puts on each node it reads, S: the conductance
/// into its circuit at that input with every op-amp output and every op-amp's inverting
/// input held at 0 V (the virtual ground of an op-amp in negative feedback, as a shorthand
/// summer's input resistor loads its source by `1/R`), capacitors and diodes open.
pub fn reader_loads(patch: &Patch, stage: usize) -> Vec<(InputRef, f64)> {
    let direct = |_: Node| (1.0, 0.0);
    let nc = network_circuit(patch, stage, &direct, 0.0);
    let c = &nc.circuit;
    let mut held: Vec<usize> = c.amps.iter().map(|a| a.out).collect();
    held.extend(c.amps.iter().map(|a| a.minus));
    nc.inputs
        .iter()
        .map(|&(cn, r, _)| (r, c.load_conductance(cn, &held)))
        .collect()
}

/// The whole patch as one circuit: every stage (shorthand or network) expanded into its
/// resistors, capacitors, diodes and op-amps, every source an input node, every output's
/// load a resistor. What reads a node loads it (one nodal solve for the whole patch).
///
/// Node and element indices below index `circuit.nodes`, `circuit.elems` and
/// `circuit.amps`. Element labels are local to their stage or output (`r`, `feedback.c`,
/// `parts[2]`, `load`...); name them with the ranges `stage_elems` / `output_elems`.
#[derive(Debug, Clone, PartialEq)]
pub struct PatchCircuit {
    /// The circuit.
    pub circuit: Circuit,
    /// The input node of every source (its ideal voltage), in `patch.sources` order; the
    /// circuit's input index of source `k` is `k`.
    pub sources: Vec<usize>,
    /// The node every source drives as the parts see it: behind its output resistance
    /// `[sources.X] r` when it has one, else the input node itself.
    pub source_nodes: Vec<usize>,
    /// The output node of every stage, in `patch.stages` order (an op-amp's output, or an
    /// attenuator's wiper, or a network's `out` node).
    pub stages: Vec<usize>,
    /// The node every output reads, in `patch.outputs` order (behind its series resistor
    /// when it has a load and a series resistance).
    pub outputs: Vec<usize>,
    /// The op-amps of every stage (range into `circuit.amps`).
    pub stage_amps: Vec<Range<usize>>,
    /// The elements of every stage (range into `circuit.elems`).
    pub stage_elems: Vec<Range<usize>>,
    /// The elements of every output's load (series resistor, load; range into
    /// `circuit.elems`).
    pub output_elems: Vec<Range<usize>>,
}

/// Expand `patch` into one [`PatchCircuit`]. Shorthand stages become their textbook
/// circuits (an inverting summer: each input's resistor, with its series capacitor, into
/// the inverting node `<stage>.minus`, the feedback resistor and capacitor to the output,
/// `+` on a fixed reference node; a non-inverting stage: `r_fb` / `c_fb` from the output to
/// the inverting node, `r_g` to the reference; a follower; an attenuator: the two track
/// segments meeting at the wiper); networks are merged with their nodes named
/// `<stage>.<node>`. Every op-amp is compiled with no static load (`load_g = 0`).
///
/// Never panics on a validated patch.
pub fn patch_circuit(patch: &Patch) -> PatchCircuit {
    let mut c = Circuit::new();
    let gnd = c.node("gnd", NodeKind::Fixed(0.0));
    let mut src = Vec::new();
    let mut node_of_source = Vec::new();
    for s in &patch.sources {
        let i = c.input(&s.name);
        src.push(i);
        if s.r > 0.0 {
            let n = c.node(&format!("{}.out", s.name), NodeKind::Free);
            c.r(i, n, s.r, &format!("sources.{}.r", s.name));
            node_of_source.push(n);
        } else {
            node_of_source.push(i);
        }
    }
    let mut stage_node: Vec<usize> = Vec::with_capacity(patch.stages.len());
    let node = |n: Node, stage_node: &Vec<usize>| match n {
        Node::Source(i) => node_of_source[i],
        Node::Stage(i) => stage_node[i],
    };
    let mut stage_amps = Vec::with_capacity(patch.stages.len());
    let mut stage_elems = Vec::with_capacity(patch.stages.len());
    for (i, st) in patch.stages.iter().enumerate() {
        let (amps0, elems0) = (c.amps.len(), c.elems.len());
        // op-amp stages always carry a part (a model invariant); the ideal profile stands in
        // rather than a panic
        let part = st
            .part
            .clone()
            .unwrap_or_else(crate::parts::profiles::ideal);
        let amp = |_: &Circuit| Amp::new(&st.name, &part, patch.rails, 0.0);
        let y = match &st.kind {
            StageKind::InvertingSum {
                inputs,
                feedback,
                reference,
                single,
            } => {
                let m = c.node(&format!("{}.minus", st.name), NodeKind::Free);
                let y = c.node(&st.name, NodeKind::Free);
                let r = c.node(&format!("{}.ref", st.name), NodeKind::Fixed(*reference));
                // labels are the patch keys (what the noise budget names its contributors)
                for (k, inp) in inputs.iter().enumerate() {
                    let from = node(inp.from, &stage_node);
                    let (rk, ck) = if *single {
                        ("r_in".to_string(), "c_in".to_string())
                    } else {
                        (format!("inputs[{k}].r"), format!("inputs[{k}].c"))
                    };
                    match inp.c {
                        Some(cap) => {
                            let mid = c.node(&format!("{}.inputs[{k}].c", st.name), NodeKind::Free);
                            c.c(from, mid, cap, &ck);
                            c.r(mid, m, inp.r, &rk);
                        }
                        None => c.r(from, m, inp.r, &rk),
                    }
                }
                let (rk, ck) = match (&feedback.pot, single) {
                    (Some(_), _) => ("feedback.pot", "feedback.c"),
                    (None, true) => ("r_fb", "c_fb"),
                    (None, false) => ("feedback.r", "feedback.c"),
                };
                c.r(m, y, feedback.r, rk);
                if let Some(cap) = feedback.c {
                    c.c(m, y, cap, ck);
                }
                let a = amp(&c);
                c.amp(a, r, m, y);
                y
            }
            StageKind::NonInverting {
                from,
                r_fb,
                c_fb,
                r_g,
                reference,
            } => {
                let m = c.node(&format!("{}.minus", st.name), NodeKind::Free);
                let y = c.node(&st.name, NodeKind::Free);
                let r = c.node(&format!("{}.ref", st.name), NodeKind::Fixed(*reference));
                c.r(y, m, *r_fb, "r_fb");
                if let Some(cap) = c_fb {
                    c.c(y, m, *cap, "c_fb");
                }
                c.r(m, r, *r_g, "r_g");
                let p = node(*from, &stage_node);
                let a = amp(&c);
                c.amp(a, p, m, y);
                y
            }
            StageKind::Follower { from } => {
                let y = c.node(&st.name, NodeKind::Free);
                let p = node(*from, &stage_node);
                let a = amp(&c);
                c.amp(a, p, y, y);
                y
            }
            StageKind::Attenuator {
                from,
                pot,
                taper: t,
                at,
            } => {
                let frac = taper::fraction(*t, *at);
                let w = c.node(&st.name, NodeKind::Free);
                let top = node(*from, &stage_node);
                c.r(
                    top,
                    w,
                    (pot * (1.0 - frac)).max(crate::model::POT_END_R),
                    "pot upper",
                );
                c.r(
                    w,
                    gnd,
                    (pot * frac).max(crate::model::POT_END_R),
                    "pot lower",
                );
                w
            }
            StageKind::Network(_) => {
                let direct = |_: Node| (1.0, 0.0);
                let nc = network_circuit(patch, i, &direct, 0.0);
                // merge: fixed nodes by value, inputs onto the patch nodes they read, free
                // nodes as new nodes
                let mut map = vec![0usize; nc.circuit.nodes.len()];
                for (k, n) in nc.circuit.nodes.iter().enumerate() {
                    map[k] = match n.kind {
                        NodeKind::Fixed(v) => c.node(&n.name, NodeKind::Fixed(v)),
                        NodeKind::Free => {
                            c.node(&format!("{}.{}", st.name, n.name), NodeKind::Free)
                        }
                        NodeKind::Input(_) => usize::MAX,
                    };
                }
                for &(cn, r, _) in &nc.inputs {
                    map[cn] = match r {
                        InputRef::Node(n) => node(n, &stage_node),
                        InputRef::Inner(s, l) => {
                            let StageKind::Network(net) = &patch.stages[s].kind else {
                                continue;
                            };
                            let name = format!("{}.{}", patch.stages[s].name, net.nodes[l]);
                            c.nodes.iter().position(|x| x.name == name).unwrap_or(gnd)
                        }
                    };
                }
                for e in &nc.circuit.elems {
                    let (a, b) = (map[e.a], map[e.b]);
                    match e.kind {
                        ElemKind::R(r) => c.r(a, b, r, &e.label),
                        ElemKind::C(x) => c.c(a, b, x, &e.label),
                        ElemKind::Junction { .. } => {
                            c.elems.push(crate::circuit::Elem {
                                kind: e.kind,
                                a,
                                b,
                                label: e.label.clone(),
                            });
                        }
                    }
                }
                for a in &nc.circuit.amps {
                    let (p, m, o) = (map[a.plus], map[a.minus], map[a.out]);
                    c.amp(a.clone(), p, m, o);
                }
                map[nc.out]
            }
        };
        stage_node.push(y);
        stage_amps.push(amps0..c.amps.len());
        stage_elems.push(elems0..c.elems.len());
    }
    let mut out = Vec::new();
    let mut output_elems = Vec::with_capacity(patch.outputs.len());
    for o in &patch.outputs {
        let elems0 = c.elems.len();
        let mut n = node(o.from, &stage_node);
        // `from = "stage.node"`: that network's inner node
        if let (Node::Stage(s), Some(l)) = (o.from, o.inner) {
            if let StageKind::Network(net) = &patch.stages[s].kind {
                let name = format!("{}.{}", patch.stages[s].name, net.nodes[l]);
                if let Some(k) = c.nodes.iter().position(|x| x.name == name) {
                    n = k;
                }
            }
        }
        let n = match o.load {
            Some(l) => {
                let t = if o.series > 0.0 {
                    let t = c.node(&format!("outputs.{}", o.name), NodeKind::Free);
                    c.r(n, t, o.series, "series");
                    t
                } else {
                    n
                };
                c.r(t, gnd, l, "load");
                t
            }
            None => n,
        };
        out.push(n);
        output_elems.push(elems0..c.elems.len());
    }
    PatchCircuit {
        circuit: c,
        sources: src,
        source_nodes: node_of_source,
        stages: stage_node,
        outputs: out,
        stage_amps,
        stage_elems,
        output_elems,
    }
}

/// A shorthand op-amp stage (inverting summer, inverting, non-inverting, follower) as its
/// textbook circuit, the same expansion as [`patch_circuit`], with every input on an input
/// node of its own: `tap(j, node)` gives the (gain, Thevenin resistance) of input `j`'s
/// source as that input sees it (a pot's wiper with its other loads; input 0 of a
/// non-inverting stage or follower is its `from`), the resistance a resistor from the input
/// node. `amp` is the compiled op-amp (its static load already counted). A network or an
/// attenuator gives an empty circuit.
pub fn shorthand_circuit(
    patch: &Patch,
    stage: usize,
    tap: &dyn Fn(usize, Node) -> (f64, f64),
    amp: Amp,
) -> NetCircuit {
    let st = &patch.stages[stage];
    let mut c = Circuit::new();
    let mut inputs: Vec<(usize, InputRef, f64)> = Vec::new();
    let mut feed = |c: &mut Circuit, j: usize, from: Node| -> usize {
        let (gain, rth) = tap(j, from);
        let name = patch.node_name(from).to_string();
        let i = c.input(&name);
        inputs.push((i, InputRef::Node(from), gain));
        if rth > 0.0 {
            let n = c.node(&format!("{name}.tap"), NodeKind::Free);
            c.r(i, n, rth, &format!("{name}.rth"));
            n
        } else {
            i
        }
    };
    let y = c.node(&st.name, NodeKind::Free);
    match &st.kind {
        StageKind::InvertingSum {
            inputs: ins,
            feedback,
            reference,
            ..
        } => {
            let m = c.node("minus", NodeKind::Free);
            let r = c.node("ref", NodeKind::Fixed(*reference));
            for (k, inp) in ins.iter().enumerate() {
                let from = feed(&mut c, k, inp.from);
                match inp.c {
                    Some(cap) => {
                        let mid = c.node(&format!("inputs[{k}].c"), NodeKind::Free);
                        c.c(from, mid, cap, &format!("inputs[{k}].c"));
                        c.r(mid, m, inp.r, &format!("inputs[{k}].r"));
                    }
                    None => c.r(from, m, inp.r, &format!("inputs[{k}].r")),
                }
            }
            c.r(m, y, feedback.r, "feedback.r");
            if let Some(cap) = feedback.c {
                c.c(m, y, cap, "feedback.c");
            }
            c.amp(amp, r, m, y);
        }
        StageKind::NonInverting {
            from,
            r_fb,
            c_fb,
            r_g,
            reference,
        } => {
            let m = c.node("minus", NodeKind::Free);
            let r = c.node("ref", NodeKind::Fixed(*reference));
            c.r(y, m, *r_fb, "r_fb");
            if let Some(cap) = c_fb {
                c.c(y, m, *cap, "c_fb");
            }
            c.r(m, r, *r_g, "r_g");
            let p = feed(&mut c, 0, *from);
            c.amp(amp, p, m, y);
        }
        StageKind::Follower { from } => {
            let p = feed(&mut c, 0, *from);
            c.amp(amp, p, y, y);
        }
        StageKind::Attenuator { .. } | StageKind::Network(_) => {}
    }
    NetCircuit {
        circuit: c,
        inputs,
        locals: Vec::new(),
        out: y,
        out_amp: (!matches!(
            st.kind,
            StageKind::Attenuator { .. } | StageKind::Network(_)
        ))
        .then_some(0),
    }
}
