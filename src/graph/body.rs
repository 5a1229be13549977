//! The body of a control-flow node (an `If` branch, a `Loop` or `Scan`
//! body) as a model of its own, so that it can be analysed like a main
//! graph: the outer-scope tensors it reads become its inputs, typed with
//! what the outer graph knows of them, and outer weights it reads become
//! its initializers (they stay static, as they are outside).

use std::collections::{HashMap, HashSet};

use crate::graph::{Dim, Fact, Graph, Source};
use crate::load::attr;
use crate::proto::tensor_shape_proto::{Dimension, dimension};
use crate::proto::{
    GraphProto, ModelProto, OperatorSetIdProto, TensorShapeProto, TypeProto, ValueInfoProto,
    type_proto,
};

/// A body made into a model.
#[derive(Debug)]
pub struct BodyModel {
    /// The model: the body's nodes, its own inputs first, then one input
    /// (or initializer) per outer tensor it reads.
    pub model: ModelProto,
    /// The outer tensors the body reads, in order of first use.
    pub captured: Vec<String>,
}

/// The names a graph reads from the scopes around it: every node input
/// (and every name its own subgraphs read from outside) that the graph
/// neither declares as an input or initializer nor produces, in order of
/// first use.
pub fn free_names(body: &GraphProto) -> Vec<String> {
    let mut local: HashSet<&str> = HashSet::new();
    local.extend(body.input.iter().map(|i| i.name.as_str()));
    local.extend(body.initializer.iter().map(|t| t.name.as_str()));
    local.extend(
        body.sparse_initializer.iter().filter_map(|s| s.values.as_ref()).map(|v| v.name.as_str()),
    );
    for n in &body.node {
        local.extend(n.output.iter().map(String::as_str));
    }
    let mut seen: HashSet<String> = HashSet::new();
    let mut free = Vec::new();
    let mut take = |name: &str, free: &mut Vec<String>| {
        if !name.is_empty() && !local.contains(name) && seen.insert(name.to_owned()) {
            free.push(name.to_owned());
        }
    };
    for n in &body.node {
        for i in &n.input {
            take(i, &mut free);
        }
        for (_, g) in attr::graphs(&n.attribute) {
            for name in free_names(g) {
                take(&name, &mut free);
            }
        }
    }
    for o in &body.output {
        take(&o.name, &mut free);
    }
    free
}

/// The body `body` of a node of `outer`, as a model with the outer model's
/// IR version and operator sets.
pub fn body_model(
    outer: &Graph,
    body: &GraphProto,
    ir_version: i64,
    opsets: &[OperatorSetIdProto],
) -> BodyModel {
    let by_name: HashMap<&str, usize> =
        outer.values.iter().enumerate().map(|(i, v)| (v.name.as_str(), i)).collect();
    let captured = free_names(body);
    let mut graph = body.clone();
    for name in &captured {
        let value = by_name.get(name.as_str()).map(|&i| &outer.values[i]);
        // An outer weight stays a weight: its tensor, under the name the body reads.
        let tensor = value.filter(|v| v.is_static).and_then(|v| {
            let id = crate::graph::ValueId(by_name[name.as_str()] as u32);
            match v.source {
                Source::Initializer => outer.initializer(id),
                Source::Node(n, _) if outer.node(n).op == "Constant" => {
                    attr::tensor(&outer.node(n).attrs, "value")
                }
                _ => None,
            }
        });
        match tensor {
            Some(t) => {
                let mut t = t.clone();
                t.name.clone_from(name);
                graph.initializer.push(t);
            }
            None => graph.input.push(value_info(name, value.map(|v| &v.fact))),
        }
    }
    let model = ModelProto {
        ir_version,
        opset_import: opsets.to_vec(),
        graph: Some(graph),
        ..ModelProto::default()
    };
    BodyModel { model, captured }
}

/// A graph input declaring what the outer graph knows of a tensor.
fn value_info(name: &str, fact: Option<&Fact>) -> ValueInfoProto {
    let fact = fact.cloned().unwrap_or_default();
    let shape = fact.shape.map(|dims| TensorShapeProto {
        dim: dims
            .iter()
            .map(|d| Dimension {
                value: match d {
                    Dim::Known(n) => Some(dimension::Value::DimValue(*n as i64)),
                    Dim::Symbol(s) => Some(dimension::Value::DimParam(s.clone())),
                    Dim::Unknown => None,
                },
                ..Dimension::default()
            })
            .collect(),
    });
    ValueInfoProto {
        name: name.to_owned(),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: fact.dtype,
                shape,
            })),
            ..TypeProto::default()
        }),
        ..ValueInfoProto::default()
    }
}
