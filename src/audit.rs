//! The audit: the structural scan, then a run of the model on the CPU that
//! measures every block, then findings. Maps probe results onto the report
//! by hand.

use std::path::Path;

use prost::Message;

use crate::classify::Placement;
use crate::error::{Error, Result};
use crate::findings::{self, FindingConfig, InfluenceFacts, InfluenceThresholds};
use crate::gate::{self, Site};
use crate::graph::op;
use crate::load::{self, ExternalData, tensor};
use crate::lower::{self, precision};
use crate::probe::inputs::{self, Feeding, InputConfig};
use crate::probe::{self, BlockSamples, GatedPlan, ModelSource, Progress, Watch};
use crate::proto::ModelProto;
use crate::report::{
    ComparedOutput, EffectiveDepthRow, FedRow, FeedRow, FindingRow, GainSetup, InfluenceReport,
    InfluenceRow, KnockoutSetup, PrecisionRow, Report, RunRow, SkippedRow, StatsRow, ThresholdsRow,
};
use crate::scan::{self, Analysis, ScanConfig};
use crate::stats::{self, Agreement, Spread};

/// Everything an audit needs to know.
#[derive(Debug, Clone)]
pub struct AuditConfig {
    /// The structural scan.
    pub scan: ScanConfig,
    /// What to feed.
    pub inputs: InputConfig,
    /// Thresholds of findings.
    pub findings: FindingConfig,
    /// Knockout and perturbation gain, when asked for.
    pub influence: Option<InfluenceConfig>,
}

/// What `audit --knockout` / `--gain` measure.
#[derive(Debug, Clone)]
pub struct InfluenceConfig {
    /// Knock out the branch of each selected block.
    pub knockout: bool,
    /// Also knock out each selected block's shortcut (the converse).
    pub shortcuts: bool,
    /// Ids (1-based) of the blocks to knock out; `None`: every block.
    pub blocks: Option<Vec<usize>>,
    /// Relative step of the perturbation gain; `None`: no gain.
    pub gain_step: Option<f32>,
    /// Thresholds of `low-impact`, `exploding-gain` and `vanishing-gain`.
    pub thresholds: InfluenceThresholds,
}

impl InfluenceConfig {
    /// The documented defaults: every block knocked out, no converse, the
    /// gain with step [`GAIN_STEP`], `low-impact` below 0.01, a gain factor of 100.
    pub fn standard() -> InfluenceConfig {
        InfluenceConfig {
            knockout: true,
            shortcuts: false,
            blocks: None,
            gain_step: Some(GAIN_STEP),
            thresholds: InfluenceThresholds { low_impact_below: 0.01, gain_factor: 100.0 },
        }
    }
}

/// The default relative step of the perturbation gain.
///
/// The measured change `f(x + δ) − f(x)` carries two errors. Rounding: every
/// float32 op rounds to a relative `u = 2⁻²⁴ ≈ 6e-8` of the values it
/// produces, and the two passes round differently once their inputs differ,
/// so the change is known only to about `c·u·‖f‖`, i.e. a relative error of
/// `c·u/step` where `c` grows with the number of ops on the path (tens to
/// hundreds in deep networks). Truncation: a nonlinear network answers to a
/// finite step with a relative error of order `step` (for ReLU networks, the
/// fraction of units that change side). The sum `c·u/step + step` is smallest
/// near `step = sqrt(c·u)`, 2.4e-4 for `c = 1` and 2.4e-3 for `c = 100`; we
/// take 1e-3, where rounding contributes at most ~6e-5·c and the result is
/// the gain of a change one thousandth of the input. A test on a linear model
/// shows the step is well inside the good range, and that a step of 1e-7
/// would let rounding dominate.
pub const GAIN_STEP: f32 = 1e-3;

