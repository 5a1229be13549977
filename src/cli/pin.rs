//! `shunt pin` and `shunt verify`: snapshot a model's residual structure,
//! check a model against a snapshot or a hand-written expectation.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Context;

use shunt::audit::{self, AuditConfig};
use shunt::expect;
use shunt::probe::inputs::{Dist, InputConfig};
use shunt::report::verify::Verification;
use shunt::scan;
use shunt::structure;

use super::{DistArg, Format, Limits, output, parse_axis, parse_pairs, parse_shape, progress};

#[derive(Debug, clap::Args)]
pub(super) struct PinArgs {
    /// The ONNX model file.
    model: PathBuf,
    /// The pin file to write (TOML; written atomically, never over the model).
    #[arg(long, short = 'o', value_name = "FILE")]
    output: Option<PathBuf>,
    #[command(flatten)]
    limits: Limits,
}

#[derive(Debug, clap::Args)]
#[command(group(clap::ArgGroup::new("against").required(true).args(["pin", "expect"])))]
pub(super) struct VerifyArgs {
    /// The ONNX model file.
    model: PathBuf,
    /// A pin file written by `shunt pin`.
    #[arg(long, value_name = "FILE")]
    pin: Option<PathBuf>,
    /// A hand-written expectation file (TOML, see docs/checking.md).
    #[arg(long, value_name = "FILE")]
    expect: Option<PathBuf>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    format: Format,
    /// Write the result to this file instead of standard output.
    #[arg(long, short = 'o', value_name = "FILE")]
    output: Option<PathBuf>,
    #[command(flatten)]
    run: RunArgs,
    #[command(flatten)]
    limits: Limits,
}

