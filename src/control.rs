//! Control flow for the run: which blocks inside the bodies of `If` and
//! `Scan` nodes the engine can measure, and the surgery on the decoded model
//! that lets it. tract runs a body as one op, with a plan of its own, so
//! the tensors inside it never reach the evaluation callback; two rewrites
//! bring them out, and every other block says why it was not measured:
//!
//! - an `If` whose condition does not depend on the samples (a scalar sample
//!   rate, a flag) takes one branch for the whole run: the condition is
//!   computed with tract from the inputs fed, and the taken branch is
//!   inlined in place of the node (its tensors keep their names; an
//!   `Identity` gives each branch output the `If` output's name). The other
//!   branch's blocks are not measured: it does not run.
//! - a `Scan` body's watched tensors become extra scan outputs (through an
//!   `Identity` in the body), stacked over the steps on the axis after the
//!   samples, so a block inside the body is measured over all its steps,
//!   per sample.
//!
//! **Invariant:** only the rewritten node changes (an `If` replaced by its
//! taken branch, a `Scan` with more outputs and its body with more nodes and
//! outputs); every tensor of the model keeps its name and its values.

use std::collections::{HashMap, HashSet};
use std::path::Path;

use prost::Message;

use crate::graph::Dim;
use crate::open::{Analysis, Body};
use crate::probe::inputs::InputPlan;
use crate::probe::{ModelSource, Watch, evaluate};
use crate::proto::attribute_proto::AttributeType;
use crate::proto::{AttributeProto, GraphProto, ModelProto, NodeProto, ValueInfoProto};

/// For each body of the analysis (in order), the watches of its blocks
/// (tensor names as the rewritten model has them), or why its blocks are
/// not measured.
pub type BodyWatches = Vec<std::result::Result<Vec<Watch>, String>>;

/// Rewrites `model` so that the engine exposes the blocks of the bodies it
/// can, and returns what to watch for each body's blocks. `watches` gives
/// each body's watches by the body's own tensor names. `dir` is where
/// external data resolves, for the small model that computes a condition.
pub fn unfold(
    model: &mut ModelProto,
    analysis: &Analysis,
    watches: &[Vec<Watch>],
    input_plan: &InputPlan,
    dir: Option<&Path>,
) -> BodyWatches {
    unname_scan_dims(model);
    let mut out: BodyWatches = Vec::with_capacity(analysis.bodies.len());
    // The branch each `If` of the main graph takes, by node index.
    let mut taken: HashMap<usize, std::result::Result<String, String>> = HashMap::new();
    for (body, watch) in analysis.bodies.iter().zip(watches) {
        if body.analysis.detection.blocks.is_empty() {
            out.push(Ok(Vec::new()));
            continue;
        }
        out.push(plan_body(model, analysis, body, watch, input_plan, dir, &mut taken));
    }
    // Inline the taken branches last, from the end of the node list, so the
    // indices of the others hold.
    let mut inline: Vec<(usize, String)> =
        taken.into_iter().filter_map(|(index, branch)| branch.ok().map(|b| (index, b))).collect();
    inline.sort_by_key(|b| std::cmp::Reverse(b.0));
    for (index, branch) in inline {
        if let Err(why) = inline_if(model, index, &branch) {
            for (body, slot) in analysis.bodies.iter().zip(out.iter_mut()) {
                let step = &body.scope[0];
                if step.index == index && step.attribute == branch && slot.is_ok() {
                    *slot = Err(why.clone());
                }
            }
        }
    }
    out
}

fn plan_body(
    model: &mut ModelProto,
    analysis: &Analysis,
    body: &Body,
    watch: &[Watch],
    input_plan: &InputPlan,
    dir: Option<&Path>,
    taken: &mut HashMap<usize, std::result::Result<String, String>>,
) -> std::result::Result<Vec<Watch>, String> {
    let step = &body.scope[0];
    let node = format!("{} '{}'", step.op, step.node);
    if body.scope.len() > 1 {
        return Err(format!(
            "inside a body nested in {node}'s: tract runs the outer body as one op, and shunt \
             brings out only bodies of the main graph"
        ));
    }
    match step.op.as_str() {
        "If" => {
            let branch = taken
                .entry(step.index)
                .or_insert_with(|| branch_taken(model, analysis, step.index, input_plan, dir))
                .clone()?;
            if branch == step.attribute {
                Ok(watch.to_vec())
            } else {
                Err(format!(
                    "{node} takes {branch} for the inputs fed: {} does not run",
                    step.attribute
                ))
            }
        }
        "Scan" => expose_scan(model, analysis, body, watch, input_plan),
        "Loop" => Err(format!("{node}: tract-onnx 0.23.9 has no Loop operator")),
        op => Err(format!("{node}: tract runs the body of {op} as one op")),
    }
}

