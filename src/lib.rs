//! shunt audits the residual structure of exported ONNX models.
#![deny(missing_docs)]

pub mod error;
pub mod proto;
pub mod testkit;

pub use error::{Diagnostic, Error, ErrorKind, Result, Severity};
