//! The first stage: open a model. Decode the file (checking its external
//! data), note what the file says of itself, lower its fused and quantised
//! operators, and analyse it (graph, blocks, classification, stages, bare
//! runs); then, for a run, keep what the inference engine is to run. Also
//! the second stage, [`Opened::plan`]: what is fed to the model.
//!
//! **Invariant:** a model is decoded, lowered and analysed once, here;
//! nothing downstream reads the file again (the engine reads the file
//! itself only when lowering changed nothing).

use std::path::{Path, PathBuf};

use prost::Message;

use crate::classify::{self, BareRun, Classification, ClassifyConfig, Stage};
use crate::error::{Diagnostic, Result};
use crate::graph::{self, BuildConfig, Dominance, Graph};
use crate::load::{self, ExternalData, LoadConfig};
use crate::lower::{self, LowerConfig, Lowered, precision};
use crate::probe::inputs::{self, InputConfig, InputPlan};
use crate::proto::{ModelProto, ValueInfoProto};
use crate::residual::{self, Detection};

/// Limits for reading, building and inspecting a model, and what lowering
/// cannot work out from the model alone.
#[derive(Debug, Clone)]
pub struct OpenConfig {
    /// Limits for reading the file.
    pub load: LoadConfig,
    /// Limits for building the graph.
    pub build: BuildConfig,
    /// Limits for reading weights.
    pub classify: ClassifyConfig,
    /// What lowering cannot work out from the model alone.
    pub lower: LowerConfig,
}

impl OpenConfig {
    /// The documented defaults, the only place they are written (the
    /// command line's defaults read them): files up to 4 GiB, graphs up to
    /// 1,000,000 nodes, weights up to 16 MiB read to check for all zeros,
    /// NCHWc block size from the model or this machine.
    pub const STANDARD: OpenConfig = OpenConfig {
        load: LoadConfig { max_file_bytes: 4 << 30 },
        build: BuildConfig { max_nodes: 1_000_000 },
        classify: ClassifyConfig { max_inspect_bytes: 16 << 20 },
        lower: LowerConfig::STANDARD,
    };

    /// [`OpenConfig::STANDARD`].
    pub fn standard() -> OpenConfig {
        OpenConfig::STANDARD
    }
}

/// What the model file says of itself, read before lowering changes it.
#[derive(Debug, Clone)]
pub struct FileFacts {
    /// The path as given (or the label of an in-memory model).
    pub path: String,
    /// Size of the file (of the encoded model, in memory).
    pub file_bytes: u64,
    /// ONNX IR version.
    pub ir_version: i64,
    /// Imported operator sets: `(domain, version)`.
    pub opsets: Vec<(String, i64)>,
    /// `producer_name`.
    pub producer_name: String,
    /// `producer_version`.
    pub producer_version: String,
    /// Name of the main graph.
    pub graph_name: String,
    /// Nodes in the main graph.
    pub nodes: usize,
    /// Initializers.
    pub initializers: usize,
    /// Total elements of all initializers.
    pub parameters: u64,
    /// Initializers whose payload lives in external files.
    pub external_tensors: usize,
    /// Total bytes of external payloads.
    pub external_bytes: u64,
    /// Graph inputs that are not initializers, as declared.
    pub inputs: Vec<ValueInfoProto>,
    /// Graph outputs, as declared.
    pub outputs: Vec<ValueInfoProto>,
}

impl FileFacts {
    fn of(path: &str, file_bytes: u64, model: &ModelProto, external: &ExternalData) -> FileFacts {
        let graph = model.graph.as_ref();
        let inits = graph.map_or(&[][..], |g| g.initializer.as_slice());
        let mut external_tensors = 0;
        let mut external_bytes = 0;
        for t in inits {
            if let Ok(Some(r)) = external.resolve(t) {
                external_tensors += 1;
                external_bytes += r.length;
            }
        }
        let init_names: std::collections::HashSet<&str> =
            inits.iter().map(|t| t.name.as_str()).collect();
        FileFacts {
            path: path.to_owned(),
            file_bytes,
            ir_version: model.ir_version,
            opsets: model.opset_import.iter().map(|o| (o.domain.clone(), o.version)).collect(),
            producer_name: model.producer_name.clone(),
            producer_version: model.producer_version.clone(),
            graph_name: graph.map_or(String::new(), |g| g.name.clone()),
            nodes: graph.map_or(0, |g| g.node.len()),
            initializers: inits.len(),
            parameters: graph.map_or(0, load::tensor::parameter_count),
            external_tensors,
            external_bytes,
            inputs: graph.map_or(Vec::new(), |g| {
                g.input
                    .iter()
                    .filter(|vi| !init_names.contains(vi.name.as_str()))
                    .cloned()
                    .collect()
            }),
            outputs: graph.map_or(Vec::new(), |g| g.output.clone()),
        }
    }
}

