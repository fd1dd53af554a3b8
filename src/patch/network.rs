//! `type = "network"` stages, `[diodes.NAME]` and `[knobs]`.

#![allow(clippy::needless_range_loop)] // index-based graph walks read clearer here

use std::collections::HashMap;

use super::error::{suggest, Problem};
use super::read::{bounded, valid_name, Bounds, Tab, R};
use super::schema;
use crate::model::{
    KnobRef, NetAmp, NetNode, NetPart, NetPartKind, Network, Node, PotSetting, Rails, Taper,
};
use crate::parts::{diodes, taper::LOG_MID_DEFAULT, Diode, OpAmp};
use crate::units::Quantity;

/// A `stage.node` reference waiting for the other stage to be built.
pub(crate) struct Pending {
    /// Key path of the reference (for messages).
    pub path: String,
    /// File index of the stage read.
    pub stage: usize,
    /// Node name in that stage.
    pub node: String,
}

/// What a network stage needs from the rest of the patch.
pub(crate) struct NetEnv<'a> {
    pub nodes: &'a HashMap<String, Node>,
    pub stage_names: &'a [&'a str],
    pub parts: &'a HashMap<String, OpAmp>,
    pub diodes: &'a HashMap<String, Diode>,
    pub knobs: &'a [(String, f64)],
    pub rails: Rails,
}

/// `[knobs]`: name = position (0 to 1, or a percentage).
pub(crate) fn build_knobs(root: &Tab) -> R<Vec<(String, f64)>> {
    let Some(kt) = root.table_opt("knobs")? else {
        return Ok(Vec::new());
    };
    let mut out = Vec::new();
    for (name, v) in kt.t {
        if !valid_name(name) {
            return Err(kt.err(
                name,
                Problem::BadName {
                    name: name.to_string(),
                },
            ));
        }
        let x = bounded(
            kt.ctx,
            &kt.key_path(name),
            v,
            Quantity::Percent,
            Bounds::closed(0.0, 1.0),
        )?;
        out.push((name.clone(), x));
    }
    Ok(out)
}

/// `[diodes.NAME]`: based_on (a built-in diode), is, n, rs, cj.
pub(crate) fn build_diodes(root: &Tab) -> R<HashMap<String, Diode>> {
    let mut out = HashMap::new();
    let Some(dt) = root.table_opt("diodes")? else {
        return Ok(out);
    };
    for (name, v) in dt.t {
        if !valid_name(name) {
            return Err(dt.err(
                name,
                Problem::BadName {
                    name: name.to_string(),
                },
            ));
        }
        if diodes::builtin(name).is_some() {
            return Err(dt.err(
                name,
                Problem::Other(format!(
                    "'{name}' is a built-in diode; give yours another name and \
                     based_on = \"{name}\""
                )),
            ));
        }
        let toml::Value::Table(t) = v else {
            return Err(dt.err(
                name,
                Problem::WrongType {
                    expected: "a [diodes.NAME] table like based_on = \"silicon-signal\"".into(),
                    found: super::read::type_name(v),
                },
            ));
        };
        let tab = Tab::new(dt.ctx, format!("diodes.{name}"), t);
        tab.check_keys(schema::DIODE, &[], "")?;
        let base = tab.str_opt("based_on")?.unwrap_or("silicon-signal");
        let Some(mut d) = diodes::builtin(base) else {
            let valid = diodes::builtin_names();
            return Err(tab.err(
                "based_on",
                Problem::UnknownName {
                    what: "built-in diode".into(),
                    name: base.to_string(),
                    suggestion: suggest(base, valid.iter().copied()),
                    valid_list: format!("valid diodes are {}", valid.join(", ")),
                },
            ));
        };
        d.name = name.clone();
        d.about = format!("based on {base}");
        if let Some(x) = tab.q_opt("is", Quantity::Current, Bounds::closed(1e-24, 1.0))? {
            d.is = x;
        }
        if let Some(x) = tab.q_opt("n", Quantity::Ratio, Bounds::closed(0.5, 10.0))? {
            d.n = x;
        }
        if let Some(x) = tab.q_opt("rs", Quantity::Resistance, Bounds::closed(0.0, 1e6))? {
            d.rs = x;
        }
        if let Some(x) = tab.q_opt("cj", Quantity::Capacitance, Bounds::closed(0.0, 1e-6))? {
            d.cj = x;
        }
        out.insert(name.clone(), d);
    }
    Ok(out)
}