/// The branch the `If` at `index` of the main graph takes for the inputs
/// fed, computed by tract from the nodes its condition depends on; an error
/// when the condition depends on the samples (each could take another
/// branch) or cannot be computed.
fn branch_taken(
    model: &ModelProto,
    analysis: &Analysis,
    index: usize,
    input_plan: &InputPlan,
    dir: Option<&Path>,
) -> std::result::Result<String, String> {
    let graph = model.graph.as_ref().ok_or("the model has no graph")?;
    let node = graph.node.get(index).filter(|n| n.op_type == "If").ok_or("the If node moved")?;
    let what = format!("If '{}'", analysis.graph.nodes[index].name);
    let cond = node.input.first().filter(|c| !c.is_empty()).ok_or("the If has no condition")?;
    let slice = condition_model(model, cond)
        .ok_or_else(|| format!("{what}: its condition depends on a node with a body"))?;
    let inputs: Vec<&str> = slice
        .graph
        .as_ref()
        .map(|g| g.input.iter().map(|i| i.name.as_str()).collect())
        .unwrap_or_default();
    if let Some(batched) = input_plan
        .inputs
        .iter()
        .find(|i| i.batch_axis.is_some() && inputs.contains(&i.name.as_str()))
    {
        return Err(format!(
            "{what}: its condition depends on the samples of input '{}', so each sample may \
             take another branch",
            batched.name
        ));
    }
    let bytes = slice.encode_to_vec();
    let source = match dir {
        Some(d) => ModelSource::BytesIn(&bytes, d),
        None => ModelSource::Bytes(&bytes),
    };
    let values = evaluate(source, input_plan)
        .map_err(|e| format!("{what}: its condition could not be computed: {}", e.message()))?;
    match values.as_slice() {
        [v] => Ok(if *v != 0.0 { "then_branch" } else { "else_branch" }.to_owned()),
        _ => Err(format!("{what}: its condition is not one value")),
    }
}

/// The nodes of the main graph `cond` depends on, with the inputs and
/// initializers they read, as a model whose one output is `cond`; `None`
/// when a node with a body is among them.
fn condition_model(model: &ModelProto, cond: &str) -> Option<ModelProto> {
    let graph = model.graph.as_ref()?;
    let producer: HashMap<&str, usize> = graph
        .node
        .iter()
        .enumerate()
        .flat_map(|(i, n)| n.output.iter().map(move |o| (o.as_str(), i)))
        .collect();
    let mut keep: HashSet<usize> = HashSet::new();
    let mut names: HashSet<&str> = HashSet::new();
    let mut stack = vec![cond];
    while let Some(name) = stack.pop() {
        if !names.insert(name) {
            continue;
        }
        if let Some(&i) = producer.get(name)
            && keep.insert(i)
        {
            let n = &graph.node[i];
            if n.attribute.iter().any(|a| a.g.is_some() || !a.graphs.is_empty()) {
                return None;
            }
            stack.extend(n.input.iter().map(String::as_str).filter(|s| !s.is_empty()));
        }
    }
    let mut order: Vec<usize> = keep.into_iter().collect();
    order.sort_unstable();
    let output = ValueInfoProto { name: cond.to_owned(), ..ValueInfoProto::default() };
    let slice = GraphProto {
        name: "condition".to_owned(),
        node: order.iter().map(|&i| graph.node[i].clone()).collect(),
        input: graph.input.iter().filter(|i| names.contains(i.name.as_str())).cloned().collect(),
        initializer: graph
            .initializer
            .iter()
            .filter(|t| names.contains(t.name.as_str()))
            .cloned()
            .collect(),
        output: vec![output],
        ..GraphProto::default()
    };
    Some(ModelProto {
        ir_version: model.ir_version,
        opset_import: model.opset_import.clone(),
        graph: Some(slice),
        ..ModelProto::default()
    })
}

