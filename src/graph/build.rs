//! `ModelProto` → [`Graph`], in two passes: values and nodes first, then
//! every input wired by name. Unknown ops are kept as opaque nodes; only a
//! broken dataflow (a cycle, a tensor produced twice) stops the build.

use std::cmp::Reverse;
use std::collections::{BinaryHeap, HashMap};

use crate::error::{Diagnostic, Error, ErrorKind, Result, invalid};
use crate::graph::{Dim, Fact, Graph, Node, NodeId, Source, Value, ValueId, op, shape};
use crate::load::{ExternalData, attr};
use crate::proto::{ModelProto, TypeProto, type_proto};

/// Limits for building a graph.
#[derive(Debug, Clone)]
pub struct BuildConfig {
    /// The most nodes a main graph may have.
    pub max_nodes: usize,
}

/// Builds the dataflow graph of the model's main graph.
pub fn build(
    model: ModelProto,
    external: ExternalData,
    config: &BuildConfig,
) -> Result<(Graph, Vec<Diagnostic>)> {
    let mut diagnostics = Vec::new();
    let imported: Vec<String> = model.opset_import.iter().map(|o| o.domain.clone()).collect();
    let graph = model.graph.ok_or_else(|| invalid("the model has no graph"))?;
    if graph.node.len() > config.max_nodes {
        return Err(Error::new(
            ErrorKind::Limit,
            format!(
                "the graph has {} nodes, more than the limit of {} (raise it with --max-nodes)",
                graph.node.len(),
                config.max_nodes
            ),
        ));
    }

    // Sized up front: growing maps keyed by strings rehashes every name at
    // each doubling, and deep graphs have tens of thousands of values.
    let expected_values = graph.initializer.len()
        + graph.input.len()
        + graph.node.iter().map(|n| n.output.len()).sum::<usize>();
    let mut values: Vec<Value> = Vec::with_capacity(expected_values);
    let mut by_name: HashMap<String, ValueId> = HashMap::with_capacity(expected_values);
    let mut initializers = HashMap::with_capacity(graph.initializer.len());
    let new_value = |values: &mut Vec<Value>, name: &str, source: Source| {
        let id = ValueId(values.len() as u32);
        values.push(Value {
            name: name.to_owned(),
            source,
            consumers: Vec::new(),
            is_static: false,
            fact: Fact::default(),
        });
        id
    };

    for t in graph.initializer {
        if t.name.is_empty() {
            return Err(invalid("an initializer has an empty name"));
        }
        if by_name.contains_key(&t.name) {
            return Err(invalid(format!("initializer '{}' is defined twice", t.name)));
        }
        let id = new_value(&mut values, &t.name, Source::Initializer);
        values[id.0 as usize].is_static = true;
        values[id.0 as usize].fact =
            Fact { dtype: t.data_type, shape: Some(t.dims.iter().map(|&d| dim_of(d)).collect()) };
        by_name.insert(t.name.clone(), id);
        initializers.insert(id, t);
    }
    for s in graph.sparse_initializer {
        let Some(v) = s.values else { continue };
        let name = v.name.clone();
        if name.is_empty() || by_name.contains_key(&name) {
            return Err(invalid(format!(
                "sparse initializer '{name}' has an empty or repeated name"
            )));
        }
        let id = new_value(&mut values, &name, Source::Initializer);
        values[id.0 as usize].is_static = true;
        values[id.0 as usize].fact =
            Fact { dtype: v.data_type, shape: Some(s.dims.iter().map(|&d| dim_of(d)).collect()) };
        by_name.insert(name, id);
    }

    let mut inputs = Vec::new();
    for vi in &graph.input {
        if vi.name.is_empty() {
            return Err(invalid("a graph input has an empty name"));
        }
        match by_name.get(&vi.name) {
            // IR < 4 lists every initializer as an input too: it stays static.
            Some(&id) if values[id.0 as usize].source == Source::Initializer => continue,
            Some(_) => return Err(invalid(format!("graph input '{}' is declared twice", vi.name))),
            None => {}
        }
        let id = new_value(&mut values, &vi.name, Source::Input);
        values[id.0 as usize].fact = fact_of(vi.r#type.as_ref());
        by_name.insert(vi.name.clone(), id);
        inputs.push(id);
    }

    // First pass: nodes and their outputs.
    let mut nodes = Vec::with_capacity(graph.node.len());
    let mut input_names = Vec::with_capacity(graph.node.len());
    for (index, n) in graph.node.into_iter().enumerate() {
        let node_id = NodeId(index as u32);
        let named = !n.name.is_empty();
        let name = if named { n.name.clone() } else { format!("{}#{index}", n.op_type) };
        if n.output.is_empty() {
            // Every operator of the ONNX specification and of onnxruntime's
            // contrib list declares at least one output (recalled from both
            // documents, not from check-values); the stages below rely on a
            // node's first output slot existing. Found by fuzzing decode_scan.
            return Err(invalid(format!("node '{name}' ({}) has no outputs", n.op_type)));
        }
        let mut outputs = Vec::with_capacity(n.output.len());
        for (slot, out) in n.output.iter().enumerate() {
            if out.is_empty() {
                // An omitted optional output still takes its slot.
                outputs.push(new_value(&mut values, "", Source::Node(node_id, slot)));
                continue;
            }
            if let Some(&prev) = by_name.get(out) {
                let by = match values[prev.0 as usize].source {
                    Source::Node(p, _) => format!(
                        "node '{}'",
                        nodes.get(p.0 as usize).map_or("?", |p: &Node| &p.name)
                    ),
                    Source::Initializer => "an initializer".to_owned(),
                    Source::Input => "a graph input".to_owned(),
                    Source::Missing => "nothing".to_owned(),
                };
                return Err(invalid(format!(
                    "tensor '{out}' is produced twice: by {by} and by node '{name}'"
                )));
            }
            let id = new_value(&mut values, out, Source::Node(node_id, slot));
            by_name.insert(out.clone(), id);
            outputs.push(id);
        }
        let subgraphs = attr::subgraphs(&n).count();
        input_names.push(n.input);
        nodes.push(Node {
            name,
            named,
            index,
            op: n.op_type,
            domain: n.domain,
            inputs: Vec::new(),
            outputs,
            attrs: n.attribute,
            subgraphs,
            origin: None,
        });
    }

    unknown_ops(&nodes, &imported, &mut diagnostics);

    // Second pass: wire inputs by name.
    for (index, names) in input_names.into_iter().enumerate() {
        let node_id = NodeId(index as u32);
        let mut wired = Vec::with_capacity(names.len());
        for (slot, name) in names.iter().enumerate() {
            if name.is_empty() {
                wired.push(None);
                continue;
            }
            let id = match by_name.get(name) {
                Some(&id) => id,
                None => {
                    diagnostics.push(Diagnostic::warning(
                        Some(&nodes[index].name),
                        format!("input '{name}' is produced by nothing in the graph"),
                    ));
                    let id = new_value(&mut values, name, Source::Missing);
                    by_name.insert(name.clone(), id);
                    id
                }
            };
            values[id.0 as usize].consumers.push((node_id, slot));
            wired.push(Some(id));
        }
        nodes[index].inputs = wired;
    }

    let mut outputs = Vec::new();
    for vi in &graph.output {
        match by_name.get(&vi.name) {
            Some(&id) => {
                if values[id.0 as usize].fact.shape.is_none() {
                    values[id.0 as usize].fact = fact_of(vi.r#type.as_ref());
                }
                outputs.push(id);
            }
            None => diagnostics.push(Diagnostic::warning(
                None,
                format!("graph output '{}' is produced by nothing in the graph", vi.name),
            )),
        }
    }
    for vi in &graph.value_info {
        if let Some(&id) = by_name.get(&vi.name) {
            let v = &mut values[id.0 as usize];
            if v.fact.shape.is_none() {
                v.fact = fact_of(vi.r#type.as_ref());
            }
        }
    }

    let order = topological_order(&nodes, &values)?;
    let mut rank = vec![0u32; nodes.len()];
    for (i, n) in order.iter().enumerate() {
        rank[n.0 as usize] = i as u32;
    }

    let mut g = Graph {
        name: graph.name,
        nodes,
        values,
        inputs,
        outputs,
        order,
        rank,
        initializers,
        external,
    };
    mark_static(&mut g);
    shape::infer(&mut g);
    debug_assert!(g.validate().is_ok(), "{:?}", g.validate());
    Ok((g, diagnostics))
}

/// One note per op that is neither standard ONNX nor of a known operator set
/// (it stays an opaque node), naming its first node and how many there are.
fn unknown_ops(nodes: &[Node], imported: &[String], diagnostics: &mut Vec<Diagnostic>) {
    let mut seen: Vec<(&str, &str, &str, usize)> = Vec::new();
    for n in nodes.iter().filter(|n| !op::is_known(&n.domain, &n.op)) {
        match seen.iter_mut().find(|s| s.0 == n.domain && s.1 == n.op) {
            Some(s) => s.3 += 1,
            None => seen.push((&n.domain, &n.op, &n.name, 1)),
        }
    }
    for (domain, op, first, count) in seen {
        let nodes = if count == 1 { "1 node".to_owned() } else { format!("{count} nodes") };
        let message = if domain.is_empty() || domain == "ai.onnx" {
            format!("op '{op}' ({nodes}) is not an ONNX operator: kept as an opaque node")
        } else {
            let import = if imported.iter().any(|d| d == domain) {
                ""
            } else {
                ", and the model does not import that domain"
            };
            format!(
                "op '{op}' of domain '{domain}' ({nodes}) is not an operator shunt knows: kept as an opaque node{import}"
            )
        };
        diagnostics.push(Diagnostic::note(Some(first), message));
    }
}

/// Kahn's algorithm, taking ready nodes in model order, so a model that is
/// already sorted (as the IR requires, [O4]) keeps its order.
fn topological_order(nodes: &[Node], values: &[Value]) -> Result<Vec<NodeId>> {
    let mut pending = vec![0usize; nodes.len()];
    for (i, n) in nodes.iter().enumerate() {
        pending[i] = n
            .inputs
            .iter()
            .flatten()
            .filter(|v| matches!(values[v.0 as usize].source, Source::Node(..)))
            .count();
    }
    let mut ready: BinaryHeap<Reverse<u32>> =
        (0..nodes.len()).filter(|&i| pending[i] == 0).map(|i| Reverse(i as u32)).collect();
    let mut order = Vec::with_capacity(nodes.len());
    while let Some(Reverse(i)) = ready.pop() {
        order.push(NodeId(i));
        for out in &nodes[i as usize].outputs {
            for &(c, _) in &values[out.0 as usize].consumers {
                pending[c.0 as usize] -= 1;
                if pending[c.0 as usize] == 0 {
                    ready.push(Reverse(c.0));
                }
            }
        }
    }
    if order.len() < nodes.len() {
        let stuck = (0..nodes.len()).find(|&i| pending[i] > 0).map(|i| &nodes[i]);
        let what =
            stuck.map_or(String::new(), |n| format!(" through node '{}' ({})", n.name, n.op));
        return Err(invalid(format!("the graph has a cycle{what}")));
    }
    Ok(order)
}

/// A value is static when everything it derives from is: initializers,
/// Constant nodes, and the shape metadata of tensors (Shape, Size).
fn mark_static(g: &mut Graph) {
    for i in 0..g.order.len() {
        let n = g.order[i];
        let node = &g.nodes[n.0 as usize];
        let is_static = match node.op.as_str() {
            "Shape" | "Size" => true,
            // Random generators with no input carry no signal from the model input.
            "RandomNormal" | "RandomUniform" => true,
            _ => node.inputs.iter().flatten().all(|v| g.values[v.0 as usize].is_static),
        };
        // A node with subgraphs may read outer signals inside its body.
        let is_static = is_static && node.subgraphs == 0;
        for out in node.outputs.clone() {
            g.values[out.0 as usize].is_static = is_static;
        }
    }
}

fn dim_of(d: i64) -> Dim {
    if d >= 0 { Dim::Known(d as u64) } else { Dim::Unknown }
}

fn fact_of(t: Option<&TypeProto>) -> Fact {
    let Some(TypeProto { value: Some(type_proto::Value::TensorType(tt)), .. }) = t else {
        return Fact::default();
    };
    let shape = tt.shape.as_ref().map(|s| {
        s.dim
            .iter()
            .map(|d| match &d.value {
                Some(crate::proto::tensor_shape_proto::dimension::Value::DimValue(v)) => dim_of(*v),
                Some(crate::proto::tensor_shape_proto::dimension::Value::DimParam(p))
                    if !p.is_empty() =>
                {
                    Dim::Symbol(p.clone())
                }
                _ => Dim::Unknown,
            })
            .collect()
    });
    Fact { dtype: tt.elem_type, shape }
}
