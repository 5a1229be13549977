//! The JSON documents keep their shape within a schema version.
//!
//! Each test runs the real binary on fixtures, walks every document into its
//! field paths (`blocks[].stats.ratio.mean`: object keys joined by `.`, arrays
//! as `[]`) with the kinds of value seen there, and compares the union with a
//! committed golden list, `tests/golden/{schema}-v{version}.fields`, named by
//! the schema and version the documents declare. A path that appears or
//! disappears, or changes kind, fails until the schema version is bumped and a
//! golden list for the new version is written. The list is of paths, not a
//! round trip through the crate's own types, so a field renamed in the Rust
//! type and in its serde attribute alike is still caught.
//!
//! Conventions of the lists:
//! - `name?` is a field absent from some of the objects that hold it
//!   (skipped when empty, or only in some documents);
//! - kinds are `bool`, `integer`, `number`, `string`, `array`, `object`,
//!   `node`; null is left out (whether a field is null depends on the model,
//!   not on the schema), and a field seen only as null has kind `null`;
//! - a node reference (`{name, index, op_type}` and, when lowered,
//!   `lowered_from`) has kind `node`, and its own fields are listed once
//!   under `<node>`;
//! - an object keyed by data (`summary.by_placement`: placements that occur)
//!   is listed as `path.*` with the kinds of its values;
//! - `models[].report` in a batch document is a whole `shunt/report`
//!   document, checked by the report test, and listed as `object`.
//!
//! `SHUNT_UPDATE_GOLDEN=1 cargo test --test integration schema::` writes the
//! golden list of a version that has none. It never rewrites an existing
//! one: a changed shape needs a new version. (When a new fixture only covers
//! a field the version already had, delete that version's list, rewrite it,
//! and say so in the commit.)

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

use prost::Message;
use serde_json::Value;
use shunt::proto::{AttributeProto, ModelProto, NodeProto, TensorProto, attribute_proto};
use shunt_testkit::builder::{Attr, Conv, Dim, Init, ModelBuilder};

use crate::util::{fixture, shunt, tempdir};

/// Objects whose keys are data, per schema.
const MAPS: &[&str] = &["summary.by_shortcut", "summary.by_placement", "summary.findings"];
/// Objects holding a whole document of another schema.
const NESTED: &[&str] = &["models[].report"];

#[test]
fn report_documents_keep_their_fields() {
    let dir = tempdir();
    let if_model = write(dir.path(), "with_if.onnx", &with_subgraph());
    let unknown_op = write(dir.path(), "unknown_op.onnx", &with_unknown_op());
    let skip_op = write(dir.path(), "concat_skip_op.onnx", &concat_skip_with_an_op());
    let demo = path(fixture("demo/tile_grader.onnx"));
    let demo_feed = root().join("tests/reference/inputs/tile_grader.npy");
    let runs: Vec<Vec<String>> = vec![
        // Structure only: bare runs, dead-by-construction, end scales, findings.
        args(&["scan", &demo]),
        args(&["scan", &path(fixture("unet.onnx"))]), // concatenative skips
        args(&["scan", &path(fixture("fpn_topdown.onnx"))]), // nested blocks
        args(&["scan", &path(fixture("trap_gated_update.onnx"))]), // not_blocks
        // Lowered (NCHWc, with a diagnostic on the block size) and lowered_from.
        args(&["scan", &path(fixture("transformed/resnet_cifar_ort_all.onnx"))]),
        args(&["scan", &path(fixture("transformed/bert_postnorm_ortopt.onnx"))]),
        args(&["scan", &if_model]), // subgraphs
        args(&["scan", &skip_op]),  // concat_skips[].skip_ops[]
        // A plain audit, one with a feed, and one whose run fails.
        args(&["audit", &path(fixture("resnet18_b.onnx")), "--batch", "2"]),
        args(&["audit", &demo, "--feed", &path(demo_feed)]),
        args(&["audit", &unknown_op, "--batch", "2"]),
        // Knockout of both sides, gain, effective depth.
        args(&["audit", &demo, "--batch", "4", "--knockout", "--knockout-shortcuts", "--gain"]),
        // float16 (run.precision); its merges cannot be gated (influence.skipped).
        args(&[
            "audit",
            &path(fixture("transformed/encoder_postnorm_fp16.onnx")),
            "--batch",
            "2",
            "--knockout",
        ]),
        // A lowered model run: lowered, lowered_from in blocks and findings.
        args(&["audit", &path(fixture("transformed/encoder_prenorm_ortopt.onnx")), "--batch", "2"]),
        // Blocks inside control flow (scope, bodies), one branch not measured.
        args(&["scan", &path(fixture("structure/if_sample_rate.onnx"))]),
        args(&["scan", &path(fixture("structure/scan_recurrence.onnx"))]), // not_blocks[].scope
        args(&[
            "audit",
            &path(fixture("structure/if_sample_rate.onnx")),
            "--dim",
            "samples=16",
            "--batch",
            "2",
        ]),
        // Headroom in a float format and in int8 (issue 14).
        args(&["audit", &path(fixture("precision/overflow_stack.onnx")), "--precision", "fp16"]),
        args(&["audit", &path(fixture("precision/outlier_channel.onnx")), "--precision", "int8"]),
    ];
    let documents: Vec<Value> = runs.iter().map(|a| document(a, &[0, 1, 2])).collect();
    assert_eq!(documents.len(), 19);
    // The run that fails writes its structure and says why.
    assert!(documents[10]["run_error"].is_string(), "{}", documents[10]["run_error"]);
    assert_eq!(documents[7]["concat_skips"][0]["skip_ops"].as_array().map(Vec::len), Some(1));
    check_golden("shunt/report", "report", &documents);
}

