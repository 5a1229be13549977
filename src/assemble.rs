//! The fourth stage: assemble the report. The only code that builds the
//! report's rows (structure, run, statistics, influence) and calls the
//! findings, once, with the caller's thresholds; every command's report,
//! run or not, is made here from what the earlier stages produced.
//!
//! **Invariant:** reads the analysis, the plan and the measurement; runs
//! nothing and reads no file.

use std::collections::BTreeMap;

use crate::findings::{
    self, BareRunFacts, BlockFacts, FindingConfig, FormatLimits, HeadroomConfig, HeadroomFacts,
    InfluenceFacts,
};
use crate::graph::{Dim, Graph, NodeId, ValueId};
use crate::load::tensor;
use crate::lower::precision::Half;
use crate::measure::{self, InfluenceConfig, InfluenceMeasured, Measured, Measurement, RanAs};
use crate::open::{Analysis, FileFacts};
use crate::probe::inputs::InputPlan;
use crate::probe::{BlockSamples, ENGINE};
use crate::proto::ValueInfoProto;
use crate::report::{self, *};
use crate::stats::Spread;
use crate::vocab::{Command, Precision};

/// A run to report: what was fed, what was measured, and the knockout and
/// gain options it was measured with.
pub struct RunFacts<'a> {
    /// What was fed.
    pub input_plan: &'a InputPlan,
    /// What was measured (or why the run failed).
    pub measurement: &'a Measurement,
    /// The knockout and gain options, when they ran.
    pub influence: Option<&'a InfluenceConfig>,
    /// The target format of the headroom section and its thresholds.
    pub headroom: &'a HeadroomConfig,
}

/// The report of one model: its structure, and the run when there is one;
/// findings judged by `thresholds`.
pub fn report(
    command: Command,
    file: &FileFacts,
    analysis: &Analysis,
    run: Option<RunFacts<'_>>,
    thresholds: &FindingConfig,
) -> Report {
    let mut report = structure(command, model_info(file), analysis);
    let mut facts = block_facts(&report);
    let mut measured = None;
    if let Some(run) = &run {
        let mut row = run_row(run.input_plan, thresholds);
        row.precision = run.measurement.ran_as.as_ref().map(precision_row);
        report.run = Some(row);
        // What the input plan had to guess, where a reader of the report sees it.
        report.diagnostics.extend(run.input_plan.warnings.iter().map(|w| DiagnosticRow {
            severity: crate::vocab::Severity::Warning,
            node: None,
            message: w.clone(),
        }));
        match &run.measurement.outcome {
            Ok(m) => {
                fill_stats(&mut report, &mut facts, &m.intact.blocks, thresholds.dead_below);
                for (i, why) in &m.not_measured {
                    if let (Some(row), Some(f)) = (report.blocks.get_mut(*i), facts.get_mut(*i)) {
                        row.stats = None;
                        row.not_measured = Some(why.clone());
                        f.ratio = None;
                        f.output_rms = None;
                        f.channels = None;
                        f.dead_channel_fraction = None;
                    }
                }
                measured_stages(&mut report, analysis, &m.intact.blocks);
                measured = Some(m);
            }
            Err(e) => report.run_error = Some(e.message().to_owned()),
        }
    }
    set_findings(&mut report, &facts, thresholds);
    if let Some(m) = measured
        && let Some(run) = &run
    {
        let own = run.measurement.ran_as.as_ref().map(|r| r.half);
        headroom(&mut report, &m.intact.blocks, run.headroom, own);
    }
    if let (Some(m), Some(ic)) = (measured, run.as_ref().and_then(|r| r.influence))
        && let Some(inf) = &m.influence
    {
        influence(&mut report, analysis, m, inf, ic);
    }
    report
}

