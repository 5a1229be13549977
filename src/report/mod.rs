//! The report: plain data with public fields, the stable face of the
//! library. Renderers in this module's children turn it into text or JSON.
//!
//! **Invariant:** nothing here knows about graphs, protobuf or tract; every
//! field is filled by the stage that builds reports (`assemble`), and every ONNX
//! node or tensor the report mentions is named so a user can find it.

pub mod batch;
pub mod compare;
pub mod dot;
pub mod html;
pub mod json;
pub mod markdown;
pub(crate) mod marks;
pub(crate) mod plot;
pub mod table;
pub mod text;
pub mod verify;

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::vocab::{
    Command, DeadReason, FindingCode, NotBlockReason, Placement, Precision, Severity, ShortcutKind,
};

/// Identifies the JSON document of a report.
pub const REPORT_SCHEMA: &str = "shunt/report";
/// Version of the report JSON schema; bumped on every change of its fields.
/// Version 1 was the scan-only document `shunt/scan`.
///
/// Version 4 added `lowered` and `NodeRef::lowered_from` (both left out when
/// empty), for models whose fused or quantised operators were lowered, and
/// `RunRow::precision` (left out for models without half-precision types).
///
/// Version 5 added the blocks inside control flow: `scope` on blocks,
/// concatenative skips, merges that are not blocks and nodes carrying
/// subgraphs (left out in the main graph), `BlockRow::not_measured` (left
/// out when measured or not run), and `SubgraphRow::bodies`.
/// Version 5 also added the range statistics to `StatsRow` (largest |x| of the
/// merge output, shortcut and branch, crest factor, outlier channels, what
/// float16 would lose) and `headroom` (issue 14).
pub const REPORT_SCHEMA_VERSION: u32 = 5;

/// The result of `shunt scan` or `shunt audit` on one model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Report {
    /// Always [`REPORT_SCHEMA`].
    pub schema: String,
    /// Always [`REPORT_SCHEMA_VERSION`].
    pub schema_version: u32,
    /// `scan` (structure only) or `audit` (structure and measurements).
    pub command: Command,
    /// The model file and its graph.
    pub model: ModelInfo,
    /// Operators rewritten into standard ONNX operators before the analysis
    /// (fused, contrib and quantised ops), counted by type; empty when none.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub lowered: Vec<LoweredRow>,
    /// What was fed and how, when the model was run.
    pub run: Option<RunRow>,
    /// Why running the model failed, if it did (the structure is still reported).
    pub run_error: Option<String>,
    /// Findings, structural ones first, then by block.
    pub findings: Vec<FindingRow>,
    /// Counts over the whole model.
    pub summary: Summary,
    /// Runs of consecutive blocks with the same output shape.
    pub stages: Vec<StageRow>,
    /// Residual blocks in graph order.
    pub blocks: Vec<BlockRow>,
    /// Concatenative skips in graph order.
    pub concat_skips: Vec<ConcatRow>,
    /// Learned layers inside a stage that no shortcut spans.
    pub bare_runs: Vec<BareRunRow>,
    /// Merges of two or more signals that are not residual blocks.
    pub not_blocks: Vec<NotBlockRow>,
    /// Nodes carrying subgraphs (If, Loop, Scan), at every depth, with the
    /// blocks found in each body.
    pub subgraphs: Vec<SubgraphRow>,
    /// Problems the analysis worked around.
    pub diagnostics: Vec<DiagnosticRow>,
    /// Which blocks matter (knockout, perturbation gain, effective depth),
    /// when `audit --knockout` or `--gain` ran.
    #[serde(default)]
    pub influence: Option<InfluenceReport>,
    /// Headroom of every block in a target number format, when the model
    /// ran and `--precision` named a format or the model is half precision.
    #[serde(default)]
    pub headroom: Option<HeadroomReport>,
}

/// How every block's range fits a target number format.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct HeadroomReport {
    /// The format: `fp16`, `bf16` or `int8`.
    pub format: Precision,
    /// Why this format: `--precision`, or the model's own element type.
    pub chosen_by: String,
    /// The format's largest finite value (`null` for int8, whose scale is
    /// calibrated to the range).
    pub largest: Option<f64>,
    /// The format's smallest normal magnitude (`null` for int8).
    pub smallest_normal: Option<f64>,
    /// The format's smallest subnormal magnitude (`null` for int8).
    pub smallest_subnormal: Option<f64>,
    /// int8: the magnitude levels of a symmetric per-tensor scale (127).
    pub levels: Option<u32>,
    /// The thresholds of the headroom findings.
    pub thresholds: HeadroomThresholdsRow,
    /// One row per block of the report, in block order.
    pub blocks: Vec<HeadroomRow>,
}

