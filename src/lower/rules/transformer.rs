//! Transformer contrib operators (onnxruntime's `com.microsoft` domain,
//! as its transformer optimiser writes them): the merges fused into
//! normalisations, fused activations and fused linear layers.
//!
//! Semantics: onnxruntime's contrib operator documentation
//! (docs/ContribOperators.md of the pinned onnxruntime release, 1.23), each
//! rule citing its section; where the document is silent, the behaviour of
//! onnxruntime 1.23.2's CPU kernels, checked by running both models.
//!
//! Spellings below opset 17 (layer norm) and 20 (GELU) follow PyTorch's
//! exporter, so the detection recognises them as it recognises an exported
//! model: `ReduceMean, Sub, Pow 2, ReduceMean, Add eps, Sqrt, Div, Mul, Add`
//! and `Div sqrt(2), Erf, Add 1, Mul x, Mul 0.5`.

use crate::error::Result;
use crate::lower::emit::{Ctx, float, int, ints, string};
use crate::lower::{MS_DOMAIN, Rewrite, Rule};
use crate::proto::NodeProto;

pub(super) const RULES: &[(&str, &str, Rule)] = &[
    (MS_DOMAIN, "BiasAdd", bias_add),
    (MS_DOMAIN, "SkipLayerNormalization", skip_layer_norm),
    (MS_DOMAIN, "SkipSimplifiedLayerNormalization", skip_simplified_layer_norm),
    (MS_DOMAIN, "FusedMatMul", fused_matmul),
    (MS_DOMAIN, "FusedGemm", fused_gemm),
    (MS_DOMAIN, "Gelu", gelu),
    (MS_DOMAIN, "BiasGelu", bias_gelu),
    (MS_DOMAIN, "FastGelu", fast_gelu),
    (MS_DOMAIN, "QuickGelu", quick_gelu),
    (MS_DOMAIN, "Attention", attention),
];

/// The default epsilon of both skip normalisations (contrib docs,
/// "com.microsoft.SkipLayerNormalization", attribute `epsilon`).
const SKIP_NORM_EPSILON: f32 = 1e-12;

/// `BiasAdd(X, bias, skip) = X + bias + skip` ([Q2] family; contrib docs,
/// "com.microsoft.BiasAdd"): the bias add, then the merge with the skip.
fn bias_add(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (3, 3), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let bias = ctx.required(node, 1)?;
    let skip = ctx.required(node, 2)?;
    let (biased_node, biased) = ctx.node1("Add", &[x, bias], "biased", vec![]);
    let merge = ctx.node("Add", &[&biased, skip], &[&node.output[0]], vec![]);
    Ok(Rewrite::Into(vec![biased_node, merge]))
}

/// An int32 scalar tensor (name set by [`Ctx::init`]).
fn int32_scalar(v: i32) -> crate::proto::TensorProto {
    crate::proto::TensorProto { data_type: 6, int32_data: vec![v], ..Default::default() }
}

/// A named optional output of `node`.
fn output(node: &NodeProto, slot: usize) -> Option<&str> {
    node.output.get(slot).map(String::as_str).filter(|s| !s.is_empty())
}

/// An epsilon attribute: finite and not negative.
fn epsilon(ctx: &Ctx<'_>, node: &NodeProto, default: f32) -> Result<f32> {
    let eps = ctx.attr_float(node, "epsilon")?.unwrap_or(default);
    if !eps.is_finite() || eps < 0.0 {
        return Err(ctx.bad(format!("epsilon {eps} is not a finite non-negative number")));
    }
    Ok(eps)
}

/// The merge a skip normalisation hides: `(input + bias) + skip` when a bias
/// is given (onnxruntime's optimiser moves the bias of the branch's last
/// MatMul there, so `input` is the branch and the bias belongs to it), else
/// `input + skip`. The sum is named `sum_name` when the model names it.
/// `(input + bias) + skip` and onnxruntime's `input + skip + bias` differ only
/// in the order of two float additions (a few ulp).
fn skip_sum(
    ctx: &mut Ctx<'_>,
    node: &NodeProto,
    bias_slot: usize,
    out: &mut Vec<NodeProto>,
) -> Result<String> {
    let input = ctx.required(node, 0)?;
    let skip = ctx.required(node, 1)?;
    let branch = match ctx.input(node, bias_slot) {
        Some(bias) => {
            let (n, biased) = ctx.node1("Add", &[input, bias], "biased", vec![]);
            out.push(n);
            biased
        }
        None => input.to_owned(),
    };
    let sum = match output(node, 3) {
        Some(name) => name.to_owned(),
        None => ctx.name("sum"),
    };
    out.push(ctx.node("Add", &[&branch, skip], &[&sum], vec![]));
    Ok(sum)
}

/// `SkipLayerNormalization(input, skip, gamma, beta?, bias?)` (contrib docs,
/// "com.microsoft.SkipLayerNormalization"): `s = input + skip (+ bias)`,
/// `output = LayerNorm(s) * gamma + beta` over the last axis; outputs
/// `(output, mean?, inv_std_var?, input_skip_bias_sum?)`.
///
/// The mean and inverse standard deviation are computed with keepdims (shape
/// `[.., 1]`, as the standard `LayerNormalization`'s `Mean`/`InvStdDev`);
/// onnxruntime 1.23's CPU kernel leaves them unset, so no reference exists.
fn skip_layer_norm(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (3, 5), (1, 4))?;
    let eps = epsilon(ctx, node, SKIP_NORM_EPSILON)?;
    let gamma = ctx.required(node, 2)?;
    let beta = ctx.input(node, 3);
    let mut out = Vec::new();
    let sum = skip_sum(ctx, node, 4, &mut out)?;
    let stats = (output(node, 1), output(node, 2));
    layer_norm(ctx, &sum, gamma, beta, eps, &node.output[0], stats, &mut out);
    Ok(Rewrite::Into(out))
}

