//! The structural audit: runs load → graph → residual → classify and maps
//! the results onto [`report`] types by hand. This is the only module that
//! knows every stage before the report.

use std::collections::BTreeMap;
use std::path::Path;

use crate::classify::{self, BareRun, ClassifyConfig, Kind, Stage, StaticDead};
use crate::error::{Diagnostic, Result, Severity};
use crate::findings::{self, BlockFacts, FindingConfig, Run};
use crate::graph::{self, BuildConfig, Dim, Dominance, Graph, NodeId, ValueId};
use crate::load::{self, ExternalData, LoadConfig, tensor};
use crate::lower::{self, LowerConfig, Lowered};
use crate::proto::ModelProto;
use crate::report::{self, *};
use crate::residual::{self, Detection, Reason, ShortcutKind};

/// Everything the structural audit needs to know.
#[derive(Debug, Clone)]
pub struct ScanConfig {
    /// Limits for reading the file.
    pub load: LoadConfig,
    /// Limits for building the graph.
    pub build: BuildConfig,
    /// Limits for reading weights.
    pub classify: ClassifyConfig,
    /// What lowering cannot work out from the model alone.
    pub lower: LowerConfig,
}

impl ScanConfig {
    /// The documented defaults: files up to 4 GiB, graphs up to 1,000,000
    /// nodes, weights up to 16 MiB read to check for all zeros.
    pub fn standard() -> ScanConfig {
        ScanConfig {
            load: LoadConfig { max_file_bytes: 4 << 30 },
            build: BuildConfig { max_nodes: 1_000_000 },
            classify: ClassifyConfig { max_inspect_bytes: 16 << 20 },
            lower: LowerConfig::standard(),
        }
    }
}

/// The structural analysis of one model, before it becomes a report.
#[derive(Debug)]
pub struct Analysis {
    /// The dataflow graph.
    pub graph: Graph,
    /// Blocks, concatenative skips, rejected merges.
    pub detection: Detection,
    /// The classification of each block.
    pub kinds: Vec<Kind>,
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
}

/// Lowers and analyses a decoded model.
pub fn analyse(model: ModelProto, external: ExternalData, config: &ScanConfig) -> Result<Analysis> {
    let lowered = lower::lower(model, &external, &config.lower)?;
    analyse_lowered(lowered, external, config)
}

/// Analyses a lowered model.
pub fn analyse_lowered(
    lowered: Lowered,
    external: ExternalData,
    config: &ScanConfig,
) -> Result<Analysis> {
    let summary = lowered.summary();
    let (mut graph, mut diagnostics) = graph::build(lowered.model, external, &config.build)?;
    diagnostics.extend(lowered.notes);
    graph.set_origins(lowered.origins);
    let dom = Dominance::compute(&graph);
    let detection = residual::find_blocks(&graph, &dom);
    let kinds: Vec<Kind> = classify::classify_all(&graph, &detection.blocks, &config.classify);
    let (stages, stage_of) = classify::stages(&graph, &detection.blocks);
    let runs = classify::bare_runs(&graph, &detection.blocks, &stage_of);
    for pattern in &runs.regular {
        diagnostics.push(regular_pattern_note(&graph, pattern));
    }
    let bare_runs = runs.anomalies;
    for (i, n) in graph.nodes.iter().enumerate() {
        if n.subgraphs > 0 {
            diagnostics.push(Diagnostic::note(
                Some(&n.name),
                format!(
                    "{} carries {} subgraph(s) that were not searched for blocks",
                    n.op, n.subgraphs
                ),
            ));
        }
        let _ = i;
    }
    Ok(Analysis {
        graph,
        detection,
        kinds,
        stages,
        stage_of,
        bare_runs,
        diagnostics,
        lowered: summary,
    })
}

/// The note that reports a stage's regular unspanned layers once.
fn regular_pattern_note(g: &Graph, pattern: &classify::RegularRun) -> Diagnostic {
    let first = &pattern.runs[0];
    let layers: Vec<&str> = first.layers.iter().map(|&n| g.node(n).name.as_str()).collect();
    Diagnostic::note(
        None,
        format!(
            "stage {}: {} of its gaps between blocks hold the same {} learned layer(s) that no \
             shortcut spans (first: {}); read as the architecture's pattern, not as lost shortcuts",
            pattern.stage + 1,
            pattern.runs.len(),
            first.layers.len(),
            layers.join(", ")
        ),
    )
}

