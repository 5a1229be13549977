//! `shunt compare A B`: align the blocks of two models, run both on the same
//! inputs, report structural differences, ratio changes and output agreement.

use std::path::PathBuf;
use std::process::ExitCode;

use shunt::audit::AuditConfig;
use shunt::compare::{self, CompareConfig, Tolerance};
use shunt::scan;

use super::pin::RunArgs;
use super::{Format, Limits, output, progress};

#[derive(Debug, clap::Args)]
pub(super) struct CompareArgs {
    /// The reference model (A).
    a: PathBuf,
    /// The model compared with it (B).
    b: PathBuf,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    format: Format,
    /// Write the comparison to this file instead of standard output.
    #[arg(long, short = 'o', value_name = "FILE")]
    output: Option<PathBuf>,
    /// Exit 1 when any output's relative L2 difference is above this.
    #[arg(long, value_name = "X")]
    max_rel_l2: Option<f64>,
    /// Exit 1 when any aligned block's ratio changes by more than this fraction (0.1 = 10%).
    #[arg(long, value_name = "F")]
    max_ratio_change: Option<f64>,
    /// Do not run the models: compare structure only.
    #[arg(long)]
    no_run: bool,
    #[command(flatten)]
    run: RunArgs,
    #[command(flatten)]
    limits: Limits,
}

pub(super) fn compare(a: &CompareArgs) -> anyhow::Result<ExitCode> {
    if matches!(a.format, Format::Html | Format::Markdown | Format::Dot) {
        anyhow::bail!(
            "compare writes --format table or json (html, markdown and dot are for audit and scan reports)"
        );
    }
    let config = CompareConfig {
        audit: AuditConfig {
            scan: a.limits.config(),
            inputs: a.run.inputs()?,
            findings: scan::standard_findings(),
            influence: None,
        },
        run: !a.no_run,
    };
    let bar = progress::Bar::new(a.run.quiet);
    let result = compare::compare_files(&a.a, &a.b, &config, &bar);
    bar.clear();
    let mut c = result?;
    let tolerance = Tolerance { max_rel_l2: a.max_rel_l2, max_ratio_change: a.max_ratio_change };
    c.failures = compare::failures(&c, &tolerance);
    output::write(a.output.as_deref(), &[&a.a, &a.b], |w| match a.format {
        Format::Table => shunt::report::compare::render(&c, w),
        Format::Json => shunt::report::json::render(&c, w),
        Format::Html | Format::Markdown | Format::Dot => unreachable!("refused above"),
    })?;
    Ok(if c.failures.is_empty() { ExitCode::SUCCESS } else { ExitCode::from(1) })
}
