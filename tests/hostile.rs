//! Broken and hostile model files (issue 7): each built in code, written to a
//! temporary folder and run through the real binary, with the exit code and
//! the words expected in the one-line error, or (where the analysis can go
//! on) exit 0 and the expected diagnostic in the JSON `diagnostics`.
//!
//! | case | expectation |
//! |---|---|
//! | **dataflow** | |
//! | `cycle_self_loop` | 2, "cycle" |
//! | `cycle_two_nodes` | 2, "cycle" |
//! | `cycle_three_nodes` | 2, "cycle" |
//! | `dangling_input` | 0, warning "produced by nothing" |
//! | `produced_twice_node_node` | 2, "produced twice: by node" |
//! | `produced_twice_node_initializer` | 2, "produced twice: by an initializer" |
//! | `input_initializer_same_name` | 0 (IR >= 4: the initializer is the input's default), the input stays static |
//! | `input_declared_twice` | 2, "declared twice" |
//! | `initializer_defined_twice` | 2, "defined twice" |
//! | `missing_graph` | 2, "no graph" |
//! | `empty_node_output_name` | 0 (an omitted optional output) |
//! | `empty_initializer_name` | 2, "empty name" |
//! | `empty_op_type` | 0, note "not an ONNX operator" |
//! | `no_nodes` | 0, plain |
//! | **payloads** | |
//! | `raw_data_too_short`, `raw_data_too_long` | 2, "holds" |
//! | `typed_count_mismatch` | 2, "holds 3" |
//! | `unknown_data_type`, `undefined_data_type` | 2, "unknown element type" / "no element type" |
//! | `negative_dims` | 2, "invalid dims" |
//! | `zero_dims` | 0, an empty weight is not taken for an all-zero one |
//! | `overflowing_dims` | 2, "invalid dims" |
//! | `overflowing_bytes` | 2, "more bytes than can be counted" (elements fit u64, bits do not) |
//! | `zip_bomb` | 2, "holds 4 bytes", refused at once |
//! | `nan_inf_weights` | scan 0; audit 0 with `non-finite` |
//! | **ops** | |
//! | `unknown_op` | scan 0, note "not an ONNX operator"; audit 2 naming the op |
//! | `unknown_domain` | 0, note "not an operator shunt knows" and "does not import" |
//! | `huge_attribute_lists` | 0 within seconds (10^6 ints, 10^5 attributes) |
//! | `nested_subgraphs_20` | 0, all 40 bodies searched, 20 levels deep |
//! | `nested_subgraphs_100` | 2, "nested more than 100 levels", no stack overflow |
//! | **bytes** | |
//! | `garbage_bytes`, `empty_file`, `folder_as_model` | 2, "not an ONNX model" / "empty" / "folder" |
//! | `truncated` (6 cut points) | 2, decoding or "imports no operator set" |
//! | `wrong_message_tensor`, `wrong_message_graph` | 2, "not an ONNX model" |
//! | `ir_version_zero`, `no_opset` | 2, "ir_version is 0" / "imports no operator set" |
//! | **external data** | |
//! | `external_absolute` | 2, "is an absolute path" |
//! | `external_parent` | 2, "contains '..'" |
//! | `external_symlink_escape` | 2, "leads outside" |
//! | `external_symlink_folder` | 2, "not a regular file" |
//! | `external_dev_zero` | 2, "leads outside" (a link to /dev/zero) |
//! | `external_fifo` | 2, "not a regular file" (never opened, so never blocks) |
//! | `external_offset_past_end`, `external_length_past_end` | 2, "past the end" |
//! | `external_negative_offset`, `external_text_offset` | 2, "offset is not a number" |
//! | `external_length_overflow` | 2, "overflows" |
//! | `external_missing_file` | 2, "no such file" |
//! | `external_checksum_scan_accepts` | 0 (the scan reads no external payload, so a well-formed digest is not verified) |
//! | `external_checksum_audit_mismatch` | 2, "checksum mismatch" (the audit verifies before running) |
//! | `external_checksum_audit_verified` | not 2 (the digest from `sha1sum`, in upper case) |
//! | `external_checksum_not_hex` | 2, "checksum is not a SHA-1 digest" |
//! | **names** | |
//! | `hostile_names` | 0; table escapes control characters, JSON keeps names intact |
//! | `hostile_name_in_error` | 2, one line, no raw escape character |
//! | **found by fuzzing** | |
//! | `input_bomb` | 2, "would hold … elements in one pass" (audit; also dims whose product overflows, and a lowered limit) |
//! | `intent_files` | 2 for pin and expectation files that are bad TOML ("line 2, column 7"), devices, FIFOs, folders, over 16 MiB or missing, and for `pin` of a garbage model |
//! | `r7_conv_weight_rank_one` | 0 (a Conv weight of rank 1 made the shape inference index past it) |
//! | `r12_node_without_outputs` | 2 naming the node (a QuantizeLinear with no outputs panicked the placement rule) |
//! | **lowered ops** | |
//! | `lowered_ops_refuse_malformed_nodes` | 2 naming the node: a missing or extra input, an attribute of the wrong type, an unknown activation, a zero or NaN scale, a uint8 zero point of 300 |

use std::fs;
use std::path::Path;
use std::time::{Duration, Instant};

use prost::Message;
use shunt::proto::{
    AttributeProto, GraphProto, ModelProto, NodeProto, OperatorSetIdProto, StringStringEntryProto,
    TensorProto, TensorShapeProto, TypeProto, ValueInfoProto,
    attribute_proto::AttributeType,
    tensor_proto::{DataLocation, DataType},
    tensor_shape_proto::{Dimension, dimension::Value as DimValue},
    type_proto,
};

use crate::util::{Run, shunt, tempdir};

// ---------------------------------------------------------------- helpers

