//! Property tests (issue 7): random valid graphs never make the scan panic,
//! and their block census does not depend on tensor or node names or on the
//! topological order of the node list; random byte mutations of valid models
//! never make decoding or the scan panic (they may be refused).

use std::collections::HashMap;

use proptest::prelude::*;
use prost::Message;
use shunt::open::OpenConfig;
use shunt::proto::{
    AttributeProto, GraphProto, ModelProto, NodeProto, OperatorSetIdProto, TensorProto,
    TensorShapeProto, TypeProto, ValueInfoProto, attribute_proto::AttributeType,
    tensor_proto::DataType, tensor_shape_proto::Dimension, tensor_shape_proto::dimension::Value,
    type_proto,
};
use shunt::report::Report;
use shunt::scan::scan_model;
use shunt_testkit::builder::{reorder_nodes, strip_node_names};

/// One node of a random graph: an op and picks among the tensors made so far.
#[derive(Debug, Clone)]
struct Step {
    op: usize,
    a: usize,
    b: usize,
    seed: u32,
}

const OPS: [&str; 6] = ["Conv", "Relu", "Add", "Gemm", "Concat", "Mul"];

fn steps() -> impl Strategy<Value = Vec<Step>> {
    prop::collection::vec(
        (0..OPS.len(), any::<usize>(), any::<usize>(), any::<u32>())
            .prop_map(|(op, a, b, seed)| Step { op, a, b, seed }),
        1..14,
    )
}

fn info(name: &str, dims: &[i64]) -> ValueInfoProto {
    ValueInfoProto {
        name: name.into(),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: DataType::Float as i32,
                shape: Some(TensorShapeProto {
                    dim: dims
                        .iter()
                        .map(|&d| Dimension {
                            value: Some(Value::DimValue(d)),
                            ..Default::default()
                        })
                        .collect(),
                }),
            })),
            ..Default::default()
        }),
        ..Default::default()
    }
}

fn weight(name: &str, dims: &[i64], seed: u32) -> TensorProto {
    let n: i64 = dims.iter().product();
    TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type: DataType::Float as i32,
        float_data: (0..n)
            .map(|i| (((i as u32).wrapping_mul(seed | 1) % 13) as f32 - 6.0) * 0.1)
            .collect(),
        ..Default::default()
    }
}

/// A DAG over a 1x4x8x8 input: every node reads tensors made before it, so
/// the node list is a valid topological order. Shapes need not agree (the
/// scan does not run the model); Gemm and Concat make them disagree on purpose.
fn dag(steps: &[Step]) -> ModelProto {
    let mut tensors = vec!["x".to_owned()];
    let mut nodes = Vec::new();
    let mut inits = Vec::new();
    for (i, s) in steps.iter().enumerate() {
        let pick = |k: usize| tensors[k % tensors.len()].clone();
        let (a, b) = (pick(s.a), pick(s.b));
        let out = format!("t{i}");
        let w = format!("w{i}");
        let mut n = NodeProto {
            op_type: OPS[s.op].into(),
            name: format!("n{i}"),
            output: vec![out.clone()],
            ..Default::default()
        };
        match OPS[s.op] {
            "Conv" => {
                n.input = vec![a, w.clone()];
                n.attribute.push(AttributeProto {
                    name: "pads".into(),
                    r#type: AttributeType::Ints as i32,
                    ints: vec![1; 4],
                    ..Default::default()
                });
                inits.push(weight(&w, &[4, 4, 3, 3], s.seed));
            }
            "Gemm" => {
                n.input = vec![a, w.clone()];
                inits.push(weight(&w, &[4, 4], s.seed));
            }
            "Relu" => n.input = vec![a],
            "Concat" => {
                n.input = vec![a, b];
                n.attribute.push(AttributeProto {
                    name: "axis".into(),
                    r#type: AttributeType::Int as i32,
                    i: 1,
                    ..Default::default()
                });
            }
            _ => n.input = vec![a, b],
        }
        nodes.push(n);
        tensors.push(out);
    }
    let last = tensors.last().cloned().unwrap_or_default();
    ModelProto {
        ir_version: 8,
        opset_import: vec![OperatorSetIdProto { domain: String::new(), version: 17 }],
        graph: Some(GraphProto {
            name: "dag".into(),
            node: nodes,
            initializer: inits,
            input: vec![info("x", &[1, 4, 8, 8])],
            output: vec![info(&last, &[1, 4, 8, 8])],
            ..Default::default()
        }),
        ..Default::default()
    }
}

/// Renames every tensor consistently (inputs, outputs, initializers, node
/// inputs and outputs) to names that sort differently.
fn rename_tensors(model: &mut ModelProto, salt: u64) {
    let g = model.graph.as_mut().unwrap();
    let mut map: HashMap<String, String> = HashMap::new();
    let mut fresh = |old: &str| -> String {
        let k = map.len() as u64;
        map.entry(old.to_owned())
            .or_insert_with(|| format!("v{:x}_{k}", (k + 1).wrapping_mul(salt | 1).rotate_left(17)))
            .clone()
    };
    for vi in g.input.iter_mut().chain(g.output.iter_mut()) {
        vi.name = fresh(&vi.name);
    }
    for t in &mut g.initializer {
        t.name = fresh(&t.name);
    }
    for n in &mut g.node {
        for s in n.input.iter_mut().chain(n.output.iter_mut()) {
            *s = fresh(s);
        }
    }
}

