//! The audit: the structural scan, then a run of the model on the CPU that
//! measures every block, then findings. Maps probe results onto the report
//! by hand.

use std::path::Path;

use prost::Message;

use crate::classify::Placement;
use crate::error::{Error, Result};
use crate::findings::FindingConfig;
use crate::graph::op;
use crate::load::{self, ExternalData, tensor};
use crate::probe::inputs::{self, Feeding, InputConfig};
use crate::probe::{self, BlockSamples, ModelSource, Progress, Watch};
use crate::proto::ModelProto;
use crate::report::{FedRow, FeedRow, Report, RunRow, StatsRow, ThresholdsRow};
use crate::scan::{self, Analysis, ScanConfig};
use crate::stats::Spread;

/// Everything an audit needs to know.
#[derive(Debug, Clone)]
pub struct AuditConfig {
    /// The structural scan.
    pub scan: ScanConfig,
    /// What to feed.
    pub inputs: InputConfig,
    /// Thresholds of findings.
    pub findings: FindingConfig,
}

impl AuditConfig {
    /// The documented defaults: the standard scan, 8 samples of standard
    /// normal inputs with seed 0, and the standard thresholds.
    pub fn standard() -> AuditConfig {
        AuditConfig {
            scan: ScanConfig::standard(),
            inputs: InputConfig {
                samples: 8,
                max_pass: None,
                seed: 0,
                dist: inputs::Dist::Normal,
                scale: 1.0,
                dims: Default::default(),
                shapes: Default::default(),
                fills: Default::default(),
                feed: None,
            },
            findings: scan::standard_findings(),
        }
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

/// The version string of the inference engine.
pub const ENGINE: &str = "tract-onnx 0.23.9";

/// Audits a model file.
pub fn audit_file(path: &Path, config: &AuditConfig, progress: &dyn Progress) -> Result<Audit> {
    let loaded = load::load(path, &config.scan.load)?;
    let info = scan::model_info(
        &path.display().to_string(),
        loaded.file_bytes,
        &loaded.model,
        &loaded.external,
    );
    let analysis =
        scan::analyse(loaded.model, loaded.external, &config.scan).map_err(|e| e.at(path))?;
    run(info, analysis, ModelSource::Path(path), config, progress).map_err(|e| e.at(path))
}

/// Audits an in-memory model (tests, benchmarks); `label` stands for the path.
pub fn audit_model(
    model: ModelProto,
    label: &str,
    config: &AuditConfig,
    progress: &dyn Progress,
) -> Result<Audit> {
    let bytes = model.encode_to_vec();
    let external = ExternalData::none();
    let info = scan::model_info(label, bytes.len() as u64, &model, &external);
    let analysis = scan::analyse(model, external, &config.scan)?;
    run(info, analysis, ModelSource::Bytes(&bytes), config, progress)
}

fn run(
    info: crate::report::ModelInfo,
    analysis: Analysis,
    source: ModelSource<'_>,
    config: &AuditConfig,
    progress: &dyn Progress,
) -> Result<Audit> {
    let mut report = scan::report_of(info, &analysis);
    report.command = "audit".to_owned();
    let specs = inputs::input_specs(&analysis.graph);
    let feeding = inputs::plan(&specs, &config.inputs)?;
    report.run = Some(run_row(&feeding, &config.findings));
    let watches = watches(&analysis);
    // The analysis holds the decoded weights: free them before tract loads its own copy.
    drop(analysis);
    let mut facts = scan::block_facts(&report);
    let (run_error, outputs) = match probe::run(source, &watches, &feeding, progress) {
        Ok(result) => {
            for (i, samples) in result.blocks.iter().enumerate() {
                let row = stats_row(samples, config.findings.dead_below);
                facts[i].ratio = row.ratio.map(|s| s.mean);
                facts[i].dead_channel_fraction = row.dead_channel_fraction;
                facts[i].channels = row.channels;
                facts[i].non_finite = row.nan + row.inf;
                facts[i].output_rms = row.output_rms.map(|s| s.mean);
                report.blocks[i].stats = Some(row);
            }
            (None, result.outputs)
        }
        Err(e) => {
            report.run_error = Some(e.message().to_owned());
            (Some(e), Vec::new())
        }
    };
    scan::set_findings(&mut report, &facts, &config.findings);
    Ok(Audit { report, run_error, outputs })
}

/// What to measure for each block.
pub fn watches(a: &Analysis) -> Vec<Watch> {
    let g = &a.graph;
    a.detection
        .blocks
        .iter()
        .zip(&a.kinds)
        .map(|(b, k)| Watch {
            fork: g.value(b.fork).name.clone(),
            shortcut: g.value(b.shortcut.input).name.clone(),
            branch: b.branch_inputs.iter().map(|&v| g.value(v).name.clone()).collect(),
            output: g.value(b.output).name.clone(),
            channels_first: b
                .branch
                .iter()
                .any(|&n| op::is_parametrised(g, n) && g.node(n).op.contains("Conv")),
            relu_after: k.placement == Placement::PostActivation
                && k.placement_node.is_some_and(|n| g.node(n).op == "Relu"),
        })
        .collect()
}

fn run_row(feeding: &Feeding, f: &FindingConfig) -> RunRow {
    RunRow {
        engine: ENGINE.to_owned(),
        samples: feeding.samples,
        pass_batch: feeding.pass_batch,
        passes: feeding.passes,
        seed: feeding.seed,
        inputs: feeding
            .inputs
            .iter()
            .map(|i| FedRow {
                name: i.name.clone(),
                dtype: tensor::dtype_name(i.dtype).to_owned(),
                shape: i.pass_shape.clone(),
                values: i.how.clone(),
            })
            .collect(),
        feed: feeding
            .feed
            .as_ref()
            .map(|(p, d)| FeedRow { path: p.display().to_string(), sha256: d.clone() }),
        thresholds: ThresholdsRow {
            dead_below: f.dead_below,
            dominant_above: f.dominant_above,
            dead_channels_above: f.dead_channels_above,
            depth_factor: f.depth_factor,
        },
    }
}

fn ratios(num: &[f64], den: &[f64]) -> Vec<f64> {
    num.iter().zip(den).filter(|(_, d)| **d > 0.0).map(|(n, d)| n / d).collect()
}

/// Aggregates per-sample measurements into the report's statistics.
pub fn stats_row(s: &BlockSamples, dead_below: f64) -> StatsRow {
    let channels = (!s.channel_shortcut.is_empty()).then_some(s.channel_shortcut.len());
    let dead_channel_fraction = channels.and_then(|_| {
        let limit = dead_below * dead_below;
        let live: Vec<(f64, f64)> = s
            .channel_shortcut
            .iter()
            .zip(&s.channel_branch)
            .map(|(&a, &b)| (a, b))
            .filter(|(a, b)| *a > 0.0 || *b > 0.0)
            .collect();
        if live.is_empty() {
            return None;
        }
        let dead = live.iter().filter(|(sc, br)| *br < limit * *sc).count();
        Some(dead as f64 / live.len() as f64)
    });
    StatsRow {
        samples: s.output_rms.len(),
        fork_rms: Spread::of(&s.fork_rms),
        shortcut_rms: Spread::of(&s.shortcut_rms),
        branch_rms: Spread::of(&s.branch_rms),
        output_rms: Spread::of(&s.output_rms),
        ratio: Spread::of(&ratios(&s.branch_rms, &s.shortcut_rms)),
        cosine: Spread::of(&s.cosine),
        growth: Spread::of(&ratios(&s.output_rms, &s.fork_rms)),
        zeroed: Spread::of(&s.zeroed),
        channels,
        dead_channel_fraction,
        nan: s.nan,
        inf: s.inf,
    }
}