fn tensor_info(name: &str, dims: &[i64]) -> ValueInfoProto {
    ValueInfoProto {
        name: name.into(),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: DataType::Float as i32,
                shape: Some(TensorShapeProto {
                    dim: dims
                        .iter()
                        .map(|&d| Dimension {
                            value: Some(DimValue::DimValue(d)),
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

fn node(op: &str, name: &str, inputs: &[&str], outputs: &[&str]) -> NodeProto {
    NodeProto {
        op_type: op.into(),
        name: name.into(),
        input: inputs.iter().map(|s| s.to_string()).collect(),
        output: outputs.iter().map(|s| s.to_string()).collect(),
        ..Default::default()
    }
}

fn ints(name: &str, values: Vec<i64>) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        r#type: AttributeType::Ints as i32,
        ints: values,
        ..Default::default()
    }
}

fn conv(name: &str, x: &str, w: &str, out: &str) -> NodeProto {
    let mut n = node("Conv", name, &[x, w], &[out]);
    n.attribute.push(ints("pads", vec![1; 4]));
    n
}

fn weight(name: &str, dims: &[i64]) -> TensorProto {
    let n: i64 = dims.iter().product();
    TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type: DataType::Float as i32,
        float_data: (0..n).map(|i| ((i % 7) as f32 - 3.0) * 0.1).collect(),
        ..Default::default()
    }
}

fn graph(nodes: Vec<NodeProto>, inits: Vec<TensorProto>, out: &str) -> GraphProto {
    GraphProto {
        name: "g".into(),
        node: nodes,
        initializer: inits,
        input: vec![tensor_info("x", &[1, 4, 8, 8])],
        output: vec![tensor_info(out, &[1, 4, 8, 8])],
        ..Default::default()
    }
}

fn model(g: GraphProto) -> ModelProto {
    ModelProto {
        ir_version: 8,
        opset_import: vec![OperatorSetIdProto { domain: String::new(), version: 17 }],
        producer_name: "shunt-hostile".into(),
        graph: Some(g),
        ..Default::default()
    }
}

/// x -> Conv -> Relu -> Conv -> Add(x) -> Relu: one identity block.
fn block_graph(w1: TensorProto, w2: TensorProto) -> GraphProto {
    let (n1, n2) = (w1.name.clone(), w2.name.clone());
    graph(
        vec![
            conv("conv1", "x", &n1, "c1"),
            node("Relu", "relu1", &["c1"], &["r1"]),
            conv("conv2", "r1", &n2, "c2"),
            node("Add", "add", &["c2", "x"], &["sum"]),
            node("Relu", "relu2", &["sum"], &["y"]),
        ],
        vec![w1, w2],
        "y",
    )
}

fn one_block() -> ModelProto {
    model(block_graph(weight("w1", &[4, 4, 3, 3]), weight("w2", &[4, 4, 3, 3])))
}

fn write(dir: &Path, name: &str, m: &ModelProto) -> String {
    write_bytes(dir, name, &m.encode_to_vec())
}

fn write_bytes(dir: &Path, name: &str, bytes: &[u8]) -> String {
    let p = dir.join(name);
    fs::write(&p, bytes).unwrap();
    p.display().to_string()
}

/// Exit 2, nothing on stdout, one line on stderr naming the file and saying
/// `needle`, no panic and no raw control character.
#[track_caller]
fn assert_refused(run: &Run, path: &str, needle: &str) {
    assert_eq!(run.code, 2, "exit code; stderr: {}", run.stderr);
    assert!(run.stdout.is_empty(), "nothing on stdout: {}", run.stdout);
    let lines: Vec<&str> = run.stderr.lines().collect();
    assert_eq!(lines.len(), 1, "one line on stderr: {:?}", run.stderr);
    assert!(lines[0].starts_with("shunt: error: "), "a plain error: {}", lines[0]);
    assert!(lines[0].contains(path), "the message names the file: {}", lines[0]);
    assert!(lines[0].contains(needle), "the message says '{needle}': {}", lines[0]);
    assert!(!run.stderr.contains('\x1b'), "no raw escape: {:?}", run.stderr);
}

/// `shunt scan PATH` is refused as [`assert_refused`] says.
#[track_caller]
fn refused(path: &str, needle: &str) {
    assert_refused(&shunt(&["scan", path]), path, needle);
}

/// `shunt scan --format json PATH` succeeds; returns the report.
#[track_caller]
fn scanned(path: &str) -> serde_json::Value {
    let run = shunt(&["scan", "--format", "json", path]);
    assert_eq!(run.code, 0, "exit code; stderr: {}", run.stderr);
    assert!(run.stderr.is_empty(), "nothing on stderr: {}", run.stderr);
    serde_json::from_str(&run.stdout).expect("a JSON report")
}

/// The diagnostic of `report` whose message contains `needle`.
#[track_caller]
fn diagnostic<'a>(report: &'a serde_json::Value, needle: &str) -> &'a serde_json::Value {
    let all = report["diagnostics"].as_array().expect("diagnostics");
    all.iter()
        .find(|d| d["message"].as_str().is_some_and(|m| m.contains(needle)))
        .unwrap_or_else(|| panic!("a diagnostic saying '{needle}' in {all:?}"))
}

// ---------------------------------------------------------------- dataflow

#[test]
fn cycle_self_loop() {
    let dir = tempdir();
    let mut m = one_block();
    let g = m.graph.as_mut().unwrap();
    g.node.insert(0, node("Relu", "loop", &["a"], &["a"]));
    refused(&write(dir.path(), "self_loop.onnx", &m), "the graph has a cycle through node 'loop'");
}

#[test]
fn cycle_two_nodes() {
    let dir = tempdir();
    let mut m = one_block();
    let g = m.graph.as_mut().unwrap();
    g.node.push(node("Add", "a", &["x", "q"], &["p"]));
    g.node.push(node("Relu", "b", &["p"], &["q"]));
    refused(&write(dir.path(), "cycle2.onnx", &m), "cycle");
}

#[test]
fn cycle_three_nodes() {
    let dir = tempdir();
    let mut m = one_block();
    let g = m.graph.as_mut().unwrap();
    g.node.push(node("Relu", "a", &["r"], &["p"]));
    g.node.push(node("Relu", "b", &["p"], &["q"]));
    g.node.push(node("Add", "c", &["q", "x"], &["r"]));
    refused(&write(dir.path(), "cycle3.onnx", &m), "cycle");
}

#[test]
fn dangling_input() {
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().node[3].input[1] = "ghost".into();
    let report = scanned(&write(dir.path(), "dangling.onnx", &m));
    let d = diagnostic(&report, "input 'ghost' is produced by nothing in the graph");
    assert_eq!(d["severity"], "warning");
    assert_eq!(d["node"], "add");
}

#[test]
fn produced_twice_node_node() {
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().node[1].output[0] = "c1".into();
    refused(
        &write(dir.path(), "twice.onnx", &m),
        "tensor 'c1' is produced twice: by node 'conv1' and by node 'relu1'",
    );
}

#[test]
fn produced_twice_node_initializer() {
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().node[1].output[0] = "w2".into();
    refused(&write(dir.path(), "twice_init.onnx", &m), "produced twice: by an initializer");
}

#[test]
fn input_initializer_same_name() {
    // [O1]-era files (IR < 4) list every initializer as an input; from IR 4
    // an initializer of the same name is the input's default. Either way the
    // tensor is a weight, not a signal.
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().input.push(tensor_info("w1", &[4, 4, 3, 3]));
    let report = scanned(&write(dir.path(), "input_init.onnx", &m));
    assert_eq!(report["summary"]["blocks"], 1);
    let inputs = report["model"]["inputs"].as_array().unwrap();
    assert_eq!(inputs.len(), 1, "the initializer is not listed as an input: {inputs:?}");
}

#[test]
fn input_declared_twice() {
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().input.push(tensor_info("x", &[1, 4, 8, 8]));
    refused(&write(dir.path(), "input_twice.onnx", &m), "graph input 'x' is declared twice");
}

#[test]
fn initializer_defined_twice() {
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().initializer.push(weight("w1", &[4, 4, 3, 3]));
    refused(&write(dir.path(), "init_twice.onnx", &m), "initializer 'w1' is defined twice");
}

#[test]
fn missing_graph() {
    let dir = tempdir();
    let mut m = one_block();
    m.graph = None;
    refused(&write(dir.path(), "no_graph.onnx", &m), "it has no graph");
}

#[test]
fn empty_node_output_name() {
    // An empty output name is an omitted optional output ([O2]).
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().node.push(node("Relu", "nowhere", &["y"], &[""]));
    let report = scanned(&write(dir.path(), "empty_output.onnx", &m));
    assert_eq!(report["summary"]["blocks"], 1);
}

#[test]
fn empty_initializer_name() {
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().initializer.push(weight("", &[2]));
    refused(&write(dir.path(), "empty_init.onnx", &m), "an initializer has an empty name");
}

#[test]
fn empty_op_type() {
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().node.push(node("", "blank", &["y"], &["z"]));
    let report = scanned(&write(dir.path(), "empty_op.onnx", &m));
    assert_eq!(diagnostic(&report, "op '' (1 node) is not an ONNX operator")["node"], "blank");
}

#[test]
fn no_nodes() {
    let dir = tempdir();
    let m = model(graph(vec![], vec![], "x"));
    let report = scanned(&write(dir.path(), "empty_graph.onnx", &m));
    assert_eq!(report["summary"]["plain"], true);
}

// ---------------------------------------------------------------- payloads

fn raw_weight(name: &str, dims: &[i64], bytes: usize) -> TensorProto {
    TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type: DataType::Float as i32,
        raw_data: vec![0x3f; bytes].into(),
        ..Default::default()
    }
}