/// A layer normalisation over the last axis of `x` into `y`, with its
/// optional mean and inverse standard deviation (keepdims) outputs:
/// `LayerNormalization` at opset >= 17, else PyTorch's spelling.
#[allow(clippy::too_many_arguments)]
fn layer_norm(
    ctx: &mut Ctx<'_>,
    x: &str,
    gamma: &str,
    beta: Option<&str>,
    eps: f32,
    y: &str,
    (mean_out, inv_out): (Option<&str>, Option<&str>),
    out: &mut Vec<NodeProto>,
) {
    if ctx.opset >= 17 {
        let inputs: Vec<&str> = [Some(x), Some(gamma), beta].into_iter().flatten().collect();
        let mut outputs = vec![y, mean_out.unwrap_or(""), inv_out.unwrap_or("")];
        while outputs.last() == Some(&"") {
            outputs.pop();
        }
        out.push(ctx.node(
            "LayerNormalization",
            &inputs,
            &outputs,
            vec![int("axis", -1), float("epsilon", eps)],
        ));
        return;
    }
    let mean = mean_out.map_or_else(|| ctx.name("mean"), str::to_owned);
    out.extend(ctx.reduce_mean(x, &[-1], true, &mean));
    let (n, centred) = ctx.node1("Sub", &[x, &mean], "centred", vec![]);
    out.push(n);
    let two = ctx.init_f32("two", &[], vec![2.0]);
    let (n, squares) = ctx.node1("Pow", &[&centred, &two], "squares", vec![]);
    out.push(n);
    let var = ctx.name("var");
    out.extend(ctx.reduce_mean(&squares, &[-1], true, &var));
    let e = ctx.init_f32("epsilon", &[], vec![eps]);
    let (n, shifted) = ctx.node1("Add", &[&var, &e], "var_eps", vec![]);
    out.push(n);
    let (n, std) = ctx.node1("Sqrt", &[&shifted], "std", vec![]);
    out.push(n);
    if let Some(inv) = inv_out {
        out.push(ctx.node("Reciprocal", &[&std], &[inv], vec![]));
    }
    let (n, normed) = ctx.node1("Div", &[&centred, &std], "normalised", vec![]);
    out.push(n);
    match beta {
        Some(beta) => {
            let (n, scaled) = ctx.node1("Mul", &[&normed, gamma], "scaled", vec![]);
            out.push(n);
            out.push(ctx.node("Add", &[&scaled, beta], &[y], vec![]));
        }
        None => out.push(ctx.node("Mul", &[&normed, gamma], &[y], vec![])),
    }
}

/// `SkipSimplifiedLayerNormalization(input, skip, gamma, bias?)` (contrib
/// docs, "com.microsoft.SkipSimplifiedLayerNormalization"): `s = input +
/// skip (+ bias)`, `output = s / sqrt(mean(s^2) + eps) * gamma` (RMS norm);
/// outputs `(output, mean?, inv_std_var?, input_skip_bias_sum?)`. An RMS
/// norm has no mean: a named `mean` output is refused. `RMSNormalization`
/// at opset >= 23 (unless `inv_std_var` is asked for), else
/// `Pow 2, ReduceMean, Add eps, Sqrt, Div, Mul gamma`, which the detection
/// recognises as a spelled-out RMS norm.
fn skip_simplified_layer_norm(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (3, 4), (1, 4))?;
    if output(node, 1).is_some() {
        return Err(ctx.bad("output 1 (mean) is not supported: an RMS norm computes no mean"));
    }
    let eps = epsilon(ctx, node, SKIP_NORM_EPSILON)?;
    let gamma = ctx.required(node, 2)?;
    let mut out = Vec::new();
    let sum = skip_sum(ctx, node, 3, &mut out)?;
    let y = node.output[0].as_str();
    let inv_out = output(node, 2);
    if ctx.opset >= 23 && inv_out.is_none() {
        let attrs = vec![int("axis", -1), float("epsilon", eps)];
        out.push(ctx.node("RMSNormalization", &[&sum, gamma], &[y], attrs));
        return Ok(Rewrite::Into(out));
    }
    let two = ctx.init_f32("two", &[], vec![2.0]);
    let (n, squares) = ctx.node1("Pow", &[&sum, &two], "squares", vec![]);
    out.push(n);
    let ms = ctx.name("mean_square");
    out.extend(ctx.reduce_mean(&squares, &[-1], true, &ms));
    let e = ctx.init_f32("epsilon", &[], vec![eps]);
    let (n, shifted) = ctx.node1("Add", &[&ms, &e], "ms_eps", vec![]);
    out.push(n);
    let (n, rms) = ctx.node1("Sqrt", &[&shifted], "rms", vec![]);
    out.push(n);
    if let Some(inv) = inv_out {
        out.push(ctx.node("Reciprocal", &[&rms], &[inv], vec![]));
    }
    let (n, normed) = ctx.node1("Div", &[&sum, &rms], "normalised", vec![]);
    out.push(n);
    out.push(ctx.node("Mul", &[&normed, gamma], &[y], vec![]));
    Ok(Rewrite::Into(out))
}

/// The last two axes of `x` swapped into a fresh tensor: a `Transpose` when
/// `x` is a constant (its rank is known), else `Einsum("...ij->...ji")`
/// (opset >= 12), which needs no rank.
fn swap_last_two(ctx: &mut Ctx<'_>, x: &str, out: &mut Vec<NodeProto>) -> Result<String> {
    if let Some(t) = ctx.constant(x) {
        let r = t.dims.len() as i64;
        if r < 2 {
            return Err(ctx.bad(format!("cannot transpose '{x}' of rank {r}")));
        }
        let mut perm: Vec<i64> = (0..r).collect();
        perm.swap(r as usize - 2, r as usize - 1);
        let (n, y) = ctx.node1("Transpose", &[x], "transposed", vec![ints("perm", &perm)]);
        out.push(n);
        return Ok(y);
    }
    if ctx.opset < 12 {
        return Err(ctx.bad(format!(
            "transposing '{x}' of unknown rank needs Einsum (opset >= 12); the model has opset {}",
            ctx.opset
        )));
    }
    let (n, y) = ctx.node1("Einsum", &[x], "transposed", vec![string("equation", "...ij->...ji")]);
    out.push(n);
    Ok(y)
}

/// `FusedMatMul(A, B) = alpha * op(A) @ op(B)` (contrib docs,
/// "com.microsoft.FusedMatMul"): `transA`/`transB` swap the last two axes;
/// `transBatchA`/`transBatchB` (moving batch axes) are refused.
fn fused_matmul(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (2, 2), (1, 1))?;
    for a in ["transBatchA", "transBatchB"] {
        if ctx.attr_int(node, a)?.unwrap_or(0) != 0 {
            return Err(ctx.bad(format!("{a} = 1 is not supported")));
        }
    }
    let alpha = ctx.attr_float(node, "alpha")?.unwrap_or(1.0);
    if !alpha.is_finite() {
        return Err(ctx.bad(format!("alpha {alpha} is not finite")));
    }
    let mut out = Vec::new();
    let mut operands = Vec::new();
    for (slot, attr) in [(0, "transA"), (1, "transB")] {
        let x = ctx.required(node, slot)?;
        operands.push(match ctx.attr_int(node, attr)?.unwrap_or(0) {
            0 => x.to_owned(),
            1 => swap_last_two(ctx, x, &mut out)?,
            v => return Err(ctx.bad(format!("{attr} = {v} is neither 0 nor 1"))),
        });
    }
    let y = node.output[0].as_str();
    if alpha == 1.0 {
        out.push(ctx.node("MatMul", &[&operands[0], &operands[1]], &[y], vec![]));
    } else {
        let (n, product) = ctx.node1("MatMul", &[&operands[0], &operands[1]], "product", vec![]);
        out.push(n);
        let a = ctx.init_f32("alpha", &[], vec![alpha]);
        out.push(ctx.node("Mul", &[&product, &a], &[y], vec![]));
    }
    Ok(Rewrite::Into(out))
}

