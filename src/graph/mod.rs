//! The dataflow graph of a model's main graph: ops as nodes, tensors as
//! values, with what is known of each value's type and shape.
//!
//! **Invariant:** every value has at most one producer; [`Graph::order`] is a
//! topological order of all nodes; a value is *static* exactly when it derives
//! only from initializers, Constant nodes or shape metadata.

mod body;
mod build;
pub mod op;
mod order;
mod shape;

use std::collections::HashMap;

use crate::load::ExternalData;
use crate::load::tensor;
use crate::proto::{AttributeProto, TensorProto};

pub use body::{BodyModel, body_model, free_names};
pub use build::{BuildConfig, build};
pub use order::Dominance;

/// Index of a node in [`Graph::nodes`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct NodeId(pub u32);

/// Index of a value in [`Graph::values`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct ValueId(pub u32);

/// One ONNX node.
#[derive(Debug, Clone)]
pub struct Node {
    /// The node's name, or a synthesized `"{op_type}#{index}"` when unnamed.
    pub name: String,
    /// Whether `name` came from the model.
    pub named: bool,
    /// Position in the model's node list.
    pub index: usize,
    /// The ONNX op type.
    pub op: String,
    /// The op's domain (empty for the default domain).
    pub domain: String,
    /// Inputs by slot; `None` for an omitted optional input.
    pub inputs: Vec<Option<ValueId>>,
    /// Outputs by slot.
    pub outputs: Vec<ValueId>,
    /// The node's attributes.
    pub attrs: Vec<AttributeProto>,
    /// Number of subgraphs the node carries (If, Loop, Scan).
    pub subgraphs: usize,
    /// The model's node this one was lowered from, if a rewrite emitted it.
    pub origin: Option<crate::lower::Origin>,
}

/// Where a value comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Source {
    /// A graph input that is not also an initializer.
    Input,
    /// An initializer.
    Initializer,
    /// The output of a node.
    Node(NodeId, usize),
    /// Nothing in the graph produces it (a dangling reference).
    Missing,
}

/// One dimension of a shape.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum Dim {
    /// A known size.
    Known(u64),
    /// A named symbolic size (`N`, `batch`, `seq`).
    Symbol(String),
    /// Nothing is known.
    Unknown,
}

impl std::fmt::Display for Dim {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Dim::Known(n) => write!(f, "{n}"),
            Dim::Symbol(s) => f.write_str(s),
            Dim::Unknown => f.write_str("?"),
        }
    }
}

/// What is known of a value's type.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct Fact {
    /// ONNX element type number (`0` when unknown).
    pub dtype: i32,
    /// The shape, when at least the rank is known.
    pub shape: Option<Vec<Dim>>,
}

/// One tensor.
#[derive(Debug, Clone)]
pub struct Value {
    /// The ONNX tensor name.
    pub name: String,
    /// Where it comes from.
    pub source: Source,
    /// `(node, input slot)` of every consumer, in node order.
    pub consumers: Vec<(NodeId, usize)>,
    /// Derives only from initializers, constants or shape metadata.
    pub is_static: bool,
    /// Type and shape.
    pub fact: Fact,
}

/// A model's main graph.
#[derive(Debug)]
pub struct Graph {
    /// Graph name.
    pub name: String,
    /// Nodes in model order.
    pub nodes: Vec<Node>,
    /// Values.
    pub values: Vec<Value>,
    /// Graph inputs that are not initializers, in order.
    pub inputs: Vec<ValueId>,
    /// Graph outputs, in order.
    pub outputs: Vec<ValueId>,
    /// A topological order of all nodes.
    pub order: Vec<NodeId>,
    /// Position of each node in `order`.
    pub rank: Vec<u32>,
    initializers: HashMap<ValueId, TensorProto>,
    external: ExternalData,
}

impl Graph {
    /// Records, for each node in model order, the node it was lowered from
    /// ([`crate::lower::Lowered::origins`]; empty when nothing was lowered).
    pub fn set_origins(&mut self, origins: Vec<Option<crate::lower::Origin>>) {
        for (node, origin) in self.nodes.iter_mut().zip(origins) {
            node.origin = origin;
        }
    }

    /// A node by id.
    pub fn node(&self, id: NodeId) -> &Node {
        &self.nodes[id.0 as usize]
    }

    /// A value by id.
    pub fn value(&self, id: ValueId) -> &Value {
        &self.values[id.0 as usize]
    }