#[test]
fn raw_data_too_short() {
    let dir = tempdir();
    let m = model(block_graph(weight("w1", &[4, 4, 3, 3]), raw_weight("w2", &[4, 4, 3, 3], 575)));
    refused(
        &write(dir.path(), "short.onnx", &m),
        "tensor 'w2' declares 144 elements of float32 (576 bytes) but holds 575 bytes",
    );
}

#[test]
fn raw_data_too_long() {
    let dir = tempdir();
    let m = model(block_graph(raw_weight("w1", &[4, 4, 3, 3], 4096), weight("w2", &[4, 4, 3, 3])));
    refused(&write(dir.path(), "long.onnx", &m), "but holds 4096 bytes");
}

#[test]
fn typed_count_mismatch() {
    let dir = tempdir();
    let mut w2 = weight("w2", &[4, 4, 3, 3]);
    w2.float_data.truncate(3);
    let m = model(block_graph(weight("w1", &[4, 4, 3, 3]), w2));
    refused(&write(dir.path(), "typed.onnx", &m), "declares 144 elements of float32 but holds 3");
}

#[test]
fn unknown_data_type() {
    let dir = tempdir();
    let mut w2 = raw_weight("w2", &[4, 4, 3, 3], 576);
    w2.data_type = 99;
    let m = model(block_graph(weight("w1", &[4, 4, 3, 3]), w2));
    refused(&write(dir.path(), "dtype99.onnx", &m), "tensor 'w2' has an unknown element type 99");
}

#[test]
fn undefined_data_type() {
    let dir = tempdir();
    let mut w2 = raw_weight("w2", &[4, 4, 3, 3], 576);
    w2.data_type = 0;
    let m = model(block_graph(weight("w1", &[4, 4, 3, 3]), w2));
    refused(&write(dir.path(), "dtype0.onnx", &m), "tensor 'w2' has no element type");
}

#[test]
fn negative_dims() {
    let dir = tempdir();
    let m = model(block_graph(weight("w1", &[4, 4, 3, 3]), raw_weight("w2", &[4, -4, 3, 3], 0)));
    refused(&write(dir.path(), "negative.onnx", &m), "tensor 'w2' has invalid dims [4, -4, 3, 3]");
}

#[test]
fn zero_dims() {
    // A weight with no elements holds no zeros: the branch is not reported
    // dead by construction.
    let dir = tempdir();
    let m = model(block_graph(weight("w1", &[4, 4, 3, 3]), raw_weight("w2", &[4, 4, 0, 0], 0)));
    let report = scanned(&write(dir.path(), "zero_dims.onnx", &m));
    assert_eq!(report["summary"]["static_dead"], 0, "{}", report["blocks"]);
}

#[test]
fn overflowing_dims() {
    let dir = tempdir();
    let big = 1i64 << 40;
    let m = model(block_graph(weight("w1", &[4, 4, 3, 3]), raw_weight("w2", &[big, big], 4)));
    refused(&write(dir.path(), "overflow.onnx", &m), "has invalid dims");
}

#[test]
fn overflowing_bytes() {
    // 2^62 elements fit a u64; their 2^67 bits do not.
    let dir = tempdir();
    let big = 1i64 << 31;
    let m = model(block_graph(weight("w1", &[4, 4, 3, 3]), raw_weight("w2", &[big, big], 4)));
    refused(&write(dir.path(), "overflow_bytes.onnx", &m), "more bytes than can be counted");
}

