//! Command-line front end. The only place that prints or picks exit codes:
//! 0 success, 1 a finding named by `--fail-on` occurred, 2 errors.
#![allow(clippy::print_stdout, clippy::print_stderr)]

mod compare;
mod output;
mod pin;
mod progress;

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{Context, bail};
use clap::{Parser, Subcommand, ValueEnum};

use shunt::audit::{self, AuditConfig};
use shunt::batch;
use shunt::findings::{Code, FindingConfig};
use shunt::probe::inputs::{Dist, InputConfig};
use shunt::report::Report;
use shunt::report::batch::BatchReport;
use shunt::scan::{self, ScanConfig};

/// Audit the residual structure of ONNX models.
#[derive(Debug, Parser)]
#[command(name = "shunt", version, about, long_about = None, max_term_width = 100)]
struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Find every residual block of a model and say what kind it is, without running it.
    Scan(ScanArgs),
    /// Scan, then run the model on the CPU and measure every block's branch against its shortcut.
    Audit(Box<AuditArgs>),
    /// Write a model's residual structure to a reviewable TOML file (no statistics, no node names).
    Pin(pin::PinArgs),
    /// Check a model against a pin file or a hand-written expectation; exit 1 on any difference.
    Verify(pin::VerifyArgs),
    /// Align the blocks of two models, run both on the same inputs, and report what changed.
    Compare(compare::CompareArgs),
    /// Write the model as shunt analyses and runs it: fused, contrib and quantised
    /// operators rewritten into standard ONNX operators, every tensor name kept.
    Lower(LowerArgs),
}

#[derive(Debug, clap::Args)]
struct LowerArgs {
    /// The ONNX model file.
    #[arg(value_name = "MODEL")]
    model: PathBuf,
    /// Where to write the lowered model (written atomically; never over the model).
    /// External data is not copied: keep the file beside the model's own data.
    #[arg(long, short = 'o', value_name = "FILE")]
    output: PathBuf,
    #[command(flatten)]
    limits: Limits,
}

/// `shunt lower`: writes the lowered model and says on standard error what
/// was rewritten.
fn lower_command(args: &LowerArgs) -> anyhow::Result<ExitCode> {
    use prost::Message;
    let config = args.limits.config();
    let loaded = shunt::load::load(&args.model, &config.load)?;
    let lowered = shunt::lower::lower(loaded.model, &loaded.external, &config.lower)
        .map_err(|e| e.at(&args.model))?;
    let bytes = lowered.model.encode_to_vec();
    output::write(Some(&args.output), &[&args.model], |out| out.write_all(&bytes))?;
    let summary = lowered.summary();
    if summary.is_empty() {
        eprintln!("shunt: nothing to lower; the model is written unchanged");
    }
    for (domain, op, n) in summary {
        let domain = if domain.is_empty() { String::new() } else { format!("{domain}.") };
        eprintln!(
            "shunt: lowered {n} {}{}",
            shunt::report::text::terminal_safe(&domain),
            shunt::report::text::terminal_safe(&op)
        );
    }
    Ok(ExitCode::SUCCESS)
}

#[derive(Debug, clap::Args)]
struct ScanArgs {
    /// The ONNX model file; or several files and folders (each folder
    /// searched recursively for `.onnx` files), reported together.
    #[arg(required = true, value_name = "MODEL")]
    models: Vec<PathBuf>,
    #[command(flatten)]
    out: OutputArgs,
    #[command(flatten)]
    many: BatchArgs,
    /// No progress bar.
    #[arg(long, short = 'q')]
    quiet: bool,
    #[command(flatten)]
    limits: Limits,
}

/// Options for several models at once.
#[derive(Debug, clap::Args)]
struct BatchArgs {
    /// With several models: how many to process at once (default: one per
    /// core). Each audit holds its own model and activations in memory.
    #[arg(long, short = 'j', value_name = "N")]
    jobs: Option<usize>,
}

