//! Gates: graph surgery on the decoded model before the inference engine
//! loads it. Each selected merge gets its branch inputs (and, on request, its
//! shortcut input) multiplied by a new scalar graph input, a *gate*: 1 keeps
//! the block intact, 0 removes that side, so the merge passes the other side
//! through. One prepared model then serves the intact run and every knockout,
//! one forward pass per setting of the gates.
//!
//! Gates are graph inputs, never constants, so no optimiser can fold them;
//! they are not in the original graph, so the input planner never draws
//! values for them. `x * 1.0` is exact in IEEE arithmetic, so the gated model
//! with every gate at 1 computes what the original computes.
//!
//! **Invariant:** only the merge nodes' inputs and the graph's input list
//! change; every original tensor keeps its name and producer.

use std::collections::HashSet;

use crate::error::{Error, ErrorKind, Result};
use crate::proto::tensor_proto::DataType;
use crate::proto::{ModelProto, NodeProto, TypeProto, ValueInfoProto, type_proto};

/// Where to put the gates of one block, by ONNX tensor name.
#[derive(Debug, Clone)]
pub struct Site {
    /// The merge's output tensor (identifies the merge node).
    pub output: String,
    /// The merge input fed by the shortcut.
    pub shortcut: String,
    /// The merge inputs fed by the branch.
    pub branch: Vec<String>,
}

/// The names of the gate inputs that were added, one per site.
#[derive(Debug, Clone, Default)]
pub struct Gates {
    /// Gate of each site's branch.
    pub branch: Vec<String>,
    /// Gate of each site's shortcut (empty unless asked for).
    pub shortcut: Vec<String>,
}

impl Gates {
    /// Every gate name: branch gates, then shortcut gates.
    pub fn names(&self) -> Vec<String> {
        self.branch.iter().chain(&self.shortcut).cloned().collect()
    }
}

/// Inserts the gates of `sites` into `model`. With `shortcuts`, each site's
/// shortcut gets a gate as well.
pub fn insert(model: &mut ModelProto, sites: &[Site], shortcuts: bool) -> Result<Gates> {
    let graph = model
        .graph
        .as_mut()
        .ok_or_else(|| Error::new(ErrorKind::Invalid, "the model has no graph"))?;
    let mut taken: HashSet<String> = HashSet::new();
    for n in &graph.node {
        taken.extend(n.output.iter().cloned());
        taken.extend(n.input.iter().cloned());
        taken.insert(n.name.clone());
    }
    taken.extend(graph.input.iter().map(|v| v.name.clone()));
    taken.extend(graph.initializer.iter().map(|t| t.name.clone()));
    let mut fresh = |base: String| -> String {
        let mut name = base.clone();
        let mut k = 1;
        while taken.contains(&name) {
            name = format!("{base}.{k}");
            k += 1;
        }
        taken.insert(name.clone());
        name
    };
    let mut gates = Gates::default();
    let mut muls: Vec<(usize, NodeProto)> = Vec::new();
    for (i, site) in sites.iter().enumerate() {
        let merge =
            graph.node.iter().position(|n| n.output.first() == Some(&site.output)).ok_or_else(
                || {
                    Error::new(
                        ErrorKind::Invalid,
                        format!("no node produces the merge output '{}'", site.output),
                    )
                },
            )?;
        let mut sides: Vec<(&[String], &mut Vec<String>, &str)> =
            vec![(&site.branch, &mut gates.branch, "branch")];
        if shortcuts {
            sides.push((std::slice::from_ref(&site.shortcut), &mut gates.shortcut, "shortcut"));
        }
        for (tensors, list, side) in sides {
            let gate = fresh(format!("shunt.gate.{}.{side}", i + 1));
            graph.input.push(scalar_input(&gate));
            list.push(gate.clone());
            for tensor in tensors {
                let gated = fresh(format!("{tensor}.shunt_{side}_gated"));
                let slots: Vec<usize> = graph.node[merge]
                    .input
                    .iter()
                    .enumerate()
                    .filter(|(_, x)| *x == tensor)
                    .map(|(s, _)| s)
                    .collect();
                if slots.is_empty() {
                    return Err(Error::new(
                        ErrorKind::Invalid,
                        format!("the merge of '{}' has no input '{tensor}'", site.output),
                    ));
                }
                for s in slots {
                    graph.node[merge].input[s] = gated.clone();
                }
                let mul = NodeProto {
                    input: vec![tensor.clone(), gate.clone()],
                    output: vec![gated.clone()],
                    name: fresh(format!("{gated}.mul")),
                    op_type: "Mul".to_owned(),
                    ..NodeProto::default()
                };
                muls.push((merge, mul));
            }
        }
    }
    // Each Mul goes right before its merge, which keeps the node list
    // topologically sorted; insert from the back so positions stay valid.
    muls.sort_by_key(|(at, _)| std::cmp::Reverse(*at));
    for (at, mul) in muls {
        graph.node.insert(at, mul);
    }
    Ok(gates)
}

fn scalar_input(name: &str) -> ValueInfoProto {
    ValueInfoProto {
        name: name.to_owned(),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: DataType::Float as i32,
                shape: Some(Default::default()),
            })),
            ..TypeProto::default()
        }),
        ..ValueInfoProto::default()
    }
}
