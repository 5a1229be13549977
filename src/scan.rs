//! `shunt scan`: a model's structure, without running it. A composition of
//! the stages: [`open`](crate::open) then [`assemble`](crate::assemble),
//! with the standard thresholds (only structural findings can occur).

use std::path::Path;

use crate::assemble;
use crate::error::Result;
use crate::findings::FindingConfig;
use crate::open::{self, OpenConfig, Opened, Purpose};
use crate::proto::ModelProto;
use crate::report::Report;
use crate::vocab::Command;

/// Reads, decodes and analyses a model file.
pub fn scan_file(path: &Path, config: &OpenConfig) -> Result<Report> {
    let opened = open::open_file(path, config, Purpose::Analyse)?;
    Ok(report(&opened))
}

/// Analyses an in-memory model (tests, benchmarks); `label` stands for the path.
pub fn scan_model(model: ModelProto, label: &str, config: &OpenConfig) -> Result<Report> {
    let opened = open::open_model(model, label, config, Purpose::Analyse)?;
    Ok(report(&opened))
}

fn report(opened: &Opened) -> Report {
    assemble::report(Command::Scan, &opened.file, &opened.analysis, None, &FindingConfig::STANDARD)
}