#[derive(Debug, clap::Args)]
struct OutputArgs {
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    format: Format,
    /// Write the report to this file instead of standard output (written
    /// atomically; never over the model).
    #[arg(long, short = 'o', value_name = "FILE")]
    output: Option<PathBuf>,
    /// Exit with code 1 when any of these findings occurs: a comma-separated
    /// list of codes (static-dead, lost-shortcut, dead, dominant,
    /// dead-channels, non-finite, exploding-signal, vanishing-signal,
    /// low-impact, exploding-gain, vanishing-gain) or `any`.
    #[arg(long, value_name = "LIST")]
    fail_on: Option<String>,
}

#[derive(Debug, clap::Args)]
struct AuditArgs {
    /// The ONNX model file; or several files and folders (each folder
    /// searched recursively for `.onnx` files), reported together.
    #[arg(required = true, value_name = "MODEL")]
    models: Vec<PathBuf>,
    #[command(flatten)]
    out: OutputArgs,
    #[command(flatten)]
    many: BatchArgs,
    /// Number of samples to run (models with a fixed batch run it in passes of that batch).
    #[arg(long, value_name = "N", default_value_t = 8)]
    batch: usize,
    /// Most samples per forward pass (models with a symbolic batch; default: all at once).
    #[arg(long, value_name = "N")]
    pass_batch: Option<usize>,
    /// Most elements one model input may hold in one pass (checked before allocating).
    #[arg(long, value_name = "N", default_value_t = shunt::probe::inputs::MAX_INPUT_ELEMENTS)]
    max_input_elements: u64,
    /// Seed of the input generator.
    #[arg(long, value_name = "N", default_value_t = 0)]
    seed: u64,
    /// Distribution of float inputs.
    #[arg(long, value_enum, default_value_t = DistArg::Normal)]
    dist: DistArg,
    /// Scale of the distribution (standard deviation, or half-width for uniform).
    #[arg(long, value_name = "X", default_value_t = 1.0)]
    scale: f32,
    /// Value of a symbolic dimension, e.g. `--dim seq=128` (repeatable); a
    /// value of the batch symbol fixes the samples per pass.
    #[arg(long = "dim", value_name = "NAME=VALUE")]
    dims: Vec<String>,
    /// Whole shape of an input, fed as given, e.g. `--input pixels=1x3x224x224` (repeatable).
    #[arg(long = "input", value_name = "NAME=D1xD2x...")]
    shapes: Vec<String>,
    /// Fill an input with one value, e.g. `--fill attention_mask=1` or
    /// `--fill sr=16000` for a scalar that is not an index (repeatable).
    #[arg(long = "fill", value_name = "NAME=VALUE")]
    fills: Vec<String>,
    /// The sample axis of an input where the inferred one is wrong, e.g.
    /// `--batch-axis state=1`, or `none` for an input without samples (repeatable).
    #[arg(long = "batch-axis", value_name = "NAME=AXIS")]
    batch_axes: Vec<String>,
    /// Feed real inputs from a .npy file (one-input models) or a .npz file
    /// (one entry per input name); samples lie along each input's sample axis.
    #[arg(long, value_name = "FILE")]
    feed: Option<PathBuf>,
    /// Do not run the model: report the structure and structural findings only.
    #[arg(long)]
    no_run: bool,
    /// `dead` when RMS(branch)/RMS(shortcut) is below this.
    #[arg(long, value_name = "X", default_value_t = 0.01)]
    dead_below: f64,
    /// `dominant` when RMS(branch)/RMS(shortcut) is above this.
    #[arg(long, value_name = "X", default_value_t = 10.0)]
    dominant_above: f64,
    /// `dead-channels` when more than this fraction of channels is dead.
    #[arg(long, value_name = "F", default_value_t = 0.5)]
    dead_channels_above: f64,
    /// `exploding-signal`/`vanishing-signal` when output RMS changes by more
    /// than this factor from the first block to the last.
    #[arg(long, value_name = "X", default_value_t = 100.0)]
    depth_factor: f64,
    /// No progress bar.
    #[arg(long, short = 'q')]
    quiet: bool,
    #[command(flatten)]
    influence: InfluenceArgs,
    #[command(flatten)]
    limits: Limits,
}

