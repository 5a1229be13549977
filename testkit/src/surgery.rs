//! Graph surgery on decoded models: the changes a careless edit or a broken
//! optimisation pass makes to an architecture, applied to real exports so
//! that `verify` and `compare` can be checked on them.

use std::collections::BTreeSet;

use shunt::proto::ModelProto;

/// Removes the shortcut of the merge whose output is `merge_output`: the
/// merge becomes an `Identity` of its other operand, so the block's branch
/// alone carries the signal on. Returns false when no two-input merge
/// with `shortcut` as an operand produces `merge_output`.
pub fn remove_shortcut(model: &mut ModelProto, merge_output: &str, shortcut: &str) -> bool {
    let Some(graph) = model.graph.as_mut() else { return false };
    let Some(node) = graph.node.iter_mut().find(|n| n.output.iter().any(|o| o == merge_output))
    else {
        return false;
    };
    if node.input.len() != 2 || !node.input.iter().any(|i| i == shortcut) {
        return false;
    }
    let keep: Vec<String> = node.input.iter().filter(|i| *i != shortcut).cloned().collect();
    if keep.len() != 1 {
        return false;
    }
    node.op_type = "Identity".to_owned();
    node.domain = String::new();
    node.input = keep;
    node.attribute.clear();
    true
}

/// The nodes that lie on a path from tensor `from` to tensor `to`.
fn between(model: &ModelProto, from: &str, to: &str) -> BTreeSet<usize> {
    let nodes = &model.graph.as_ref().map_or(&[][..], |g| &g.node[..]);
    // Forward from `from`.
    let mut reach: BTreeSet<String> = BTreeSet::from([from.to_owned()]);
    let mut fwd = BTreeSet::new();
    let mut grew = true;
    while grew {
        grew = false;
        for (i, n) in nodes.iter().enumerate() {
            if !fwd.contains(&i) && n.input.iter().any(|x| reach.contains(x)) {
                fwd.insert(i);
                reach.extend(n.output.iter().cloned());
                grew = true;
            }
        }
    }
    // Backward from `to`, among those.
    let mut need: BTreeSet<String> = BTreeSet::from([to.to_owned()]);
    let mut out = BTreeSet::new();
    let mut grew = true;
    while grew {
        grew = false;
        for &i in &fwd {
            let n = &nodes[i];
            if !out.contains(&i) && n.output.iter().any(|x| need.contains(x)) {
                out.insert(i);
                need.extend(n.input.iter().filter(|x| reach.contains(*x)).cloned());
                grew = true;
            }
        }
    }
    out
}

/// Swaps two consecutive blocks of equal input and output shape: the nodes
/// from `x0` to `x1` (the first block) and from `x1` to `x2` (the second)
/// trade places, so the second block's layers now see `x0`. Returns false
/// when either span is empty or they share a node.
pub fn swap_blocks(model: &mut ModelProto, x0: &str, x1: &str, x2: &str) -> bool {
    let first = between(model, x0, x1);
    let second = between(model, x1, x2);
    if first.is_empty() || second.is_empty() || !first.is_disjoint(&second) {
        return false;
    }
    let Some(graph) = model.graph.as_mut() else { return false };
    let rename = |list: &mut Vec<String>, from: &str, to: &str| {
        for x in list.iter_mut().filter(|x| *x == from) {
            *x = to.to_owned();
        }
    };
    for &i in &first {
        let n = &mut graph.node[i];
        rename(&mut n.input, x0, x1);
        rename(&mut n.output, x1, x2);
    }
    for &i in &second {
        let n = &mut graph.node[i];
        rename(&mut n.input, x1, x0);
        rename(&mut n.output, x2, x1);
    }
    topological(graph);
    true
}

/// Re-orders the nodes so that each comes after the producers of its inputs,
/// keeping the present order where it already holds.
fn topological(graph: &mut shunt::proto::GraphProto) {
    let mut known: BTreeSet<String> = graph.input.iter().map(|v| v.name.clone()).collect();
    known.extend(graph.initializer.iter().map(|t| t.name.clone()));
    known.insert(String::new());
    let mut left: Vec<_> = std::mem::take(&mut graph.node).into_iter().map(Some).collect();
    let mut out = Vec::with_capacity(left.len());
    loop {
        let ready = left
            .iter()
            .position(|n| n.as_ref().is_some_and(|n| n.input.iter().all(|x| known.contains(x))));
        let Some(i) = ready else { break };
        let n = left[i].take().expect("present");
        known.extend(n.output.iter().cloned());
        out.push(n);
    }
    // Anything left waits on a tensor nobody makes: keep it, in order, at the end.
    out.extend(left.into_iter().flatten());
    graph.node = out;
}
