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
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::path::Path;

use tract_onnx::prelude::*;
use tract_onnx::tract_hir::infer::Factoid;

use crate::error::{Error, ErrorKind, Result};
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

/// Runs the model over every pass of `input_plan` and measures every watch.
pub fn run(
    source: ModelSource<'_>,
    watches: &[Watch],
    input_plan: &InputPlan,
    progress: &dyn Progress,
) -> Result<ProbeResult> {
    match catch_unwind(AssertUnwindSafe(|| run_inner(source, watches, input_plan, progress))) {
        Ok(r) => r,
        Err(panic) => {
            let what = panic
                .downcast_ref::<String>()
                .map(String::as_str)
                .or_else(|| panic.downcast_ref::<&str>().copied())
                .unwrap_or("unknown cause");
            Err(Error::new(
                ErrorKind::Probe,
                format!("the inference engine (tract) failed while running the model: {what}"),
            ))
        }
    }
}

fn tract_err(what: &str, e: &anyhow::Error) -> Error {
    let chain: Vec<String> = e.chain().map(|c| c.to_string()).collect();
    Error::new(ErrorKind::Probe, format!("{what}: {}", chain.join(": ")))
}

fn run_inner(
    source: ModelSource<'_>,
    watches: &[Watch],
    input_plan: &InputPlan,
    progress: &dyn Progress,
) -> Result<ProbeResult> {
    let mut prepared = prepare(source, watches, input_plan, &[], progress)?;
    progress.step("running", input_plan.passes as u64);
    let mut acc: Vec<BlockSamples> = vec![BlockSamples::default(); watches.len()];
    let mut outputs: Vec<Vec<f32>> = vec![Vec::new(); prepared.n_outputs];
    let mut output_shapes = Vec::new();
    for pass in 0..input_plan.passes {
        let values = inputs::values(input_plan, pass);
        let tensors = prepared.tensors(input_plan, &values, &[])?;
        let result = prepared.measure(watches, input_plan, tensors, &mut acc, None)?;
        output_shapes = collect_outputs(&result, &mut outputs);
        progress.advance();
    }
    progress.finish();
    Ok(ProbeResult { blocks: acc, outputs, output_shapes })
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

/// A model prepared once and run many times.
struct Prepared {
    state: tract_onnx::tract_core::model::TypedSimpleState,
    order: Vec<InputSlot>,
    watch_map: HashMap<(usize, usize), Roles>,
    source_roles: Vec<(usize, Roles)>,
    constant_roles: Vec<(TValue, Roles)>,
    n_outputs: usize,
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
    typed
        .select_output_outlets(&final_outs[..originals.len()])
        .map_err(|e| tract_err("tract", &e))?;
    let plan =
        typed.into_runnable().map_err(|e| tract_err("tract could not plan the model", &e))?;
    let state = tract_onnx::tract_core::plan::SimpleState::new(&plan)
        .map_err(|e| tract_err("tract", &e))?;
    progress.advance();
    Ok(Prepared {
        state,
        order,
        watch_map,
        source_roles,
        constant_roles,
        n_outputs: originals.len(),
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
        &mut self,
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
        let result = self.state.run_plan_with_eval(
            tensors,
            |ctx, op_state, node, ins| -> TractResult<TVec<TValue>> {
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
            },
        );
        result.map_err(|e| tract_err("tract failed while running the model", &e))
    }

    /// Runs the perturbed copy of a pass whose intact tensors are `held`, and
    /// records every block's changes into `acc`.
    fn compare(
        &mut self,
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
        let result = self.state.run_plan_with_eval(
            tensors,
            |ctx, op_state, node, ins| -> TractResult<TVec<TValue>> {
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
            },
        );
        result.map_err(|e| tract_err("tract failed while running the model", &e))?;
        Ok(())
    }

    /// Runs one pass without measuring anything.
    fn plain(&mut self, tensors: TVec<TValue>) -> Result<TVec<TValue>> {
        self.state.run(tensors).map_err(|e| tract_err("tract failed while running the model", &e))
    }
}

/// Appends the float outputs of one pass; returns their shapes.
fn collect_outputs(result: &TVec<TValue>, outputs: &mut [Vec<f32>]) -> Vec<Vec<usize>> {
    let mut shapes = Vec::with_capacity(result.len());
    for (i, t) in result.iter().enumerate() {
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
/// each setting's float outputs (flattened per output over all passes).
pub fn run_gated(
    source: ModelSource<'_>,
    watches: &[Watch],
    input_plan: &InputPlan,
    plan: &GatedPlan,
    sink: &mut OutputSink<'_>,
    progress: &dyn Progress,
) -> Result<GatedResult> {
    let inner =
        AssertUnwindSafe(|| run_gated_inner(source, watches, input_plan, plan, sink, progress));
    match catch_unwind(inner) {
        Ok(r) => r,
        Err(panic) => {
            let what = panic
                .downcast_ref::<String>()
                .map(String::as_str)
                .or_else(|| panic.downcast_ref::<&str>().copied())
                .unwrap_or("unknown cause");
            Err(Error::new(
                ErrorKind::Probe,
                format!("the inference engine (tract) failed while running the model: {what}"),
            ))
        }
    }
}

fn run_gated_inner(
    source: ModelSource<'_>,
    watches: &[Watch],
    input_plan: &InputPlan,
    plan: &GatedPlan,
    sink: &mut OutputSink<'_>,
    progress: &dyn Progress,
) -> Result<GatedResult> {
    let mut prepared = prepare(source, watches, input_plan, &plan.gates, progress)?;
    let per_pass = if plan.gain_step.is_some() { 2 } else { 1 };
    progress.step("running", (input_plan.passes * per_pass) as u64);
    let mut acc: Vec<BlockSamples> = vec![BlockSamples::default(); watches.len()];
    let mut outputs: Vec<Vec<f32>> = vec![Vec::new(); prepared.n_outputs];
    let mut output_shapes = Vec::new();
    let mut gain: Option<Vec<GainSamples>> =
        plan.gain_step.map(|_| vec![GainSamples::default(); watches.len()]);
    let mut input_change = Vec::new();
    let mut forward_passes = 0;
    for pass in 0..input_plan.passes {
        let values = inputs::values(input_plan, pass);
        let tensors = prepared.tensors(input_plan, &values, &[])?;
        let mut held: Option<Vec<Held>> =
            plan.gain_step.map(|_| watches.iter().map(Held::new).collect());
        let keep = held.as_mut().map(|h| h as &mut dyn Keep);
        let result = prepared.measure(watches, input_plan, tensors, &mut acc, keep)?;
        forward_passes += 1;
        output_shapes = collect_outputs(&result, &mut outputs);
        drop(result);
        progress.advance();
        if let (Some(step), Some(held), Some(gain)) = (plan.gain_step, held.as_mut(), gain.as_mut())
        {
            let moved = inputs::perturbed(input_plan, pass, &values, step);
            input_changes(&values, &moved, input_plan.pass_batch, &mut input_change);
            let tensors = prepared.tensors(input_plan, &moved, &[])?;
            prepared.compare(watches, input_plan, tensors, held, gain)?;
            forward_passes += 1;
            progress.advance();
        }
    }
    if !plan.settings.is_empty() {
        progress.step("knocking out", (plan.settings.len() * input_plan.passes) as u64);
        for (i, setting) in plan.settings.iter().enumerate() {
            let mut outs: Vec<Vec<f32>> = vec![Vec::new(); prepared.n_outputs];
            for pass in 0..input_plan.passes {
                let values = inputs::values(input_plan, pass);
                let tensors = prepared.tensors(input_plan, &values, setting)?;
                let result = prepared.plain(tensors)?;
                forward_passes += 1;
                collect_outputs(&result, &mut outs);
                progress.advance();
            }
            sink(i, &outputs, &output_shapes, outs);
        }
    }
    progress.finish();
    Ok(GatedResult {
        intact: ProbeResult { blocks: acc, outputs, output_shapes },
        gain,
        input_change,
        forward_passes,
    })
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
