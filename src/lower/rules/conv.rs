//! Fused and blocked-layout convolutions (onnxruntime's `com.microsoft`
//! FusedConv, the `com.microsoft.nchwc` domain) and normalisations whose
//! statistics are computed in the graph.
//!
//! Sources for the semantics, cited beside each rule:
//! - [ORT-CONTRIB]: onnxruntime's contrib operator documentation,
//!   docs/ContribOperators.md (onnxruntime 1.23), "com.microsoft.FusedConv";
//! - [ORT-SRC]: onnxruntime's sources, which define the NCHWc ops (they are
//!   not in the contrib documentation): `core/optimizer/nchwc_transformer.cc`
//!   (what the graph optimiser writes), `contrib_ops/cpu/nchwc_ops.cc` and
//!   `core/mlas/lib/reorder.cpp` (the layouts), `core/providers/cpu/nn/conv.cc`
//!   and `contrib_ops/cpu/fused_activation.cc` (the fused sum and activation),
//!   `core/optimizer/conv_add_act_fusion.cc` (what the fused sum is);
//! - [ONNX]: the ONNX operator specification, "BatchNormalization".

use std::cell::RefCell;
use std::collections::{HashMap, HashSet};

use crate::error::Result;
use crate::lower::emit::{self, Ctx};
use crate::lower::{MS_DOMAIN, NCHWC_DOMAIN, Rewrite, Rule};
use crate::proto::{AttributeProto, NodeProto, TensorProto, attribute_proto};

pub(super) const RULES: &[(&str, &str, Rule)] = &[
    (MS_DOMAIN, "FusedConv", fused_conv),
    ("", "BatchNormalization", batch_norm),
    (NCHWC_DOMAIN, "ReorderInput", reorder_input),
    (NCHWC_DOMAIN, "ReorderOutput", reorder_output),
    (NCHWC_DOMAIN, "Conv", nchwc_conv),
    (NCHWC_DOMAIN, "MaxPool", nchwc_pool),
    (NCHWC_DOMAIN, "AveragePool", nchwc_pool),
    (NCHWC_DOMAIN, "GlobalMaxPool", nchwc_pool),
    (NCHWC_DOMAIN, "GlobalAveragePool", nchwc_pool),
    (NCHWC_DOMAIN, "Upsample", nchwc_upsample),
];

/// The block sizes onnxruntime's MLAS uses for NCHWc: 8 on x86-64 without
/// AVX-512F, 16 with it and on ARM64 ([ORT-SRC] `mlas/lib/platform.cpp`,
/// `MlasNchwcGetBlockSize`).
const BLOCK_SIZES: [i64; 2] = [8, 16];

// ---------------------------------------------------------------------------
// FusedConv

/// `com.microsoft.FusedConv(X, W, B?, Z?)` ([ORT-CONTRIB] "com.microsoft.FusedConv";
/// [ORT-SRC] `conv.cc`, `Conv<float>::Compute`: the sum `Z` is copied into the
/// output and the convolution accumulates onto it (`Beta = 1`) before the
/// activation runs, as the float16 kernel of `fp16_conv.cc` does too;
/// `conv_add_act_fusion.cc` makes `Z` the other input of the `Add` that
/// followed the convolution, i.e. the shortcut of a residual block):
/// `act(Conv(X, W, B) + Z)`. Emits `Conv`, then `Add(conv, Z)` (the merge) when
/// `Z` is given, then the activation as one standard node.
fn fused_conv(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (2, 4), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let w = ctx.required(node, 1)?;
    let attrs = conv_attrs(ctx, node, &["activation", "activation_params"])?;
    let act = activation(ctx, node)?;
    let mut inputs = vec![x, w];
    if let Some(b) = ctx.input(node, 2) {
        inputs.push(b);
    }
    let sum = ctx.input(node, 3);
    Ok(Rewrite::Into(conv_chain(ctx, node, &inputs, attrs, sum, act.as_ref())))
}

/// The convolution attributes of the standard `Conv`, type-checked and copied;
/// `extra` names attributes the caller reads itself. Anything else is refused.
fn conv_attrs(ctx: &Ctx<'_>, node: &NodeProto, extra: &[&str]) -> Result<Vec<AttributeProto>> {
    let mut out = Vec::new();
    for a in &node.attribute {
        match a.name.as_str() {
            "auto_pad" => {
                let v = ctx.attr_string(node, "auto_pad")?.unwrap_or_default();
                if !matches!(v.as_str(), "NOTSET" | "SAME_UPPER" | "SAME_LOWER" | "VALID") {
                    return Err(ctx.bad(format!("auto_pad '{v}' is not a padding mode")));
                }
            }
            "dilations" | "kernel_shape" | "pads" | "strides" => {
                ctx.attr_ints(node, &a.name)?;
            }
            "group" => {
                if ctx.attr_int(node, "group")?.is_some_and(|g| g < 1) {
                    return Err(ctx.bad("group must be at least 1"));
                }
            }
            name if extra.contains(&name) => continue,
            name => return Err(ctx.bad(format!("attribute '{name}' is not supported"))),
        }
        out.push(a.clone());
    }
    Ok(out)
}

/// A fused activation ([ORT-SRC] `fused_activation.cc`, `GetFusedActivationAttr`).
#[derive(Debug, Clone, Copy, PartialEq)]
enum Act {
    Relu,
    Tanh,
    Sigmoid,
    /// `x * sigmoid(x)`.
    Silu,
    LeakyRelu(f32),
    Clip(f32, f32),
    HardSigmoid(f32, f32),
}

/// The `activation` and `activation_params` attributes: none, or one of the
/// activations onnxruntime's kernels know, with exactly as many parameters as
/// it takes (LeakyRelu: alpha; Clip: min, max; HardSigmoid: alpha, beta).
fn activation(ctx: &Ctx<'_>, node: &NodeProto) -> Result<Option<Act>> {
    let Some(kind) = ctx.attr_string(node, "activation")? else { return Ok(None) };
    let params = ctx.attr_floats(node, "activation_params")?;
    let take = |n: usize| -> Result<Vec<f32>> {
        let p = params.clone().unwrap_or_default();
        if p.len() != n {
            return Err(ctx.bad(format!(
                "activation '{kind}' takes {n} activation_params, the node has {}",
                p.len()
            )));
        }
        if p.iter().any(|v| v.is_nan()) {
            return Err(ctx.bad(format!("activation '{kind}' has a NaN parameter")));
        }
        Ok(p)
    };
    let finite = |p: Vec<f32>| -> Result<Vec<f32>> {
        if p.iter().all(|v| v.is_finite()) {
            Ok(p)
        } else {
            Err(ctx.bad(format!("activation '{kind}' has a non-finite parameter")))
        }
    };
    Ok(Some(match kind.as_str() {
        "Relu" => Act::Relu,
        "Tanh" => Act::Tanh,
        "Sigmoid" => Act::Sigmoid,
        "Silu" => Act::Silu,
        "LeakyRelu" => Act::LeakyRelu(finite(take(1)?)?[0]),
        "Clip" => {
            let p = take(2)?;
            Act::Clip(p[0], p[1])
        }
        "HardSigmoid" => {
            let p = finite(take(2)?)?;
            Act::HardSigmoid(p[0], p[1])
        }
        other => return Err(ctx.bad(format!("unknown activation '{other}'"))),
    }))
}

/// `act(x)` into `out`, as standard nodes.
fn emit_activation(ctx: &mut Ctx<'_>, act: Act, x: &str, out: &str) -> Vec<NodeProto> {
    match act {
        Act::Relu => vec![ctx.node("Relu", &[x], &[out], vec![])],
        Act::Tanh => vec![ctx.node("Tanh", &[x], &[out], vec![])],
        Act::Sigmoid => vec![ctx.node("Sigmoid", &[x], &[out], vec![])],
        Act::Silu => {
            let (sigmoid, s) = ctx.node1("Sigmoid", &[x], "sigmoid", vec![]);
            vec![sigmoid, ctx.node("Mul", &[x, &s], &[out], vec![])]
        }
        Act::LeakyRelu(alpha) => {
            vec![ctx.node("LeakyRelu", &[x], &[out], vec![emit::float("alpha", alpha)])]
        }
        Act::Clip(lo, hi) => ctx.clip(x, lo, hi, out),
        Act::HardSigmoid(alpha, beta) => vec![ctx.node(
            "HardSigmoid",
            &[x],
            &[out],
            vec![emit::float("alpha", alpha), emit::float("beta", beta)],
        )],
    }
}