/// Which blocks matter: knockout, perturbation gain, effective depth.
#[derive(Debug, clap::Args)]
struct InfluenceArgs {
    /// Run the model once more per block with that block's branch removed and
    /// measure how much the outputs change; also measures the perturbation gain.
    #[arg(long)]
    knockout: bool,
    /// With --knockout, also remove each block's shortcut instead (one more pass per block).
    #[arg(long)]
    knockout_shortcuts: bool,
    /// Knock out only these blocks, e.g. `1,4,6-9` (default: all).
    #[arg(long, value_name = "LIST")]
    blocks: Option<String>,
    /// Measure how a small random input change grows or shrinks block by block
    /// (one more pass per pass; implied by --knockout).
    #[arg(long)]
    gain: bool,
    /// Size of the input change relative to the input's RMS.
    #[arg(long, value_name = "X", default_value_t = shunt::audit::GAIN_STEP)]
    gain_step: f32,
    /// `low-impact` when knocking out a branch changes the outputs by less than this (relative L2).
    #[arg(long, value_name = "X", default_value_t = 0.01)]
    low_impact_below: f64,
    /// `exploding-gain`/`vanishing-gain` when a small change grows or shrinks by
    /// more than this factor from the first block to some block.
    #[arg(long, value_name = "X", default_value_t = 100.0)]
    gain_factor: f64,
}

impl InfluenceArgs {
    fn config(&self) -> anyhow::Result<Option<audit::InfluenceConfig>> {
        let knockout = self.knockout || self.knockout_shortcuts;
        if self.blocks.is_some() && !knockout {
            bail!("--blocks selects blocks to knock out: add --knockout");
        }
        if !knockout && !self.gain {
            return Ok(None);
        }
        if !(self.gain_step.is_finite() && self.gain_step > 0.0 && self.gain_step < 1.0) {
            bail!("--gain-step {}: expected a number between 0 and 1", self.gain_step);
        }
        let blocks = self.blocks.as_deref().map(parse_blocks).transpose()?;
        Ok(Some(audit::InfluenceConfig {
            knockout,
            shortcuts: self.knockout_shortcuts,
            blocks,
            gain_step: Some(self.gain_step),
            thresholds: shunt::findings::InfluenceThresholds {
                low_impact_below: self.low_impact_below,
                gain_factor: self.gain_factor,
            },
        }))
    }
}

