//! One function per command: convert the arguments, call the library, write
//! the document, pick the exit code.

use std::ffi::OsString;
use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{Context, bail};

use super::args::{
    AuditArgs, CompareArgs, CompareFormat, LowerArgs, ManyArgs, OutputArgs, PinArgs, ReportFormat,
    ScanArgs, TextFormat, VerifyArgs,
};
use super::{ERRORS, FINDINGS, SUCCESS, convert, output, progress};
use crate::audit::{self, AuditConfig};
use crate::batch;
use crate::compare::{self, CompareConfig, Tolerance};
use crate::expect;
use crate::findings::{FindingConfig, HeadroomConfig};
use crate::probe::inputs::InputConfig;
use crate::report::Report;
use crate::report::batch::BatchReport;
use crate::report::verify::Verification;
use crate::scan;
use crate::structure;
use crate::vocab::{Command, FindingCode};

/// `shunt lower`: writes the lowered model and says on standard error what
/// was rewritten.
pub(super) fn lower(args: &LowerArgs) -> anyhow::Result<u8> {
    use prost::Message;
    let config = args.limits.config();
    let loaded = crate::load::load(&args.model, &config.load)?;
    let lowered = crate::lower::lower(loaded.model, &loaded.external, &config.lower)
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
            crate::report::text::terminal_safe(&domain),
            crate::report::text::terminal_safe(&op)
        );
    }
    Ok(SUCCESS)
}

pub(super) fn scan(a: &ScanArgs, argv: &[OsString]) -> anyhow::Result<u8> {
    let fail_on = convert::fail_on(a.out.fail_on.as_deref())?;
    let config = a.limits.config();
    let job = |path: &Path| Ok((scan::scan_file(path, &config)?, None));
    if is_batch(&a.models) {
        return run_batch(Command::Scan, &a.models, &a.out, &a.many, a.quiet, &fail_on, &job);
    }
    let model = &a.models[0];
    let report = scan::scan_file(model, &config)?;
    emit(&a.out, model, &report, argv)?;
    Ok(verdict(&report, &fail_on))
}

pub(super) fn audit(a: &AuditArgs, argv: &[OsString]) -> anyhow::Result<u8> {
    let fail_on = convert::fail_on(a.out.fail_on.as_deref())?;
    let findings = a.thresholds.config();
    if a.no_run && a.influence.config()?.is_some() {
        bail!("--no-run cannot be combined with --knockout or --gain, which run the model");
    }
    if a.no_run && a.headroom.precision.is_some() {
        bail!("--no-run cannot be combined with --precision, whose headroom is measured by a run");
    }
    let config = AuditConfig {
        open: a.limits.config(),
        inputs: if a.no_run { no_inputs() } else { a.inputs.config()? },
        findings,
        influence: a.influence.config()?,
        budget: a.run.config()?,
        headroom: a.headroom.config()?,
    };
    if is_batch(&a.models) {
        // The models run at once share the budget: jobs x threads stays
        // within --threads.
        let models = batch::find_models(&a.models).len();
        let threads = config.budget.threads();
        let jobs = a.many.jobs.unwrap_or_else(|| batch::default_threads(models)).min(threads);
        let config = AuditConfig { budget: config.budget.share(jobs), ..config };
        let many = ManyArgs { jobs: Some(jobs) };
        let job = |path: &Path| audit_one(path, a.no_run, &config, &crate::probe::Silent);
        return run_batch(Command::Audit, &a.models, &a.out, &many, a.quiet, &fail_on, &job);
    }
    let model = &a.models[0];
    let bar = progress::Bar::new(a.quiet);
    let (report, run_error) = audit_one(model, a.no_run, &config, &bar)?;
    bar.clear();
    emit(&a.out, model, &report, argv)?;
    if let Some(e) = run_error {
        return Err(anyhow::Error::new(e));
    }
    Ok(verdict(&report, &fail_on))
}

