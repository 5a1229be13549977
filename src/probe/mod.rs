//! Running the model on the CPU with tract and measuring every block as its
//! tensors appear. The only module that knows tract.
//!
//! The recipe (see DEVELOPERS.md): every watched tensor becomes an extra model
//! output before optimising, so the optimiser cannot fuse it away and output
//! position `i` stays a handle on watched tensor `i`; after optimising, the
//! outputs are reset to the model's own, so watched tensors are freed after
//! their last consumer as usual; the plan is run with an evaluation callback
//! that computes statistics on each watched tensor while it is hot and keeps
//! nothing but a reference to a merge input until the other one arrives.
//!
//! **Invariant:** memory stays near one plain forward pass: per block, at most
//! the shortcut and branch tensors are held, and only until both are seen.
//!
//! Half precision: float16 tensors are measured where they lie, each element
//! widened to `f32` as the kernels read it (`stats::Value`), with `f64`
//! accumulators; no float32 copy is made. Inputs are fed in the element type
//! tract parsed for them, so the same input plan runs a float16 model natively
//! or its float32 twin (`lower::precision`).

pub mod inputs;
pub mod paired;

use std::collections::HashMap;
use std::path::Path;

use tract_onnx::prelude::*;
use tract_onnx::tract_core::model::{TypedNode, TypedRunnableModel, TypedSimpleState};
use tract_onnx::tract_core::ops::OpState;
use tract_onnx::tract_core::ops::scan::OptScan;
use tract_onnx::tract_core::plan::{EvalContext, SimpleState};
use tract_onnx::tract_core::tract_linalg::multithread::{Executor, multithread_tract_scope};
use tract_onnx::tract_hir::infer::Factoid;

use crate::error::{Error, ErrorKind, Result};
use crate::parallel::{self, Budget, Merge};
use crate::stats;
use inputs::{InputPlan, Values};

/// The inference engine and its version, as reports name it.
pub const ENGINE: &str = "tract-onnx 0.23.9";

/// What to watch for one block, by ONNX tensor name.
#[derive(Debug, Clone)]
pub struct Watch {
    /// The block's input (the fork).
    pub fork: String,
    /// The merge input fed by the shortcut.
    pub shortcut: String,
    /// The merge inputs fed by the branch.
    pub branch: Vec<String>,
    /// The merge output.
    pub output: String,
    /// Where the channels are: axis 1 (convolutions) or the last axis.
    pub channels_first: bool,
    /// Whether to measure the fraction of outputs a ReLU after the merge zeroes.
    pub relu_after: bool,
}

/// Per-sample measurements of one block.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct BlockSamples {
    /// RMS of the fork tensor, per sample.
    pub fork_rms: Vec<f64>,
    /// RMS of the shortcut at the merge, per sample.
    pub shortcut_rms: Vec<f64>,
    /// RMS of the branch at the merge, per sample.
    pub branch_rms: Vec<f64>,
    /// RMS of the merge output, per sample.
    pub output_rms: Vec<f64>,
    /// Cosine of branch and shortcut, per sample (when shapes match and neither is zero).
    pub cosine: Vec<f64>,
    /// Fraction of merge outputs that are not positive, per sample (ReLU after the merge).
    pub zeroed: Vec<f64>,
    /// Sum over samples of the shortcut's per-channel sum of squares.
    pub channel_shortcut: Vec<f64>,
    /// Sum over samples of the branch's per-channel sum of squares.
    pub channel_branch: Vec<f64>,
    /// NaN values seen in the block's watched tensors.
    pub nan: u64,
    /// Infinite values seen in the block's watched tensors.
    pub inf: u64,
    /// The shape of the merge output in the first pass (empty until seen).
    pub output_shape: Vec<usize>,
    /// Largest |x| of the merge output, per sample.
    pub output_max: Vec<f64>,
    /// Largest |x| of the shortcut at the merge, per sample.
    pub shortcut_max: Vec<f64>,
    /// Largest |x| of the branch at the merge, per sample.
    pub branch_max: Vec<f64>,
    /// Fraction of the merge output's values float16 rounds to zero (nonzero
    /// values of magnitude at most 2^-25), per sample.
    pub f16_zero: Vec<f64>,
    /// Fraction of the merge output's values float16 keeps only as
    /// subnormals (2^-25 < |x| < 2^-14), per sample.
    pub f16_subnormal: Vec<f64>,
    /// Largest |x| of each channel of the merge output over all samples.
    pub channel_max: Vec<f64>,
}

/// The outcome of probing.
#[derive(Debug, Clone)]
pub struct ProbeResult {
    /// Measurements per watched block, in the order of the watches.
    pub blocks: Vec<BlockSamples>,
    /// The final outputs of every pass, flattened per output (float outputs only).
    pub outputs: Vec<Vec<f32>>,
    /// The shape of each output in one pass.
    pub output_shapes: Vec<Vec<usize>>,
}

/// Reports progress of long steps; the command line draws a bar.
pub trait Progress {
    /// A step starts (`preparing the model`, `running`).
    fn step(&self, message: &str, total: u64);
    /// One unit of the current step is done.
    fn advance(&self);
    /// All done.
    fn finish(&self);
}

/// A [`Progress`] that reports nothing.
pub struct Silent;

impl Progress for Silent {
    fn step(&self, _: &str, _: u64) {}
    fn advance(&self) {}
    fn finish(&self) {}
}

