//! The command line as clap reads it: declarations only. Every default is
//! read from the library's own `STANDARD` configuration, so no default is
//! written twice; turning these into configurations is `convert`'s job.

use std::path::PathBuf;

use clap::{Parser, Subcommand, ValueEnum};

use crate::findings::{FindingConfig, HeadroomThresholds, InfluenceThresholds};
use crate::measure::GAIN_STEP;
use crate::open::OpenConfig;
use crate::probe::inputs::{Dist, InputConfig};

/// Audit the residual structure of ONNX models.
#[derive(Debug, Parser)]
#[command(name = "shunt", version, about, long_about = None, max_term_width = 100)]
pub(super) struct Args {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub(super) enum Command {
    /// Find every residual block of a model and say what kind it is, without running it.
    Scan(ScanArgs),
    /// Scan, then run the model on the CPU and measure every block's branch against its shortcut.
    Audit(Box<AuditArgs>),
    /// Write a model's residual structure to a reviewable TOML file (no statistics, no node names).
    Pin(PinArgs),
    /// Check a model against a pin file or a hand-written expectation; exit 1 on any difference.
    Verify(VerifyArgs),
    /// Align the blocks of two models, run both on the same inputs, and report what changed.
    Compare(CompareArgs),
    /// Write the model as shunt analyses and runs it: fused, contrib and quantised
    /// operators rewritten into standard ONNX operators, every tensor name kept.
    Lower(LowerArgs),
}

#[derive(Debug, clap::Args)]
pub(super) struct LowerArgs {
    /// The ONNX model file.
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,
    /// Where to write the lowered model (written atomically; never over the model).
    /// External data is not copied: keep the file beside the model's own data.
    #[arg(long, short = 'o', value_name = "FILE")]
    pub output: PathBuf,
    #[command(flatten)]
    pub limits: Limits,
}

#[derive(Debug, clap::Args)]
pub(super) struct ScanArgs {
    /// The ONNX model file; or several files and folders (each folder
    /// searched recursively for `.onnx` files), reported together.
    #[arg(required = true, value_name = "MODEL")]
    pub models: Vec<PathBuf>,
    #[command(flatten)]
    pub out: OutputArgs,
    #[command(flatten)]
    pub many: ManyArgs,
    /// No progress bar.
    #[arg(long, short = 'q')]
    pub quiet: bool,
    #[command(flatten)]
    pub limits: Limits,
}

/// Options for several models at once.
#[derive(Debug, clap::Args)]
pub(super) struct ManyArgs {
    /// With several models: how many to process at once (default: one per
    /// core; an audit takes at most --threads, and shares the threads and
    /// memory budget between the models it runs at once). Each audit holds
    /// its own model and activations in memory.
    #[arg(long, short = 'j', value_name = "N")]
    pub jobs: Option<usize>,
}

/// Where a report goes and when it fails the command.
#[derive(Debug, clap::Args)]
pub(super) struct OutputArgs {
    /// Output format.
    #[arg(long, value_enum, default_value_t = ReportFormat::Table)]
    pub format: ReportFormat,
    /// Write the report to this file instead of standard output (written
    /// atomically; never over the model).
    #[arg(long, short = 'o', value_name = "FILE")]
    pub output: Option<PathBuf>,
    /// Exit with code 1 when any of these findings occurs: a comma-separated
    /// list of codes (static-dead, lost-shortcut, dead, dominant,
    /// dead-channels, non-finite, exploding-signal, vanishing-signal,
    /// low-impact, exploding-gain, vanishing-gain, overflow, overflow-risk,
    /// underflow-risk, int8-outlier-channels) or `any`.
    #[arg(long, value_name = "LIST")]
    pub fail_on: Option<String>,
}

#[derive(Debug, clap::Args)]
pub(super) struct AuditArgs {
    /// The ONNX model file; or several files and folders (each folder
    /// searched recursively for `.onnx` files), reported together.
    #[arg(required = true, value_name = "MODEL")]
    pub models: Vec<PathBuf>,
    #[command(flatten)]
    pub out: OutputArgs,
    #[command(flatten)]
    pub many: ManyArgs,
    #[command(flatten)]
    pub inputs: InputArgs,
    #[command(flatten)]
    pub run: RunArgs,
    /// Do not run the model: report the structure and structural findings only.
    #[arg(long)]
    pub no_run: bool,
    #[command(flatten)]
    pub thresholds: ThresholdArgs,
    /// No progress bar.
    #[arg(long, short = 'q')]
    pub quiet: bool,
    #[command(flatten)]
    pub influence: InfluenceArgs,
    #[command(flatten)]
    pub headroom: HeadroomArgs,
    #[command(flatten)]
    pub limits: Limits,
}

/// The target number format of the headroom section.
#[derive(Debug, clap::Args)]
pub(super) struct HeadroomArgs {
    /// Report every block's headroom in this format, with overflow, underflow
    /// and int8 outlier-channel findings (default: a float16 or bfloat16
    /// model's own type, else none).
    #[arg(long, value_enum, value_name = "FORMAT")]
    pub precision: Option<PrecisionArg>,
    /// `overflow-risk` when the format's largest value over a block's largest
    /// |x| is below this factor.
    #[arg(long, value_name = "X", default_value_t = HeadroomThresholds::STANDARD.margin)]
    pub headroom_below: f64,
    /// `underflow-risk` (fp16) when more than this fraction of a merge output
    /// would be zero or subnormal.
    #[arg(long, value_name = "F", default_value_t = HeadroomThresholds::STANDARD.underflow_above)]
    pub underflow_above: f64,
    /// `int8-outlier-channels` when the largest channel's max |x| exceeds the
    /// median channel's by more than this factor.
    #[arg(long, value_name = "X", default_value_t = HeadroomThresholds::STANDARD.outlier_ratio_above)]
    pub outlier_ratio_above: f64,
}

/// `--precision`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub(super) enum PrecisionArg {
    /// IEEE binary16 (largest finite 65504).
    Fp16,
    /// bfloat16 (float32's exponent range).
    Bf16,
    /// int8 with a symmetric per-tensor scale.
    Int8,
}