/// `FusedGemm(A, B, C?)` (contrib docs, "com.microsoft.FusedGemm"): a
/// standard `Gemm` (alpha, beta, transA, transB) followed by the activation
/// named by `activation`, with `activation_alpha/beta/gamma` as that op's
/// `alpha/beta/gamma` (onnxruntime's Gemm-activation fusion copies them so).
/// Activations without a standard op (ScaledTanh, Affine,
/// ParametricSoftplus) and unknown names are errors.
fn fused_gemm(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (2, 3), (1, 1))?;
    let activation = ctx
        .attr_string(node, "activation")?
        .ok_or_else(|| ctx.bad("attribute 'activation' is missing"))?;
    let (a, b, g) = (
        ctx.attr_float(node, "activation_alpha")?,
        ctx.attr_float(node, "activation_beta")?,
        ctx.attr_float(node, "activation_gamma")?,
    );
    // Which of alpha, beta, gamma each activation takes.
    let takes: (bool, bool, bool) = match activation.as_str() {
        "Relu" | "Sigmoid" | "Tanh" | "Softsign" => (false, false, false),
        "LeakyRelu" | "Elu" | "ThresholdedRelu" | "Celu" => (true, false, false),
        "HardSigmoid" => (true, true, false),
        "Selu" => (true, false, true),
        other => {
            return Err(
                ctx.bad(format!("activation '{other}' is not supported (no standard ONNX op)"))
            );
        }
    };
    let mut act_attrs = Vec::new();
    for (value, wanted, name) in
        [(a, takes.0, "alpha"), (b, takes.1, "beta"), (g, takes.2, "gamma")]
    {
        if let (Some(v), true) = (value, wanted) {
            act_attrs.push(float(name, v));
        }
    }
    let mut gemm_attrs = Vec::new();
    for name in ["alpha", "beta"] {
        if let Some(v) = ctx.attr_float(node, name)? {
            gemm_attrs.push(float(name, v));
        }
    }
    for name in ["transA", "transB"] {
        if let Some(v) = ctx.attr_int(node, name)? {
            gemm_attrs.push(int(name, v));
        }
    }
    let inputs: Vec<&str> = node.input.iter().map(String::as_str).collect();
    let (gemm, linear) = ctx.node1("Gemm", &inputs, "linear", gemm_attrs);
    let act = ctx.node(&activation, &[&linear], &[&node.output[0]], act_attrs);
    Ok(Rewrite::Into(vec![gemm, act]))
}

/// The exact (erf) GELU of `x` into `y`: `Gelu` at opset >= 20, else
/// PyTorch's spelling `x * (erf(x / sqrt 2) + 1) * 0.5`.
fn gelu_erf(ctx: &mut Ctx<'_>, x: &str, y: &str, out: &mut Vec<NodeProto>) {
    if ctx.opset >= 20 {
        out.push(ctx.node("Gelu", &[x], &[y], vec![string("approximate", "none")]));
        return;
    }
    let root2 = ctx.init_f32("sqrt2", &[], vec![std::f32::consts::SQRT_2]);
    let (n, scaled) = ctx.node1("Div", &[x, &root2], "scaled", vec![]);
    out.push(n);
    let (n, erf) = ctx.node1("Erf", &[&scaled], "erf", vec![]);
    out.push(n);
    let one = ctx.init_f32("one", &[], vec![1.0]);
    let (n, shifted) = ctx.node1("Add", &[&erf, &one], "erf_plus_one", vec![]);
    out.push(n);
    let (n, product) = ctx.node1("Mul", &[x, &shifted], "product", vec![]);
    out.push(n);
    let half = ctx.init_f32("half", &[], vec![0.5]);
    out.push(ctx.node("Mul", &[&product, &half], &[y], vec![]));
}

/// The tanh approximation of GELU of `x` into `y`: `Gelu(approximate =
/// "tanh")` at opset >= 20, else PyTorch's spelling
/// `(x * 0.5) * (1 + tanh(sqrt(2/pi) * (x + 0.044715 * x^3)))`.
fn gelu_tanh(ctx: &mut Ctx<'_>, x: &str, y: &str, out: &mut Vec<NodeProto>) {
    if ctx.opset >= 20 {
        out.push(ctx.node("Gelu", &[x], &[y], vec![string("approximate", "tanh")]));
        return;
    }
    let three = ctx.init_f32("three", &[], vec![3.0]);
    let (n, cube) = ctx.node1("Pow", &[x, &three], "cube", vec![]);
    out.push(n);
    let kappa = ctx.init_f32("kappa", &[], vec![0.044715]);
    let (n, term) = ctx.node1("Mul", &[&cube, &kappa], "cubic_term", vec![]);
    out.push(n);
    let (n, inner) = ctx.node1("Add", &[x, &term], "inner", vec![]);
    out.push(n);
    let beta =
        ctx.init_f32("sqrt_2_over_pi", &[], vec![(2.0 / std::f64::consts::PI).sqrt() as f32]);
    let (n, arg) = ctx.node1("Mul", &[&inner, &beta], "tanh_arg", vec![]);
    out.push(n);
    let (n, t) = ctx.node1("Tanh", &[&arg], "tanh", vec![]);
    out.push(n);
    let one = ctx.init_f32("one", &[], vec![1.0]);
    let (n, shifted) = ctx.node1("Add", &[&t, &one], "tanh_plus_one", vec![]);
    out.push(n);
    let half = ctx.init_f32("half", &[], vec![0.5]);
    let (n, halved) = ctx.node1("Mul", &[x, &half], "half_x", vec![]);
    out.push(n);
    out.push(ctx.node("Mul", &[&halved, &shifted], &[y], vec![]));
}

/// `Gelu(X)` (contrib docs, "com.microsoft.Gelu"): the exact, erf form.
fn gelu(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (1, 1), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let mut out = Vec::new();
    gelu_erf(ctx, x, &node.output[0], &mut out);
    Ok(Rewrite::Into(out))
}

/// `BiasGelu(A, B) = Gelu(A + B)` (contrib docs, "com.microsoft.BiasGelu"),
/// erf form.
fn bias_gelu(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (2, 2), (1, 1))?;
    let a = ctx.required(node, 0)?;
    let b = ctx.required(node, 1)?;
    let (add, biased) = ctx.node1("Add", &[a, b], "biased", vec![]);
    let mut out = vec![add];
    gelu_erf(ctx, &biased, &node.output[0], &mut out);
    Ok(Rewrite::Into(out))
}

/// `FastGelu(X, bias?)` (contrib docs, "com.microsoft.FastGelu"): the tanh
/// approximation of GELU of `X (+ bias)`.
fn fast_gelu(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (1, 2), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let mut out = Vec::new();
    let x = match ctx.input(node, 1) {
        Some(bias) => {
            let (n, biased) = ctx.node1("Add", &[x, bias], "biased", vec![]);
            out.push(n);
            biased
        }
        None => x.to_owned(),
    };
    gelu_tanh(ctx, &x, &node.output[0], &mut out);
    Ok(Rewrite::Into(out))
}