#[test]
fn zip_bomb() {
    // 10^12 declared elements in 4 bytes: refused before anything is allocated.
    let dir = tempdir();
    let m = model(block_graph(
        weight("w1", &[4, 4, 3, 3]),
        raw_weight("w2", &[1_000_000, 1_000_000], 4),
    ));
    let path = write(dir.path(), "bomb.onnx", &m);
    let start = Instant::now();
    refused(
        &path,
        "declares 1000000000000 elements of float32 (4000000000000 bytes) but holds 4 bytes",
    );
    assert!(start.elapsed() < Duration::from_secs(5), "refused at once: {:?}", start.elapsed());
}

#[test]
fn input_bomb() {
    // A model input declared 10^6 x 10^6 per sample: the audit refuses it
    // before allocating (the scan only reads the declaration).
    let dir = tempdir();
    let mut m = one_block();
    m.graph.as_mut().unwrap().input[0] = tensor_info("x", &[1, 4, 1_000_000, 1_000_000]);
    let path = write(dir.path(), "input_bomb.onnx", &m);
    assert_eq!(shunt(&["scan", &path]).code, 0);
    let run = shunt(&["audit", "--quiet", &path]);
    assert_refused(&run, &path, "input 'x' would hold 4000000000000 elements in one pass");
    assert!(run.stderr.contains("--max-input-elements"), "{}", run.stderr);
    // Dims whose product does not fit in 64 bits.
    m.graph.as_mut().unwrap().input[0] = tensor_info("x", &[1, i64::MAX, i64::MAX]);
    let path = write(dir.path(), "input_overflow.onnx", &m);
    let run = shunt(&["audit", "--quiet", &path]);
    assert_refused(&run, &path, "more than 2^64");
    // The limit can be raised, and lowered.
    let path = write(dir.path(), "small.onnx", &one_block());
    let run = shunt(&["audit", "--quiet", "--max-input-elements", "100", &path]);
    assert_refused(&run, &path, "more than the limit of 100");
}

#[test]
fn nan_inf_weights() {
    let dir = tempdir();
    let mut w2 = weight("w2", &[4, 4, 3, 3]);
    w2.float_data[0] = f32::NAN;
    w2.float_data[1] = f32::INFINITY;
    w2.float_data[2] = f32::NEG_INFINITY;
    let path = write(dir.path(), "nan.onnx", &model(block_graph(weight("w1", &[4, 4, 3, 3]), w2)));
    let report = scanned(&path);
    assert_eq!(report["summary"]["blocks"], 1);
    let run = shunt(&["audit", "--format", "json", "--quiet", "--batch", "2", &path]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let report: serde_json::Value = serde_json::from_str(&run.stdout).unwrap();
    let findings = report["findings"].as_array().unwrap();
    assert!(findings.iter().any(|f| f["code"] == "non-finite"), "{findings:?}");
    let run = shunt(&["audit", "--quiet", "--batch", "2", "--fail-on", "non-finite", &path]);
    assert_eq!(run.code, 1, "{}", run.stderr);
}

// ---------------------------------------------------------------- ops

#[test]
fn unknown_op() {
    let dir = tempdir();
    let mut m = one_block();
    let g = m.graph.as_mut().unwrap();
    g.node[1].op_type = "Frobnicate".into();
    g.node.push(node("Frobnicate", "frob2", &["y"], &["y2"]));
    g.output[0].name = "y2".into();
    let path = write(dir.path(), "unknown_op.onnx", &m);
    let report = scanned(&path);
    let d = diagnostic(&report, "op 'Frobnicate' (2 nodes) is not an ONNX operator");
    assert_eq!(d["severity"], "note");
    assert_eq!(d["node"], "relu1");
    // tract cannot run it: the structure is still reported, then the error.
    let run = shunt(&["audit", "--quiet", "--batch", "1", &path]);
    assert_eq!(run.code, 2, "{}", run.stderr);
    assert!(run.stdout.contains("add"), "the structural report comes first: {}", run.stdout);
    assert_eq!(run.stderr.lines().count(), 1, "{}", run.stderr);
    assert!(run.stderr.contains("Frobnicate"), "names the op: {}", run.stderr);
    assert!(!run.stderr.contains("internal error"), "{}", run.stderr);
}

#[test]
fn unknown_domain() {
    let dir = tempdir();
    let mut m = one_block();
    let g = m.graph.as_mut().unwrap();
    g.node[1].domain = "com.example.secret".into();
    let report = scanned(&write(dir.path(), "unknown_domain.onnx", &m));
    let d = diagnostic(&report, "of domain 'com.example.secret' (1 node) is not an operator");
    assert!(d["message"].as_str().unwrap().contains("does not import that domain"), "{d}");
}

#[test]
fn huge_attribute_lists() {
    let dir = tempdir();
    let mut m = one_block();
    let g = m.graph.as_mut().unwrap();
    g.node[1].attribute.push(ints("junk", (0..1_000_000).collect()));
    g.node[4].attribute = (0..100_000).map(|i| ints(&format!("a{i}"), vec![i])).collect();
    // The attribute the shape inference reads, huge too.
    g.node[0].attribute.push(ints("strides", vec![1; 100_000]));
    let path = write(dir.path(), "attrs.onnx", &m);
    let start = Instant::now();
    let report = scanned(&path);
    assert!(start.elapsed() < Duration::from_secs(10), "took {:?}", start.elapsed());
    assert!(report["summary"]["blocks"].as_u64().is_some());
}

/// `depth` If nodes, each holding the next in its `then_branch`.
fn nested_ifs(depth: usize) -> ModelProto {
    let leaf = || GraphProto {
        name: "leaf".into(),
        node: vec![node("Identity", "id", &["x"], &["out"])],
        output: vec![tensor_info("out", &[1, 4, 8, 8])],
        ..Default::default()
    };
    let mut inner = leaf();
    for level in 0..depth {
        let mut n = node("If", &format!("if{level}"), &["cond"], &["out"]);
        n.attribute.push(AttributeProto {
            name: "then_branch".into(),
            r#type: AttributeType::Graph as i32,
            g: Some(inner),
            ..Default::default()
        });
        n.attribute.push(AttributeProto {
            name: "else_branch".into(),
            r#type: AttributeType::Graph as i32,
            g: Some(leaf()),
            ..Default::default()
        });
        inner = GraphProto {
            name: format!("level{level}"),
            node: vec![n],
            output: vec![tensor_info("out", &[1, 4, 8, 8])],
            ..Default::default()
        };
    }
    let mut g = inner;
    let mut cond = tensor_info("cond", &[]);
    if let Some(TypeProto { value: Some(type_proto::Value::TensorType(t)), .. }) = &mut cond.r#type
    {
        t.elem_type = DataType::Bool as i32;
    }
    g.input = vec![tensor_info("x", &[1, 4, 8, 8]), cond];
    model(g)
}

#[test]
fn nested_subgraphs_20() {
    let dir = tempdir();
    let report = scanned(&write(dir.path(), "nested20.onnx", &nested_ifs(20)));
    // Every body is searched, at every depth (issue 15, item 1).
    let subgraphs = report["subgraphs"].as_array().expect("subgraphs");
    assert_eq!(subgraphs.len(), 20);
    assert!(subgraphs.iter().all(|s| s["bodies"].as_array().map(Vec::len) == Some(2)));
    let deepest = subgraphs.iter().map(|s| s["scope"].as_array().map_or(0, Vec::len)).max();
    assert_eq!(deepest, Some(19));
}

#[test]
fn nested_subgraphs_100() {
    // Three protobuf levels per If (node, attribute, graph): far beyond the
    // decoder's limit of 100. Refused, not a stack overflow.
    let dir = tempdir();
    let path = write(dir.path(), "nested100.onnx", &nested_ifs(100));
    refused(&path, "nested more than 100 levels deep");
    assert_refused(&shunt(&["audit", "--quiet", &path]), &path, "nested more than 100 levels");
}

// ---------------------------------------------------------------- bytes

#[test]
fn garbage_bytes() {
    let dir = tempdir();
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let bytes: Vec<u8> = (0..4096)
        .map(|_| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state as u8
        })
        .collect();
    let path = write_bytes(dir.path(), "garbage.onnx", &bytes);
    refused(&path, "not an ONNX model");
    assert_refused(&shunt(&["audit", "--quiet", &path]), &path, "not an ONNX model");
    let text = write_bytes(dir.path(), "text.onnx", b"<html><body>404 Not Found</body></html>\n");
    refused(&text, "not an ONNX model");
}