/// The audit of one model: the structural audit only with `no_run`.
fn audit_one(
    model: &Path,
    no_run: bool,
    config: &AuditConfig,
    progress: &dyn crate::probe::Progress,
) -> crate::Result<(Report, Option<crate::Error>)> {
    if no_run {
        return Ok((audit::audit_structure(model, config)?, None));
    }
    let outcome = audit::audit_file(model, config, progress)?;
    Ok((outcome.report, outcome.run_error))
}

/// Inputs of an audit that does not run (never read).
fn no_inputs() -> InputConfig {
    InputConfig { max_input_elements: 0, ..InputConfig::standard(0) }
}

pub(super) fn pin(a: &PinArgs) -> anyhow::Result<u8> {
    let report = scan::scan_file(&a.model, &a.limits.config())?;
    let pin = structure::pin_of(&report);
    let source = a
        .model
        .file_name()
        .map_or_else(|| a.model.display().to_string(), |n| n.to_string_lossy().into_owned());
    output::write(a.output.as_deref(), &[&a.model], |w| structure::write_pin(&pin, &source, w))?;
    Ok(SUCCESS)
}

/// Reads a hand-written or pinned text file: a regular file (a FIFO or
/// device is never opened) of at most 16 MiB.
fn read_text(path: &Path, what: &str) -> anyhow::Result<String> {
    use std::io::Read;
    const LIMIT: u64 = 16 << 20;
    let fail = || format!("{}: cannot read the {what} file", path.display());
    let meta = std::fs::metadata(path).with_context(fail)?;
    if !meta.is_file() {
        bail!("{}: the {what} file is not a regular file", path.display());
    }
    let mut text = String::new();
    std::fs::File::open(path)
        .with_context(fail)?
        .take(LIMIT + 1)
        .read_to_string(&mut text)
        .with_context(fail)?;
    if text.len() as u64 > LIMIT {
        bail!("{}: the {what} file is larger than 16 MiB", path.display());
    }
    Ok(text)
}

