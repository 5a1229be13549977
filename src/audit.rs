//! `shunt audit`: a model's structure, then a run on the CPU that measures
//! every block, then findings. A composition of the stages, each run once:
//! [`open`](crate::open), [`Opened::plan`], [`measure`](crate::measure),
//! [`assemble`](crate::assemble).

use std::path::Path;

use crate::assemble::{self, RunFacts};
use crate::error::{Error, Result};
use crate::findings::FindingConfig;
use crate::measure::{self, InfluenceConfig};
use crate::open::{self, OpenConfig, Opened, Purpose};
use crate::parallel::Budget;
use crate::probe::Progress;
use crate::probe::inputs::InputConfig;
use crate::proto::ModelProto;
use crate::report::Report;
use crate::vocab::Command;

/// Everything an audit needs to know.
#[derive(Debug, Clone)]
pub struct AuditConfig {
    /// Limits for opening the model.
    pub open: OpenConfig,
    /// What to feed.
    pub inputs: InputConfig,
    /// Thresholds of findings.
    pub findings: FindingConfig,
    /// Knockout and perturbation gain, when asked for.
    pub influence: Option<InfluenceConfig>,
    /// Threads and memory the run may use (results do not depend on them).
    pub budget: Budget,
}

impl AuditConfig {
    /// The documented defaults: the standard limits, inputs and thresholds,
    /// no knockout or gain.
    pub const STANDARD: AuditConfig = AuditConfig {
        open: OpenConfig::STANDARD,
        inputs: InputConfig::STANDARD,
        findings: FindingConfig::STANDARD,
        influence: None,
        budget: Budget::STANDARD,
    };

    /// [`AuditConfig::STANDARD`].
    pub fn standard() -> AuditConfig {
        AuditConfig::STANDARD
    }

    fn purpose(&self) -> Purpose {
        if self.influence.is_some() { Purpose::GatedRun } else { Purpose::Run }
    }
}

/// The outcome of an audit.
#[derive(Debug)]
pub struct Audit {
    /// The report; `run_error` is set when running failed.
    pub report: Report,
    /// Why running the model failed, if it did.
    pub run_error: Option<Error>,
    /// The model's float outputs, flattened per output over all passes.
    pub outputs: Vec<Vec<f32>>,
}

/// Audits a model file: open, plan, measure, assemble.
pub fn audit_file(path: &Path, config: &AuditConfig, progress: &dyn Progress) -> Result<Audit> {
    let opened = open::open_file(path, &config.open, config.purpose())?;
    let input_plan = opened.plan(&config.inputs).map_err(|e| e.at(path))?;
    measured(opened, &input_plan, config, progress).map_err(|e| e.at(path))
}

/// Audits an in-memory model (tests, benchmarks); `label` stands for the path.
pub fn audit_model(
    model: ModelProto,
    label: &str,
    config: &AuditConfig,
    progress: &dyn Progress,
) -> Result<Audit> {
    let opened = open::open_model(model, label, &config.open, config.purpose())?;
    let input_plan = opened.plan(&config.inputs)?;
    measured(opened, &input_plan, config, progress)
}

/// `audit --no-run`: the structure and its findings judged by the audit's
/// thresholds, without running the model (open, assemble).
pub fn audit_structure(path: &Path, config: &AuditConfig) -> Result<Report> {
    let opened = open::open_file(path, &config.open, Purpose::Analyse)?;
    Ok(assemble::report(Command::Audit, &opened.file, &opened.analysis, None, &config.findings))
}

/// Measures an opened model on its plan and assembles the report: the last
/// two stages of an audit (`compare` plans both models before either runs).
pub(crate) fn measured(
    mut opened: Opened,
    input_plan: &crate::probe::inputs::InputPlan,
    config: &AuditConfig,
    progress: &dyn Progress,
) -> Result<Audit> {
    let runnable = opened.take_runnable().expect("a model opened for a run");
    let influence = config.influence.as_ref();
    let measurement = measure::measure(
        runnable,
        &opened.analysis,
        input_plan,
        influence,
        &config.budget,
        progress,
    )?;
    let run = RunFacts { input_plan, measurement: &measurement, influence };
    let report = assemble::report(
        Command::Audit,
        &opened.file,
        &opened.analysis,
        Some(run),
        &config.findings,
    );
    let (run_error, outputs) = match measurement.outcome {
        Ok(m) => (None, m.intact.outputs),
        Err(e) => (Some(e), Vec::new()),
    };
    Ok(Audit { report, run_error, outputs })
}