#[test]
fn empty_file() {
    let dir = tempdir();
    refused(&write_bytes(dir.path(), "empty.onnx", b""), "the file is empty");
}

#[test]
fn folder_as_model() {
    let dir = tempdir();
    let sub = dir.path().join("model.onnx");
    fs::create_dir(&sub).unwrap();
    // A folder is searched for models (even one named like a model file).
    refused(&sub.display().to_string(), "no .onnx model file found");
}

#[test]
fn truncated() {
    let dir = tempdir();
    let bytes = one_block().encode_to_vec();
    let n = bytes.len();
    for cut in [1, 10, n / 4, n / 2, 3 * n / 4, n - 1] {
        let path = write_bytes(dir.path(), &format!("cut{cut}.onnx"), &bytes[..cut]);
        let run = shunt(&["scan", &path]);
        let line = run.stderr.lines().next().unwrap_or_default().to_owned();
        assert!(
            line.contains("truncated") || line.contains("no graph"),
            "cut at {cut} of {n}: {line}"
        );
        assert_refused(&run, &path, "not ");
    }
}

#[test]
fn wrong_message_tensor() {
    let dir = tempdir();
    let bytes = weight("w", &[4, 4, 3, 3]).encode_to_vec();
    refused(&write_bytes(dir.path(), "tensor.onnx", &bytes), "not an ONNX model");
}

#[test]
fn wrong_message_graph() {
    let dir = tempdir();
    let bytes = one_block().graph.unwrap().encode_to_vec();
    refused(&write_bytes(dir.path(), "graph.onnx", &bytes), "not an ONNX model");
}

#[test]
fn ir_version_zero() {
    let dir = tempdir();
    let mut m = one_block();
    m.ir_version = 0;
    refused(&write(dir.path(), "ir0.onnx", &m), "ir_version is 0");
}

#[test]
fn no_opset() {
    let dir = tempdir();
    let mut m = one_block();
    m.opset_import.clear();
    refused(&write(dir.path(), "no_opset.onnx", &m), "imports no operator set");
}

// ---------------------------------------------------------------- external data

/// The one-block model with `w2` in external data described by `entries`,
/// and a 576-byte `weights.bin` beside it; returns the model path.
fn external(dir: &Path, entries: &[(&str, &str)]) -> String {
    fs::write(dir.join("weights.bin"), vec![0u8; 576]).unwrap();
    let w2 = TensorProto {
        name: "w2".into(),
        dims: vec![4, 4, 3, 3],
        data_type: DataType::Float as i32,
        data_location: DataLocation::External as i32,
        external_data: entries
            .iter()
            .map(|(k, v)| StringStringEntryProto { key: (*k).into(), value: (*v).into() })
            .collect(),
        ..Default::default()
    };
    write(dir, "model.onnx", &model(block_graph(weight("w1", &[4, 4, 3, 3]), w2)))
}

#[test]
fn external_absolute() {
    let dir = tempdir();
    refused(&external(dir.path(), &[("location", "/etc/passwd")]), "is an absolute path");
}

#[test]
fn external_parent() {
    let dir = tempdir();
    refused(&external(dir.path(), &[("location", "../weights.bin")]), "contains '..'");
}

#[test]
fn external_symlink_escape() {
    let dir = tempdir();
    let outside = tempdir();
    fs::write(outside.path().join("secret.bin"), vec![1u8; 576]).unwrap();
    std::os::unix::fs::symlink(outside.path().join("secret.bin"), dir.path().join("link.bin"))
        .unwrap();
    refused(&external(dir.path(), &[("location", "link.bin")]), "leads outside the model's folder");
}

#[test]
fn external_symlink_folder() {
    let dir = tempdir();
    fs::create_dir(dir.path().join("data")).unwrap();
    std::os::unix::fs::symlink(dir.path().join("data"), dir.path().join("folder.bin")).unwrap();
    refused(&external(dir.path(), &[("location", "folder.bin")]), "is not a regular file");
}