/// The structural analysis of one model (or of one body of a control-flow
/// node).
#[derive(Debug)]
pub struct Analysis {
    /// The dataflow graph.
    pub graph: Graph,
    /// Blocks, concatenative skips, rejected merges.
    pub detection: Detection,
    /// The classification of each block.
    pub classifications: Vec<Classification>,
    /// Stages.
    pub stages: Vec<Stage>,
    /// The stage of each block.
    pub stage_of: Vec<Option<usize>>,
    /// Bare runs.
    pub bare_runs: Vec<BareRun>,
    /// Diagnostics from building the graph.
    pub diagnostics: Vec<Diagnostic>,
    /// Operators lowered before the analysis: `(domain, op_type, nodes)`.
    pub lowered: Vec<(String, String, usize)>,
    /// The bodies of control-flow nodes (`If` branches, `Loop` and `Scan`
    /// bodies) at every depth, outer before inner, each analysed as a graph
    /// of its own; empty in the analysis of a body.
    pub bodies: Vec<Body>,
}

/// One step from a graph into a body: the node that carries it and the
/// attribute that holds it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ScopeStep {
    /// The node's name (`{op_type}#{index}` when unnamed).
    pub node: String,
    /// Its op type (`If`, `Loop`, `Scan`).
    pub op: String,
    /// Its position in its graph's node list.
    pub index: usize,
    /// The attribute holding the body (`then_branch`, `else_branch`, `body`).
    pub attribute: String,
}

/// The body of a control-flow node, analysed.
#[derive(Debug)]
pub struct Body {
    /// The steps from the main graph down to it (one for a body of a main
    /// graph node).
    pub scope: Vec<ScopeStep>,
    /// The outer tensors it reads, which its analysis takes as inputs (or,
    /// for outer weights, as initializers).
    pub captured: Vec<String>,
    /// Its analysis (`bodies` empty: they are all in the main analysis).
    pub analysis: Analysis,
}

/// A scope in words: `If 'switch' then_branch › Scan 'rnn' body`.
pub fn scope_text(scope: &[ScopeStep]) -> String {
    let steps: Vec<String> =
        scope.iter().map(|s| format!("{} '{}' {}", s.op, s.node, s.attribute)).collect();
    steps.join(" › ")
}

/// Lowers and analyses a decoded model.
pub fn analyse(model: ModelProto, external: ExternalData, config: &OpenConfig) -> Result<Analysis> {
    let lowered = lower::lower(model, &external, &config.lower)?;
    analyse_lowered(lowered, external, config)
}

/// Analyses a lowered model, then the bodies of its control-flow nodes.
fn analyse_lowered(
    lowered: Lowered,
    external: ExternalData,
    config: &OpenConfig,
) -> Result<Analysis> {
    let summary = lowered.summary();
    let ir_version = lowered.model.ir_version;
    let opsets = lowered.model.opset_import.clone();
    let (mut graph, mut diagnostics) =
        graph::build(lowered.model, external.clone(), &config.build)?;
    diagnostics.extend(lowered.notes);
    graph.set_origins(lowered.origins);
    let mut analysis = analyse_graph(graph, diagnostics, config, None);
    analysis.lowered = summary;
    let context = BodyContext { ir_version, opsets: &opsets, external: &external, config };
    let mut bodies = Vec::new();
    let mut notes = Vec::new();
    let mut stages = analysis.stages.len();
    search_bodies(&analysis.graph, &[], &context, &mut stages, &mut bodies, &mut notes);
    analysis.diagnostics.extend(notes);
    analysis.bodies = bodies;
    Ok(analysis)
}

/// What every body of one model is analysed with.
struct BodyContext<'a> {
    ir_version: i64,
    opsets: &'a [crate::proto::OperatorSetIdProto],
    external: &'a ExternalData,
    config: &'a OpenConfig,
}