/// The thresholds of the headroom findings (all relative).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct HeadroomThresholdsRow {
    /// `overflow-risk` when the headroom is below this factor.
    pub margin: f64,
    /// `underflow-risk` when more than this fraction of a merge output
    /// would be zero or subnormal in the format.
    pub underflow_above: f64,
    /// `int8-outlier-channels` when the largest channel's max |x| exceeds
    /// the median channel's by more than this factor.
    pub outlier_ratio_above: f64,
}

/// One block's range against the format.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct HeadroomRow {
    /// The block's id.
    pub block: usize,
    /// Largest |x| of the merge output over all samples (`null` when a
    /// value is not finite or the block was not measured).
    pub max_abs: Option<f64>,
    /// Mean RMS of the merge output over samples.
    pub rms: Option<f64>,
    /// The format's largest finite value / `max_abs` (0 when a value is
    /// already infinite; `null` for int8).
    pub headroom: Option<f64>,
    /// `log2(headroom)`: bits of exponent range left above the block.
    pub headroom_bits: Option<f64>,
    /// Mean fraction of merge-output values that would be zero or
    /// subnormal in the format (fp16 only).
    pub underflow: Option<f64>,
    /// int8: levels of a per-tensor scale the median channel uses,
    /// 127 / `channel_max_ratio`.
    pub median_channel_levels: Option<f64>,
}

/// The model file and its main graph.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModelInfo {
    /// The path as given.
    pub path: String,
    /// Size of the model file.
    pub file_bytes: u64,
    /// ONNX IR version.
    pub ir_version: i64,
    /// Imported operator sets.
    pub opsets: Vec<OpsetRow>,
    /// `producer_name` and `producer_version`, joined by a space.
    pub producer: String,
    /// Name of the main graph.
    pub graph_name: String,
    /// Number of nodes in the main graph.
    pub nodes: usize,
    /// Number of initializers.
    pub initializers: usize,
    /// Total elements of all initializers.
    pub parameters: u64,
    /// Initializers whose payload lives in external files.
    pub external_tensors: usize,
    /// Total bytes of external payloads.
    pub external_bytes: u64,
    /// Graph inputs (initializers excluded).
    pub inputs: Vec<TensorRow>,
    /// Graph outputs.
    pub outputs: Vec<TensorRow>,
}

/// One imported operator set.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OpsetRow {
    /// Domain; `""` is the default ONNX domain.
    pub domain: String,
    /// Version.
    pub version: i64,
}

/// A named tensor with its type and shape.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TensorRow {
    /// ONNX tensor name.
    pub name: String,
    /// Element type (`float32`, `int64`, …, `unknown`).
    pub dtype: String,
    /// Dimensions: numbers, symbol names, or `?`; `null` when the rank is unknown.
    pub shape: Option<Vec<String>>,
}

/// A reference to one ONNX node.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NodeRef {
    /// The node's name, or `{op_type}#{index}` when the model leaves it unnamed.
    pub name: String,
    /// Position in the model's node list (0-based).
    pub index: usize,
    /// ONNX op type.
    pub op_type: String,
    /// For a node of the lowered graph: the model's node it was lowered from
    /// (its `name` and `index` are then the lowered graph's).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub lowered_from: Option<NodeOrigin>,
}

/// The model's own node that a lowered node came from.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NodeOrigin {
    /// Its name, or `{op_type}#{index}` when the model leaves it unnamed.
    pub name: String,
    /// Position in the model's node list (0-based).
    pub index: usize,
    /// Its op type.
    pub op_type: String,
    /// Its domain (empty for the default domain).
    pub domain: String,
}

/// How many nodes of one operator type were lowered.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LoweredRow {
    /// The operator's domain (empty for the default domain).
    pub domain: String,
    /// The operator type.
    pub op_type: String,
    /// How many of its nodes were lowered.
    pub nodes: usize,
}