#[test]
fn verify_documents_keep_their_fields() {
    let dir = tempdir();
    let pin = dir.path().join("pin.toml");
    let run = shunt(&["pin", &path(fixture("resnet18_b.onnx")), "-o", &path(&pin)]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let expect = dir.path().join("expect.toml");
    std::fs::write(&expect, "blocks = 7\nplacement = \"pre-activation\"\n").unwrap();
    let runs = [
        // A model with other shortcuts than the pinned one: differences.
        args(&["verify", &path(fixture("resnet18_a.onnx")), "--pin", &path(&pin)]),
        args(&["verify", &path(fixture("resnet18_b.onnx")), "--pin", &path(&pin)]),
        args(&["verify", &path(fixture("resnet18_b.onnx")), "--expect", &path(&expect)]),
    ];
    let documents: Vec<Value> = runs
        .iter()
        .map(|a| document(&[a.clone(), args(&["--format", "json"])].concat(), &[0, 1]))
        .collect();
    assert_eq!(documents.len(), 3);
    assert_ne!(documents[0]["differences"].as_array().map(Vec::len), Some(0));
    check_golden("shunt/verify", "verify", &documents);
}

#[test]
fn compare_documents_keep_their_fields() {
    let a = path(fixture("resnet18_b.onnx"));
    let b = path(fixture("resnet18_a.onnx"));
    let feed = path(root().join("tests/reference/inputs/resnet18_b.npy"));
    // A second output in B only: an output pair with a note instead of numbers.
    let dir = tempdir();
    let one = write(dir.path(), "one.onnx", &one_block("one", None));
    let mut second = one_block("two", None);
    let extra = second.graph.as_ref().unwrap().output[0].clone();
    second.graph.as_mut().unwrap().output.push(extra);
    let two = write(dir.path(), "two.onnx", &second);
    let runs = [
        args(&["compare", &a, &b, "--feed", &feed]),
        args(&["compare", &a, &b, "--no-run"]),
        args(&["compare", &one, &two, "--batch", "2"]),
        // An error born at a block (issue 14).
        args(&[
            "compare",
            &path(fixture("torch/resnet_cifar_folded.onnx")),
            &path(fixture("transformed/resnet_cifar_qdq_ort.onnx")),
            "--batch",
            "2",
        ]),
    ];
    let documents: Vec<Value> = runs
        .iter()
        .map(|a| document(&[a.clone(), args(&["--format", "json"])].concat(), &[0, 1]))
        .collect();
    assert_eq!(documents.len(), 4);
    assert!(documents[3]["errors"]["born_at"].is_object(), "{}", documents[3]["errors"]);
    assert!(documents[2]["outputs"][1]["note"].is_string(), "{}", documents[2]["outputs"]);
    check_golden("shunt/compare", "compare", &documents);
}

#[test]
fn batch_documents_keep_their_fields() {
    let dir = tempdir();
    std::fs::copy(fixture("resnet18_b.onnx"), dir.path().join("a.onnx")).unwrap();
    std::fs::copy(fixture("rezero.onnx"), dir.path().join("b.onnx")).unwrap();
    std::fs::write(dir.path().join("broken.onnx"), b"not a model").unwrap();
    write(dir.path(), "unknown_op.onnx", &with_unknown_op());
    let folder = path(dir.path());
    let runs = [
        args(&["scan", &folder, "--format", "json"]),
        args(&["audit", &folder, "--format", "json", "--batch", "2", "--jobs", "1"]),
    ];
    let documents: Vec<Value> = runs.iter().map(|a| document(a, &[2])).collect();
    assert_eq!(documents.len(), 2);
    check_golden("shunt/batch", "batch", &documents);
}

/// A planted change to a document.
type Edit = dyn Fn(&mut Value);

/// The field paths of one schema's documents: path → (kinds, optional).
type Fields = BTreeMap<String, (BTreeSet<&'static str>, bool)>;

/// The planted changes a golden list must catch: a field added, removed,
/// made optional, or of another kind; a node reference's own fields.
#[test]
fn field_walk_sees_every_change() {
    let base: Value = serde_json::from_str(
        r#"{"a": 1, "b": [{"c": "x", "n": {"name": "m", "index": 0, "op_type": "Add"}}],
            "summary": {"by_placement": {"pre-norm": 2}}}"#,
    )
    .unwrap();
    let lines = |docs: &[Value]| render("shunt/test", 1, &fields(docs));
    let golden = lines(std::slice::from_ref(&base));
    assert_eq!(
        golden.lines().filter(|l| !l.starts_with('#')).collect::<Vec<_>>(),
        [
            "<node>: object",
            "<node>.index: integer",
            "<node>.name: string",
            "<node>.op_type: string",
            "a: integer",
            "b: array",
            "b[]: object",
            "b[].c: string",
            "b[].n: node",
            "summary: object",
            "summary.by_placement: object",
            "summary.by_placement.*: integer",
        ]
    );
    let changed = |edit: &dyn Fn(&mut Value)| {
        let mut doc = base.clone();
        edit(&mut doc);
        lines(&[doc])
    };
    let edits: [(&str, &Edit); 5] = [
        ("added", &|d| d["b"][0]["d"] = Value::from(true)),
        ("removed", &|d| {
            d["b"][0].as_object_mut().unwrap().remove("c");
        }),
        ("another kind", &|d| d["a"] = Value::from(1.5)),
        ("a node's field", &|d| d["b"][0]["n"]["lowered_from"] = serde_json::json!({"domain": ""})),
        ("optional", &|d| d["b"].as_array_mut().unwrap().push(serde_json::json!({"n": null}))),
    ];
    for (what, edit) in edits {
        assert_ne!(changed(edit), golden, "{what}");
    }
    // Data-keyed objects and nulls are not shape.
    assert_eq!(
        changed(&|d| d["summary"]["by_placement"] = serde_json::json!({"post-norm": 1})),
        golden
    );
    let mut with_null = base.clone();
    with_null["b"].as_array_mut().unwrap().push(serde_json::json!({"c": null, "n": null}));
    assert_eq!(lines(&[base, with_null.clone()]), golden);
    assert!(lines(&[with_null]).contains("b[].c: string"));
}

fn root() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

fn args(list: &[&str]) -> Vec<String> {
    list.iter().map(|s| (*s).to_owned()).collect()
}

fn path(p: impl AsRef<Path>) -> String {
    p.as_ref().display().to_string()
}

/// Runs the binary with `--format json` (unless given) and `--quiet`, and
/// parses what it writes; the exit code must be one of `codes`.
fn document(arguments: &[String], codes: &[i32]) -> Value {
    let mut full: Vec<&str> = arguments.iter().map(String::as_str).collect();
    if !full.contains(&"--format") {
        full.extend(["--format", "json"]);
    }
    full.push("--quiet");
    let run = shunt(&full);
    assert!(
        codes.contains(&run.code),
        "shunt {}: exit {}\n{}",
        full.join(" "),
        run.code,
        run.stderr
    );
    serde_json::from_str(&run.stdout)
        .unwrap_or_else(|e| panic!("shunt {}: not JSON ({e}):\n{}", full.join(" "), run.stdout))
}

fn write(dir: &Path, name: &str, model: &ModelProto) -> String {
    let file = dir.join(name);
    std::fs::write(&file, model.encode_to_vec()).unwrap();
    path(file)
}

/// One residual block beside an `If` node with two bodies.
fn with_subgraph() -> ModelProto {
    let mut then_b = ModelBuilder::new("then", 17);
    let t = then_b.input("t_in", &[Dim::Fixed(1)]);
    then_b.output(&t);
    let body = then_b.finish().graph;
    let mut model = one_block("with_if", None);
    let graph = model.graph.as_mut().unwrap();
    graph.initializer.push(TensorProto {
        name: "cond".into(),
        data_type: 9,
        int32_data: vec![1],
        ..Default::default()
    });
    let branch = |name: &str| AttributeProto {
        name: name.into(),
        r#type: attribute_proto::AttributeType::Graph as i32,
        g: body.clone(),
        ..Default::default()
    };
    graph.node.push(NodeProto {
        op_type: "If".into(),
        name: "branchy".into(),
        input: vec!["cond".into()],
        output: vec!["if_out".into()],
        attribute: vec![branch("then_branch"), branch("else_branch")],
        ..Default::default()
    });
    model
}

/// One residual block whose branch holds an op no runtime knows: the scan
/// reads it, the run fails.
fn with_unknown_op() -> ModelProto {
    one_block("unknown_op", Some("NoSuchOp"))
}

/// A concatenative skip with an `Identity` on its skip path (no committed
/// fixture has an op there).
fn concat_skip_with_an_op() -> ModelProto {
    let mut b = ModelBuilder::new("concat_skip_op", 17);
    let x = b.input("x", &[Dim::batch(), Dim::Fixed(4), Dim::Fixed(8), Dim::Fixed(8)]);
    let f = b.conv("stem", &x, &Conv::new(4, 3).pad(1));
    let skip = b.node("Identity", "keep", &[f.as_str()], &[]);
    let h = b.conv("c1", &f, &Conv::new(4, 3).pad(1));
    let h = b.relu("r1", &h);
    let y = b.node("Concat", "join", &[skip.as_str(), h.as_str()], &[("axis", Attr::Int(1))]);
    b.output(&y);
    b.finish()
}

fn one_block(name: &str, extra_op: Option<&str>) -> ModelProto {
    let mut b = ModelBuilder::new(name, 17);
    let x = b.input("x", &[Dim::batch(), Dim::Fixed(8)]);
    let mut h = b.linear("fc", &x, 8, &Init::HeNormal, false);
    if let Some(op) = extra_op {
        h = b.node(op, "mystery", &[h.as_str()], &[]);
    }
    let y = b.add("add", &x, &h);
    b.output(&y);
    b.finish()
}

/// Compares the documents' fields with the golden list of their schema and
/// version (all documents must declare the same).
fn check_golden(schema: &str, short: &str, documents: &[Value]) {
    let versions: BTreeSet<(String, u64)> = documents
        .iter()
        .map(|d| {
            let name = d["schema"].as_str().unwrap_or_default().to_owned();
            (name, d["schema_version"].as_u64().unwrap_or_default())
        })
        .collect();
    assert_eq!(versions.len(), 1, "documents of several schemas or versions: {versions:?}");
    let (name, version) = versions.into_iter().next().unwrap();
    assert_eq!(name, schema);
    let text = render(schema, version, &fields(documents));
    let file = root().join("tests/golden").join(format!("{short}-v{version}.fields"));
    let update = std::env::var_os("SHUNT_UPDATE_GOLDEN").is_some_and(|v| v == "1");
    let committed = std::fs::read_to_string(&file).ok();
    match committed {
        Some(old) if old == text => {}
        Some(old) => {
            let old_lines: BTreeSet<&str> = old.lines().filter(|l| !l.starts_with('#')).collect();
            let new_lines: BTreeSet<&str> = text.lines().filter(|l| !l.starts_with('#')).collect();
            let mut diff: Vec<String> =
                old_lines.difference(&new_lines).map(|l| format!("- {l}")).collect();
            diff.extend(new_lines.difference(&old_lines).map(|l| format!("+ {l}")));
            panic!(
                "the {schema} document changed shape without a new schema version:\n{}\n\
                 Bump the version ({}), describe the change in docs/formats.md, then write the new \
                 golden list with SHUNT_UPDATE_GOLDEN=1 cargo test --test integration schema:: \
                 (the list of v{version}, {}, stays as it is).",
                diff.join("\n"),
                version_constant(schema),
                file.display()
            );
        }
        None if update => {
            std::fs::create_dir_all(file.parent().unwrap()).unwrap();
            std::fs::write(&file, &text).unwrap();
        }
        None => panic!(
            "no golden field list for {schema} v{version} ({}); write it with \
             SHUNT_UPDATE_GOLDEN=1 cargo test --test integration schema:: and review it",
            file.display()
        ),
    }
}

fn version_constant(schema: &str) -> &'static str {
    match schema {
        "shunt/report" => "REPORT_SCHEMA_VERSION in src/report/mod.rs",
        "shunt/verify" => "VERIFY_SCHEMA_VERSION in src/structure.rs",
        "shunt/compare" => "COMPARE_SCHEMA_VERSION in src/compare.rs",
        "shunt/batch" => "BATCH_SCHEMA_VERSION in src/report/batch.rs",
        _ => "its SCHEMA_VERSION constant",
    }
}