/// Where tract reads the model from.
#[derive(Clone, Copy)]
pub enum ModelSource<'a> {
    /// A file; external data resolves against its folder.
    Path(&'a Path),
    /// Encoded bytes (no external data).
    Bytes(&'a [u8]),
    /// Encoded bytes of a model whose external data resolves against a folder.
    BytesIn(&'a [u8], &'a Path),
}

#[derive(Debug, Clone, Copy)]
enum Role {
    Fork,
    Shortcut,
    Branch(usize),
    Output,
}

/// Runs the model over every pass of `input_plan` and measures every watch,
/// passes on as many threads as `budget` allows; the statistics of the
/// passes are merged in pass order, so the result does not depend on it.
pub fn run(
    source: ModelSource<'_>,
    watches: &[Watch],
    input_plan: &InputPlan,
    budget: &Budget,
    progress: &dyn Progress,
) -> Result<ProbeResult> {
    parallel::guarded(|| run_inner(source, watches, input_plan, budget, progress), engine_panic)
}

/// Runs a small model (no watches) once on the first pass of the plan's
/// values for the inputs it declares, and returns its first output as
/// numbers: how `control` learns which branch an `If` takes.
pub fn evaluate(source: ModelSource<'_>, input_plan: &InputPlan) -> Result<Vec<f64>> {
    let go = || -> Result<Vec<f64>> {
        let prepared = prepare(source, &[], input_plan, &[], &Silent)?;
        let mut runner = Runner::new(&prepared, 1)?;
        let values = inputs::values(input_plan, 0);
        let tensors = prepared.tensors(input_plan, &values, &[])?;
        let out = prepared.plain(&mut runner, tensors)?;
        let first =
            out.first().ok_or_else(|| Error::new(ErrorKind::Probe, "the model has no output"))?;
        let cast = first.cast_to::<f64>().map_err(|e| tract_err("tract", &e))?;
        let view = cast.try_as_plain_ram().map_err(|e| tract_err("tract", &e))?;
        Ok(view.as_slice::<f64>().map_err(|e| tract_err("tract", &e))?.to_vec())
    };
    parallel::guarded(go, engine_panic)
}

fn tract_err(what: &str, e: &anyhow::Error) -> Error {
    let chain: Vec<String> = e.chain().map(|c| c.to_string()).collect();
    Error::new(ErrorKind::Probe, format!("{what}: {}", chain.join(": ")))
}

fn run_inner(
    source: ModelSource<'_>,
    watches: &[Watch],
    input_plan: &InputPlan,
    budget: &Budget,
    progress: &dyn Progress,
) -> Result<ProbeResult> {
    let prepared = prepare(source, watches, input_plan, &[], progress)?;
    progress.step("running", input_plan.passes as u64);
    let layout = Layout::of(budget, input_plan.passes, prepared.pass_bytes);
    let mut total = ProbeResult::empty(watches.len(), prepared.n_outputs);
    parallel::ordered(
        input_plan.passes,
        layout.workers,
        &|| Runner::new(&prepared, layout.kernel_threads),
        &|runner: &mut Runner, pass| {
            let values = inputs::values(input_plan, pass);
            let tensors = prepared.tensors(input_plan, &values, &[])?;
            let mut pass_result = ProbeResult::empty(watches.len(), prepared.n_outputs);
            let result = prepared.measure(
                runner,
                watches,
                input_plan,
                tensors,
                &mut pass_result.blocks,
                None,
            )?;
            pass_result.output_shapes = collect_outputs(&result, &mut pass_result.outputs);
            Ok(pass_result)
        },
        &engine_panic,
        &mut |_, pass_result| {
            total.merge(pass_result);
            Ok(())
        },
        &mut |_| progress.advance(),
    )?;
    progress.finish();
    Ok(total)
}

/// A panic inside tract, as an error.
pub(crate) fn engine_panic(what: String) -> Error {
    Error::new(
        ErrorKind::Probe,
        format!("the inference engine (tract) failed while running the model: {what}"),
    )
}

impl ProbeResult {
    /// Nothing measured yet: `blocks` empty accumulators, `outputs` empty outputs.
    fn empty(blocks: usize, outputs: usize) -> ProbeResult {
        ProbeResult {
            blocks: vec![BlockSamples::default(); blocks],
            outputs: vec![Vec::new(); outputs],
            output_shapes: Vec::new(),
        }
    }
}

impl Merge for ProbeResult {
    /// Block by block and output by output; the shapes of one pass are the
    /// later pass's.
    fn merge(&mut self, later: ProbeResult) {
        let ProbeResult { blocks, outputs, output_shapes } = later;
        merge_each(&mut self.blocks, blocks);
        merge_each(&mut self.outputs, outputs);
        self.output_shapes = output_shapes;
    }
}

impl Merge for BlockSamples {
    /// Per-sample values append, sums add, the shape is the first pass's.
    /// Every field is named here, so a new one cannot be forgotten.
    fn merge(&mut self, later: BlockSamples) {
        let BlockSamples {
            fork_rms,
            shortcut_rms,
            branch_rms,
            output_rms,
            cosine,
            zeroed,
            channel_shortcut,
            channel_branch,
            nan,
            inf,
            output_shape,
            output_max,
            shortcut_max,
            branch_max,
            f16_zero,
            f16_subnormal,
            channel_max,
        } = later;
        self.fork_rms.merge(fork_rms);
        self.shortcut_rms.merge(shortcut_rms);
        self.branch_rms.merge(branch_rms);
        self.output_rms.merge(output_rms);
        self.cosine.merge(cosine);
        self.zeroed.merge(zeroed);
        add_sums(&mut self.channel_shortcut, channel_shortcut);
        add_sums(&mut self.channel_branch, channel_branch);
        self.nan += nan;
        self.inf += inf;
        self.output_max.merge(output_max);
        self.shortcut_max.merge(shortcut_max);
        self.branch_max.merge(branch_max);
        self.f16_zero.merge(f16_zero);
        self.f16_subnormal.merge(f16_subnormal);
        if self.channel_max.len() < channel_max.len() {
            self.channel_max.resize(channel_max.len(), 0.0);
        }
        for (a, m) in self.channel_max.iter_mut().zip(channel_max) {
            *a = a.max(m);
        }
        if self.output_shape.is_empty() {
            self.output_shape = output_shape;
        }
    }
}

impl Merge for GainSamples {
    /// Per-sample values append.
    fn merge(&mut self, later: GainSamples) {
        let GainSamples { fork, shortcut, branch, output } = later;
        self.fork.merge(fork);
        self.shortcut.merge(shortcut);
        self.branch.merge(branch);
        self.output.merge(output);
    }
}

/// Merges `later[i]` into `acc[i]` for every `i`.
fn merge_each<T: Merge>(acc: &mut [T], later: Vec<T>) {
    for (a, b) in acc.iter_mut().zip(later) {
        a.merge(b);
    }
}

/// Adds per-channel sums; an empty side takes the other's.
fn add_sums(acc: &mut Vec<f64>, later: Vec<f64>) {
    if acc.len() != later.len() {
        if acc.is_empty() {
            *acc = later;
        }
        return;
    }
    for (a, b) in acc.iter_mut().zip(later) {
        *a += b;
    }
}

/// How a run spreads over its threads: passes at once (`workers`, each with
/// its own evaluation state of the one preparation) and threads inside each
/// pass (tract's multithreaded kernels). Chosen from the budget, the number
/// of passes and one pass's live activations; never changes a result.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Layout {
    /// Passes run at once.
    pub workers: usize,
    /// Threads of tract's kernels inside each pass.
    pub kernel_threads: usize,
}

impl Layout {
    /// Passes on separate threads first (as many as there are passes, the
    /// thread budget and the memory budget allow); the threads left over
    /// go to each pass's kernels (see DEVELOPERS.md, "Threads").
    /// `SHUNT_LAYOUT=WxK` forces `W` workers of `K` kernel threads each
    /// (for benchmarks; results do not depend on it).
    pub fn of(budget: &Budget, passes: usize, pass_bytes: u64) -> Layout {
        if let Some(forced) = forced_layout() {
            return forced;
        }
        let threads = budget.threads();
        let by_memory = (budget.memory() / pass_bytes.max(1)).clamp(1, usize::MAX as u64) as usize;
        let workers = threads.min(passes.max(1)).min(by_memory).max(1);
        Layout { workers, kernel_threads: (threads / workers).max(1) }
    }
}

fn forced_layout() -> Option<Layout> {
    let text = std::env::var("SHUNT_LAYOUT").ok()?;
    let (w, k) = text.split_once('x')?;
    let (workers, kernel_threads) = (w.trim().parse().ok()?, k.trim().parse().ok()?);
    (workers > 0 && kernel_threads > 0).then_some(Layout { workers, kernel_threads })
}

/// One thread's evaluation state of the shared preparation, with the
/// executor of tract's kernels on that thread.
pub(crate) struct Runner {
    state: TypedSimpleState,
    executor: Executor,
    /// The plan, kept when its ops carry state from one run to the next
    /// (a `Scan` keeps its recurrent state for streaming use), so that each
    /// pass starts from a fresh state, as its first did.
    stateful: Option<Arc<TypedRunnableModel>>,
}

impl Runner {
    fn new(prepared: &Prepared, kernel_threads: usize) -> Result<Runner> {
        let state = SimpleState::new(&prepared.plan).map_err(|e| tract_err("tract", &e))?;
        let executor = if kernel_threads > 1 {
            Executor::multithread_with_name(kernel_threads, "shunt-kernels")
        } else {
            Executor::SingleThread
        };
        let carries_state = prepared.plan.model().nodes.iter().any(|n| n.op_is::<OptScan>());
        Ok(Runner { state, executor, stateful: carries_state.then(|| prepared.plan.clone()) })
    }