/// Counts over the whole model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Summary {
    /// Number of residual blocks.
    pub blocks: usize,
    /// Blocks by shortcut kind (`identity`, `projection`, `resampled`).
    pub by_shortcut: BTreeMap<String, usize>,
    /// Blocks by placement.
    pub by_placement: BTreeMap<String, usize>,
    /// Number of concatenative skips.
    pub concat_skips: usize,
    /// Blocks and concatenative skips whose branch holds another of their kind.
    pub long_skips: usize,
    /// Blocks whose branch is dead by construction.
    pub static_dead: usize,
    /// Number of bare runs.
    pub bare_runs: usize,
    /// No residual block and no concatenative skip: a plain network.
    pub plain: bool,
}

/// One stage.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StageRow {
    /// 1-based stage number.
    pub id: usize,
    /// Output shape of its blocks past the batch axis.
    pub shape: Vec<String>,
    /// Ids of its blocks.
    pub blocks: Vec<usize>,
}

/// One residual block.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BlockRow {
    /// 1-based block number: the main graph's blocks in graph order, then
    /// each body's (in the order of `subgraphs`).
    pub id: usize,
    /// The body of a control-flow node the block is in, from the main graph
    /// down; empty (and left out) in the main graph.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub scope: Vec<ScopeRow>,
    /// Stage id, or `null` when the output shape is unknown.
    pub stage: Option<usize>,
    /// The merge node (Add, Sum).
    pub merge: NodeRef,
    /// The merge's output tensor.
    pub output: String,
    /// Its shape, if known.
    pub output_shape: Option<Vec<String>>,
    /// The tensor the shortcut and the branch start from.
    pub fork: String,
    /// The shortcut.
    pub shortcut: ShortcutRow,
    /// The residual branch.
    pub branch: BranchRow,
    /// `post-activation`, `pre-activation`, `pre-norm`, `post-norm` or `unactivated`.
    pub placement: Placement,
    /// The node that decided the placement (the activation after the merge,
    /// the normalisation opening the branch), if any.
    pub placement_node: Option<NodeRef>,
    /// Why the branch is dead by construction, if it is.
    pub static_dead: Option<DeadRow>,
    /// Id of the innermost block whose branch holds this one.
    pub parent: Option<usize>,
    /// How many blocks hold this one.
    pub depth: usize,
    /// How many blocks this one's branch holds directly.
    pub children: usize,
    /// Measurements, when the model was run.
    pub stats: Option<StatsRow>,
    /// Why the block was not measured although the model ran (a body the
    /// engine runs as one op, a branch not taken); left out otherwise.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub not_measured: Option<String>,
}

/// One step from a graph into the body of one of its nodes.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ScopeRow {
    /// The node carrying the body (`{op_type}#{index}` when unnamed).
    pub node: String,
    /// Its position in its own graph's node list (0-based).
    pub index: usize,
    /// Its op type (`If`, `Loop`, `Scan`).
    pub op_type: String,
    /// The attribute holding the body (`then_branch`, `else_branch`, `body`).
    pub attribute: String,
}

/// Measurements of one block over all samples.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StatsRow {
    /// Samples measured.
    pub samples: usize,
    /// RMS of the block input (the fork tensor).
    pub fork_rms: Option<Spread>,
    /// RMS of the shortcut at the merge.
    pub shortcut_rms: Option<Spread>,
    /// RMS of the branch at the merge.
    pub branch_rms: Option<Spread>,
    /// RMS of the merge output.
    pub output_rms: Option<Spread>,
    /// RMS(branch) / RMS(shortcut), per sample.
    pub ratio: Option<Spread>,
    /// Cosine similarity of branch and shortcut, per sample.
    pub cosine: Option<Spread>,
    /// RMS(output) / RMS(block input), per sample.
    pub growth: Option<Spread>,
    /// Fraction of merge outputs the ReLU after the merge sets to zero, per sample.
    pub zeroed: Option<Spread>,
    /// Number of channels measured.
    pub channels: Option<usize>,
    /// Fraction of channels whose branch RMS is below `dead_below` times the
    /// shortcut's RMS in that channel (over all samples).
    pub dead_channel_fraction: Option<f64>,
    /// NaN values seen in the block's tensors.
    pub nan: u64,
    /// Infinite values seen in the block's tensors.
    pub inf: u64,
    /// Largest |x| of the merge output, per sample (`null` when some sample
    /// holds a NaN or an infinity: see `nan`, `inf`).
    pub output_max_abs: Option<Spread>,
    /// Largest |x| of the shortcut at the merge, per sample.
    pub shortcut_max_abs: Option<Spread>,
    /// Largest |x| of the branch at the merge, per sample.
    pub branch_max_abs: Option<Spread>,
    /// Crest factor of the merge output, max |x| / RMS, per sample.
    pub crest_factor: Option<Spread>,
    /// The largest channel's max |x| over the median channel's (merge
    /// output, over all samples): how far outlier channels stand out.
    pub channel_max_ratio: Option<f64>,
    /// The channel with the largest max |x| (0-based), with `channel_max_ratio`.
    pub outlier_channel: Option<usize>,
    /// Fraction of the merge output's values float16 would round to zero
    /// (nonzero, |x| ≤ 2^-25), per sample.
    pub f16_zero: Option<Spread>,
    /// Fraction of the merge output's values float16 would keep only as
    /// subnormals (2^-25 < |x| < 2^-14), per sample.
    pub f16_subnormal: Option<Spread>,
}