/// `Conv(inputs)`, then `Add(conv, sum)` when a sum is fused, then the
/// activation; the last node writes the original node's output.
fn conv_chain(
    ctx: &mut Ctx<'_>,
    node: &NodeProto,
    inputs: &[&str],
    attrs: Vec<AttributeProto>,
    sum: Option<&str>,
    act: Option<&Act>,
) -> Vec<NodeProto> {
    let out = node.output[0].as_str();
    let mut nodes = Vec::new();
    let conv_out = if sum.is_none() && act.is_none() { out.to_owned() } else { ctx.name("conv") };
    nodes.push(ctx.node("Conv", inputs, &[&conv_out], attrs));
    let mut y = conv_out;
    if let Some(z) = sum {
        let merged = if act.is_none() { out.to_owned() } else { ctx.name("sum") };
        nodes.push(ctx.node("Add", &[&y, z], &[&merged], vec![]));
        y = merged;
    }
    if let Some(&a) = act {
        nodes.extend(emit_activation(ctx, a, &y, out));
    }
    nodes
}

// ---------------------------------------------------------------------------
// BatchNormalization with computed parameters

/// `BatchNormalization(X, scale, B, mean, var)` in inference mode ([ONNX]
/// "BatchNormalization": `Y = (X - mean) / sqrt(var + epsilon) * scale + B`,
/// the parameters indexed by the channel axis 1). Left alone when all four
/// parameters are constants (tract folds those); otherwise written out as
/// `Sub`, `Add`, `Sqrt`, `Div`, `Mul`, `Add` with each parameter reshaped to
/// `[C, 1, ..., 1]` so that it broadcasts along axis 1 of `X` of any rank.
fn batch_norm(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    let constant = |slot| ctx.input(node, slot).is_some_and(|n| ctx.constant(n).is_some());
    if node.input.len() == 5 && (1..5).all(constant) {
        return Ok(Rewrite::Keep);
    }
    ctx.arity(node, (5, 5), (1, 5))?;
    if ctx.attr_int(node, "training_mode")?.unwrap_or(0) != 0 {
        return Err(ctx.bad("training_mode=1 (batch statistics) is not supported: inference only"));
    }
    if node.output.iter().skip(1).any(|o| !o.is_empty()) {
        return Err(ctx.bad("the running or saved statistics outputs are not supported"));
    }
    if ctx.attr_int(node, "spatial")?.is_some_and(|s| s != 1) {
        return Err(ctx.bad("spatial=0 (per-activation statistics) is not supported"));
    }
    let epsilon = ctx.attr_float(node, "epsilon")?.unwrap_or(1e-5);
    if !epsilon.is_finite() || epsilon < 0.0 {
        return Err(ctx.bad(format!("epsilon {epsilon} is not a finite non-negative number")));
    }
    let x = ctx.required(node, 0)?;
    let params: Vec<&str> = (1..5).map(|k| ctx.required(node, k)).collect::<Result<_>>()?;
    let rank = rank_of(ctx, x);
    if rank.is_some_and(|r| r < 2) {
        return Err(ctx.bad("the input has fewer than two axes"));
    }
    if rank.is_none() && ctx.opset < 9 {
        return Err(ctx.bad("the input's rank is unknown and ConstantOfShape needs opset 9"));
    }

    let mut nodes = Vec::new();
    // The shape each parameter takes: [-1, 1, ..., 1] with rank(X) - 2 ones,
    // a constant when the rank is known, computed from Shape(X) otherwise.
    let target = match rank {
        Some(2) => None,
        Some(r) => {
            let mut dims = vec![1i64; r - 1];
            dims[0] = -1;
            Some(ctx.init_i64("param_shape", &[r as i64 - 1], dims))
        }
        None => {
            let (shape, shape_x) = ctx.node1("Shape", &[x], "shape", vec![]);
            let (rank_node, rank_x) = ctx.node1("Shape", &[&shape_x], "rank", vec![]);
            let two = ctx.init_i64("two", &[1], vec![2]);
            let (sub, spatial) = ctx.node1("Sub", &[&rank_x, &two], "spatial_rank", vec![]);
            let one = TensorProto {
                dims: vec![1],
                data_type: 7,
                int64_data: vec![1],
                ..Default::default()
            };
            let value = AttributeProto {
                name: "value".to_owned(),
                r#type: attribute_proto::AttributeType::Tensor as i32,
                t: Some(Box::new(one)),
                ..Default::default()
            };
            let (ones_node, ones) = ctx.node1("ConstantOfShape", &[&spatial], "ones", vec![value]);
            let minus_one = ctx.init_i64("minus_one", &[1], vec![-1]);
            let (concat, target) = ctx.node1(
                "Concat",
                &[&minus_one, &ones],
                "param_shape",
                vec![emit::int("axis", 0)],
            );
            nodes.extend([shape, rank_node, sub, ones_node, concat]);
            Some(target)
        }
    };
    let mut shaped = Vec::new();
    for (param, hint) in params.iter().zip(["scale", "bias", "mean", "var"]) {
        match &target {
            None => shaped.push((*param).to_owned()),
            Some(t) => {
                let (reshape, out) = ctx.node1("Reshape", &[param, t], hint, vec![]);
                nodes.push(reshape);
                shaped.push(out);
            }
        }
    }
    let [scale, bias, mean, var] = [&shaped[0], &shaped[1], &shaped[2], &shaped[3]];
    let eps = ctx.init_f32("epsilon", &[], vec![epsilon]);
    let (centre, centred) = ctx.node1("Sub", &[x, mean], "centred", vec![]);
    let (shift, shifted) = ctx.node1("Add", &[var, &eps], "var_eps", vec![]);
    let (sqrt, std) = ctx.node1("Sqrt", &[&shifted], "std", vec![]);
    let (div, normed) = ctx.node1("Div", &[&centred, &std], "normed", vec![]);
    let (mul, scaled) = ctx.node1("Mul", &[&normed, scale], "scaled", vec![]);
    let add = ctx.node("Add", &[&scaled, bias], &[&node.output[0]], vec![]);
    nodes.extend([centre, shift, sqrt, div, mul, add]);
    Ok(Rewrite::Into(nodes))
}

/// The rank of a tensor when the model tells it: a declared shape, or the
/// weight of the convolution that produced it.
fn rank_of(ctx: &Ctx<'_>, name: &str) -> Option<usize> {
    if let Some(shape) = ctx.declared_shape(name) {
        return Some(shape.len());
    }
    let producer = ctx.nodes().iter().find(|n| n.output.iter().any(|o| o == name))?;
    if producer.domain.is_empty() && producer.op_type == "Reshape" {
        return ctx
            .constant(producer.input.get(1)?)
            .map(|t| t.dims.iter().product::<i64>() as usize);
    }
    let conv = matches!(
        (producer.domain.as_str(), producer.op_type.as_str()),
        ("" | "ai.onnx", "Conv") | (MS_DOMAIN, "FusedConv") | (NCHWC_DOMAIN, "Conv")
    );
    if !conv {
        return None;
    }
    let w = producer.input.get(1)?;
    ctx.constant(w).map(|t| t.dims.len()).filter(|&r| r >= 3)
}

// ---------------------------------------------------------------------------
// NCHWc: onnxruntime's blocked layout
//
// onnxruntime's NchwcTransformer ([ORT-SRC] `nchwc_transformer.cc`) rewrites
// Conv, FusedConv, pools, BatchNormalization (as a depthwise 1x1 Conv),
// Resize/Upsample and some Transposes into `com.microsoft.nchwc` ops that work
// on tensors of shape [N, Cp, H, W] stored as [N, Cp/b, H, W, b]: channels in
// blocks of b, Cp the channel count rounded up to b. Elementwise Add, Sum,
// Mul, Relu, Sigmoid, Tanh and channel Concat of blocked tensors stay standard
// ops on the blocked tensors. ReorderInput and ReorderOutput convert at the
// region's edges.
//
// The lowering turns the whole region back into plain NCHW, keeping the padded
// channel counts (so every shape in the region stays what onnxruntime has):
// weights are un-blocked into new initializers, ReorderInput becomes an
// Identity (a Transpose from NHWC, a zero Pad where the channels are padded)
// and ReorderOutput a Slice to its `channels` (an Identity when no channel is
// padded). Elementwise ops and channel Concat give the same values in either
// layout, so they are kept. Padded channels hold what they hold in
// onnxruntime: onnxruntime pads weights and biases with zeros on both the
// output and the input side (1.23 pads the input channels of a Conv reading a
// padded tensor), so a padded channel is act(0) and is read only through zero
// weights, per channel, or by the ReorderOutput that drops it. The blocked
// weights stay in the model as unused initializers.

/// What the model tells about its blocked region: which tensors are blocked,
/// their padded channel counts where known, and the block sizes that fit.
struct Region {
    blocked: HashSet<String>,
    channels: HashMap<String, i64>,
    /// For each of [`BLOCK_SIZES`]: `None` if it fits, or why not.
    ruled_out: [Option<String>; 2],
    /// A node that reshapes a blocked tensor (its channel blocks split off).
    reshaped: Option<String>,
}