/// The node names a network stage may use besides its own.
pub(crate) fn node_ref(
    t: &Tab,
    key: &str,
    name: &str,
    own: &str,
    env: &NetEnv,
    locals: &mut Vec<String>,
    pending: &mut Vec<Pending>,
) -> R<NetNode> {
    match name {
        "gnd" => return Ok(NetNode::Gnd),
        "pos" => return Ok(NetNode::Pos),
        "neg" => return Ok(NetNode::Neg),
        _ => {}
    }
    if name == own {
        return Err(t.err(
            key,
            Problem::Other(format!(
                "'{name}' is this stage's own name; name its inner nodes otherwise (the \
                 stage's output is the node given by out)"
            )),
        ));
    }
    if let Some(n) = env.nodes.get(name) {
        return Ok(NetNode::Ext(*n));
    }
    if let Some((stage, node)) = name.split_once('.') {
        let Some(si) = env.stage_names.iter().position(|s| *s == stage) else {
            return Err(t.err(
                key,
                Problem::UnknownName {
                    what: "stage".into(),
                    name: stage.to_string(),
                    suggestion: suggest(stage, env.stage_names.iter().copied()),
                    valid_list: "stage.node reads another network stage's node".into(),
                },
            ));
        };
        pending.push(Pending {
            path: t.key_path(key),
            stage: si,
            node: node.to_string(),
        });
        return Ok(NetNode::Inner(si, pending.len() - 1));
    }
    if !valid_name(name) {
        return Err(t.err(
            key,
            Problem::Other(format!(
                "'{name}' is not a node name: use gnd, pos, neg, a source or stage name, \
                 stage.node, or a local name of letters, digits, '_' and '-'"
            )),
        ));
    }
    let i = match locals.iter().position(|l| l == name) {
        Some(i) => i,
        None => {
            locals.push(name.to_string());
            locals.len() - 1
        }
    };
    Ok(NetNode::Local(i))
}

fn one_node(
    t: &Tab,
    key: &str,
    own: &str,
    env: &NetEnv,
    locals: &mut Vec<String>,
    pending: &mut Vec<Pending>,
) -> R<NetNode> {
    let name = t.str_req(key, "a node name like \"a\", \"gnd\" or a source's name")?;
    node_ref(t, key, name, own, env, locals, pending)
}