/// Mean, standard deviation (over samples), minimum and maximum.
pub type Spread = crate::stats::Spread;

/// What was fed to the model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RunRow {
    /// The inference engine and its version.
    pub engine: String,
    /// Samples run.
    pub samples: usize,
    /// Samples per forward pass.
    pub pass_batch: usize,
    /// Forward passes.
    pub passes: usize,
    /// Seed of the input generator.
    pub seed: u64,
    /// Every input with the shape of one pass and how its values were made.
    pub inputs: Vec<FedRow>,
    /// The feed file and its SHA-256 digest, when one was given.
    pub feed: Option<FeedRow>,
    /// The thresholds findings were judged by.
    pub thresholds: ThresholdsRow,
    /// How a half-precision model ran; left out for other models.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub precision: Option<PrecisionRow>,
}

/// How a half-precision model was run.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PrecisionRow {
    /// The model's half-precision type: `float16` or `bfloat16`.
    pub model: String,
    /// What tract computed in: the model's own type (`float16`), or
    /// `float32` for the float32 twin.
    pub ran: String,
    /// What was run and why, in a sentence.
    pub note: String,
}

/// One fed input.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FedRow {
    /// ONNX name.
    pub name: String,
    /// Element type.
    pub dtype: String,
    /// Shape of one pass.
    pub shape: Vec<u64>,
    /// How the values were made.
    pub values: String,
}

/// A feed file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FeedRow {
    /// The path as given.
    pub path: String,
    /// SHA-256 of the file, hex.
    pub sha256: String,
}

/// The thresholds of the findings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ThresholdsRow {
    /// `--dead-below`.
    pub dead_below: f64,
    /// `--dominant-above`.
    pub dominant_above: f64,
    /// `--dead-channels-above`.
    pub dead_channels_above: f64,
    /// `--depth-factor`.
    pub depth_factor: f64,
}

/// One finding.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FindingRow {
    /// The finding's code (`static-dead`, `dead`, … : [`FindingCode`]).
    pub code: FindingCode,
    /// The block it is about, if any.
    pub block: Option<usize>,
    /// The merge node of that block.
    pub node: Option<NodeRef>,
    /// What was seen, with the numbers.
    pub message: String,
}

/// A shortcut path.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ShortcutRow {
    /// `identity`, `projection` or `resampled`.
    pub kind: ShortcutKind,
    /// Whether a learned linear layer is on the path.
    pub projected: bool,
    /// The merge input tensor it arrives at.
    pub input: String,
    /// Ops on the path in graph order.
    pub ops: Vec<NodeRef>,
}

/// A residual branch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BranchRow {
    /// Merge input tensors fed by the branch.
    pub inputs: Vec<String>,
    /// Number of ops in the branch (constants excluded).
    pub op_count: usize,
    /// Learned layers in graph order.
    pub layers: Vec<LayerRow>,
    /// Normalisations in graph order.
    pub norms: Vec<LabelledNode>,
    /// Activations in graph order.
    pub activations: Vec<LabelledNode>,
    /// Multiplicative gates (squeeze-and-excitation).
    pub gates: usize,
    /// A constant scale at the end of the branch.
    pub end_scale: Option<EndScaleRow>,
}

