//! The command line, as a library entry: [`run`] takes the arguments and
//! returns the exit code, so the `shunt` binary and other front ends (a
//! Python binding) are the same program. The only place that prints or
//! picks exit codes: 0 success, 1 a finding named by `--fail-on` occurred
//! (or a difference, for `verify` and `compare`), 2 errors.
//!
//! `args` declares the flags (every default read from the library's
//! `STANDARD` configurations), `convert` turns them into configurations,
//! `commands` runs one command each; `output` writes files atomically and
//! `progress` draws the bar.
#![allow(clippy::print_stdout, clippy::print_stderr)]

mod args;
mod commands;
mod convert;
mod output;
mod progress;

use std::ffi::OsString;
use std::io::Write;

use clap::Parser;

use args::{Args, Command};

/// The exit code of a command that succeeded.
const SUCCESS: u8 = 0;
/// The exit code of a finding named by `--fail-on`, or of a difference.
const FINDINGS: u8 = 1;
/// The exit code of an error.
const ERRORS: u8 = 2;

/// Runs the command line `args` (the program name first, as in
/// `std::env::args_os()`) and returns its exit code: 0 success, 1 a finding
/// named by `--fail-on` or a difference, 2 an error (the message is on
/// standard error). A panic inside is caught and reported as one line.
pub fn run(args: impl IntoIterator<Item = OsString>) -> u8 {
    let outcome = execute(args, true);
    if let Some(message) = &outcome.error {
        let _ = if outcome.internal {
            writeln!(std::io::stderr(), "shunt: internal error: {message} (please report this)")
        } else {
            writeln!(std::io::stderr(), "shunt: error: {message}")
        };
    }
    outcome.code
}

/// What a command line came to, for front ends that report errors their own
/// way (the Python package raises them).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Outcome {
    /// The exit code, as [`run`] returns it.
    pub code: u8,
    /// For exit code 2, the one-line message [`run`] prints after
    /// `shunt: error: ` (a usage error: the first line of clap's message).
    pub error: Option<String>,
    /// The error is a caught panic: a bug, not bad input.
    pub internal: bool,
}

/// Runs the command line as [`run`] does, but returns the error instead of
/// printing it. Reports still go where the arguments say (`--output FILE`,
/// else standard output); `--help` and `--version` still print.
pub fn run_quietly(args: impl IntoIterator<Item = OsString>) -> Outcome {
    execute(args, false)
}

fn execute(args: impl IntoIterator<Item = OsString>, print_usage_errors: bool) -> Outcome {
    let done = |code| Outcome { code, error: None, internal: false };
    let argv: Vec<OsString> = args.into_iter().collect();
    let parsed = match Args::try_parse_from(&argv) {
        Ok(a) => a,
        Err(e) => {
            let shown = matches!(
                e.kind(),
                clap::error::ErrorKind::DisplayHelp | clap::error::ErrorKind::DisplayVersion
            );
            if shown || print_usage_errors {
                let _ = e.print();
            }
            if shown {
                return done(SUCCESS);
            }
            // Printed in full above for the program; one line for the others.
            let rendered = e.render().to_string();
            let first = rendered.lines().next().unwrap_or_default();
            let first = first.strip_prefix("error: ").unwrap_or(first);
            return Outcome {
                code: ERRORS,
                error: (!print_usage_errors).then(|| first.to_owned()),
                internal: false,
            };
        }
    };
    // A panic anywhere (the inference engine is known to panic on some
    // inputs) is caught and reported as one line, never as a backtrace; the
    // caller's panic hook is put back afterwards.
    let hook = std::panic::take_hook();
    std::panic::set_hook(Box::new(|_| {}));
    let outcome = std::panic::catch_unwind(|| dispatch(parsed, &argv));
    std::panic::set_hook(hook);
    match outcome {
        Ok(Ok(code)) => done(code),
        Ok(Err(e)) => {
            if is_broken_pipe(&e) {
                return done(SUCCESS);
            }
            // Names in the message come from the file: escaped, so a name
            // with a newline or an escape sequence keeps the error one line.
            let message = crate::report::text::terminal_safe(&format!("{e:#}"));
            Outcome { code: ERRORS, error: Some(message), internal: false }
        }
        Err(panic) => {
            let what = panic
                .downcast_ref::<String>()
                .map(String::as_str)
                .or_else(|| panic.downcast_ref::<&str>().copied())
                .unwrap_or("unknown cause");
            let what = crate::report::text::terminal_safe(what);
            Outcome { code: ERRORS, error: Some(what), internal: true }
        }
    }
}

fn dispatch(args: Args, argv: &[OsString]) -> anyhow::Result<u8> {
    match args.command {
        Command::Scan(a) => commands::scan(&a, argv),
        Command::Audit(a) => commands::audit(&a, argv),
        Command::Pin(a) => commands::pin(&a),
        Command::Verify(a) => commands::verify(&a),
        Command::Compare(a) => commands::compare(&a),
        Command::Lower(a) => commands::lower(&a),
    }
}

fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}
