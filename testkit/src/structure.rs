//! The models of issue 15 (real models' structure): weights held in
//! Constant nodes, sums that are not blocks, shortcuts from a learned
//! constant, branches of unusual form, regular unspanned layers, batch axes
//! that are not the first, stages of changing layout and blocks inside
//! control flow. Each is committed under `fixtures/structure/` with what an
//! audit of it should find, listed in `fixtures/structure/MANIFEST.txt`.
//!
//! The census of each case is richer than [`crate::fixtures::Census`]: the
//! blocks by shortcut kind and placement as the report names them, the blocks
//! of each stage in order, and the merges that are not blocks by reason.

use std::fmt::Write as _;
use std::io;
use std::path::{Path, PathBuf};

use prost::Message;

use shunt::proto::attribute_proto::AttributeType;
use shunt::proto::{AttributeProto, ModelProto, NodeProto};

use crate::zoo;

/// What a scan of a case should find.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct Expect {
    /// Blocks by shortcut kind (`identity`, `projection`, …), kinds with
    /// no block left out.
    pub shortcuts: Vec<(&'static str, usize)>,
    /// Blocks by placement (`post-activation`, `pre-norm`, …).
    pub placements: Vec<(&'static str, usize)>,
    /// The number of blocks of each stage, in order.
    pub stages: Vec<usize>,
    /// Merges that are not blocks, by reason (`no-learned-layer`, …).
    pub not_blocks: Vec<(&'static str, usize)>,
}

impl Expect {
    /// The number of residual blocks.
    pub fn blocks(&self) -> usize {
        self.shortcuts.iter().map(|s| s.1).sum()
    }
}

/// One committed case.
#[derive(Debug, Clone)]
pub struct Case {
    /// Path under `fixtures/`, with `/` separators.
    pub path: &'static str,
    /// The model.
    pub model: ModelProto,
    /// The item of issue 15 it belongs to and what it isolates.
    pub isolates: &'static str,
    /// What a scan should find.
    pub expect: Expect,
    /// Where the expected census comes from: check-values ids, a module
    /// definition, or "recalled from memory".
    pub source: &'static str,
}

/// Every case, in manifest order.
pub fn all() -> Vec<Case> {
    let r18 = zoo::ResNetConfig { width_divisor: 32, ..zoo::ResNetConfig::resnet18() };
    vec![Case {
        path: "structure/resnet18_constant_weights.onnx",
        model: weights_as_constants(zoo::resnet(&r18)),
        isolates: "item 8: fixtures/resnet18_b.onnx with every initializer a Constant node and no value_info",
        expect: Expect {
            shortcuts: vec![("identity", 5), ("projection", 3)],
            placements: vec![("post-activation", 8)],
            stages: vec![2, 2, 2, 2],
            not_blocks: Vec::new(),
        },
        source: "R1 R2 R3",
    }]
}

/// A converter's output: every initializer of `model` becomes a Constant
/// node at the head of the graph (same tensor, same name), and `value_info`
/// is dropped, as converters that fold every weight into the graph leave it.
pub fn weights_as_constants(mut model: ModelProto) -> ModelProto {
    let graph = model.graph.as_mut().expect("a built model has a graph");
    let initializers = std::mem::take(&mut graph.initializer);
    let mut nodes: Vec<NodeProto> = initializers
        .into_iter()
        .map(|t| NodeProto {
            output: vec![t.name.clone()],
            name: format!("{}.constant", t.name),
            op_type: "Constant".to_owned(),
            attribute: vec![AttributeProto {
                name: "value".to_owned(),
                r#type: AttributeType::Tensor as i32,
                t: Some(Box::new(t)),
                ..AttributeProto::default()
            }],
            ..NodeProto::default()
        })
        .collect();
    nodes.append(&mut graph.node);
    graph.node = nodes;
    graph.value_info.clear();
    model
}

/// The encoded bytes of a case's model.
pub fn encode(case: &Case) -> Vec<u8> {
    case.model.encode_to_vec()
}

/// The text of `fixtures/structure/MANIFEST.txt` for `cases`.
pub fn manifest(cases: &[Case]) -> String {
    let mut out = String::new();
    out.push_str(concat!(
        "# shunt structure cases (issue 15), written by `cargo run --release --example fixtures`;\n",
        "# do not edit by hand. Columns: file | item and what it isolates | expected census | source.\n",
        "# Census: blocks by shortcut kind and by placement, blocks per stage in order, and merges\n",
        "# that are not blocks by reason.\n",
    ));
    let list = |items: &[(&str, usize)]| {
        items.iter().map(|(k, n)| format!("{k}={n}")).collect::<Vec<_>>().join(" ")
    };
    for case in cases {
        let e = &case.expect;
        let stages: Vec<String> = e.stages.iter().map(usize::to_string).collect();
        let _ = writeln!(
            out,
            "{} | {} | blocks={} ({}; {}) stages=[{}] not-blocks=({}) | {}",
            case.path,
            case.isolates,
            e.blocks(),
            list(&e.shortcuts),
            list(&e.placements),
            stages.join(","),
            list(&e.not_blocks),
            case.source,
        );
    }
    out
}

/// Writes every case and the manifest under `dir` (the `fixtures/` folder);
/// returns the paths written.
pub fn write_all(dir: &Path) -> io::Result<Vec<PathBuf>> {
    let cases = all();
    let mut written = Vec::new();
    for case in &cases {
        let path = dir.join(case.path);
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent)?;
        }
        std::fs::write(&path, encode(case))?;
        written.push(path);
    }
    let path = dir.join("structure/MANIFEST.txt");
    std::fs::write(&path, manifest(&cases))?;
    written.push(path);
    Ok(written)
}