impl Region {
    /// Walks the nodes in order (they are topologically sorted).
    fn of(ctx: &Ctx<'_>) -> Region {
        let mut r = Region {
            blocked: HashSet::new(),
            channels: HashMap::new(),
            ruled_out: [None, None],
            reshaped: None,
        };
        let index = Index::of(ctx.nodes());
        for n in ctx.nodes() {
            let Some(out) = n.output.first().filter(|o| !o.is_empty()) else { continue };
            let in0 = n.input.first().map(String::as_str).unwrap_or("");
            let in_channels = r.channels.get(in0).copied();
            if n.domain == NCHWC_DOMAIN {
                match n.op_type.as_str() {
                    "ReorderOutput" => {
                        let c = attr_i(n, "channels");
                        if let (Some(cp), Some(c)) = (in_channels, c) {
                            r.rule(
                                &n.name,
                                |b| cp % b == 0 && c <= cp && cp - c < b,
                                || format!("'{in0}' has {cp} channels padded from {c}"),
                            );
                        }
                        continue;
                    }
                    "ReorderInput" => {
                        // onnxruntime pads the channels up to the block.
                        let last = attr_i(n, "channels_last").unwrap_or(0) == 1;
                        let c = if last {
                            ctx.declared_shape(in0).and_then(|s| s.get(3).copied().flatten())
                        } else {
                            index.logical_channels(ctx, in0)
                        };
                        if let Some(cp) = index.consumer_channels(ctx, out) {
                            r.channels.insert(out.clone(), cp);
                            if let Some(c) = c {
                                r.rule(
                                    &n.name,
                                    |b| cp == (c + b - 1) / b * b,
                                    || format!("it pads {c} channels to {cp}"),
                                );
                            }
                        }
                    }
                    "Conv" => r.conv(ctx, n, out),
                    "MaxPool" | "AveragePool" | "GlobalMaxPool" | "GlobalAveragePool"
                    | "Upsample" => {
                        if let Some(cp) = in_channels {
                            r.channels.insert(out.clone(), cp);
                            r.rule(
                                &n.name,
                                |b| cp % b == 0,
                                || format!("'{in0}' has {cp} channels"),
                            );
                        }
                    }
                    _ => {}
                }
                r.blocked.insert(out.clone());
                continue;
            }
            if !n.input.iter().any(|i| r.blocked.contains(i)) {
                continue;
            }
            // A standard op on blocked tensors: elementwise, or a channel Concat.
            if n.op_type == "Reshape" && r.reshaped.is_none() {
                r.reshaped = Some(n.name.clone());
            }
            let known: Vec<Option<i64>> =
                n.input.iter().map(|i| r.channels.get(i).copied()).collect();
            let cp = if n.op_type == "Concat" {
                known.iter().copied().sum::<Option<i64>>()
            } else {
                known.iter().flatten().next().copied()
            };
            if let Some(cp) = cp {
                r.channels.insert(out.clone(), cp);
            }
            r.blocked.extend(n.output.iter().filter(|o| !o.is_empty()).cloned());
        }
        r
    }

    /// Records the constraints an NCHWc Conv puts on the block size
    /// ([ORT-SRC] `NchwcTransformerImpl::TransformConv`).
    fn conv(&mut self, ctx: &Ctx<'_>, n: &NodeProto, out: &str) {
        let Some([op, i, _, _]) = weight_dims(ctx, n) else { return };
        self.channels.insert(out.to_owned(), op);
        let group = attr_i(n, "group").unwrap_or(1);
        let input_blocked = n.input.first().is_some_and(|x| self.blocked.contains(x));
        let name = &n.name;
        self.rule(name, |b| op % b == 0, || format!("its weight has {op} output channels"));
        if group == 1 {
            if input_blocked {
                self.rule(
                    name,
                    |b| i % b == 0,
                    || format!("it reads a blocked input of {i} channels"),
                );
            } else {
                self.rule(name, |b| i < b, || format!("it reads a plain input of {i} channels"));
            }
        } else if !(i == 1 && op == group) {
            self.rule(
                name,
                |b| i % b == 0 && op % group == 0 && (op / group) % b == 0,
                || format!("it has {group} groups of {i} input channels"),
            );
        }
    }

    /// Rules out the block sizes for which `fits` is false.
    fn rule(&mut self, node: &str, fits: impl Fn(i64) -> bool, why: impl Fn() -> String) {
        for (k, &b) in BLOCK_SIZES.iter().enumerate() {
            if self.ruled_out[k].is_none() && !fits(b) {
                self.ruled_out[k] = Some(format!("node '{node}': {}", why()));
            }
        }
    }

    /// The block size: the one that fits the model's shapes, or, when both
    /// fit, the one the caller gave ([`Ctx::nchwc_block`]); a given block size
    /// the shapes rule out is refused.
    fn block(&self, ctx: &mut Ctx<'_>) -> Result<i64> {
        if let Some(r) = &self.reshaped {
            return Err(ctx.bad(format!(
                "node '{r}' reshapes a blocked tensor into its channel blocks; not supported"
            )));
        }
        if let Some(b) = ctx.nchwc_block() {
            return match BLOCK_SIZES.iter().position(|&k| k == b) {
                None => Err(ctx.bad(format!("NCHWc block size {b} is neither 8 nor 16"))),
                Some(k) => match &self.ruled_out[k] {
                    Some(why) => Err(ctx.bad(format!("NCHWc block size {b} does not fit: {why}"))),
                    None => Ok(b),
                },
            };
        }
        match &self.ruled_out {
            [None, Some(_)] => Ok(BLOCK_SIZES[0]),
            [Some(_), None] => Ok(BLOCK_SIZES[1]),
            [Some(a), Some(b)] => {
                Err(ctx.bad(format!("no NCHWc block size fits: not 8 ({a}); not 16 ({b})")))
            }
            [None, None] => match crate::lower::machine_nchwc_block() {
                Some(b) => {
                    ctx.note(format!(
                        "NCHWc block size {b} assumed, this machine's: the model's shapes fit both \
                         8 and 16 (onnxruntime uses 16 with AVX-512F, 8 with AVX2); if the model \
                         was optimised on another kind of CPU, give --nchwc-block"
                    ));
                    Ok(b)
                }
                None => Err(ctx.bad(
                    "the NCHWc block size (8 with AVX2, 16 with AVX-512F) cannot be told from the \
                     model: every blocked channel count fits both, and the weights' layout depends \
                     on it; give --nchwc-block",
                )),
            },
        }
    }
}

/// An integer attribute, read leniently (the region walk reads other nodes;
/// their own rules check them).
fn attr_i(n: &NodeProto, name: &str) -> Option<i64> {
    n.attribute.iter().find(|a| a.name == name).map(|a| a.i)
}

/// The dims of a conv node's weight, when it is a 4-D constant.
fn weight_dims(ctx: &Ctx<'_>, n: &NodeProto) -> Option<[i64; 4]> {
    let t = ctx.constant(n.input.get(1)?)?;
    let dims: [i64; 4] = t.dims.as_slice().try_into().ok()?;
    dims.iter().all(|&d| d > 0).then_some(dims)
}

/// `ReorderInput(X)` ([ORT-SRC] `nchwc_ops.cc`, `ReorderInput::Compute`:
/// NCHW, or NHWC with `channels_last=1`, to blocked, the channels zero-padded
/// to a multiple of the block). In plain layout: an Identity (a Transpose from
/// NHWC), then a zero Pad of the channels when the model shows that the
/// consumer expects more channels than the input has. When the input's channel
/// count cannot be found, no Pad is emitted: a consumer that needed one would
/// then fail on mismatched shapes rather than give wrong values.
fn reorder_input(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (1, 1), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let last = channels_last(ctx, node)?;
    for a in &node.attribute {
        if !matches!(a.name.as_str(), "channels_last" | "channels") {
            return Err(ctx.bad(format!("attribute '{}' is not supported", a.name)));
        }
    }
    if ctx.declared_shape(x).is_some_and(|s| s.len() != 4) {
        return Err(ctx.bad("the input is not 4-D"));
    }
    let index = Index::of(ctx.nodes());
    let channels = match ctx.attr_int(node, "channels")? {
        Some(c) if c > 0 => Some(c),
        Some(c) => return Err(ctx.bad(format!("channels {c} is not positive"))),
        None if last => ctx.declared_shape(x).and_then(|s| s[3]),
        None => index.logical_channels(ctx, x),
    };
    let out = node.output[0].as_str();
    let pad = match channels {
        None => 0,
        Some(c) => {
            let padded = match index.consumer_channels(ctx, out) {
                Some(cp) => cp,
                None if c % 16 == 0 => c,
                None => {
                    let b = Region::of(ctx).block(ctx)?;
                    (c + b - 1) / b * b
                }
            };
            if padded < c {
                return Err(ctx.bad(format!("{c} channels do not fit the blocked {padded}")));
            }
            padded - c
        }
    };
    let mut nodes = Vec::new();
    let mut y = x.to_owned();
    if last {
        let t = if pad == 0 { out.to_owned() } else { ctx.name("nchw") };
        nodes.push(ctx.node("Transpose", &[&y], &[&t], vec![emit::ints("perm", &[0, 3, 1, 2])]));
        y = t;
    }
    if pad > 0 {
        nodes.extend(pad_channels(ctx, &y, pad, out));
    } else if !last {
        nodes.push(ctx.node("Identity", &[&y], &[out], vec![]));
    }
    Ok(Rewrite::Into(nodes))
}