/// `QuickGelu(X) = X * Sigmoid(alpha * X)`, alpha 1.702 by default (contrib
/// docs, "com.microsoft.QuickGelu"). Written as `(z * Sigmoid(z)) / alpha`
/// with `z = alpha * X`, the same value up to rounding, so the detection
/// reads a swish (an activation) rather than `X` gated by a sigmoid of
/// something else; `Swish(alpha)` itself at opset >= 24.
fn quick_gelu(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (1, 1), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let alpha = ctx.attr_float(node, "alpha")?.unwrap_or(1.702);
    if !alpha.is_finite() || alpha == 0.0 {
        return Err(ctx.bad(format!("alpha {alpha} is not a finite non-zero number")));
    }
    let y = node.output[0].as_str();
    if ctx.opset >= 24 {
        return Ok(Rewrite::Into(vec![ctx.node("Swish", &[x], &[y], vec![float("alpha", alpha)])]));
    }
    let mut out = Vec::new();
    let z = if alpha == 1.0 {
        x.to_owned()
    } else {
        let a = ctx.init_f32("alpha", &[], vec![alpha]);
        let (n, z) = ctx.node1("Mul", &[x, &a], "scaled", vec![]);
        out.push(n);
        z
    };
    let (n, s) = ctx.node1("Sigmoid", &[&z], "sigmoid", vec![]);
    out.push(n);
    if alpha == 1.0 {
        out.push(ctx.node("Mul", &[&z, &s], &[y], vec![]));
    } else {
        let (n, swish) = ctx.node1("Mul", &[&z, &s], "swish", vec![]);
        out.push(n);
        let a = ctx.init_f32("alpha", &[], vec![alpha]);
        out.push(ctx.node("Div", &[&swish, &a], &[y], vec![]));
    }
    Ok(Rewrite::Into(out))
}

