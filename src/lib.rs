//! shunt audits the residual structure of exported ONNX models.
//!
//! The pipeline runs one way, in stages that each run once per model:
//! [`open`] decodes ([`load`]), lowers ([`lower`]) and analyses the model
//! ([`graph`], [`residual`] finds the blocks, [`classify`] says what kind
//! each is) and plans its inputs; [`measure`] runs it and measures every
//! block; [`assemble`] builds the [`report::Report`] and its findings; and
//! [`report`] renders it. [`scan`] and [`audit`] compose the stages;
//! [`cli::run`] is the whole command line as a function (what the `shunt`
//! binary calls).
//!
//! ```no_run
//! use std::path::Path;
//! let config = shunt::open::OpenConfig::standard();
//! let report = shunt::scan::scan_file(Path::new("model.onnx"), &config)?;
//! println!("{} residual blocks", report.blocks.len());
//! # Ok::<(), shunt::Error>(())
//! ```
#![deny(missing_docs)]
#![warn(unreachable_pub)]

pub mod assemble;
pub mod audit;
pub mod batch;
pub mod classify;
pub mod cli;
pub mod compare;
pub mod control;
pub mod error;
pub mod expect;
pub mod findings;
pub mod gate;
pub mod graph;
pub mod load;
pub mod lower;
pub mod measure;
pub mod open;
pub mod parallel;
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