/// A learned layer.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LayerRow {
    /// The node.
    pub node: NodeRef,
    /// Spatial kernel (empty for fully connected layers).
    pub kernel: Vec<u64>,
    /// Input channels or features.
    pub in_channels: Option<u64>,
    /// Output channels or features.
    pub out_channels: Option<u64>,
    /// Convolution strides (empty when not given).
    pub strides: Vec<i64>,
    /// Convolution groups.
    pub groups: u64,
}

/// A node with a label.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LabelledNode {
    /// The node.
    pub node: NodeRef,
    /// What it is (`BatchNormalization`, `LayerNormalization (decomposed)`).
    pub label: String,
}

/// A constant scale at the end of a branch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct EndScaleRow {
    /// The Mul node.
    pub node: NodeRef,
    /// The constant tensor.
    pub tensor: String,
    /// Number of elements, when read.
    pub elements: Option<u64>,
    /// Smallest value.
    pub min: Option<f32>,
    /// Largest value.
    pub max: Option<f32>,
    /// Mean absolute value.
    pub mean_abs: Option<f32>,
}

/// Why a branch is dead by construction.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DeadRow {
    /// `zero-scale`, `zero-norm-scale` or `zero-weights`.
    pub reason: DeadReason,
    /// The node whose constant is all zeros.
    pub node: NodeRef,
}

/// A concatenative skip.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ConcatRow {
    /// 1-based number in graph order (the main graph's first).
    pub id: usize,
    /// The body it is in (see [`BlockRow::scope`]).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub scope: Vec<ScopeRow>,
    /// The Concat node.
    pub concat: NodeRef,
    /// Its output tensor.
    pub output: String,
    /// The tensor the skip and the branch start from.
    pub fork: String,
    /// Ops on the skip path (empty or crops).
    pub skip_ops: Vec<NodeRef>,
    /// Number of ops in the branch.
    pub branch_op_count: usize,
    /// Number of learned layers in the branch.
    pub branch_layers: usize,
    /// Id of the innermost concatenative skip holding this one.
    pub parent: Option<usize>,
    /// How many concatenative skips hold this one.
    pub depth: usize,
}

/// Learned layers inside a stage that no shortcut spans.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BareRunRow {
    /// Id of the block before the run.
    pub after_block: usize,
    /// Id of the block after the run.
    pub before_block: usize,
    /// The learned layers.
    pub layers: Vec<NodeRef>,
}

/// A merge of several signals that is not a block, and why.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NotBlockRow {
    /// The body it is in (see [`BlockRow::scope`]).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub scope: Vec<ScopeRow>,
    /// The node.
    pub node: NodeRef,
    /// `independent-inputs`, `no-shortcut`, `no-learned-layer` or `sum-of-heads`.
    pub reason: NotBlockReason,
    /// The reason in words.
    pub detail: String,
}

/// A node carrying subgraphs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SubgraphRow {
    /// The body the node is in (see [`BlockRow::scope`]).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub scope: Vec<ScopeRow>,
    /// The node.
    pub node: NodeRef,
    /// Number of subgraphs it carries.
    pub subgraphs: usize,
    /// The bodies searched for blocks, in attribute order.
    pub bodies: Vec<BodyRow>,
}

/// One body of a control-flow node, searched for blocks.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BodyRow {
    /// The attribute holding it (`then_branch`, `else_branch`, `body`).
    pub attribute: String,
    /// The outer tensors it reads (its inputs besides its own).
    pub captured: Vec<String>,
    /// Ids of the blocks found in it (not in bodies inside it).
    pub blocks: Vec<usize>,
}

/// A problem the analysis worked around.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DiagnosticRow {
    /// `note` or `warning`.
    pub severity: Severity,
    /// The node it is about, if any.
    pub node: Option<String>,
    /// What happened.
    pub message: String,
}

/// How closely one run's outputs follow the intact run's.
pub type Agreement = crate::stats::Agreement;