/// `Attention(input, weights, bias?, mask_index?)` (contrib docs,
/// "com.microsoft.Attention"), the self-attention of BERT-like encoders:
/// `input [B, S, H_in] @ weights [H_in, Hq + Hk + Hv] (+ bias)`, split into
/// Q, K, V, each reshaped to `[B, S, heads, d]` (Reshape's 0 copies B and S,
/// so any batch and length work) and transposed to heads first;
/// `Softmax(Q K^T * scale + masks) V`, heads merged back to `[B, S, Hv]`.
/// `scale` defaults to `1/sqrt(d)`. `mask_index` is either the 2-D raw mask
/// `[B, T]` (keys with mask 0 masked) or the 1-D key lengths `[B]` (right
/// padding, keys at or past the length masked; the form onnxruntime's BERT
/// optimiser writes, from a ReduceSum of the raw mask), told apart by the
/// rank [`Ctx::rank`] finds; masked keys get `mask_filter_value` (default
/// -10000) added. Other forms (`[2B]`, `[3B + 2]`, 3-D, 4-D) and a mask of
/// unknown rank are refused.
/// `unidirectional = 1` adds the lowest float to the scores of later
/// positions (opset >= 11 for Range): onnxruntime 1.23.2 gives later keys
/// no weight at all, even in a row whose earlier keys are all padding
/// (checked by running both; adding `mask_filter_value` there would not). `past`, `attention_bias`,
/// `past_sequence_length`, a `present` output, `do_rotary` and
/// `past_present_share_buffer` are refused.
fn attention(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (2, 7), (1, 2))?;
    for (slot, what) in [(4, "past"), (5, "attention_bias"), (6, "past_sequence_length")] {
        if ctx.input(node, slot).is_some() {
            return Err(ctx.bad(format!("input {slot} ({what}) is not supported")));
        }
    }
    if output(node, 1).is_some() {
        return Err(ctx.bad("output 1 (present) is not supported"));
    }
    for a in ["do_rotary", "past_present_share_buffer"] {
        if ctx.attr_int(node, a)?.unwrap_or(0) != 0 {
            return Err(ctx.bad(format!("attribute {a} != 0 is not supported")));
        }
    }
    let heads = ctx.attr_int(node, "num_heads")?.ok_or_else(|| ctx.bad("num_heads is missing"))?;
    if heads <= 0 {
        return Err(ctx.bad(format!("num_heads {heads} is not positive")));
    }
    let unidirectional = match ctx.attr_int(node, "unidirectional")?.unwrap_or(0) {
        0 => false,
        1 => true,
        v => return Err(ctx.bad(format!("unidirectional = {v} is neither 0 nor 1"))),
    };
    let filter = ctx.attr_float(node, "mask_filter_value")?.unwrap_or(-10000.0);
    if !filter.is_finite() {
        return Err(ctx.bad(format!("mask_filter_value {filter} is not finite")));
    }
    let x = ctx.required(node, 0)?;
    let w = ctx.required(node, 1)?;
    let sizes = match ctx.attr_ints(node, "qkv_hidden_sizes")? {
        Some(s) => {
            if s.len() != 3 || s.iter().any(|&d| d <= 0) || s[0] != s[1] {
                return Err(ctx.bad(format!(
                    "qkv_hidden_sizes {s:?} is not three positive sizes with Q and K equal"
                )));
            }
            s
        }
        None => {
            let dims = ctx.constant(w).map(|t| t.dims.clone()).ok_or_else(|| {
                ctx.bad("the weights are not a constant and qkv_hidden_sizes is missing")
            })?;
            match dims.as_slice() {
                [_, n] if *n > 0 && n % 3 == 0 => vec![n / 3; 3],
                _ => {
                    return Err(ctx.bad(format!(
                        "weights of shape {dims:?} are not [input_hidden, 3 * hidden]"
                    )));
                }
            }
        }
    };
    if let Some(t) = ctx.constant(w)
        && (t.dims.len() != 2 || t.dims[1] != sizes.iter().sum::<i64>())
    {
        return Err(
            ctx.bad(format!("weights of shape {:?} do not match hidden sizes {sizes:?}", t.dims))
        );
    }
    if sizes[0] % heads != 0 || sizes[2] % heads != 0 {
        return Err(ctx.bad(format!("hidden sizes {sizes:?} do not divide by {heads} heads")));
    }
    let (d, dv) = (sizes[0] / heads, sizes[2] / heads);
    let scale = ctx.attr_float(node, "scale")?.unwrap_or(1.0 / (d as f32).sqrt());
    if !scale.is_finite() || scale == 0.0 {
        return Err(ctx.bad(format!("scale {scale} is not a finite non-zero number")));
    }
    if unidirectional && ctx.opset < 11 {
        return Err(ctx.bad(format!(
            "unidirectional needs Range (opset >= 11); the model has opset {}",
            ctx.opset
        )));
    }

    let mut out = Vec::new();
    let parts = match split_projections(ctx, node, w, &sizes)? {
        // Three projections, as the network was written before onnxruntime
        // packed them (and as a pin of the unfused model lists them).
        Some(parts) => {
            let mut names = Vec::new();
            for (k, (wk, bk)) in parts.into_iter().enumerate() {
                let hint = ["q", "k", "v"][k];
                let (n, mut p) = ctx.node1("MatMul", &[x, &wk], &format!("{hint}_proj"), vec![]);
                out.push(n);
                if let Some(bk) = bk {
                    let (n, biased) = ctx.node1("Add", &[&p, &bk], hint, vec![]);
                    out.push(n);
                    p = biased;
                }
                names.push(p);
            }
            [names[0].clone(), names[1].clone(), names[2].clone()]
        }
        None => {
            let (n, mut proj) = ctx.node1("MatMul", &[x, w], "qkv", vec![]);
            out.push(n);
            if let Some(bias) = ctx.input(node, 2) {
                let (n, biased) = ctx.node1("Add", &[&proj, bias], "qkv_biased", vec![]);
                out.push(n);
                proj = biased;
            }
            let parts = [ctx.name("q"), ctx.name("k"), ctx.name("v")];
            let part_refs: Vec<&str> = parts.iter().map(String::as_str).collect();
            if ctx.opset >= 13 {
                let split = ctx.init_i64("split", &[3], sizes.clone());
                out.push(ctx.node("Split", &[&proj, &split], &part_refs, vec![int("axis", 2)]));
            } else {
                out.push(ctx.node(
                    "Split",
                    &[&proj],
                    &part_refs,
                    vec![int("axis", 2), ints("split", &sizes)],
                ));
            }
            parts
        }
    };
    let mut heads_first = |ctx: &mut Ctx<'_>, v: &str, dh: i64, perm: &[i64], hint: &str| {
        let shape = ctx.init_i64("heads_shape", &[4], vec![0, 0, heads, dh]);
        let (n, r) = ctx.node1("Reshape", &[v, &shape], &format!("{hint}_heads"), vec![]);
        out.push(n);
        let (n, t) = ctx.node1("Transpose", &[&r], &format!("{hint}_t"), vec![ints("perm", perm)]);
        out.push(n);
        t
    };
    let q = heads_first(ctx, &parts[0], d, &[0, 2, 1, 3], "q");
    let k = heads_first(ctx, &parts[1], d, &[0, 2, 3, 1], "k");
    let v = heads_first(ctx, &parts[2], dv, &[0, 2, 1, 3], "v");
    let (n, qk) = ctx.node1("MatMul", &[&q, &k], "qk", vec![]);
    out.push(n);
    let s = ctx.init_f32("scale", &[], vec![scale]);
    let (n, mut scores) = ctx.node1("Mul", &[&qk, &s], "scores", vec![]);
    out.push(n);
    if let Some(mask) = ctx.input(node, 3) {
        let keep = match ctx.rank(mask) {
            Some(2) => {
                // Raw mask [B, T]: 0 masks a key, anything above 0 keeps it.
                let zero_i = ctx.init("mask_zero", int32_scalar(0));
                let (n, keep) = ctx.node1("Greater", &[mask, &zero_i], "mask_keep", vec![]);
                out.push(n);
                keep
            }
            Some(1) if ctx.opset < 11 => {
                return Err(ctx.bad(format!(
                    "a mask_index of key lengths needs Range (opset >= 11); the model has opset {}",
                    ctx.opset
                )));
            }
            Some(1) => {
                // Key lengths [B] (right padding): key j is kept when j < len[b].
                // Reshaping to [B, 1] with B taken from the input refuses, at
                // run time, the [2B] and [3B + 2] forms of the same rank.
                let (n, shape) = ctx.node1("Shape", &[x], "input_shape", vec![]);
                out.push(n);
                let first = ctx.init_i64("batch_axis", &[1], vec![0]);
                let (n, batch) =
                    ctx.node1("Gather", &[&shape, &first], "batch", vec![int("axis", 0)]);
                out.push(n);
                let one = ctx.init_i64("one", &[1], vec![1]);
                let (n, col) =
                    ctx.node1("Concat", &[&batch, &one], "lengths_shape", vec![int("axis", 0)]);
                out.push(n);
                let (n, lens) = ctx.node1("Reshape", &[mask, &col], "lengths", vec![]);
                out.push(n);
                let (n, lens64) = ctx.node1("Cast", &[&lens], "lengths_i64", vec![int("to", 7)]);
                out.push(n);
                let (n, kshape) = ctx.node1("Shape", &[&k], "key_shape", vec![]);
                out.push(n);
                let last = ctx.init_i64("key_axis", &[], vec![3]);
                let (n, total) =
                    ctx.node1("Gather", &[&kshape, &last], "key_len", vec![int("axis", 0)]);
                out.push(n);
                let start = ctx.init_i64("range_start", &[], vec![0]);
                let step = ctx.init_i64("range_step", &[], vec![1]);
                let (n, pos) =
                    ctx.node1("Range", &[&start, &total, &step], "key_positions", vec![]);
                out.push(n);
                let (n, keep) = ctx.node1("Less", &[&pos, &lens64], "mask_keep", vec![]);
                out.push(n);
                keep
            }
            Some(r) => {
                return Err(ctx.bad(format!(
                    "mask_index of rank {r} is not supported (only [B, T] raw masks and [B] lengths)"
                )));
            }
            None => {
                return Err(ctx.bad(
                    "mask_index has no known rank (declare its shape in value_info), \
                     so its form cannot be told",
                ));
            }
        };
        let zero = ctx.init_f32("zero", &[], vec![0.0]);
        let f = ctx.init_f32("mask_filter", &[], vec![filter]);
        let (n, add) = ctx.node1("Where", &[&keep, &zero, &f], "mask_add", vec![]);
        out.push(n);
        let bias4 = ctx.name("mask_bias");
        out.extend(ctx.unsqueeze(&add, &[1, 2], &bias4));
        let (n, masked) = ctx.node1("Add", &[&scores, &bias4], "scores_masked", vec![]);
        out.push(n);
        scores = masked;
    }
    if unidirectional {
        let (n, shape) = ctx.node1("Shape", &[x], "input_shape", vec![]);
        out.push(n);
        let one_idx = ctx.init_i64("seq_axis", &[], vec![1]);
        let (n, len) = ctx.node1("Gather", &[&shape, &one_idx], "seq_len", vec![int("axis", 0)]);
        out.push(n);
        let start = ctx.init_i64("range_start", &[], vec![0]);
        let step = ctx.init_i64("range_step", &[], vec![1]);
        let (n, pos) = ctx.node1("Range", &[&start, &len, &step], "positions", vec![]);
        out.push(n);
        let rows = ctx.name("rows");
        out.extend(ctx.unsqueeze(&pos, &[1], &rows));
        let cols = ctx.name("cols");
        out.extend(ctx.unsqueeze(&pos, &[0], &cols));
        let (n, later) = ctx.node1("Greater", &[&cols, &rows], "later", vec![]);
        out.push(n);
        let zero = ctx.init_f32("zero", &[], vec![0.0]);
        let lowest = ctx.init_f32("lowest", &[], vec![f32::MIN]);
        let (n, causal) = ctx.node1("Where", &[&later, &lowest, &zero], "causal", vec![]);
        out.push(n);
        let (n, masked) = ctx.node1("Add", &[&scores, &causal], "scores_causal", vec![]);
        out.push(n);
        scores = masked;
    }
    let (n, probs) = ctx.node1("Softmax", &[&scores], "probs", vec![int("axis", 3)]);
    out.push(n);
    let (n, context) = ctx.node1("MatMul", &[&probs, &v], "context", vec![]);
    out.push(n);
    let (n, merged) =
        ctx.node1("Transpose", &[&context], "context_t", vec![ints("perm", &[0, 2, 1, 3])]);
    out.push(n);
    let shape = ctx.init_i64("output_shape", &[3], vec![0, 0, sizes[2]]);
    out.push(ctx.node("Reshape", &[&merged, &shape], &[&node.output[0]], vec![]));
    Ok(Rewrite::Into(out))
}