/// What is fed to a model that is run: `audit`, `verify --expect` and
/// `compare` share these.
#[derive(Debug, clap::Args)]
pub(super) struct InputArgs {
    /// Number of samples to run (models with a fixed batch run it in passes of that batch).
    #[arg(long = "batch", value_name = "N", default_value_t = InputConfig::STANDARD.samples)]
    pub samples: usize,
    /// Most samples per forward pass (models with a symbolic batch; default: one).
    #[arg(long, value_name = "N")]
    pub pass_batch: Option<usize>,
    /// Most elements one model input may hold in one pass (checked before allocating).
    #[arg(long, value_name = "N", default_value_t = InputConfig::STANDARD.max_input_elements)]
    pub max_input_elements: u64,
    /// Seed of the input generator.
    #[arg(long, value_name = "N", default_value_t = InputConfig::STANDARD.seed)]
    pub seed: u64,
    /// Distribution of float inputs.
    #[arg(long, value_enum, default_value_t = DistArg::from(InputConfig::STANDARD.dist))]
    pub dist: DistArg,
    /// Scale of the distribution (standard deviation, or half-width for uniform).
    #[arg(long, value_name = "X", default_value_t = InputConfig::STANDARD.scale)]
    pub scale: f32,
    /// Value of a symbolic dimension, e.g. `--dim seq=128` (repeatable); a
    /// value of the batch symbol fixes the samples per pass.
    #[arg(long = "dim", value_name = "NAME=VALUE")]
    pub dims: Vec<String>,
    /// Whole shape of an input, fed as given, e.g. `--input pixels=1x3x224x224` (repeatable).
    #[arg(long = "input", value_name = "NAME=D1xD2x...")]
    pub shapes: Vec<String>,
    /// Fill an input with one value, e.g. `--fill attention_mask=1` or
    /// `--fill sr=16000` for a scalar that is not an index (repeatable).
    #[arg(long = "fill", value_name = "NAME=VALUE")]
    pub fills: Vec<String>,
    /// The sample axis of an input where the inferred one is wrong, e.g.
    /// `--batch-axis state=1`, or `none` for an input without samples (repeatable).
    #[arg(long = "batch-axis", value_name = "NAME=AXIS")]
    pub batch_axes: Vec<String>,
    /// Feed real inputs from a .npy file (one-input models) or a .npz file
    /// (one entry per input name); samples lie along each input's sample axis.
    #[arg(long, value_name = "FILE")]
    pub feed: Option<PathBuf>,
}