/// Parse a network stage (keys already checked). Returns the network and the `stage.node`
/// references to resolve, and marks the knobs it uses.
pub(crate) fn network(
    t: &Tab,
    own: &str,
    env: &NetEnv,
    knobs_used: &mut [bool],
    pending: &mut Vec<Pending>,
) -> R<Network> {
    let mut locals: Vec<String> = Vec::new();
    let amps_a = t.array_req(
        "amps",
        "an array like [{ part = \"jfet-general\", plus = \"gnd\", minus = \"m\", out = \"y\" }]",
    )?;
    let parts_a = t.array_req(
        "parts",
        "an array like [{ r = \"10k\", ends = [\"a\", \"b\"] }]",
    )?;
    if parts_a.is_empty() {
        return Err(t.err(
            "parts",
            Problem::Other("a network needs at least one part".into()),
        ));
    }
    let mut amps = Vec::new();
    for (i, at) in t
        .tables_in(
            "amps",
            amps_a,
            "{ part = \"ideal\", plus = \"gnd\", minus = \"m\", out = \"y\" }",
        )?
        .into_iter()
        .enumerate()
    {
        at.check_keys(schema::NET_AMP, &[], "")?;
        let part = super::build::part_of(&at, env.parts)?;
        let plus = one_node(&at, "plus", own, env, &mut locals, pending)?;
        let minus = one_node(&at, "minus", own, env, &mut locals, pending)?;
        let out = match one_node(&at, "out", own, env, &mut locals, pending)? {
            NetNode::Local(k) => k,
            _ => {
                return Err(at.err(
                    "out",
                    Problem::Other(
                        "an op-amp's output must be a node of this network (not gnd, a rail, \
                         a source or another stage)"
                            .into(),
                    ),
                ))
            }
        };
        if let Some(j) = amps.iter().position(|a: &NetAmp| a.out == out) {
            return Err(at.err(
                "out",
                Problem::Other(format!(
                    "node '{}' is already driven by amps[{j}]: two op-amp outputs cannot share \
                     a node",
                    locals[out]
                )),
            ));
        }
        let vb = Bounds::closed(-100.0, 100.0);
        let rails = Rails {
            pos: at
                .q_opt("pos", Quantity::Voltage, vb)?
                .unwrap_or(env.rails.pos),
            neg: at
                .q_opt("neg", Quantity::Voltage, vb)?
                .unwrap_or(env.rails.neg),
        };
        if rails.pos <= rails.neg {
            return Err(at.err(
                "pos",
                Problem::Other("the op-amp's positive supply must be above its negative".into()),
            ));
        }
        let name = match at.str_opt("name")? {
            Some(n) if valid_name(n) => n.to_string(),
            Some(n) => {
                return Err(at.err(
                    "name",
                    Problem::BadName {
                        name: n.to_string(),
                    },
                ))
            }
            None => format!("{own}.amp{i}"),
        };
        amps.push(NetAmp {
            name,
            part,
            plus,
            minus,
            out,
            rails,
        });
    }
    let mut parts = Vec::new();
    for pt in t.tables_in("parts", parts_a, "{ r = \"10k\", ends = [\"a\", \"b\"] }")? {
        parts.push(net_part(&pt, own, env, &mut locals, pending, knobs_used)?);
    }
    let out_name = t.str_req("out", "the node that is the stage's output, like \"y\"")?;
    let out = match locals.iter().position(|l| l == out_name) {
        Some(k) => k,
        None => {
            return Err(t.err(
                "out",
                Problem::UnknownName {
                    what: "node".into(),
                    name: out_name.to_string(),
                    suggestion: suggest(out_name, locals.iter().map(String::as_str)),
                    valid_list: format!("this network's nodes are {}", locals.join(", ")),
                },
            ))
        }
    };
    let net = Network {
        nodes: locals,
        amps,
        parts,
        out,
    };
    check_topology(t, &net)?;
    Ok(net)
}

