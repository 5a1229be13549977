//! Finding residual blocks: every Add or Sum whose signal inputs fork from one
//! tensor, one of them reaching the merge as a shortcut and another through a
//! branch with learned weights; and every Concat that joins a tensor with a
//! path derived from it (a concatenative skip).
//!
//! The fork is found with dominators ([`Dominance`]), never by names: the
//! fork of a merge is the immediate dominator of its output.
//!
//! **Invariant:** the shortcut path and the branch of a block share no node,
//! and both lie strictly between the fork and the merge. Detection never
//! fails: what it cannot decide becomes a rejected candidate with a reason.

use std::collections::{HashMap, HashSet};

use crate::graph::op::{self, Family};
use crate::graph::{Dominance, Graph, NodeId, ValueId};
use crate::vocab::{NotBlockReason, ShortcutKind};

/// The shortcut path of a block.
#[derive(Debug, Clone)]
pub struct Shortcut {
    /// What kind of path it is.
    pub kind: ShortcutKind,
    /// The merge input it arrives at.
    pub input: ValueId,
    /// The input slot of the merge.
    pub slot: usize,
    /// Ops on the path, in graph order (empty for a bare identity).
    pub ops: Vec<NodeId>,
    /// Whether a learned linear layer is on the path.
    pub projected: bool,
}

/// One residual block: `merge(shortcut(fork), branch(fork))`.
#[derive(Debug, Clone)]
pub struct Block {
    /// The Add, Sum or QLinearAdd node.
    pub merge: NodeId,
    /// The merge's output.
    pub output: ValueId,
    /// The tensor the shortcut and the branch start from.
    pub fork: ValueId,
    /// The shortcut.
    pub shortcut: Shortcut,
    /// Merge inputs fed by the branch.
    pub branch_inputs: Vec<ValueId>,
    /// Ops of the branch, in graph order.
    pub branch: Vec<NodeId>,
    /// Index of the innermost block whose branch holds this one.
    pub parent: Option<usize>,
    /// Number of blocks whose branches hold this one.
    pub depth: usize,
    /// Number of blocks directly inside this one's branch.
    pub children: usize,
}

/// A Concat joining a tensor with a path derived from it (DenseNet, U-Net).
#[derive(Debug, Clone)]
pub struct ConcatSkip {
    /// The Concat node.
    pub concat: NodeId,
    /// Its output.
    pub output: ValueId,
    /// The tensor the skip and the branch start from.
    pub fork: ValueId,
    /// The skip path (identity or a crop).
    pub skip: Shortcut,
    /// Concat inputs fed by the branch.
    pub branch_inputs: Vec<ValueId>,
    /// Ops of the branch, in graph order.
    pub branch: Vec<NodeId>,
    /// Index of the innermost concatenative skip whose branch holds this one.
    pub parent: Option<usize>,
    /// Number of concatenative skips whose branches hold this one.
    pub depth: usize,
}

/// A merge with two or more signal inputs that is not a residual block.
#[derive(Debug, Clone)]
pub struct Rejected {
    /// The Add, Sum or Concat node.
    pub node: NodeId,
    /// Why it is not a block.
    pub reason: NotBlockReason,
}

/// Everything detection found.
#[derive(Debug, Clone, Default)]
pub struct Detection {
    /// Residual blocks, in graph order of their merges.
    pub blocks: Vec<Block>,
    /// Concatenative skips, in graph order.
    pub concat_skips: Vec<ConcatSkip>,
    /// Merges with several signal inputs that are not blocks.
    pub rejected: Vec<Rejected>,
}