/// Who makes and who reads each tensor, built once per look at the region,
/// with the channel counts found so far.
struct Index<'a> {
    producer: HashMap<&'a str, &'a NodeProto>,
    readers: HashMap<&'a str, Vec<&'a NodeProto>>,
    channels: RefCell<HashMap<&'a str, Option<i64>>>,
}

impl<'a> Index<'a> {
    fn of(nodes: &'a [NodeProto]) -> Index<'a> {
        let mut producer = HashMap::new();
        let mut readers: HashMap<&str, Vec<&NodeProto>> = HashMap::new();
        for n in nodes {
            for o in n.output.iter().filter(|o| !o.is_empty()) {
                producer.insert(o.as_str(), n);
            }
            for i in n.input.iter().filter(|i| !i.is_empty()) {
                readers.entry(i.as_str()).or_default().push(n);
            }
        }
        Index { producer, readers, channels: RefCell::new(HashMap::new()) }
    }

    /// The (padded) channel count the NCHWc Convs reading `name` expect: their
    /// weight's input channels times their groups.
    fn consumer_channels(&self, ctx: &Ctx<'_>, name: &str) -> Option<i64> {
        self.readers.get(name)?.iter().find_map(|n| {
            let reads = n.domain == NCHWC_DOMAIN && n.op_type == "Conv" && n.input[0] == name;
            let [_, i, _, _] = weight_dims(ctx, n).filter(|_| reads)?;
            Some(i * attr_i(n, "group").unwrap_or(1))
        })
    }

    /// The channel count of a plain NCHW tensor, when the model tells it: its
    /// declared shape, the `channels` of the ReorderOutput or the weight of the
    /// Conv that made it, or the same through elementwise ops and channel
    /// Concat.
    fn logical_channels(&self, ctx: &Ctx<'_>, name: &'a str) -> Option<i64> {
        if let Some(&known) = self.channels.borrow().get(name) {
            return known;
        }
        self.channels.borrow_mut().insert(name, None);
        let c = self.find_channels(ctx, name);
        self.channels.borrow_mut().insert(name, c);
        c
    }

    fn find_channels(&self, ctx: &Ctx<'_>, name: &'a str) -> Option<i64> {
        if let Some(c) = ctx.declared_shape(name).and_then(|s| s.get(1).copied().flatten()) {
            return Some(c);
        }
        let n = *self.producer.get(name)?;
        let all_inputs = || -> Option<Vec<i64>> {
            n.input.iter().map(|i| self.logical_channels(ctx, i)).collect()
        };
        match (n.domain.as_str(), n.op_type.as_str()) {
            (NCHWC_DOMAIN, "ReorderOutput") if attr_i(n, "channels_last").unwrap_or(0) == 0 => {
                attr_i(n, "channels")
            }
            ("" | "ai.onnx", "Conv") => ctx.constant(n.input.get(1)?)?.dims.first().copied(),
            (
                "" | "ai.onnx",
                "Relu" | "Sigmoid" | "Tanh" | "LeakyRelu" | "Clip" | "HardSigmoid",
            )
            | ("" | "ai.onnx", "Identity" | "BatchNormalization") => {
                self.logical_channels(ctx, n.input.first()?)
            }
            ("" | "ai.onnx", "Add" | "Sub" | "Mul" | "Div" | "Sum" | "Max" | "Min") => {
                let c = all_inputs()?;
                c.iter().all(|&v| v == c[0]).then(|| c[0])
            }
            ("" | "ai.onnx", "Concat") if attr_i(n, "axis") == Some(1) => {
                Some(all_inputs()?.iter().sum())
            }
            _ => None,
        }
    }
}

/// Zero-pads axis 1 of a 4-D tensor at its end.
fn pad_channels(ctx: &mut Ctx<'_>, x: &str, pad: i64, out: &str) -> Vec<NodeProto> {
    let pads = [0, 0, 0, 0, 0, pad, 0, 0];
    if ctx.opset < 11 {
        return vec![ctx.node("Pad", &[x], &[out], vec![emit::ints("pads", &pads)])];
    }
    let p = ctx.init_i64("pads", &[8], pads.to_vec());
    vec![ctx.node("Pad", &[x, &p], &[out], vec![])]
}

/// The `channels_last` attribute: 0 or 1.
fn channels_last(ctx: &Ctx<'_>, node: &NodeProto) -> Result<bool> {
    match ctx.attr_int(node, "channels_last")?.unwrap_or(0) {
        0 => Ok(false),
        1 => Ok(true),
        v => Err(ctx.bad(format!("channels_last {v} is neither 0 nor 1"))),
    }
}

/// `ReorderOutput(X)` ([ORT-SRC] `nchwc_ops.cc`, `ReorderOutput::Compute`:
/// blocked to NCHW, or NHWC with `channels_last=1`, keeping the first
/// `channels` channels). In plain layout: a Slice of axis 1 to `channels`
/// (an Identity when the input is known to have exactly that many), then a
/// Transpose to NHWC with `channels_last=1`.
fn reorder_output(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (1, 1), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let last = channels_last(ctx, node)?;
    for a in &node.attribute {
        if !matches!(a.name.as_str(), "channels_last" | "channels") {
            return Err(ctx.bad(format!("attribute '{}' is not supported", a.name)));
        }
    }
    let channels = match ctx.attr_int(node, "channels")? {
        Some(c) if c > 0 => c,
        Some(c) => return Err(ctx.bad(format!("channels {c} is not positive"))),
        None => return Err(ctx.bad("attribute 'channels' is missing")),
    };
    let padded = Region::of(ctx).channels.get(x).copied();
    if padded.is_some_and(|cp| cp < channels) {
        return Err(ctx.bad(format!(
            "keeps {channels} channels of an input that has {}",
            padded.unwrap_or_default()
        )));
    }
    let out = node.output[0].as_str();
    let mut nodes = Vec::new();
    let mut y = x.to_owned();
    if padded != Some(channels) {
        let sliced = if last { ctx.name("sliced") } else { out.to_owned() };
        nodes.extend(slice_channels(ctx, &y, channels, &sliced));
        y = sliced;
    }
    if last {
        nodes.push(ctx.node("Transpose", &[&y], &[out], vec![emit::ints("perm", &[0, 2, 3, 1])]));
    } else if nodes.is_empty() {
        nodes.push(ctx.node("Identity", &[&y], &[out], vec![]));
    }
    Ok(Rewrite::Into(nodes))
}

/// The first `channels` channels (axis 1).
fn slice_channels(ctx: &mut Ctx<'_>, x: &str, channels: i64, out: &str) -> Vec<NodeProto> {
    if ctx.opset < 10 {
        let attrs = vec![
            emit::ints("starts", &[0]),
            emit::ints("ends", &[channels]),
            emit::ints("axes", &[1]),
        ];
        return vec![ctx.node("Slice", &[x], &[out], attrs)];
    }
    let starts = ctx.init_i64("starts", &[1], vec![0]);
    let ends = ctx.init_i64("ends", &[1], vec![channels]);
    let axes = ctx.init_i64("axes", &[1], vec![1]);
    vec![ctx.node("Slice", &[x, &starts, &ends, &axes], &[out], vec![])]
}

/// How an NCHWc Conv's weight is blocked ([ORT-SRC] `reorder.cpp`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Layout {
    /// `MlasReorderFilterOIHWBiBo`: [O/b][I/b][H][W][b (input)][b (output)].
    OihwBiBo,
    /// `MlasReorderFilterOIHWBo`: [O/b][I][H][W][b (output)].
    OihwBo,
}