fn net_part(
    t: &Tab,
    own: &str,
    env: &NetEnv,
    locals: &mut Vec<String>,
    pending: &mut Vec<Pending>,
    knobs_used: &mut [bool],
) -> R<NetPart> {
    t.check_keys(schema::NET_PART, &[], "")?;
    let kinds: Vec<&str> = ["r", "c", "pot", "diode"]
        .into_iter()
        .filter(|k| t.has(k))
        .collect();
    if kinds.len() != 1 {
        return Err(t.err_here(Problem::Other(
            "each part is exactly one of r, c, pot or diode, with ends = [\"a\", \"b\"]".into(),
        )));
    }
    let ends_a = t.array_req("ends", "two node names like [\"a\", \"b\"]")?;
    if ends_a.len() != 2 {
        return Err(t.err(
            "ends",
            Problem::Other(format!(
                "expected two node names like [\"a\", \"b\"], got {} entries",
                ends_a.len()
            )),
        ));
    }
    let mut ends = [NetNode::Gnd; 2];
    for (k, v) in ends_a.iter().enumerate() {
        let Some(s) = v.as_str() else {
            return Err(t.err(
                "ends",
                Problem::WrongType {
                    expected: "node names (strings) like [\"a\", \"b\"]".into(),
                    found: super::read::type_name(v),
                },
            ));
        };
        ends[k] = node_ref(t, "ends", s, own, env, locals, pending)?;
    }
    if ends[0] == ends[1] {
        return Err(t.err("ends", Problem::Other("both ends are the same node".into())));
    }
    for k in ["taper", "at", "mid", "wiper", "reverse"] {
        if kinds[0] != "pot" && t.has(k) {
            return Err(t.err(
                k,
                Problem::NotApplicable {
                    key: k.into(),
                    context: "to this part (it is for pot)".into(),
                },
            ));
        }
    }
    let tolerance = t.q_opt("tolerance", Quantity::Percent, Bounds::closed(0.0, 0.5))?;
    let kind = match kinds[0] {
        "r" => NetPartKind::R(t.q_req("r", Quantity::Resistance, super::build::R_RANGE)?),
        "c" => NetPartKind::C(t.q_req("c", Quantity::Capacitance, super::build::C_RANGE)?),
        "diode" => {
            let name = t.str_req("diode", "a diode profile like \"silicon-signal\"")?;
            let d = match env
                .diodes
                .get(name)
                .cloned()
                .or_else(|| diodes::builtin(name))
            {
                Some(d) => d,
                None => {
                    let mut valid: Vec<String> = diodes::builtin_names()
                        .iter()
                        .map(|s| s.to_string())
                        .collect();
                    let mut user: Vec<&String> = env.diodes.keys().collect();
                    user.sort();
                    valid.extend(user.into_iter().cloned());
                    return Err(t.err(
                        "diode",
                        Problem::UnknownName {
                            what: "diode".into(),
                            name: name.to_string(),
                            suggestion: suggest(name, valid.iter().map(String::as_str)),
                            valid_list: format!("valid diodes are {}", valid.join(", ")),
                        },
                    ));
                }
            };
            NetPartKind::Diode(d)
        }
        _ => {
            let track = t.q_req("pot", Quantity::Resistance, super::build::R_RANGE)?;
            let wiper = one_node(t, "wiper", own, env, locals, pending)?;
            let reverse = t.bool_opt("reverse")?.unwrap_or(false);
            let (pos, knob) = match t.get("at") {
                None => {
                    return Err(t.err_here(Problem::Missing {
                        key: "at".into(),
                        expected: "a wiper position from 0 to 1, a percentage, or a knob name"
                            .into(),
                    }))
                }
                Some(toml::Value::String(s)) if env.knobs.iter().any(|(k, _)| k == s) => {
                    let k = env.knobs.iter().position(|(k, _)| k == s).unwrap_or(0);
                    knobs_used[k] = true;
                    (
                        env.knobs[k].1,
                        Some(KnobRef {
                            name: s.clone(),
                            reverse,
                        }),
                    )
                }
                Some(v) => (
                    bounded(
                        t.ctx,
                        &t.key_path("at"),
                        v,
                        Quantity::Percent,
                        Bounds::closed(0.0, 1.0),
                    )?,
                    None,
                ),
            };
            let at = if reverse { 1.0 - pos } else { pos };
            let taper = match t.word("taper", schema::TAPERS)?.unwrap_or("linear") {
                "log" => Taper::Log {
                    mid: t
                        .q_opt("mid", Quantity::Percent, Bounds::open(0.0, 0.5))?
                        .unwrap_or(LOG_MID_DEFAULT),
                },
                "antilog" => Taper::AntiLog {
                    mid: t
                        .q_opt("mid", Quantity::Percent, Bounds::open(0.5, 1.0))?
                        .unwrap_or(1.0 - LOG_MID_DEFAULT),
                },
                _ => {
                    if t.has("mid") {
                        return Err(t.err(
                            "mid",
                            Problem::NotApplicable {
                                key: "mid".into(),
                                context: "to a linear taper".into(),
                            },
                        ));
                    }
                    Taper::Linear
                }
            };
            NetPartKind::Pot {
                setting: PotSetting { track, taper, at },
                wiper,
                knob,
            }
        }
    };
    Ok(NetPart {
        ends,
        kind,
        tolerance,
    })
}