/// Finds every residual block and concatenative skip of `g`.
pub fn find_blocks(g: &Graph, dom: &Dominance) -> Detection {
    let mut det = Detection::default();
    let mut learned_after: Option<Vec<bool>> = None;
    for &n in &g.order {
        let node = g.node(n);
        let is_merge = op::is_merge(&node.op);
        if !is_merge && !op::is_concat(&node.op) {
            continue;
        }
        let signals: Vec<(usize, ValueId)> = node
            .inputs
            .iter()
            .enumerate()
            .filter_map(|(slot, v)| v.map(|v| (slot, v)))
            .filter(|(_, v)| !g.value(*v).is_static)
            .collect();
        let Some(&output) = node.outputs.first() else { continue };
        if is_merge
            && let [(_, signal)] = signals.as_slice()
            && let Some(block) = constant_shortcut(g, n, output, *signal)
        {
            det.blocks.push(block);
            continue;
        }
        if signals.len() < 2 {
            continue;
        }
        let outcome = match dom.fork(output) {
            Some(fork) => join(g, fork, &signals, is_merge).map(|j| (fork, j)),
            None => Err(NotBlockReason::Independent),
        };
        // The branch reads the shortcut and a side signal that came from
        // before it (a decoder's or a class-attention layer's stream that
        // attends to a memory it was computed from): the dominator is then
        // the memory, above the shortcut. The shortcut input itself is the fork.
        let outcome = match outcome {
            Err(NotBlockReason::NoShortcut) if is_merge => signals
                .iter()
                .find_map(|&(_, a)| join(g, a, &signals, true).ok().map(|j| (a, j)))
                .ok_or(NotBlockReason::NoShortcut),
            other => other,
        };
        // A projected shortcut into a sum that no learned layer reads: two
        // heads on one map (a segmentation head's two classifiers, a
        // detector's offset and size heads), not a block.
        let outcome = match outcome {
            Ok((_, (shortcut, ..)))
                if is_merge
                    && shortcut.projected
                    && !learned_after.get_or_insert_with(|| learned_downstream(g))
                        [n.0 as usize] =>
            {
                Err(NotBlockReason::HeadSum)
            }
            other => other,
        };
        match outcome {
            Ok((fork, (shortcut, branch_inputs, branch))) => {
                if is_merge {
                    det.blocks.push(Block {
                        merge: n,
                        output,
                        fork,
                        shortcut,
                        branch_inputs,
                        branch,
                        parent: None,
                        depth: 0,
                        children: 0,
                    });
                } else {
                    det.concat_skips.push(ConcatSkip {
                        concat: n,
                        output,
                        fork,
                        skip: shortcut,
                        branch_inputs,
                        branch,
                        parent: None,
                        depth: 0,
                    });
                }
            }
            Err(reason) => det.rejected.push(Rejected { node: n, reason }),
        }
    }
    let block_nesting = nesting(det.blocks.iter().map(|b| (b.merge, b.branch.as_slice())));
    for (i, (parent, depth)) in block_nesting.into_iter().enumerate() {
        det.blocks[i].parent = parent;
        det.blocks[i].depth = depth;
        if let Some(p) = parent {
            det.blocks[p].children += 1;
        }
    }
    let concat_nesting = nesting(det.concat_skips.iter().map(|c| (c.concat, c.branch.as_slice())));
    for (i, (parent, depth)) in concat_nesting.into_iter().enumerate() {
        det.concat_skips[i].parent = parent;
        det.concat_skips[i].depth = depth;
    }
    det
}

