//! Stages (runs of consecutive blocks with the same output shape) and bare
//! runs (learned layers inside a stage that no shortcut spans).

use std::collections::HashSet;

use crate::graph::op;
use crate::graph::{Dim, Graph, NodeId, ValueId};
use crate::residual::Block;

/// Consecutive blocks whose outputs have the same shape past the batch axis.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Stage {
    /// The shape of every block output in the stage, batch axis dropped.
    pub shape: Vec<Dim>,
    /// Indices of its blocks.
    pub blocks: Vec<usize>,
}

/// Groups blocks into stages; a block whose output shape is unknown is in
/// no stage (`None`).
pub fn stages(g: &Graph, blocks: &[Block]) -> (Vec<Stage>, Vec<Option<usize>>) {
    let mut out: Vec<Stage> = Vec::new();
    let mut of_block = Vec::with_capacity(blocks.len());
    let mut previous_known = false;
    for (i, b) in blocks.iter().enumerate() {
        let key = stage_key(g, b.output);
        match key {
            Some(shape) => {
                match out.last_mut() {
                    Some(s) if previous_known && s.shape == shape => s.blocks.push(i),
                    _ => out.push(Stage { shape, blocks: vec![i] }),
                }
                of_block.push(Some(out.len() - 1));
                previous_known = true;
            }
            None => {
                of_block.push(None);
                previous_known = false;
            }
        }
    }
    (out, of_block)
}

fn stage_key(g: &Graph, v: ValueId) -> Option<Vec<Dim>> {
    let shape = g.shape(v)?;
    if shape.len() < 2 || shape[1..].contains(&Dim::Unknown) {
        return None;
    }
    Some(shape[1..].to_vec())
}

/// Learned layers between two consecutive blocks of one stage that no
/// shortcut spans: where a shortcut was there in the design, it was lost.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct BareRun {
    /// The block before the run.
    pub after: usize,
    /// The block after the run.
    pub before: usize,
    /// The learned layers of the run, in graph order.
    pub layers: Vec<NodeId>,
}

/// Finds bare runs between consecutive blocks of the same stage.
pub fn bare_runs(g: &Graph, blocks: &[Block], stage_of: &[Option<usize>]) -> Vec<BareRun> {
    let mut runs = Vec::new();
    for i in 1..blocks.len() {
        let (a, b) = (&blocks[i - 1], &blocks[i]);
        if stage_of[i].is_none() || stage_of[i] != stage_of[i - 1] || a.depth != b.depth {
            continue;
        }
        let Some(nodes) = between(g, a, b.fork) else { continue };
        let layers: Vec<NodeId> =
            nodes.into_iter().filter(|&n| op::is_parametrised(g, n)).collect();
        if !layers.is_empty() {
            runs.push(BareRun { after: i - 1, before: i, layers });
        }
    }
    runs
}

/// Nodes on every path from `a`'s output to `target`, if every path into
/// `target` starts at `a`'s output; searches no further back than `a`'s merge.
fn between(g: &Graph, a: &Block, target: ValueId) -> Option<Vec<NodeId>> {
    let floor = g.rank[a.merge.0 as usize];
    let mut nodes = HashSet::new();
    let mut seen = HashSet::new();
    let mut stack = vec![target];
    while let Some(v) = stack.pop() {
        if v == a.output || g.value(v).is_static || !seen.insert(v) {
            continue;
        }
        let p = g.producer(v)?;
        if g.rank[p.0 as usize] <= floor {
            return None;
        }
        if nodes.insert(p) {
            stack.extend(g.signal_inputs(p));
        }
    }
    let mut out: Vec<NodeId> = nodes.into_iter().collect();
    out.sort_by_key(|n| g.rank[n.0 as usize]);
    Some(out)
}