/// Which blocks matter: the outputs with a block's branch knocked out, the
/// growth of a small input change along depth, and the effective depth.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InfluenceReport {
    /// How the knockout ran, when it did.
    pub knockout: Option<KnockoutSetup>,
    /// How the perturbation gain was measured, when it was.
    pub gain: Option<GainSetup>,
    /// One row per block of the report, in block order.
    pub blocks: Vec<InfluenceRow>,
    /// The ensemble-of-paths summary, when the gain was measured.
    pub effective_depth: Option<EffectiveDepthRow>,
    /// Blocks that could not be knocked out, and why.
    pub skipped: Vec<SkippedRow>,
}

/// How the knockout ran.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct KnockoutSetup {
    /// Ids of the blocks knocked out.
    pub blocks: Vec<usize>,
    /// Whether the converse (the shortcut removed) ran too.
    pub shortcuts: bool,
    /// `low-impact` when the relative change of the outputs is below this.
    pub low_impact_below: f64,
    /// Forward passes run in all (intact, perturbed and knockout passes).
    pub forward_passes: usize,
    /// The outputs compared (float outputs), with the number of classes when
    /// an output looks like class scores (`[batch, classes]`).
    pub outputs: Vec<ComparedOutput>,
}

/// One compared output.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ComparedOutput {
    /// ONNX name.
    pub name: String,
    /// Length of the class axis, when top-1 agreement is measured.
    pub classes: Option<usize>,
}

/// How the perturbation gain was measured.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GainSetup {
    /// Size of the input change relative to the input's RMS, per sample.
    pub step: f64,
    /// RMS of the change of the model input actually fed (after rounding).
    pub input_change: Option<Spread>,
    /// RMS(Δ output of the last top-level block) / RMS(Δ input of the first),
    /// mean over samples.
    pub end_to_end: Option<f64>,
    /// `exploding-gain` / `vanishing-gain` when the end-to-end gain up to a
    /// block is above this factor / below its inverse.
    pub gain_factor: f64,
}

/// What one block does to the model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InfluenceRow {
    /// The block's id.
    pub block: usize,
    /// Whether the block changes the spatial or sequence size (a stride, a
    /// pooling or resampled shortcut, or fork and output shapes that differ
    /// outside the channel axis).
    pub changes_resolution: bool,
    /// The outputs with the branch knocked out against the intact outputs.
    pub knockout: Option<Agreement>,
    /// The outputs with the shortcut knocked out (the converse).
    pub shortcut_knockout: Option<Agreement>,
    /// Rank by the relative change of the outputs under knockout (1 = largest).
    pub rank: Option<usize>,
    /// The knockout changes the outputs by less than `low_impact_below`.
    pub low_impact: bool,
    /// RMS(Δ merge output) / RMS(Δ block input), per sample.
    pub gain: Option<Spread>,
    /// RMS(Δ shortcut) / RMS(Δ block input), per sample.
    pub shortcut_gain: Option<Spread>,
    /// RMS(Δ branch) / RMS(Δ block input), per sample.
    pub branch_gain: Option<Spread>,
    /// RMS(Δ branch) / (RMS(Δ shortcut) + RMS(Δ branch)), mean over samples:
    /// the share of the change that takes the branch.
    pub branch_share: Option<f64>,
    /// Product of the gains of the top-level blocks up to this one.
    pub gain_product: Option<f64>,
    /// RMS(Δ merge output) / RMS(Δ input of the first top-level block), mean
    /// over samples: the end-to-end gain up to this block.
    pub gain_to_here: Option<f64>,
}

/// The ensemble-of-paths view over the top-level blocks (docs/statistics.md).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct EffectiveDepthRow {
    /// Top-level blocks with a measured branch share.
    pub blocks: usize,
    /// Mean number of branches a unit of change passes through (the
    /// effective depth): the sum of the branch shares.
    pub mean_path_length: f64,
    /// Standard deviation of the path length.
    pub path_length_sd: f64,
    /// Shortest length k with at least half the weight on paths ≤ k.
    pub median_path_length: usize,
    /// Shortest and longest lengths of the central 80% of the weight.
    pub central_80: [usize; 2],
    /// Weight of paths of each length 0..=blocks (sums to 1).
    pub distribution: Vec<f64>,
    /// Top-level blocks knocked out whose knockout is not low-impact.
    pub carrying: Option<usize>,
}

/// A block that could not be knocked out.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SkippedRow {
    /// The block's id.
    pub block: usize,
    /// Why.
    pub reason: String,
}