    /// One pass with `eval` called on every node, on this runner's executor.
    fn run_with<Eval>(&mut self, tensors: TVec<TValue>, eval: Eval) -> TractResult<TVec<TValue>>
    where
        Eval: for<'a, 'b, 'c> FnMut(
            &'a EvalContext<'a>,
            Option<&'b mut (dyn OpState + 'static)>,
            &'c TypedNode,
            TVec<TValue>,
        ) -> TractResult<TVec<TValue>>,
    {
        if let Some(plan) = &self.stateful {
            self.state = SimpleState::new(plan)?;
        }
        let state = &mut self.state;
        multithread_tract_scope(self.executor.clone(), || state.run_plan_with_eval(tensors, eval))
    }
}

/// Where the value of one tract input comes from.
#[derive(Debug, Clone, Copy)]
enum InputSlot {
    /// Input `i` of the input plan, as a tensor of this type.
    PlannedInput(usize, DatumType),
    /// Gate `k` of the gate list.
    Gate(usize),
}

type Roles = Vec<(usize, Role)>;

/// A model prepared once and run many times, on any number of threads
/// (each with its own [`Runner`]).
struct Prepared {
    plan: Arc<TypedRunnableModel>,
    order: Vec<InputSlot>,
    watch_map: HashMap<(usize, usize), Roles>,
    source_roles: Vec<(usize, Roles)>,
    constant_roles: Vec<(TValue, Roles)>,
    n_outputs: usize,
    /// The most bytes of activations one pass holds at once (estimated
    /// from the plan; see [`peak_live_bytes`]).
    pass_bytes: u64,
    /// The bytes of every watched tensor of one pass (what the gain holds
    /// through the perturbed pass).
    watched_bytes: u64,
}

fn prepare(
    source: ModelSource<'_>,
    watches: &[Watch],
    input_plan: &InputPlan,
    gates: &[String],
    progress: &dyn Progress,
) -> Result<Prepared> {
    progress.step("preparing the model", 1);
    // value_info may name a symbolic batch that the concrete input facts
    // contradict; tract infers every shape itself.
    let onnx = tract_onnx::onnx().with_ignore_value_info(true);
    let (proto, dir) = match source {
        ModelSource::Path(p) => {
            let proto = onnx
                .proto_model_for_path(p)
                .map_err(|e| tract_err("tract could not read the model", &e))?;
            let dir = p.parent().map(|d| if d.as_os_str().is_empty() { Path::new(".") } else { d });
            (proto, dir.and_then(|d| d.to_str()).map(str::to_owned))
        }
        ModelSource::Bytes(b) => {
            let proto = onnx
                .proto_model_for_read(&mut &b[..])
                .map_err(|e| tract_err("tract could not read the model", &e))?;
            (proto, None)
        }
        ModelSource::BytesIn(b, dir) => {
            let proto = onnx
                .proto_model_for_read(&mut &b[..])
                .map_err(|e| tract_err("tract could not read the model", &e))?;
            let dir = if dir.as_os_str().is_empty() { Path::new(".") } else { dir };
            (proto, dir.to_str().map(str::to_owned))
        }
    };
    let parsed = onnx
        .parse(&proto, dir.as_deref())
        .map_err(|e| tract_err("tract could not load the model", &e))?;
    drop(proto);
    if !parsed.unresolved_inputs.is_empty() {
        return Err(Error::new(
            ErrorKind::Probe,
            format!("tract could not resolve inputs: {}", parsed.unresolved_inputs.join(", ")),
        ));
    }
    let mut model = parsed.model;

    // Concrete input facts for one pass; gates are scalars.
    let input_outlets = model.input_outlets().map_err(|e| tract_err("tract", &e))?.to_vec();
    let mut order = Vec::with_capacity(input_outlets.len());
    for (i, outlet) in input_outlets.iter().enumerate() {
        let name = model.node(outlet.node).name.clone();
        if let Some(k) = gates.iter().position(|g| *g == name) {
            model
                .set_input_fact(i, InferenceFact::dt_shape(f32::datum_type(), Vec::<usize>::new()))
                .map_err(|e| tract_err(&format!("tract rejects the gate '{name}'"), &e))?;
            order.push(InputSlot::Gate(k));
            continue;
        }
        let fed = input_plan.inputs.iter().position(|f| f.name == name).ok_or_else(|| {
            Error::new(
                ErrorKind::Probe,
                format!("tract sees an input '{name}' the graph does not declare"),
            )
        })?;
        let shape: Vec<usize> =
            input_plan.inputs[fed].pass_shape.iter().map(|&d| d as usize).collect();
        // A half-precision input is fed as the model tract reads declares it:
        // float16 natively, float32 in a float32 twin.
        let parsed_dt = model.input_fact(i).ok().and_then(|f| f.datum_type.concretize());
        let dt = match (datum_type(&input_plan.inputs[fed]), parsed_dt) {
            (DatumType::F16, Some(DatumType::F32)) => DatumType::F32,
            (dt, _) => dt,
        };
        model
            .set_input_fact(i, InferenceFact::dt_shape(dt, shape))
            .map_err(|e| tract_err(&format!("tract rejects the shape of input '{name}'"), &e))?;
        order.push(InputSlot::PlannedInput(fed, dt));
    }

    // Protect watched tensors as extra outputs.
    let originals = model.output_outlets().map_err(|e| tract_err("tract", &e))?.to_vec();
    let mut names: Vec<(&str, usize, Role)> = Vec::new();
    for (b, w) in watches.iter().enumerate() {
        names.push((&w.fork, b, Role::Fork));
        names.push((&w.shortcut, b, Role::Shortcut));
        for (k, br) in w.branch.iter().enumerate() {
            names.push((br, b, Role::Branch(k)));
        }
        names.push((&w.output, b, Role::Output));
    }
    let mut outs = originals.clone();
    let mut roles_by_position: Vec<(usize, Role)> = Vec::new();
    for (name, b, role) in &names {
        let outlet = parsed.outlets_by_name.get(*name).ok_or_else(|| {
            Error::new(ErrorKind::Probe, format!("tract has no tensor named '{name}' to measure"))
        })?;
        outs.push(*outlet);
        roles_by_position.push((*b, *role));
    }
    model.select_output_outlets(&outs).map_err(|e| tract_err("tract", &e))?;
    let mut typed =
        model.into_optimized().map_err(|e| tract_err("tract could not prepare the model", &e))?;
    let final_outs = typed.output_outlets().map_err(|e| tract_err("tract", &e))?.to_vec();
    let mut watch_map: HashMap<(usize, usize), Roles> = HashMap::new();
    for (i, (b, role)) in roles_by_position.iter().enumerate() {
        let o = final_outs[originals.len() + i];
        watch_map.entry((o.node, o.slot)).or_default().push((*b, *role));
    }
    // Sources are not evaluated by the callback: watch them from the inputs.
    let mut source_roles: Vec<(usize, Roles)> = Vec::new();
    let typed_inputs = typed.input_outlets().map_err(|e| tract_err("tract", &e))?.to_vec();
    for (i, outlet) in typed_inputs.iter().enumerate() {
        if let Some(roles) = watch_map.remove(&(outlet.node, outlet.slot)) {
            source_roles.push((i, roles));
        }
    }
    // The optimiser may fold a watched tensor into a constant (a branch scaled
    // by zero): constants are not evaluated, so measure them once per pass.
    let mut constant_roles: Vec<(TValue, Roles)> = Vec::new();
    let outlets: Vec<(usize, usize)> = watch_map.keys().copied().collect();
    for key in outlets {
        let fact =
            typed.outlet_fact(OutletId::new(key.0, key.1)).map_err(|e| tract_err("tract", &e))?;
        if let Some(k) = fact.konst.clone() {
            let roles = watch_map.remove(&key).expect("key taken from the map");
            constant_roles.push((TValue::from_const(k), roles));
        }
    }
    // A deterministic order of constants (the map's order is not).
    constant_roles.sort_by_key(|(_, roles)| roles.first().map(|&(b, _)| b));
    let watched_bytes: u64 = watch_map
        .keys()
        .copied()
        .chain(source_roles.iter().map(|(i, _)| (typed_inputs[*i].node, typed_inputs[*i].slot)))
        .map(|(node, slot)| outlet_bytes(&typed, node, slot))
        .sum();
    // The model's own outputs again, so watched tensors are freed after their
    // last reader. A watched tensor the outputs no longer need (the optimiser
    // may compute the outputs from a rewritten copy, as it does for tensors
    // of one sample with 1x1 spatial size) would then not be computed at
    // all: it stays an output.
    let mut outputs = final_outs[..originals.len()].to_vec();
    let needed = ancestors(&typed, &outputs);
    let mut orphans: Vec<OutletId> = watch_map
        .keys()
        .filter(|(node, _)| !needed.contains(node))
        .map(|&(node, slot)| OutletId::new(node, slot))
        .collect();
    orphans.sort_by_key(|o| (o.node, o.slot));
    outputs.extend(orphans);
    typed.select_output_outlets(&outputs).map_err(|e| tract_err("tract", &e))?;
    let plan =
        typed.into_runnable().map_err(|e| tract_err("tract could not plan the model", &e))?;
    let pass_bytes = peak_live_bytes(&plan);
    progress.advance();
    Ok(Prepared {
        plan,
        order,
        watch_map,
        source_roles,
        constant_roles,
        n_outputs: originals.len(),
        pass_bytes,
        watched_bytes,
    })
}