/// How much of the machine a run may use: `audit`, `verify --expect` and
/// `compare` share these. Results do not depend on them.
#[derive(Debug, clap::Args)]
pub(super) struct RunArgs {
    /// Threads in all (forward passes at once times threads inside a pass;
    /// with several models, divided between the models run at once).
    /// Default: the cores this process may use.
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Most memory the activations of the passes run at once may take, e.g.
    /// `512M` or `4G` (fewer passes run at once when one pass needs more).
    /// Default: half the memory the system has available.
    #[arg(long, value_name = "SIZE")]
    pub memory_budget: Option<String>,
}

/// The thresholds of the measured findings.
#[derive(Debug, clap::Args)]
pub(super) struct ThresholdArgs {
    /// `dead` when RMS(branch)/RMS(shortcut) is below this.
    #[arg(long, value_name = "X", default_value_t = FindingConfig::STANDARD.dead_below)]
    pub dead_below: f64,
    /// `dominant` when RMS(branch)/RMS(shortcut) is above this.
    #[arg(long, value_name = "X", default_value_t = FindingConfig::STANDARD.dominant_above)]
    pub dominant_above: f64,
    /// `dead-channels` when more than this fraction of channels is dead.
    #[arg(long, value_name = "F", default_value_t = FindingConfig::STANDARD.dead_channels_above)]
    pub dead_channels_above: f64,
    /// `exploding-signal`/`vanishing-signal` when output RMS changes by more
    /// than this factor from the first block to the last.
    #[arg(long, value_name = "X", default_value_t = FindingConfig::STANDARD.depth_factor)]
    pub depth_factor: f64,
}

/// Which blocks matter: knockout, perturbation gain, effective depth.
#[derive(Debug, clap::Args)]
pub(super) struct InfluenceArgs {
    /// Run the model once more per block with that block's branch removed and
    /// measure how much the outputs change; also measures the perturbation gain.
    #[arg(long)]
    pub knockout: bool,
    /// With --knockout, also remove each block's shortcut instead (one more pass per block).
    #[arg(long)]
    pub knockout_shortcuts: bool,
    /// Knock out only these blocks, e.g. `1,4,6-9` (default: all).
    #[arg(long, value_name = "LIST")]
    pub blocks: Option<String>,
    /// Measure how a small random input change grows or shrinks block by block
    /// (one more pass per pass; implied by --knockout).
    #[arg(long)]
    pub gain: bool,
    /// Size of the input change relative to the input's RMS.
    #[arg(long, value_name = "X", default_value_t = GAIN_STEP)]
    pub gain_step: f32,
    /// `low-impact` when knocking out a branch changes the outputs by less than this (relative L2).
    #[arg(long, value_name = "X", default_value_t = InfluenceThresholds::STANDARD.low_impact_below)]
    pub low_impact_below: f64,
    /// `exploding-gain`/`vanishing-gain` when a small change grows or shrinks by
    /// more than this factor from the first block to some block.
    #[arg(long, value_name = "X", default_value_t = InfluenceThresholds::STANDARD.gain_factor)]
    pub gain_factor: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub(super) enum DistArg {
    Normal,
    Uniform,
}

impl From<Dist> for DistArg {
    fn from(d: Dist) -> DistArg {
        match d {
            Dist::Normal => DistArg::Normal,
            Dist::Uniform => DistArg::Uniform,
        }
    }
}

/// Limits checked before anything large is read.
#[derive(Debug, clap::Args)]
pub(super) struct Limits {
    /// Largest model file read, in bytes.
    #[arg(long, value_name = "BYTES", default_value_t = OpenConfig::STANDARD.load.max_file_bytes)]
    pub max_file_bytes: u64,
    /// Most nodes in the main graph.
    #[arg(long, value_name = "N", default_value_t = OpenConfig::STANDARD.build.max_nodes)]
    pub max_nodes: usize,
    /// Largest weight tensor read to check whether a branch is zeroed, in bytes.
    #[arg(
        long,
        value_name = "BYTES",
        default_value_t = OpenConfig::STANDARD.classify.max_inspect_bytes
    )]
    pub max_inspect_bytes: u64,
    /// The NCHWc block size onnxruntime used when it saved a model at
    /// ORT_ENABLE_ALL (16 with AVX-512F, 8 with AVX2), for models whose
    /// shapes fit both (default: this machine's).
    #[arg(long, value_name = "N", value_parser = ["8", "16"])]
    pub nchwc_block: Option<String>,
}