/// Reads, decodes and analyses a model file.
pub fn scan_file(path: &Path, config: &ScanConfig) -> Result<Report> {
    let loaded = load::load(path, &config.load)?;
    let info =
        model_info(&path.display().to_string(), loaded.file_bytes, &loaded.model, &loaded.external);
    let analysis = analyse(loaded.model, loaded.external, config).map_err(|e| e.at(path))?;
    Ok(report_of(info, &analysis))
}

/// Analyses an in-memory model (tests, benchmarks); `label` stands for the path.
pub fn scan_model(model: ModelProto, label: &str, config: &ScanConfig) -> Result<Report> {
    let external = ExternalData::none();
    let info = model_info(label, 0, &model, &external);
    let analysis = analyse(model, external, config)?;
    Ok(report_of(info, &analysis))
}

pub(crate) fn model_info(
    path: &str,
    file_bytes: u64,
    model: &ModelProto,
    external: &ExternalData,
) -> ModelInfo {
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
    let tensor_rows = |list: &[crate::proto::ValueInfoProto], skip_inits: bool| -> Vec<TensorRow> {
        list.iter()
            .filter(|vi| !(skip_inits && init_names.contains(vi.name.as_str())))
            .map(|vi| {
                let (dtype, shape) = match &vi.r#type {
                    Some(crate::proto::TypeProto { value: Some(crate::proto::type_proto::Value::TensorType(t)), .. }) => (
                        t.elem_type,
                        t.shape.as_ref().map(|s| {
                            s.dim
                                .iter()
                                .map(|d| match &d.value {
                                    Some(crate::proto::tensor_shape_proto::dimension::Value::DimValue(v)) => v.to_string(),
                                    Some(crate::proto::tensor_shape_proto::dimension::Value::DimParam(p)) if !p.is_empty() => p.clone(),
                                    _ => "?".to_owned(),
                                })
                                .collect()
                        }),
                    ),
                    _ => (0, None),
                };
                TensorRow { name: vi.name.clone(), dtype: tensor::dtype_name(dtype).to_owned(), shape }
            })
            .collect()
    };
    let producer = format!("{} {}", model.producer_name, model.producer_version).trim().to_owned();
    ModelInfo {
        path: path.to_owned(),
        file_bytes,
        ir_version: model.ir_version,
        opsets: model
            .opset_import
            .iter()
            .map(|o| OpsetRow { domain: o.domain.clone(), version: o.version })
            .collect(),
        producer,
        graph_name: graph.map_or(String::new(), |g| g.name.clone()),
        nodes: graph.map_or(0, |g| g.node.len()),
        initializers: inits.len(),
        parameters: graph.map_or(0, tensor::parameter_count),
        external_tensors,
        external_bytes,
        inputs: graph.map_or(Vec::new(), |g| tensor_rows(&g.input, true)),
        outputs: graph.map_or(Vec::new(), |g| tensor_rows(&g.output, false)),
    }
}

fn node_ref(g: &Graph, n: NodeId) -> NodeRef {
    let node = g.node(n);
    NodeRef {
        name: node.name.clone(),
        index: node.index,
        op_type: node.op.clone(),
        lowered_from: node.origin.as_ref().map(|o| NodeOrigin {
            name: o.name.clone(),
            index: o.index,
            op_type: o.op_type.clone(),
            domain: o.domain.clone(),
        }),
    }
}

fn value_name(g: &Graph, v: ValueId) -> String {
    g.value(v).name.clone()
}

fn dims(shape: &[Dim]) -> Vec<String> {
    shape.iter().map(ToString::to_string).collect()
}

/// The report's name for a shortcut kind.
pub fn shortcut_name(kind: ShortcutKind) -> &'static str {
    match kind {
        ShortcutKind::Identity => "identity",
        ShortcutKind::Projection => "projection",
        ShortcutKind::Resampled => "resampled",
        ShortcutKind::Parameter => "parameter",
    }
}

