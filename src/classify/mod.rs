//! What kind of block each detected block is: where its normalisation and
//! activation sit relative to the merge (placement), what its branch holds,
//! and whether its branch is dead by construction.
//!
//! **Invariant:** classification reads the graph and the detection only; it
//! never changes either and never fails (an unreadable weight is simply not
//! inspected).

mod stage;

use std::collections::HashSet;

use crate::graph::op::{self, Family};
use crate::graph::{Graph, NodeId, ValueId};
use crate::load::attr;
use crate::residual::Block;
use crate::vocab::{DeadReason, Placement, ShortcutKind};

pub use stage::{BareRun, BareRuns, RegularRun, Stage, bare_runs, group, stage_keys, stages};

/// Limits for reading weights while classifying.
#[derive(Debug, Clone)]
pub struct ClassifyConfig {
    /// Weight tensors larger than this are not read to check for all zeros.
    pub max_inspect_bytes: u64,
}

/// A learned layer of a branch.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Layer {
    /// The node.
    pub node: NodeId,
    /// Spatial kernel size (empty for fully connected layers).
    pub kernel: Vec<u64>,
    /// Input channels or features, when the weight's shape says.
    pub in_channels: Option<u64>,
    /// Output channels or features.
    pub out_channels: Option<u64>,
    /// Strides (convolutions only).
    pub strides: Vec<i64>,
    /// Convolution groups (1 unless grouped or depthwise).
    pub groups: u64,
}

/// A constant scale at the end of a branch (layer scale, ReZero gain).
#[derive(Debug, Clone, PartialEq)]
pub struct EndScale {
    /// The Mul node.
    pub node: NodeId,
    /// The constant operand.
    pub tensor: ValueId,
    /// Its values, summarised, when they could be read.
    pub summary: Option<ValueSummary>,
}

/// Minimum, maximum and mean absolute value of a constant.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ValueSummary {
    /// Number of elements.
    pub elements: u64,
    /// Smallest value.
    pub min: f32,
    /// Largest value.
    pub max: f32,
    /// Mean of absolute values.
    pub mean_abs: f32,
}

impl ValueSummary {
    fn of(values: &[f32]) -> ValueSummary {
        let min = values.iter().copied().fold(f32::INFINITY, f32::min);
        let max = values.iter().copied().fold(f32::NEG_INFINITY, f32::max);
        let sum: f64 = values.iter().map(|v| v.abs() as f64).sum();
        ValueSummary {
            elements: values.len() as u64,
            min,
            max,
            mean_abs: if values.is_empty() { 0.0 } else { (sum / values.len() as f64) as f32 },
        }
    }
}

/// Why a branch is dead by construction: its output cannot depend on its input.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StaticDead {
    /// Which constant is all zeros: the end scale ([Z1]), the last
    /// normalisation's scale, or the last learned layer's weights.
    pub reason: DeadReason,
    /// The node holding it.
    pub node: NodeId,
}

/// The classification of one block.
#[derive(Debug, Clone)]
pub struct Classification {
    /// Placement of normalisation and activation.
    pub placement: Placement,
    /// The op after the merge or at the branch opening that decided it.
    pub placement_node: Option<NodeId>,
    /// Learned layers of the branch.
    pub layers: Vec<Layer>,
    /// Normalisations of the branch: the node and a label
    /// (`BatchNormalization`, `LayerNormalization (decomposed)`).
    pub norms: Vec<(NodeId, String)>,
    /// Activations of the branch: the node and a label.
    pub activations: Vec<(NodeId, String)>,
    /// Multiplicative gates inside the branch (squeeze-and-excitation).
    pub gates: usize,
    /// A constant scale at the branch end.
    pub end_scale: Option<EndScale>,
    /// Dead by construction.
    pub static_dead: Option<StaticDead>,
    /// The channels are on axis 1 (a convolution in the branch) rather than
    /// the last axis.
    pub channels_first: bool,
    /// The block changes the spatial or sequence size: its fork and output
    /// shapes differ outside the batch and channel axes, or (shapes
    /// unknown) a branch op has a stride above 1 or the shortcut resamples.
    pub changes_resolution: bool,
}