impl Prepared {
    /// The tensors of one pass, in tract's input order, gates set to `gates`
    /// (missing gates are 1).
    fn tensors(
        &self,
        input_plan: &InputPlan,
        values: &[Values],
        gates: &[f32],
    ) -> Result<TVec<TValue>> {
        let mut tensors: TVec<TValue> = tvec![];
        for slot in &self.order {
            let t = match *slot {
                InputSlot::PlannedInput(fed, dt) => {
                    let shape: Vec<usize> =
                        input_plan.inputs[fed].pass_shape.iter().map(|&d| d as usize).collect();
                    to_tensor(&values[fed], &shape, dt).map_err(|e| tract_err("tract", &e))?
                }
                InputSlot::Gate(k) => tensor0(gates.get(k).copied().unwrap_or(1.0)),
            };
            tensors.push(t.into_tvalue());
        }
        Ok(tensors)
    }

    /// Runs one pass and measures every watch into `acc`; with `hold`, keeps
    /// a reference to every watched tensor of the pass (for the gain).
    fn measure(
        &self,
        runner: &mut Runner,
        watches: &[Watch],
        input_plan: &InputPlan,
        tensors: TVec<TValue>,
        acc: &mut [BlockSamples],
        mut hold: Option<&mut dyn Keep>,
    ) -> Result<TVec<TValue>> {
        let mut pending = Pending::new(watches);
        let batch = input_plan.pass_batch;
        for (i, roles) in &self.source_roles {
            for &(b, role) in roles {
                observe(
                    &mut acc[b],
                    &mut pending.slots[b],
                    &watches[b],
                    role,
                    &tensors[*i],
                    batch,
                )?;
                if let Some(h) = hold.as_deref_mut() {
                    h.keep(b, role, &tensors[*i])?;
                }
            }
        }
        for (konst, roles) in &self.constant_roles {
            let value = broadcast_batch(konst, batch).map_err(|e| tract_err("tract", &e))?;
            for &(b, role) in roles {
                observe(&mut acc[b], &mut pending.slots[b], &watches[b], role, &value, batch)?;
                if let Some(h) = hold.as_deref_mut() {
                    h.keep(b, role, &value)?;
                }
            }
        }
        let watch_map = &self.watch_map;
        let result =
            runner.run_with(tensors, |ctx, op_state, node, ins| -> TractResult<TVec<TValue>> {
                let out = tract_onnx::tract_core::plan::eval(ctx, op_state, node, ins)?;
                for (slot, value) in out.iter().enumerate() {
                    if let Some(roles) = watch_map.get(&(node.id, slot)) {
                        for &(b, role) in roles {
                            observe(
                                &mut acc[b],
                                &mut pending.slots[b],
                                &watches[b],
                                role,
                                value,
                                batch,
                            )
                            .map_err(|e| anyhow::anyhow!("{e}"))?;
                            if let Some(h) = hold.as_deref_mut() {
                                h.keep(b, role, value).map_err(|e| anyhow::anyhow!("{e}"))?;
                            }
                        }
                    }
                }
                Ok(out)
            });
        result.map_err(|e| tract_err("tract failed while running the model", &e))
    }

    /// Runs the perturbed copy of a pass whose intact tensors are `held`, and
    /// records every block's changes into `acc`.
    fn compare(
        &self,
        runner: &mut Runner,
        watches: &[Watch],
        input_plan: &InputPlan,
        tensors: TVec<TValue>,
        held: &mut [Held],
        acc: &mut [GainSamples],
    ) -> Result<()> {
        let batch = input_plan.pass_batch;
        let mut now: Vec<Held> = watches.iter().map(Held::new).collect();
        for (i, roles) in &self.source_roles {
            for &(b, role) in roles {
                now[b].keep(role, &tensors[*i]);
                changes(&mut acc[b], &mut held[b], &mut now[b], batch)?;
            }
        }
        for (konst, roles) in &self.constant_roles {
            let value = broadcast_batch(konst, batch).map_err(|e| tract_err("tract", &e))?;
            for &(b, role) in roles {
                now[b].keep(role, &value);
                changes(&mut acc[b], &mut held[b], &mut now[b], batch)?;
            }
        }
        let watch_map = &self.watch_map;
        let result =
            runner.run_with(tensors, |ctx, op_state, node, ins| -> TractResult<TVec<TValue>> {
                let out = tract_onnx::tract_core::plan::eval(ctx, op_state, node, ins)?;
                for (slot, value) in out.iter().enumerate() {
                    if let Some(roles) = watch_map.get(&(node.id, slot)) {
                        for &(b, role) in roles {
                            now[b].keep(role, value);
                            changes(&mut acc[b], &mut held[b], &mut now[b], batch)
                                .map_err(|e| anyhow::anyhow!("{e}"))?;
                        }
                    }
                }
                Ok(out)
            });
        result.map_err(|e| tract_err("tract failed while running the model", &e))?;
        Ok(())
    }

    /// Runs one pass without measuring anything.
    fn plain(&self, runner: &mut Runner, tensors: TVec<TValue>) -> Result<TVec<TValue>> {
        runner
            .run_with(tensors, tract_onnx::tract_core::plan::eval)
            .map_err(|e| tract_err("tract failed while running the model", &e))
    }
}

/// The nodes the outlets `outputs` are computed from (themselves included).
fn ancestors(model: &TypedModel, outputs: &[OutletId]) -> std::collections::HashSet<usize> {
    let mut seen = std::collections::HashSet::new();
    let mut todo: Vec<usize> = outputs.iter().map(|o| o.node).collect();
    while let Some(node) = todo.pop() {
        if seen.insert(node) {
            todo.extend(model.node(node).inputs.iter().map(|i| i.node));
        }
    }
    seen
}