    /// The node that produces a value, if any.
    pub fn producer(&self, id: ValueId) -> Option<NodeId> {
        match self.value(id).source {
            Source::Node(n, _) => Some(n),
            _ => None,
        }
    }

    /// The non-static inputs of a node, in slot order.
    pub fn signal_inputs(&self, id: NodeId) -> impl Iterator<Item = ValueId> + '_ {
        self.node(id).inputs.iter().flatten().copied().filter(|&v| !self.value(v).is_static)
    }

    /// The input in `slot`, if present.
    pub fn input(&self, id: NodeId, slot: usize) -> Option<ValueId> {
        self.node(id).inputs.get(slot).copied().flatten()
    }

    /// The initializer tensor behind a value, if it is one.
    pub fn initializer(&self, id: ValueId) -> Option<&TensorProto> {
        self.initializers.get(&id)
    }

    /// Lets go of the initializers (the decoded weights) and the nodes'
    /// attributes, once the analysis has read what it needs of them: names,
    /// op types, shapes, facts and structure stay; constants and attributes
    /// read as absent from then on.
    pub fn release_payloads(&mut self) {
        self.initializers = HashMap::new();
        for n in &mut self.nodes {
            n.attrs = Vec::new();
        }
    }

    /// The tensor a static value takes, when it is an initializer or the
    /// output of a Constant node, possibly behind shape-only ops (Reshape,
    /// Unsqueeze, Squeeze, Flatten, Identity, Cast).
    pub fn constant_tensor(&self, id: ValueId) -> Option<&TensorProto> {
        let mut v = id;
        for _ in 0..8 {
            if let Some(t) = self.initializer(v) {
                return Some(t);
            }
            let n = self.node(self.producer(v)?);
            match n.op.as_str() {
                "Constant" => return crate::load::attr::tensor(&n.attrs, "value"),
                "Reshape" | "Unsqueeze" | "Squeeze" | "Flatten" | "Identity" | "Cast" => {
                    v = n.inputs.first().copied().flatten()?;
                }
                _ => return None,
            }
        }
        None
    }

    /// The values of a static float tensor (see [`Graph::constant_tensor`]),
    /// when it holds at most `max_bytes` of payload.
    pub fn constant_f32(&self, id: ValueId, max_bytes: u64) -> Option<Vec<f32>> {
        let t = self.constant_tensor(id)?;
        tensor::read_f32(t, &self.external, max_bytes).ok()
    }

    /// The values of a static integer tensor: shapes, axes, pads.
    pub fn constant_i64(&self, id: ValueId) -> Option<Vec<i64>> {
        let t = self.constant_tensor(id)?;
        tensor::read_i64(t, &self.external, 1 << 16).ok()
    }

    /// The dims of a static tensor, when known without reading it.
    pub fn constant_dims(&self, id: ValueId) -> Option<&[i64]> {
        self.constant_tensor(id).map(|t| t.dims.as_slice())
    }

    /// The shape of a value, if known.
    pub fn shape(&self, id: ValueId) -> Option<&[Dim]> {
        self.value(id).fact.shape.as_deref()
    }

    /// Consumers of a value that are not fed only static data (all consumers,
    /// since a consumer of a signal is itself on the signal path).
    pub fn consumers(&self, id: ValueId) -> impl Iterator<Item = NodeId> + '_ {
        self.value(id).consumers.iter().map(|&(n, _)| n)
    }

    /// Whether `id` is one of the graph's outputs.
    pub fn is_output(&self, id: ValueId) -> bool {
        self.outputs.contains(&id)
    }

    /// Checks the invariants of the graph (one producer per value, the order
    /// is topological); used by tests and debug builds.
    pub fn validate(&self) -> crate::error::Result<()> {
        for (i, v) in self.values.iter().enumerate() {
            if let Source::Node(n, slot) = v.source
                && self.node(n).outputs.get(slot) != Some(&ValueId(i as u32))
            {
                return Err(crate::error::invalid(format!(
                    "value '{}' names a producer that does not list it",
                    v.name
                )));
            }
        }
        if self.order.len() != self.nodes.len() {
            return Err(crate::error::invalid("the order does not hold every node"));
        }
        for &n in &self.order {
            for v in self.node(n).inputs.iter().flatten() {
                if let Some(p) = self.producer(*v)
                    && self.rank[p.0 as usize] >= self.rank[n.0 as usize]
                {
                    return Err(crate::error::invalid(format!(
                        "node '{}' comes before its input '{}'",
                        self.node(n).name,
                        self.value(*v).name
                    )));
                }
            }
        }
        Ok(())
    }
}