#[test]
fn external_dev_zero() {
    let dir = tempdir();
    std::os::unix::fs::symlink("/dev/zero", dir.path().join("zero.bin")).unwrap();
    refused(&external(dir.path(), &[("location", "zero.bin")]), "leads outside the model's folder");
}

#[test]
fn external_fifo() {
    let dir = tempdir();
    let fifo = dir.path().join("pipe.bin");
    let ok = std::process::Command::new("mkfifo").arg(&fifo).status().unwrap().success();
    assert!(ok, "mkfifo");
    let path = external(dir.path(), &[("location", "pipe.bin")]);
    let start = Instant::now();
    refused(&path, "is not a regular file");
    assert!(start.elapsed() < Duration::from_secs(5), "never opened: {:?}", start.elapsed());
}

#[test]
fn external_offset_past_end() {
    let dir = tempdir();
    let path = external(dir.path(), &[("location", "weights.bin"), ("offset", "4096")]);
    refused(&path, "past the end of 'weights.bin' (576 bytes)");
}

#[test]
fn external_length_past_end() {
    let dir = tempdir();
    let entries = [("location", "weights.bin"), ("offset", "8"), ("length", "576")];
    refused(&external(dir.path(), &entries), "offset 8 + length 576 is past the end");
}

#[test]
fn external_negative_offset() {
    let dir = tempdir();
    let path = external(dir.path(), &[("location", "weights.bin"), ("offset", "-8")]);
    refused(&path, "offset is not a number");
}

#[test]
fn external_text_offset() {
    let dir = tempdir();
    let path = external(dir.path(), &[("location", "weights.bin"), ("offset", "0x10")]);
    refused(&path, "offset is not a number");
}

#[test]
fn external_length_overflow() {
    let dir = tempdir();
    let entries =
        [("location", "weights.bin"), ("offset", "16"), ("length", &u64::MAX.to_string())];
    refused(&external(dir.path(), &entries), "offset + length overflows");
}

#[test]
fn external_missing_file() {
    let dir = tempdir();
    refused(&external(dir.path(), &[("location", "nowhere.bin")]), "no such file");
}

/// SHA-1 of a file by coreutils' `sha1sum`: a digest computed outside shunt.
fn sha1sum(path: &Path) -> String {
    let out = std::process::Command::new("sha1sum").arg(path).output().expect("sha1sum runs");
    assert!(out.status.success());
    String::from_utf8(out.stdout).unwrap().split_whitespace().next().unwrap().to_owned()
}

/// An external tensor with a `checksum` entry ([O3]: the SHA-1 of the file
/// named by `location`). The scan reads no payload, so it accepts any
/// well-formed digest; the audit verifies it before the payload is run.
fn external_with_checksum(dir: &Path, checksum: &str) -> String {
    let entries =
        [("location", "weights.bin"), ("offset", "0"), ("length", "576"), ("checksum", checksum)];
    external(dir, &entries)
}

#[test]
fn external_checksum_scan_accepts() {
    let dir = tempdir();
    let path = external_with_checksum(dir.path(), &"0".repeat(40));
    let report = scanned(&path);
    assert_eq!(report["model"]["external_tensors"], 1);
    assert_eq!(report["model"]["external_bytes"], 576);
}

#[test]
fn external_checksum_audit_mismatch() {
    let dir = tempdir();
    let path = external_with_checksum(dir.path(), &"0".repeat(40));
    let run = shunt(&["audit", "--quiet", &path]);
    assert_refused(&run, &path, "checksum mismatch");
    // The message shows the file's real digest, as sha1sum computes it.
    assert!(run.stderr.contains(&sha1sum(&dir.path().join("weights.bin"))), "{}", run.stderr);
}

#[test]
fn external_checksum_audit_verified() {
    let dir = tempdir();
    external_with_checksum(dir.path(), &"0".repeat(40)); // writes weights.bin
    let digest = sha1sum(&dir.path().join("weights.bin"));
    let path = external_with_checksum(dir.path(), &digest.to_uppercase());
    let run = shunt(&["audit", "--quiet", "--format", "json", &path]);
    assert_ne!(run.code, 2, "a matching checksum passes: {}", run.stderr);
    let report: serde_json::Value = serde_json::from_str(&run.stdout).expect("a JSON report");
    assert!(report["run_error"].is_null(), "{}", report["run_error"]);
}

#[test]
fn external_checksum_not_hex() {
    let dir = tempdir();
    for bad in ["abc", &"g".repeat(40), &"0".repeat(41)] {
        refused(&external_with_checksum(dir.path(), bad), "checksum is not a SHA-1 digest");
    }
}

// ---------------------------------------------------------------- pin and expectation files

#[test]
fn intent_files() {
    let dir = tempdir();
    let model = write(dir.path(), "model.onnx", &one_block());
    let verify = |flag: &str, file: &str| shunt(&["verify", &model, flag, file]);
    // A TOML syntax error: one line that says where.
    let bad = write_bytes(dir.path(), "bad.toml", b"schema = \"shunt/pin\"\nbad = = 3\n");
    assert_refused(&verify("--pin", &bad), &bad, "not a pin file: line 2, column 7");
    assert_refused(&verify("--expect", &bad), &bad, "line 2, column 7");
    // Devices, FIFOs and folders are never read.
    assert_refused(&verify("--pin", "/dev/zero"), "/dev/zero", "not a regular file");
    let fifo = dir.path().join("pipe.toml");
    assert!(std::process::Command::new("mkfifo").arg(&fifo).status().unwrap().success());
    let fifo = fifo.display().to_string();
    assert_refused(&verify("--expect", &fifo), &fifo, "not a regular file");
    let folder = dir.path().display().to_string();
    assert_refused(&verify("--pin", &folder), &folder, "not a regular file");
    // A 17 MiB file is refused, not read whole.
    let big = write_bytes(dir.path(), "big.toml", &vec![b'#'; 17 << 20]);
    assert_refused(&verify("--pin", &big), &big, "larger than 16 MiB");
    // A pin whose words are not ours (a control sequence as the placement).
    let pin = dir.path().join("model.pin.toml").display().to_string();
    assert_eq!(shunt(&["pin", &model, "-o", &pin]).code, 0);
    let text = fs::read_to_string(&pin).unwrap();
    let evil = text.replacen("placement = \"post-activation\"", "placement = \"\\u001b[2J\"", 1);
    assert_ne!(evil, text);
    let evil = write_bytes(dir.path(), "evil.pin.toml", evil.as_bytes());
    assert_refused(&verify("--pin", &evil), &evil, "block 1: placement '\\u{1b}[2J' is not one of");
    // A missing file, and a garbage model.
    let missing = dir.path().join("missing.toml").display().to_string();
    assert_refused(&verify("--pin", &missing), &missing, "cannot read the pin file");
    let garbage = write_bytes(dir.path(), "garbage.onnx", b"\xff\xff\xff not a model");
    assert_refused(&shunt(&["pin", &garbage]), &garbage, "");
}