/// The formats of a report of one model.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub(super) enum ReportFormat {
    /// A table for people.
    Table,
    /// The versioned JSON document described in docs/formats.md.
    Json,
    /// One self-contained HTML page with plots (use with --output).
    Html,
    /// Markdown for a pull-request comment, at most 60,000 bytes.
    Markdown,
    /// The block structure in the DOT graph language.
    Dot,
}

/// The formats of the other documents (a verification, a comparison).
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub(super) enum TextFormat {
    /// A table for people.
    Table,
    /// The versioned JSON document described in docs/formats.md.
    Json,
}

/// The formats of a comparison.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub(super) enum CompareFormat {
    /// A table for people.
    Table,
    /// The versioned JSON document described in docs/formats.md.
    Json,
    /// One self-contained HTML page with the error along depth (use with --output).
    Html,
    /// Markdown for a pull-request comment, at most 60,000 bytes.
    Markdown,
}

#[derive(Debug, clap::Args)]
pub(super) struct PinArgs {
    /// The ONNX model file.
    pub model: PathBuf,
    /// The pin file to write (TOML; written atomically, never over the model).
    #[arg(long, short = 'o', value_name = "FILE")]
    pub output: Option<PathBuf>,
    #[command(flatten)]
    pub limits: Limits,
}

#[derive(Debug, clap::Args)]
#[command(group(clap::ArgGroup::new("against").required(true).args(["pin", "expect"])))]
pub(super) struct VerifyArgs {
    /// The ONNX model file.
    pub model: PathBuf,
    /// A pin file written by `shunt pin`.
    #[arg(long, value_name = "FILE")]
    pub pin: Option<PathBuf>,
    /// A hand-written expectation file (TOML, see docs/checking.md).
    #[arg(long, value_name = "FILE")]
    pub expect: Option<PathBuf>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = TextFormat::Table)]
    pub format: TextFormat,
    /// Write the result to this file instead of standard output.
    #[arg(long, short = 'o', value_name = "FILE")]
    pub output: Option<PathBuf>,
    #[command(flatten)]
    pub inputs: InputArgs,
    #[command(flatten)]
    pub run: RunArgs,
    /// No progress bar.
    #[arg(long, short = 'q')]
    pub quiet: bool,
    #[command(flatten)]
    pub limits: Limits,
}

#[derive(Debug, clap::Args)]
pub(super) struct CompareArgs {
    /// The reference model (A).
    pub a: PathBuf,
    /// The model compared with it (B).
    pub b: PathBuf,
    /// Output format.
    #[arg(long, value_enum, default_value_t = CompareFormat::Table)]
    pub format: CompareFormat,
    /// Write the comparison to this file instead of standard output.
    #[arg(long, short = 'o', value_name = "FILE")]
    pub output: Option<PathBuf>,
    /// Exit 1 when any output's relative L2 difference is above this.
    #[arg(long, value_name = "X")]
    pub max_rel_l2: Option<f64>,
    /// Exit 1 when any aligned block's ratio changes by more than this fraction (0.1 = 10%).
    #[arg(long, value_name = "F")]
    pub max_ratio_change: Option<f64>,
    /// The error is born at the first aligned block whose merge output differs
    /// from A's by more than this (relative L2).
    #[arg(long, value_name = "X", default_value_t = crate::compare::ERROR_ABOVE)]
    pub error_above: f64,
    /// Do not run the models: compare structure only.
    #[arg(long)]
    pub no_run: bool,
    #[command(flatten)]
    pub inputs: InputArgs,
    #[command(flatten)]
    pub run: RunArgs,
    /// No progress bar.
    #[arg(long, short = 'q')]
    pub quiet: bool,
    #[command(flatten)]
    pub limits: Limits,
}