/// The bytes of one outlet's tensor, when its shape is known (else 0).
fn outlet_bytes(model: &TypedModel, node: usize, slot: usize) -> u64 {
    let fact = &model.node(node).outputs[slot].fact;
    fact.shape
        .as_concrete()
        .map_or(0, |dims| dims.iter().product::<usize>() as u64 * fact.datum_type.size_of() as u64)
}

/// The most bytes of activations alive at once while the plan runs: tract
/// keeps a node's outputs from the step that computes them to the last step
/// that reads them (the model's outputs to the end), and a node's inputs
/// stay alive while it computes. Constants are not counted (they are shared
/// by every pass); neither is the scratch space inside an op.
fn peak_live_bytes(plan: &TypedRunnableModel) -> u64 {
    let model = plan.model();
    let order = plan.order_without_consts();
    let step_of: HashMap<usize, usize> = order.iter().enumerate().map(|(s, &n)| (n, s)).collect();
    let mut last_use: HashMap<usize, usize> = HashMap::new();
    for (step, &n) in order.iter().enumerate() {
        for input in &model.node(n).inputs {
            if step_of.contains_key(&input.node) {
                let last = last_use.entry(input.node).or_insert(step);
                *last = (*last).max(step);
            }
        }
    }
    for output in model.output_outlets().into_iter().flatten() {
        last_use.insert(output.node, usize::MAX);
    }
    let bytes = |n: usize| -> u64 {
        (0..model.node(n).outputs.len()).map(|slot| outlet_bytes(model, n, slot)).sum()
    };
    let mut freed_at: HashMap<usize, Vec<usize>> = HashMap::new();
    for (&n, &step) in &last_use {
        freed_at.entry(step).or_default().push(n);
    }
    let (mut live, mut peak) = (0u64, 0u64);
    for (step, &n) in order.iter().enumerate() {
        live += bytes(n);
        peak = peak.max(live);
        // A node nothing reads is dropped right away.
        if !last_use.contains_key(&n) {
            live -= bytes(n);
        }
        for &done in freed_at.get(&step).into_iter().flatten() {
            live -= bytes(done);
        }
    }
    peak
}

/// Appends the float outputs of one pass (the model's own, not the watched
/// tensors kept as outputs after them); returns their shapes.
fn collect_outputs(result: &TVec<TValue>, outputs: &mut [Vec<f32>]) -> Vec<Vec<usize>> {
    let mut shapes = Vec::with_capacity(outputs.len());
    for (i, t) in result.iter().take(outputs.len()).enumerate() {
        shapes.push(t.shape().to_vec());
        if let Ok(f) = t.cast_to::<f32>()
            && let Ok(view) = f.try_as_plain_ram()
            && let Ok(s) = view.as_slice::<f32>()
        {
            outputs[i].extend_from_slice(s);
        }
    }
    shapes
}

/// What keeps watched tensors of a pass beyond their measurement: the
/// gain's intact pass, or the paired runs of a comparison.
trait Keep {
    /// Block `b`'s tensor in `role` has been produced.
    fn keep(&mut self, b: usize, role: Role, value: &TValue) -> Result<()>;
}

impl Keep for Vec<Held> {
    fn keep(&mut self, b: usize, role: Role, value: &TValue) -> Result<()> {
        self[b].keep(role, value);
        Ok(())
    }
}

/// Watched tensors of one block in one pass, held for the gain.
#[derive(Default)]
struct Held {
    fork: Option<TValue>,
    shortcut: Option<TValue>,
    branch: Vec<Option<TValue>>,
    output: Option<TValue>,
}

impl Held {
    fn new(w: &Watch) -> Held {
        Held { branch: vec![None; w.branch.len()], ..Held::default() }
    }

    fn keep(&mut self, role: Role, value: &TValue) {
        let v = Some(value.clone());
        match role {
            Role::Fork => self.fork = v,
            Role::Shortcut => self.shortcut = v,
            Role::Branch(k) => self.branch[k] = v,
            Role::Output => self.output = v,
        }
    }

    fn complete(&self) -> bool {
        self.fork.is_some()
            && self.shortcut.is_some()
            && self.output.is_some()
            && self.branch.iter().all(Option::is_some)
    }
}

/// Per-sample RMS of the change between two tensors of one block's role.
fn delta_rms(a: &TValue, b: &TValue, batch: usize) -> Result<Option<Vec<f64>>> {
    let (sa, x) = floats(a)?;
    let (sb, y) = floats(b)?;
    if sa != sb {
        return Ok(None);
    }
    Ok(Some(
        samples(&x, batch).zip(samples(&y, batch)).map(|(p, q)| stats::rms_diff(p, q)).collect(),
    ))
}

/// Once both the intact and the perturbed tensors of a block are complete,
/// records the changes and drops both.
fn changes(acc: &mut GainSamples, intact: &mut Held, now: &mut Held, batch: usize) -> Result<()> {
    if !now.complete() || !intact.complete() {
        return Ok(());
    }
    let pick = |h: &Option<TValue>| h.clone().expect("complete");
    if let Some(d) = delta_rms(&pick(&intact.fork), &pick(&now.fork), batch)? {
        acc.fork.extend(d);
    }
    if let Some(d) = delta_rms(&pick(&intact.shortcut), &pick(&now.shortcut), batch)? {
        acc.shortcut.extend(d);
    }
    if let Some(d) = delta_rms(&pick(&intact.output), &pick(&now.output), batch)? {
        acc.output.extend(d);
    }
    // The branch's change, summed over its merge inputs.
    let mut sum: Option<Vec<f32>> = None;
    let mut shape = None;
    let mut same = true;
    for (c, p) in intact.branch.iter().zip(&now.branch) {
        let (sc, x) = floats(c.as_ref().expect("complete"))?;
        let (sp, y) = floats(p.as_ref().expect("complete"))?;
        same &= sc == sp && shape.as_ref().is_none_or(|s| *s == sc);
        if !same {
            break;
        }
        shape = Some(sc);
        let s = sum.get_or_insert_with(|| vec![0.0; x.len()]);
        for ((s, a), b) in s.iter_mut().zip(x.iter()).zip(y.iter()) {
            *s += b - a;
        }
    }
    if same && let Some(s) = sum {
        acc.branch.extend(samples(&s, batch).map(stats::rms));
    }
    *intact = Held { branch: vec![None; intact.branch.len()], ..Held::default() };
    *now = Held { branch: vec![None; now.branch.len()], ..Held::default() };
    Ok(())
}

/// Per-sample RMS of the changes of one block between an intact pass and its
/// perturbed copy.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct GainSamples {
    /// Change of the block input (the fork).
    pub fork: Vec<f64>,
    /// Change of the shortcut at the merge.
    pub shortcut: Vec<f64>,
    /// Change of the branch at the merge (summed over its merge inputs).
    pub branch: Vec<f64>,
    /// Change of the merge output.
    pub output: Vec<f64>,
}

/// Per-sample RMS of the change of the model input (all float inputs of a
/// sample taken together).
fn input_changes(intact: &[Values], perturbed: &[Values], batch: usize, out: &mut Vec<f64>) {
    let mut ss: Vec<f64> = vec![0.0; batch.max(1)];
    let mut n: Vec<usize> = vec![0; batch.max(1)];
    for (a, b) in intact.iter().zip(perturbed) {
        if let (Values::F32(x), Values::F32(y)) = (a, b) {
            for (i, (p, q)) in samples(x, batch).zip(samples(y, batch)).enumerate() {
                if i < ss.len() {
                    let r = stats::rms_diff(p, q);
                    ss[i] += r * r * p.len() as f64;
                    n[i] += p.len();
                }
            }
        }
    }
    out.extend(ss.iter().zip(&n).filter(|(_, n)| **n > 0).map(|(s, &n)| (s / n as f64).sqrt()));
}