/// Replaces the `If` at `index` by the nodes of its `branch`; an error when
/// a name the branch defines is defined outside it too.
fn inline_if(
    model: &mut ModelProto,
    index: usize,
    branch: &str,
) -> std::result::Result<(), String> {
    let graph = model.graph.as_mut().ok_or("the model has no graph")?;
    let node = graph.node.get(index).ok_or("the If node moved")?.clone();
    let body = node
        .attribute
        .iter()
        .find(|a| a.name == branch)
        .and_then(|a| a.g.clone())
        .ok_or_else(|| format!("If '{}' has no {branch}", node.name))?;
    let mut outside: HashSet<&str> = HashSet::new();
    for (i, n) in graph.node.iter().enumerate() {
        if i != index {
            outside.extend(n.output.iter().map(String::as_str));
        }
    }
    outside.extend(graph.initializer.iter().map(|t| t.name.as_str()));
    outside.extend(graph.input.iter().map(|t| t.name.as_str()));
    let defined = body
        .node
        .iter()
        .flat_map(|n| n.output.iter())
        .chain(body.initializer.iter().map(|t| &t.name));
    if let Some(clash) = defined.filter(|n| !n.is_empty()).find(|n| outside.contains(n.as_str())) {
        return Err(format!(
            "If '{}': its {branch} defines '{clash}', a name the main graph uses too, so it \
             cannot be brought into the main graph",
            node.name
        ));
    }
    let mut nodes = body.node;
    for (k, (inner, outer)) in body.output.iter().zip(&node.output).enumerate() {
        if outer.is_empty() {
            continue;
        }
        nodes.push(NodeProto {
            op_type: "Identity".to_owned(),
            name: format!("{}/shunt/{branch}/{k}", node.name),
            input: vec![inner.name.clone()],
            output: vec![outer.clone()],
            ..NodeProto::default()
        });
    }
    graph.node.splice(index..=index, nodes);
    graph.initializer.extend(body.initializer);
    graph.value_info.extend(body.value_info);
    Ok(())
}

/// Makes every watched tensor of a `Scan` body an extra scan output and
/// returns the watches by those outputs' names.
fn expose_scan(
    model: &mut ModelProto,
    analysis: &Analysis,
    body: &Body,
    watch: &[Watch],
    input_plan: &InputPlan,
) -> std::result::Result<Vec<Watch>, String> {
    let step = &body.scope[0];
    let what = format!("Scan '{}'", step.node);
    let g = &body.analysis.graph;
    let by_name: HashMap<&str, usize> =
        g.values.iter().enumerate().map(|(i, v)| (v.name.as_str(), i)).collect();
    // The samples of one pass lie on the first axis of every watched tensor
    // inside the body (a symbol the main graph's inputs hold on their sample
    // axis), or there is one sample per pass.
    let sample_symbols: HashSet<&str> = input_plan
        .inputs
        .iter()
        .filter_map(|p| {
            let axis = p.batch_axis?;
            let v =
                analysis.graph.inputs.iter().find(|&&v| analysis.graph.value(v).name == p.name)?;
            match analysis.graph.shape(*v)?.get(axis)? {
                Dim::Symbol(s) => Some(s.as_str()),
                _ => None,
            }
        })
        .collect();
    let names: Vec<&str> = watch
        .iter()
        .flat_map(|w| {
            [w.fork.as_str(), w.shortcut.as_str(), w.output.as_str()]
                .into_iter()
                .chain(w.branch.iter().map(String::as_str))
        })
        .collect();
    if input_plan.pass_batch > 1 {
        for name in &names {
            let first =
                by_name.get(name).and_then(|&i| g.values[i].fact.shape.as_ref()?.first().cloned());
            let on_samples =
                matches!(&first, Some(Dim::Symbol(s)) if sample_symbols.contains(s.as_str()));
            if !on_samples {
                return Err(format!(
                    "{what}: inside its body, the samples' axis of tensor '{name}' is not known \
                     (one sample per pass measures it: --dim on the batch symbol set to 1)"
                ));
            }
        }
    }
    let axis = i64::from(input_plan.pass_batch > 1);
    let graph = model.graph.as_mut().ok_or("the model has no graph")?;
    let mut taken: HashSet<String> = HashSet::new();
    collect_names(graph, &mut taken);
    let node = graph
        .node
        .get_mut(step.index)
        .filter(|n| n.op_type == "Scan")
        .ok_or_else(|| format!("{what} moved"))?;
    let mut exposed: HashMap<String, String> = HashMap::new();
    let mut unique: Vec<&str> = Vec::new();
    for n in &names {
        if !unique.contains(n) {
            unique.push(n);
        }
    }
    let existing_outputs = {
        let body = node_body(node).ok_or_else(|| format!("{what} has no body"))?;
        body.output.len()
    };
    let states = node.input.len().saturating_sub(
        crate::load::attr::int(&node.attribute, "num_scan_inputs").unwrap_or(0) as usize,
    );
    let scan_outputs_before = existing_outputs.saturating_sub(states);
    let mut new_nodes = Vec::new();
    let mut new_outputs = Vec::new();
    for (k, name) in unique.iter().enumerate() {
        let inner = format!("{name}/shunt/step");
        let outer = format!("{name}/shunt/steps");
        if taken.contains(&inner) || taken.contains(&outer) {
            return Err(format!("{what}: the name '{outer}' is taken"));
        }
        new_nodes.push(NodeProto {
            op_type: "Identity".to_owned(),
            name: format!("{}/shunt/expose/{k}", step.node),
            input: vec![(*name).to_owned()],
            output: vec![inner.clone()],
            ..NodeProto::default()
        });
        let dtype = by_name.get(name).map_or(0, |&i| g.values[i].fact.dtype);
        new_outputs.push(value_info(&inner, dtype));
        exposed.insert((*name).to_owned(), outer);
    }
    let body = node_body_mut(node).ok_or_else(|| format!("{what} has no body"))?;
    body.node.extend(new_nodes);
    body.output.extend(new_outputs);
    for name in &unique {
        node.output.push(exposed[*name].clone());
    }
    let added = unique.len();
    extend_ints(node, "scan_output_axes", scan_outputs_before, 0, added, axis);
    extend_ints(node, "scan_output_directions", scan_outputs_before, 0, added, 0);
    let rename = |n: &String| exposed.get(n).cloned().unwrap_or_else(|| n.clone());
    Ok(watch
        .iter()
        .map(|w| Watch {
            fork: rename(&w.fork),
            shortcut: rename(&w.shortcut),
            branch: w.branch.iter().map(rename).collect(),
            output: rename(&w.output),
            ..w.clone()
        })
        .collect())
}