impl AuditConfig {
    /// The documented defaults: the standard scan, 8 samples of standard
    /// normal inputs with seed 0, and the standard thresholds.
    pub fn standard() -> AuditConfig {
        AuditConfig {
            scan: ScanConfig::standard(),
            inputs: InputConfig::standard(8),
            findings: scan::standard_findings(),
            influence: None,
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

/// Audits a model file: [`open_file`], [`Opened::plan`], [`measure`].
pub fn audit_file(path: &Path, config: &AuditConfig, progress: &dyn Progress) -> Result<Audit> {
    let opened = open_file(path, config)?;
    let feeding = opened.plan(&config.inputs).map_err(|e| e.at(path))?;
    measure(opened, feeding, config, progress)
}

/// Audits an in-memory model (tests, benchmarks); `label` stands for the path.
pub fn audit_model(
    model: ModelProto,
    label: &str,
    config: &AuditConfig,
    progress: &dyn Progress,
) -> Result<Audit> {
    let opened = open_model(model, label, config)?;
    let feeding = opened.plan(&config.inputs)?;
    measure(opened, feeding, config, progress)
}

/// A model opened for an audit: decoded, lowered and analysed once, with
/// what tract is to run (the lowered model when a rewrite changed it).
pub struct Opened {
    info: crate::report::ModelInfo,
    analysis: Analysis,
    /// The model file (errors name it).
    file: Option<std::path::PathBuf>,
    /// The file, when tract reads the model as it is.
    path: Option<std::path::PathBuf>,
    /// The folder external data resolves against.
    dir: Option<std::path::PathBuf>,
    /// The encoded model tract runs, when not the file itself.
    bytes: Option<Vec<u8>>,
    half: Option<HalfModel>,
    /// The lowered model, kept for the knockout surgery.
    surgery: Option<ModelProto>,
}

/// Opens a model file for an audit: load, checksums (tract reads the
/// external payloads later), lower, analyse.
pub fn open_file(path: &Path, config: &AuditConfig) -> Result<Opened> {
    let loaded = load::load(path, &config.scan.load)?;
    load::verify_checksums(&loaded.model, &loaded.external).map_err(|e| e.at(path))?;
    let info = scan::model_info(
        &path.display().to_string(),
        loaded.file_bytes,
        &loaded.model,
        &loaded.external,
    );
    let lowered =
        lower::lower(loaded.model, &loaded.external, &config.scan.lower).map_err(|e| e.at(path))?;
    // tract runs what was analysed: the lowered model when a rewrite changed
    // it (external payloads still resolve against the model's folder).
    let bytes = lowered.changed().then(|| lowered.model.encode_to_vec());
    let half = HalfModel::of(&lowered.model, &loaded.external);
    // The surgery works on a copy of the decoded model (payloads in
    // `raw_data` are shared, not copied).
    let surgery = config.influence.as_ref().map(|_| lowered.model.clone());
    let analysis =
        scan::analyse_lowered(lowered, loaded.external, &config.scan).map_err(|e| e.at(path))?;
    let dir = path.parent().map(|d| if d.as_os_str().is_empty() { Path::new(".") } else { d });
    Ok(Opened {
        info,
        analysis,
        file: Some(path.to_path_buf()),
        path: bytes.is_none().then(|| path.to_path_buf()),
        dir: dir.map(Path::to_path_buf),
        bytes,
        half,
        surgery,
    })
}

/// Opens an in-memory model (no external data) for an audit.
pub fn open_model(model: ModelProto, label: &str, config: &AuditConfig) -> Result<Opened> {
    let external = ExternalData::none();
    let info = scan::model_info(label, model.encoded_len() as u64, &model, &external);
    let lowered = lower::lower(model, &external, &config.scan.lower)?;
    let bytes = lowered.model.encode_to_vec();
    let surgery = config.influence.as_ref().map(|_| lowered.model.clone());
    let half = HalfModel::of(&lowered.model, &external);
    let analysis = scan::analyse_lowered(lowered, external, &config.scan)?;
    Ok(Opened {
        info,
        analysis,
        file: None,
        path: None,
        dir: None,
        bytes: Some(bytes),
        half,
        surgery,
    })
}

impl Opened {
    /// Plans what is fed, from the model's own input declarations.
    pub fn plan(&self, config: &InputConfig) -> Result<Feeding> {
        let specs = inputs::input_specs(&self.analysis.graph);
        inputs::plan(&specs, config)
    }
}

/// Where tract reads an opened model from: the file as it is, or the
/// encoded (lowered) model, whose external data resolves against `dir`.
fn source_of<'a>(
    path: Option<&'a Path>,
    bytes: &'a [u8],
    dir: Option<&'a Path>,
) -> ModelSource<'a> {
    match (path, dir) {
        (Some(p), _) => ModelSource::Path(p),
        (None, Some(d)) => ModelSource::BytesIn(bytes, d),
        (None, None) => ModelSource::Bytes(bytes),
    }
}

/// Runs an opened model on `feeding` and assembles the report: the plain
/// measurement, or with [`InfluenceConfig`] the knockout and gain runs as
/// options of the same measurement. Findings are computed once, with the
/// caller's thresholds.
pub fn measure(
    opened: Opened,
    feeding: Feeding,
    config: &AuditConfig,
    progress: &dyn Progress,
) -> Result<Audit> {
    let Opened { info, analysis, file, path, dir, bytes, half, surgery } = opened;
    let located = |e: Error| match &file {
        Some(p) => e.at(p),
        None => e,
    };
    if let (Some(influence), Some(model)) = (&config.influence, surgery) {
        return run_influence(
            info,
            analysis,
            model,
            dir.as_deref(),
            half,
            feeding,
            influence,
            config,
            progress,
        )
        .map_err(located);
    }
    let bytes = bytes.unwrap_or_default();
    let source = source_of(path.as_deref(), &bytes, dir.as_deref());
    run(info, analysis, source, dir.as_deref(), half, feeding, config, progress).map_err(located)
}

/// A half-precision model as tract is to run it (see `lower::precision`):
/// float16 natively, with float16 Gemms' biases split off, and its float32
/// twin when tract cannot; bfloat16 always as its float32 twin.
struct HalfModel {
    half: precision::Half,
    model: ModelProto,
    external: ExternalData,
}

impl HalfModel {
    /// `None` for a model without half-precision types.
    fn of(model: &ModelProto, external: &ExternalData) -> Option<HalfModel> {
        precision::half_type(model).map(|half| HalfModel {
            half,
            model: model.clone(),
            external: external.clone(),
        })
    }