/// Receives the outputs of knockout setting `i`: `(i, intact outputs,
/// output shapes of one pass, this setting's outputs)`, outputs flattened per
/// output over all passes.
pub type OutputSink<'a> = dyn FnMut(usize, &[Vec<f32>], &[Vec<usize>], Vec<Vec<f32>>) + 'a;

/// What a gated run does besides the intact measurement.
#[derive(Debug, Clone, Default)]
pub struct GatedPlan {
    /// Names of the gate inputs in the model.
    pub gates: Vec<String>,
    /// Gate values of each knockout run (a missing value is 1).
    pub settings: Vec<Vec<f32>>,
    /// Relative step of the perturbation, when the gain is measured.
    pub gain_step: Option<f32>,
}

/// The outcome of a gated run.
#[derive(Debug, Clone)]
pub struct GatedResult {
    /// The intact run, measured as [`run`] measures it.
    pub intact: ProbeResult,
    /// Per-block changes under the perturbation, when asked for.
    pub gain: Option<Vec<GainSamples>>,
    /// Per-sample RMS of the change of the model input.
    pub input_change: Vec<f64>,
    /// Forward passes run in all.
    pub forward_passes: usize,
}

/// Prepares the (gated) model once, runs the intact passes with every gate
/// at 1 and measures every watch, then (optionally) a perturbed copy of
/// every pass, then every knockout setting over all passes; `sink` receives
/// each setting's float outputs (flattened per output over all passes), in
/// setting order. Passes and knockout runs spread over the threads `budget`
/// allows; results are merged in order, so they do not depend on it.
pub fn run_gated(
    source: ModelSource<'_>,
    watches: &[Watch],
    input_plan: &InputPlan,
    plan: &GatedPlan,
    budget: &Budget,
    sink: &mut OutputSink<'_>,
    progress: &dyn Progress,
) -> Result<GatedResult> {
    parallel::guarded(
        || run_gated_inner(source, watches, input_plan, plan, budget, sink, progress),
        engine_panic,
    )
}

fn run_gated_inner(
    source: ModelSource<'_>,
    watches: &[Watch],
    input_plan: &InputPlan,
    plan: &GatedPlan,
    budget: &Budget,
    sink: &mut OutputSink<'_>,
    progress: &dyn Progress,
) -> Result<GatedResult> {
    let prepared = prepare(source, watches, input_plan, &plan.gates, progress)?;
    let per_pass = if plan.gain_step.is_some() { 2 } else { 1 };
    progress.step("running", (input_plan.passes * per_pass) as u64);
    // The gain holds every watched tensor of the intact pass through the
    // perturbed one.
    let held = if plan.gain_step.is_some() { prepared.watched_bytes } else { 0 };
    let layout = Layout::of(budget, input_plan.passes, prepared.pass_bytes + held);
    let mut total = GatedPass {
        intact: ProbeResult::empty(watches.len(), prepared.n_outputs),
        gain: plan.gain_step.map(|_| vec![GainSamples::default(); watches.len()]),
        input_change: Vec::new(),
    };
    parallel::ordered(
        input_plan.passes,
        layout.workers,
        &|| Runner::new(&prepared, layout.kernel_threads),
        &|runner: &mut Runner, pass| {
            gated_pass(&prepared, runner, watches, input_plan, plan.gain_step, pass)
        },
        &engine_panic,
        &mut |_, pass_result| {
            total.merge(pass_result);
            Ok(())
        },
        &mut |_| (0..per_pass).for_each(|_| progress.advance()),
    )?;
    let mut forward_passes = input_plan.passes * per_pass;
    let GatedPass { intact, gain, input_change } = total;
    if !plan.settings.is_empty() {
        let passes = input_plan.passes;
        progress.step("knocking out", (plan.settings.len() * passes) as u64);
        let layout = Layout::of(budget, plan.settings.len() * passes, prepared.pass_bytes);
        // Item `i` is pass `i % passes` of setting `i / passes`; a setting's
        // outputs go to the sink once its last pass is in.
        let mut outs: Vec<Vec<f32>> = vec![Vec::new(); prepared.n_outputs];
        parallel::ordered(
            plan.settings.len() * passes,
            layout.workers,
            &|| Runner::new(&prepared, layout.kernel_threads),
            &|runner: &mut Runner, item| {
                let (setting, pass) = (item / passes, item % passes);
                let values = inputs::values(input_plan, pass);
                let tensors = prepared.tensors(input_plan, &values, &plan.settings[setting])?;
                let result = prepared.plain(runner, tensors)?;
                let mut pass_outs: Vec<Vec<f32>> = vec![Vec::new(); prepared.n_outputs];
                collect_outputs(&result, &mut pass_outs);
                Ok(pass_outs)
            },
            &engine_panic,
            &mut |item, pass_outs| {
                merge_each(&mut outs, pass_outs);
                if item % passes == passes - 1 {
                    let fresh = vec![Vec::new(); prepared.n_outputs];
                    let done = std::mem::replace(&mut outs, fresh);
                    sink(item / passes, &intact.outputs, &intact.output_shapes, done);
                }
                Ok(())
            },
            &mut |_| progress.advance(),
        )?;
        forward_passes += plan.settings.len() * passes;
    }
    progress.finish();
    Ok(GatedResult { intact, gain, input_change, forward_passes })
}

/// What one pass of a gated run measures: the intact pass, and with the
/// gain its perturbed copy.
struct GatedPass {
    intact: ProbeResult,
    gain: Option<Vec<GainSamples>>,
    input_change: Vec<f64>,
}

impl Merge for GatedPass {
    fn merge(&mut self, later: GatedPass) {
        let GatedPass { intact, gain, input_change } = later;
        self.intact.merge(intact);
        if let (Some(acc), Some(gain)) = (self.gain.as_mut(), gain) {
            merge_each(acc, gain);
        }
        self.input_change.merge(input_change);
    }
}

/// Pass `pass` of a gated run with every gate at 1, measured; then, with a
/// gain step, its perturbed copy compared with it.
fn gated_pass(
    prepared: &Prepared,
    runner: &mut Runner,
    watches: &[Watch],
    input_plan: &InputPlan,
    gain_step: Option<f32>,
    pass: usize,
) -> Result<GatedPass> {
    let values = inputs::values(input_plan, pass);
    let tensors = prepared.tensors(input_plan, &values, &[])?;
    let mut held: Option<Vec<Held>> = gain_step.map(|_| watches.iter().map(Held::new).collect());
    let mut intact = ProbeResult::empty(watches.len(), prepared.n_outputs);
    let result = prepared.measure(
        runner,
        watches,
        input_plan,
        tensors,
        &mut intact.blocks,
        held.as_mut().map(|h| h as &mut dyn Keep),
    )?;
    intact.output_shapes = collect_outputs(&result, &mut intact.outputs);
    drop(result);
    let mut out = GatedPass { intact, gain: None, input_change: Vec::new() };
    if let (Some(step), Some(held)) = (gain_step, held.as_mut()) {
        let moved = inputs::perturbed(input_plan, pass, &values, step);
        input_changes(&values, &moved, input_plan.pass_batch, &mut out.input_change);
        let tensors = prepared.tensors(input_plan, &moved, &[])?;
        let mut gain = vec![GainSamples::default(); watches.len()];
        prepared.compare(runner, watches, input_plan, tensors, held, &mut gain)?;
        out.gain = Some(gain);
    }
    Ok(out)
}