// ---------------------------------------------------------------- names

const SCRIPT: &str = "<script>alert(1)</script>";
const RED: &str = "\x1b[31mred\x1b[0m";
const MARKDOWN: &str = "**bold** | `code` | [link](http://example.invalid)";
const NEWLINE: &str = "sum\nfake row";

/// One block whose names carry markup, escape sequences and newlines.
fn hostile_names_model(dir: &Path, dangling: bool) -> String {
    let mut m = one_block();
    let g = m.graph.as_mut().unwrap();
    g.node[3].name = SCRIPT.into();
    g.node[0].name = RED.into();
    g.node[2].name = MARKDOWN.into();
    // The merge output, renamed everywhere it is used.
    g.node[3].output[0] = NEWLINE.into();
    g.node[4].input[0] = NEWLINE.into();
    // A dangling input with an escape sequence: a diagnostic carries it (the
    // model can then not be run).
    if dangling {
        g.node.push(node("Relu", "\x1b]0;title\x07", &["\x1b[2Jgone"], &["z"]));
    }
    write(dir, "names.onnx", &m)
}

/// The same block with its merge named `name` (the merge's name is in
/// every report format).
fn merge_named(dir: &Path, name: &str) -> String {
    let mut m = one_block();
    let g = m.graph.as_mut().unwrap();
    g.node[3].name = name.into();
    write(dir, "merge.onnx", &m)
}

