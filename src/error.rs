//! Errors that stop an analysis, and diagnostics that do not.
//!
//! An [`Error`] means the input could not be analysed at all (unreadable file,
//! not ONNX, a cycle, an escaping external-data path). A [`Diagnostic`] is a
//! problem the analysis could work around; it ends up in the report.

use std::fmt;
use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::vocab::Severity;

/// What went wrong, coarsely; the message says the rest.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum ErrorKind {
    /// The file could not be opened or read.
    Io,
    /// The bytes are not a protobuf-encoded ONNX model.
    Decode,
    /// The model decodes but breaks a rule of the ONNX IR (cycle, missing
    /// graph, a tensor produced twice, a bad tensor payload).
    Invalid,
    /// External data that is missing, out of bounds or outside the model's folder.
    ExternalData,
    /// A declared size is larger than a configured limit.
    Limit,
    /// The model is valid but running it failed.
    Probe,
    /// The request itself does not make sense for this model (a missing
    /// dimension value, a bad input file).
    Usage,
}

/// An error that stops the analysis of one model file.
#[derive(Debug)]
pub struct Error {
    kind: ErrorKind,
    path: Option<PathBuf>,
    message: String,
}

/// Result with this crate's [`Error`].
pub type Result<T, E = Error> = std::result::Result<T, E>;

impl Error {
    /// A new error of `kind` with a message (no trailing period).
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> Error {
        Error { kind, path: None, message: message.into() }
    }

    /// Attaches the file the error is about, unless one is attached already.
    pub fn at(mut self, path: &Path) -> Error {
        if self.path.is_none() {
            self.path = Some(path.to_path_buf());
        }
        self
    }

    /// The kind of the error.
    pub fn kind(&self) -> ErrorKind {
        self.kind
    }

    /// The file the error is about, if known.
    pub fn path(&self) -> Option<&Path> {
        self.path.as_deref()
    }

    /// The message without the file name.
    pub fn message(&self) -> &str {
        &self.message
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.path {
            Some(path) => write!(f, "{}: {}", path.display(), self.message),
            None => f.write_str(&self.message),
        }
    }
}

impl std::error::Error for Error {}

/// Shorthand for an [`ErrorKind::Invalid`] error.
pub(crate) fn invalid(message: impl Into<String>) -> Error {
    Error::new(ErrorKind::Invalid, message)
}

/// A problem the analysis worked around.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Diagnostic {
    /// How serious it is.
    pub severity: Severity,
    /// The ONNX node it is about, if any (its name, or a synthesized one).
    pub node: Option<String>,
    /// What happened, in one sentence without a trailing period.
    pub message: String,
}

impl Diagnostic {
    /// A warning about `node`.
    pub fn warning(node: Option<&str>, message: impl Into<String>) -> Diagnostic {
        Diagnostic {
            severity: Severity::Warning,
            node: node.map(str::to_owned),
            message: message.into(),
        }
    }

    /// A note about `node`.
    pub fn note(node: Option<&str>, message: impl Into<String>) -> Diagnostic {
        Diagnostic {
            severity: Severity::Note,
            node: node.map(str::to_owned),
            message: message.into(),
        }
    }
}