/// Merge inputs of one block held until both sides have been seen.
#[derive(Default)]
struct Slot {
    shortcut: Option<TValue>,
    branch: Vec<Option<TValue>>,
}

struct Pending {
    slots: Vec<Slot>,
}

impl Pending {
    fn new(watches: &[Watch]) -> Pending {
        Pending {
            slots: watches
                .iter()
                .map(|w| Slot { shortcut: None, branch: vec![None; w.branch.len()] })
                .collect(),
        }
    }
}

fn datum_type(fed: &inputs::PlannedInput) -> DatumType {
    use crate::proto::tensor_proto::DataType;
    match DataType::try_from(fed.dtype) {
        Ok(DataType::Int64) => i64::datum_type(),
        Ok(DataType::Int32) => i32::datum_type(),
        Ok(DataType::Bool) => bool::datum_type(),
        // tract 0.23.9 has no bfloat16: a bfloat16 model runs as a float32 twin.
        Ok(DataType::Float16) => f16::datum_type(),
        _ => f32::datum_type(),
    }
}

/// The tensor of one input in the type tract was told (`dt`): half-precision
/// values widen exactly to a float32 twin's input.
fn to_tensor(values: &Values, shape: &[usize], dt: DatumType) -> TractResult<Tensor> {
    match values {
        Values::F32(v) if dt == DatumType::F16 => {
            Tensor::from_shape(shape, &v.iter().map(|&x| f16::from_f32(x)).collect::<Vec<_>>())
        }
        Values::F32(v) => Tensor::from_shape(shape, v),
        Values::F16(v) if dt == DatumType::F16 => Tensor::from_shape(shape, v),
        Values::F16(v) => {
            Tensor::from_shape(shape, &v.iter().map(|x| x.to_f32()).collect::<Vec<_>>())
        }
        Values::BF16(v) => {
            Tensor::from_shape(shape, &v.iter().map(|x| x.to_f32()).collect::<Vec<_>>())
        }
        Values::I64(v) => Tensor::from_shape(shape, v),
        Values::I32(v) => Tensor::from_shape(shape, v),
        Values::Bool(v) => Tensor::from_shape(shape, v),
    }
}

impl stats::Value for f16 {
    #[inline(always)]
    fn f32(self) -> f32 {
        self.to_f32()
    }
}

/// A watched tensor's values: float32 and float16 read in place, anything
/// else cast to float32.
enum View<'a> {
    F32(&'a [f32]),
    F16(&'a [f16]),
    Owned(Vec<f32>),
}

/// Runs `$body` with `$x` bound to the view's slice, whatever its type.
macro_rules! with_view {
    ($view:expr, $x:ident => $body:expr) => {
        match $view {
            View::F32($x) => $body,
            View::F16($x) => $body,
            View::Owned(ref owned) => {
                let $x = &owned[..];
                $body
            }
        }
    };
}

/// A tensor's shape and values for measuring, without a copy when they are
/// float32 or float16.
fn view(t: &Tensor) -> Result<(Vec<usize>, View<'_>)> {
    let shape = t.shape().to_vec();
    let err = |e: anyhow::Error| {
        Error::new(ErrorKind::Probe, format!("a watched tensor cannot be read as float32: {e}"))
    };
    let dt = t.datum_type();
    if dt == f32::datum_type() || dt == f16::datum_type() {
        let plain = t.try_as_plain_ram().map_err(err)?;
        let v = if dt == f32::datum_type() {
            View::F32(plain.as_slice::<f32>().map_err(err)?)
        } else {
            View::F16(plain.as_slice::<f16>().map_err(err)?)
        };
        return Ok((shape, v));
    }
    let cast = t.cast_to::<f32>().map_err(err)?;
    let view = cast.try_as_plain_ram().map_err(err)?;
    Ok((shape, View::Owned(view.as_slice::<f32>().map_err(err)?.to_vec())))
}

/// A constant whose leading axis is not the batch (a folded tensor of shape
/// `[1, …]`), repeated along a new or its first axis so each sample sees it.
fn broadcast_batch(konst: &TValue, batch: usize) -> TractResult<TValue> {
    let shape = konst.shape().to_vec();
    if batch <= 1 || shape.first() == Some(&batch) {
        return Ok(konst.clone());
    }
    let mut one: Tensor = (**konst).clone();
    if shape.first() != Some(&1) {
        one.insert_axis(0)?;
    }
    let parts: Vec<Tensor> = (0..batch).map(|_| one.clone()).collect();
    Ok(Tensor::stack_tensors(0, &parts)?.into_tvalue())
}

/// A tensor's values as `f32`, and its shape.
fn floats(t: &Tensor) -> Result<(Vec<usize>, std::borrow::Cow<'_, [f32]>)> {
    let shape = t.shape().to_vec();
    let err = |e: anyhow::Error| {
        Error::new(ErrorKind::Probe, format!("a watched tensor cannot be read as float32: {e}"))
    };
    if t.datum_type() == f32::datum_type() {
        let view = t.try_as_plain_ram().map_err(err)?;
        let s = view.as_slice::<f32>().map_err(err)?;
        return Ok((shape, std::borrow::Cow::Borrowed(s)));
    }
    let cast = t.cast_to::<f32>().map_err(err)?;
    let view = cast.try_as_plain_ram().map_err(err)?;
    Ok((shape, std::borrow::Cow::Owned(view.as_slice::<f32>().map_err(err)?.to_vec())))
}

/// Splits `x` into per-sample slices when its length is a multiple of the
/// pass batch (the batch is the outermost axis in memory), else one slice.
fn samples<T>(x: &[T], batch: usize) -> std::slice::Chunks<'_, T> {
    let n = if batch > 0 && !x.is_empty() && x.len().is_multiple_of(batch) {
        x.len() / batch
    } else {
        x.len().max(1)
    };
    x.chunks(n)
}

fn observe(
    acc: &mut BlockSamples,
    slot: &mut Slot,
    w: &Watch,
    role: Role,
    value: &TValue,
    batch: usize,
) -> Result<()> {
    match role {
        Role::Fork => {
            let (_, v) = view(value)?;
            with_view!(v, x => acc.fork_rms.extend(samples(x, batch).map(stats::rms)));
        }
        Role::Output => {
            let (shape, v) = view(value)?;
            let (channels, inner) = channel_layout(&shape, w.channels_first);
            if acc.output_shape.is_empty() {
                acc.output_shape = shape;
            }
            with_view!(v, x => measure_output(acc, w, x, batch, channels, inner));
        }
        Role::Shortcut => {
            slot.shortcut = Some(value.clone());
            pair(acc, slot, w, batch)?;
        }
        Role::Branch(k) => {
            slot.branch[k] = Some(value.clone());
            pair(acc, slot, w, batch)?;
        }
    }
    Ok(())
}

/// Channels and the length of each channel's run in one sample laid out
/// `[outer, channels, inner]`: axis 1 or the last axis; `(0, 0)` below rank 2.
fn channel_layout(shape: &[usize], channels_first: bool) -> (usize, usize) {
    if shape.len() < 2 {
        return (0, 0);
    }
    let axis = if channels_first { 1 } else { shape.len() - 1 };
    (shape[axis], shape[axis + 1..].iter().product::<usize>())
}

