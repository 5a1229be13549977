//! The command line: exit codes, error messages, output files.

use std::fs;
use std::path::Path;

use prost::Message;
use shunt::proto::{
    AttributeProto, GraphProto, ModelProto, NodeProto, OperatorSetIdProto, StringStringEntryProto,
    TensorProto, TypeProto, ValueInfoProto, attribute_proto::AttributeType, tensor_proto,
    type_proto,
};

use crate::util::{shunt, tempdir};

fn input(name: &str, dims: &[i64]) -> ValueInfoProto {
    use shunt::proto::{
        TensorShapeProto, tensor_shape_proto::Dimension, tensor_shape_proto::dimension::Value,
    };
    ValueInfoProto {
        name: name.into(),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: tensor_proto::DataType::Float as i32,
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

fn node(op: &str, inputs: &[&str], output: &str) -> NodeProto {
    NodeProto {
        op_type: op.into(),
        name: output.into(),
        input: inputs.iter().map(|s| s.to_string()).collect(),
        output: vec![output.into()],
        ..Default::default()
    }
}

fn weight(name: &str, dims: &[i64]) -> TensorProto {
    let n: i64 = dims.iter().product();
    TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type: tensor_proto::DataType::Float as i32,
        float_data: (0..n).map(|i| ((i % 7) as f32 - 3.0) * 0.1).collect(),
        ..Default::default()
    }
}

fn model(nodes: Vec<NodeProto>, inits: Vec<TensorProto>, out: &str) -> ModelProto {
    ModelProto {
        ir_version: 8,
        opset_import: vec![OperatorSetIdProto { domain: String::new(), version: 17 }],
        producer_name: "shunt-tests".into(),
        graph: Some(GraphProto {
            name: "g".into(),
            node: nodes,
            initializer: inits,
            input: vec![input("x", &[1, 4, 8, 8])],
            output: vec![input(out, &[1, 4, 8, 8])],
            ..Default::default()
        }),
        ..Default::default()
    }
}

/// x -> Conv -> Relu -> Conv -> Add(x) -> Relu: one identity block.
fn one_block() -> ModelProto {
    let pads = AttributeProto {
        name: "pads".into(),
        r#type: AttributeType::Ints as i32,
        ints: vec![1; 4],
        ..Default::default()
    };
    let mut c1 = node("Conv", &["x", "w1"], "c1");
    c1.attribute.push(pads.clone());
    let mut c2 = node("Conv", &["r1", "w2"], "c2");
    c2.attribute.push(pads);
    model(
        vec![
            c1,
            node("Relu", &["c1"], "r1"),
            c2,
            node("Add", &["c2", "x"], "sum"),
            node("Relu", &["sum"], "y"),
        ],
        vec![weight("w1", &[4, 4, 3, 3]), weight("w2", &[4, 4, 3, 3])],
        "y",
    )
}

fn write(dir: &Path, name: &str, m: &ModelProto) -> String {
    let p = dir.join(name);
    fs::write(&p, m.encode_to_vec()).unwrap();
    p.display().to_string()
}

#[track_caller]
fn assert_clean_error(run: &crate::util::Run, path: &str, needle: &str) {
    assert_eq!(run.code, 2, "exit code; stderr: {}", run.stderr);
    assert!(run.stdout.is_empty(), "nothing on stdout: {}", run.stdout);
    let lines: Vec<&str> = run.stderr.lines().collect();
    assert_eq!(lines.len(), 1, "one line on stderr: {}", run.stderr);
    assert!(lines[0].contains(path), "message names the file: {}", lines[0]);
    assert!(lines[0].contains(needle), "message says '{needle}': {}", lines[0]);
    assert!(!run.stderr.contains("panicked"), "no panic: {}", run.stderr);
}

#[test]
fn scans_a_block() {
    let dir = tempdir();
    let path = write(dir.path(), "m.onnx", &one_block());
    let run = shunt(&["scan", &path]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    assert!(run.stdout.contains("residual blocks: 1"), "{}", run.stdout);
    assert!(run.stdout.contains("post-activation"), "{}", run.stdout);
}

#[test]
fn truncated_file() {
    let dir = tempdir();
    let bytes = one_block().encode_to_vec();
    let path = dir.path().join("cut.onnx");
    fs::write(&path, &bytes[..bytes.len() / 2]).unwrap();
    let p = path.display().to_string();
    assert_clean_error(&shunt(&["scan", &p]), &p, "truncated");
}

#[test]
fn not_an_onnx_file() {
    let dir = tempdir();
    let path = dir.path().join("notes.onnx");
    fs::write(&path, "These are meeting notes, not a model.\n").unwrap();
    let p = path.display().to_string();
    assert_clean_error(&shunt(&["scan", &p]), &p, "not an ONNX model");
    let empty = dir.path().join("empty.onnx");
    fs::write(&empty, b"").unwrap();
    let p = empty.display().to_string();
    assert_clean_error(&shunt(&["scan", &p]), &p, "empty");
}

#[test]
fn missing_file_and_folder() {
    let dir = tempdir();
    let p = dir.path().join("absent.onnx").display().to_string();
    assert_clean_error(&shunt(&["scan", &p]), &p, "no such file");
    let d = dir.path().display().to_string();
    // A folder is searched for models; this one holds none.
    assert_clean_error(&shunt(&["scan", &d]), &d, "no .onnx model file found");
}

fn with_external(location: &str) -> ModelProto {
    let mut m = one_block();
    let w = &mut m.graph.as_mut().unwrap().initializer[0];
    w.float_data.clear();
    w.data_location = tensor_proto::DataLocation::External as i32;
    w.external_data = vec![
        StringStringEntryProto { key: "location".into(), value: location.into() },
        StringStringEntryProto { key: "offset".into(), value: "0".into() },
        StringStringEntryProto { key: "length".into(), value: "576".into() },
    ];
    m
}

#[test]
fn external_data_outside_the_folder() {
    let dir = tempdir();
    let models = dir.path().join("models");
    fs::create_dir(&models).unwrap();
    fs::write(dir.path().join("secret.bin"), vec![0u8; 1024]).unwrap();
    for (name, location, needle) in [
        ("parent.onnx", "../secret.bin", "'..'"),
        ("absolute.onnx", "/etc/hostname", "absolute"),
        ("missing.onnx", "nothere.bin", "cannot be opened"),
    ] {
        let p = write(&models, name, &with_external(location));
        assert_clean_error(&shunt(&["scan", &p]), &p, needle);
    }
    // A link inside the folder that leads out of it.
    #[cfg(unix)]
    {
        std::os::unix::fs::symlink(dir.path().join("secret.bin"), models.join("link.bin")).unwrap();
        let p = write(&models, "link.onnx", &with_external("link.bin"));
        assert_clean_error(&shunt(&["scan", &p]), &p, "outside the model's folder");
    }
    // In bounds it is accepted; past the end of the file it is not.
    fs::write(models.join("w.bin"), vec![0u8; 576]).unwrap();
    let p = write(&models, "ok.onnx", &with_external("w.bin"));
    assert_eq!(shunt(&["scan", &p]).code, 0);
    fs::write(models.join("w.bin"), vec![0u8; 100]).unwrap();
    assert_clean_error(&shunt(&["scan", &p]), &p, "past the end");
}

#[test]
fn cycle() {
    let mut m = one_block();
    // c1 now reads y, which depends on c1.
    m.graph.as_mut().unwrap().node[0].input[0] = "y".into();
    let dir = tempdir();
    let p = write(dir.path(), "cycle.onnx", &m);
    assert_clean_error(&shunt(&["scan", &p]), &p, "cycle");
}

#[test]
fn tensor_produced_twice() {
    let mut m = one_block();
    m.graph.as_mut().unwrap().node[2].output[0] = "c1".into();
    let dir = tempdir();
    let p = write(dir.path(), "twice.onnx", &m);
    assert_clean_error(&shunt(&["scan", &p]), &p, "produced twice");
}

#[test]
fn output_file_is_written_and_never_over_the_model() {
    let dir = tempdir();
    let p = write(dir.path(), "m.onnx", &one_block());
    let before = fs::read(&p).unwrap();
    let run = shunt(&["scan", &p, "--format", "json", "--output", &p]);
    assert_eq!(run.code, 2);
    assert!(run.stderr.contains("refusing"), "{}", run.stderr);
    assert_eq!(fs::read(&p).unwrap(), before, "the model is untouched");
    let out = dir.path().join("report.json");
    let run = shunt(&["scan", &p, "--format", "json", "--output", out.to_str().unwrap()]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    assert!(run.stdout.is_empty());
    let json: serde_json::Value = serde_json::from_slice(&fs::read(&out).unwrap()).unwrap();
    assert_eq!(json["summary"]["blocks"], 1);
    let leftovers: Vec<_> = fs::read_dir(dir.path())
        .unwrap()
        .filter_map(Result::ok)
        .filter(|e| e.file_name().to_string_lossy().ends_with(".tmp"))
        .collect();
    assert!(leftovers.is_empty(), "no temporary file left behind");
}

#[test]
fn bad_usage_exits_2() {
    assert_eq!(shunt(&["scan"]).code, 2);
    assert_eq!(shunt(&["frobnicate"]).code, 2);
    assert_eq!(shunt(&["scan", "x.onnx", "--format", "yaml"]).code, 2);
    assert_eq!(shunt(&["--help"]).code, 0);
}

#[test]
fn declared_sizes_are_checked_before_reading() {
    let dir = tempdir();
    // A 'zip bomb': a few hundred bytes declaring a tensor of 10^12 elements.
    let mut m = one_block();
    let w = &mut m.graph.as_mut().unwrap().initializer[0];
    w.dims = vec![1_000_000, 1_000_000];
    w.float_data = vec![1.0; 4];
    let p = write(dir.path(), "bomb.onnx", &m);
    assert_clean_error(&shunt(&["scan", &p]), &p, "declares 1000000000000 elements");
    // Dims whose product overflows, and negative dims.
    let mut m = one_block();
    m.graph.as_mut().unwrap().initializer[0].dims = vec![i64::MAX, i64::MAX];
    let p = write(dir.path(), "overflow.onnx", &m);
    assert_clean_error(&shunt(&["scan", &p]), &p, "invalid dims");
    let mut m = one_block();
    m.graph.as_mut().unwrap().initializer[0].dims = vec![-4, 4, 3, 3];
    let p = write(dir.path(), "negative.onnx", &m);
    assert_clean_error(&shunt(&["scan", &p]), &p, "invalid dims");
    // A raw payload of the wrong length, and an unknown element type.
    let mut m = one_block();
    let w = &mut m.graph.as_mut().unwrap().initializer[0];
    w.float_data.clear();
    w.raw_data = vec![0u8; 10].into();
    let p = write(dir.path(), "short.onnx", &m);
    assert_clean_error(&shunt(&["scan", &p]), &p, "holds 10 bytes");
    let mut m = one_block();
    m.graph.as_mut().unwrap().initializer[0].data_type = 99;
    let p = write(dir.path(), "dtype.onnx", &m);
    assert_clean_error(&shunt(&["scan", &p]), &p, "unknown element type 99");
}

/// The library entry `shunt::cli::run` (what a Python binding calls) is the
/// program: the same document and the same exit codes as the binary.
#[test]
fn the_library_entry_is_the_command_line() {
    let dir = tempdir();
    let model = crate::util::fixture("resnet18_a.onnx");
    let out = dir.path().join("r.json");
    let argv = |args: &[&str]| -> Vec<std::ffi::OsString> {
        std::iter::once("shunt").chain(args.iter().copied()).map(Into::into).collect()
    };
    let model = model.to_str().unwrap();
    let code =
        shunt::cli::run(argv(&["scan", model, "--format", "json", "-o", out.to_str().unwrap()]));
    assert_eq!(code, 0);
    let binary = shunt(&["scan", model, "--format", "json"]);
    assert_eq!(binary.code, 0);
    assert_eq!(fs::read_to_string(&out).unwrap(), binary.stdout);
    // An error is exit code 2, a usage error too; --help succeeds.
    assert_eq!(shunt::cli::run(argv(&["scan", "no-such-model.onnx", "-q"])), 2);
    assert_eq!(shunt::cli::run(argv(&["scan", model, "--format", "yaml"])), 2);
    assert_eq!(shunt::cli::run(argv(&["verify", model, "--pin", model, "--format", "html"])), 2);
    // A --fail-on finding is exit code 1 (zero_branch has a static-dead block).
    let zero = crate::util::fixture("zero_branch.onnx");
    let quiet = dir.path().join("z.json");
    let args =
        ["scan", zero.to_str().unwrap(), "--fail-on", "static-dead", "-o", quiet.to_str().unwrap()];
    assert_eq!(shunt::cli::run(argv(&args)), 1);
}

/// `shunt::cli::run_quietly` (what the Python package calls) returns the
/// one-line error the program prints after `shunt: error: `, and prints
/// nothing itself.
#[test]
fn the_quiet_entry_returns_the_programs_error() {
    let argv = |args: &[&str]| -> Vec<std::ffi::OsString> {
        std::iter::once("shunt").chain(args.iter().copied()).map(Into::into).collect()
    };
    let missing = "no-such-model.onnx";
    let outcome = shunt::cli::run_quietly(argv(&["scan", missing]));
    assert_eq!((outcome.code, outcome.internal), (2, false));
    let message = outcome.error.expect("an error for a missing file");
    let binary = shunt(&["scan", missing]);
    assert_eq!(binary.code, 2);
    assert_eq!(binary.stderr.trim_end(), format!("shunt: error: {message}"));
    // A usage error: clap's first line, without its `error: ` prefix.
    let usage = shunt::cli::run_quietly(argv(&["scan", missing, "--no-such-option"]));
    assert_eq!(usage.code, 2);
    let line = usage.error.expect("a usage error");
    assert!(line.contains("--no-such-option") && !line.starts_with("error:"), "{line}");
    // Success and a --fail-on gate carry no error.
    let zero = crate::util::fixture("zero_branch.onnx");
    let dir = tempdir();
    let out = dir.path().join("z.json");
    let args =
        ["scan", zero.to_str().unwrap(), "--fail-on", "static-dead", "-o", out.to_str().unwrap()];
    assert_eq!(
        shunt::cli::run_quietly(argv(&args)),
        shunt::cli::Outcome { code: 1, error: None, internal: false }
    );
}