/// The headroom section and its findings (appended after the others): the
/// format `--precision` names, else the model's own half-precision type.
fn headroom(
    report: &mut Report,
    blocks: &[BlockSamples],
    config: &HeadroomConfig,
    own: Option<Half>,
) {
    let (format, chosen_by) = match (config.target, own) {
        (Some(p), _) => (p, format!("--precision {p}")),
        (None, Some(Half::Float16)) => {
            (Precision::Fp16, "the model's own element type, float16".to_owned())
        }
        (None, Some(Half::Bfloat16)) => {
            (Precision::Bf16, "the model's own element type, bfloat16".to_owned())
        }
        (None, None) => return,
    };
    let limits = FormatLimits::of(format);
    let rows: Vec<HeadroomRow> = blocks
        .iter()
        .enumerate()
        .map(|(i, s)| {
            let measured = !s.output_max.is_empty();
            let largest_seen = s.output_max.iter().copied().fold(0.0, f64::max);
            let non_finite = s.output_max.iter().any(|v| !v.is_finite());
            let stats = report.blocks[i].stats.as_ref();
            let headroom = limits.largest.filter(|_| measured).map(|l| {
                if non_finite || largest_seen.is_infinite() {
                    0.0
                } else if largest_seen > 0.0 {
                    l / largest_seen
                } else {
                    f64::INFINITY
                }
            });
            let headroom = headroom.filter(|h| h.is_finite());
            let underflow = (format == Precision::Fp16 && measured).then(|| {
                let n = s.f16_zero.len().max(1) as f64;
                s.f16_zero.iter().zip(&s.f16_subnormal).map(|(z, u)| z + u).sum::<f64>() / n
            });
            let ratio = stats.and_then(|st| st.channel_max_ratio);
            HeadroomRow {
                block: i + 1,
                max_abs: (measured && !non_finite).then_some(largest_seen),
                rms: stats.and_then(|st| st.output_rms).map(|r| r.mean),
                headroom,
                headroom_bits: headroom.filter(|h| *h > 0.0).map(f64::log2),
                underflow,
                median_channel_levels: limits
                    .levels
                    .zip(ratio)
                    .map(|(levels, r)| f64::from(levels) / r),
            }
        })
        .collect();
    let facts: Vec<HeadroomFacts> = rows
        .iter()
        .zip(blocks)
        .map(|(r, s)| HeadroomFacts {
            headroom: r.headroom,
            max_abs: (!s.output_max.is_empty())
                .then(|| s.output_max.iter().copied().fold(0.0, f64::max)),
            underflow: r.underflow,
            channel_max_ratio: report.blocks[r.block - 1]
                .stats
                .as_ref()
                .and_then(|st| st.channel_max_ratio),
        })
        .collect();
    for f in findings::headroom(&facts, format, &config.thresholds) {
        report.findings.push(FindingRow {
            code: f.code,
            block: f.block,
            node: f.block.and_then(|id| report.blocks.get(id - 1)).map(|b| b.merge.clone()),
            message: f.message,
        });
    }
    let t = &config.thresholds;
    report.headroom = Some(HeadroomReport {
        format,
        chosen_by,
        largest: limits.largest,
        smallest_normal: limits.smallest_normal,
        smallest_subnormal: limits.smallest_subnormal,
        levels: limits.levels,
        thresholds: HeadroomThresholdsRow {
            margin: t.margin,
            underflow_above: t.underflow_above,
            outlier_ratio_above: t.outlier_ratio_above,
        },
        blocks: rows,
    });
}

