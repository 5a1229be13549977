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
    group(&stage_keys(g, blocks))
}

/// The output shape of each block past the batch axis, when known.
pub fn stage_keys(g: &Graph, blocks: &[Block]) -> Vec<Option<Vec<Dim>>> {
    blocks.iter().map(|b| stage_key(g, b.output)).collect()
}

/// Groups consecutive blocks into stages by their output shapes past the
/// batch axis (`None`: unknown, in no stage). Two shapes are of one stage
/// when they are equal, or when they hold the same number of positions of
/// the same width in another layout: the same product of dims and a width
/// (the first or last dim of each) in common, so `[H, W, C]` and
/// `[H·W, C]` (a windowed-attention transformer's stream, [W1]) or
/// `[C, H, W]` and `[H·W, C]` are one stage. A stage's shape is its first
/// block's.
pub fn group(keys: &[Option<Vec<Dim>>]) -> (Vec<Stage>, Vec<Option<usize>>) {
    let mut out: Vec<Stage> = Vec::new();
    let mut of_block = Vec::with_capacity(keys.len());
    let mut previous_known = false;
    for (i, key) in keys.iter().enumerate() {
        match key.clone() {
            Some(shape) => {
                match out.last_mut() {
                    Some(s) if previous_known && same_stage(&s.shape, &shape) => s.blocks.push(i),
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

/// Whether two output shapes (past the batch axis) belong to one stage.
fn same_stage(a: &[Dim], b: &[Dim]) -> bool {
    if a == b {
        return true;
    }
    let known = |s: &[Dim]| -> Option<Vec<u64>> {
        s.iter().map(|d| if let Dim::Known(k) = d { Some(*k) } else { None }).collect()
    };
    let (Some(a), Some(b)) = (known(a), known(b)) else { return false };
    let product = |s: &[u64]| s.iter().try_fold(1u64, |acc, &d| acc.checked_mul(d));
    let ends = |s: &[u64]| [s.first().copied(), s.last().copied()];
    product(&a).is_some()
        && product(&a) == product(&b)
        && ends(&a).iter().flatten().any(|w| ends(&b).contains(&Some(*w)))
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

/// The layers that follow every block of a stage and that no shortcut
/// spans, the same in each gap: the architecture's own pattern (a residual
/// around a depthwise convolution only, then a pointwise layer), reported
/// once rather than as lost shortcuts.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RegularRun {
    /// The stage (index into the stages).
    pub stage: usize,
    /// The runs that follow the pattern, in graph order.
    pub runs: Vec<BareRun>,
}

/// Bare runs that break their stage's pattern, and the regular patterns.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct BareRuns {
    /// Runs that are anomalies: possibly lost shortcuts.
    pub anomalies: Vec<BareRun>,
    /// Stages whose gaps all hold the same unspanned layers.
    pub regular: Vec<RegularRun>,
}

/// Finds bare runs between consecutive blocks of the same stage and sorts
/// them into the stage's regular pattern and anomalies.
///
/// The pattern of a stage is the sequence of layers (op, kernel, grouped or
/// not) found in most of the gaps between its consecutive blocks, empty
/// gaps included, when it is found in at least two gaps and in at least half
/// of them. A run with the pattern's layers is regular; any other run, and
/// every run of a stage without a pattern (a stage of two or three blocks
/// has too few gaps to show one), is an anomaly.
pub fn bare_runs(g: &Graph, blocks: &[Block], stage_of: &[Option<usize>]) -> BareRuns {
    let mut gaps: Vec<(usize, Option<BareRun>)> = Vec::new();
    for i in 1..blocks.len() {
        let (a, b) = (&blocks[i - 1], &blocks[i]);
        let Some(stage) = stage_of[i] else { continue };
        if stage_of[i - 1] != Some(stage) || a.depth != b.depth {
            continue;
        }
        let Some(nodes) = between(g, a, b.fork) else { continue };
        let layers: Vec<NodeId> =
            nodes.into_iter().filter(|&n| op::is_parametrised(g, n)).collect();
        let run = (!layers.is_empty()).then_some(BareRun { after: i - 1, before: i, layers });
        gaps.push((stage, run));
    }
    let mut out = BareRuns::default();
    let mut stages: Vec<usize> = gaps.iter().map(|(s, _)| *s).collect();
    stages.dedup();
    for stage in stages {
        let in_stage: Vec<&Option<BareRun>> =
            gaps.iter().filter(|(s, _)| *s == stage).map(|(_, r)| r).collect();
        let signature = |r: &Option<BareRun>| -> Vec<(String, Vec<i64>, bool)> {
            r.as_ref()
                .map_or(Vec::new(), |r| r.layers.iter().map(|&n| layer_signature(g, n)).collect())
        };
        let signatures: Vec<_> = in_stage.iter().map(|r| signature(r)).collect();
        let mut pattern = None;
        let mut best = 0;
        for s in &signatures {
            let count = signatures.iter().filter(|t| *t == s).count();
            if count > best {
                best = count;
                pattern = Some(s.clone());
            }
        }
        let pattern = pattern.filter(|_| best >= 2 && 2 * best >= signatures.len());
        let mut regular = Vec::new();
        for (run, sig) in in_stage.into_iter().zip(&signatures) {
            let Some(run) = run else { continue };
            if pattern.as_ref() == Some(sig) {
                regular.push(run.clone());
            } else {
                out.anomalies.push(run.clone());
            }
        }
        if !regular.is_empty() {
            out.regular.push(RegularRun { stage, runs: regular });
        }
    }
    out
}

/// What identifies a layer in a stage's pattern: its op, its weight's
/// spatial kernel, and whether it is grouped.
fn layer_signature(g: &Graph, n: NodeId) -> (String, Vec<i64>, bool) {
    let node = g.node(n);
    let kernel = op::weight_slot(g, n)
        .and_then(|s| g.input(n, s))
        .and_then(|w| g.shape(w))
        .map(|d| {
            d.iter().skip(2).map(|d| if let Dim::Known(k) = d { *k as i64 } else { -1 }).collect()
        })
        .unwrap_or_default();
    let grouped = crate::load::attr::int(&node.attrs, "group").unwrap_or(1) > 1;
    (node.op.clone(), kernel, grouped)
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