pub(super) fn verify(a: &VerifyArgs) -> anyhow::Result<u8> {
    let verification = if let Some(pin_path) = &a.pin {
        let pin = structure::read_pin(&read_text(pin_path, "pin")?).map_err(|e| e.at(pin_path))?;
        let report = scan::scan_file(&a.model, &a.limits.config())?;
        structure::verify_pin(&pin, &report, &pin_path.display().to_string())
    } else {
        let path = a.expect.as_ref().context("--pin or --expect is required")?;
        let expectation = expect::read(&read_text(path, "expectation")?).map_err(|e| e.at(path))?;
        let report = if expectation.needs_run() {
            let config = AuditConfig {
                open: a.limits.config(),
                inputs: a.inputs.config()?,
                findings: FindingConfig::STANDARD,
                influence: None,
                budget: a.run.config()?,
                headroom: HeadroomConfig::STANDARD,
            };
            let bar = progress::Bar::new(a.quiet);
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
    emit_verification(a.format, a.output.as_deref(), &[&a.model, against], &verification)?;
    Ok(if verification.differences.is_empty() { SUCCESS } else { FINDINGS })
}

fn emit_verification(
    format: TextFormat,
    path: Option<&Path>,
    inputs: &[&Path],
    v: &Verification,
) -> anyhow::Result<()> {
    output::write(path, inputs, |w| match format {
        TextFormat::Table => crate::report::verify::render(v, w),
        TextFormat::Json => crate::report::json::render(v, w),
    })
}

pub(super) fn compare(a: &CompareArgs) -> anyhow::Result<u8> {
    let config = CompareConfig {
        audit: AuditConfig {
            open: a.limits.config(),
            inputs: a.inputs.config()?,
            findings: FindingConfig::STANDARD,
            influence: None,
            budget: a.run.config()?,
            headroom: HeadroomConfig::STANDARD,
        },
        run: !a.no_run,
        error_above: a.error_above,
    };
    let bar = progress::Bar::new(a.quiet);
    let result = compare::compare_files(&a.a, &a.b, &config, &bar);
    bar.clear();
    let mut c = result?;
    let tolerance = Tolerance { max_rel_l2: a.max_rel_l2, max_ratio_change: a.max_ratio_change };
    c.failures = compare::failures(&c, &tolerance);
    output::write(a.output.as_deref(), &[&a.a, &a.b], |w| match a.format {
        CompareFormat::Table => crate::report::compare::render(&c, w),
        CompareFormat::Json => crate::report::json::render(&c, w),
        CompareFormat::Html => crate::report::compare::render_html(&c, w),
        CompareFormat::Markdown => crate::report::compare::render_markdown(
            &c,
            crate::report::markdown::DEFAULT_MAX_BYTES,
            w,
        ),
    })?;
    Ok(if c.failures.is_empty() { SUCCESS } else { FINDINGS })
}

/// Several paths or a folder make a batch; one file gets its own report.
fn is_batch(paths: &[PathBuf]) -> bool {
    !matches!(paths, [one] if !one.is_dir())
}

/// Runs `job` over every model found, writes one batch report, prints each
/// error on standard error, and exits 2 if any model failed, else 1 if any
/// report has a finding named by `--fail-on`, else 0.
fn run_batch(
    command: Command,
    paths: &[PathBuf],
    out: &OutputArgs,
    args: &ManyArgs,
    quiet: bool,
    fail_on: &[FindingCode],
    job: &(dyn Fn(&Path) -> batch::Outcome + Sync),
) -> anyhow::Result<u8> {
    if matches!(out.format, ReportFormat::Html | ReportFormat::Markdown | ReportFormat::Dot) {
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
    crate::probe::Progress::step(&bar, "models", found.len() as u64);
    let entries = batch::for_each(&found, threads, job, &|_| crate::probe::Progress::advance(&bar));
    bar.clear();
    let report = BatchReport::new(command, entries);
    let inputs: Vec<&Path> = found.iter().map(batch::Found::path).collect();
    output::write(out.output.as_deref(), &inputs, |w| match out.format {
        ReportFormat::Table => crate::report::batch::render_table(&report, w),
        ReportFormat::Json => crate::report::json::render(&report, w),
        ReportFormat::Html | ReportFormat::Markdown | ReportFormat::Dot => {
            unreachable!("refused above")
        }
    })?;
    for e in report.models.iter().filter_map(|m| m.error.as_deref()) {
        let _ =
            writeln!(std::io::stderr(), "shunt: error: {}", crate::report::text::terminal_safe(e));
    }
    if report.summary.errors > 0 {
        return Ok(ERRORS);
    }
    let hit = report
        .models
        .iter()
        .filter_map(|m| m.report.as_ref())
        .any(|r| verdict(r, fail_on) != SUCCESS);
    Ok(if hit { FINDINGS } else { SUCCESS })
}

/// Writes one model's report in the format asked for; `argv` is the
/// command line the HTML page records.
fn emit(out: &OutputArgs, model: &Path, report: &Report, argv: &[OsString]) -> anyhow::Result<()> {
    output::write(out.output.as_deref(), &[model], |w| match out.format {
        ReportFormat::Table => crate::report::table::render(report, w),
        ReportFormat::Json => crate::report::json::render(report, w),
        ReportFormat::Html => {
            let ctx = crate::report::html::HtmlContext {
                argv: argv.iter().map(|a| a.to_string_lossy().into_owned()).collect(),
            };
            crate::report::html::render(report, &ctx, w)
        }
        ReportFormat::Markdown => {
            let config = crate::report::markdown::MarkdownConfig {
                max_bytes: crate::report::markdown::DEFAULT_MAX_BYTES,
            };
            crate::report::markdown::render(report, &config, w)
        }
        ReportFormat::Dot => crate::report::dot::render(report, w),
    })
}

fn verdict(report: &Report, fail_on: &[FindingCode]) -> u8 {
    let hit = report.findings.iter().any(|f| fail_on.contains(&f.code));
    if hit { FINDINGS } else { SUCCESS }
}
