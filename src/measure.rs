//! The third stage: run an opened model on a plan and measure every block.
//! The plain measurement, the knockout and the perturbation gain are
//! options of one measurement ([`InfluenceConfig`]), run on one preparation
//! of the model. A half-precision model runs natively or as its float32
//! twin (see `lower::precision`). What comes out is numbers; turning them
//! into rows and findings is `assemble`'s job.
//!
//! **Invariant:** the model is prepared by the engine once per measurement
//! (twice only for a float16 model the engine cannot run natively).

use std::path::Path;

use prost::Message;

use crate::control;
use crate::error::{Error, ErrorKind, Result};
use crate::gate::{self, Site};
use crate::graph;
use crate::lower::precision::{self, Half};
use crate::open::{Analysis, HalfModel, Runnable};
use crate::parallel::Budget;
use crate::probe::inputs::InputPlan;
use crate::probe::paired::{PairErrors, Side};
use crate::probe::{
    self, BlockSamples, GainSamples, GatedPlan, ModelSource, ProbeResult, Progress, Watch,
};
use crate::stats::{self, Agreement};
use crate::vocab::Placement;

/// What `audit --knockout` / `--gain` measure besides the plain measurement.
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
    pub thresholds: crate::findings::InfluenceThresholds,
}

impl InfluenceConfig {
    /// The documented defaults: every block knocked out, no converse, the
    /// gain with step [`GAIN_STEP`], the standard thresholds.
    pub const STANDARD: InfluenceConfig = InfluenceConfig {
        knockout: true,
        shortcuts: false,
        blocks: None,
        gain_step: Some(GAIN_STEP),
        thresholds: crate::findings::InfluenceThresholds::STANDARD,
    };