/// Stages from the shapes the run measured where static shape inference
/// stopped (Reshape targets computed at run time, dynamic spatial sizes): a
/// block whose output shape is unknown statically takes the shape tract
/// produced, past the batch axis, and the blocks are grouped into stages
/// again. Bare runs are those of the static stages.
fn measured_stages(report: &mut Report, a: &Analysis, blocks: &[BlockSamples]) {
    let keys = crate::classify::stage_keys(&a.graph, &a.detection.blocks);
    let main = a.detection.blocks.len();
    if keys.len() != main || main > report.blocks.len() || keys.iter().all(Option::is_some) {
        return;
    }
    let keys: Vec<Option<Vec<Dim>>> = keys
        .into_iter()
        .zip(blocks)
        .map(|(k, b)| {
            k.or_else(|| {
                let measured = b.output_shape.get(1..).filter(|_| b.output_shape.len() >= 2)?;
                Some(measured.iter().map(|&d| Dim::Known(d as u64)).collect())
            })
        })
        .collect();
    let (stages, of_block) = crate::classify::group(&keys);
    // The bodies' stages follow the main graph's: renumber them.
    let bodies: Vec<StageRow> = report.stages.split_off(a.stages.len().min(report.stages.len()));
    let first_body_stage = a.stages.len() + 1;
    let renumber = |id: usize| id + stages.len() + 1 - first_body_stage;
    report.stages = stages
        .iter()
        .enumerate()
        .map(|(i, s)| StageRow {
            id: i + 1,
            shape: dims(&s.shape),
            blocks: s.blocks.iter().map(|b| b + 1).collect(),
        })
        .collect();
    report.stages.extend(bodies.into_iter().map(|s| StageRow { id: renumber(s.id), ..s }));
    for row in &mut report.blocks[main..] {
        row.stage = row.stage.map(renumber);
    }
    for ((row, stage), b) in report.blocks.iter_mut().zip(of_block).zip(blocks) {
        row.stage = stage.map(|s| s + 1);
        // Where the static shape has unknown dims, show the measured ones
        // (the batch axis as declared).
        let unknown = row.output_shape.as_ref().is_none_or(|s| s.iter().any(|d| d == "?"));
        if unknown && b.output_shape.len() >= 2 {
            let batch = row.output_shape.as_ref().and_then(|s| s.first().cloned());
            let mut shape: Vec<String> = b.output_shape.iter().map(ToString::to_string).collect();
            if let Some(batch) = batch.filter(|d| d != "?") {
                shape[0] = batch;
            }
            row.output_shape = Some(shape);
        }
    }
}