/// Classifies every detected block, in order.
pub fn classify_all(g: &Graph, blocks: &[Block], config: &ClassifyConfig) -> Vec<Classification> {
    let forks: HashSet<ValueId> = blocks.iter().map(|b| b.fork).collect();
    (0..blocks.len())
        .map(|i| {
            let after = Later { forks: &forks, last: i + 1 == blocks.len() };
            classify(g, &blocks[i], &after, config)
        })
        .collect()
}

/// What a block needs to know of the blocks after it.
pub struct Later<'a> {
    /// The forks of all blocks.
    pub forks: &'a HashSet<ValueId>,
    /// Whether the block is the last in graph order.
    pub last: bool,
}

/// Classifies one detected block.
pub fn classify(
    g: &Graph,
    block: &Block,
    later: &Later<'_>,
    config: &ClassifyConfig,
) -> Classification {
    let branch: HashSet<NodeId> = block.branch.iter().copied().collect();
    let (placement, placement_node) = placement(g, block, &branch, later);
    let layers = block
        .branch
        .iter()
        .copied()
        .filter(|&n| op::is_parametrised(g, n))
        .map(|n| layer(g, n))
        .collect();
    let mut norms = Vec::new();
    let mut activations = Vec::new();
    let mut gates = 0;
    for &n in &block.branch {
        let node = g.node(n);
        match op::family(g, n) {
            Family::Norm if node.op == "InstanceNormalization" && spelled_group_norm(g, n) => {
                norms.push((n, "GroupNormalization (spelled out)".to_owned()))
            }
            Family::Norm => norms.push((n, node.op.clone())),
            Family::Activation => activations.push((n, node.op.clone())),
            _ => {}
        }
        if let Some(out) = node.outputs.first()
            && decomposed_layer_norm(g, *out, Some(&branch)).is_some()
        {
            norms.push((n, "LayerNormalization (decomposed)".to_owned()));
        }
        if node.op == "Erf" {
            activations.push((n, "Gelu (decomposed)".to_owned()));
        }
        if node.op == "Mul" && op::signal_arity(g, n) == 2 {
            // `x * sigmoid(x)` is a swish activation; `x * sigmoid(f(x))` a gate.
            let inputs: Vec<ValueId> = g.signal_inputs(n).collect();
            let sigmoid_of = |v: ValueId| {
                g.producer(v)
                    .filter(|&p| matches!(g.node(p).op.as_str(), "Sigmoid" | "HardSigmoid"))
                    .and_then(|p| g.signal_inputs(p).next())
            };
            match (sigmoid_of(inputs[0]), sigmoid_of(inputs[1])) {
                (Some(a), _) if a == inputs[1] => {
                    activations.push((n, "Swish (decomposed)".to_owned()))
                }
                (_, Some(b)) if b == inputs[0] => {
                    activations.push((n, "Swish (decomposed)".to_owned()))
                }
                (Some(_), _) | (_, Some(_)) => gates += 1,
                _ => {}
            }
        }
    }
    let end_scale = end_scale(g, block);
    let static_dead = static_dead(g, block, end_scale.as_ref(), config);
    let channels_first =
        block.branch.iter().any(|&n| op::is_parametrised(g, n) && g.node(n).op.contains("Conv"));
    let changes_resolution = changes_resolution(g, block, channels_first);
    Classification {
        placement,
        placement_node,
        layers,
        norms,
        activations,
        gates,
        end_scale,
        static_dead,
        channels_first,
        changes_resolution,
    }
}

/// Whether a block changes the spatial or sequence size: its fork and output
/// shapes differ outside the batch and channel axes, or (shapes unknown) a
/// branch op has a stride above 1 or the shortcut resamples.
fn changes_resolution(g: &Graph, b: &Block, channels_first: bool) -> bool {
    let known = |v| -> Option<Vec<u64>> {
        g.value(v)
            .fact
            .shape
            .as_ref()?
            .iter()
            .map(|d| match d {
                crate::graph::Dim::Known(k) => Some(*k),
                _ => None,
            })
            .collect()
    };
    if let (Some(f), Some(o)) = (known(b.fork), known(b.output))
        && f.len() == o.len()
        && f.len() >= 3
    {
        let skip = if channels_first { 1 } else { f.len() - 1 };
        return f.iter().zip(&o).enumerate().any(|(k, (x, y))| k != 0 && k != skip && x != y);
    }
    b.shortcut.kind == ShortcutKind::Resampled
        || b.branch.iter().any(|&n| {
            attr::ints(&g.node(n).attrs, "strides").is_some_and(|s| s.iter().any(|&x| x > 1))
        })
}