fn render(schema: &str, version: u64, fields: &Fields) -> String {
    let mut text = format!(
        "# {schema} v{version}: field paths and kinds of the documents tests/schema.rs makes.\n\
         # Written by SHUNT_UPDATE_GOLDEN=1 for a new version only; see tests/schema.rs.\n"
    );
    for (path, (kinds, optional)) in fields {
        let mut kinds: Vec<&str> = kinds.iter().copied().filter(|k| *k != "null").collect();
        if kinds.is_empty() {
            kinds.push("null");
        }
        let mark = if *optional { "?" } else { "" };
        text.push_str(&format!("{path}{mark}: {}\n", kinds.join("|")));
    }
    text
}

/// The union of the documents' field paths.
fn fields(documents: &[Value]) -> Fields {
    let mut walk = Walk::default();
    for document in documents {
        walk.value(document, "");
    }
    // A field is optional when some object at its parent path lacks it.
    walk.seen
        .into_iter()
        .map(|(path, kinds)| {
            // Array items, data-keyed values and `<node>` have no parent object.
            let optional = walk.parent.get(&path).is_some_and(|parent| {
                let present = walk.present.get(&path).copied().unwrap_or(0);
                present < walk.objects.get(parent).copied().unwrap_or(0)
            });
            (path, (kinds, optional))
        })
        .collect()
}