    /// [`InfluenceConfig::STANDARD`].
    pub fn standard() -> InfluenceConfig {
        InfluenceConfig::STANDARD
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

/// How a half-precision model ran.
#[derive(Debug, Clone, PartialEq)]
pub struct RanAs {
    /// The model's half-precision type.
    pub half: Half,
    /// Run natively (float16) rather than as the float32 twin.
    pub native: bool,
    /// float16 Gemms with a bias run as Gemm then Add (native runs).
    pub split_gemms: usize,
    /// Why the native run failed, when the twin ran instead of it.
    pub native_error: Option<String>,
}

/// The outcome of one measurement.
#[derive(Debug)]
pub struct Measurement {
    /// How a half-precision model ran (`None` for other models, and when
    /// the run failed).
    pub ran_as: Option<RanAs>,
    /// The measurements, or why the run failed.
    pub outcome: Result<Measured>,
}

/// What one run measured.
#[derive(Debug)]
pub struct Measured {
    /// The intact run: every block's samples (the main graph's blocks, then
    /// each body's, as the report numbers them) and the model's outputs.
    pub intact: ProbeResult,
    /// Blocks (0-based) the run could not measure, and why: blocks inside
    /// control flow the engine does not expose (their samples are empty).
    pub not_measured: Vec<(usize, String)>,
    /// The knockout and the gain, when asked for.
    pub influence: Option<InfluenceMeasured>,
}

/// What the knockout and the gain measured.
#[derive(Debug)]
pub struct InfluenceMeasured {
    /// Per block: the outputs with its branch knocked out, against the intact ones.
    pub knocked: Vec<Option<Agreement>>,
    /// Per block: the outputs with its shortcut knocked out.
    pub knocked_shortcut: Vec<Option<Agreement>>,
    /// The blocks knocked out (0-based), in order.
    pub gated: Vec<usize>,
    /// Whether the converse (the shortcut knocked out) ran.
    pub shortcuts: bool,
    /// Selected blocks that could not be knocked out (0-based), and why.
    pub skipped: Vec<(usize, String)>,
    /// Forward passes run in all.
    pub forward_passes: usize,
    /// Per block, the changes under the perturbation, when the gain was measured.
    pub gain: Option<Vec<GainSamples>>,
    /// Per-sample RMS of the change of the model input.
    pub input_change: Vec<f64>,
}

/// Runs `runnable` on `input_plan` and measures every block of `analysis`: the
/// plain measurement, or with `influence` the knockout and gain runs too.
/// An error is returned for a request the model cannot meet (a block id it
/// does not have); a failed run is the measurement's `outcome`.
pub fn measure(
    runnable: Runnable,
    analysis: &Analysis,
    input_plan: &InputPlan,
    influence: Option<&InfluenceConfig>,
    budget: &Budget,
    progress: &dyn Progress,
) -> Result<Measurement> {
    let Runnable { mut path, mut bytes, dir, mut half, mut surgery } = runnable;
    let selection = select(analysis, input_plan, &mut surgery, dir.as_deref());
    if let Some(model) = surgery.as_ref().filter(|_| selection.rewritten) {
        // The engine runs the rewritten model (and a half-precision model
        // the rewritten one, in the form `run_precise` chooses).
        half = half.map(|h| HalfModel { model: model.clone(), ..h });
        if influence.is_none() {
            bytes = Some(model.encode_to_vec());
            path = None;
        }
    }
    let watches = &selection.watches;
    let measurement = if let (Some(ic), Some(model)) = (influence, surgery) {
        measure_gated(
            analysis,
            &selection,
            model,
            dir.as_deref(),
            half,
            watches,
            input_plan,
            ic,
            budget,
            progress,
        )?
    } else {
        let bytes = bytes.unwrap_or_default();
        let source = match (path.as_deref(), dir.as_deref()) {
            (Some(p), _) => ModelSource::Path(p),
            (None, Some(d)) => ModelSource::BytesIn(&bytes, d),
            (None, None) => ModelSource::Bytes(&bytes),
        };
        let (outcome, ran_as) = run_precise(half.as_ref(), source, dir.as_deref(), |s| {
            probe::run(s, watches, input_plan, budget, progress)
        });
        let outcome =
            outcome.map(|intact| Measured { intact, not_measured: Vec::new(), influence: None });
        Measurement { ran_as, outcome }
    };
    Ok(selection.spread(measurement))
}

/// Which blocks are measured, under which tensor names.
struct Selection {
    /// What to watch, in order.
    watches: Vec<Watch>,
    /// For each block of the report: its position in `watches`, or why it
    /// is not measured.
    of_block: Vec<std::result::Result<usize, String>>,
    /// For each block: whether it is in the main graph of the model the
    /// engine runs (a main-graph block, or one of an inlined `If` branch),
    /// so that gates can reach it.
    in_main: Vec<bool>,
    /// Whether the model was rewritten to expose blocks inside bodies.
    rewritten: bool,
}

/// The blocks to measure: every block of the main graph, and those of the
/// bodies `control` can bring out (rewriting `model` for it).
fn select(
    analysis: &Analysis,
    input_plan: &InputPlan,
    model: &mut Option<crate::proto::ModelProto>,
    dir: Option<&Path>,
) -> Selection {
    let mut watches = watches(analysis);
    let mut of_block: Vec<std::result::Result<usize, String>> =
        (0..watches.len()).map(Ok).collect();
    let mut in_main = vec![true; watches.len()];
    let with_blocks = analysis.bodies.iter().any(|b| !b.analysis.detection.blocks.is_empty());
    let mut rewritten = false;
    let per_body: control::BodyWatches = match model.as_mut() {
        Some(m) if with_blocks => {
            let by_body: Vec<Vec<Watch>> =
                analysis.bodies.iter().map(|b| self::watches(&b.analysis)).collect();
            rewritten = true;
            control::unfold(m, analysis, &by_body, input_plan, dir)
        }
        _ => analysis
            .bodies
            .iter()
            .map(|_| Err("the model was not kept for rewriting".to_owned()))
            .collect(),
    };
    for (body, found) in analysis.bodies.iter().zip(per_body) {
        let n = body.analysis.detection.blocks.len();
        match found {
            Ok(list) => {
                let inlined = body.scope[0].op == "If";
                for w in list {
                    of_block.push(Ok(watches.len()));
                    watches.push(w);
                    in_main.push(inlined);
                }
            }
            Err(why) => {
                of_block.extend((0..n).map(|_| Err(why.clone())));
                in_main.extend((0..n).map(|_| false));
            }
        }
    }
    Selection { watches, of_block, in_main, rewritten }
}

impl Selection {
    /// The measurement with one entry per block of the report: the
    /// measured blocks' samples in place, the others empty, with why.
    fn spread(&self, mut m: Measurement) -> Measurement {
        if let Ok(measured) = &mut m.outcome {
            let mut by_watch: Vec<Option<BlockSamples>> =
                std::mem::take(&mut measured.intact.blocks).into_iter().map(Some).collect();
            let mut gains: Option<Vec<Option<GainSamples>>> = measured
                .influence
                .as_mut()
                .and_then(|i| i.gain.take())
                .map(|g| g.into_iter().map(Some).collect());
            let mut spread_gain = Vec::new();
            for (i, slot) in self.of_block.iter().enumerate() {
                match slot {
                    Ok(k) => {
                        measured.intact.blocks.push(by_watch[*k].take().unwrap_or_default());
                        if let Some(g) = gains.as_mut() {
                            spread_gain.push(g[*k].take().unwrap_or_default());
                        }
                    }
                    Err(why) => {
                        measured.intact.blocks.push(BlockSamples::default());
                        spread_gain.push(GainSamples::default());
                        measured.not_measured.push((i, why.clone()));
                    }
                }
            }
            if let (Some(inf), Some(_)) = (measured.influence.as_mut(), gains) {
                inf.gain = Some(spread_gain);
            }
        }
        m
    }
}

/// Both models of a comparison measured pass by pass on the same inputs,
/// and the differences of their aligned blocks.
#[derive(Debug)]
pub struct PairedMeasurement {
    /// Model A's measurement.
    pub a: Measurement,
    /// Model B's measurement.
    pub b: Measurement,
    /// One entry per aligned pair, in the order given.
    pub errors: Vec<PairErrors>,
}

/// Runs A and B pass by pass on plans that split the samples into the same
/// passes, and measures both and the difference of every aligned pair
/// `(block of A, block of B)` (0-based). Each half-precision model runs as
/// [`measure`] would run it. The runnables are borrowed, so that a caller
/// can measure each model on its own when the paired run fails.
#[allow(clippy::too_many_arguments)]
pub fn measure_pair(
    a: &Runnable,
    analysis_a: &Analysis,
    plan_a: &InputPlan,
    b: &Runnable,
    analysis_b: &Analysis,
    plan_b: &InputPlan,
    pairs: &[(usize, usize)],
    progress: &dyn Progress,
) -> Result<PairedMeasurement> {
    let in_bodies = |a: &Analysis| a.bodies.iter().any(|b| !b.analysis.detection.blocks.is_empty());
    if in_bodies(analysis_a) || in_bodies(analysis_b) {
        // The paired run watches the main graph only; the blocks inside
        // control flow are selected (and the model rewritten) by `measure`.
        return Err(Error::new(
            ErrorKind::Probe,
            "blocks inside control flow are measured one model at a time",
        ));
    }
    let (wa, wb) = (watches(analysis_a), watches(analysis_b));
    let (source_a, source_b) = (source_of(a), source_of(b));
    let (outcome, ran_a) = run_precise(a.half.as_ref(), source_a, a.dir.as_deref(), |sa| {
        let (r, ran_b) = run_precise(b.half.as_ref(), source_b, b.dir.as_deref(), |sb| {
            let side_a = Side { source: sa, watches: &wa, input_plan: plan_a };
            let side_b = Side { source: sb, watches: &wb, input_plan: plan_b };
            probe::paired::run_pair(side_a, side_b, pairs, progress)
        });
        r.map(|r| (r, ran_b))
    });
    let (r, ran_b) = outcome?;
    let measured = |intact| Measured { intact, not_measured: Vec::new(), influence: None };
    Ok(PairedMeasurement {
        a: Measurement { ran_as: ran_a, outcome: Ok(measured(r.a)) },
        b: Measurement { ran_as: ran_b, outcome: Ok(measured(r.b)) },
        errors: r.errors,
    })
}

/// Where the engine reads a runnable from, without taking it.
fn source_of(r: &Runnable) -> ModelSource<'_> {
    let bytes: &[u8] = r.bytes.as_deref().unwrap_or_default();
    match (r.path.as_deref(), r.dir.as_deref()) {
        (Some(p), _) => ModelSource::Path(p),
        (None, Some(d)) => ModelSource::BytesIn(bytes, d),
        (None, None) => ModelSource::Bytes(bytes),
    }
}

/// What to measure for each block.
pub fn watches(a: &Analysis) -> Vec<Watch> {
    let g = &a.graph;
    a.detection
        .blocks
        .iter()
        .zip(&a.classifications)
        .map(|(b, k)| Watch {
            fork: g.value(dequantised(g, b.fork)).name.clone(),
            shortcut: g.value(b.shortcut.input).name.clone(),
            branch: b.branch_inputs.iter().map(|&v| g.value(v).name.clone()).collect(),
            output: g.value(b.output).name.clone(),
            channels_first: k.channels_first,
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
fn dequantised(g: &graph::Graph, v: graph::ValueId) -> graph::ValueId {
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

/// Runs `go` on what the engine runs of the model: `source` itself, or for
/// a half-precision model float16 natively (Gemm biases split off) and its
/// float32 twin when that fails; bfloat16 always as the twin. Returns how
/// it ran.
fn run_precise<T>(
    half: Option<&HalfModel>,
    source: ModelSource<'_>,
    dir: Option<&Path>,
    mut go: impl FnMut(ModelSource<'_>) -> Result<T>,
) -> (Result<T>, Option<RanAs>) {
    let Some(h) = half else { return (go(source), None) };
    fn of<'a>(bytes: &'a [u8], dir: Option<&'a Path>) -> ModelSource<'a> {
        match dir {
            Some(d) => ModelSource::BytesIn(bytes, d),
            None => ModelSource::Bytes(bytes),
        }
    }
    let ran = |native: bool, split_gemms: usize, native_error: Option<String>| RanAs {
        half: h.half,
        native,
        split_gemms,
        native_error,
    };
    let native_error = if h.half == Half::Float16 {
        let mut m = h.model.clone();
        let split = precision::split_half_gemms(&mut m);
        let bytes = m.encode_to_vec();
        drop(m);
        match go(of(&bytes, dir)) {
            Ok(r) => return (Ok(r), Some(ran(true, split, None))),
            Err(e) => Some(e),
        }
    } else {
        None
    };
    let bytes = match twin(h) {
        Ok(b) => b,
        Err(e) => return (Err(native_error.unwrap_or(e)), None),
    };
    match (go(of(&bytes, dir)), native_error) {
        (Ok(r), e) => (Ok(r), Some(ran(false, 0, e.map(|e| e.to_string())))),
        (Err(twin), Some(e)) => (
            Err(Error::new(
                ErrorKind::Probe,
                format!("{}; its float32 twin failed too: {}", e.message(), twin.message()),
            )),
            None,
        ),
        (Err(twin), None) => (Err(twin), None),
    }
}

/// The encoded float32 twin of a half-precision model.
fn twin(h: &HalfModel) -> Result<Vec<u8>> {
    let mut m = h.model.clone();
    precision::float32_twin(&mut m, &h.external)?;
    Ok(m.encode_to_vec())
}

/// The measurement with knockout and/or perturbation gain: the gates go
/// into a copy of the decoded model, which is encoded and prepared once; the
/// intact passes measure every block as a plain measurement does.
#[allow(clippy::too_many_arguments)]
fn measure_gated(
    analysis: &Analysis,
    selection: &Selection,
    mut model: crate::proto::ModelProto,
    dir: Option<&Path>,
    half: Option<HalfModel>,
    watches: &[Watch],
    input_plan: &InputPlan,
    ic: &InfluenceConfig,
    budget: &Budget,
    progress: &dyn Progress,
) -> Result<Measurement> {
    let n = selection.of_block.len();
    let selected: Vec<usize> = if !ic.knockout {
        Vec::new()
    } else if let Some(ids) = &ic.blocks {
        let mut ids = ids.clone();
        ids.sort_unstable();
        ids.dedup();
        if let Some(bad) = ids.iter().find(|&&id| id == 0 || id > n) {
            return Err(Error::new(
                ErrorKind::Usage,
                format!("--blocks: the model has no block #{bad} (it has {n})"),
            ));
        }
        ids.iter().map(|id| id - 1).collect()
    } else {
        (0..n).collect()
    };
    let mut skipped = Vec::new();
    let mut sites = Vec::new();
    let mut gated = Vec::new();
    for &i in &selected {
        if !selection.in_main[i] {
            skipped.push((
                i,
                "inside the body of a control-flow node the engine runs as one op".to_owned(),
            ));
            continue;
        }
        let (a, j) = block_at(analysis, i);
        let (g, b) = (&a.graph, &a.detection.blocks[j]);
        let op = &g.node(b.merge).op;
        if op != "Add" && op != "Sum" {
            skipped.push((i, format!("the merge is {op}; only Add and Sum are gated")));
            continue;
        }
        let float = |v| matches!(g.value(v).fact.dtype, 0 | 1);
        if !float(b.shortcut.input) || !b.branch_inputs.iter().all(|&v| float(v)) {
            skipped.push((i, "the merge inputs are not float32".to_owned()));
            continue;
        }
        sites.push(Site {
            output: g.value(b.output).name.clone(),
            shortcut: g.value(b.shortcut.input).name.clone(),
            branch: b.branch_inputs.iter().map(|&v| g.value(v).name.clone()).collect(),
        });
        gated.push(i);
    }
    let gates = gate::insert(&mut model, &sites, ic.shortcuts && ic.knockout)?;
    let bytes = model.encode_to_vec();
    // A half-precision model runs in the form `run_precise` chooses, gates included.
    let half = half.map(|h| HalfModel { model, ..h });
    let names = gates.names();
    let mut settings = Vec::new();
    let mut labels: Vec<(usize, bool)> = Vec::new();
    let sides: &[bool] = if gates.shortcut.is_empty() { &[false] } else { &[false, true] };
    for &shortcut in sides {
        for (k, &block) in gated.iter().enumerate() {
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
    let (outcome, ran_as) = run_precise(half.as_ref(), source, dir, |s| {
        probe::run_gated(s, watches, input_plan, &plan, budget, &mut sink, progress)
    });
    let outcome = outcome.map(|r| Measured {
        intact: r.intact,
        not_measured: Vec::new(),
        influence: Some(InfluenceMeasured {
            knocked,
            knocked_shortcut,
            gated,
            shortcuts: !gates.shortcut.is_empty(),
            skipped,
            forward_passes: r.forward_passes,
            gain: r.gain,
            input_change: r.input_change,
        }),
    });
    Ok(Measurement { ran_as, outcome })
}

/// The analysis (the main graph's, or a body's) that holds block `i` of
/// the report (the main graph's blocks first, then each body's), and the
/// block's index in it.
fn block_at(analysis: &Analysis, i: usize) -> (&Analysis, usize) {
    let mut i = i;
    for a in std::iter::once(analysis).chain(analysis.bodies.iter().map(|b| &b.analysis)) {
        let n = a.detection.blocks.len();
        if i < n {
            return (a, i);
        }
        i -= n;
    }
    unreachable!("a block beyond the report's blocks")
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
pub fn classes_of(shape: Option<&Vec<usize>>) -> Option<usize> {
    shape.filter(|s| s.len() == 2 && s[1] >= 2).map(|s| s[1])
}

#[cfg(test)]
mod tests {
    use super::*;

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