/// How a model is run when a command needs measurements.
#[derive(Debug, clap::Args)]
pub(super) struct RunArgs {
    /// Number of samples to run.
    #[arg(long, value_name = "N", default_value_t = 8)]
    pub batch: usize,
    /// Most samples per forward pass (models with a symbolic batch).
    #[arg(long, value_name = "N")]
    pub pass_batch: Option<usize>,
    /// Seed of the input generator.
    #[arg(long, value_name = "N", default_value_t = 0)]
    pub seed: u64,
    /// Distribution of float inputs.
    #[arg(long, value_enum, default_value_t = DistArg::Normal)]
    pub dist: DistArg,
    /// Scale of the distribution.
    #[arg(long, value_name = "X", default_value_t = 1.0)]
    pub scale: f32,
    /// Value of a symbolic dimension (repeatable).
    #[arg(long = "dim", value_name = "NAME=VALUE")]
    pub dims: Vec<String>,
    /// Whole shape of an input (repeatable).
    #[arg(long = "input", value_name = "NAME=D1xD2x...")]
    pub shapes: Vec<String>,
    /// Fill an input with one value (repeatable).
    #[arg(long = "fill", value_name = "NAME=VALUE")]
    pub fills: Vec<String>,
    /// The sample axis of an input, or `none` (repeatable).
    #[arg(long = "batch-axis", value_name = "NAME=AXIS")]
    pub batch_axes: Vec<String>,
    /// Feed real inputs from a .npy or .npz file.
    #[arg(long, value_name = "FILE")]
    pub feed: Option<PathBuf>,
    /// Most elements one model input may hold in one pass (checked before allocating).
    #[arg(long, value_name = "N", default_value_t = shunt::probe::inputs::MAX_INPUT_ELEMENTS)]
    pub max_input_elements: u64,
    /// No progress bar.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

impl RunArgs {
    pub(super) fn inputs(&self) -> anyhow::Result<InputConfig> {
        Ok(InputConfig {
            samples: self.batch,
            max_pass: self.pass_batch,
            seed: self.seed,
            dist: match self.dist {
                DistArg::Normal => Dist::Normal,
                DistArg::Uniform => Dist::Uniform,
            },
            scale: self.scale,
            dims: parse_pairs(&self.dims, "--dim", |v| v.parse::<u64>().ok())?,
            shapes: parse_pairs(&self.shapes, "--input", parse_shape)?,
            fills: parse_pairs(&self.fills, "--fill", |v| v.parse::<f64>().ok())?,
            batch_axes: parse_pairs(&self.batch_axes, "--batch-axis", parse_axis)?,
            feed: self.feed.clone(),
            max_input_elements: self.max_input_elements,
        })
    }
}

pub(super) fn pin(a: &PinArgs) -> anyhow::Result<ExitCode> {
    let report = scan::scan_file(&a.model, &a.limits.config())?;
    let pin = structure::pin_of(&report);
    let source = a
        .model
        .file_name()
        .map_or_else(|| a.model.display().to_string(), |n| n.to_string_lossy().into_owned());
    output::write(a.output.as_deref(), &[&a.model], |w| structure::write_pin(&pin, &source, w))?;
    Ok(ExitCode::SUCCESS)
}

/// Reads a hand-written or pinned text file: a regular file (a FIFO or
/// device is never opened) of at most 16 MiB.
fn read_text(path: &Path, what: &str) -> anyhow::Result<String> {
    use std::io::Read;
    const LIMIT: u64 = 16 << 20;
    let fail = || format!("{}: cannot read the {what} file", path.display());
    let meta = std::fs::metadata(path).with_context(fail)?;
    if !meta.is_file() {
        anyhow::bail!("{}: the {what} file is not a regular file", path.display());
    }
    let mut text = String::new();
    std::fs::File::open(path)
        .with_context(fail)?
        .take(LIMIT + 1)
        .read_to_string(&mut text)
        .with_context(fail)?;
    if text.len() as u64 > LIMIT {
        anyhow::bail!("{}: the {what} file is larger than 16 MiB", path.display());
    }
    Ok(text)
}

pub(super) fn verify(a: &VerifyArgs) -> anyhow::Result<ExitCode> {
    let verification = if let Some(pin_path) = &a.pin {
        let pin = structure::read_pin(&read_text(pin_path, "pin")?)
            .map_err(|e| anyhow::anyhow!("{}: {e}", pin_path.display()))?;
        let report = scan::scan_file(&a.model, &a.limits.config())?;
        structure::verify_pin(&pin, &report, &pin_path.display().to_string())
    } else {
        let path = a.expect.as_ref().context("--pin or --expect is required")?;
        let expectation = expect::read(&read_text(path, "expectation")?)
            .map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))?;
        let report = if expectation.needs_run() {
            let config = AuditConfig {
                scan: a.limits.config(),
                inputs: a.run.inputs()?,
                findings: scan::standard_findings(),
                influence: None,
            };
            let bar = progress::Bar::new(a.run.quiet);
            let outcome = audit::audit_file(&a.model, &config, &bar)?;
            bar.clear();
            if let Some(e) = outcome.run_error {
                return Err(anyhow::Error::new(e));
            }
            outcome.report
        } else {
            scan::scan_file(&a.model, &a.limits.config())?
        };
        expect::check(&expectation, &report, &path.display().to_string())
    };
    let against = a.pin.as_deref().or(a.expect.as_deref()).unwrap_or(&a.model);
    emit(a.format, a.output.as_deref(), &[&a.model, against], &verification)?;
    Ok(if verification.differences.is_empty() { ExitCode::SUCCESS } else { ExitCode::from(1) })
}

fn emit(
    format: Format,
    path: Option<&Path>,
    inputs: &[&Path],
    v: &Verification,
) -> anyhow::Result<()> {
    if matches!(format, Format::Html | Format::Markdown | Format::Dot) {
        anyhow::bail!(
            "verify writes --format table or json (html, markdown and dot are for reports)"
        );
    }
    output::write(path, inputs, |w| match format {
        Format::Table => shunt::report::verify::render(v, w),
        Format::Json => shunt::report::json::render(v, w),
        Format::Html | Format::Markdown | Format::Dot => unreachable!("refused above"),
    })
}