    fn twin(&self) -> Result<Vec<u8>> {
        let mut m = self.model.clone();
        precision::float32_twin(&mut m, &self.external)?;
        Ok(m.encode_to_vec())
    }
}

/// Runs `go` on what tract runs of the model: `source` itself, or for a
/// half-precision model the form [`HalfModel`] says, retried as the
/// float32 twin when float16 fails. Returns how it ran.
fn run_precise<T>(
    half: Option<&HalfModel>,
    source: ModelSource<'_>,
    dir: Option<&Path>,
    mut go: impl FnMut(ModelSource<'_>) -> Result<T>,
) -> (Result<T>, Option<PrecisionRow>) {
    let Some(h) = half else { return (go(source), None) };
    fn of<'a>(bytes: &'a [u8], dir: Option<&'a Path>) -> ModelSource<'a> {
        match dir {
            Some(d) => ModelSource::BytesIn(bytes, d),
            None => ModelSource::Bytes(bytes),
        }
    }
    let name = h.half.name();
    let row = |ran: &str, note: String| PrecisionRow {
        model: name.to_owned(),
        ran: ran.to_owned(),
        note,
    };
    let twin_note = match h.half {
        precision::Half::Float16 => {
            "the float32 twin of the float16 model (weights widened \
            exactly, its casts to float16 kept, every op computed in float32 without rounding \
            its result to float16)"
        }
        precision::Half::Bfloat16 => {
            "the float32 twin of the bfloat16 model (weights and \
            inputs widened exactly from bfloat16, every op computed in float32 without \
            rounding its result to bfloat16, casts to bfloat16 dropped)"
        }
    };
    let native_error = if h.half == precision::Half::Float16 {
        let mut m = h.model.clone();
        let split = precision::split_half_gemms(&mut m);
        let bytes = m.encode_to_vec();
        drop(m);
        match go(of(&bytes, dir)) {
            Ok(r) => {
                let mut note = "float16, run natively by tract".to_owned();
                if split > 0 {
                    note.push_str(&format!(
                        " ({split} Gemm with a bias run as Gemm then Add: tract 0.23.9 cannot \
                         prepare a float16 Gemm's bias)"
                    ));
                }
                return (Ok(r), Some(row("float16", note)));
            }
            Err(e) => Some(e),
        }
    } else {
        None
    };
    let bytes = match h.twin() {
        Ok(b) => b,
        Err(e) => return (Err(native_error.unwrap_or(e)), None),
    };
    match (go(of(&bytes, dir)), native_error) {
        (Ok(r), Some(e)) => {
            let note = format!("{twin_note}, because tract could not run it in float16: {e}");
            (Ok(r), Some(row("float32", note)))
        }
        (Ok(r), None) => {
            let note = format!("{twin_note}, because tract 0.23.9 has no bfloat16");
            (Ok(r), Some(row("float32", note)))
        }
        (Err(twin), Some(e)) => (
            Err(Error::new(
                crate::error::ErrorKind::Probe,
                format!("{}; its float32 twin failed too: {}", e.message(), twin.message()),
            )),
            None,
        ),
        (Err(twin), None) => (Err(twin), None),
    }
}

#[allow(clippy::too_many_arguments)]
fn run(
    info: crate::report::ModelInfo,
    analysis: Analysis,
    source: ModelSource<'_>,
    dir: Option<&Path>,
    half: Option<HalfModel>,
    feeding: Feeding,
    config: &AuditConfig,
    progress: &dyn Progress,
) -> Result<Audit> {
    let mut report = scan::structure_report("audit", info, &analysis);
    report.run = Some(run_row(&feeding, &config.findings));
    // What the input plan had to guess, where a reader of the report sees it.
    report.diagnostics.extend(feeding.warnings.iter().map(|w| crate::report::DiagnosticRow {
        severity: "warning".to_owned(),
        node: None,
        message: w.clone(),
    }));
    let watches = watches(&analysis);
    let stage_keys = crate::classify::stage_keys(&analysis.graph, &analysis.detection.blocks);
    // The analysis holds the decoded weights: free them before tract loads its own copy.
    drop(analysis);
    let mut facts = scan::block_facts(&report);
    let (outcome, precision) =
        run_precise(half.as_ref(), source, dir, |s| probe::run(s, &watches, &feeding, progress));
    drop(half);
    if let Some(run) = report.run.as_mut() {
        run.precision = precision;
    }
    let (run_error, outputs) = match outcome {
        Ok(result) => {
            fill_stats(&mut report, &mut facts, &result.blocks, config.findings.dead_below);
            measured_stages(&mut report, &stage_keys, &result.blocks);
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

/// Stages from the shapes the run measured where static shape inference
/// stopped (Reshape targets computed at run time, dynamic spatial sizes): a
/// block whose output shape is unknown statically takes the shape tract
/// produced, past the batch axis, and the blocks are grouped into stages
/// again. Bare runs are not searched again (they need the graph).
fn measured_stages(
    report: &mut Report,
    keys: &[Option<Vec<crate::graph::Dim>>],
    blocks: &[BlockSamples],
) {
    if keys.len() != report.blocks.len() || keys.iter().all(Option::is_some) {
        return;
    }
    let keys: Vec<Option<Vec<crate::graph::Dim>>> = keys
        .iter()
        .zip(blocks)
        .map(|(k, b)| {
            k.clone().or_else(|| {
                let measured = b.output_shape.get(1..).filter(|_| b.output_shape.len() >= 2)?;
                Some(measured.iter().map(|&d| crate::graph::Dim::Known(d as u64)).collect())
            })
        })
        .collect();
    let (stages, of_block) = crate::classify::group(&keys);
    report.stages = stages
        .iter()
        .enumerate()
        .map(|(i, s)| crate::report::StageRow {
            id: i + 1,
            shape: s.shape.iter().map(ToString::to_string).collect(),
            blocks: s.blocks.iter().map(|b| b + 1).collect(),
        })
        .collect();
    for ((row, stage), b) in report.blocks.iter_mut().zip(of_block).zip(blocks) {
        row.stage = stage.map(|s| s + 1);
        // Where the static shape has unknown dims, show the measured ones
        // (the batch axis as declared).
        let unknown = row.output_shape.as_ref().is_none_or(|s| s.iter().any(|d| d == "?"));
        if unknown && b.output_shape.len() >= 2 {
            let batch = row.output_shape.as_ref().and_then(|s| s.first().cloned());
            let mut shape: Vec<String> = b.output_shape.iter().map(ToString::to_string).collect();
            if let Some(batch) = batch.filter(|d| d != "?") {
                shape[0] = batch;
            }
            row.output_shape = Some(shape);
        }
    }
}

/// What to measure for each block.
pub fn watches(a: &Analysis) -> Vec<Watch> {
    let g = &a.graph;
    a.detection
        .blocks
        .iter()
        .zip(&a.kinds)
        .map(|(b, k)| Watch {
            fork: g.value(dequantised(g, b.fork)).name.clone(),
            shortcut: g.value(b.shortcut.input).name.clone(),
            branch: b.branch_inputs.iter().map(|&v| g.value(v).name.clone()).collect(),
            output: g.value(b.output).name.clone(),
            channels_first: b
                .branch
                .iter()
                .any(|&n| op::is_parametrised(g, n) && g.node(n).op.contains("Conv")),
            relu_after: k.placement == Placement::PostActivation
                && k.placement_node
                    .is_some_and(|n| matches!(g.node(n).op.as_str(), "Relu" | "QuantizeLinear")),
        })
        .collect()
}

/// The float value of a block input: a quantised tensor (codes: element types
/// 2 to 5 are uint8, int8, uint16 and int16; or the output
/// of a QuantizeLinear in the QDQ form) is measured through its first
/// DequantizeLinear, so fork RMS and growth are in the units of the merge.
fn dequantised(g: &crate::graph::Graph, v: crate::graph::ValueId) -> crate::graph::ValueId {
    let quantised = g.producer(v).is_some_and(|p| {
        matches!(g.node(p).op.as_str(), "QuantizeLinear" | "DynamicQuantizeLinear")
    }) || matches!(g.value(v).fact.dtype, 2..=5);
    if !quantised {
        return v;
    }
    g.consumers(v)
        .find(|&c| g.node(c).op == "DequantizeLinear" && g.input(c, 0) == Some(v))
        .map_or(v, |c| g.node(c).outputs[0])
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
        precision: None,
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

/// Copies the intact run's measurements into the report and the facts.
fn fill_stats(
    report: &mut Report,
    facts: &mut [findings::BlockFacts],
    blocks: &[BlockSamples],
    dead_below: f64,
) {
    for (i, samples) in blocks.iter().enumerate() {
        let row = stats_row(samples, dead_below);
        facts[i].ratio = row.ratio.map(|s| s.mean);
        facts[i].dead_channel_fraction = row.dead_channel_fraction;
        facts[i].channels = row.channels;
        facts[i].non_finite = row.nan + row.inf;
        facts[i].output_rms = row.output_rms.map(|s| s.mean);
        report.blocks[i].stats = Some(row);
    }
}

/// Whether a block changes the spatial or sequence size: its fork and output
/// shapes differ outside the channel axis, or (shapes unknown) a branch
/// layer has a stride or the shortcut resamples.
fn changes_resolution(a: &Analysis, i: usize, channels_first: bool) -> bool {
    let g = &a.graph;
    let b = &a.detection.blocks[i];
    let known = |v| -> Option<Vec<u64>> {
        g.value(v)
            .fact
            .shape
            .as_ref()?
            .iter()
            .map(|d| match d {
                crate::graph::Dim::Known(k) => Some(*k),
                _ => None,
            })
            .collect()
    };
    if let (Some(f), Some(o)) = (known(b.fork), known(b.output))
        && f.len() == o.len()
        && f.len() >= 3
    {
        let skip = if channels_first { 1 } else { f.len() - 1 };
        return f.iter().zip(&o).enumerate().any(|(k, (x, y))| k != 0 && k != skip && x != y);
    }
    b.shortcut.kind == crate::residual::ShortcutKind::Resampled
        || b.branch.iter().any(|&n| {
            crate::load::attr::ints(&g.node(n).attrs, "strides")
                .is_some_and(|s| s.iter().any(|&x| x > 1))
        })
}

/// The outputs of a knockout against the intact ones: the largest relative
/// change and the smallest cosine over the float outputs, and the top-1
/// agreement of the first output that looks like class scores.
fn compare_outputs(
    intact: &[Vec<f32>],
    shapes: &[Vec<usize>],
    other: &[Vec<f32>],
) -> Option<Agreement> {
    let mut all: Vec<Agreement> = Vec::new();
    for (o, (a, b)) in intact.iter().zip(other).enumerate() {
        if let Some(ag) = stats::agreement(a, b, classes_of(shapes.get(o))) {
            all.push(ag);
        }
    }
    let first = *all.first()?;
    Some(Agreement {
        rel_l2: all.iter().map(|a| a.rel_l2).fold(first.rel_l2, f64::max),
        cosine: all.iter().filter_map(|a| a.cosine).reduce(f64::min),
        top1: all.iter().find_map(|a| a.top1),
    })
}

/// The class count of an output shaped `[batch, classes]`.
fn classes_of(shape: Option<&Vec<usize>>) -> Option<usize> {
    shape.filter(|s| s.len() == 2 && s[1] >= 2).map(|s| s[1])
}

/// The distribution of path lengths when each block independently sends a
/// unit of change through its branch with probability `q` (a Poisson
/// binomial distribution), by dynamic programming.
pub fn path_lengths(shares: &[f64]) -> Vec<f64> {
    let mut p = vec![1.0];
    for &q in shares {
        let mut next = vec![0.0; p.len() + 1];
        for (k, &w) in p.iter().enumerate() {
            next[k] += w * (1.0 - q);
            next[k + 1] += w * q;
        }
        p = next;
    }
    p
}

fn effective_depth(shares: &[f64], carrying: Option<usize>) -> EffectiveDepthRow {
    let distribution = path_lengths(shares);
    let mean: f64 = shares.iter().sum();
    let var: f64 = shares.iter().map(|q| q * (1.0 - q)).sum();
    let quantile = |level: f64| {
        let mut c = 0.0;
        for (k, w) in distribution.iter().enumerate() {
            c += w;
            if c >= level - 1e-12 {
                return k;
            }
        }
        distribution.len().saturating_sub(1)
    };
    EffectiveDepthRow {
        blocks: shares.len(),
        mean_path_length: mean,
        path_length_sd: var.sqrt(),
        median_path_length: quantile(0.5),
        central_80: [quantile(0.1), quantile(0.9)],
        distribution,
        carrying,
    }
}

fn per_sample(num: &[f64], den: &[f64]) -> Option<Spread> {
    Spread::of(&ratios(num, den))
}

/// The audit with knockout and/or perturbation gain: the gates go into a
/// copy of the decoded model, which is encoded and prepared once; the intact
/// passes measure every block as a plain audit does.
#[allow(clippy::too_many_arguments)]
fn run_influence(
    info: crate::report::ModelInfo,
    analysis: Analysis,
    mut model: ModelProto,
    dir: Option<&Path>,
    half: Option<HalfModel>,
    feeding: Feeding,
    ic: &InfluenceConfig,
    config: &AuditConfig,
    progress: &dyn Progress,
) -> Result<Audit> {
    let mut report = scan::structure_report("audit", info, &analysis);
    report.run = Some(run_row(&feeding, &config.findings));
    // What the input plan had to guess, where a reader of the report sees it.
    report.diagnostics.extend(feeding.warnings.iter().map(|w| crate::report::DiagnosticRow {
        severity: "warning".to_owned(),
        node: None,
        message: w.clone(),
    }));
    let watches = watches(&analysis);
    let stage_keys = crate::classify::stage_keys(&analysis.graph, &analysis.detection.blocks);
    let n = analysis.detection.blocks.len();
    let selected: Vec<usize> = if !ic.knockout {
        Vec::new()
    } else if let Some(ids) = &ic.blocks {
        let mut ids = ids.clone();
        ids.sort_unstable();
        ids.dedup();
        if let Some(bad) = ids.iter().find(|&&id| id == 0 || id > n) {
            return Err(Error::new(
                crate::error::ErrorKind::Usage,
                format!("--blocks: the model has no block #{bad} (it has {n})"),
            ));
        }
        ids.iter().map(|id| id - 1).collect()
    } else {
        (0..n).collect()
    };
    let g = &analysis.graph;
    let mut skipped = Vec::new();
    let mut sites = Vec::new();
    let mut site_block = Vec::new();
    for &i in &selected {
        let b = &analysis.detection.blocks[i];
        let op = &g.node(b.merge).op;
        if op != "Add" && op != "Sum" {
            skipped.push(SkippedRow {
                block: i + 1,
                reason: format!("the merge is {op}; only Add and Sum are gated"),
            });
            continue;
        }
        let float = |v| matches!(g.value(v).fact.dtype, 0 | 1);
        if !float(b.shortcut.input) || !b.branch_inputs.iter().all(|&v| float(v)) {
            skipped.push(SkippedRow {
                block: i + 1,
                reason: "the merge inputs are not float32".to_owned(),
            });
            continue;
        }
        sites.push(Site {
            output: g.value(b.output).name.clone(),
            shortcut: g.value(b.shortcut.input).name.clone(),
            branch: b.branch_inputs.iter().map(|&v| g.value(v).name.clone()).collect(),
        });
        site_block.push(i);
    }
    let resolution: Vec<bool> =
        (0..n).map(|i| changes_resolution(&analysis, i, watches[i].channels_first)).collect();
    let depth: Vec<usize> = analysis.detection.blocks.iter().map(|b| b.depth).collect();
    // The analysis holds the decoded weights: free them before tract loads its own copy.
    drop(analysis);
    let gates = gate::insert(&mut model, &sites, ic.shortcuts && ic.knockout)?;
    let bytes = model.encode_to_vec();
    // A half-precision model runs in the form `run_precise` chooses, gates included.
    let half = half.map(|h| HalfModel { model, ..h });
    let names = gates.names();
    let mut settings = Vec::new();
    let mut labels: Vec<(usize, bool)> = Vec::new();
    let sides: &[bool] = if gates.shortcut.is_empty() { &[false] } else { &[false, true] };
    for &shortcut in sides {
        for (k, &block) in site_block.iter().enumerate() {
            let mut v = vec![1.0f32; names.len()];
            v[if shortcut { sites.len() + k } else { k }] = 0.0;
            settings.push(v);
            labels.push((block, shortcut));
        }
    }
    let plan = GatedPlan { gates: names, settings, gain_step: ic.gain_step };
    let source = match dir {
        Some(d) => ModelSource::BytesIn(&bytes, d),
        None => ModelSource::Bytes(&bytes),
    };
    let mut knocked: Vec<Option<Agreement>> = vec![None; n];
    let mut knocked_shortcut: Vec<Option<Agreement>> = vec![None; n];
    let mut sink = |i: usize, intact: &[Vec<f32>], shapes: &[Vec<usize>], outs: Vec<Vec<f32>>| {
        let (block, shortcut) = labels[i];
        let ag = compare_outputs(intact, shapes, &outs);
        if shortcut {
            knocked_shortcut[block] = ag;
        } else {
            knocked[block] = ag;
        }
    };
    let mut facts = scan::block_facts(&report);
    let (outcome, precision) = run_precise(half.as_ref(), source, dir, |s| {
        probe::run_gated(s, &watches, &feeding, &plan, &mut sink, progress)
    });
    drop(half);
    if let Some(run) = report.run.as_mut() {
        run.precision = precision;
    }
    let result = match outcome {
        Ok(r) => r,
        Err(e) => {
            report.run_error = Some(e.message().to_owned());
            scan::set_findings(&mut report, &facts, &config.findings);
            return Ok(Audit { report, run_error: Some(e), outputs: Vec::new() });
        }
    };
    fill_stats(&mut report, &mut facts, &result.intact.blocks, config.findings.dead_below);
    measured_stages(&mut report, &stage_keys, &result.intact.blocks);
    scan::set_findings(&mut report, &facts, &config.findings);

    let mut rows: Vec<InfluenceRow> = (0..n)
        .map(|i| InfluenceRow {
            block: i + 1,
            changes_resolution: resolution[i],
            knockout: knocked[i],
            shortcut_knockout: knocked_shortcut[i],
            rank: None,
            low_impact: knocked[i].is_some_and(|a| a.rel_l2 < ic.thresholds.low_impact_below),
            gain: None,
            shortcut_gain: None,
            branch_gain: None,
            branch_share: None,
            gain_product: None,
            gain_to_here: None,
        })
        .collect();
    // Rank by impact, largest first; ties keep block order.
    let mut order: Vec<usize> = (0..n).filter(|&i| knocked[i].is_some()).collect();
    order.sort_by(|&a, &b| {
        let ka = knocked[a].map_or(f64::NAN, |k| k.rel_l2);
        let kb = knocked[b].map_or(f64::NAN, |k| k.rel_l2);
        kb.partial_cmp(&ka).unwrap_or(std::cmp::Ordering::Equal)
    });
    for (r, &i) in order.iter().enumerate() {
        rows[i].rank = Some(r + 1);
    }

    let top: Vec<usize> = (0..n).filter(|&i| depth[i] == 0).collect();
    let gain_setup = ic.gain_step.map(|step| GainSetup {
        step: f64::from(step),
        input_change: Spread::of(&result.input_change),
        end_to_end: None,
        gain_factor: ic.thresholds.gain_factor,
    });
    let mut effective = None;
    if let Some(gain) = &result.gain {
        for (i, s) in gain.iter().enumerate() {
            let shares: Vec<f64> = s
                .shortcut
                .iter()
                .zip(&s.branch)
                .filter(|(a, b)| *a + *b > 0.0)
                .map(|(a, b)| b / (a + b))
                .collect();
            rows[i].gain = per_sample(&s.output, &s.fork);
            rows[i].shortcut_gain = per_sample(&s.shortcut, &s.fork);
            rows[i].branch_gain = per_sample(&s.branch, &s.fork);
            rows[i].branch_share = Spread::of(&shares).map(|x| x.mean);
        }
        let first = top.first().map(|&i| gain[i].fork.clone()).unwrap_or_default();
        let mut product = 1.0;
        for &i in &top {
            if let Some(g) = rows[i].gain {
                product *= g.mean;
                rows[i].gain_product = Some(product);
            }
            rows[i].gain_to_here = Spread::of(&ratios(&gain[i].output, &first)).map(|x| x.mean);
        }
        let shares: Vec<f64> = top.iter().filter_map(|&i| rows[i].branch_share).collect();
        let carrying = (ic.knockout && top.iter().any(|&i| knocked[i].is_some())).then(|| {
            top.iter()
                .filter(|&&i| {
                    knocked[i].is_some_and(|k| !rows[i].low_impact && k.rel_l2.is_finite())
                })
                .count()
        });
        // No measured share (no float input to perturb): no path view.
        effective = (!shares.is_empty()).then(|| effective_depth(&shares, carrying));
    }
    let gain_setup = gain_setup.map(|mut g| {
        g.end_to_end = top.last().and_then(|&i| rows[i].gain_to_here);
        g
    });

    let influence_facts: Vec<InfluenceFacts> = rows
        .iter()
        .map(|r| InfluenceFacts {
            knockout: r.knockout.map(|k| k.rel_l2),
            gain_to_here: r.gain_to_here,
        })
        .collect();
    for f in findings::influence(&influence_facts, &ic.thresholds) {
        report.findings.push(FindingRow {
            code: f.code.as_str().to_owned(),
            block: f.block,
            node: f.block.and_then(|id| report.blocks.get(id - 1)).map(|b| b.merge.clone()),
            message: f.message,
        });
    }
    let shapes = &result.intact.output_shapes;
    report.influence = Some(InfluenceReport {
        knockout: ic.knockout.then(|| KnockoutSetup {
            blocks: site_block.iter().map(|i| i + 1).collect(),
            shortcuts: !gates.shortcut.is_empty(),
            low_impact_below: ic.thresholds.low_impact_below,
            forward_passes: result.forward_passes,
            outputs: report
                .model
                .outputs
                .iter()
                .enumerate()
                .filter(|(o, _)| result.intact.outputs.get(*o).is_some_and(|v| !v.is_empty()))
                .map(|(o, t)| ComparedOutput {
                    name: t.name.clone(),
                    classes: classes_of(shapes.get(o)),
                })
                .collect(),
        }),
        gain: gain_setup,
        blocks: rows,
        effective_depth: effective,
        skipped,
    });
    Ok(Audit { report, run_error: None, outputs: result.intact.outputs })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn path_lengths_are_a_poisson_binomial() {
        // Two blocks sending half the change through the branch: lengths 0,
        // 1, 2 with weights 1/4, 1/2, 1/4 (two fair coins).
        assert_eq!(path_lengths(&[0.5, 0.5]), vec![0.25, 0.5, 0.25]);
        // Branches that carry nothing: every path is the all-shortcut one.
        assert_eq!(path_lengths(&[0.0, 0.0, 0.0]), vec![1.0, 0.0, 0.0, 0.0]);
        let e = effective_depth(&[0.9, 0.1, 0.5, 0.5], Some(3));
        assert!((e.mean_path_length - 2.0).abs() < 1e-12);
        assert!((e.distribution.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert_eq!(e.median_path_length, 2);
        let sd = (0.09f64 + 0.09 + 0.25 + 0.25).sqrt();
        assert!((e.path_length_sd - sd).abs() < 1e-12);
        assert_eq!(e.central_80, [1, 3]);
    }

    #[test]
    fn agreement_over_outputs_takes_the_worst() {
        let intact = vec![vec![1.0, 2.0, 3.0, 4.0], vec![1.0, 1.0]];
        let other = vec![vec![1.0, 2.0, 4.0, 3.0], vec![1.0, 1.1]];
        let shapes = vec![vec![2, 2], vec![2]];
        let a = compare_outputs(&intact, &shapes, &other).unwrap();
        let first = stats::agreement(&intact[0], &other[0], Some(2)).unwrap();
        assert_eq!(
            a.rel_l2,
            first.rel_l2.max(stats::agreement(&intact[1], &other[1], None).unwrap().rel_l2)
        );
        assert_eq!(a.top1, Some(0.5));
    }
}
