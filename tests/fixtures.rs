//! The committed fixtures are exactly what `shunt_testkit::fixtures` builds
//! today, their censuses agree with their graphs, and the ONNX checker and
//! onnxruntime accept every one of them.

use std::collections::HashSet;
use std::path::PathBuf;
use std::process::Command;

use shunt::proto::ModelProto;
use shunt_testkit::fixtures::{self, Fixture};
use shunt_testkit::{reorder_nodes, strip_node_names, strip_value_info};

const REGENERATE: &str = "run `cargo run --release --example fixtures` and commit the result";

#[test]
fn committed_fixtures_are_current() {
    let all = fixtures::all();
    let mut stale = Vec::new();
    for fixture in &all {
        let path = crate::util::fixture(fixture.path);
        match std::fs::read(&path) {
            Ok(bytes) if bytes == fixtures::encode(fixture) => {}
            Ok(_) => stale.push(format!("{} differs", fixture.path)),
            Err(err) => stale.push(format!("{} unreadable: {err}", fixture.path)),
        }
    }
    match std::fs::read_to_string(crate::util::fixture("MANIFEST.txt")) {
        Ok(text) if text == fixtures::manifest(&all) => {}
        Ok(_) => stale.push("MANIFEST.txt differs".to_owned()),
        Err(err) => stale.push(format!("MANIFEST.txt unreadable: {err}")),
    }
    assert!(stale.is_empty(), "stale fixtures ({REGENERATE}):\n{}", stale.join("\n"));
}

#[test]
fn regeneration_is_byte_identical() {
    let first: Vec<Vec<u8>> = fixtures::all().iter().map(fixtures::encode).collect();
    let second: Vec<Vec<u8>> = fixtures::all().iter().map(fixtures::encode).collect();
    assert!(first == second, "two builds of the fixtures differ");
}

#[test]
fn fixtures_stay_small() {
    for fixture in fixtures::all() {
        let size = fixtures::encode(&fixture).len();
        assert!(size <= 300 * 1024, "{} is {size} bytes", fixture.path);
    }
}

/// Every input-dependent `Add`/`Sum` is either a residual merge or a decoy,
/// and every `Concat` outside a rotary embedding is a concatenative skip.
#[test]
fn census_agrees_with_the_graph() {
    for fixture in fixtures::all() {
        let graph = fixture.model.graph.as_ref().unwrap();
        let mut dynamic: HashSet<&str> = graph.input.iter().map(|vi| vi.name.as_str()).collect();
        let mut merges = 0;
        let mut concats = 0;
        for node in &graph.node {
            let inputs: Vec<&str> =
                node.input.iter().map(String::as_str).filter(|i| !i.is_empty()).collect();
            let live: Vec<bool> = inputs.iter().map(|i| dynamic.contains(i)).collect();
            if matches!(node.op_type.as_str(), "Add" | "Sum") && live.iter().all(|l| *l) {
                merges += 1;
            }
            if node.op_type == "Concat" && !node.name.contains("rotate_half") {
                concats += 1;
            }
            if live.iter().any(|l| *l) {
                dynamic.extend(node.output.iter().map(String::as_str));
            }
        }
        let c = &fixture.census;
        assert_eq!(merges, c.additive() + c.decoys, "{}: input-dependent adds", fixture.path);
        assert_eq!(concats, c.concat_skips, "{}: concats", fixture.path);
        let placements =
            c.post_activation + c.pre_activation + c.pre_norm + c.post_norm + c.unactivated;
        assert_eq!(placements, c.additive(), "{}: every block has one placement", fixture.path);
    }
}

#[test]
fn node_and_tensor_names_are_unique() {
    for fixture in fixtures::all() {
        let graph = fixture.model.graph.as_ref().unwrap();
        let mut names = HashSet::new();
        for node in &graph.node {
            assert!(
                !node.name.is_empty() && names.insert(node.name.clone()),
                "{}: node {}",
                fixture.path,
                node.name
            );
        }
        let mut tensors = HashSet::new();
        let produced =
            graph.input.iter().map(|v| &v.name).chain(graph.initializer.iter().map(|t| &t.name));
        for name in produced.chain(graph.node.iter().flat_map(|n| n.output.iter())) {
            assert!(tensors.insert(name.clone()), "{}: tensor {name} produced twice", fixture.path);
        }
    }
}

#[test]
fn transformations_keep_a_valid_graph() {
    for fixture in fixtures::all() {
        let mut model = fixture.model.clone();
        reorder_nodes(&mut model, 3);
        strip_node_names(&mut model);
        strip_value_info(&mut model);
        assert_topological(&fixture, &model);
        let graph = model.graph.as_ref().unwrap();
        assert!(graph.value_info.is_empty() && graph.node.iter().all(|n| n.name.is_empty()));
        let mut again = fixture.model.clone();
        reorder_nodes(&mut again, 3);
        let ops = |m: &ModelProto| {
            m.graph.as_ref().unwrap().node.iter().map(|n| n.output.clone()).collect::<Vec<_>>()
        };
        assert_eq!(ops(&again), ops(&model), "{}: same seed, same order", fixture.path);
        // The order is unique exactly when each node feeds the next one.
        let nodes = &fixture.model.graph.as_ref().unwrap().node;
        let unique =
            nodes.windows(2).all(|pair| pair[1].input.iter().any(|i| pair[0].output.contains(i)));
        if !unique {
            assert_ne!(ops(&again), ops(&fixture.model), "{}: a different order", fixture.path);
        }
    }
}

