//! All integration tests, built into one test binary.

// Running the binary, fixtures, the pinned reference Python.
mod util;

// The command line: exit codes, messages, output files.
mod cli;
// Committed fixtures are exactly what the generator writes today.
mod fixtures;
// Models exported by PyTorch's exporter: census against published layouts.
mod real_exports;