/// `com.microsoft.nchwc.Conv(X, W, B?, Sum?)` ([ORT-SRC] `nchwc_ops.cc`,
/// `NchwcConv::Compute`: the sum is copied into the output, the convolution
/// accumulates onto it, then the activation runs; `nchwc_transformer.cc`,
/// `TransformBinary`, fuses the residual `Add`/`Sum` this way). Emits a
/// standard `Conv` with the weight un-blocked into a new initializer (its
/// padded output channels kept), `Add(conv, Sum)` (the merge), and the
/// activation.
///
/// The weight layout follows `TransformConv`: a depthwise conv (`group` equal
/// to the output channels, one input channel per group) and a `group=1` conv
/// reading a plain input of fewer channels than the block are OIHWBo; every
/// other conv is OIHWBiBo. The block size comes from the model's shapes
/// ([`Region`]); when they do not decide it, the node is refused.
fn nchwc_conv(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (2, 4), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let w = ctx.required(node, 1)?;
    let attrs = conv_attrs(ctx, node, &["activation", "activation_params"])?;
    let act = activation(ctx, node)?;
    let group = ctx.attr_int(node, "group")?.unwrap_or(1);
    let Some(dims) = ctx.constant(w).map(|t| t.dims.clone()) else {
        return Err(ctx.bad(format!("weight '{w}' is not a constant")));
    };
    let Ok([o, i, kh, kw]) = <[i64; 4]>::try_from(dims.as_slice()) else {
        return Err(ctx.bad(format!("weight '{w}' is not 4-D")));
    };
    if [o, i, kh, kw].iter().any(|&d| d <= 0) {
        return Err(ctx.bad(format!("weight '{w}' has an empty dimension")));
    }
    let region = Region::of(ctx);
    let b = region.block(ctx)?;
    let input_blocked = region.blocked.contains(x);
    if o % b != 0 {
        return Err(ctx.bad(format!("{o} output channels are not a multiple of the block {b}")));
    }
    let layout = if group > 1 && i == 1 && o == group {
        Layout::OihwBo
    } else if group == 1 && i < b {
        if input_blocked {
            return Err(ctx.bad(format!("reads a blocked input with {i} < {b} channels")));
        }
        Layout::OihwBo
    } else {
        if i % b != 0 || o % group != 0 || (o / group) % b != 0 {
            return Err(ctx.bad(format!(
                "{group} group(s) of {i} input and {o} output channels do not fit block {b}"
            )));
        }
        if !input_blocked {
            return Err(ctx.bad("reads a plain input but its weight is blocked by input channel"));
        }
        Layout::OihwBiBo
    };
    if let Some(bias) = ctx.input(node, 2)
        && let Some(t) = ctx.constant(bias)
        && t.dims != [o]
    {
        return Err(ctx.bad(format!("bias '{bias}' does not have {o} values")));
    }
    let Some(blocked) = ctx.weight_f32(w)? else {
        return Err(ctx.bad(format!("weight '{w}' is not a constant")));
    };
    let plain = unblock(&blocked, [o, i, kh, kw], b, layout)
        .ok_or_else(|| ctx.bad(format!("weight '{w}' has the wrong number of values")))?;
    let w_plain = ctx.init_f32("weight", &[o, i, kh, kw], plain);
    let mut inputs = vec![x, w_plain.as_str()];
    if let Some(bias) = ctx.input(node, 2) {
        inputs.push(bias);
    }
    let sum = ctx.input(node, 3);
    Ok(Rewrite::Into(conv_chain(ctx, node, &inputs, attrs, sum, act.as_ref())))
}

/// Un-blocks a weight of (padded) dims `[o, i, kh, kw]` into OIHW.
fn unblock(w: &[f32], [o, i, kh, kw]: [i64; 4], b: i64, layout: Layout) -> Option<Vec<f32>> {
    let [o, i, k, b] = [o, i, kh * kw, b].map(|d| d as usize);
    if w.len() != o * i * k || o % b != 0 {
        return None;
    }
    let mut out = vec![0.0f32; w.len()];
    match layout {
        Layout::OihwBiBo => {
            if i % b != 0 {
                return None;
            }
            let ib_count = i / b;
            let mut src = 0;
            for ob in 0..o / b {
                for ib in 0..ib_count {
                    for kk in 0..k {
                        for bi in 0..b {
                            for bo in 0..b {
                                out[((ob * b + bo) * i + ib * b + bi) * k + kk] = w[src];
                                src += 1;
                            }
                        }
                    }
                }
            }
        }
        Layout::OihwBo => {
            let mut src = 0;
            for ob in 0..o / b {
                for ii in 0..i {
                    for kk in 0..k {
                        for bo in 0..b {
                            out[((ob * b + bo) * i + ii) * k + kk] = w[src];
                            src += 1;
                        }
                    }
                }
            }
        }
    }
    Some(out)
}

/// The attributes of the standard pools an NCHWc pool carries over
/// (`TransformPool` copies the original node's attributes).
const POOL_ATTRS: &[&str] = &[
    "auto_pad",
    "ceil_mode",
    "count_include_pad",
    "dilations",
    "kernel_shape",
    "pads",
    "storage_order",
    "strides",
];

/// `com.microsoft.nchwc.{MaxPool, AveragePool, GlobalMaxPool,
/// GlobalAveragePool}(X)` ([ORT-SRC] `nchwc_ops.cc`, `NchwcPoolBase`: the
/// standard pool per channel): the standard pool of the same name with the
/// same attributes.
fn nchwc_pool(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (1, 1), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let global = node.op_type.starts_with("Global");
    for a in &node.attribute {
        if global || !POOL_ATTRS.contains(&a.name.as_str()) {
            return Err(ctx.bad(format!("attribute '{}' is not supported", a.name)));
        }
    }
    let out = node.output[0].as_str();
    Ok(Rewrite::Into(vec![ctx.node(&node.op_type, &[x], &[out], node.attribute.clone())]))
}

/// `com.microsoft.nchwc.Upsample(X)` ([ORT-SRC] `nchwc_ops.h`/`.cc`,
/// `NchwcUpsample`: integer `scales` [1, 1, sh, sw]; `mode` nearest (with the
/// asymmetric transformation and floor rounding of `MlasNchwcUpsampleNearest`)
/// or linear, with `coordinate_transformation_mode` asymmetric, align_corners
/// or half_pixel): a standard `Resize` (opset 11 or later) with the same
/// modes and float scales.
fn nchwc_upsample(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (1, 1), (1, 1))?;
    let x = ctx.required(node, 0)?;
    for a in &node.attribute {
        if !matches!(a.name.as_str(), "scales" | "mode" | "coordinate_transformation_mode") {
            return Err(ctx.bad(format!("attribute '{}' is not supported", a.name)));
        }
    }
    let Some(scales) = ctx.attr_ints(node, "scales")? else {
        return Err(ctx.bad("attribute 'scales' is missing"));
    };
    if scales.len() != 4 || scales[0] != 1 || scales[1] != 1 || scales[2] < 1 || scales[3] < 1 {
        return Err(ctx.bad(format!("scales {scales:?} are not [1, 1, h >= 1, w >= 1]")));
    }
    let mode = ctx.attr_string(node, "mode")?.unwrap_or_else(|| "nearest".to_owned());
    let transform = ctx
        .attr_string(node, "coordinate_transformation_mode")?
        .unwrap_or_else(|| "asymmetric".to_owned());
    if !matches!(transform.as_str(), "asymmetric" | "align_corners" | "half_pixel") {
        return Err(
            ctx.bad(format!("coordinate_transformation_mode '{transform}' is not supported"))
        );
    }
    let mut attrs = vec![
        emit::string("mode", &mode),
        emit::string("coordinate_transformation_mode", &transform),
    ];
    match mode.as_str() {
        "nearest" if transform == "asymmetric" => attrs.push(emit::string("nearest_mode", "floor")),
        "nearest" => return Err(ctx.bad("mode nearest needs the asymmetric transformation")),
        "linear" => {}
        other => return Err(ctx.bad(format!("mode '{other}' is not supported"))),
    }
    if ctx.opset < 11 {
        return Err(ctx.bad("needs Resize with transformation modes (opset 11 or later)"));
    }
    let s = ctx.init_f32("scales", &[4], scales.iter().map(|&v| v as f32).collect());
    let out = node.output[0].as_str();
    Ok(Rewrite::Into(vec![ctx.node("Resize", &[x, "", &s], &[out], attrs)]))
}

#[cfg(test)]
mod tests {
    //! Each test cites the source of the semantics it checks, as the rules do.

    use super::*;
    use crate::load::ExternalData;
    use crate::lower::{Lowered, lower};
    use crate::proto::{
        GraphProto, ModelProto, OperatorSetIdProto, TensorShapeProto, TypeProto, ValueInfoProto,
        tensor_shape_proto, type_proto,
    };

    fn node(domain: &str, op: &str, name: &str, inputs: &[&str], outputs: &[&str]) -> NodeProto {
        NodeProto {
            input: inputs.iter().map(|s| (*s).to_owned()).collect(),
            output: outputs.iter().map(|s| (*s).to_owned()).collect(),
            name: name.to_owned(),
            op_type: op.to_owned(),
            domain: domain.to_owned(),
            ..Default::default()
        }
    }