/// The merge output: per sample its RMS, its range (largest |x|, what
/// float16 would lose, each channel's largest |x|) and, with a ReLU after
/// the merge, the fraction it zeroes; one pass per sample.
fn measure_output<T: stats::Value>(
    acc: &mut BlockSamples,
    w: &Watch,
    x: &[T],
    batch: usize,
    channels: usize,
    inner: usize,
) {
    let mut finite = true;
    let mut channel_max = vec![0f32; channels];
    for sample in samples(x, batch) {
        let r = stats::range_channels(sample, inner, &mut channel_max);
        finite &= r.sum_sq.is_finite();
        let n = sample.len().max(1) as f64;
        acc.output_rms.push(rms_of(r.sum_sq, sample.len()));
        acc.output_max.push(f64::from(r.max_abs));
        acc.f16_zero.push(r.f16_zero as f64 / n);
        acc.f16_subnormal.push(r.f16_subnormal as f64 / n);
        if w.relu_after {
            acc.zeroed.push(r.not_positive as f64 / n);
        }
    }
    if channels > 0 {
        if acc.channel_max.len() != channels {
            acc.channel_max = vec![0.0; channels];
        }
        for (a, m) in acc.channel_max.iter_mut().zip(channel_max) {
            *a = a.max(f64::from(m));
        }
    }
    if !finite {
        count_non_finite(acc, x);
    }
}

fn rms_of(sum_sq: f64, n: usize) -> f64 {
    if n == 0 { 0.0 } else { (sum_sq / n as f64).sqrt() }
}

fn count_non_finite<T: stats::Value>(acc: &mut BlockSamples, x: &[T]) {
    let (nan, inf) = stats::non_finite(x);
    acc.nan += nan;
    acc.inf += inf;
}

/// The branch at the merge: the one branch input (read in place), or the
/// sum of several (in float32).
fn branch_values(slot: &Slot) -> Result<(Vec<usize>, View<'_>)> {
    let mut inputs = slot.branch.iter().flatten();
    let first =
        inputs.next().ok_or_else(|| Error::new(ErrorKind::Probe, "a block without branch"))?;
    let (shape, x) = view(first)?;
    let mut sum: Option<Vec<f32>> = None;
    for b in inputs {
        let (_, y) = view(b)?;
        let acc = sum.get_or_insert_with(
            || with_view!(x, v => v.iter().map(|a| stats::Value::f32(*a)).collect()),
        );
        with_view!(y, y => {
            if y.len() == acc.len() {
                for (a, v) in acc.iter_mut().zip(y.iter()) {
                    *a += stats::Value::f32(*v);
                }
            }
        });
    }
    Ok(match sum {
        Some(v) => (shape, View::Owned(v)),
        None => (shape, x),
    })
}

/// Everything that needs the shortcut or the branch, in one pass over both
/// once both have been seen; the references are dropped afterwards.
fn pair(acc: &mut BlockSamples, slot: &mut Slot, w: &Watch, batch: usize) -> Result<()> {
    if slot.shortcut.is_none() || slot.branch.iter().any(Option::is_none) {
        return Ok(());
    }
    let sc_value = slot.shortcut.take().expect("checked above");
    let (sc_shape, sc) = view(&sc_value)?;
    let (shape, br) = branch_values(slot)?;
    let same = sc_shape == shape;
    with_view!(sc, a => with_view!(br, b => pair_measure(acc, w, batch, same, &shape, a, b)));
    for b in &mut slot.branch {
        *b = None;
    }
    Ok(())
}

/// [`pair`] on the values: per sample the shortcut and branch RMS, their
/// cosine and per-channel sums when the shapes agree, each side on its own
/// when the merge broadcasts.
fn pair_measure<A: stats::Value, B: stats::Value>(
    acc: &mut BlockSamples,
    w: &Watch,
    batch: usize,
    same_shape: bool,
    shape: &[usize],
    sc: &[A],
    br: &[B],
) {
    let mut finite = true;
    if sc.len() == br.len() && same_shape {
        // Per-channel sums of one sample laid out [outer, channels, inner].
        let (channels, inner) = channel_layout(shape, w.channels_first);
        if acc.channel_shortcut.len() != channels {
            acc.channel_shortcut = vec![0.0; channels];
            acc.channel_branch = vec![0.0; channels];
        }
        for (a, b) in samples(sc, batch).zip(samples(br, batch)) {
            let p =
                stats::pair_sums(a, b, inner, &mut acc.channel_shortcut, &mut acc.channel_branch);
            let (ss, bb, sb) = (p.aa, p.bb, p.ab);
            finite &= ss.is_finite() && bb.is_finite() && sb.is_finite();
            acc.shortcut_rms.push(rms_of(ss, a.len()));
            acc.branch_rms.push(rms_of(bb, b.len()));
            acc.shortcut_max.push(f64::from(p.max_a));
            acc.branch_max.push(f64::from(p.max_b));
            if ss > 0.0 && bb > 0.0 {
                acc.cosine.push((sb / (ss.sqrt() * bb.sqrt())).clamp(-1.0, 1.0));
            }
        }
    } else {
        // Broadcast merge: each side on its own, no cosine.
        for a in samples(sc, batch) {
            let r = stats::range(a);
            finite &= r.sum_sq.is_finite();
            acc.shortcut_rms.push(rms_of(r.sum_sq, a.len()));
            acc.shortcut_max.push(f64::from(r.max_abs));
        }
        for b in samples(br, batch) {
            let r = stats::range(b);
            finite &= r.sum_sq.is_finite();
            acc.branch_rms.push(rms_of(r.sum_sq, b.len()));
            acc.branch_max.push(f64::from(r.max_abs));
        }
    }
    if !finite {
        count_non_finite(acc, sc);
        count_non_finite(acc, br);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn layout_puts_passes_on_threads_first_then_kernels() {
        let budget = |threads, memory| Budget { threads: Some(threads), memory: Some(memory) };
        let layout = |workers, kernel_threads| Layout { workers, kernel_threads };
        // Enough passes: one per thread, single-threaded kernels.
        assert_eq!(Layout::of(&budget(4, 1 << 30), 8, 1 << 20), layout(4, 1));
        // One pass: every thread inside it.
        assert_eq!(Layout::of(&budget(4, 1 << 30), 1, 1 << 20), layout(1, 4));
        // Two passes on four threads: two at once, two kernel threads each.
        assert_eq!(Layout::of(&budget(4, 1 << 30), 2, 1 << 20), layout(2, 2));
        // Memory for three passes at once: three, the leftover thread unused.
        assert_eq!(Layout::of(&budget(4, 300), 8, 100), layout(3, 1));
        // A pass larger than the budget still runs, alone, with every thread.
        assert_eq!(Layout::of(&budget(4, 10), 8, 100), layout(1, 4));
    }

    #[test]
    fn merging_passes_appends_samples_and_adds_sums() {
        let pass = |x: f64| BlockSamples {
            fork_rms: vec![x],
            channel_shortcut: vec![x, 2.0 * x],
            channel_branch: vec![1.0, 1.0],
            nan: 1,
            output_shape: vec![x as usize],
            ..BlockSamples::default()
        };
        let mut total = BlockSamples::default();
        for x in [1.0, 2.0, 3.0] {
            total.merge(pass(x));
        }
        assert_eq!(total.fork_rms, [1.0, 2.0, 3.0]);
        assert_eq!(total.channel_shortcut, [6.0, 12.0]);
        assert_eq!(total.channel_branch, [3.0, 3.0]);
        assert_eq!((total.nan, total.output_shape), (3, vec![1]));
    }
}
