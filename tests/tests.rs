//! All integration tests, built into one test binary.

// Running the binary, fixtures, the pinned reference Python.
mod util;
// Headless Chromium as a checker of HTML pages (console, network, DOM, screenshot).
mod browser;

// The command line: exit codes, messages, output files.
mod cli;
// Measurements against theory, planted defects, determinism, failure modes.
mod audit;
// Knockout, perturbation gain and effective depth against exact answers and theory.
mod influence;
// Detection and classification: census, published layouts, invariance.
mod detect;
// Committed fixtures are exactly what the generator writes today.
mod fixtures;
// Models exported by PyTorch's exporter: census against published layouts.
mod real_exports;
// Statistics against onnxruntime on the same inputs.
mod reference_stats;
// Issue 15: control flow, batch axes, stages, unusual branches, sums that are not blocks.
mod structure;
// Optimised, quantised and half-precision models: lowering against onnxruntime.
mod lowering;
// Broken and hostile model files: each with its expected error.
mod hostile;
// Properties: random graphs and mutated bytes never panic; census invariance.
mod properties;
// Structure pins, expectations and model-to-model comparison.
mod intent;
// Scale: models whose weights are never read.
mod scale;
// Several models in one command: folders, errors per model, exit codes.
mod batch;
// Threads: the same report for any thread count, budgets, progress.
mod threads;
// Reports for people: HTML in headless Chromium, Markdown and its size limit.
mod report;
// Half precision: float16/bfloat16 inputs, feeds, and statistics against onnxruntime.
mod half;
// Issue 14: range statistics, headroom, error along depth against numpy and onnxruntime.
mod precision;
// The commands shown in the README and docs/ give the output shown.
mod docs;
// Guards: the dependency table in DEVELOPERS.md matches the code.
mod tidy;
// Guards: the JSON documents keep their fields within a schema version.
mod schema;
// The model builders of the tests (the `shunt-testkit` crate) themselves.
mod testkit;