/// Analyses every body of `outer`'s nodes, and theirs, into `out` (outer
/// before inner). `stages` counts the stages before them, so that a body's
/// notes name its stages as the report numbers them. A body whose graph
/// cannot be built is left out with a warning.
fn search_bodies(
    outer: &Graph,
    scope: &[ScopeStep],
    context: &BodyContext<'_>,
    stages: &mut usize,
    out: &mut Vec<Body>,
    notes: &mut Vec<Diagnostic>,
) {
    for node in outer.nodes.iter().filter(|n| n.subgraphs > 0) {
        for (attribute, body) in crate::load::attr::graphs(&node.attrs) {
            let mut path = scope.to_vec();
            path.push(ScopeStep {
                node: node.name.clone(),
                op: node.op.clone(),
                index: node.index,
                attribute: attribute.to_owned(),
            });
            let where_ = scope_text(&path);
            let made = graph::body_model(outer, body, context.ir_version, context.opsets);
            let built = graph::build(made.model, context.external.clone(), &context.config.build);
            let (graph, diagnostics) = match built {
                Ok(b) => b,
                Err(e) => {
                    notes.push(Diagnostic::warning(
                        Some(&node.name),
                        format!("{where_}: not searched for blocks: {}", e.message()),
                    ));
                    continue;
                }
            };
            let analysis = analyse_graph(graph, diagnostics, context.config, Some(*stages));
            *stages += analysis.stages.len();
            notes.extend(
                analysis.diagnostics.iter().map(|d| Diagnostic {
                    message: format!("{where_}: {}", d.message),
                    ..d.clone()
                }),
            );
            let mut inner = Vec::new();
            search_bodies(&analysis.graph, &path, context, stages, &mut inner, notes);
            out.push(Body { scope: path, captured: made.captured, analysis });
            out.extend(inner);
        }
    }
}

/// Detection, classification, stages and bare runs of a built graph; the
/// regular-pattern notes number stages from `stage_offset` (a body's stages
/// follow the main graph's and earlier bodies' in the report).
fn analyse_graph(
    graph: Graph,
    mut diagnostics: Vec<Diagnostic>,
    config: &OpenConfig,
    stage_offset: Option<usize>,
) -> Analysis {
    let dom = Dominance::compute(&graph);
    let detection = residual::find_blocks(&graph, &dom);
    let classifications: Vec<Classification> =
        classify::classify_all(&graph, &detection.blocks, &config.classify);
    let (stages, stage_of) = classify::stages(&graph, &detection.blocks);
    let runs = classify::bare_runs(&graph, &detection.blocks, &stage_of);
    for pattern in &runs.regular {
        diagnostics.push(regular_pattern_note(&graph, pattern, stage_offset.unwrap_or(0)));
    }
    let bare_runs = runs.anomalies;
    Analysis {
        graph,
        detection,
        classifications,
        stages,
        stage_of,
        bare_runs,
        diagnostics,
        lowered: Vec::new(),
        bodies: Vec::new(),
    }
}

/// The note that reports a stage's regular unspanned layers once.
fn regular_pattern_note(g: &Graph, pattern: &classify::RegularRun, offset: usize) -> Diagnostic {
    let first = &pattern.runs[0];
    let layers: Vec<&str> = first.layers.iter().map(|&n| g.node(n).name.as_str()).collect();
    Diagnostic::note(
        None,
        format!(
            "stage {}: {} of its gaps between blocks hold the same {} learned layer(s) that no \
             shortcut spans (first: {}); read as the architecture's pattern, not as lost shortcuts",
            pattern.stage + offset + 1,
            pattern.runs.len(),
            first.layers.len(),
            layers.join(", ")
        ),
    )
}

/// What the model is opened for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Purpose {
    /// The structure only: no payload is read, nothing is kept for a run.
    Analyse,
    /// A run: external-data checksums are verified and what the engine
    /// runs is kept.
    Run,
    /// A run with gates (knockout, gain): also a copy of the lowered model
    /// for the gate surgery.
    GatedRun,
}

/// A half-precision model as the engine is to run it (the choice of
/// native or float32 twin is made when measuring).
pub struct HalfModel {
    /// Its half-precision type.
    pub half: precision::Half,
    /// The lowered model.
    pub model: ModelProto,
    /// Its external data.
    pub external: ExternalData,
}

/// What the inference engine runs of an opened model.
pub struct Runnable {
    /// The file, when the engine reads the model as it is.
    pub path: Option<PathBuf>,
    /// The encoded (lowered) model, when not the file itself.
    pub bytes: Option<Vec<u8>>,
    /// The folder external data resolves against.
    pub dir: Option<PathBuf>,
    /// For a model with half-precision types.
    pub half: Option<HalfModel>,
    /// The lowered model for surgery: the gates ([`Purpose::GatedRun`]),
    /// and bringing out the blocks inside control flow (a model whose main
    /// graph has a node with a body).
    pub surgery: Option<ModelProto>,
}