/// Builds the report of an analysis, with its structural findings.
pub fn report_of(model: ModelInfo, a: &Analysis) -> Report {
    let mut report = structure_report("scan", model, a);
    let facts = block_facts(&report);
    set_findings(&mut report, &facts, &standard_findings());
    report
}

/// The default thresholds of findings (docs/statistics.md).
pub fn standard_findings() -> FindingConfig {
    FindingConfig {
        dead_below: 0.01,
        dominant_above: 10.0,
        dead_channels_above: 0.5,
        depth_factor: 100.0,
    }
}

/// The structural facts findings need, one per block of the report.
pub fn block_facts(report: &Report) -> Vec<BlockFacts> {
    report
        .blocks
        .iter()
        .map(|b| BlockFacts {
            static_dead: b
                .static_dead
                .as_ref()
                .map(|d| format!("{} at node '{}'", d.reason, d.node.name)),
            depth: b.depth,
            ..BlockFacts::default()
        })
        .collect()
}

/// Computes the findings of `facts` and stores them in the report.
pub fn set_findings(report: &mut Report, facts: &[BlockFacts], config: &FindingConfig) {
    let runs: Vec<Run> = report
        .bare_runs
        .iter()
        .map(|r| Run {
            after: r.after_block,
            before: r.before_block,
            layers: r.layers.iter().map(|l| l.name.clone()).collect(),
        })
        .collect();
    report.findings = findings::findings(facts, &runs, config)
        .into_iter()
        .map(|f| FindingRow {
            code: f.code.as_str().to_owned(),
            block: f.block,
            node: f.block.and_then(|id| report.blocks.get(id - 1)).map(|b| b.merge.clone()),
            message: f.message,
        })
        .collect();
}