/// `1,4,6-9` → [1, 4, 6, 7, 8, 9].
fn parse_blocks(list: &str) -> anyhow::Result<Vec<usize>> {
    let mut out = Vec::new();
    for item in list.split(',').map(str::trim).filter(|s| !s.is_empty()) {
        let bad = || anyhow::anyhow!("--blocks: '{item}' is not a block id or a range like 3-7");
        match item.split_once('-') {
            Some((a, b)) => {
                let a: usize = a.trim().parse().map_err(|_| bad())?;
                let b: usize = b.trim().parse().map_err(|_| bad())?;
                if a == 0 || b < a {
                    return Err(bad());
                }
                out.extend(a..=b);
            }
            None => {
                let id: usize = item.parse().map_err(|_| bad())?;
                if id == 0 {
                    return Err(bad());
                }
                out.push(id);
            }
        }
    }
    if out.is_empty() {
        bail!("--blocks: no block ids in '{list}'");
    }
    Ok(out)
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
enum DistArg {
    Normal,
    Uniform,
}

/// Limits checked before anything large is read.
#[derive(Debug, clap::Args)]
struct Limits {
    /// Largest model file read, in bytes.
    #[arg(long, value_name = "BYTES", default_value_t = 4 << 30)]
    max_file_bytes: u64,
    /// Most nodes in the main graph.
    #[arg(long, value_name = "N", default_value_t = 1_000_000)]
    max_nodes: usize,
    /// Largest weight tensor read to check whether a branch is zeroed, in bytes.
    #[arg(long, value_name = "BYTES", default_value_t = 16 << 20)]
    max_inspect_bytes: u64,
    /// The NCHWc block size onnxruntime used when it saved a model at
    /// ORT_ENABLE_ALL (16 with AVX-512F, 8 with AVX2), for models whose
    /// shapes fit both (default: this machine's).
    #[arg(long, value_name = "N", value_parser = ["8", "16"])]
    nchwc_block: Option<String>,
}

impl Limits {
    fn config(&self) -> ScanConfig {
        let mut c = ScanConfig::standard();
        c.load.max_file_bytes = self.max_file_bytes;
        c.build.max_nodes = self.max_nodes;
        c.classify.max_inspect_bytes = self.max_inspect_bytes;
        c.lower.nchwc_block = self.nchwc_block.as_deref().and_then(|b| b.parse().ok());
        c
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
enum Format {
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

/// Runs the command line and turns the outcome into an exit code.
pub fn main() -> ExitCode {
    let args = match Args::try_parse() {
        Ok(a) => a,
        Err(e) => {
            let _ = e.print();
            return match e.kind() {
                clap::error::ErrorKind::DisplayHelp | clap::error::ErrorKind::DisplayVersion => {
                    ExitCode::SUCCESS
                }
                _ => ExitCode::from(2),
            };
        }
    };
    // A panic anywhere (the inference engine is known to panic on some
    // inputs) is caught and reported as one line, never as a backtrace.
    std::panic::set_hook(Box::new(|_| {}));
    let outcome = std::panic::catch_unwind(|| run(args));
    match outcome {
        Ok(Ok(code)) => code,
        Ok(Err(e)) => {
            if is_broken_pipe(&e) {
                return ExitCode::SUCCESS;
            }
            // Names in the message come from the file: escaped, so a name
            // with a newline or an escape sequence keeps the error one line.
            let message = shunt::report::text::terminal_safe(&format!("{e:#}"));
            let _ = writeln!(std::io::stderr(), "shunt: error: {message}");
            ExitCode::from(2)
        }
        Err(panic) => {
            let what = panic
                .downcast_ref::<String>()
                .map(String::as_str)
                .or_else(|| panic.downcast_ref::<&str>().copied())
                .unwrap_or("unknown cause");
            let what = shunt::report::text::terminal_safe(what);
            let _ =
                writeln!(std::io::stderr(), "shunt: internal error: {what} (please report this)");
            ExitCode::from(2)
        }
    }
}

fn run(args: Args) -> anyhow::Result<ExitCode> {
    match args.command {
        Command::Pin(a) => pin::pin(&a),
        Command::Verify(a) => pin::verify(&a),
        Command::Compare(a) => compare::compare(&a),
        Command::Lower(a) => lower_command(&a),
        Command::Scan(a) => {
            let fail_on = parse_fail_on(a.out.fail_on.as_deref())?;
            let config = a.limits.config();
            let job = |path: &Path| Ok((scan::scan_file(path, &config)?, None));
            if is_batch(&a.models) {
                return run_batch("scan", &a.models, &a.out, &a.many, a.quiet, &fail_on, &job);
            }
            let model = &a.models[0];
            let report = scan::scan_file(model, &config)?;
            emit(&a.out, model, &report)?;
            Ok(verdict(&report, &fail_on))
        }
        Command::Audit(a) => {
            let fail_on = parse_fail_on(a.out.fail_on.as_deref())?;
            let findings = FindingConfig {
                dead_below: a.dead_below,
                dominant_above: a.dominant_above,
                dead_channels_above: a.dead_channels_above,
                depth_factor: a.depth_factor,
            };
            if a.no_run && a.influence.config()?.is_some() {
                bail!("--no-run cannot be combined with --knockout or --gain, which run the model");
            }
            let config = AuditConfig {
                scan: a.limits.config(),
                inputs: if a.no_run { no_inputs() } else { input_config(&a)? },
                findings,
                influence: a.influence.config()?,
            };
            if is_batch(&a.models) {
                let job = |path: &Path| audit_one(path, a.no_run, &config, &shunt::probe::Silent);
                return run_batch("audit", &a.models, &a.out, &a.many, a.quiet, &fail_on, &job);
            }
            let model = &a.models[0];
            let bar = progress::Bar::new(a.quiet);
            let (report, run_error) = audit_one(model, a.no_run, &config, &bar)?;
            bar.clear();
            emit(&a.out, model, &report)?;
            if let Some(e) = run_error {
                return Err(anyhow::Error::new(e));
            }
            Ok(verdict(&report, &fail_on))
        }
    }
}

/// The audit of one model: the structural audit only with `no_run`.
fn audit_one(
    model: &Path,
    no_run: bool,
    config: &AuditConfig,
    progress: &dyn shunt::probe::Progress,
) -> shunt::Result<(Report, Option<shunt::Error>)> {
    if no_run {
        let mut report = scan::scan_file(model, &config.scan)?;
        report.command = "audit".to_owned();
        let facts = scan::block_facts(&report);
        scan::set_findings(&mut report, &facts, &config.findings);
        return Ok((report, None));
    }
    let outcome = audit::audit_file(model, config, progress)?;
    Ok((outcome.report, outcome.run_error))
}

fn input_config(a: &AuditArgs) -> anyhow::Result<InputConfig> {
    Ok(InputConfig {
        samples: a.batch,
        max_pass: a.pass_batch,
        seed: a.seed,
        dist: match a.dist {
            DistArg::Normal => Dist::Normal,
            DistArg::Uniform => Dist::Uniform,
        },
        scale: a.scale,
        dims: parse_pairs(&a.dims, "--dim", |v| v.parse::<u64>().ok())?,
        shapes: parse_pairs(&a.shapes, "--input", parse_shape)?,
        fills: parse_pairs(&a.fills, "--fill", |v| v.parse::<f64>().ok())?,
        batch_axes: parse_pairs(&a.batch_axes, "--batch-axis", parse_axis)?,
        feed: a.feed.clone(),
        max_input_elements: a.max_input_elements,
    })
}

/// Inputs of an audit that does not run (never read).
fn no_inputs() -> InputConfig {
    InputConfig { max_input_elements: 0, ..InputConfig::standard(0) }
}

/// Several paths or a folder make a batch; one file gets its own report.
fn is_batch(paths: &[PathBuf]) -> bool {
    !matches!(paths, [one] if !one.is_dir())
}

/// Runs `job` over every model found, writes one batch report, prints each
/// error on standard error, and exits 2 if any model failed, else 1 if any
/// report has a finding named by `--fail-on`, else 0.
fn run_batch(
    command: &str,
    paths: &[PathBuf],
    out: &OutputArgs,
    args: &BatchArgs,
    quiet: bool,
    fail_on: &[Code],
    job: &(dyn Fn(&Path) -> batch::Outcome + Sync),
) -> anyhow::Result<ExitCode> {
    if matches!(out.format, Format::Html | Format::Markdown | Format::Dot) {
        bail!(
            "several models or a folder take --format table or json (html, markdown and dot are for one model)"
        );
    }
    let found = batch::find_models(paths);
    if found.is_empty() {
        let names: Vec<String> = paths.iter().map(|p| p.display().to_string()).collect();
        bail!("{}: no .onnx model file found", names.join(", "));
    }
    let threads = args.jobs.unwrap_or_else(|| batch::default_threads(found.len()));
    if threads == 0 {
        bail!("--jobs must be at least 1");
    }
    let bar = progress::Bar::new(quiet);
    shunt::probe::Progress::step(&bar, "models", found.len() as u64);
    let entries = batch::run(&found, threads, job, &|_| shunt::probe::Progress::advance(&bar));
    bar.clear();
    let report = BatchReport::new(command, entries);
    let inputs: Vec<&Path> = found.iter().map(batch::Found::path).collect();
    output::write(out.output.as_deref(), &inputs, |w| match out.format {
        Format::Table => shunt::report::batch::render_table(&report, w),
        Format::Json => shunt::report::json::render(&report, w),
        Format::Html | Format::Markdown | Format::Dot => unreachable!("refused above"),
    })?;
    for e in report.models.iter().filter_map(|m| m.error.as_deref()) {
        let _ =
            writeln!(std::io::stderr(), "shunt: error: {}", shunt::report::text::terminal_safe(e));
    }
    if report.summary.errors > 0 {
        return Ok(ExitCode::from(2));
    }
    let hit = report
        .models
        .iter()
        .filter_map(|m| m.report.as_ref())
        .any(|r| verdict(r, fail_on) != ExitCode::SUCCESS);
    Ok(if hit { ExitCode::from(1) } else { ExitCode::SUCCESS })
}

fn emit(out: &OutputArgs, model: &Path, report: &Report) -> anyhow::Result<()> {
    output::write(out.output.as_deref(), &[model], |w| match out.format {
        Format::Table => shunt::report::table::render(report, w),
        Format::Json => shunt::report::json::render(report, w),
        Format::Html => {
            let ctx = shunt::report::html::HtmlContext {
                argv: std::env::args_os().map(|a| a.to_string_lossy().into_owned()).collect(),
            };
            shunt::report::html::render(report, &ctx, w)
        }
        Format::Markdown => {
            let config = shunt::report::markdown::MarkdownConfig {
                max_bytes: shunt::report::markdown::DEFAULT_MAX_BYTES,
            };
            shunt::report::markdown::render(report, &config, w)
        }
        Format::Dot => shunt::report::dot::render(report, w),
    })
}

fn verdict(report: &Report, fail_on: &[Code]) -> ExitCode {
    let hit =
        report.findings.iter().any(|f| Code::parse(&f.code).is_some_and(|c| fail_on.contains(&c)));
    if hit { ExitCode::from(1) } else { ExitCode::SUCCESS }
}

fn parse_fail_on(list: Option<&str>) -> anyhow::Result<Vec<Code>> {
    let Some(list) = list else { return Ok(Vec::new()) };
    let mut codes = Vec::new();
    for item in list.split(',').map(str::trim).filter(|s| !s.is_empty()) {
        if item == "any" {
            return Ok(Code::ALL.to_vec());
        }
        match Code::parse(item) {
            Some(c) => codes.push(c),
            None => {
                let known: Vec<&str> = Code::ALL.iter().map(|c| c.as_str()).collect();
                bail!("--fail-on: unknown finding '{item}' (known: {}, or any)", known.join(", "))
            }
        }
    }
    Ok(codes)
}

fn parse_pairs<T>(
    items: &[String],
    flag: &str,
    value: impl Fn(&str) -> Option<T>,
) -> anyhow::Result<BTreeMap<String, T>> {
    let mut out = BTreeMap::new();
    for item in items {
        let (name, v) =
            item.split_once('=').with_context(|| format!("{flag} {item}: expected NAME=VALUE"))?;
        let parsed = value(v.trim())
            .with_context(|| format!("{flag} {item}: '{v}' is not a valid value"))?;
        out.insert(name.trim().to_owned(), parsed);
    }
    Ok(out)
}

/// A sample axis: a number, or `none` for an input without samples.
fn parse_axis(s: &str) -> Option<Option<usize>> {
    if s.eq_ignore_ascii_case("none") { Some(None) } else { s.parse::<usize>().ok().map(Some) }
}

fn parse_shape(s: &str) -> Option<Vec<u64>> {
    s.split(['x', 'X', ',']).map(|d| d.trim().parse::<u64>().ok().filter(|&d| d > 0)).collect()
}

fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}