/// The planted defects of the demo are where its docs say.
#[test]
fn demo_defects_are_planted() {
    let demo = fixtures::all().into_iter().find(|f| f.path == "demo/tile_grader.onnx").unwrap();
    let graph = demo.model.graph.as_ref().unwrap();
    let node = |name: &str| graph.node.iter().find(|n| n.name == name);
    assert!(
        node("stage1.1.add").is_none()
            && node("stage1.0.add").is_some()
            && node("stage1.2.add").is_some()
    );
    let weights = graph.initializer.iter().find(|t| t.name == "stage2.2.conv2.weight").unwrap();
    assert!(weights.raw_data.iter().all(|b| *b == 0) && !weights.raw_data.is_empty());
    let scale = graph.initializer.iter().find(|t| t.name == "stage3.1.scale.scale").unwrap();
    assert_eq!(scale.raw_data.as_ref(), 40f32.to_le_bytes());
    assert_eq!(node("stage3.1.add").unwrap().input[0], "stage3.1.scale");
}

/// [ONNX checker, onnx==1.19.1] `onnx.checker.check_model(path,
/// full_check=True)` accepts every committed fixture, and onnxruntime loads
/// and runs each one on all-ones float inputs and all-zeros integer inputs.
/// The interpreter is `SHUNT_PYTHON` when set, else the pinned reference
/// environment of `tests/reference/requirements.txt`, so this never skips.
#[test]
fn outside_tools_accept_the_fixtures() {
    let paths: Vec<String> = fixtures::all()
        .iter()
        .map(|f| crate::util::fixture(f.path).display().to_string())
        .collect();
    let args: Vec<&str> = paths.iter().map(String::as_str).collect();
    let stdout = match std::env::var_os("SHUNT_PYTHON") {
        None => crate::util::python(CHECK_SCRIPT, &args),
        Some(python) => {
            let python = PathBuf::from(python);
            let output = Command::new(&python)
                .arg("-c")
                .arg(CHECK_SCRIPT)
                .args(&args)
                .output()
                .unwrap_or_else(|err| panic!("cannot run {}: {err}", python.display()));
            let stdout = String::from_utf8_lossy(&output.stdout).into_owned();
            let stderr = String::from_utf8_lossy(&output.stderr);
            assert!(
                output.status.success(),
                "outside checks failed ({}):\n{stdout}\n{stderr}",
                python.display()
            );
            stdout
        }
    };
    let expected = format!("{0} of {0} fixtures pass", paths.len());
    assert!(
        stdout.contains("onnxruntime 1.") && stdout.contains(&expected),
        "outside checks:\n{stdout}"
    );
}

pub(crate) const CHECK_SCRIPT: &str = r#"
import sys
import numpy as np
import onnx
import onnxruntime as ort
failures = []
for path in sys.argv[1:]:
    try:
        onnx.checker.check_model(path, full_check=True)
        options = ort.SessionOptions()
        options.log_severity_level = 3
        session = ort.InferenceSession(path, options, providers=["CPUExecutionProvider"])
        feeds = {}
        for arg in session.get_inputs():
            shape = [d if isinstance(d, int) else 2 for d in arg.shape]
            if arg.type == "tensor(int64)":
                feeds[arg.name] = np.zeros(shape, dtype=np.int64)
            else:
                feeds[arg.name] = np.ones(shape, dtype=np.float32)
        session.run(None, feeds)
    except Exception as err:
        failures.append(f"{path}: {type(err).__name__}: {err}")
print(f"onnx {onnx.__version__}, onnxruntime {ort.__version__}: "
      f"{len(sys.argv) - 1 - len(failures)} of {len(sys.argv) - 1} fixtures pass")
for failure in failures:
    print("FAIL", failure)
sys.exit(1 if failures else 0)
"#;

#[track_caller]
fn assert_topological(fixture: &Fixture, model: &ModelProto) {
    let graph = model.graph.as_ref().unwrap();
    let mut known: HashSet<&str> = graph.input.iter().map(|v| v.name.as_str()).collect();
    known.extend(graph.initializer.iter().map(|t| t.name.as_str()));
    known.insert("");
    for node in &graph.node {
        for input in &node.input {
            assert!(
                known.contains(input.as_str()),
                "{}: {input} used before it is produced",
                fixture.path
            );
        }
        known.extend(node.output.iter().map(String::as_str));
    }
}