/// The block census: what each block is, without names or ids.
fn census(r: &Report) -> (Vec<String>, [usize; 5]) {
    let mut blocks: Vec<String> = r
        .blocks
        .iter()
        .map(|b| {
            format!(
                "{:?}/{:?}/{}/{}/{}/{}/{:?}",
                b.shortcut.kind,
                b.placement,
                b.shortcut.projected,
                b.depth,
                b.branch.op_count,
                b.branch.layers.len(),
                b.static_dead.as_ref().map(|d| &d.reason)
            )
        })
        .collect();
    blocks.sort();
    let s = &r.summary;
    (blocks, [s.blocks, s.concat_skips, s.long_skips, s.bare_runs, r.not_blocks.len()])
}

fn scan(model: ModelProto) -> Report {
    scan_model(model, "random.onnx", &OpenConfig::standard()).expect("a valid DAG scans")
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 3000, ..ProptestConfig::default() })]

    #[test]
    fn census_ignores_names_and_order(steps in steps(), salt in any::<u64>(), order in any::<u64>()) {
        let base = census(&scan(dag(&steps)));

        let mut renamed = dag(&steps);
        rename_tensors(&mut renamed, salt);
        strip_node_names(&mut renamed);
        prop_assert_eq!(&census(&scan(renamed)), &base, "renamed");

        let mut reordered = dag(&steps);
        reorder_nodes(&mut reordered, order);
        prop_assert_eq!(&census(&scan(reordered)), &base, "reordered");
    }
}

/// Valid models to mutate: small ones of several shapes.
fn originals() -> Vec<Vec<u8>> {
    let mut out: Vec<Vec<u8>> = ["trap_add_self.onnx", "rezero.onnx", "qdq_resnet_blocks.onnx"]
        .iter()
        .map(|f| std::fs::read(crate::util::fixture(f)).expect("a fixture"))
        .collect();
    let steps: Vec<Step> = (0..10)
        .map(|i| Step { op: i % OPS.len(), a: i * 7, b: i * 3 + 1, seed: i as u32 })
        .collect();
    out.push(dag(&steps).encode_to_vec());
    out
}

#[derive(Debug, Clone)]
enum Mutation {
    Set(usize, u8),
    Flip(usize, u8),
    Insert(usize, Vec<u8>),
    Delete(usize, usize),
    Truncate(usize),
}

fn mutation() -> impl Strategy<Value = Mutation> {
    prop_oneof![
        (any::<usize>(), any::<u8>()).prop_map(|(i, b)| Mutation::Set(i, b)),
        (any::<usize>(), 0u8..8).prop_map(|(i, bit)| Mutation::Flip(i, bit)),
        (any::<usize>(), prop::collection::vec(any::<u8>(), 1..12))
            .prop_map(|(i, b)| Mutation::Insert(i, b)),
        (any::<usize>(), 1usize..16).prop_map(|(i, n)| Mutation::Delete(i, n)),
        any::<usize>().prop_map(Mutation::Truncate),
    ]
}

fn mutate(bytes: &mut Vec<u8>, m: &Mutation) {
    if bytes.is_empty() {
        return;
    }
    let at = |i: usize| i % bytes.len();
    match m {
        Mutation::Set(i, b) => {
            let i = at(*i);
            bytes[i] = *b;
        }
        Mutation::Flip(i, bit) => {
            let i = at(*i);
            bytes[i] ^= 1 << bit;
        }
        Mutation::Insert(i, b) => {
            let i = at(*i);
            bytes.splice(i..i, b.iter().copied());
        }
        Mutation::Delete(i, n) => {
            let i = at(*i);
            let end = (i + n).min(bytes.len());
            bytes.drain(i..end);
        }
        Mutation::Truncate(i) => {
            let i = at(*i);
            bytes.truncate(i);
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 50000, ..ProptestConfig::default() })]

    #[test]
    fn mutated_bytes_never_panic(which in any::<usize>(), ms in prop::collection::vec(mutation(), 1..6)) {
        thread_local!(static ORIGINALS: Vec<Vec<u8>> = originals());
        let mut bytes = ORIGINALS.with(|o| o[which % o.len()].clone());
        for m in &ms {
            mutate(&mut bytes, m);
        }
        if let Ok(model) = shunt::load::decode(bytes::Bytes::from(bytes)) {
            let _ = scan_model(model, "mutated.onnx", &OpenConfig::standard());
        }
    }
}

#[test]
fn random_dags_hold_blocks() {
    // The census above compares something: x -> Conv -> Add(x) is a block,
    // and a Concat of x with a Conv of it a concatenative skip.
    let steps = [
        Step { op: 0, a: 0, b: 0, seed: 3 },
        Step { op: 2, a: 0, b: 1, seed: 0 },
        Step { op: 0, a: 2, b: 0, seed: 5 },
        Step { op: 4, a: 2, b: 3, seed: 0 },
    ];
    let (blocks, counts) = census(&scan(dag(&steps)));
    assert_eq!(blocks.len(), 1, "{blocks:?}");
    assert_eq!(counts[1], 1, "one concatenative skip: {counts:?}");
}