/// The report's description of the model file.
fn model_info(f: &FileFacts) -> ModelInfo {
    let tensor_rows = |list: &[ValueInfoProto]| -> Vec<TensorRow> {
        list.iter()
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
    ModelInfo {
        path: f.path.clone(),
        file_bytes: f.file_bytes,
        ir_version: f.ir_version,
        opsets: f
            .opsets
            .iter()
            .map(|(domain, version)| OpsetRow { domain: domain.clone(), version: *version })
            .collect(),
        producer: format!("{} {}", f.producer_name, f.producer_version).trim().to_owned(),
        graph_name: f.graph_name.clone(),
        nodes: f.nodes,
        initializers: f.initializers,
        parameters: f.parameters,
        external_tensors: f.external_tensors,
        external_bytes: f.external_bytes,
        inputs: tensor_rows(&f.inputs),
        outputs: tensor_rows(&f.outputs),
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

/// The structural facts findings need, one per block of the report.
fn block_facts(report: &Report) -> Vec<BlockFacts> {
    let mut scopes: Vec<&[ScopeRow]> = Vec::new();
    report
        .blocks
        .iter()
        .map(|b| BlockFacts {
            scope: match scopes.iter().position(|s| *s == b.scope.as_slice()) {
                Some(k) => k,
                None => {
                    scopes.push(&b.scope);
                    scopes.len() - 1
                }
            },
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
fn set_findings(report: &mut Report, facts: &[BlockFacts], config: &FindingConfig) {
    let runs: Vec<BareRunFacts> = report
        .bare_runs
        .iter()
        .map(|r| BareRunFacts {
            after: r.after_block,
            before: r.before_block,
            layers: r.layers.iter().map(|l| l.name.clone()).collect(),
        })
        .collect();
    report.findings = findings::findings(facts, &runs, config)
        .into_iter()
        .map(|f| FindingRow {
            code: f.code,
            block: f.block,
            node: f.block.and_then(|id| report.blocks.get(id - 1)).map(|b| b.merge.clone()),
            message: f.message,
        })
        .collect();
}

/// The rows of one analysed graph (the main graph or a body), numbered
/// after the `offsets` of the rows before them.
struct Rows {
    blocks: Vec<BlockRow>,
    concat_skips: Vec<ConcatRow>,
    stages: Vec<StageRow>,
    bare_runs: Vec<BareRunRow>,
    not_blocks: Vec<NotBlockRow>,
}

/// Blocks, concatenative skips and stages before a graph's rows.
#[derive(Clone, Copy, Default)]
struct Offsets {
    blocks: usize,
    concat_skips: usize,
    stages: usize,
}

fn scope_rows(scope: &[crate::open::ScopeStep]) -> Vec<ScopeRow> {
    scope
        .iter()
        .map(|s| ScopeRow {
            node: s.node.clone(),
            index: s.index,
            op_type: s.op.clone(),
            attribute: s.attribute.clone(),
        })
        .collect()
}

fn rows(a: &Analysis, scope: &[ScopeRow], at: Offsets) -> Rows {
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
        .zip(&a.classifications)
        .enumerate()
        .map(|(i, (b, k))| BlockRow {
            id: at.blocks + i + 1,
            scope: scope.to_vec(),
            stage: a.stage_of[i].map(|s| at.stages + s + 1),
            merge: node_ref(g, b.merge),
            output: value_name(g, b.output),
            output_shape: g.shape(b.output).map(dims),
            fork: value_name(g, b.fork),
            shortcut: ShortcutRow {
                kind: b.shortcut.kind,
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
            placement: k.placement,
            placement_node: k.placement_node.map(|n| node_ref(g, n)),
            static_dead: k
                .static_dead
                .map(|d| DeadRow { reason: d.reason, node: node_ref(g, d.node) }),
            parent: b.parent.map(|p| at.blocks + p + 1),
            depth: b.depth,
            children: b.children,
            stats: None,
            not_measured: None,
        })
        .collect();
    let concat_skips: Vec<ConcatRow> = det
        .concat_skips
        .iter()
        .enumerate()
        .map(|(i, c)| ConcatRow {
            id: at.concat_skips + i + 1,
            scope: scope.to_vec(),
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
            parent: c.parent.map(|p| at.concat_skips + p + 1),
            depth: c.depth,
        })
        .collect();
    Rows {
        blocks,
        concat_skips,
        stages: a
            .stages
            .iter()
            .enumerate()
            .map(|(i, s)| StageRow {
                id: at.stages + i + 1,
                shape: dims(&s.shape),
                blocks: s.blocks.iter().map(|b| at.blocks + b + 1).collect(),
            })
            .collect(),
        bare_runs: a
            .bare_runs
            .iter()
            .map(|r| BareRunRow {
                after_block: at.blocks + r.after + 1,
                before_block: at.blocks + r.before + 1,
                layers: r.layers.iter().map(|&n| node_ref(g, n)).collect(),
            })
            .collect(),
        not_blocks: det
            .rejected
            .iter()
            .map(|r| NotBlockRow {
                scope: scope.to_vec(),
                node: node_ref(g, r.node),
                reason: r.reason,
                detail: r.reason.describe().to_owned(),
            })
            .collect(),
    }
}

/// The rows of an analysis and of the bodies of its control-flow nodes
/// (after the main graph's, in the analysis' order), without findings, for
/// `command`.
fn structure(command: Command, model: ModelInfo, a: &Analysis) -> Report {
    let mut all = rows(a, &[], Offsets::default());
    let mut body_blocks: Vec<Vec<usize>> = Vec::with_capacity(a.bodies.len());
    for body in &a.bodies {
        let at = Offsets {
            blocks: all.blocks.len(),
            concat_skips: all.concat_skips.len(),
            stages: all.stages.len(),
        };
        let more = rows(&body.analysis, &scope_rows(&body.scope), at);
        body_blocks.push(more.blocks.iter().map(|b| b.id).collect());
        all.blocks.extend(more.blocks);
        all.concat_skips.extend(more.concat_skips);
        all.stages.extend(more.stages);
        all.bare_runs.extend(more.bare_runs);
        all.not_blocks.extend(more.not_blocks);
    }
    // Every node carrying subgraphs, in the main graph and in each body,
    // with the bodies searched.
    let mut subgraphs = Vec::new();
    let graphs = std::iter::once((&a.graph, &[][..]))
        .chain(a.bodies.iter().map(|b| (&b.analysis.graph, b.scope.as_slice())));
    for (g, scope) in graphs {
        for (i, n) in g.nodes.iter().enumerate().filter(|(_, n)| n.subgraphs > 0) {
            let bodies = a
                .bodies
                .iter()
                .zip(&body_blocks)
                .filter(|(b, _)| {
                    b.scope.len() == scope.len() + 1
                        && b.scope.starts_with(scope)
                        && b.scope.last().is_some_and(|s| s.index == n.index && s.node == n.name)
                })
                .map(|(b, ids)| BodyRow {
                    attribute: b.scope.last().map(|s| s.attribute.clone()).unwrap_or_default(),
                    captured: b.captured.clone(),
                    blocks: ids.clone(),
                })
                .collect();
            subgraphs.push(SubgraphRow {
                scope: scope_rows(scope),
                node: node_ref(g, NodeId(i as u32)),
                subgraphs: n.subgraphs,
                bodies,
            });
        }
    }
    let Rows { blocks, concat_skips, stages, bare_runs, not_blocks } = all;
    let mut by_shortcut = BTreeMap::new();
    let mut by_placement = BTreeMap::new();
    for b in &blocks {
        *by_shortcut.entry(b.shortcut.kind.as_str().to_owned()).or_insert(0) += 1;
        *by_placement.entry(b.placement.as_str().to_owned()).or_insert(0) += 1;
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
        bare_runs: bare_runs.len(),
        plain: blocks.is_empty() && concat_skips.is_empty(),
    };
    Report {
        schema: report::REPORT_SCHEMA.to_owned(),
        schema_version: report::REPORT_SCHEMA_VERSION,
        command,
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
        stages,
        blocks,
        concat_skips,
        bare_runs,
        not_blocks,
        subgraphs,
        diagnostics: a
            .diagnostics
            .iter()
            .map(|d| DiagnosticRow {
                severity: d.severity,
                node: d.node.clone(),
                message: d.message.clone(),
            })
            .collect(),
        influence: None,
        headroom: None,
    }
}
fn run_row(input_plan: &InputPlan, f: &FindingConfig) -> RunRow {
    RunRow {
        engine: ENGINE.to_owned(),
        samples: input_plan.samples,
        pass_batch: input_plan.pass_batch,
        passes: input_plan.passes,
        seed: input_plan.seed,
        inputs: input_plan
            .inputs
            .iter()
            .map(|i| FedRow {
                name: i.name.clone(),
                dtype: tensor::dtype_name(i.dtype).to_owned(),
                shape: i.pass_shape.clone(),
                values: i.how.clone(),
            })
            .collect(),
        feed: input_plan
            .feed
            .as_ref()
            .map(|(p, d)| FeedRow { path: p.display().to_string(), sha256: d.clone() }),
        thresholds: ThresholdsRow {
            dead_below: f.dead_below,
            dominant_above: f.dominant_above,
            dead_channels_above: f.dead_channels_above,
            depth_factor: f.depth_factor,
        },
        precision: None,
    }
}

fn ratios(num: &[f64], den: &[f64]) -> Vec<f64> {
    num.iter().zip(den).filter(|(_, d)| **d > 0.0).map(|(n, d)| n / d).collect()
}

/// Aggregates per-sample measurements into the report's statistics.
fn stats_row(s: &BlockSamples, dead_below: f64) -> StatsRow {
    let channels = (!s.channel_shortcut.is_empty()).then_some(s.channel_shortcut.len());
    let dead_channel_fraction = channels.and_then(|_| {
        let limit = dead_below * dead_below;
        let live: Vec<(f64, f64)> = s
            .channel_shortcut
            .iter()
            .zip(&s.channel_branch)
            .map(|(&a, &b)| (a, b))
            .filter(|(a, b)| *a > 0.0 || *b > 0.0)
            .collect();
        if live.is_empty() {
            return None;
        }
        let dead = live.iter().filter(|(sc, br)| *br < limit * *sc).count();
        Some(dead as f64 / live.len() as f64)
    });
    let outlier = crate::stats::channel_outlier(&s.channel_max);
    StatsRow {
        samples: s.output_rms.len(),
        fork_rms: Spread::of(&s.fork_rms),
        shortcut_rms: Spread::of(&s.shortcut_rms),
        branch_rms: Spread::of(&s.branch_rms),
        output_rms: Spread::of(&s.output_rms),
        ratio: Spread::of(&ratios(&s.branch_rms, &s.shortcut_rms)),
        cosine: Spread::of(&s.cosine),
        growth: Spread::of(&ratios(&s.output_rms, &s.fork_rms)),
        zeroed: Spread::of(&s.zeroed),
        channels,
        dead_channel_fraction,
        nan: s.nan,
        inf: s.inf,
        output_max_abs: Spread::of(&s.output_max),
        shortcut_max_abs: Spread::of(&s.shortcut_max),
        branch_max_abs: Spread::of(&s.branch_max),
        crest_factor: Spread::of(&ratios(&s.output_max, &s.output_rms)),
        channel_max_ratio: outlier.map(|o| o.0),
        outlier_channel: outlier.map(|o| o.1),
        f16_zero: Spread::of(&s.f16_zero),
        f16_subnormal: Spread::of(&s.f16_subnormal),
    }
}

/// Copies the intact run's measurements into the report and the facts.
fn fill_stats(
    report: &mut Report,
    facts: &mut [findings::BlockFacts],
    blocks: &[BlockSamples],
    dead_below: f64,
) {
    for (i, samples) in blocks.iter().enumerate() {
        let row = stats_row(samples, dead_below);
        facts[i].ratio = row.ratio.map(|s| s.mean);
        facts[i].dead_channel_fraction = row.dead_channel_fraction;
        facts[i].channels = row.channels;
        facts[i].non_finite = row.nan + row.inf;
        facts[i].output_rms = row.output_rms.map(|s| s.mean);
        report.blocks[i].stats = Some(row);
    }
}

/// The distribution of path lengths when each block independently sends a
/// unit of change through its branch with probability `q` (a Poisson
/// binomial distribution), by dynamic programming.
fn path_lengths(shares: &[f64]) -> Vec<f64> {
    let mut p = vec![1.0];
    for &q in shares {
        let mut next = vec![0.0; p.len() + 1];
        for (k, &w) in p.iter().enumerate() {
            next[k] += w * (1.0 - q);
            next[k + 1] += w * q;
        }
        p = next;
    }
    p
}

fn effective_depth(shares: &[f64], carrying: Option<usize>) -> EffectiveDepthRow {
    let distribution = path_lengths(shares);
    let mean: f64 = shares.iter().sum();
    let var: f64 = shares.iter().map(|q| q * (1.0 - q)).sum();
    let quantile = |level: f64| {
        let mut c = 0.0;
        for (k, w) in distribution.iter().enumerate() {
            c += w;
            if c >= level - 1e-12 {
                return k;
            }
        }
        distribution.len().saturating_sub(1)
    };
    EffectiveDepthRow {
        blocks: shares.len(),
        mean_path_length: mean,
        path_length_sd: var.sqrt(),
        median_path_length: quantile(0.5),
        central_80: [quantile(0.1), quantile(0.9)],
        distribution,
        carrying,
    }
}

fn per_sample(num: &[f64], den: &[f64]) -> Option<Spread> {
    Spread::of(&ratios(num, den))
}

/// The knockout and gain rows, the effective depth and the influence
/// findings (appended after the others).
fn influence(
    report: &mut Report,
    analysis: &Analysis,
    result: &Measured,
    inf: &InfluenceMeasured,
    ic: &InfluenceConfig,
) {
    // Every block of the report: the main graph's, then each body's.
    let graphs = std::iter::once(analysis).chain(analysis.bodies.iter().map(|b| &b.analysis));
    let (depth, changes_resolution): (Vec<usize>, Vec<bool>) = graphs
        .flat_map(|a| {
            a.detection
                .blocks
                .iter()
                .zip(&a.classifications)
                .map(|(b, k)| (b.depth, k.changes_resolution))
        })
        .unzip();
    let n = depth.len();
    let measured: Vec<bool> =
        (0..n).map(|i| !result.not_measured.iter().any(|(k, _)| *k == i)).collect();
    let knocked = &inf.knocked;
    let knocked_shortcut = &inf.knocked_shortcut;
    let mut rows: Vec<InfluenceRow> = (0..n)
        .map(|i| InfluenceRow {
            block: i + 1,
            changes_resolution: changes_resolution[i],
            knockout: knocked[i],
            shortcut_knockout: knocked_shortcut[i],
            rank: None,
            low_impact: knocked[i].is_some_and(|a| a.rel_l2 < ic.thresholds.low_impact_below),
            gain: None,
            shortcut_gain: None,
            branch_gain: None,
            branch_share: None,
            gain_product: None,
            gain_to_here: None,
        })
        .collect();
    // Rank by impact, largest first; ties keep block order.
    let mut order: Vec<usize> = (0..n).filter(|&i| knocked[i].is_some()).collect();
    order.sort_by(|&a, &b| {
        let ka = knocked[a].map_or(f64::NAN, |k| k.rel_l2);
        let kb = knocked[b].map_or(f64::NAN, |k| k.rel_l2);
        kb.partial_cmp(&ka).unwrap_or(std::cmp::Ordering::Equal)
    });
    for (r, &i) in order.iter().enumerate() {
        rows[i].rank = Some(r + 1);
    }

    // The top-level blocks the run measured (a branch not taken is not on
    // the path of any change).
    let top: Vec<usize> = (0..n).filter(|&i| depth[i] == 0 && measured[i]).collect();
    let gain_setup = ic.gain_step.map(|step| GainSetup {
        step: f64::from(step),
        input_change: Spread::of(&inf.input_change),
        end_to_end: None,
        gain_factor: ic.thresholds.gain_factor,
    });
    let mut effective = None;
    if let Some(gain) = &inf.gain {
        for (i, s) in gain.iter().enumerate() {
            let shares: Vec<f64> = s
                .shortcut
                .iter()
                .zip(&s.branch)
                .filter(|(a, b)| *a + *b > 0.0)
                .map(|(a, b)| b / (a + b))
                .collect();
            rows[i].gain = per_sample(&s.output, &s.fork);
            rows[i].shortcut_gain = per_sample(&s.shortcut, &s.fork);
            rows[i].branch_gain = per_sample(&s.branch, &s.fork);
            rows[i].branch_share = Spread::of(&shares).map(|x| x.mean);
        }
        let first = top.first().map(|&i| gain[i].fork.clone()).unwrap_or_default();
        let mut product = 1.0;
        for &i in &top {
            if let Some(g) = rows[i].gain {
                product *= g.mean;
                rows[i].gain_product = Some(product);
            }
            rows[i].gain_to_here = Spread::of(&ratios(&gain[i].output, &first)).map(|x| x.mean);
        }
        let shares: Vec<f64> = top.iter().filter_map(|&i| rows[i].branch_share).collect();
        let carrying = (ic.knockout && top.iter().any(|&i| knocked[i].is_some())).then(|| {
            top.iter()
                .filter(|&&i| {
                    knocked[i].is_some_and(|k| !rows[i].low_impact && k.rel_l2.is_finite())
                })
                .count()
        });
        // No measured share (no float input to perturb): no path view.
        effective = (!shares.is_empty()).then(|| effective_depth(&shares, carrying));
    }
    let gain_setup = gain_setup.map(|mut g| {
        g.end_to_end = top.last().and_then(|&i| rows[i].gain_to_here);
        g
    });

    let influence_facts: Vec<InfluenceFacts> = rows
        .iter()
        .map(|r| InfluenceFacts {
            knockout: r.knockout.map(|k| k.rel_l2),
            gain_to_here: r.gain_to_here,
        })
        .collect();
    for f in findings::influence(&influence_facts, &ic.thresholds) {
        report.findings.push(FindingRow {
            code: f.code,
            block: f.block,
            node: f.block.and_then(|id| report.blocks.get(id - 1)).map(|b| b.merge.clone()),
            message: f.message,
        });
    }
    let shapes = &result.intact.output_shapes;
    report.influence = Some(InfluenceReport {
        knockout: ic.knockout.then(|| KnockoutSetup {
            blocks: inf.gated.iter().map(|i| i + 1).collect(),
            shortcuts: inf.shortcuts,
            low_impact_below: ic.thresholds.low_impact_below,
            forward_passes: inf.forward_passes,
            outputs: report
                .model
                .outputs
                .iter()
                .enumerate()
                .filter(|(o, _)| result.intact.outputs.get(*o).is_some_and(|v| !v.is_empty()))
                .map(|(o, t)| ComparedOutput {
                    name: t.name.clone(),
                    classes: measure::classes_of(shapes.get(o)),
                })
                .collect(),
        }),
        gain: gain_setup,
        blocks: rows,
        effective_depth: effective,
        skipped: inf
            .skipped
            .iter()
            .map(|(i, reason)| SkippedRow { block: i + 1, reason: reason.clone() })
            .collect(),
    });
}

/// How a half-precision model ran, in words.
fn precision_row(r: &RanAs) -> PrecisionRow {
    let row = |ran: &str, note: String| PrecisionRow {
        model: r.half.name().to_owned(),
        ran: ran.to_owned(),
        note,
    };
    if r.native {
        let mut note = "float16, run natively by tract".to_owned();
        if r.split_gemms > 0 {
            note.push_str(&format!(
                " ({} Gemm with a bias run as Gemm then Add: tract 0.23.9 cannot \
                 prepare a float16 Gemm's bias)",
                r.split_gemms
            ));
        }
        return row("float16", note);
    }
    let twin_note = match r.half {
        Half::Float16 => {
            "the float32 twin of the float16 model (weights widened \
            exactly, its casts to float16 kept, every op computed in float32 without rounding \
            its result to float16)"
        }
        Half::Bfloat16 => {
            "the float32 twin of the bfloat16 model (weights and \
            inputs widened exactly from bfloat16, every op computed in float32 without \
            rounding its result to bfloat16, casts to bfloat16 dropped)"
        }
    };
    match &r.native_error {
        Some(e) => {
            row("float32", format!("{twin_note}, because tract could not run it in float16: {e}"))
        }
        None => row("float32", format!("{twin_note}, because tract 0.23.9 has no bfloat16")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn path_lengths_are_a_poisson_binomial() {
        // Two blocks sending half the change through the branch: lengths 0,
        // 1, 2 with weights 1/4, 1/2, 1/4 (two fair coins).
        assert_eq!(path_lengths(&[0.5, 0.5]), vec![0.25, 0.5, 0.25]);
        // Branches that carry nothing: every path is the all-shortcut one.
        assert_eq!(path_lengths(&[0.0, 0.0, 0.0]), vec![1.0, 0.0, 0.0, 0.0]);
        let e = effective_depth(&[0.9, 0.1, 0.5, 0.5], Some(3));
        assert!((e.mean_path_length - 2.0).abs() < 1e-12);
        assert!((e.distribution.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert_eq!(e.median_path_length, 2);
        let sd = (0.09f64 + 0.09 + 0.25 + 0.25).sqrt();
        assert!((e.path_length_sd - sd).abs() < 1e-12);
        assert_eq!(e.central_80, [1, 3]);
    }
}
