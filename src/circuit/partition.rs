//! Partition of a circuit into blocks of free nodes and groups of op-amps solved jointly.

#![allow(clippy::needless_range_loop)] // index-based graph walks read clearer here

use super::Circuit;

/// One group: op-amps and blocks solved together.
#[derive(Debug, Clone, PartialEq)]
pub struct Group {
    /// Unknown nodes: the blocks' free nodes, then the group's op-amp output nodes.
    pub nodes: Vec<usize>,
    /// Op-amps (indices into [`Circuit::amps`]).
    pub amps: Vec<usize>,
    /// Elements with an end on one of the group's block nodes.
    pub elems: Vec<usize>,
}

/// Blocks: connected components of free, undriven nodes joined by elements.
pub fn blocks(c: &Circuit) -> Vec<Vec<usize>> {
    let n = c.nodes.len();
    let passive: Vec<bool> = (0..n).map(|i| !c.driven(i)).collect();
    let mut parent: Vec<usize> = (0..n).collect();
    fn find(p: &mut [usize], mut x: usize) -> usize {
        while p[x] != x {
            p[x] = p[p[x]];
            x = p[x];
        }
        x
    }
    for e in &c.elems {
        if passive[e.a] && passive[e.b] {
            let (ra, rb) = (find(&mut parent, e.a), find(&mut parent, e.b));
            if ra != rb {
                parent[ra] = rb;
            }
        }
    }
    let mut roots: Vec<usize> = Vec::new();
    let mut out: Vec<Vec<usize>> = Vec::new();
    for i in 0..n {
        if !passive[i] {
            continue;
        }
        let r = find(&mut parent, i);
        match roots.iter().position(|&x| x == r) {
            Some(k) => out[k].push(i),
            None => {
                roots.push(r);
                out.push(vec![i]);
            }
        }
    }
    out
}