fn placement(
    g: &Graph,
    block: &Block,
    branch: &HashSet<NodeId>,
    later: &Later<'_>,
) -> (Placement, Option<NodeId>) {
    // 1-2: what the branch opens with.
    let entries = openings(g, block.fork, branch);
    if let Some(&n) = entries.iter().find(|&&n| op::is_layer_norm_op(&g.node(n).op)) {
        return (Placement::PreNorm, Some(n));
    }
    // A group normalisation (one op, or spelled out around an instance
    // normalisation) that no activation follows normalises the input of a
    // token mixer or an MLP, as a layer norm would ([F1]); followed by an
    // activation it is the pre-activation of rule 2.
    if let Some(&n) = entries.iter().find(|&&n| is_group_norm(g, n) && !activated(g, n)) {
        return (Placement::PreNorm, Some(n));
    }
    if let Some(n) = decomposed_layer_norm(g, block.fork, Some(branch)) {
        return (Placement::PreNorm, Some(n));
    }
    let opens_with_norm_or_act = !entries.is_empty()
        && entries.iter().all(|&n| matches!(op::family(g, n), Family::Norm | Family::Activation));
    if opens_with_norm_or_act {
        return (Placement::PreActivation, entries.first().copied());
    }
    // 3: what consumes the merge output, and nothing else. A normalisation
    // counts only when a block starts from its output (or no block follows):
    // the normalisation that opens a downsampling layer after the last block
    // of a stage is not part of that block.
    let (value, consumers) = follow_pass_through(g, block.output);
    let feeds_block = |out: ValueId| {
        later.last
            || later.forks.contains(&out)
            || later.forks.contains(&follow_pass_through(g, out).0)
    };
    let feeds_next = |n: NodeId| feeds_block(g.node(n).outputs[0]);
    if consumers.len() == 1 {
        let c = consumers[0];
        match op::family(g, c) {
            Family::Activation => return (Placement::PostActivation, Some(c)),
            Family::Norm if feeds_next(c) => return (Placement::PostNorm, Some(c)),
            _ => {}
        }
    }
    // 3b: no activation node, but a quantisation that clamps negatives:
    // `relu(x + F(x))` after a quantiser folded the ReLU into the zero point.
    if let Some(q) = clamping_quantize(g, block.output) {
        return (Placement::PostActivation, Some(q));
    }
    if let Some(n) = decomposed_layer_norm(g, value, None)
        && consumers.len() == 2
        && decomposed_norm_output(g, n).is_none_or(feeds_block)
    {
        return (Placement::PostNorm, Some(n));
    }
    // 4: branch and shortcut both start after a normalisation and an
    // activation they share (the projection units of pre-activation networks
    // take the activated input, [P1]).
    if let Some(act) =
        through_pass_through(g, block.fork).filter(|&p| op::family(g, p) == Family::Activation)
    {
        // The shared pre-activation normalises the previous block's output.
        let norm = g.signal_inputs(act).next().and_then(|v| through_pass_through(g, v));
        let norm = norm.filter(|&p| op::family(g, p) == Family::Norm);
        let after_merge = norm
            .and_then(|p| g.signal_inputs(p).next())
            .and_then(|v| through_pass_through(g, v))
            .is_some_and(|m| op::is_merge(&g.node(m).op));
        if after_merge {
            return (Placement::PreActivation, Some(act));
        }
    }
    (Placement::Unactivated, None)
}

/// A `QuantizeLinear` that `v` reaches through single-consumer pass-through
/// ops and whose zero point is the bottom of its integer range, so that every
/// negative value saturates to the smallest code, which dequantises to 0: a
/// ReLU folded into the quantisation ([Q1]: `y = saturate(round(x / scale) +
/// zero_point)`; an omitted zero point is a uint8 0).
pub fn clamping_quantize(g: &Graph, mut v: ValueId) -> Option<NodeId> {
    loop {
        let consumers: Vec<NodeId> = g.consumers(v).collect();
        let [c] = consumers.as_slice() else { return None };
        let node = g.node(*c);
        if node.op == "QuantizeLinear" {
            return zero_point_at_bottom(g, *c).then_some(*c);
        }
        if op::family(g, *c) != Family::PassThrough || g.is_output(v) {
            return None;
        }
        v = node.outputs[0];
    }
}