/// The rows of an analysis, without findings, for `command` (`scan`, `audit`).
pub(crate) fn structure_report(command: &str, model: ModelInfo, a: &Analysis) -> Report {
    let g = &a.graph;
    let det = &a.detection;
    let labelled = |list: &[(NodeId, String)]| -> Vec<LabelledNode> {
        list.iter()
            .map(|(n, label)| LabelledNode { node: node_ref(g, *n), label: label.clone() })
            .collect()
    };
    let blocks: Vec<BlockRow> = det
        .blocks
        .iter()
        .zip(&a.kinds)
        .enumerate()
        .map(|(i, (b, k))| BlockRow {
            id: i + 1,
            stage: a.stage_of[i].map(|s| s + 1),
            merge: node_ref(g, b.merge),
            output: value_name(g, b.output),
            output_shape: g.shape(b.output).map(dims),
            fork: value_name(g, b.fork),
            shortcut: ShortcutRow {
                kind: shortcut_name(b.shortcut.kind).to_owned(),
                projected: b.shortcut.projected,
                input: value_name(g, b.shortcut.input),
                ops: b.shortcut.ops.iter().map(|&n| node_ref(g, n)).collect(),
            },
            branch: BranchRow {
                inputs: b.branch_inputs.iter().map(|&v| value_name(g, v)).collect(),
                op_count: b.branch.len(),
                layers: k
                    .layers
                    .iter()
                    .map(|l| LayerRow {
                        node: node_ref(g, l.node),
                        kernel: l.kernel.clone(),
                        in_channels: l.in_channels,
                        out_channels: l.out_channels,
                        strides: l.strides.clone(),
                        groups: l.groups,
                    })
                    .collect(),
                norms: labelled(&k.norms),
                activations: labelled(&k.activations),
                gates: k.gates,
                end_scale: k.end_scale.as_ref().map(|e| EndScaleRow {
                    node: node_ref(g, e.node),
                    tensor: value_name(g, e.tensor),
                    elements: e.summary.map(|s| s.elements),
                    min: e.summary.map(|s| s.min),
                    max: e.summary.map(|s| s.max),
                    mean_abs: e.summary.map(|s| s.mean_abs),
                }),
            },
            placement: k.placement.as_str().to_owned(),
            placement_node: k.placement_node.map(|n| node_ref(g, n)),
            static_dead: k.static_dead.map(|d| {
                let (reason, n) = match d {
                    StaticDead::ZeroScale(n) => ("zero-scale", n),
                    StaticDead::ZeroNormScale(n) => ("zero-norm-scale", n),
                    StaticDead::ZeroWeights(n) => ("zero-weights", n),
                };
                DeadRow { reason: reason.to_owned(), node: node_ref(g, n) }
            }),
            parent: b.parent.map(|p| p + 1),
            depth: b.depth,
            children: b.children,
            stats: None,
        })
        .collect();
    let concat_skips: Vec<ConcatRow> = det
        .concat_skips
        .iter()
        .enumerate()
        .map(|(i, c)| ConcatRow {
            id: i + 1,
            concat: node_ref(g, c.concat),
            output: value_name(g, c.output),
            fork: value_name(g, c.fork),
            skip_ops: c.skip.ops.iter().map(|&n| node_ref(g, n)).collect(),
            branch_op_count: c.branch.len(),
            branch_layers: c
                .branch
                .iter()
                .filter(|&&n| crate::graph::op::is_parametrised(g, n))
                .count(),
            parent: c.parent.map(|p| p + 1),
            depth: c.depth,
        })
        .collect();
    let mut by_shortcut = BTreeMap::new();
    let mut by_placement = BTreeMap::new();
    for b in &blocks {
        *by_shortcut.entry(b.shortcut.kind.clone()).or_insert(0) += 1;
        *by_placement.entry(b.placement.clone()).or_insert(0) += 1;
    }
    let concat_parents: std::collections::HashSet<usize> =
        concat_skips.iter().filter_map(|c| c.parent).collect();
    let summary = Summary {
        blocks: blocks.len(),
        by_shortcut,
        by_placement,
        concat_skips: concat_skips.len(),
        long_skips: blocks.iter().filter(|b| b.children > 0).count() + concat_parents.len(),
        static_dead: blocks.iter().filter(|b| b.static_dead.is_some()).count(),
        bare_runs: a.bare_runs.len(),
        plain: blocks.is_empty() && concat_skips.is_empty(),
    };
    Report {
        schema: report::REPORT_SCHEMA.to_owned(),
        schema_version: report::REPORT_SCHEMA_VERSION,
        command: command.to_owned(),
        model,
        lowered: a
            .lowered
            .iter()
            .map(|(domain, op_type, nodes)| LoweredRow {
                domain: domain.clone(),
                op_type: op_type.clone(),
                nodes: *nodes,
            })
            .collect(),
        run: None,
        run_error: None,
        findings: Vec::new(),
        summary,
        stages: a
            .stages
            .iter()
            .enumerate()
            .map(|(i, s)| StageRow {
                id: i + 1,
                shape: dims(&s.shape),
                blocks: s.blocks.iter().map(|b| b + 1).collect(),
            })
            .collect(),
        blocks,
        concat_skips,
        bare_runs: a
            .bare_runs
            .iter()
            .map(|r| BareRunRow {
                after_block: r.after + 1,
                before_block: r.before + 1,
                layers: r.layers.iter().map(|&n| node_ref(g, n)).collect(),
            })
            .collect(),
        not_blocks: det
            .rejected
            .iter()
            .map(|r| NotBlockRow {
                node: node_ref(g, r.node),
                reason: match r.reason {
                    Reason::Independent => "independent-inputs",
                    Reason::NoShortcut => "no-shortcut",
                    Reason::NoLearnedLayer => "no-learned-layer",
                    Reason::HeadSum => "sum-of-heads",
                }
                .to_owned(),
                detail: r.reason.describe().to_owned(),
            })
            .collect(),
        subgraphs: g
            .nodes
            .iter()
            .enumerate()
            .filter(|(_, n)| n.subgraphs > 0)
            .map(|(i, n)| SubgraphRow {
                node: node_ref(g, NodeId(i as u32)),
                subgraphs: n.subgraphs,
            })
            .collect(),
        diagnostics: a
            .diagnostics
            .iter()
            .map(|d| DiagnosticRow {
                severity: match d.severity {
                    Severity::Note => "note",
                    Severity::Warning => "warning",
                }
                .to_owned(),
                node: d.node.clone(),
                message: d.message.clone(),
            })
            .collect(),
        influence: None,
    }
}
