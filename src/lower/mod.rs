//! Lowering: rewrites the fused, contrib and quantised operators that
//! optimisers, quantisers and converters leave in a model into standard ONNX
//! operators, before the graph is built.
//!
//! Detection, classification and the run all see the lowered model, so a
//! residual merge that an optimiser folded into a `SkipLayerNormalization` or
//! a fused convolution is an `Add` again, and a quantised network has the
//! same structure as its float original.
//!
//! **Invariants:**
//! - every tensor name of the original model keeps its meaning: a rewritten
//!   node's outputs keep their names (and element types); tensors a rewrite
//!   adds get derived names that collide with nothing in the model;
//! - every node a rewrite emits records the node it came from ([`Origin`]);
//! - the node list stays topologically sorted (a rewrite replaces its node in
//!   place by nodes in dependency order);
//! - a model with nothing to lower is returned as it is, without a copy;
//! - lowering reads only the small constants its rules need (scales, zero
//!   points, attribute-like shapes) and the weights it must re-lay
//!   (blocked convolution weights); nothing else;
//! - a node a rule cannot lower because it is malformed is an error naming
//!   the node (exit 2); an op no rule knows is left alone.

mod emit;
pub mod precision;
mod rules;

use rustc_hash::{FxHashMap, FxHashSet};

use crate::error::{Error, ErrorKind, Result};
use crate::load::{ExternalData, attr};
use crate::proto::{ModelProto, NodeProto, OperatorSetIdProto, TensorProto};

pub use emit::Ctx;

/// The domain of onnxruntime's contrib operators.
pub const MS_DOMAIN: &str = "com.microsoft";
/// The domain of onnxruntime's blocked-layout (NCHWc) operators.
pub const NCHWC_DOMAIN: &str = "com.microsoft.nchwc";

/// The node a lowered node came from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Origin {
    /// Its name, or `{op_type}#{index}` when the model leaves it unnamed.
    pub name: String,
    /// Its op type.
    pub op_type: String,
    /// Its domain (empty for the default domain).
    pub domain: String,
    /// Its position in the original model's node list.
    pub index: usize,
}

/// What lowering may not work out from the model alone.
#[derive(Debug, Clone)]
pub struct LowerConfig {
    /// The NCHWc block size onnxruntime used when it wrote the model (8 or
    /// 16), for models whose shapes fit both; `None`: this machine's.
    pub nchwc_block: Option<i64>,
}

impl LowerConfig {
    /// Nothing given: NCHWc models whose shapes fit both block sizes are
    /// read with this machine's ([`machine_nchwc_block`]).
    pub const STANDARD: LowerConfig = LowerConfig { nchwc_block: None };

    /// [`LowerConfig::STANDARD`].
    pub fn standard() -> LowerConfig {
        LowerConfig::STANDARD
    }
}

/// The NCHWc block size onnxruntime's MLAS picks on this machine: 16 where
/// the CPU has AVX-512F, 8 on other x86-64 CPUs (onnxruntime 1.23 source,
/// MLAS platform set-up, read for this project; checked on an AVX-512 Xeon,
/// where a saved model came out with 16). `None` elsewhere: not checked.
pub fn machine_nchwc_block() -> Option<i64> {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx512f") { Some(16) } else { Some(8) }
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        None
    }
}

/// A model after lowering.
#[derive(Debug)]
pub struct Lowered {
    /// The lowered model (the original one when nothing was lowered).
    pub model: ModelProto,
    /// For each node of `model`'s main graph, in order: the node it came from,
    /// when a rewrite emitted it. Empty when nothing was lowered.
    pub origins: Vec<Option<Origin>>,
    /// Every rewritten node, in model order, with how many nodes replaced it.
    pub rewrites: Vec<(Origin, usize)>,
    /// What the analysis should know about how the model was read (an
    /// assumed NCHWc block size), once each.
    pub notes: Vec<crate::error::Diagnostic>,
}

impl Lowered {
    /// Whether any node was rewritten.
    pub fn changed(&self) -> bool {
        !self.rewrites.is_empty()
    }

    /// How many nodes of each `(domain, op_type)` were rewritten, sorted.
    pub fn summary(&self) -> Vec<(String, String, usize)> {
        let mut counts: std::collections::BTreeMap<(String, String), usize> = Default::default();
        for (o, _) in &self.rewrites {
            *counts.entry((o.domain.clone(), o.op_type.clone())).or_default() += 1;
        }
        counts.into_iter().map(|((d, op), n)| (d, op, n)).collect()
    }
}

/// What a rule makes of one node.
pub(crate) enum Rewrite {
    /// The node stays as it is.
    Keep,
    /// The node is replaced by these nodes (in dependency order).
    Into(Vec<NodeProto>),
}