/// Whether a `QuantizeLinear`'s zero points are all the smallest value of
/// their integer type (uint8/uint16 0, int8 -128, int16 -32768).
fn zero_point_at_bottom(g: &Graph, q: NodeId) -> bool {
    let Some(zp) = g.input(q, 2) else { return true };
    let Some(t) = g.constant_tensor(zp) else { return false };
    let bottom = match t.data_type {
        2 | 4 => 0.0,      // uint8, uint16
        3 => -128.0,       // int8
        5 => -32768.0,     // int16
        _ => return false, // 4-bit and float8 types: not seen after a merge
    };
    g.constant_f32(zp, 1 << 16)
        .is_some_and(|values| !values.is_empty() && values.iter().all(|&x| x == bottom))
}

/// The producer of `v`, looking through pass-through ops.
fn through_pass_through(g: &Graph, mut v: ValueId) -> Option<NodeId> {
    loop {
        let p = g.producer(v)?;
        if op::family(g, p) != Family::PassThrough {
            return Some(p);
        }
        v = g.signal_inputs(p).next()?;
    }
}

/// The output of a spelled-out layer normalisation opened by `open` (its
/// `ReduceMean`): follows the centred value through Div and the affine ops.
fn decomposed_norm_output(g: &Graph, open: NodeId) -> Option<ValueId> {
    let mean = g.node(open).outputs[0];
    let sub = g.consumers(mean).find(|&c| g.node(c).op == "Sub")?;
    let centred = g.node(sub).outputs[0];
    let div = g.consumers(centred).find(|&c| g.node(c).op == "Div")?;
    let mut v = g.node(div).outputs[0];
    loop {
        let consumers: Vec<NodeId> = g.consumers(v).collect();
        match consumers.as_slice() {
            [c] if matches!(g.node(*c).op.as_str(), "Mul" | "Add")
                && op::signal_arity(g, *c) == 1 =>
            {
                v = g.node(*c).outputs[0]
            }
            _ => return Some(v),
        }
    }
}

/// A group normalisation: the `GroupNormalization` op, or the form
/// exporters write below opset 18, `Reshape` to `[N, G, -1]` then
/// `InstanceNormalization` (then a `Reshape` back and a per-channel scale
/// and shift).
fn is_group_norm(g: &Graph, n: NodeId) -> bool {
    match g.node(n).op.as_str() {
        "GroupNormalization" => true,
        "InstanceNormalization" => spelled_group_norm(g, n),
        _ => false,
    }
}

/// Whether an `InstanceNormalization` normalises a reshaped tensor of rank 3
/// (`[N, G, -1]`): a group normalisation spelled out.
fn spelled_group_norm(g: &Graph, n: NodeId) -> bool {
    let Some(x) = g.input(n, 0) else { return false };
    g.producer(x).is_some_and(|p| g.node(p).op == "Reshape")
        && g.shape(x).is_none_or(|s| s.len() == 3)
}

/// Whether the first op after `n` that is neither pass-through nor a
/// folded scale or shift is an activation.
fn activated(g: &Graph, n: NodeId) -> bool {
    let mut v = g.node(n).outputs[0];
    loop {
        let consumers: Vec<NodeId> = g.consumers(v).collect();
        let [c] = consumers.as_slice() else {
            return consumers.iter().any(|&c| op::family(g, c) == Family::Activation);
        };
        match op::family(g, *c) {
            Family::PassThrough | Family::Affine => v = g.node(*c).outputs[0],
            Family::Activation => return true,
            _ => return false,
        }
    }
}

