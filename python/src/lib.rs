//! `shunt._native`: the one entry the Python package needs. Every function of
//! the package is a command line run in-process by [`shunt::cli`], so the
//! Python functions and the command give the same documents and the same
//! errors (see `python/shunt/__init__.py` and DEVELOPERS.md, "The Python
//! package").

use pyo3::prelude::*;

/// Runs the `shunt` program on `argv` (program name first) as the binary
/// does, printing errors on standard error, and returns its exit code.
#[pyfunction]
fn main(py: Python<'_>, argv: Vec<String>) -> u8 {
    py.detach(|| shunt::cli::run(argv.into_iter().map(Into::into)))
}

/// Runs one command line without printing errors. Returns `(code, error,
/// internal)`: the exit code, the one-line error of a code-2 outcome, and
/// whether that error is a caught panic.
#[pyfunction]
fn run(py: Python<'_>, argv: Vec<String>) -> (u8, Option<String>, bool) {
    let outcome = py.detach(|| shunt::cli::run_quietly(argv.into_iter().map(Into::into)));
    (outcome.code, outcome.error, outcome.internal)
}

/// The version of the shunt library this module was built from.
#[pyfunction]
fn version() -> &'static str {
    env!("CARGO_PKG_VERSION")
}

#[pymodule]
fn _native(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_function(wrap_pyfunction!(main, m)?)?;
    m.add_function(wrap_pyfunction!(run, m)?)?;
    m.add_function(wrap_pyfunction!(version, m)?)?;
    Ok(())
}