    fn with(mut n: NodeProto, attrs: Vec<AttributeProto>) -> NodeProto {
        n.attribute = attrs;
        n
    }

    fn tensor(name: &str, dims: &[i64], values: Vec<f32>) -> TensorProto {
        TensorProto {
            name: name.to_owned(),
            dims: dims.to_vec(),
            data_type: 1,
            float_data: values,
            ..Default::default()
        }
    }

    fn filled(name: &str, dims: &[i64]) -> TensorProto {
        let n: i64 = dims.iter().product();
        tensor(name, dims, (0..n).map(|k| k as f32 * 0.5 - 3.0).collect())
    }

    fn value(name: &str, dims: &[i64]) -> ValueInfoProto {
        let dim = dims
            .iter()
            .map(|&d| tensor_shape_proto::Dimension {
                value: Some(tensor_shape_proto::dimension::Value::DimValue(d)),
                ..Default::default()
            })
            .collect();
        ValueInfoProto {
            name: name.to_owned(),
            r#type: Some(TypeProto {
                value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                    elem_type: 1,
                    shape: Some(TensorShapeProto { dim }),
                })),
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    fn model(
        nodes: Vec<NodeProto>,
        inits: Vec<TensorProto>,
        inputs: Vec<ValueInfoProto>,
        opset: i64,
    ) -> ModelProto {
        ModelProto {
            ir_version: 8,
            opset_import: vec![OperatorSetIdProto { domain: String::new(), version: opset }],
            graph: Some(GraphProto {
                node: nodes,
                initializer: inits,
                input: inputs,
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    fn run(m: ModelProto) -> Result<Lowered> {
        lower(m, &ExternalData::none(), &crate::lower::LowerConfig::STANDARD)
    }

    fn ops(l: &Lowered) -> Vec<&str> {
        l.model.graph.as_ref().unwrap().node.iter().map(|n| n.op_type.as_str()).collect()
    }

    fn nodes(l: &Lowered) -> &[NodeProto] {
        &l.model.graph.as_ref().unwrap().node
    }

    fn init<'a>(l: &'a Lowered, name: &str) -> &'a TensorProto {
        l.model.graph.as_ref().unwrap().initializer.iter().find(|t| t.name == name).unwrap()
    }

    fn error(m: ModelProto) -> String {
        run(m).expect_err("the node is refused").message().to_owned()
    }

    fn act_attrs(kind: &str, params: &[f32]) -> Vec<AttributeProto> {
        let mut a = vec![emit::string("activation", kind)];
        if !params.is_empty() {
            a.push(emit::floats("activation_params", params));
        }
        a
    }

    fn fused(attrs: Vec<AttributeProto>, inputs: &[&str]) -> ModelProto {
        let mut a = vec![emit::ints("pads", &[1, 1, 1, 1])];
        a.extend(attrs);
        let n = with(node(MS_DOMAIN, "FusedConv", "fc", inputs, &["y"]), a);
        model(vec![n], vec![filled("w", &[4, 2, 3, 3]), filled("b", &[4])], vec![], 17)
    }

    /// [ORT-CONTRIB] "com.microsoft.FusedConv"; [ORT-SRC] conv.cc (`Beta = 1`
    /// onto the copied sum, then the activation): act(Conv(X, W, B) + Z).
    #[test]
    fn fused_conv_adds_the_shortcut_before_the_activation() {
        let l = run(fused(act_attrs("Relu", &[]), &["x", "w", "b", "z"])).unwrap();
        assert_eq!(ops(&l), ["Conv", "Add", "Relu"]);
        let [conv, add, relu] = nodes(&l) else { panic!() };
        assert_eq!(conv.input, ["x", "w", "b"]);
        let names: Vec<&str> = conv.attribute.iter().map(|a| a.name.as_str()).collect();
        assert_eq!(names, ["pads"]);
        assert_eq!(add.input, [conv.output[0].as_str(), "z"]);
        assert_eq!(relu.input, add.output);
        assert_eq!(relu.output, ["y"]);
        assert!(conv.output[0].starts_with("fc/lowered/"));
        assert_eq!(l.origins.len(), 3);
    }

    /// [ORT-SRC] fused_activation.cc: the activations and their parameters.
    #[test]
    fn fused_conv_activations() {
        let cases: &[(&str, &[f32], &[&str])] = &[
            ("LeakyRelu", &[0.1], &["Conv", "LeakyRelu"]),
            ("Clip", &[0.0, 6.0], &["Conv", "Clip"]),
            ("HardSigmoid", &[0.2, 0.5], &["Conv", "HardSigmoid"]),
            ("Sigmoid", &[], &["Conv", "Sigmoid"]),
            ("Tanh", &[], &["Conv", "Tanh"]),
            ("Silu", &[], &["Conv", "Sigmoid", "Mul"]),
        ];
        for (kind, params, want) in cases {
            let l = run(fused(act_attrs(kind, params), &["x", "w", "b"])).unwrap();
            assert_eq!(&ops(&l), want, "{kind}");
            let last = nodes(&l).last().unwrap();
            assert_eq!(last.output, ["y"], "{kind}");
            match *kind {
                "LeakyRelu" => assert_eq!(last.attribute[0].f, 0.1),
                "HardSigmoid" => assert_eq!((last.attribute[0].f, last.attribute[1].f), (0.2, 0.5)),
                "Clip" => {
                    assert_eq!(last.input.len(), 3);
                    assert_eq!(init(&l, &last.input[2]).float_data, [6.0]);
                }
                "Silu" => assert_eq!(last.input[0], nodes(&l)[0].output[0]),
                _ => {}
            }
        }
        // No activation, no sum: the Conv writes the output itself.
        let l = run(fused(vec![], &["x", "w"])).unwrap();
        assert_eq!(ops(&l), ["Conv"]);
        assert_eq!(nodes(&l)[0].input, ["x", "w"]);
        assert_eq!(nodes(&l)[0].output, ["y"]);
        // A sum without activation: the Add writes the output.
        let l = run(fused(vec![], &["x", "w", "", "z"])).unwrap();
        assert_eq!(ops(&l), ["Conv", "Add"]);
        assert_eq!(nodes(&l)[1].output, ["y"]);
    }

    #[test]
    fn malformed_fused_conv_is_refused_by_name() {
        let cases = [
            fused(act_attrs("Gelu", &[]), &["x", "w", "b"]),
            fused(act_attrs("LeakyRelu", &[]), &["x", "w", "b"]),
            fused(act_attrs("Clip", &[1.0]), &["x", "w", "b"]),
            fused(act_attrs("LeakyRelu", &[f32::NAN]), &["x", "w", "b"]),
            fused(vec![emit::int("activation", 1)], &["x", "w", "b"]),
            fused(vec![emit::string("alpha", "x")], &["x", "w", "b"]),
            fused(vec![emit::int("group", 0)], &["x", "w", "b"]),
            fused(vec![emit::string("auto_pad", "SAME")], &["x", "w", "b"]),
            fused(vec![], &["x"]),
            fused(vec![], &["x", "w", "b", "z", "extra"]),
        ];
        for m in cases {
            let e = error(m);
            assert!(e.starts_with("node 'fc' (com.microsoft.FusedConv): "), "{e}");
        }
    }

    fn bn(
        params_const: bool,
        extra: Vec<ValueInfoProto>,
        attrs: Vec<AttributeProto>,
    ) -> ModelProto {
        let mut nodes = vec![];
        let mut inits = vec![filled("w", &[4, 2, 3, 3])];
        let params = ["s", "b", "m", "v"];
        if params_const {
            inits.extend(params.iter().map(|p| filled(p, &[4])));
        } else {
            // Weight standardisation: the statistics are computed in the graph.
            inits.push(filled("raw", &[4]));
            for p in params {
                nodes.push(node("", "Abs", p, &["raw"], &[p]));
            }
        }
        nodes.push(with(
            node("", "BatchNormalization", "bn", &["x", "s", "b", "m", "v"], &["y"]),
            attrs,
        ));
        model(nodes, inits, extra, 15)
    }

    /// Constant statistics: nothing to do (tract folds them).
    #[test]
    fn batch_norm_with_constant_statistics_is_kept() {
        let l = run(bn(true, vec![], vec![])).unwrap();
        assert!(!l.changed());
        assert_eq!(ops(&l), ["BatchNormalization"]);
    }

    /// [ONNX] "BatchNormalization": (X - mean) / sqrt(var + epsilon) * scale + B,
    /// the parameters along axis 1.
    #[test]
    fn batch_norm_with_computed_statistics_of_known_rank() {
        let eps = emit::float("epsilon", 1e-3);
        let l = run(bn(false, vec![value("x", &[2, 4, 5, 5])], vec![eps])).unwrap();
        let got = &ops(&l)[4..];
        assert_eq!(
            got,
            ["Reshape", "Reshape", "Reshape", "Reshape", "Sub", "Add", "Sqrt", "Div", "Mul", "Add"]
        );
        let n = &nodes(&l)[4..];
        assert_eq!(init(&l, &n[0].input[1]).int64_data, [-1, 1, 1]);
        let shaped = |k: usize| n[k].output[0].as_str();
        let (scale, bias, mean, var) = (shaped(0), shaped(1), shaped(2), shaped(3));
        assert_eq!([n[0].input[0].as_str(), n[1].input[0].as_str()], ["s", "b"]);
        assert_eq!([n[2].input[0].as_str(), n[3].input[0].as_str()], ["m", "v"]);
        assert_eq!(n[4].input, ["x", mean]);
        assert_eq!(n[5].input[0], var);
        assert_eq!(init(&l, &n[5].input[1]).float_data, [1e-3]);
        assert_eq!(n[6].input, n[5].output);
        assert_eq!(n[7].input, [n[4].output[0].as_str(), n[6].output[0].as_str()]);
        assert_eq!(n[8].input, [n[7].output[0].as_str(), scale]);
        assert_eq!(n[9].input, [n[8].output[0].as_str(), bias]);
        assert_eq!(n[9].output, ["y"]);
        // Rank 2: the parameters broadcast as they are.
        let l = run(bn(false, vec![value("x", &[2, 4])], vec![])).unwrap();
        assert_eq!(&ops(&l)[4..], ["Sub", "Add", "Sqrt", "Div", "Mul", "Add"]);
    }

    /// The rank from the producing convolution's weight, or computed at run time.
    #[test]
    fn batch_norm_rank_from_conv_or_at_run_time() {
        let mut m = bn(false, vec![], vec![]);
        let g = m.graph.as_mut().unwrap();
        g.node.insert(0, node("", "Conv", "conv", &["input", "w"], &["x"]));
        let l = run(m).unwrap();
        let reshape = nodes(&l).iter().find(|n| n.op_type == "Reshape").unwrap();
        assert_eq!(init(&l, &reshape.input[1]).int64_data, [-1, 1, 1]);

        // Weight standardisation: X is a weight reshaped to [1, O, I*k*k].
        let mut m = bn(false, vec![], vec![]);
        let g = m.graph.as_mut().unwrap();
        g.node.insert(0, node("", "Reshape", "flat", &["w", "shape"], &["x"]));
        g.initializer.push(TensorProto {
            name: "shape".into(),
            dims: vec![3],
            data_type: 7,
            int64_data: vec![1, 4, 18],
            ..Default::default()
        });
        let l = run(m).unwrap();
        let reshape = nodes(&l).iter().find(|n| n.name.starts_with("bn/")).unwrap();
        assert_eq!(init(&l, &reshape.input[1]).int64_data, [-1, 1]);

        let l = run(bn(false, vec![], vec![])).unwrap();
        let got = &ops(&l)[4..10];
        assert_eq!(got, ["Shape", "Shape", "Sub", "ConstantOfShape", "Concat", "Reshape"]);
        let n = &nodes(&l)[4..];
        assert_eq!(n[0].input, ["x"]);
        assert_eq!(n[2].input[0], n[1].output[0]);
        let ones = n[3].attribute[0].t.as_ref().unwrap();
        assert_eq!((ones.data_type, ones.int64_data.as_slice()), (7, &[1i64][..]));
        assert_eq!(init(&l, &n[4].input[0]).int64_data, [-1]);
        assert_eq!(n[5].input[1], n[4].output[0]);
    }

    #[test]
    fn malformed_batch_norm_is_refused_by_name() {
        let cases = [
            bn(false, vec![], vec![emit::int("training_mode", 1)]),
            bn(false, vec![], vec![emit::int("spatial", 0)]),
            bn(false, vec![], vec![emit::float("epsilon", f32::NAN)]),
            bn(false, vec![], vec![emit::string("epsilon", "small")]),
            bn(false, vec![value("x", &[4])], vec![]),
        ];
        for m in cases {
            let e = error(m);
            assert!(e.starts_with("node 'bn' (BatchNormalization): "), "{e}");
        }
        let mut m = bn(false, vec![], vec![]);
        m.graph.as_mut().unwrap().node.last_mut().unwrap().output.push("running_mean".into());
        assert!(error(m).starts_with("node 'bn' "));
        let mut m = bn(false, vec![], vec![]);
        m.graph.as_mut().unwrap().node.last_mut().unwrap().input.pop();
        assert!(error(m).starts_with("node 'bn' "));
    }

    // -- NCHWc ---------------------------------------------------------------

    /// Blocks a plain OIHW weight as [ORT-SRC] reorder.cpp does
    /// (`MlasReorderFilterOIHWBiBo` / `OIHWBo`, zero-padding the last blocks),
    /// written independently of [`unblock`].
    fn block(
        w: &[f32],
        [o, i, k]: [usize; 3],
        b: usize,
        by_input: bool,
    ) -> (Vec<f32>, usize, usize) {
        let op = o.div_ceil(b) * b;
        let ip = if by_input { i.div_ceil(b) * b } else { i };
        let at = |oo: usize, ii: usize, kk: usize| {
            if oo < o && ii < i { w[(oo * i + ii) * k + kk] } else { 0.0 }
        };
        let mut out = Vec::new();
        for ob in 0..op / b {
            if by_input {
                for ib in 0..ip / b {
                    for kk in 0..k {
                        for bi in 0..b {
                            for bo in 0..b {
                                out.push(at(ob * b + bo, ib * b + bi, kk));
                            }
                        }
                    }
                }
            } else {
                for ii in 0..i {
                    for kk in 0..k {
                        for bo in 0..b {
                            out.push(at(ob * b + bo, ii, kk));
                        }
                    }
                }
            }
        }
        (out, op, ip)
    }

    #[test]
    fn unblock_inverts_onnxruntime_filter_layouts() {
        for b in BLOCK_SIZES {
            let b = b as usize;
            for (o, i, k, by_input) in
                [(24, 24, 9, true), (32, 16, 1, true), (24, 3, 9, false), (16, 1, 9, false)]
            {
                let w: Vec<f32> = (0..o * i * k).map(|v| v as f32 + 1.0).collect();
                let (blocked, op, ip) = block(&w, [o, i, k], b, by_input);
                let layout = if by_input { Layout::OihwBiBo } else { Layout::OihwBo };
                let dims = [op as i64, ip as i64, 3, k as i64 / 3].map(|d| d.max(1));
                let dims = if k == 1 { [op as i64, ip as i64, 1, 1] } else { dims };
                let plain = unblock(&blocked, dims, b as i64, layout).unwrap();
                for oo in 0..op {
                    for ii in 0..ip {
                        for kk in 0..k {
                            let want =
                                if oo < o && ii < i { w[(oo * i + ii) * k + kk] } else { 0.0 };
                            assert_eq!(plain[(oo * ip + ii) * k + kk], want, "b {b} o {oo} i {ii}");
                        }
                    }
                }
            }
        }
        assert!(unblock(&[0.0; 10], [8, 1, 1, 1], 8, Layout::OihwBo).is_none());
    }

    fn nchwc(
        op: &str,
        name: &str,
        inputs: &[&str],
        out: &str,
        attrs: Vec<AttributeProto>,
    ) -> NodeProto {
        with(node(NCHWC_DOMAIN, op, name, inputs, &[out]), attrs)
    }

    /// The stem of a ResNet as onnxruntime writes it with block 16: a plain
    /// input of 3 channels, 24 output channels padded to 32, a residual conv
    /// fusing the merge, a ReorderOutput back to 24 channels.
    fn stem(b: usize, o: usize, keep: i64) -> ModelProto {
        let w1: Vec<f32> = (0..o * 3 * 9).map(|v| (v % 7) as f32 - 3.0).collect();
        let (w1b, op, _) = block(&w1, [o, 3, 9], b, false);
        let w2: Vec<f32> = (0..o * o * 9).map(|v| (v % 5) as f32 - 2.0).collect();
        let (w2b, op2, ip2) = block(&w2, [o, o, 9], b, true);
        let (op, op2, ip2) = (op as i64, op2 as i64, ip2 as i64);
        let act = |kind| act_attrs(kind, &[]);
        let pads = || vec![emit::ints("pads", &[1, 1, 1, 1])];
        let mut a1 = pads();
        a1.extend(act("Relu"));
        let mut a2 = pads();
        a2.extend(act("Relu"));
        model(
            vec![
                nchwc("Conv", "c1", &["x", "w1", "b1"], "t1", a1),
                nchwc("Conv", "c2", &["t1", "w2", "", "t1"], "t2", a2),
                nchwc("ReorderOutput", "ro", &["t2"], "y", vec![emit::int("channels", keep)]),
            ],
            vec![
                tensor("w1", &[op, 3, 3, 3], w1b),
                tensor("b1", &[op], vec![0.5; op as usize]),
                tensor("w2", &[op2, ip2, 3, 3], w2b),
            ],
            vec![value("x", &[1, 3, 8, 8])],
            17,
        )
    }

    /// [ORT-SRC] nchwc_ops.cc `NchwcConv::Compute` (the sum is accumulated
    /// before the activation), `ReorderOutput::Compute` (the first `channels`
    /// channels); the weights un-blocked into new initializers.
    #[test]
    fn nchwc_region_becomes_plain_convolutions() {
        // 24 channels padded to 32 and kept as 24: only block 16 pads so.
        let l = run(stem(16, 24, 24)).unwrap();
        assert_eq!(ops(&l), ["Conv", "Relu", "Conv", "Add", "Relu", "Slice"]);
        let n = nodes(&l);
        assert_eq!(n[0].input[0], "x");
        let w1 = init(&l, &n[0].input[1]);
        assert_eq!(w1.dims, [32, 3, 3, 3]);
        let want: Vec<f32> = (0..24 * 27).map(|v| (v % 7) as f32 - 3.0).collect();
        assert_eq!(&w1.float_data[..24 * 27], &want[..]);
        assert!(w1.float_data[24 * 27..].iter().all(|&v| v == 0.0));
        assert_eq!(n[0].input[2], "b1");
        assert_eq!(n[1].output, ["t1"]);
        assert_eq!(init(&l, &n[2].input[1]).dims, [32, 32, 3, 3]);
        assert_eq!(n[2].input.len(), 2);
        assert_eq!(n[3].input, [n[2].output[0].as_str(), "t1"]);
        assert_eq!(n[4].output, ["t2"]);
        assert_eq!(n[5].input[0], "t2");
        assert_eq!(init(&l, &n[5].input[2]).int64_data, [24]);
        assert_eq!(n[5].output, ["y"]);
        // 24 channels kept as 24 without padding: only block 8 fits.
        let l = run(stem(8, 24, 24)).unwrap();
        assert_eq!(ops(&l), ["Conv", "Relu", "Conv", "Add", "Relu", "Identity"]);
        let w1 = init(&l, &nodes(&l)[0].input[1]);
        assert_eq!(&w1.float_data[..], &want[..]);
    }

    /// Every channel count a multiple of 16: the layout cannot be decoded.
    #[test]
    fn nchwc_block_size_must_follow_from_the_model() {
        // Shapes that fit both block sizes: this machine's, said in a note.
        let l = run(stem(16, 32, 32)).expect("read with this machine's block size");
        assert_eq!(l.notes.len(), 1, "{:?}", l.notes);
        assert!(l.notes[0].message.starts_with("NCHWc block size"), "{:?}", l.notes);
        // A ReorderOutput that no block size explains.
        let e = error(stem(16, 24, 8));
        assert!(e.contains("no NCHWc block size fits"), "{e}");
    }

    /// A block size given by the caller decides when the shapes do not, and
    /// is refused when they rule it out.
    #[test]
    fn nchwc_block_size_given_by_the_caller() {
        let m = stem(16, 32, 32);
        let region = |block: Option<i64>, m: &ModelProto| -> Result<i64> {
            let g = m.graph.as_ref().unwrap();
            let external = ExternalData::none();
            let mut ctx = Ctx::new(g, &g.node, 17, &external);
            ctx.set_nchwc_block(block);
            let (index, node) =
                g.node.iter().enumerate().find(|(_, n)| n.name == "c1").expect("node c1");
            ctx.begin(index, node);
            let region = Region::of(&ctx);
            region.block(&mut ctx)
        };
        assert_eq!(region(Some(16), &m).unwrap(), 16);
        assert_eq!(region(Some(8), &m).unwrap(), 8);
        // Nothing given: this machine's block size, with a note.
        assert_eq!(region(None, &m).ok(), crate::lower::machine_nchwc_block());
        assert!(region(Some(4), &m).unwrap_err().message().contains("neither 8 nor 16"));
        // 24 channels padded to 32: 8 is ruled out.
        let m = stem(16, 24, 24);
        assert_eq!(region(None, &m).unwrap(), 16);
        let e = region(Some(8), &m).unwrap_err();
        assert!(e.message().contains("block size 8 does not fit: node 'ro'"), "{}", e.message());
    }

    #[test]
    fn reorder_input_pads_and_transposes() {
        let conv = |x: &str| nchwc("Conv", "c", &[x, "w"], "y", vec![emit::int("group", 1)]);
        let w = tensor("w", &[16, 32, 1, 1], vec![0.0; 512]);
        // 24 declared channels read by a conv of 32: zero-padded by 8.
        let m = model(
            vec![nchwc("ReorderInput", "ri", &["x"], "t", vec![]), conv("t")],
            vec![w.clone()],
            vec![value("x", &[1, 24, 4, 4])],
            17,
        );
        let l = run(m).unwrap();
        assert_eq!(ops(&l), ["Pad", "Conv"]);
        assert_eq!(init(&l, &nodes(&l)[0].input[1]).int64_data, [0, 0, 0, 0, 0, 8, 0, 0]);
        assert_eq!(nodes(&l)[0].output, ["t"]);
        // NHWC input: a Transpose, then the Pad.
        let ri = nchwc("ReorderInput", "ri", &["x"], "t", vec![emit::int("channels_last", 1)]);
        let m = model(vec![ri, conv("t")], vec![w], vec![value("x", &[1, 4, 4, 24])], 17);
        let l = run(m).unwrap();
        assert_eq!(ops(&l), ["Transpose", "Pad", "Conv"]);
        assert_eq!(nodes(&l)[0].attribute[0].ints, [0, 3, 1, 2]);
        assert_eq!(nodes(&l)[1].input[0], nodes(&l)[0].output[0]);
    }

    #[test]
    fn nchwc_pools_and_upsample_become_standard_ops() {
        let m = model(
            vec![
                nchwc("MaxPool", "mp", &["x"], "a", vec![emit::ints("kernel_shape", &[2, 2])]),
                nchwc("GlobalAveragePool", "gap", &["a"], "b", vec![]),
                nchwc("Upsample", "up", &["b"], "c", vec![emit::ints("scales", &[1, 1, 2, 2])]),
                nchwc(
                    "ReorderOutput",
                    "ro",
                    &["c"],
                    "y",
                    vec![emit::int("channels", 16), emit::int("channels_last", 1)],
                ),
            ],
            vec![],
            vec![],
            17,
        );
        let l = run(m).unwrap();
        assert_eq!(ops(&l), ["MaxPool", "GlobalAveragePool", "Resize", "Slice", "Transpose"]);
        let n = nodes(&l);
        assert_eq!(n[0].attribute[0].ints, [2, 2]);
        assert_eq!(init(&l, &n[2].input[2]).float_data, [1.0, 1.0, 2.0, 2.0]);
        let modes: Vec<String> =
            n[2].attribute.iter().map(|a| String::from_utf8_lossy(&a.s).into_owned()).collect();
        assert_eq!(modes, ["nearest", "asymmetric", "floor"]);
        assert_eq!(n[4].attribute[0].ints, [0, 2, 3, 1]);
        assert_eq!(n[4].output, ["y"]);
    }

    #[test]
    fn malformed_nchwc_nodes_are_refused_by_name() {
        let one = |n: NodeProto, inits: Vec<TensorProto>| model(vec![n], inits, vec![], 17);
        let cases = [
            one(nchwc("Conv", "n", &["x", "w"], "y", vec![]), vec![]),
            one(nchwc("Conv", "n", &["x", "w"], "y", vec![]), vec![filled("w", &[16, 3, 3])]),
            one(nchwc("ReorderOutput", "n", &["x"], "y", vec![]), vec![]),
            one(nchwc("ReorderOutput", "n", &["x"], "y", vec![emit::int("channels", -1)]), vec![]),
            one(
                nchwc("ReorderInput", "n", &["x"], "y", vec![emit::int("channels_last", 2)]),
                vec![],
            ),
            one(nchwc("MaxPool", "n", &["x"], "y", vec![emit::int("foo", 1)]), vec![]),
            one(nchwc("GlobalMaxPool", "n", &["x", "z"], "y", vec![]), vec![]),
            one(
                nchwc("Upsample", "n", &["x"], "y", vec![emit::ints("scales", &[2, 1, 2, 2])]),
                vec![],
            ),
            one(nchwc("Upsample", "n", &["x"], "y", vec![]), vec![]),
        ];
        for m in cases {
            let e = error(m);
            assert!(e.starts_with("node 'n' (com.microsoft.nchwc."), "{e}");
        }
    }
}