/// A merge of one signal and a learned constant that the signal's path
/// reads as well: `cls + f(concat(cls, x))`, the class-attention layer of
/// [K1]. The constant (an initializer or Constant node's float tensor, with
/// as many elements as one sample of the merge output) may reach the merge
/// and the branch through reshapes or an `Expand` to the batch. A bias or a
/// positional table is read by nothing else and is never such a shortcut.
fn constant_shortcut(g: &Graph, merge: NodeId, output: ValueId, signal: ValueId) -> Option<Block> {
    let node = g.node(merge);
    for (slot, c) in node.inputs.iter().enumerate() {
        let Some(c) = *c else { continue };
        if c == signal || !g.value(c).is_static {
            continue;
        }
        let Some(root) = constant_root(g, c) else { continue };
        let dims = g.constant_dims(root).unwrap_or_default();
        let elements = dims
            .iter()
            .try_fold(1u64, |acc, &d| u64::try_from(d).ok().and_then(|d| acc.checked_mul(d)))
            .unwrap_or(0);
        let sample = g.shape(output).and_then(|s| {
            s.iter().skip(1).try_fold(1u64, |acc, d| match d {
                crate::graph::Dim::Known(k) => acc.checked_mul(*k),
                _ => None,
            })
        });
        let dtype = g.constant_tensor(root).map_or(0, |t| t.data_type);
        if elements < 2
            || sample.is_some_and(|n| n != elements)
            || !matches!(dtype, 1 | 10 | 11 | 16)
        {
            continue;
        }
        // The constant and its static reshapes and expansions.
        let mut copies = vec![root];
        let mut i = 0;
        while i < copies.len() {
            let v = copies[i];
            i += 1;
            for cons in g.consumers(v) {
                let n = g.node(cons);
                if is_copy(&n.op) && n.inputs.first() == Some(&Some(v)) {
                    copies.extend(n.outputs.iter().copied().filter(|&o| g.value(o).is_static));
                }
            }
        }
        // Signal-carrying nodes that read a copy: where the branch starts.
        let readers: Vec<(NodeId, ValueId)> = copies
            .iter()
            .flat_map(|&v| g.consumers(v).map(move |r| (r, v)))
            .filter(|&(r, _)| {
                r != merge && g.node(r).outputs.iter().any(|&o| !g.value(o).is_static)
            })
            .collect();
        let Some(&(first, _)) = readers.iter().min_by_key(|(r, _)| g.rank[r.0 as usize]) else {
            continue;
        };
        let floor = g.rank[first.0 as usize];
        // Backwards from the signal over signal inputs, no further than the
        // first reader; then forwards from the readers within those ancestors.
        let mut ancestors: HashSet<NodeId> = HashSet::new();
        let mut stack = vec![signal];
        let mut seen: HashSet<ValueId> = HashSet::new();
        while let Some(v) = stack.pop() {
            if !seen.insert(v) || g.value(v).is_static {
                continue;
            }
            let Some(p) = g.producer(v) else { continue };
            if g.rank[p.0 as usize] < floor {
                continue;
            }
            if ancestors.insert(p) {
                stack.extend(g.signal_inputs(p));
            }
        }
        let mut on_path: HashSet<NodeId> = HashSet::new();
        let mut starts: Vec<(NodeId, ValueId)> =
            readers.iter().copied().filter(|(r, _)| ancestors.contains(r)).collect();
        starts.sort_by_key(|(r, _)| g.rank[r.0 as usize]);
        let mut stack: Vec<NodeId> = starts.iter().map(|(r, _)| *r).collect();
        while let Some(n) = stack.pop() {
            if !on_path.insert(n) {
                continue;
            }
            for &out in &g.node(n).outputs {
                stack.extend(g.consumers(out).filter(|c| ancestors.contains(c)));
            }
        }
        if !g.producer(signal).is_some_and(|p| on_path.contains(&p))
            || !on_path.iter().any(|&n| op::is_parametrised(g, n))
        {
            continue;
        }
        // The fork: the copy the branch reads first (the merge's own input
        // when the branch reads that one).
        let fork = starts.iter().find(|(_, v)| *v == c).or(starts.first()).map(|(_, v)| *v)?;
        let mut branch: Vec<NodeId> = on_path.into_iter().collect();
        branch.sort_by_key(|n| g.rank[n.0 as usize]);
        return Some(Block {
            merge,
            output,
            fork,
            shortcut: Shortcut {
                kind: ShortcutKind::Parameter,
                input: c,
                slot,
                ops: Vec::new(),
                projected: false,
            },
            branch_inputs: vec![signal],
            branch,
            parent: None,
            depth: 0,
            children: 0,
        });
    }
    None
}