/// Leaves the symbolic dims of every main-graph `Scan` body's declared
/// inputs and outputs unnamed: tract unifies them with the concrete sizes it
/// is fed (a body declaring `[batch, 8]` fails when fed `[3, 8]`), where the
/// main graph's declarations are replaced by the input plan's. The same
/// reason the probe ignores `value_info`.
fn unname_scan_dims(model: &mut ModelProto) {
    use crate::proto::tensor_shape_proto::dimension;
    let Some(graph) = model.graph.as_mut() else { return };
    for node in graph.node.iter_mut().filter(|n| n.op_type == "Scan") {
        let Some(body) = node_body_mut(node) else { continue };
        for vi in body.input.iter_mut().chain(body.output.iter_mut()) {
            let Some(crate::proto::TypeProto {
                value: Some(crate::proto::type_proto::Value::TensorType(t)),
                ..
            }) = vi.r#type.as_mut()
            else {
                continue;
            };
            for d in t.shape.iter_mut().flat_map(|s| s.dim.iter_mut()) {
                if matches!(d.value, Some(dimension::Value::DimParam(_))) {
                    d.value = None;
                }
            }
        }
    }
}

fn node_body(node: &NodeProto) -> Option<&GraphProto> {
    node.attribute.iter().find(|a| a.name == "body").and_then(|a| a.g.as_ref())
}

fn node_body_mut(node: &mut NodeProto) -> Option<&mut GraphProto> {
    node.attribute.iter_mut().find(|a| a.name == "body").and_then(|a| a.g.as_mut())
}

/// Appends `added` values `value` to the integer-list attribute `name`,
/// which holds one value per existing scan output (`before`, each
/// `default` when the attribute is absent); left absent when every value
/// would be the default.
fn extend_ints(
    node: &mut NodeProto,
    name: &str,
    before: usize,
    default: i64,
    added: usize,
    value: i64,
) {
    match node.attribute.iter_mut().find(|a| a.name == name) {
        Some(a) => a.ints.extend(std::iter::repeat_n(value, added)),
        None if value != default => {
            let mut ints = vec![default; before];
            ints.extend(std::iter::repeat_n(value, added));
            node.attribute.push(AttributeProto {
                name: name.to_owned(),
                r#type: AttributeType::Ints as i32,
                ints,
                ..AttributeProto::default()
            });
        }
        None => {}
    }
}

fn value_info(name: &str, dtype: i32) -> ValueInfoProto {
    use crate::proto::{TypeProto, type_proto};
    ValueInfoProto {
        name: name.to_owned(),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: dtype,
                shape: None,
            })),
            ..TypeProto::default()
        }),
        ..ValueInfoProto::default()
    }
}

/// Every name a graph and its bodies define or read.
fn collect_names(graph: &GraphProto, out: &mut HashSet<String>) {
    out.extend(graph.input.iter().map(|i| i.name.clone()));
    out.extend(graph.initializer.iter().map(|t| t.name.clone()));
    for n in &graph.node {
        out.extend(n.output.iter().cloned());
        out.extend(n.input.iter().cloned());
        for (_, g) in crate::load::attr::graphs(&n.attribute) {
            collect_names(g, out);
        }
    }
}