/// A `Mul` or `Div` by a static scalar: the `x / β` that scales a
/// normaliser-free block's input before its first activation ([N1]).
fn scalar_scale(g: &Graph, n: NodeId) -> bool {
    let node = g.node(n);
    matches!(node.op.as_str(), "Mul" | "Div")
        && op::family(g, n) == Family::Affine
        && node.inputs.iter().flatten().any(|&v| {
            g.value(v).is_static
                && g.shape(v).is_some_and(|s| s.iter().all(|d| *d == crate::graph::Dim::Known(1)))
        })
}

/// The first branch ops that are not pass-through, reached from the fork.
fn openings(g: &Graph, fork: ValueId, branch: &HashSet<NodeId>) -> Vec<NodeId> {
    let mut out = Vec::new();
    let mut stack = vec![fork];
    let mut seen = HashSet::new();
    while let Some(v) = stack.pop() {
        for c in g.consumers(v) {
            if !branch.contains(&c) || !seen.insert(c) {
                continue;
            }
            // A Concat joins the fork with other tokens (the class token
            // with the patches of a class-attention layer, [K1]): what opens
            // the branch is what reads the joined tensor.
            // A scalar scale before the first activation does not change
            // what opens the branch (scaled pre-activation blocks, [N1]).
            if op::family(g, c) == Family::PassThrough
                || op::is_concat(&g.node(c).op)
                || scalar_scale(g, c)
            {
                stack.extend(g.node(c).outputs.iter().copied());
            } else {
                out.push(c);
            }
        }
    }
    out.sort_by_key(|n| g.rank[n.0 as usize]);
    out
}

/// Follows a value through single-consumer pass-through ops; returns the
/// last value and its consumers.
fn follow_pass_through(g: &Graph, mut v: ValueId) -> (ValueId, Vec<NodeId>) {
    loop {
        let consumers: Vec<NodeId> = g.consumers(v).collect();
        if consumers.len() == 1
            && op::family(g, consumers[0]) == Family::PassThrough
            && !g.is_output(v)
        {
            v = g.node(consumers[0]).outputs[0];
            continue;
        }
        return (v, consumers);
    }
}

/// A layer or RMS normalisation spelled out as arithmetic on `v`:
/// `Sub(v, ReduceMean(v))` (layer norm) or `ReduceMean(Pow(v, 2))` feeding a
/// `Div` or `Mul` of `v` (RMS norm). Returns the node that opens it.
pub fn decomposed_layer_norm(
    g: &Graph,
    v: ValueId,
    within: Option<&HashSet<NodeId>>,
) -> Option<NodeId> {
    let ok = |n: NodeId| within.is_none_or(|w| w.contains(&n));
    let consumers: Vec<NodeId> = g.consumers(v).filter(|&n| ok(n)).collect();
    for &r in &consumers {
        if g.node(r).op != "ReduceMean" {
            continue;
        }
        let mean = g.node(r).outputs[0];
        let centred = consumers.iter().any(|&s| {
            let node = g.node(s);
            node.op == "Sub"
                && node.inputs.first() == Some(&Some(v))
                && node.inputs.get(1) == Some(&Some(mean))
        });
        if centred {
            return Some(r);
        }
    }
    for &p in &consumers {
        let node = g.node(p);
        let squares = match node.op.as_str() {
            "Pow" => {
                node.inputs.get(1).copied().flatten().and_then(|e| g.constant_f32(e, 64))
                    == Some(vec![2.0])
            }
            "Mul" => node.inputs.first() == node.inputs.get(1),
            _ => false,
        };
        if squares && g.consumers(node.outputs[0]).any(|m| g.node(m).op == "ReduceMean") {
            return Some(p);
        }
    }
    None
}