/// Topology checks: every local node connected twice or more, op-amp inputs not floating,
/// a DC path from every node to a driven node.
fn check_topology(t: &Tab, net: &Network) -> R<()> {
    let n = net.nodes.len();
    let mut parts_at: Vec<Vec<(usize, &str)>> = vec![Vec::new(); n];
    let mut amp_in: Vec<Vec<(usize, &str)>> = vec![Vec::new(); n];
    let mut driven = vec![false; n];
    for a in &net.amps {
        driven[a.out] = true;
    }
    let mut parent: Vec<usize> = (0..n).collect();
    fn find(p: &mut [usize], mut x: usize) -> usize {
        while p[x] != x {
            p[x] = p[p[x]];
            x = p[x];
        }
        x
    }
    let mut grounded = vec![false; n];
    let dc_join =
        |p: &mut Vec<usize>, a: NetNode, b: NetNode, grounded: &mut Vec<bool>| match (a, b) {
            (NetNode::Local(x), NetNode::Local(y)) => {
                let (rx, ry) = (find(p, x), find(p, y));
                if rx != ry {
                    p[rx] = ry;
                }
            }
            (NetNode::Local(x), _) | (_, NetNode::Local(x)) => grounded[x] = true,
            _ => {}
        };
    for (i, p) in net.parts.iter().enumerate() {
        for e in p.ends {
            if let NetNode::Local(k) = e {
                parts_at[k].push((i, "ends"));
            }
        }
        let dc = !matches!(p.kind, NetPartKind::C(_));
        if dc {
            dc_join(&mut parent, p.ends[0], p.ends[1], &mut grounded);
        }
        if let NetPartKind::Pot { wiper, .. } = &p.kind {
            if let NetNode::Local(k) = wiper {
                parts_at[*k].push((i, "wiper"));
            }
            dc_join(&mut parent, p.ends[0], *wiper, &mut grounded);
        }
    }
    for (i, a) in net.amps.iter().enumerate() {
        for (pin, key) in [(a.plus, "plus"), (a.minus, "minus")] {
            if let NetNode::Local(k) = pin {
                amp_in[k].push((i, key));
            }
        }
    }
    for k in 0..n {
        let conns = parts_at[k].len() + amp_in[k].len() + usize::from(driven[k]);
        if parts_at[k].is_empty() && !driven[k] {
            if let Some(&(i, key)) = amp_in[k].first() {
                return Err(t.ctx.err(
                    &format!("{}.amps[{i}].{key}", t.path),
                    Problem::Other(format!(
                        "node '{}' is connected only to op-amp inputs (a floating pin): \
                         connect it through a part, or check the spelling",
                        net.nodes[k]
                    )),
                ));
            }
        }
        if conns == 1 {
            let path = match (parts_at[k].first(), amp_in[k].first()) {
                (Some(&(i, key)), _) => format!("{}.parts[{i}].{key}", t.path),
                (None, Some(&(i, key))) => format!("{}.amps[{i}].{key}", t.path),
                _ => format!("{}.out", t.path),
            };
            let others: Vec<&str> = net
                .nodes
                .iter()
                .enumerate()
                .filter(|(j, _)| *j != k)
                .map(|(_, s)| s.as_str())
                .collect();
            return Err(t.ctx.err(
                &path,
                Problem::Other(format!(
                    "node '{}' has one connection: connect it to something else{}",
                    net.nodes[k],
                    match suggest(&net.nodes[k], others.iter().copied()) {
                        Some(s) => format!(" (did you mean '{s}'?)"),
                        None => String::new(),
                    }
                )),
            ));
        }
    }
    for k in 0..n {
        if driven[k] {
            grounded[k] = true;
        }
    }
    let mut root_ok = vec![false; n];
    for k in 0..n {
        if grounded[k] {
            let r = find(&mut parent, k);
            root_ok[r] = true;
        }
    }
    for k in 0..n {
        let r = find(&mut parent, k);
        if !root_ok[r] {
            let path = match (parts_at[k].first(), amp_in[k].first()) {
                (Some(&(i, key)), _) => format!("{}.parts[{i}].{key}", t.path),
                (None, Some(&(i, key))) => format!("{}.amps[{i}].{key}", t.path),
                _ => format!("{}.out", t.path),
            };
            return Err(t.ctx.err(
                &path,
                Problem::Other(format!(
                    "node '{}' has no DC path to ground, a rail, a source or an op-amp output \
                     (it is joined only through capacitors): add a resistor that sets its DC \
                     level",
                    net.nodes[k]
                )),
            ));
        }
    }
    Ok(())
}