/// Groups in solving order (topological order of the strongly connected components of the
/// graph "op-amp drives block", "block feeds op-amp input", "op-amp output feeds op-amp
/// input").
pub fn groups(c: &Circuit) -> Vec<Group> {
    let bl = blocks(c);
    let nb = bl.len();
    let na = c.amps.len();
    // vertices: blocks 0..nb, amps nb..nb+na
    let nv = nb + na;
    let block_of = |node: usize| bl.iter().position(|b| b.contains(&node));
    let mut adj = vec![vec![false; nv]; nv];
    for (ai, a) in c.amps.iter().enumerate() {
        let av = nb + ai;
        for e in &c.elems {
            let other = if e.a == a.out {
                Some(e.b)
            } else if e.b == a.out {
                Some(e.a)
            } else {
                None
            };
            if let Some(bk) = other.and_then(block_of) {
                adj[av][bk] = true;
            }
        }
        for pin in [a.plus, a.minus] {
            if let Some(bk) = block_of(pin) {
                adj[bk][av] = true;
            }
            for (bi, b) in c.amps.iter().enumerate() {
                if b.out == pin {
                    adj[nb + bi][av] = true;
                }
            }
        }
    }
    // reachability (Floyd-Warshall; circuits are small)
    let mut reach = adj.clone();
    for (i, r) in reach.iter_mut().enumerate() {
        r[i] = true;
    }
    for k in 0..nv {
        for i in 0..nv {
            if reach[i][k] {
                for j in 0..nv {
                    if reach[k][j] {
                        reach[i][j] = true;
                    }
                }
            }
        }
    }
    let mut comp = vec![usize::MAX; nv];
    let mut comps: Vec<Vec<usize>> = Vec::new();
    for i in 0..nv {
        if comp[i] != usize::MAX {
            continue;
        }
        let id = comps.len();
        let members: Vec<usize> = (0..nv).filter(|&j| reach[i][j] && reach[j][i]).collect();
        for &m in &members {
            comp[m] = id;
        }
        comps.push(members);
    }
    // topological order of the components (Kahn, lowest index first)
    let ncomp = comps.len();
    let mut indeg = vec![0usize; ncomp];
    let mut cedge = vec![vec![false; ncomp]; ncomp];
    for i in 0..nv {
        for j in 0..nv {
            if adj[i][j] && comp[i] != comp[j] && !cedge[comp[i]][comp[j]] {
                cedge[comp[i]][comp[j]] = true;
                indeg[comp[j]] += 1;
            }
        }
    }
    let mut done = vec![false; ncomp];
    let mut order = Vec::with_capacity(ncomp);
    while order.len() < ncomp {
        let Some(next) = (0..ncomp).find(|&k| !done[k] && indeg[k] == 0) else {
            break;
        };
        done[next] = true;
        order.push(next);
        for j in 0..ncomp {
            if cedge[next][j] {
                indeg[j] -= 1;
            }
        }
    }
    order
        .into_iter()
        .map(|k| {
            let mut nodes = Vec::new();
            let mut amps = Vec::new();
            for &v in &comps[k] {
                if v < nb {
                    nodes.extend_from_slice(&bl[v]);
                } else {
                    amps.push(v - nb);
                }
            }
            nodes.sort_unstable();
            amps.sort_unstable();
            let block_nodes = nodes.clone();
            for &a in &amps {
                nodes.push(c.amps[a].out);
            }
            let elems = c
                .elems
                .iter()
                .enumerate()
                .filter(|(_, e)| block_nodes.contains(&e.a) || block_nodes.contains(&e.b))
                .map(|(i, _)| i)
                .collect();
            Group { nodes, amps, elems }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::circuit::{Amp, NodeKind};
    use crate::model::Rails;

    fn ideal() -> crate::parts::OpAmp {
        crate::parts::builtin("ideal").unwrap()
    }

    const RAILS: Rails = Rails {
        pos: 12.0,
        neg: -12.0,
    };

    #[test]
    fn a_chain_of_inverters_is_a_chain_of_groups() {
        // in -R- m1 -R- o1 (amp1: minus m1) -R- m2 -R- o2 (amp2: minus m2)
        let mut c = Circuit::new();
        let g = c.node("gnd", NodeKind::Fixed(0.0));
        let i = c.input("in");
        let m1 = c.node("m1", NodeKind::Free);
        let o1 = c.node("o1", NodeKind::Free);
        let m2 = c.node("m2", NodeKind::Free);
        let o2 = c.node("o2", NodeKind::Free);
        c.r(i, m1, 1e4, "r1");
        c.r(m1, o1, 1e4, "r2");
        c.r(o1, m2, 1e4, "r3");
        c.r(m2, o2, 1e4, "r4");
        c.amp(Amp::new("a1", &ideal(), RAILS, 0.0), g, m1, o1);
        c.amp(Amp::new("a2", &ideal(), RAILS, 0.0), g, m2, o2);
        let gs = groups(&c);
        assert_eq!(gs.len(), 2);
        assert_eq!(gs[0].amps, vec![0]);
        assert_eq!(gs[0].nodes, vec![m1, o1]);
        assert_eq!(gs[1].amps, vec![1]);
        assert_eq!(gs[1].nodes, vec![m2, o2]);
    }

    #[test]
    fn a_loop_through_three_amps_is_one_group() {
        // state-variable shape: a1 sums in and feedback from a3; a2, a3 integrate
        let mut c = Circuit::new();
        let g = c.node("gnd", NodeKind::Fixed(0.0));
        let i = c.input("in");
        let names = ["m1", "o1", "m2", "o2", "m3", "o3"];
        let n: Vec<usize> = names.iter().map(|s| c.node(s, NodeKind::Free)).collect();
        c.r(i, n[0], 1e4, "r1");
        c.r(n[5], n[0], 1e4, "rfb");
        c.r(n[1], n[0], 1e4, "rf");
        c.r(n[1], n[2], 1e4, "ri1");
        c.c(n[2], n[3], 1e-8, "c1");
        c.r(n[3], n[4], 1e4, "ri2");
        c.c(n[4], n[5], 1e-8, "c2");
        c.amp(Amp::new("a1", &ideal(), RAILS, 0.0), g, n[0], n[1]);
        c.amp(Amp::new("a2", &ideal(), RAILS, 0.0), g, n[2], n[3]);
        c.amp(Amp::new("a3", &ideal(), RAILS, 0.0), g, n[4], n[5]);
        let gs = groups(&c);
        assert_eq!(gs.len(), 1);
        assert_eq!(gs[0].amps, vec![0, 1, 2]);
    }
}