/// Ops that copy a constant without changing its values.
fn is_copy(op: &str) -> bool {
    matches!(
        op,
        "Expand" | "Reshape" | "Unsqueeze" | "Squeeze" | "Identity" | "Cast" | "Tile" | "Flatten"
    )
}

/// The initializer or Constant output `v` copies, through [`is_copy`] ops.
fn constant_root(g: &Graph, mut v: ValueId) -> Option<ValueId> {
    for _ in 0..8 {
        if g.initializer(v).is_some() {
            return Some(v);
        }
        let p = g.producer(v)?;
        let n = g.node(p);
        if n.op == "Constant" {
            return Some(v);
        }
        if !is_copy(&n.op) {
            return None;
        }
        v = n.inputs.first().copied().flatten()?;
    }
    None
}

/// For each node, whether a learned layer reads (directly or further on)
/// any of its outputs: one pass in reverse topological order.
fn learned_downstream(g: &Graph) -> Vec<bool> {
    let mut after = vec![false; g.nodes.len()];
    for &n in g.order.iter().rev() {
        after[n.0 as usize] = g
            .node(n)
            .outputs
            .iter()
            .any(|&v| g.consumers(v).any(|c| after[c.0 as usize] || op::is_parametrised(g, c)));
    }
    after
}

/// Splits the signal inputs of a merge into one shortcut and the branch.
fn join(
    g: &Graph,
    fork: ValueId,
    signals: &[(usize, ValueId)],
    is_merge: bool,
) -> Result<(Shortcut, Vec<ValueId>, Vec<NodeId>), NotBlockReason> {
    let paths: Vec<Option<Vec<NodeId>>> =
        signals.iter().map(|&(_, v)| path_from(g, fork, v)).collect();
    // The shortcut is the simplest eligible path; ties go to the fewest ops,
    // then to the lowest slot.
    let mut best: Option<(usize, Shortcut)> = None;
    for (i, path) in paths.iter().enumerate() {
        let Some(path) = path else { continue };
        let Some((kind, projected)) = shortcut_kind(g, path, is_merge) else { continue };
        let (slot, input) = signals[i];
        let candidate = Shortcut { kind, input, slot, ops: path.clone(), projected };
        let key = |s: &Shortcut| (s.kind, s.projected, s.ops.len());
        if best.as_ref().is_none_or(|(_, b)| key(&candidate) < key(b)) {
            best = Some((i, candidate));
        }
    }
    let Some((chosen, shortcut)) = best else {
        let any_learned = paths.iter().flatten().flatten().any(|&n| op::is_parametrised(g, n));
        return Err(if any_learned {
            NotBlockReason::NoShortcut
        } else {
            NotBlockReason::NoLearnedLayer
        });
    };
    let mut branch_set: HashSet<NodeId> = HashSet::new();
    let mut branch_inputs = Vec::new();
    for (i, path) in paths.iter().enumerate() {
        if i == chosen {
            continue;
        }
        branch_inputs.push(signals[i].1);
        if let Some(path) = path {
            branch_set.extend(path.iter().copied());
        }
    }
    // A normalisation learns a scale and a shift: a branch of a norm and
    // parameter-free mixing (PoolFormer's `pool(n) - n`, [F1]) is learned.
    let learned = branch_set
        .iter()
        .any(|&n| op::is_parametrised(g, n) || (is_merge && op::family(g, n) == Family::Norm));
    if !learned {
        return Err(NotBlockReason::NoLearnedLayer);
    }
    if shortcut.ops.iter().any(|n| branch_set.contains(n)) {
        return Err(NotBlockReason::NoShortcut);
    }
    let mut branch: Vec<NodeId> = branch_set.into_iter().collect();
    branch.sort_by_key(|n| g.rank[n.0 as usize]);
    Ok((shortcut, branch_inputs, branch))
}

