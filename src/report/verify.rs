//! The document of `shunt verify` (schema `shunt/verify`): a model checked
//! against a pin or an expectation file, and its rendering for people.

use std::io;

use serde::{Deserialize, Serialize};

use crate::report::text::{plural, terminal_safe};
use crate::vocab::{Against, DifferenceCode};

/// Identifies the JSON document of `shunt verify`.
pub const VERIFY_SCHEMA: &str = "shunt/verify";
/// Version of the `shunt/verify` JSON schema.
pub const VERIFY_SCHEMA_VERSION: u32 = 1;

/// The outcome of `shunt verify`: a model against a pin or an expectation.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Verification {
    /// Always [`VERIFY_SCHEMA`].
    pub schema: String,
    /// Always [`VERIFY_SCHEMA_VERSION`].
    pub schema_version: u32,
    /// The model as given.
    pub model: String,
    /// `pin` or `expect`.
    pub against: Against,
    /// The pin or expectation file as given.
    pub file: String,
    /// Blocks in the model.
    pub blocks: usize,
    /// Checks made (pinned blocks and stages, or expectation keys).
    pub checks: usize,
    /// Everything that differs; empty when the model matches.
    pub differences: Vec<Difference>,
}

/// One difference between a model and what it was checked against.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Difference {
    /// What kind of difference (listed in docs/checking.md).
    pub code: DifferenceCode,
    /// The stage it is about, if any.
    pub stage: Option<usize>,
    /// The model's block (1-based, graph order), if any.
    pub block: Option<usize>,
    /// The pinned block (1-based, file order), if any.
    pub pinned: Option<usize>,
    /// What differs, in words.
    pub message: String,
}

impl Difference {
    pub(crate) fn new(code: DifferenceCode, message: String) -> Difference {
        Difference { code, stage: None, block: None, pinned: None, message }
    }
}

/// Renders a verification for people: a verdict line, then one line per difference.
pub fn render(v: &Verification, out: &mut dyn io::Write) -> io::Result<()> {
    writeln!(out, "{} against {} {}", terminal_safe(&v.model), v.against, terminal_safe(&v.file))?;
    if v.differences.is_empty() {
        writeln!(
            out,
            "  matches: {} in the model, {} checked",
            plural(v.blocks, "block"),
            plural(v.checks, "item")
        )?;
        return Ok(());
    }
    writeln!(
        out,
        "  {} ({} in the model, {} checked)",
        plural(v.differences.len(), "difference"),
        plural(v.blocks, "block"),
        plural(v.checks, "item")
    )?;
    for d in &v.differences {
        writeln!(out, "  {:<18} {}", d.code, terminal_safe(&d.message))?;
    }
    Ok(())
}
