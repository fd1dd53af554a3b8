//! A network stage of the validated patch as a [`Circuit`].

use super::{Amp, Circuit, NodeKind};
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
