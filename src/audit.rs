//! `shunt audit`: a model's structure, then a run on the CPU that measures
//! every block, then findings. A composition of the stages, each run once:
//! [`open`](crate::open), [`Opened::plan`], [`measure`](crate::measure),
//! [`assemble`](crate::assemble).

use std::path::Path;

use crate::assemble::{self, RunFacts};
use crate::error::{Error, Result};
use crate::findings::{FindingConfig, HeadroomConfig};
use crate::measure::{self, InfluenceConfig, Measurement};
use crate::open::{self, OpenConfig, Opened, Purpose};
use crate::parallel::Budget;
use crate::probe::Progress;
use crate::probe::inputs::{InputConfig, InputPlan};
use crate::probe::paired::PairErrors;
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
    /// The target format of the headroom section (`--precision`) and its thresholds.
    pub headroom: HeadroomConfig,
}

impl AuditConfig {
    /// The documented defaults: the standard limits, inputs and thresholds,
    /// no knockout or gain, no target format named.
    pub const STANDARD: AuditConfig = AuditConfig {
        open: OpenConfig::STANDARD,
        inputs: InputConfig::STANDARD,
        findings: FindingConfig::STANDARD,
        influence: None,
        budget: Budget::STANDARD,
        headroom: HeadroomConfig::STANDARD,
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
    let run =
        RunFacts { input_plan, measurement: &measurement, influence, headroom: &config.headroom };
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

/// Two audits run pass by pass on the same inputs, and the differences of
/// their aligned blocks (`compare`).
#[derive(Debug)]
pub struct PairedAudit {
    /// Model A's audit.
    pub a: Audit,
    /// Model B's audit.
    pub b: Audit,
    /// The aligned pairs `(block of A, block of B)`, 0-based, and each one's
    /// differences; empty when the models were run each on its own.
    pub errors: Vec<((usize, usize), PairErrors)>,
    /// Why the differences were not measured, when they were not.
    pub not_paired: Option<String>,
}

/// Pairs the blocks of two structural reports: `(block of A, block of B)`, 0-based.
pub(crate) type Aligner<'a> = dyn Fn(&Report, &Report) -> Vec<(usize, usize)> + 'a;

/// Measures two opened models and assembles both reports. When their plans
/// split the samples into the same passes, they run pass by pass and the
/// aligned blocks (`align` pairs them from each model's structure, before
/// the run) are compared tensor by tensor; otherwise, or when the paired run
/// fails, each runs on its own and `not_paired` says why.
pub(crate) fn measured_pair(
    mut a: Opened,
    plan_a: &InputPlan,
    mut b: Opened,
    plan_b: &InputPlan,
    config: &AuditConfig,
    align: &Aligner<'_>,
    progress: &dyn Progress,
) -> Result<PairedAudit> {
    let same_passes = plan_a.passes == plan_b.passes && plan_a.pass_batch == plan_b.pass_batch;
    if !same_passes {
        let why = format!(
            "A runs {} pass(es) of {} and B {} of {}: the blocks' tensors are compared only \
             when both models run the same passes (try --pass-batch)",
            plan_a.passes, plan_a.pass_batch, plan_b.passes, plan_b.pass_batch
        );
        let ra = measured(a, plan_a, config, progress)?;
        let rb = measured(b, plan_b, config, progress)?;
        return Ok(PairedAudit { a: ra, b: rb, errors: Vec::new(), not_paired: Some(why) });
    }
    // The structure of each model, to pair blocks before the run.
    let sa = assemble::report(Command::Audit, &a.file, &a.analysis, None, &config.findings);
    let sb = assemble::report(Command::Audit, &b.file, &b.analysis, None, &config.findings);
    let pairs = align(&sa, &sb);
    drop((sa, sb));
    let runnable_a = a.take_runnable().expect("a model opened for a run");
    let runnable_b = b.take_runnable().expect("a model opened for a run");
    let paired = measure::measure_pair(
        &runnable_a,
        &a.analysis,
        plan_a,
        &runnable_b,
        &b.analysis,
        plan_b,
        &pairs,
        progress,
    );
    let (ma, mb, errors, not_paired) = match paired {
        Ok(p) => (p.a, p.b, pairs.into_iter().zip(p.errors).collect(), None),
        Err(e) => {
            let why = format!("the paired run failed ({}); each model ran on its own", e.message());
            let ma =
                measure::measure(runnable_a, &a.analysis, plan_a, None, &config.budget, progress)?;
            let mb =
                measure::measure(runnable_b, &b.analysis, plan_b, None, &config.budget, progress)?;
            (ma, mb, Vec::new(), Some(why))
        }
    };
    let finish = |o: &Opened, plan: &InputPlan, m: Measurement| {
        let run = RunFacts {
            input_plan: plan,
            measurement: &m,
            influence: None,
            headroom: &config.headroom,
        };
        let report =
            assemble::report(Command::Audit, &o.file, &o.analysis, Some(run), &config.findings);
        let (run_error, outputs) = match m.outcome {
            Ok(m) => (None, m.intact.outputs),
            Err(e) => (Some(e), Vec::new()),
        };
        Audit { report, run_error, outputs }
    };
    Ok(PairedAudit { a: finish(&a, plan_a, ma), b: finish(&b, plan_b, mb), errors, not_paired })
}