/// The nodes on every path from `fork` to `target`, in graph order; empty
/// when `target` is the fork, `None` when no path leads there. Side inputs
/// that join the paths from elsewhere (a mask, a second graph input) are not
/// part of the result.
pub fn path_from(g: &Graph, fork: ValueId, target: ValueId) -> Option<Vec<NodeId>> {
    if target == fork {
        return Some(Vec::new());
    }
    // Backwards from the target, never further back than the fork's producer.
    let floor = g.producer(fork).map(|p| g.rank[p.0 as usize]);
    let mut ancestors: HashSet<NodeId> = HashSet::new();
    let mut seen: HashSet<ValueId> = HashSet::new();
    let mut stack = vec![target];
    while let Some(v) = stack.pop() {
        if v == fork || !seen.insert(v) || g.value(v).is_static {
            continue;
        }
        let Some(p) = g.producer(v) else { continue };
        if floor.is_some_and(|f| g.rank[p.0 as usize] <= f) {
            continue;
        }
        if ancestors.insert(p) {
            stack.extend(g.signal_inputs(p));
        }
    }
    // Forwards from the fork, within those ancestors.
    let mut on_path: HashSet<NodeId> = HashSet::new();
    let mut stack = vec![fork];
    while let Some(v) = stack.pop() {
        for c in g.consumers(v) {
            if ancestors.contains(&c) && on_path.insert(c) {
                stack.extend(g.node(c).outputs.iter().copied());
            }
        }
    }
    let producer = g.producer(target)?;
    if !on_path.contains(&producer) {
        return None;
    }
    let mut out: Vec<NodeId> = on_path.into_iter().collect();
    out.sort_by_key(|n| g.rank[n.0 as usize]);
    Some(out)
}

/// The kind of a path if it can serve as a shortcut: pass-through ops,
/// normalisations and folded affine ops, at most one learned linear layer,
/// and resampling. A concatenative skip takes only pass-through ops and crops.
fn shortcut_kind(g: &Graph, path: &[NodeId], is_merge: bool) -> Option<(ShortcutKind, bool)> {
    let mut linear = 0;
    let mut resampled = false;
    for &n in path {
        match op::family(g, n) {
            Family::PassThrough => {}
            Family::Norm | Family::Affine if is_merge => {}
            Family::Linear if is_merge => linear += 1,
            Family::Resample if is_merge => resampled = true,
            Family::Resample if g.node(n).op == "Slice" => {}
            _ => return None,
        }
    }
    match (linear, resampled) {
        (0, false) => Some((ShortcutKind::Identity, false)),
        (1, false) => Some((ShortcutKind::Projection, true)),
        (l, true) if l <= 1 => Some((ShortcutKind::Resampled, l == 1)),
        _ => None,
    }
}

/// Parent and depth of each item, where item `j` is inside item `i` when
/// `i`'s branch holds `j`'s merge node.
fn nesting<'a>(items: impl Iterator<Item = (NodeId, &'a [NodeId])>) -> Vec<(Option<usize>, usize)> {
    // One walk over every branch, looking its nodes up among the merges:
    // linear in the total size of the branches.
    let items: Vec<(NodeId, &[NodeId])> = items.collect();
    let by_merge: HashMap<NodeId, usize> =
        items.iter().enumerate().map(|(i, (m, _))| (*m, i)).collect();
    let mut out: Vec<(Option<usize>, usize)> = vec![(None, 0); items.len()];
    for (i, (_, branch)) in items.iter().enumerate() {
        for n in *branch {
            let Some(&j) = by_merge.get(n) else { continue };
            if j == i {
                continue;
            }
            let (parent, depth) = &mut out[j];
            *depth += 1;
            if parent.is_none_or(|p| items[i].1.len() < items[p].1.len()) {
                *parent = Some(i);
            }
        }
    }
    out
}