/// A lowering rule: reads the node (and constants through `ctx`), and
/// returns its replacement. Errors name the node (use [`Ctx::bad`]).
pub(crate) type Rule = fn(&mut Ctx<'_>, &NodeProto) -> Result<Rewrite>;

/// Lowers every node a rule knows. Fast when there is nothing to do: one
/// look-up per node, no copy of the model.
pub fn lower(
    mut model: ModelProto,
    external: &ExternalData,
    config: &LowerConfig,
) -> Result<Lowered> {
    let Some(graph) = model.graph.as_ref() else {
        return Ok(Lowered { model, origins: Vec::new(), rewrites: Vec::new(), notes: Vec::new() });
    };
    if !graph.node.iter().any(|n| rules::find(&n.domain, &n.op_type).is_some()) {
        return Ok(Lowered { model, origins: Vec::new(), rewrites: Vec::new(), notes: Vec::new() });
    }
    let opset = default_opset(&model);
    let mut graph = model.graph.take().expect("checked above");
    let nodes = std::mem::take(&mut graph.node);
    // First pass: what each rule makes of its node; nothing is copied yet.
    let mut replaced: Vec<(usize, Origin, Vec<NodeProto>)> = Vec::new();
    let (initializers, needs_opset, notes) = {
        let mut ctx = Ctx::new(&graph, &nodes, opset, external);
        ctx.set_nchwc_block(config.nchwc_block);
        for (index, node) in nodes.iter().enumerate() {
            let Some(rule) = rules::find(&node.domain, &node.op_type) else { continue };
            ctx.begin(index, node);
            if let Rewrite::Into(emitted) = rule(&mut ctx, node)? {
                replaced.push((index, ctx.origin().clone(), emitted));
            }
        }
        ctx.finish()
    };
    if replaced.is_empty() {
        // Every rule kept its node: the model goes on as it came.
        graph.node = nodes;
        model.graph = Some(graph);
        return Ok(Lowered { model, origins: Vec::new(), rewrites: Vec::new(), notes });
    }
    // Second pass: the nodes moved into place, each replaced one by its nodes.
    let mut out: Vec<NodeProto> = Vec::with_capacity(nodes.len() + replaced.len() * 4);
    let mut origins: Vec<Option<Origin>> = Vec::with_capacity(out.capacity());
    let mut rewrites = Vec::with_capacity(replaced.len());
    let mut next = replaced.into_iter().peekable();
    for (index, node) in nodes.into_iter().enumerate() {
        match next.next_if(|(i, _, _)| *i == index) {
            Some((_, origin, emitted)) => {
                rewrites.push((origin.clone(), emitted.len()));
                origins.extend(std::iter::repeat_n(Some(origin), emitted.len()));
                out.extend(emitted);
            }
            None => {
                out.push(node);
                origins.push(None);
            }
        }
    }
    graph.node = out;
    graph.initializer.extend(initializers);
    model.graph = Some(graph);
    if needs_opset
        && !model.opset_import.iter().any(|o| o.domain.is_empty() || o.domain == "ai.onnx")
    {
        model.opset_import.push(OperatorSetIdProto { domain: String::new(), version: opset });
    }
    Ok(Lowered { model, origins, rewrites, notes })
}

/// The default domain's opset, or 17 (what rules emit for) when the model
/// imports none.
fn default_opset(model: &ModelProto) -> i64 {
    model
        .opset_import
        .iter()
        .find(|o| o.domain.is_empty() || o.domain == "ai.onnx")
        .map_or(17, |o| o.version)
}

/// Every name a graph uses, for collision-free derived names.
fn names_of(graph: &crate::proto::GraphProto, nodes: &[NodeProto]) -> FxHashSet<String> {
    let mut names = FxHashSet::default();
    for t in &graph.initializer {
        names.insert(t.name.clone());
    }
    for v in graph.input.iter().chain(&graph.output).chain(&graph.value_info) {
        names.insert(v.name.clone());
    }
    for n in nodes {
        names.extend(n.input.iter().cloned());
        names.extend(n.output.iter().cloned());
        if !n.name.is_empty() {
            names.insert(n.name.clone());
        }
    }
    names
}

/// A constant's tensor: an initializer or the `value` of a Constant node.
fn constants<'a>(
    graph: &'a crate::proto::GraphProto,
    nodes: &'a [NodeProto],
) -> FxHashMap<&'a str, &'a TensorProto> {
    let mut map = FxHashMap::with_capacity_and_hasher(graph.initializer.len(), Default::default());
    for t in &graph.initializer {
        map.insert(t.name.as_str(), t);
    }
    for n in nodes {
        if n.op_type == "Constant"
            && n.domain.is_empty()
            && let (Some(out), Some(t)) = (n.output.first(), attr::tensor(&n.attribute, "value"))
        {
            map.insert(out.as_str(), t);
        }
    }
    map
}

/// An error about a node that cannot be lowered as it stands.
pub(crate) fn malformed(origin: &Origin, message: impl std::fmt::Display) -> Error {
    let domain =
        if origin.domain.is_empty() { String::new() } else { format!("{}.", origin.domain) };
    Error::new(
        ErrorKind::Invalid,
        format!("node '{}' ({domain}{}): {message}", origin.name, origin.op_type),
    )
}