/// A model opened: what its file says, its analysis, and (for a run) what
/// the engine runs.
pub struct Opened {
    /// What the file says of itself.
    pub file: FileFacts,
    /// The structural analysis.
    pub analysis: Analysis,
    runnable: Option<Runnable>,
}

/// Opens a model file for `purpose`: load, checksums (for a run: the engine
/// reads the external payloads later), lower, analyse. Errors name the file.
pub fn open_file(path: &Path, config: &OpenConfig, purpose: Purpose) -> Result<Opened> {
    let loaded = load::load(path, &config.load)?;
    let run = purpose != Purpose::Analyse;
    if run {
        load::verify_checksums(&loaded.model, &loaded.external).map_err(|e| e.at(path))?;
    }
    let file = FileFacts::of(
        &path.display().to_string(),
        loaded.file_bytes,
        &loaded.model,
        &loaded.external,
    );
    let lowered =
        lower::lower(loaded.model, &loaded.external, &config.lower).map_err(|e| e.at(path))?;
    let runnable = run.then(|| {
        // The engine runs what was analysed: the lowered model when a
        // rewrite changed it (external payloads still resolve against the
        // model's folder), else the file itself.
        let bytes = lowered.changed().then(|| lowered.model.encode_to_vec());
        let dir = path.parent().map(|d| if d.as_os_str().is_empty() { Path::new(".") } else { d });
        Runnable {
            path: bytes.is_none().then(|| path.to_path_buf()),
            dir: dir.map(Path::to_path_buf),
            bytes,
            half: half_model(&lowered.model, &loaded.external),
            // A copy of the decoded model (payloads in `raw_data` are
            // shared, not copied), for gates and for bringing out blocks
            // inside control flow.
            surgery: (purpose == Purpose::GatedRun || has_bodies(&lowered.model))
                .then(|| lowered.model.clone()),
        }
    });
    let analysis = analyse_lowered(lowered, loaded.external, config).map_err(|e| e.at(path))?;
    Ok(Opened { file, analysis, runnable })
}

/// Opens an in-memory model (no external data; tests, benchmarks); `label`
/// stands for the path.
pub fn open_model(
    model: ModelProto,
    label: &str,
    config: &OpenConfig,
    purpose: Purpose,
) -> Result<Opened> {
    let external = ExternalData::none();
    let file = FileFacts::of(label, model.encoded_len() as u64, &model, &external);
    let lowered = lower::lower(model, &external, &config.lower)?;
    let runnable = (purpose != Purpose::Analyse).then(|| Runnable {
        path: None,
        dir: None,
        bytes: Some(lowered.model.encode_to_vec()),
        half: half_model(&lowered.model, &external),
        surgery: (purpose == Purpose::GatedRun || has_bodies(&lowered.model))
            .then(|| lowered.model.clone()),
    });
    let analysis = analyse_lowered(lowered, external, config)?;
    Ok(Opened { file, analysis, runnable })
}

/// Whether a node of the main graph carries a body (If, Loop, Scan).
fn has_bodies(model: &ModelProto) -> bool {
    model
        .graph
        .as_ref()
        .is_some_and(|g| g.node.iter().any(|n| crate::load::attr::subgraphs(n).next().is_some()))
}

fn half_model(model: &ModelProto, external: &ExternalData) -> Option<HalfModel> {
    precision::half_type(model).map(|half| HalfModel {
        half,
        model: model.clone(),
        external: external.clone(),
    })
}

impl Opened {
    /// The second stage: plans what is fed, from the model's own input
    /// declarations.
    pub fn plan(&self, config: &InputConfig) -> Result<InputPlan> {
        let specs = inputs::input_specs(&self.analysis.graph);
        inputs::plan(&specs, config)
    }

    /// What the engine runs, handed over once (`None` for a model opened
    /// for [`Purpose::Analyse`]). The analysis lets go of the weights it
    /// read, so that they are not held twice while the engine holds its own.
    pub fn take_runnable(&mut self) -> Option<Runnable> {
        let runnable = self.runnable.take();
        if runnable.is_some() {
            self.analysis.graph.release_payloads();
            for body in &mut self.analysis.bodies {
                body.analysis.graph.release_payloads();
            }
        }
        runnable
    }
}