fn layer(g: &Graph, n: NodeId) -> Layer {
    let node = g.node(n);
    let weight = op::weight_slot(g, n)
        .and_then(|s| g.input(n, s))
        .and_then(|w| g.shape(w).map(<[_]>::to_vec));
    let dims: Vec<Option<u64>> = weight
        .unwrap_or_default()
        .iter()
        .map(|d| match d {
            crate::graph::Dim::Known(k) => Some(*k),
            _ => None,
        })
        .collect();
    let groups = attr::int(&node.attrs, "group").unwrap_or(1).max(1) as u64;
    let strides = attr::ints(&node.attrs, "strides").map(<[i64]>::to_vec).unwrap_or_default();
    match node.op.as_str() {
        "Conv" | "ConvInteger" | "QLinearConv" | "FusedConv" => Layer {
            node: n,
            kernel: dims.iter().skip(2).map(|d| d.unwrap_or(0)).collect(),
            in_channels: dims.get(1).copied().flatten().and_then(|c| c.checked_mul(groups)),
            out_channels: dims.first().copied().flatten(),
            strides,
            groups,
        },
        "ConvTranspose" => Layer {
            node: n,
            kernel: dims.iter().skip(2).map(|d| d.unwrap_or(0)).collect(),
            in_channels: dims.first().copied().flatten(),
            out_channels: dims.get(1).copied().flatten().and_then(|c| c.checked_mul(groups)),
            strides,
            groups,
        },
        _ => {
            let transposed =
                node.op.starts_with("Gemm") && attr::int(&node.attrs, "transB") == Some(1);
            let slot = op::weight_slot(g, n).unwrap_or(1);
            let (k, m) = match dims.len() {
                r if r >= 2 => (dims[r - 2], dims[r - 1]),
                _ => (None, None),
            };
            let (in_c, out_c) = if transposed {
                (m, k)
            } else if slot == 0 {
                // A static left operand: W @ x, rows are outputs.
                (m, k)
            } else {
                (k, m)
            };
            Layer {
                node: n,
                kernel: Vec::new(),
                in_channels: in_c,
                out_channels: out_c,
                strides: Vec::new(),
                groups: 1,
            }
        }
    }
}

fn end_scale(g: &Graph, block: &Block) -> Option<EndScale> {
    for &input in &block.branch_inputs {
        let mut v = input;
        while let Some(p) = g.producer(v) {
            let node = g.node(p);
            match op::family(g, p) {
                Family::PassThrough => v = node.inputs[0]?,
                Family::Affine if node.op == "Mul" => {
                    let tensor =
                        node.inputs.iter().flatten().copied().find(|&i| g.value(i).is_static)?;
                    let summary =
                        g.constant_f32(tensor, 1 << 20).map(|vals| ValueSummary::of(&vals));
                    return Some(EndScale { node: p, tensor, summary });
                }
                _ => break,
            }
        }
    }
    None
}

fn all_zero(g: &Graph, v: Option<ValueId>, config: &ClassifyConfig) -> bool {
    v.and_then(|v| g.constant_f32(v, config.max_inspect_bytes))
        .is_some_and(|vals| !vals.is_empty() && vals.iter().all(|&x| x == 0.0))
}

fn static_dead(
    g: &Graph,
    block: &Block,
    end: Option<&EndScale>,
    config: &ClassifyConfig,
) -> Option<StaticDead> {
    if let Some(EndScale { node, summary: Some(s), .. }) = end
        && s.min == 0.0
        && s.max == 0.0
    {
        return Some(StaticDead { reason: DeadReason::ZeroScale, node: *node });
    }
    // Walk back from each branch input to the last learned layer; every branch
    // input must be dead for the branch to be.
    let mut verdict = None;
    for &input in &block.branch_inputs {
        let mut v = input;
        let mut found = None;
        while let Some(p) = g.producer(v) {
            let node = g.node(p);
            let signal = g.signal_inputs(p).next();
            match op::family(g, p) {
                Family::PassThrough => {}
                Family::Affine => {
                    let konst =
                        node.inputs.iter().flatten().copied().find(|&i| g.value(i).is_static);
                    if node.op == "Mul" && all_zero(g, konst, config) {
                        found = Some(StaticDead { reason: DeadReason::ZeroScale, node: p });
                        break;
                    }
                }
                Family::Norm => {
                    if all_zero(g, g.input(p, 1), config) {
                        found = Some(StaticDead { reason: DeadReason::ZeroNormScale, node: p });
                        break;
                    }
                }
                Family::Linear => {
                    let w = op::weight_slot(g, p).and_then(|s| g.input(p, s));
                    if all_zero(g, w, config) {
                        found = Some(StaticDead { reason: DeadReason::ZeroWeights, node: p });
                    }
                    break;
                }
                _ => break,
            }
            match signal {
                Some(s) => v = s,
                None => break,
            }
        }
        match found {
            Some(f) => verdict = verdict.or(Some(f)),
            None => return None,
        }
    }
    verdict
}