#[test]
fn hostile_names() {
    let dir = tempdir();
    let path = hostile_names_model(dir.path(), true);

    let run = shunt(&["scan", &path]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    assert!(!run.stdout.contains('\x1b'), "no raw escape in the table: {:?}", run.stdout);
    assert!(!run.stdout.contains('\x07'), "no raw bell in the table");
    assert!(!run.stdout.contains(NEWLINE), "no raw newline inside a name");
    assert!(run.stdout.contains(SCRIPT), "markup is shown as text: {}", run.stdout);
    assert!(
        run.stdout.contains("[\\u{1b}]0;title\\u{7}]"),
        "escapes are shown escaped: {}",
        run.stdout
    );
    assert!(run.stdout.contains("\\u{1b}[2Jgone"), "in diagnostics too: {}", run.stdout);

    let report = scanned(&path);
    let block = &report["blocks"][0];
    assert_eq!(block["merge"]["name"], SCRIPT);
    assert_eq!(block["output"], NEWLINE);
    let layers: Vec<&str> = block["branch"]["layers"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l["node"]["name"].as_str().unwrap())
        .collect();
    assert_eq!(layers, [RED, MARKDOWN]);
    diagnostic(&report, "input '\x1b[2Jgone' is produced by nothing");
    let raw = shunt(&["scan", "--format", "json", &path]).stdout;
    assert!(!raw.contains('\x1b') && !raw.contains('\x07'), "JSON escapes control characters");
}

#[test]
fn hostile_names_in_html_and_markdown() {
    let dir = tempdir();
    let path = hostile_names_model(dir.path(), false);
    let html = dir.path().join("names.html");
    let run = shunt(&["audit", &path, "--format", "html", "-o", html.to_str().unwrap(), "-q"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let text = fs::read_to_string(&html).unwrap();
    assert!(!text.contains("<script"), "markup from a name never becomes markup");
    // askama writes numeric character references.
    assert!(text.contains("&#60;script&#62;alert(1)&#60;/script&#62;"), "it is shown as text");
    assert!(!text.contains('\x1b') && !text.contains('\x07'), "no raw control character");
    assert!(!text.contains(NEWLINE), "no raw newline inside a name");
    assert!(text.contains("sum\\u{a}fake row"), "the newline is shown escaped");
    // In the browser: no console message (an inline script would also be
    // refused by the page's policy, which is itself a console message), no
    // request, and the name is text in the DOM.
    let page = crate::browser::load(
        &html,
        &dir.path().join("chromium"),
        &dir.path().join("names.png"),
        (800, 600),
    );
    assert!(page.console.is_empty(), "{:#?}", page.console);
    assert!(page.requests.is_empty(), "{:#?}", page.requests);
    assert!(!page.dom.contains("<script"), "no script element in the DOM");
    assert!(page.dom.contains("&lt;script&gt;alert(1)&lt;/script&gt;"));

    let mut md = String::new();
    for name in [SCRIPT, MARKDOWN, RED, NEWLINE] {
        let run = shunt(&["audit", &merge_named(dir.path(), name), "--format", "markdown", "-q"]);
        assert_eq!(run.code, 0, "{}", run.stderr);
        md.push_str(&run.stdout);
    }
    assert!(!md.contains("<script"), "{md}");
    assert!(md.contains("&lt;script&gt;alert(1)&lt;/script&gt;"), "{md}");
    assert!(!md.contains('\x1b') && !md.contains('\x07'), "{md}");
    // A name cannot open a table cell, emphasis, a code span or a link.
    assert!(md.contains("\\*\\*bold\\*\\* \\| \\`code\\` \\| \\[link\\]"), "{md}");
    // DOT: a name stays inside its quoted string.
    let dot = shunt(&["scan", &path, "--format", "dot"]);
    assert_eq!(dot.code, 0, "{}", dot.stderr);
    crate::report::assert_dot_well_formed(&dot.stdout);
    assert!(!dot.stdout.contains('\x1b') && !dot.stdout.contains(NEWLINE), "{}", dot.stdout);

    // Every row of a table has as many unescaped cell separators as its header.
    let pipes = |l: &str| {
        let b = l.as_bytes();
        (0..b.len()).filter(|&i| b[i] == b'|' && (i == 0 || b[i - 1] != b'\\')).count()
    };
    let mut tables = 0;
    let mut header: Option<usize> = None;
    for line in md.lines() {
        match (line.starts_with('|'), header) {
            (true, None) => {
                header = Some(pipes(line));
                tables += 1;
            }
            (true, Some(h)) => assert_eq!(pipes(line), h, "a name split a table row: {line}"),
            (false, _) => header = None,
        }
    }
    assert!(tables >= 1, "{md}");
}

#[test]
fn hostile_name_in_error() {
    let dir = tempdir();
    let mut m = one_block();
    let g = m.graph.as_mut().unwrap();
    g.node[1].output[0] = "c1".into();
    g.node[1].name = "\x1b[31mevil\nshunt: error: forged second line".into();
    let path = write(dir.path(), "evil.onnx", &m);
    let run = shunt(&["scan", &path]);
    assert_refused(&run, &path, "\\u{1b}[31mevil\\u{a}shunt: error: forged");
}

// ---------------------------------------------------------------- fuzz regressions

#[test]
fn r7_conv_weight_rank_one() {
    // Issue 7, found by the decode_scan fuzz target: a Conv weight of rank 1
    // panicked the shape inference (`&w[2..]`); its output shape is unknown.
    let dir = tempdir();
    let m = model(block_graph(weight("w1", &[4, 4, 3, 3]), weight("w2", &[144])));
    let report = scanned(&write(dir.path(), "conv_rank1.onnx", &m));
    assert_eq!(report["summary"]["blocks"], 1, "{}", report["blocks"]);
}

#[test]
fn r12_node_without_outputs() {
    // Issue 12's campaign, found by the decode_scan fuzz target: a
    // QuantizeLinear whose output list was emptied panicked the placement
    // rule (it followed the node's first output). No ONNX operator has zero
    // outputs, so the graph stage refuses such a node by name.
    let dir = tempdir();
    let path = crate::util::fixture("qdq_resnet_blocks.onnx");
    let mut m = ModelProto::decode(fs::read(&path).unwrap().as_slice()).unwrap();
    let graph = m.graph.as_mut().expect("a graph");
    let node = graph
        .node
        .iter_mut()
        .find(|n| n.name == "block0.bn2.qdq.quantize")
        .expect("the fixture's QuantizeLinear after block0.bn2");
    node.output.clear();
    let bad = write(dir.path(), "no_outputs.onnx", &m);
    refused(&bad, "node 'block0.bn2.qdq.quantize' (QuantizeLinear) has no outputs");
    let audit = shunt(&["audit", &bad]);
    assert_refused(&audit, &bad, "has no outputs");
}

// ---------------------------------------------------------------- lowered ops

/// A single-operator model of fixtures/transformed/ops, decoded for mutation.
fn op_model(stem: &str) -> ModelProto {
    let path = crate::util::fixture("transformed/ops").join(format!("{stem}.onnx"));
    ModelProto::decode(fs::read(&path).unwrap().as_slice()).unwrap()
}

fn first_node(m: &mut ModelProto) -> &mut NodeProto {
    &mut m.graph.as_mut().unwrap().node[0]
}

fn set_initializer(m: &mut ModelProto, name: &str, f: impl FnOnce(&mut TensorProto)) {
    let g = m.graph.as_mut().unwrap();
    let t = g.initializer.iter_mut().find(|t| t.name == name).expect("the initializer");
    f(t);
}

/// Every rule refuses malformed nodes with one line naming the node: missing
/// or extra inputs, an attribute of the wrong type, an unknown activation, a
/// zero or non-finite scale, a zero point outside its type's range
/// (fixtures/transformed/ops; the limits are those of [Q1] and the contrib
/// operator documentation).
#[test]
fn lowered_ops_refuse_malformed_nodes() {
    let dir = tempdir();
    let mut cases: Vec<(&str, ModelProto, &str)> = Vec::new();

    let mut m = op_model("SkipLayerNormalization_minimal");
    first_node(&mut m).input.truncate(2);
    cases.push(("sln_missing_gamma", m, "expects"));

    let mut m = op_model("SkipLayerNormalization_minimal");
    for a in &mut first_node(&mut m).attribute {
        if a.name == "epsilon" {
            a.r#type = AttributeType::Int as i32;
        }
    }
    cases.push(("sln_epsilon_int", m, "epsilon"));

    let mut m = op_model("FusedConv_relu_z");
    for a in &mut first_node(&mut m).attribute {
        if a.name == "activation" {
            a.s = b"Wobble".to_vec();
        }
    }
    cases.push(("fusedconv_unknown_activation", m, "Wobble"));

    let mut m = op_model("QLinearAdd");
    first_node(&mut m).input.push("A".to_owned());
    cases.push(("qlinearadd_extra_input", m, "expects"));

    let mut m = op_model("QLinearAdd");
    let scale = first_node(&mut m).input[1].clone();
    set_initializer(&mut m, &scale, |t| {
        t.float_data = vec![0.0];
        t.raw_data = Default::default();
    });
    cases.push(("qlinearadd_zero_scale", m, "scale"));

    let mut m = op_model("QLinearAdd");
    let scale = first_node(&mut m).input[4].clone();
    set_initializer(&mut m, &scale, |t| {
        t.float_data = vec![f32::NAN];
        t.raw_data = Default::default();
    });
    cases.push(("qlinearadd_nan_scale", m, "scale"));

    let mut m = op_model("QLinearConv");
    let zp = first_node(&mut m).input[2].clone();
    set_initializer(&mut m, &zp, |t| {
        // uint8 zero points live in int32_data when not raw: 300 is out of range.
        t.int32_data = vec![300];
        t.raw_data = Default::default();
    });
    cases.push(("qlinearconv_zero_point_range", m, "zero point"));

    assert_eq!(cases.len(), 7);
    for (name, model, needle) in cases {
        let path = write(dir.path(), &format!("{name}.onnx"), &model);
        let run = shunt(&["scan", &path]);
        assert_refused(&run, &path, needle);
        let node = &model.graph.as_ref().unwrap().node[0];
        let label = if node.name.is_empty() { node.op_type.clone() } else { node.name.clone() };
        assert!(run.stderr.contains(&label), "{name}: the message names the node: {}", run.stderr);
    }
}
