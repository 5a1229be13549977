//! Command-line front end. The only place that prints or picks exit codes:
//! 0 success, 1 findings or differences (later commands), 2 errors.
#![allow(clippy::print_stdout, clippy::print_stderr)]

mod output;

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand, ValueEnum};

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
}

#[derive(Debug, clap::Args)]
struct ScanArgs {
    /// The ONNX model file.
    model: PathBuf,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    format: Format,
    /// Write the report to this file instead of standard output (written
    /// atomically; never the model itself).
    #[arg(long, short = 'o', value_name = "FILE")]
    output: Option<PathBuf>,
    #[command(flatten)]
    limits: Limits,
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
}

impl Limits {
    fn config(&self) -> ScanConfig {
        let mut c = ScanConfig::standard();
        c.load.max_file_bytes = self.max_file_bytes;
        c.build.max_nodes = self.max_nodes;
        c.classify.max_inspect_bytes = self.max_inspect_bytes;
        c
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
enum Format {
    /// A table for people.
    Table,
    /// The versioned JSON document described in the README.
    Json,
}

/// Runs the command line and turns the outcome into an exit code.
pub fn main() -> ExitCode {
    let args = match Args::try_parse() {
        Ok(a) => a,
        Err(e) => {
            let _ = e.print();
            return match e.kind() {
                clap::error::ErrorKind::DisplayHelp | clap::error::ErrorKind::DisplayVersion => ExitCode::SUCCESS,
                _ => ExitCode::from(2),
            };
        }
    };
    match run(args) {
        Ok(code) => code,
        Err(e) => {
            if is_broken_pipe(&e) {
                return ExitCode::SUCCESS;
            }
            let _ = writeln!(std::io::stderr(), "shunt: error: {e:#}");
            ExitCode::from(2)
        }
    }
}

fn run(args: Args) -> anyhow::Result<ExitCode> {
    match args.command {
        Command::Scan(a) => {
            let report = scan::scan_file(&a.model, &a.limits.config())?;
            output::write(a.output.as_deref(), &[a.model.as_path()], |out| match a.format {
                Format::Table => shunt::report::table::render_scan(&report, out),
                Format::Json => shunt::report::json::render(&report, out),
            })?;
            Ok(ExitCode::SUCCESS)
        }
    }
}

fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| c.downcast_ref::<std::io::Error>().is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe))
}