/// One of the three projections: its weight and, when there is one, its bias.
type Projection = (String, Option<String>);

/// The packed Q/K/V weight (and bias) split into three float32 initializers
/// by columns, when both are float32 constants: `x @ W[:, a..b] + bias[a..b]`
/// is column block `a..b` of `x @ W + bias`, so the split changes no value.
/// `None` (keep the packed form) for computed or non-float32 weights.
fn split_projections(
    ctx: &mut Ctx<'_>,
    node: &NodeProto,
    w: &str,
    sizes: &[i64],
) -> Result<Option<Vec<Projection>>> {
    let float32 = |t: Option<&crate::proto::TensorProto>| t.is_some_and(|t| t.data_type == 1);
    let bias = ctx.input(node, 2);
    if !float32(ctx.constant(w)) || bias.is_some_and(|b| !float32(ctx.constant(b))) {
        return Ok(None);
    }
    let Some(weights) = ctx.weight_f32(w)? else { return Ok(None) };
    let bias = match bias {
        Some(b) => ctx.const_f32(b)?,
        None => None,
    };
    let total: i64 = sizes.iter().sum();
    let rows = weights.len() as i64 / total.max(1);
    if rows * total != weights.len() as i64
        || bias.as_ref().is_some_and(|b| b.len() as i64 != total)
    {
        return Ok(None);
    }
    let mut parts = Vec::new();
    let mut start = 0;
    for (k, &size) in sizes.iter().enumerate() {
        let hint = ["q", "k", "v"][k];
        let cols = start as usize..(start + size) as usize;
        let mut wk = Vec::with_capacity((rows * size) as usize);
        for r in 0..rows as usize {
            let row = &weights[r * total as usize..(r + 1) * total as usize];
            wk.extend_from_slice(&row[cols.clone()]);
        }
        let wname = ctx.init_f32(&format!("{hint}_weight"), &[rows, size], wk);
        let bname = bias
            .as_ref()
            .map(|b| ctx.init_f32(&format!("{hint}_bias"), &[size], b[cols.clone()].to_vec()));
        parts.push((wname, bname));
        start += size;
    }
    Ok(Some(parts))
}

#[cfg(test)]
mod tests {
    //! Each test cites the contrib docs section (onnxruntime 1.23,
    //! docs/ContribOperators.md) whose semantics it checks; numeric agreement
    //! with onnxruntime is checked on the per-op fixtures.
    use super::*;
    use crate::load::ExternalData;
    use crate::lower::{Lowered, lower};
    use crate::proto::{
        AttributeProto, GraphProto, ModelProto, OperatorSetIdProto, TensorProto, TensorShapeProto,
        TypeProto, ValueInfoProto, tensor_shape_proto, type_proto,
    };

    fn f32_init(name: &str, dims: &[i64]) -> TensorProto {
        let n = dims.iter().product::<i64>() as usize;
        TensorProto {
            name: name.into(),
            dims: dims.to_vec(),
            data_type: 1,
            float_data: vec![0.5; n],
            ..Default::default()
        }
    }