/// A shorthand stage that reads another network's inner node (`from = "stage.node"`) as
/// the network it stands for: the same parts between the same nodes as
/// [`crate::circuit::build::patch_circuit`] expands the shorthand into, with its op-amp
/// named after the stage. `froms` are the nodes the stage reads, in the order of its
/// `from` keys (a summer's inputs in order). A shorthand whose reference is not 0 V has no
/// network form (a network's fixed nodes are gnd and the rails): an error naming the key.
pub(crate) fn shorthand_network(
    t: &Tab,
    name: &str,
    kind: &crate::model::StageKind,
    part: Option<&OpAmp>,
    rails: Rails,
    froms: &[NetNode],
) -> R<Network> {
    use crate::model::StageKind;
    let no_reference = |reference: f64| -> R<()> {
        if reference != 0.0 {
            return Err(t.err(
                "ref",
                Problem::Other(
                    "a shorthand stage that reads stage.node takes ref = 0 V; write the stage \
                     as a network (a divider from the rails for its reference)"
                        .into(),
                ),
            ));
        }
        Ok(())
    };
    let r = |ends: [NetNode; 2], v: f64| NetPart {
        ends,
        kind: NetPartKind::R(v),
        tolerance: None,
    };
    let c = |ends: [NetNode; 2], v: f64| NetPart {
        ends,
        kind: NetPartKind::C(v),
        tolerance: None,
    };
    let from = |k: usize| froms.get(k).copied().unwrap_or(NetNode::Gnd);
    let mut nodes = vec!["y".to_string()];
    let (y, m) = (NetNode::Local(0), NetNode::Local(1));
    let mut parts = Vec::new();
    let amp = |plus: NetNode, minus: NetNode| {
        part.map(|p| NetAmp {
            name: name.to_string(),
            part: p.clone(),
            plus,
            minus,
            out: 0,
            rails,
        })
    };
    let amps: Vec<NetAmp> = match kind {
        StageKind::InvertingSum {
            inputs,
            feedback,
            reference,
            ..
        } => {
            no_reference(*reference)?;
            nodes.push("minus".into());
            for (k, inp) in inputs.iter().enumerate() {
                match inp.c {
                    Some(cap) => {
                        nodes.push(format!("inputs{k}c"));
                        let mid = NetNode::Local(nodes.len() - 1);
                        parts.push(c([from(k), mid], cap));
                        parts.push(r([mid, m], inp.r));
                    }
                    None => parts.push(r([from(k), m], inp.r)),
                }
            }
            parts.push(r([m, y], feedback.r));
            if let Some(cap) = feedback.c {
                parts.push(c([m, y], cap));
            }
            amp(NetNode::Gnd, m).into_iter().collect()
        }
        StageKind::NonInverting {
            r_fb,
            c_fb,
            r_g,
            reference,
            ..
        } => {
            no_reference(*reference)?;
            nodes.push("minus".into());
            parts.push(r([y, m], *r_fb));
            if let Some(cap) = c_fb {
                parts.push(c([y, m], *cap));
            }
            parts.push(r([m, NetNode::Gnd], *r_g));
            amp(from(0), m).into_iter().collect()
        }
        StageKind::Follower { .. } => amp(from(0), y).into_iter().collect(),
        StageKind::Attenuator { pot, taper, at, .. } => {
            parts.push(NetPart {
                ends: [NetNode::Gnd, from(0)],
                kind: NetPartKind::Pot {
                    setting: PotSetting {
                        track: *pot,
                        taper: *taper,
                        at: *at,
                    },
                    wiper: y,
                    knob: None,
                },
                tolerance: None,
            });
            Vec::new()
        }
        StageKind::Network(n) => return Ok(n.clone()),
    };
    // well formed by construction (every node has its parts, the output is driven or a
    // wiper): no topology check to run
    Ok(Network {
        nodes,
        amps,
        parts,
        out: 0,
    })
}
