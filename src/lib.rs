//! shunt audits the residual structure of exported ONNX models.
//!
//! The pipeline runs one way: [`load`] decodes the file, [`graph`] builds
//! the dataflow graph, [`residual`] finds the blocks, [`classify`] says what
//! kind each is, [`scan`] puts it together into a [`report::Report`], and
//! [`report`] renders it. [`cli::run`] is the whole command line as a
//! function (what the `shunt` binary calls).
//!
//! ```no_run
//! use std::path::Path;
//! let config = shunt::scan::ScanConfig::standard();
//! let report = shunt::scan::scan_file(Path::new("model.onnx"), &config)?;
//! println!("{} residual blocks", report.blocks.len());
//! # Ok::<(), shunt::Error>(())
//! ```
#![deny(missing_docs)]

pub mod audit;
pub mod batch;
pub mod classify;
pub mod cli;
pub mod compare;
pub mod error;
pub mod expect;
pub mod findings;
pub mod gate;
pub mod graph;
pub mod load;
pub mod lower;
pub mod probe;
pub mod proto;
pub mod report;
pub mod residual;
pub mod scan;
pub mod stats;
pub mod structure;
pub mod vocab;

pub use error::{Diagnostic, Error, ErrorKind, Result};
pub use vocab::Severity;