#[derive(Default)]
struct Walk {
    /// Kinds seen at each path.
    seen: BTreeMap<String, BTreeSet<&'static str>>,
    /// How many objects were seen at each object path.
    objects: BTreeMap<String, usize>,
    /// How many of its parent objects held each field.
    present: BTreeMap<String, usize>,
    parent: BTreeMap<String, String>,
}

impl Walk {
    fn value(&mut self, value: &Value, path: &str) {
        let kind = match value {
            Value::Null => "null",
            Value::Bool(_) => "bool",
            Value::Number(n) if n.is_f64() => "number",
            Value::Number(_) => "integer",
            Value::String(_) => "string",
            Value::Array(_) => "array",
            Value::Object(map) if is_node(map) => "node",
            Value::Object(_) => "object",
        };
        if !path.is_empty() {
            self.seen.entry(path.to_owned()).or_default().insert(kind);
        }
        match value {
            Value::Array(items) => {
                for item in items {
                    self.value(item, &format!("{path}[]"));
                }
            }
            Value::Object(map) if kind == "node" => self.object(map, "<node>"),
            Value::Object(_) if NESTED.contains(&path) => {}
            Value::Object(map) if MAPS.contains(&path) => {
                for item in map.values() {
                    self.value(item, &format!("{path}.*"));
                }
            }
            Value::Object(map) => self.object(map, path),
            _ => {}
        }
    }

    fn object(&mut self, map: &serde_json::Map<String, Value>, path: &str) {
        if path == "<node>" {
            self.seen.entry(path.to_owned()).or_default().insert("object");
        }
        *self.objects.entry(path.to_owned()).or_default() += 1;
        for (key, item) in map {
            let child = if path.is_empty() { key.clone() } else { format!("{path}.{key}") };
            *self.present.entry(child.clone()).or_default() += 1;
            self.parent.insert(child.clone(), path.to_owned());
            self.value(item, &child);
        }
    }
}

/// A node reference: `name`, `index`, `op_type`, and perhaps `lowered_from`.
fn is_node(map: &serde_json::Map<String, Value>) -> bool {
    let keys: BTreeSet<&str> = map.keys().map(String::as_str).collect();
    let required = ["index", "name", "op_type"];
    required.iter().all(|k| keys.contains(k))
        && keys.iter().all(|k| required.contains(k) || *k == "lowered_from")
}