    fn value(name: &str, elem_type: i32, rank: usize) -> ValueInfoProto {
        let dim = tensor_shape_proto::Dimension {
            value: Some(tensor_shape_proto::dimension::Value::DimValue(2)),
            ..Default::default()
        };
        ValueInfoProto {
            name: name.into(),
            r#type: Some(TypeProto {
                value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                    elem_type,
                    shape: Some(TensorShapeProto { dim: vec![dim; rank] }),
                })),
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    /// A model of `nodes` with the given initializers and graph inputs.
    fn model(
        opset: i64,
        nodes: Vec<NodeProto>,
        inits: Vec<TensorProto>,
        inputs: Vec<ValueInfoProto>,
    ) -> ModelProto {
        ModelProto {
            ir_version: 8,
            opset_import: vec![
                OperatorSetIdProto { domain: String::new(), version: opset },
                OperatorSetIdProto { domain: MS_DOMAIN.into(), version: 1 },
            ],
            graph: Some(GraphProto {
                name: "g".into(),
                node: nodes,
                initializer: inits,
                input: inputs,
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    fn ms(
        op: &str,
        inputs: &[&str],
        outputs: &[&str],
        attribute: Vec<AttributeProto>,
    ) -> NodeProto {
        NodeProto {
            name: format!("{op}_n"),
            op_type: op.into(),
            domain: MS_DOMAIN.into(),
            input: inputs.iter().map(|s| (*s).into()).collect(),
            output: outputs.iter().map(|s| (*s).into()).collect(),
            attribute,
            ..Default::default()
        }
    }

    fn run(opset: i64, node: NodeProto, inits: Vec<TensorProto>) -> Result<Lowered> {
        run_with(opset, node, inits, vec![])
    }

    fn run_with(
        opset: i64,
        node: NodeProto,
        inits: Vec<TensorProto>,
        inputs: Vec<ValueInfoProto>,
    ) -> Result<Lowered> {
        lower(
            model(opset, vec![node], inits, inputs),
            &ExternalData::none(),
            &crate::lower::LowerConfig::STANDARD,
        )
    }

    fn nodes(l: &Lowered) -> &[NodeProto] {
        &l.model.graph.as_ref().unwrap().node
    }

    fn ops(l: &Lowered) -> Vec<&str> {
        nodes(l).iter().map(|n| n.op_type.as_str()).collect()
    }

    fn find<'a>(l: &'a Lowered, op: &str) -> Vec<&'a NodeProto> {
        nodes(l).iter().filter(|n| n.op_type == op).collect()
    }

    fn producer<'a>(l: &'a Lowered, out: &str) -> &'a NodeProto {
        nodes(l).iter().find(|n| n.output.iter().any(|o| o == out)).expect("a producer")
    }

    fn err(r: Result<Lowered>) -> String {
        let e = r.expect_err("an error");
        let m = e.message().to_owned();
        assert!(m.contains("_n'"), "the error names the node: {m}");
        m
    }

    fn ln_inits() -> Vec<TensorProto> {
        vec![f32_init("gamma", &[8]), f32_init("beta", &[8]), f32_init("bias", &[8])]
    }

    // Contrib docs, com.microsoft.SkipLayerNormalization: the sum is
    // input + skip + bias; with the bias on the branch side the merge Add's
    // inputs are the biased branch and the skip, and the sum keeps output 3's name.
    #[test]
    fn skip_layer_norm_opset17_is_merge_then_layer_norm() {
        let n = ms(
            "SkipLayerNormalization",
            &["input", "skip", "gamma", "beta", "bias"],
            &["out", "", "", "sum"],
            vec![float("epsilon", 1e-5)],
        );
        let l = run(17, n, ln_inits()).unwrap();
        assert_eq!(ops(&l), ["Add", "Add", "LayerNormalization"]);
        let biased = producer(&l, "sum");
        assert_eq!(biased.input[1], "skip");
        let first = producer(&l, &biased.input[0]);
        assert_eq!(first.input, ["input", "bias"]);
        let ln = find(&l, "LayerNormalization")[0];
        assert_eq!(ln.input, ["sum", "gamma", "beta"]);
        assert_eq!(ln.output, ["out"]);
        assert_eq!(l.rewrites.len(), 1);
    }

    // Below opset 17 the layer norm is spelled as PyTorch's exporter spells it
    // (fixtures/torch/encoder_prenorm_decomposed.onnx); mean and inv_std_var
    // (keepdims) keep their names.
    #[test]
    fn skip_layer_norm_opset16_is_decomposed_with_statistics() {
        let n = ms(
            "SkipLayerNormalization",
            &["input", "skip", "gamma", "beta"],
            &["out", "mean", "inv", "sum"],
            vec![],
        );
        let l = run(16, n, ln_inits()).unwrap();
        assert_eq!(
            ops(&l),
            [
                "Add",
                "ReduceMean",
                "Sub",
                "Pow",
                "ReduceMean",
                "Add",
                "Sqrt",
                "Reciprocal",
                "Div",
                "Mul",
                "Add"
            ]
        );
        assert_eq!(producer(&l, "sum").input, ["input", "skip"]);
        assert_eq!(producer(&l, "mean").op_type, "ReduceMean");
        assert_eq!(producer(&l, "inv").op_type, "Reciprocal");
        assert_eq!(producer(&l, "out").op_type, "Add");
        // Default epsilon 1e-12 (contrib docs, attribute epsilon).
        let g = l.model.graph.as_ref().unwrap();
        assert!(g.initializer.iter().any(|t| t.float_data == [1e-12]));
    }

    // Contrib docs, com.microsoft.SkipSimplifiedLayerNormalization: RMS norm.
    #[test]
    fn skip_simplified_layer_norm_forms() {
        let inits = || vec![f32_init("gamma", &[8]), f32_init("bias", &[8])];
        let n = || {
            ms("SkipSimplifiedLayerNormalization", &["input", "skip", "gamma"], &["out"], vec![])
        };
        let l = run(17, n(), inits()).unwrap();
        assert_eq!(ops(&l), ["Add", "Pow", "ReduceMean", "Add", "Sqrt", "Div", "Mul"]);
        let l = run(23, n(), inits()).unwrap();
        assert_eq!(ops(&l), ["Add", "RMSNormalization"]);
        let with_bias = ms(
            "SkipSimplifiedLayerNormalization",
            &["input", "skip", "gamma", "bias"],
            &["out", "", "inv", "sum"],
            vec![],
        );
        let l = run(23, with_bias, inits()).unwrap();
        assert_eq!(producer(&l, "inv").op_type, "Reciprocal", "inv_std_var needs the spelled form");
        assert_eq!(producer(&l, "sum").input[1], "skip");
        let mean = ms(
            "SkipSimplifiedLayerNormalization",
            &["input", "skip", "gamma"],
            &["out", "mean"],
            vec![],
        );
        assert!(err(run(17, mean, inits())).contains("mean"));
    }

    #[test]
    fn malformed_skip_norms_are_errors() {
        let short = ms("SkipLayerNormalization", &["input", "skip"], &["out"], vec![]);
        assert!(err(run(17, short, ln_inits())).contains("expects 3 to 5 inputs"));
        let typed = ms(
            "SkipLayerNormalization",
            &["input", "skip", "gamma"],
            &["out"],
            vec![int("epsilon", 1)],
        );
        assert!(err(run(17, typed, ln_inits())).contains("epsilon"));
        let negative = ms(
            "SkipLayerNormalization",
            &["input", "skip", "gamma"],
            &["out"],
            vec![float("epsilon", -1.0)],
        );
        err(run(17, negative, ln_inits()));
    }

    // Contrib docs, com.microsoft.FusedMatMul: alpha * op(A) @ op(B).
    #[test]
    fn fused_matmul_transposes_and_scales() {
        let n = ms(
            "FusedMatMul",
            &["a", "w"],
            &["y"],
            vec![int("transA", 1), int("transB", 1), float("alpha", 0.5)],
        );
        let l = run(17, n, vec![f32_init("w", &[6, 8])]).unwrap();
        assert_eq!(ops(&l), ["Einsum", "Transpose", "MatMul", "Mul"]);
        assert_eq!(find(&l, "Transpose")[0].attribute[0].ints, [1, 0]);
        assert_eq!(producer(&l, "y").op_type, "Mul");
        let plain = ms("FusedMatMul", &["a", "b"], &["y"], vec![]);
        assert_eq!(ops(&run(17, plain, vec![]).unwrap()), ["MatMul"]);
        let batch = ms("FusedMatMul", &["a", "b"], &["y"], vec![int("transBatchA", 1)]);
        assert!(err(run(17, batch, vec![])).contains("transBatchA"));
        let old = ms("FusedMatMul", &["a", "b"], &["y"], vec![int("transA", 1)]);
        assert!(err(run(11, old, vec![])).contains("Einsum"));
    }

    // Contrib docs, com.microsoft.FusedGemm: Gemm, then the activation.
    #[test]
    fn fused_gemm_is_gemm_then_activation() {
        let n = ms(
            "FusedGemm",
            &["a", "w", "c"],
            &["y"],
            vec![
                string("activation", "LeakyRelu"),
                float("activation_alpha", 0.2),
                int("transB", 1),
            ],
        );
        let l = run(13, n, vec![f32_init("w", &[4, 5]), f32_init("c", &[4])]).unwrap();
        assert_eq!(ops(&l), ["Gemm", "LeakyRelu"]);
        let act = producer(&l, "y");
        assert_eq!((act.attribute[0].name.as_str(), act.attribute[0].f), ("alpha", 0.2));
        assert_eq!(find(&l, "Gemm")[0].attribute[0].name, "transB");
        let unknown = ms("FusedGemm", &["a", "w"], &["y"], vec![string("activation", "Frob")]);
        assert!(err(run(13, unknown, vec![])).contains("'Frob'"));
        let missing = ms("FusedGemm", &["a", "w"], &["y"], vec![]);
        err(run(13, missing, vec![]));
    }

    // Contrib docs, com.microsoft.Gelu / BiasGelu / FastGelu / QuickGelu.
    #[test]
    fn gelu_family_by_opset() {
        let g = || ms("Gelu", &["x"], &["y"], vec![]);
        assert_eq!(ops(&run(17, g(), vec![]).unwrap()), ["Div", "Erf", "Add", "Mul", "Mul"]);
        let l = run(20, g(), vec![]).unwrap();
        assert_eq!(ops(&l), ["Gelu"]);
        assert_eq!(&l.model.graph.as_ref().unwrap().node[0].attribute[0].s[..], b"none");
        let bias = ms("BiasGelu", &["x", "b"], &["y"], vec![]);
        assert_eq!(ops(&run(20, bias, vec![]).unwrap()), ["Add", "Gelu"]);
        let fast = || ms("FastGelu", &["x", "b"], &["y"], vec![]);
        let l = run(20, fast(), vec![]).unwrap();
        assert_eq!(ops(&l), ["Add", "Gelu"]);
        assert_eq!(&find(&l, "Gelu")[0].attribute[0].s[..], b"tanh");
        assert_eq!(
            ops(&run(17, fast(), vec![]).unwrap()),
            ["Add", "Pow", "Mul", "Add", "Mul", "Tanh", "Add", "Mul", "Mul"]
        );
        let quick = || ms("QuickGelu", &["x"], &["y"], vec![]);
        let l = run(17, quick(), vec![]).unwrap();
        assert_eq!(ops(&l), ["Mul", "Sigmoid", "Mul", "Div"]);
        // The Mul takes z and Sigmoid(z): a swish, not a gate.
        let swish = find(&l, "Mul")[1];
        assert_eq!(producer(&l, &swish.input[1]).input[0], swish.input[0]);
        assert_eq!(ops(&run(24, quick(), vec![]).unwrap()), ["Swish"]);
        let zero = ms("QuickGelu", &["x"], &["y"], vec![float("alpha", 0.0)]);
        err(run(17, zero, vec![]));
        let extra = ms("Gelu", &["x", "z"], &["y"], vec![]);
        err(run(17, extra, vec![]));
    }

    fn attention_inits() -> Vec<TensorProto> {
        vec![f32_init("w", &[8, 24]), f32_init("b", &[24])]
    }

    // Contrib docs, com.microsoft.Attention: merged QKV projection, heads,
    // softmax(Q K^T * scale + mask) V.
    #[test]
    fn attention_plain_and_masks() {
        let n = ms("Attention", &["x", "w", "b"], &["y"], vec![int("num_heads", 2)]);
        let l = run(13, n, attention_inits()).unwrap();
        assert_eq!(
            ops(&l),
            [
                "MatMul",
                "Add",
                "MatMul",
                "Add",
                "MatMul",
                "Add",
                "Reshape",
                "Transpose",
                "Reshape",
                "Transpose",
                "Reshape",
                "Transpose",
                "MatMul",
                "Mul",
                "Softmax",
                "MatMul",
                "Transpose",
                "Reshape"
            ]
        );
        assert_eq!(producer(&l, "y").op_type, "Reshape");
        let g = l.model.graph.as_ref().unwrap();
        assert!(g.initializer.iter().any(|t| t.float_data == [0.5]), "scale 1/sqrt(4)");
        assert!(g.initializer.iter().any(|t| t.int64_data == [0, 0, 2, 4]));
        // Constant float32 weights become three projections (above); other
        // weights keep the packed projection and a Split, which takes its
        // sizes as an attribute before opset 13.
        let half = TensorProto {
            name: "w".into(),
            dims: vec![8, 24],
            data_type: 10,
            int32_data: vec![0x3800; 8 * 24],
            ..Default::default()
        };
        let packed = vec![half, f32_init("b", &[24])];
        let n = ms("Attention", &["x", "w", "b"], &["y"], vec![int("num_heads", 2)]);
        let split = run(12, n.clone(), packed.clone()).unwrap();
        assert_eq!(find(&split, "Split")[0].input.len(), 1);
        let split = run(13, n, packed).unwrap();
        assert_eq!(find(&split, "Split")[0].input.len(), 2);

        // A 2-D raw mask (declared) and 1-D lengths (through Cast and a
        // ReduceSum with keepdims = 0, as onnxruntime's optimiser writes it).
        let n = ms("Attention", &["x", "w", "b", "mask"], &["y"], vec![int("num_heads", 2)]);
        let raw = run_with(13, n.clone(), attention_inits(), vec![value("mask", 6, 2)]).unwrap();
        assert!(ops(&raw).contains(&"Greater") && !ops(&raw).contains(&"Less"));
        let cast = NodeProto {
            op_type: "Cast".into(),
            input: vec!["raw".into()],
            output: vec!["raw32".into()],
            attribute: vec![int("to", 6)],
            ..Default::default()
        };
        let sum = NodeProto {
            op_type: "ReduceSum".into(),
            input: vec!["raw32".into(), "axes".into()],
            output: vec!["mask".into()],
            attribute: vec![int("keepdims", 0)],
            ..Default::default()
        };
        let axes = TensorProto {
            name: "axes".into(),
            dims: vec![1],
            data_type: 7,
            int64_data: vec![1],
            ..Default::default()
        };
        let mut inits = attention_inits();
        inits.push(axes);
        let m = model(13, vec![cast, sum, n.clone()], inits, vec![value("raw", 7, 2)]);
        let lengths =
            lower(m, &ExternalData::none(), &crate::lower::LowerConfig::STANDARD).unwrap();
        assert!(ops(&lengths).contains(&"Less") && ops(&lengths).contains(&"Range"));
        assert!(err(run(13, n, attention_inits())).contains("no known rank"));
    }

    #[test]
    fn attention_unsupported_forms_are_errors() {
        let heads = || int("num_heads", 2);
        let past = ms("Attention", &["x", "w", "b", "", "past"], &["y"], vec![heads()]);
        assert!(err(run(13, past, attention_inits())).contains("past"));
        let present = ms("Attention", &["x", "w", "b"], &["y", "present"], vec![heads()]);
        assert!(err(run(13, present, attention_inits())).contains("present"));
        let rotary = ms("Attention", &["x", "w", "b"], &["y"], vec![heads(), int("do_rotary", 1)]);
        assert!(err(run(13, rotary, attention_inits())).contains("do_rotary"));
        let none = ms("Attention", &["x", "w", "b"], &["y"], vec![]);
        assert!(err(run(13, none, attention_inits())).contains("num_heads"));
        let odd = ms("Attention", &["x", "w", "b"], &["y"], vec![int("num_heads", 3)]);
        assert!(err(run(13, odd, attention_inits())).contains("divide"));
        let mask3 = ms("Attention", &["x", "w", "b", "mask"], &["y"], vec![heads()]);
        let r = run_with(13, mask3, attention_inits(), vec![value("mask", 6, 3)]);
        assert!(err(r).contains("rank 3"));
        let causal =
            ms("Attention", &["x", "w", "b"], &["y"], vec![heads(), int("unidirectional", 1)]);
        assert!(err(run(10, causal.clone(), attention_inits())).contains("opset"));
        assert!(ops(&run(13, causal, attention_inits()).unwrap()).contains(&"Range"));
        let sizes = ms(
            "Attention",
            &["x", "w", "b"],
            &["y"],
            vec![heads(), ints("qkv_hidden_sizes", &[8, 4, 12])],
        );
        assert!(err(run(13, sizes, attention_inits())).contains("qkv_hidden_sizes"));
    }
}
