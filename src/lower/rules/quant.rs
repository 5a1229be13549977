//! Quantised operators (the QOperator format: QLinear* and QGemm, as
//! onnxruntime's `quantize_static(quant_format=QOperator)` writes them, and
//! the fused dynamic-quantisation contrib ops), lowered to the QDQ form:
//! `DequantizeLinear` on each quantised input, the float op, and a
//! `QuantizeLinear` onto the op's quantised output (which keeps its name and
//! element type: the output zero point's type). Detection then sees `Add`
//! merges and `Conv`/`Gemm`/`MatMul` layers exactly as in a QDQ model, and
//! tract runs `QuantizeLinear`/`DequantizeLinear`.
//!
//! Semantics: the ONNX operator specification (QuantizeLinear,
//! DequantizeLinear, QLinearConv, QLinearMatMul) and onnxruntime's contrib
//! operator documentation (docs/ContribOperators.md, onnxruntime 1.23; the
//! schemas onnxruntime 1.23.2 registers) for the `com.microsoft` ops; the
//! section is cited beside each rule.
//!
//! **Exactness.** In real arithmetic every rewrite computes what the fused
//! op computes: `DequantizeLinear` is `(q - zp) * scale` and each op is
//! defined as (or, for the integer kernels, equals) dequantise → float op →
//! quantise. onnxruntime's kernels accumulate in int32 and requantise with a
//! float multiplier (or look-up tables), the lowered chain accumulates in
//! float; the real values before the final rounding differ by float
//! rounding only (relative ~1e-6 of the accumulated value), so a quantised
//! output differs by at most one quantisation step of its output scale,
//! and only where the real value lies within that rounding of a
//! half-step boundary. Float outputs (QGemm without `y_scale`,
//! DynamicQuantizeMatMul, MatMulIntegerToFloat) agree to ~1e-6 relative.
//!
//! **What is checked** (an error naming the node): the input count, the
//! attribute types and names, that every scale is float, finite and
//! positive and every zero point uint8 or int8 and within its type's range
//! (zero points stored in `int32_data` can hold anything), that scales and
//! zero points are scalars (or 1-element vectors), or 1-D per-channel where
//! the op allows it with as many elements as the channels, and that scale
//! and zero point agree in shape. Scales and zero points that are not
//! constants are passed on unchecked (the runtime checks them); rules that
//! must compute with them (an int32 bias) refuse them.
//!
//! **Not lowered** (left alone or refused, by design):
//! - `DynamicQuantizeLinear` + `MatMulInteger` (+ the Cast/Mul scale chain),
//!   what `quantize_dynamic` writes: standard ops that tract runs (block RMS
//!   within 1e-7 relative of onnxruntime on `encoder_postnorm_dynq`), and
//!   detection already takes `MatMulInteger` with a static weight for a
//!   linear layer (`graph::op::is_linear_op`), so nothing is rewritten. A
//!   float `MatMul` in its place would not be exact either: int32
//!   accumulations above 2^24 (e.g. K > 256 products of 255 × 255) do not fit
//!   a float32 mantissa.
//! - `channels_last=1` (NHWC) forms of QLinearConv, QLinearGlobalAveragePool
//!   and QLinearAveragePool (onnxruntime's NHWC transformer writes them):
//!   refused, since a rank-agnostic rewrite needs the input's rank, which a
//!   rule does not see.
//! - per-row `a` scales of QLinearMatMul and per-column `A` scales of
//!   MatMulIntegerToFloat: refused (onnxruntime's quantiser writes neither).
//! - float16 scales (MatMulIntegerToFloat allows them): refused.
//!
//! **Measured against onnxruntime 1.23.2** (one-op models, uint8 and int8,
//! random operands): every quantised output within 1 step of the output
//! scale (QLinearConv, QLinearMatMul, QGemm, QLinearAdd, QLinearMul,
//! QLinearGlobalAveragePool, QLinearAveragePool, QLinearReduceMean against
//! a float64 reference as onnxruntime has no CPU kernel for it); 0 steps
//! for QLinearSigmoid, QLinearLeakyRelu, QLinearConcat, QLinearWhere;
//! float outputs within 3e-7 relative. One exception: onnxruntime's int8
//! QLinearSoftmax wraps a probability that rounds to 1.0 at scale 1/256 and
//! zero point -128 (128 steps above the zero point) to -128, where
//! `QuantizeLinear` saturates to 127 as the specification says; the
//! lowering keeps the specified saturation.

use crate::error::Result;
use crate::load::tensor::dtype_name;
use crate::lower::emit::{self, Ctx};
use crate::lower::{MS_DOMAIN, Rewrite, Rule};
use crate::proto::{AttributeProto, NodeProto, TensorProto};

pub(super) const RULES: &[(&str, &str, Rule)] = &[
    ("", "QLinearConv", qlinear_conv),
    (MS_DOMAIN, "QLinearConv", ms_qlinear_conv),
    ("", "QLinearMatMul", qlinear_matmul),
    (MS_DOMAIN, "QGemm", qgemm),
    (MS_DOMAIN, "QLinearAdd", qlinear_add),
    (MS_DOMAIN, "QLinearMul", qlinear_mul),
    (MS_DOMAIN, "QLinearGlobalAveragePool", qlinear_global_average_pool),
    (MS_DOMAIN, "QLinearAveragePool", qlinear_average_pool),
    (MS_DOMAIN, "QLinearConcat", qlinear_concat),
    (MS_DOMAIN, "QLinearSigmoid", qlinear_sigmoid),
    (MS_DOMAIN, "QLinearLeakyRelu", qlinear_leaky_relu),
    (MS_DOMAIN, "QLinearSoftmax", qlinear_softmax),
    (MS_DOMAIN, "QLinearReduceMean", qlinear_reduce_mean),
    (MS_DOMAIN, "QLinearWhere", qlinear_where),
    (MS_DOMAIN, "DynamicQuantizeMatMul", dynamic_quantize_matmul),
    (MS_DOMAIN, "MatMulIntegerToFloat", matmul_integer_to_float),
];

/// ONNX `TensorProto.DataType` codes used here.
const FLOAT: i32 = 1;
const UINT8: i32 = 2;
const INT8: i32 = 3;
const INT32: i32 = 6;

/// The quantised element types these ops take.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum QType {
    U8,
    I8,
}

impl QType {
    fn of(data_type: i32) -> Option<QType> {
        match data_type {
            UINT8 => Some(QType::U8),
            INT8 => Some(QType::I8),
            _ => None,
        }
    }

    fn data_type(self) -> i32 {
        match self {
            QType::U8 => UINT8,
            QType::I8 => INT8,
        }
    }

    fn range(self) -> (f32, f32) {
        match self {
            QType::U8 => (0.0, 255.0),
            QType::I8 => (-128.0, 127.0),
        }
    }
}

/// Whether a scale and zero point may be per-channel.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Grain {
    /// Per tensor only: a scalar or a 1-element vector.
    Tensor,
    /// Per tensor, or per channel as a 1-D tensor (or one whose other
    /// dimensions are all 1, the last being the channels' when `last` is set).
    Channel,
}

/// A quantised operand's scale and zero point, checked and ready for
/// `DequantizeLinear`/`QuantizeLinear`.
#[derive(Debug, Clone)]
struct Quant {
    /// What the op calls the operand (for messages): `x`, `w`, `A`, …
    what: String,
    /// The scale tensor to emit (a fresh scalar or 1-D copy when the
    /// original had another layout).
    scale: String,
    /// The zero point tensor to emit, if any.
    zero: Option<String>,
    /// The zero point's element type, when known.
    ty: Option<QType>,
    /// The scale's values, when constant.
    scales: Option<Vec<f32>>,
    /// The zero point's values, when constant (absent zero point: 0).
    zeros: Option<Vec<f32>>,
    /// The number of channels when per channel (more than one value).
    channels: Option<usize>,
    /// Whether the op allows per-channel parameters but the scale is not a
    /// constant (the axis is then always given).
    maybe_channels: bool,
}

impl Quant {
    /// The scale of channel `c` (per tensor: the one scale).
    fn scale_of(&self, c: usize) -> Option<f32> {
        let s = self.scales.as_ref()?;
        Some(if s.len() == 1 { s[0] } else { s[c] })
    }
}

/// The shape a scale or zero point may have, given `grain`: `Some(n)` with
/// the element count when acceptable, `None` otherwise.
fn layout(dims: &[i64], grain: Grain) -> Option<usize> {
    let n: i64 = dims.iter().product();
    match (dims, grain) {
        ([], _) | ([1], _) => Some(1),
        ([k], Grain::Channel) if *k >= 1 => Some(*k as usize),
        // [1, …, 1, n]: per channel along the last axis (QLinearMatMul's
        // per-column form for N-D inputs).
        (d, Grain::Channel) if d.len() > 1 && d[..d.len() - 1].iter().all(|&x| x == 1) => {
            Some(n.max(1) as usize)
        }
        _ => None,
    }
}

/// Reads and checks the scale in `scale_slot` and the zero point in
/// `zero_slot` (absent or omitted: 0) of `node`.
fn quant(
    ctx: &mut Ctx<'_>,
    node: &NodeProto,
    what: &str,
    scale_slot: usize,
    zero_slot: Option<usize>,
    grain: Grain,
) -> Result<Quant> {
    let scale = ctx.required(node, scale_slot)?;
    let zero = zero_slot.and_then(|s| ctx.input(node, s));
    let expect = match grain {
        Grain::Tensor => "a scalar",
        Grain::Channel => "a scalar or a 1-D tensor",
    };
    let mut scales = None;
    let mut scale_n = None;
    if let Some(t) = ctx.constant(scale) {
        if t.data_type != FLOAT {
            return Err(ctx.bad(format!(
                "{what} scale '{scale}' is {}, expected float32",
                dtype_name(t.data_type)
            )));
        }
        let n = layout(&t.dims, grain).ok_or_else(|| {
            ctx.bad(format!("{what} scale '{scale}' has shape {:?}, expected {expect}", t.dims))
        })?;
        let v = ctx.const_f32(scale)?.unwrap_or_default();
        if let Some(bad) = v.iter().find(|s| !(s.is_finite() && **s > 0.0)) {
            return Err(ctx.bad(format!(
                "{what} scale '{scale}' holds {bad}: a scale must be finite and positive"
            )));
        }
        scale_n = Some(n);
        scales = Some(v);
    }
    let mut ty = None;
    let mut zeros = None;
    let mut zero_n = None;
    if let Some(z) = zero
        && let Some(t) = ctx.constant(z)
    {
        let q = QType::of(t.data_type).ok_or_else(|| {
            ctx.bad(format!(
                "{what} zero point '{z}' is {}, expected uint8 or int8",
                dtype_name(t.data_type)
            ))
        })?;
        let n = layout(&t.dims, grain).ok_or_else(|| {
            ctx.bad(format!("{what} zero point '{z}' has shape {:?}, expected {expect}", t.dims))
        })?;
        let v = ctx.const_f32(z)?.unwrap_or_default();
        let (lo, hi) = q.range();
        if let Some(bad) = v.iter().find(|x| !(**x >= lo && **x <= hi)) {
            return Err(ctx.bad(format!(
                "{what} zero point '{z}' holds {bad}, outside {}'s range [{lo}, {hi}]",
                dtype_name(t.data_type)
            )));
        }
        ty = Some(q);
        zero_n = Some(n);
        zeros = Some(v);
    }
    if let (Some(s), Some(z)) = (scale_n, zero_n)
        && s != z
        && s != 1
        && z != 1
    {
        return Err(ctx.bad(format!(
            "{what} scale has {s} values but its zero point has {z}: they must agree"
        )));
    }
    let channels = scale_n.max(zero_n).filter(|&n| n > 1);
    let mut q = Quant {
        what: what.to_owned(),
        scale: scale.to_owned(),
        zero: zero.map(str::to_owned),
        ty,
        scales,
        zeros,
        channels,
        maybe_channels: grain == Grain::Channel && scale_n.is_none(),
    };
    normalise(ctx, &mut q, scale_n, zero_n);
    Ok(q)
}

/// Gives a checked scale and zero point the layout `DequantizeLinear` and
/// `QuantizeLinear` accept: scalars per tensor, equal-length 1-D tensors per
/// channel (fresh initializers where the original layout differs).
fn normalise(ctx: &mut Ctx<'_>, q: &mut Quant, scale_n: Option<usize>, zero_n: Option<usize>) {
    let want = q.channels.unwrap_or(1);
    let scalar = q.channels.is_none();
    let hint = q.what.to_ascii_lowercase();
    let fits = |dims: &[i64], len: usize| {
        if scalar { dims.is_empty() } else { dims.len() == 1 && len == want }
    };
    if let (Some(_), Some(v)) = (scale_n, &q.scales) {
        let dims = ctx.constant(&q.scale).map(|t| t.dims.clone()).unwrap_or_default();
        if !fits(&dims, v.len()) {
            let values = if v.len() == want { v.clone() } else { vec![v[0]; want] };
            let d: Vec<i64> = if scalar { vec![] } else { vec![want as i64] };
            q.scale = ctx.init_f32(&format!("{hint}_scale"), &d, values);
        }
    }
    if let (Some(_), Some(v), Some(ty), Some(name)) = (zero_n, &q.zeros, q.ty, q.zero.clone()) {
        let dims = ctx.constant(&name).map(|t| t.dims.clone()).unwrap_or_default();
        if !fits(&dims, v.len()) {
            let values: Vec<i32> = if v.len() == want {
                v.iter().map(|&x| x as i32).collect()
            } else {
                vec![v[0] as i32; want]
            };
            let d: Vec<i64> = if scalar { vec![] } else { vec![want as i64] };
            q.zero = Some(zero_init(ctx, &format!("{hint}_zero_point"), ty, &d, values));
        }
    }
}

/// A new uint8/int8 initializer (values in `int32_data`, as the standard
/// stores them when not raw).
fn zero_init(ctx: &mut Ctx<'_>, hint: &str, ty: QType, dims: &[i64], values: Vec<i32>) -> String {
    ctx.init(
        hint,
        TensorProto {
            dims: dims.to_vec(),
            data_type: ty.data_type(),
            int32_data: values,
            ..Default::default()
        },
    )
}

/// `QuantizeLinear` and `DequantizeLinear` exist from opset 10.
fn need_qdq_opset(ctx: &Ctx<'_>) -> Result<()> {
    if ctx.opset < 10 {
        return Err(ctx.bad(format!(
            "the model imports opset {}; QuantizeLinear/DequantizeLinear need opset >= 10",
            ctx.opset
        )));
    }
    Ok(())
}

/// The one element type several operands share (`T` of the op), from the
/// zero points whose type is known; an error if they disagree.
fn same_type(ctx: &Ctx<'_>, quants: &[&Quant]) -> Result<Option<QType>> {
    let mut ty: Option<(QType, &str)> = None;
    for q in quants {
        if let Some(t) = q.ty {
            match ty {
                Some((u, other)) if u != t => {
                    return Err(ctx.bad(format!(
                        "{} and {} must share one element type, but their zero points are {} and {}",
                        other,
                        q.what,
                        dtype_name(u.data_type()),
                        dtype_name(t.data_type())
                    )));
                }
                _ => ty = Some((t, &q.what)),
            }
        }
    }
    Ok(ty.map(|(t, _)| t))
}

/// `DequantizeLinear(x, scale, zero)`, per channel along `axis` when the
/// parameters are per channel. Below opset 13 (no `axis`), a per-channel
/// dequantisation of a constant `x` of known rank is written out as
/// `(Cast(x) - zero) * scale` with the parameters laid along `axis`.
fn dequantize(
    ctx: &mut Ctx<'_>,
    x: &str,
    q: &Quant,
    axis: i64,
    rank: Option<usize>,
) -> Result<(Vec<NodeProto>, String)> {
    let hint = format!("{}_float", q.what.to_ascii_lowercase());
    let mut inputs = vec![x, q.scale.as_str()];
    if let Some(z) = &q.zero {
        inputs.push(z);
    }
    let Some(n) = q.channels else {
        // A scale the op allows per channel but that is not a constant: give
        // the axis (ignored for a scalar) so a 1-D one is read along it.
        let attrs = if q.maybe_channels && ctx.opset >= 13 {
            vec![emit::int("axis", axis)]
        } else {
            vec![]
        };
        let (node, out) = ctx.node1("DequantizeLinear", &inputs, &hint, attrs);
        return Ok((vec![node], out));
    };
    if ctx.opset >= 13 {
        let (node, out) =
            ctx.node1("DequantizeLinear", &inputs, &hint, vec![emit::int("axis", axis)]);
        return Ok((vec![node], out));
    }
    let (Some(r), Some(scales)) = (rank, q.scales.as_ref()) else {
        return Err(ctx.bad(format!(
            "per-channel {} needs DequantizeLinear's axis (opset >= 13; the model imports {}) \
             or a constant operand and constant scales",
            q.what, ctx.opset
        )));
    };
    let a = if axis < 0 { axis + r as i64 } else { axis };
    if a < 0 || a >= r as i64 {
        return Err(ctx.bad(format!("{} has rank {r}, no axis {axis}", q.what)));
    }
    let mut dims = vec![1i64; r];
    dims[a as usize] = n as i64;
    let lower = q.what.to_ascii_lowercase();
    let s = ctx.init_f32(&format!("{lower}_scale_{a}"), &dims, scales.clone());
    let (cast, xf) = ctx.node1("Cast", &[x], &format!("{lower}_cast"), vec![emit::int("to", 1)]);
    let mut nodes = vec![cast];
    let mut shifted = xf;
    if let Some(z) = q.zeros.as_ref().filter(|z| z.iter().any(|&v| v != 0.0)) {
        let zv = if z.len() == n { z.clone() } else { vec![z[0]; n] };
        let zi = ctx.init_f32(&format!("{lower}_zero_point_{a}"), &dims, zv);
        let (sub, out) = ctx.node1("Sub", &[&shifted, &zi], &format!("{lower}_shifted"), vec![]);
        nodes.push(sub);
        shifted = out;
    }
    let (mul, out) = ctx.node1("Mul", &[&shifted, &s], &hint, vec![]);
    nodes.push(mul);
    Ok((nodes, out))
}

/// `QuantizeLinear(y, scale, zero) -> out`. Without a zero point the output
/// would be uint8, so for int8 (`ty`) a zero zero point is made.
fn quantize(
    ctx: &mut Ctx<'_>,
    y: &str,
    q: &Quant,
    ty: Option<QType>,
    out: &str,
) -> Result<NodeProto> {
    if q.channels.is_some() {
        return Err(ctx.bad(format!("{} must be quantised per tensor", q.what)));
    }
    let zero = match (&q.zero, q.ty.or(ty)) {
        (Some(z), _) => z.clone(),
        (None, Some(QType::U8)) => {
            return Ok(ctx.node("QuantizeLinear", &[y, &q.scale], &[out], vec![]));
        }
        (None, Some(QType::I8)) => {
            let hint = format!("{}_zero_point", q.what.to_ascii_lowercase());
            zero_init(ctx, &hint, QType::I8, &[], vec![0])
        }
        (None, None) => {
            return Err(ctx.bad(format!(
                "{} has no zero point and no other zero point tells its element type",
                q.what
            )));
        }
    };
    Ok(ctx.node("QuantizeLinear", &[y, &q.scale, &zero], &[out], vec![]))
}

/// Checks the input count (`lo..=hi`, counting omitted optional inputs) and
/// that the `required` slots are present, and one named output.
fn inputs(
    ctx: &Ctx<'_>,
    node: &NodeProto,
    (lo, hi): (usize, usize),
    required: &[usize],
) -> Result<()> {
    let n = node.input.len();
    if n < lo || n > hi {
        let want = if lo == hi { lo.to_string() } else { format!("{lo} to {hi}") };
        return Err(ctx.bad(format!("expects {want} inputs, has {n}")));
    }
    ctx.arity(node, (0, hi), (1, 1))?;
    for &slot in required {
        ctx.required(node, slot)?;
    }
    Ok(())
}

/// The dims of a constant operand, if it is one.
fn const_dims(ctx: &Ctx<'_>, name: &str) -> Option<Vec<i64>> {
    ctx.constant(name).map(|t| t.dims.clone())
}

/// Checks a constant quantised operand's element type against its zero
/// point's.
fn check_operand(ctx: &Ctx<'_>, x: &str, q: &Quant) -> Result<()> {
    if let Some(t) = ctx.constant(x) {
        let Some(ty) = QType::of(t.data_type) else {
            return Err(ctx.bad(format!(
                "{} '{x}' is {}, expected uint8 or int8",
                q.what,
                dtype_name(t.data_type)
            )));
        };
        if q.ty.is_some_and(|z| z != ty) {
            return Err(ctx.bad(format!(
                "{} '{x}' is {} but its zero point is {}",
                q.what,
                dtype_name(t.data_type),
                dtype_name(q.ty.map_or(0, QType::data_type))
            )));
        }
    }
    Ok(())
}

/// Copies the attributes in `allowed` (name and the getter that checks its
/// type), refusing any other; `skip` are accepted and not copied.
fn copy_attributes(
    ctx: &Ctx<'_>,
    node: &NodeProto,
    allowed: &[(&str, AttrKind)],
    skip: &[&str],
) -> Result<Vec<AttributeProto>> {
    let mut out = Vec::new();
    for a in &node.attribute {
        if skip.contains(&a.name.as_str()) {
            continue;
        }
        let Some((_, kind)) = allowed.iter().find(|(n, _)| *n == a.name) else {
            return Err(ctx.bad(format!("unsupported attribute '{}'", a.name)));
        };
        match kind {
            AttrKind::Int => {
                ctx.attr_int(node, &a.name)?;
            }
            AttrKind::Ints => {
                ctx.attr_ints(node, &a.name)?;
            }
            AttrKind::Float => {
                ctx.attr_float(node, &a.name)?;
            }
            AttrKind::String => {
                ctx.attr_string(node, &a.name)?;
            }
        }
        out.push(a.clone());
    }
    Ok(out)
}

#[derive(Debug, Clone, Copy)]
enum AttrKind {
    Int,
    Ints,
    Float,
    String,
}

/// The attributes of `Conv` (ONNX spec, Conv-11), which QLinearConv shares.
const CONV_ATTRIBUTES: &[(&str, AttrKind)] = &[
    ("auto_pad", AttrKind::String),
    ("dilations", AttrKind::Ints),
    ("group", AttrKind::Int),
    ("kernel_shape", AttrKind::Ints),
    ("pads", AttrKind::Ints),
    ("strides", AttrKind::Ints),
];

/// `QLinearConv(x, x_scale, x_zero_point, w, w_scale, w_zero_point,
/// y_scale, y_zero_point, B?)` (ONNX spec, QLinearConv-10):
/// `DequantizeLinear(x)`, `DequantizeLinear(w)` (per output channel:
/// axis 0), `Conv` with the same attributes and the bias dequantised
/// with scale `x_scale * w_scale` (zero point 0, as the spec requires),
/// `QuantizeLinear(y_scale, y_zero_point)`.
fn qlinear_conv(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    conv(ctx, node, &[])
}

/// `com.microsoft.QLinearConv` (contrib docs, "com.microsoft.QLinearConv"):
/// the standard op plus `channels_last`; only the NCHW form (0) is lowered.
fn ms_qlinear_conv(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    if ctx.attr_int(node, "channels_last")?.unwrap_or(0) != 0 {
        return Err(ctx.bad("channels_last=1 (NHWC) is not supported"));
    }
    conv(ctx, node, &["channels_last"])
}

fn conv(ctx: &mut Ctx<'_>, node: &NodeProto, skip: &[&str]) -> Result<Rewrite> {
    ctx.arity(node, (8, 9), (1, 1))?;
    need_qdq_opset(ctx)?;
    let attrs = copy_attributes(ctx, node, CONV_ATTRIBUTES, skip)?;
    let x = ctx.required(node, 0)?;
    let w = ctx.required(node, 3)?;
    let xq = quant(ctx, node, "x", 1, Some(2), Grain::Tensor)?;
    let wq = quant(ctx, node, "w", 4, Some(5), Grain::Channel)?;
    let yq = quant(ctx, node, "y", 6, Some(7), Grain::Tensor)?;
    check_operand(ctx, w, &wq)?;
    let w_dims = const_dims(ctx, w);
    let out_channels = w_dims.as_ref().and_then(|d| d.first().copied());
    if let (Some(n), Some(m)) = (wq.channels, out_channels)
        && n as i64 != m
    {
        return Err(
            ctx.bad(format!("w scale/zero point have {n} values but w has {m} output channels"))
        );
    }
    let (mut nodes, xf) = dequantize(ctx, x, &xq, 1, None)?;
    let (wn, wf) = dequantize(ctx, w, &wq, 0, w_dims.as_ref().map(Vec::len))?;
    nodes.extend(wn);
    let mut inputs = vec![xf, wf];
    if let Some(b) = ctx.input(node, 8) {
        let len = wq.channels.map(|n| n as i64).or(out_channels);
        inputs.push(int32_bias(ctx, b, &xq, &wq, len, 1.0)?);
    }
    let refs: Vec<&str> = inputs.iter().map(String::as_str).collect();
    let (conv, yf) = ctx.node1("Conv", &refs, "y_float", attrs);
    nodes.push(conv);
    nodes.push(quantize(ctx, &yf, &yq, None, &node.output[0])?);
    Ok(Rewrite::Into(nodes))
}

/// A 1-D int32 bias `b` quantised with scale `alpha * a_scale * b_scale[c]`
/// and zero point 0, dequantised here into a new float initializer (it is
/// small: one value per output channel). `len`: the channel count, when
/// known.
fn int32_bias(
    ctx: &mut Ctx<'_>,
    b: &str,
    aq: &Quant,
    bq: &Quant,
    len: Option<i64>,
    alpha: f32,
) -> Result<String> {
    let Some(t) = ctx.constant(b) else {
        return Err(ctx.bad(format!("bias '{b}' is not a constant; only a constant is supported")));
    };
    if t.data_type != INT32 {
        return Err(ctx.bad(format!("bias '{b}' is {}, expected int32", dtype_name(t.data_type))));
    }
    let dims = t.dims.clone();
    if dims.len() != 1 || len.is_some_and(|n| n != dims[0]) {
        return Err(ctx.bad(format!(
            "bias '{b}' has shape {dims:?}, expected [{}]",
            len.map_or("M".to_owned(), |n| n.to_string())
        )));
    }
    if bq.channels.is_some_and(|n| n as i64 != dims[0]) {
        return Err(ctx.bad(format!(
            "bias '{b}' has {} values but the {} scale {}",
            dims[0],
            bq.what,
            bq.channels.unwrap_or(0)
        )));
    }
    let values = ctx.const_i64(b)?.unwrap_or_default();
    let mut out = Vec::with_capacity(values.len());
    for (c, &v) in values.iter().enumerate() {
        let (Some(sa), Some(sb)) = (aq.scale_of(0), bq.scale_of(c)) else {
            return Err(ctx.bad(format!(
                "bias '{b}' needs constant {} and {} scales to be dequantised",
                aq.what, bq.what
            )));
        };
        out.push((v as f64 * alpha as f64 * sa as f64 * sb as f64) as f32);
    }
    Ok(ctx.init_f32("bias", &dims, out))
}

/// `QLinearMatMul(a, a_scale, a_zero_point, b, b_scale, b_zero_point,
/// y_scale, y_zero_point)` (ONNX spec, QLinearMatMul-10/21): a per tensor,
/// b per tensor or per column (the last axis), y per tensor →
/// `DequantizeLinear` × 2, `MatMul`, `QuantizeLinear`. Per-row `a` is not
/// supported (onnxruntime's quantiser does not write it).
fn qlinear_matmul(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (8, 8), (1, 1))?;
    need_qdq_opset(ctx)?;
    copy_attributes(ctx, node, &[], &[])?;
    let a = ctx.required(node, 0)?;
    let b = ctx.required(node, 3)?;
    let aq = quant(ctx, node, "a", 1, Some(2), Grain::Tensor)?;
    let bq = quant(ctx, node, "b", 4, Some(5), Grain::Channel)?;
    let yq = quant(ctx, node, "y", 6, Some(7), Grain::Tensor)?;
    check_operand(ctx, b, &bq)?;
    let b_dims = const_dims(ctx, b);
    if let (Some(n), Some(d)) = (bq.channels, &b_dims)
        && d.last().is_none_or(|&k| k != n as i64)
    {
        return Err(ctx.bad(format!("b scale/zero point have {n} values but b has shape {d:?}")));
    }
    let axis = b_dims.as_ref().map_or(-1, |d| d.len() as i64 - 1);
    let (mut nodes, af) = dequantize(ctx, a, &aq, 1, None)?;
    let (bn, bf) = dequantize(ctx, b, &bq, axis, b_dims.as_ref().map(Vec::len))?;
    nodes.extend(bn);
    let (mm, yf) = ctx.node1("MatMul", &[&af, &bf], "y_float", vec![]);
    nodes.push(mm);
    nodes.push(quantize(ctx, &yf, &yq, None, &node.output[0])?);
    Ok(Rewrite::Into(nodes))
}

/// `com.microsoft.QGemm(A, a_scale, a_zero_point, B, b_scale,
/// b_zero_point, C?, y_scale?, y_zero_point?)` with `alpha`, `transA`,
/// `transB` (contrib docs, "com.microsoft.QGemm"): `Y = alpha * A' B' + C'`
/// where `C` is int32 with zero point 0 and scale `alpha * a_scale *
/// b_scale` (beta is 1), B per tensor or per column; a float output when
/// `y_scale` is absent, else quantised. → `DequantizeLinear` × 2, `Gemm`
/// with the dequantised bias, and `QuantizeLinear` when quantised.
fn qgemm(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (6, 9), (1, 1))?;
    need_qdq_opset(ctx)?;
    let attrs = copy_attributes(
        ctx,
        node,
        &[("alpha", AttrKind::Float), ("transA", AttrKind::Int), ("transB", AttrKind::Int)],
        &[],
    )?;
    let alpha = ctx.attr_float(node, "alpha")?.unwrap_or(1.0);
    if !alpha.is_finite() {
        return Err(ctx.bad(format!("alpha is {alpha}")));
    }
    let trans_b = ctx.attr_int(node, "transB")?.unwrap_or(0) != 0;
    let a = ctx.required(node, 0)?;
    let b = ctx.required(node, 3)?;
    let aq = quant(ctx, node, "A", 1, Some(2), Grain::Tensor)?;
    let bq = quant(ctx, node, "B", 4, Some(5), Grain::Channel)?;
    check_operand(ctx, b, &bq)?;
    let has_y_scale = ctx.input(node, 7).is_some();
    let has_y_zero = ctx.input(node, 8).is_some();
    if has_y_scale != has_y_zero {
        return Err(
            ctx.bad("y_scale and y_zero_point must be given together (float output: neither)")
        );
    }
    let yq =
        if has_y_scale { Some(quant(ctx, node, "y", 7, Some(8), Grain::Tensor)?) } else { None };
    let b_dims = const_dims(ctx, b);
    if b_dims.as_ref().is_some_and(|d| d.len() != 2) {
        return Err(ctx.bad(format!("B has shape {:?}, expected 2-D", b_dims.unwrap_or_default())));
    }
    // Columns of op(B): the last axis of B, or the first when transposed.
    let col_axis = if trans_b { 0 } else { 1 };
    let n = b_dims.as_ref().map(|d| d[col_axis as usize]);
    if let (Some(c), Some(n)) = (bq.channels, n)
        && c as i64 != n
    {
        return Err(ctx.bad(format!("B scale/zero point have {c} values but B has {n} columns")));
    }
    let (mut nodes, af) = dequantize(ctx, a, &aq, 1, None)?;
    let (bn, bf) = dequantize(ctx, b, &bq, col_axis, b_dims.as_ref().map(Vec::len))?;
    nodes.extend(bn);
    let mut inputs = vec![af, bf];
    if let Some(c) = ctx.input(node, 6) {
        inputs.push(gemm_bias(ctx, c, &aq, &bq, n, alpha)?);
    } else if ctx.opset < 11 {
        // Gemm's C is optional from opset 11 only.
        inputs.push(ctx.init_f32("bias", &[], vec![0.0]));
    }
    let refs: Vec<&str> = inputs.iter().map(String::as_str).collect();
    match yq {
        None => nodes.push(ctx.node("Gemm", &refs, &[&node.output[0]], attrs)),
        Some(yq) => {
            let (gemm, yf) = ctx.node1("Gemm", &refs, "y_float", attrs);
            nodes.push(gemm);
            nodes.push(quantize(ctx, &yf, &yq, None, &node.output[0])?);
        }
    }
    Ok(Rewrite::Into(nodes))
}

/// QGemm's int32 `C`, broadcastable to (M, N) (shapes (), (1), (N), (1, N),
/// (M, 1), (M, N) as onnxruntime's kernel reads them), dequantised with
/// scale `alpha * a_scale * b_scale[n]`. With per-column B scales, a C that
/// does not vary along N is widened to N columns.
fn gemm_bias(
    ctx: &mut Ctx<'_>,
    c: &str,
    aq: &Quant,
    bq: &Quant,
    n: Option<i64>,
    alpha: f32,
) -> Result<String> {
    let Some(t) = ctx.constant(c) else {
        return Err(ctx.bad(format!("C '{c}' is not a constant; only a constant is supported")));
    };
    if t.data_type != INT32 {
        return Err(ctx.bad(format!("C '{c}' is {}, expected int32", dtype_name(t.data_type))));
    }
    let dims = t.dims.clone();
    if dims.len() > 2 {
        return Err(ctx.bad(format!("C '{c}' has shape {dims:?}, expected at most 2-D")));
    }
    let values = ctx.const_i64(c)?.unwrap_or_default();
    let last = dims.last().copied().unwrap_or(1);
    if let Some(n) = n
        && last != 1
        && last != n
    {
        return Err(ctx.bad(format!("C '{c}' has shape {dims:?}, not broadcastable to N = {n}")));
    }
    let sa = aq.scale_of(0);
    let Some(sa) = sa.filter(|_| bq.scales.is_some()) else {
        return Err(ctx.bad(format!("C '{c}' needs constant A and B scales to be dequantised")));
    };
    let scale = |col: usize| alpha as f64 * sa as f64 * bq.scale_of(col).unwrap_or(1.0) as f64;
    match bq.channels {
        Some(cols) if last == 1 => {
            // Widen: rows × cols.
            let rows = values.len();
            let mut out = Vec::with_capacity(rows * cols);
            for &v in &values {
                for col in 0..cols {
                    out.push((v as f64 * scale(col)) as f32);
                }
            }
            let d: Vec<i64> =
                if dims.len() == 2 { vec![dims[0], cols as i64] } else { vec![cols as i64] };
            Ok(ctx.init_f32("bias", &d, out))
        }
        _ => {
            let width = last.max(1) as usize;
            let out = values
                .iter()
                .enumerate()
                .map(|(i, &v)| (v as f64 * scale(i % width)) as f32)
                .collect();
            Ok(ctx.init_f32("bias", &dims, out))
        }
    }
}

/// The element-wise binary ops: `A, A_scale, A_zero_point?, B, B_scale,
/// B_zero_point?, C_scale, C_zero_point?` → `DequantizeLinear(A)`,
/// `DequantizeLinear(B)`, `op`, `QuantizeLinear(C_scale, C_zero_point)`.
fn binary(ctx: &mut Ctx<'_>, node: &NodeProto, op: &str) -> Result<Rewrite> {
    inputs(ctx, node, (7, 8), &[0, 1, 3, 4, 6])?;
    need_qdq_opset(ctx)?;
    copy_attributes(ctx, node, &[], &[])?;
    let a = ctx.required(node, 0)?;
    let b = ctx.required(node, 3)?;
    let aq = quant(ctx, node, "A", 1, Some(2), Grain::Tensor)?;
    let bq = quant(ctx, node, "B", 4, Some(5), Grain::Tensor)?;
    let cq = quant(ctx, node, "C", 6, Some(7), Grain::Tensor)?;
    let ty = same_type(ctx, &[&aq, &bq, &cq])?;
    let (mut nodes, af) = dequantize(ctx, a, &aq, 1, None)?;
    let (bn, bf) = dequantize(ctx, b, &bq, 1, None)?;
    nodes.extend(bn);
    let (n, cf) = ctx.node1(op, &[&af, &bf], "c_float", vec![]);
    nodes.push(n);
    nodes.push(quantize(ctx, &cf, &cq, ty, &node.output[0])?);
    Ok(Rewrite::Into(nodes))
}

/// `com.microsoft.QLinearAdd` (contrib docs, "com.microsoft.QLinearAdd"):
/// `C = (A_scale (A - A_zp) + B_scale (B - B_zp)) / C_scale + C_zp`. The
/// residual merge of a quantised network: the emitted `Add` is the merge.
fn qlinear_add(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    binary(ctx, node, "Add")
}

/// `com.microsoft.QLinearMul` (contrib docs, "com.microsoft.QLinearMul"):
/// `C = (A - A_zp)(B - B_zp) A_scale B_scale / C_scale + C_zp`.
fn qlinear_mul(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    binary(ctx, node, "Mul")
}

/// `com.microsoft.QLinearGlobalAveragePool(X, x_scale, x_zero_point,
/// y_scale, y_zero_point)` (contrib docs,
/// "com.microsoft.QLinearGlobalAveragePool"): average over the spatial
/// axes → `DequantizeLinear`, `GlobalAveragePool`, `QuantizeLinear`. Only
/// `channels_last=0` (NCHW): the NHWC form would need the input's rank.
fn qlinear_global_average_pool(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (5, 5), (1, 1))?;
    need_qdq_opset(ctx)?;
    copy_attributes(ctx, node, &[("channels_last", AttrKind::Int)], &[])?;
    if ctx.attr_int(node, "channels_last")?.unwrap_or(0) != 0 {
        return Err(ctx.bad("channels_last=1 (NHWC) is not supported"));
    }
    let x = ctx.required(node, 0)?;
    let xq = quant(ctx, node, "x", 1, Some(2), Grain::Tensor)?;
    let yq = quant(ctx, node, "y", 3, Some(4), Grain::Tensor)?;
    let ty = same_type(ctx, &[&xq, &yq])?;
    let (mut nodes, xf) = dequantize(ctx, x, &xq, 1, None)?;
    let (pool, yf) = ctx.node1("GlobalAveragePool", &[&xf], "y_float", vec![]);
    nodes.push(pool);
    nodes.push(quantize(ctx, &yf, &yq, ty, &node.output[0])?);
    Ok(Rewrite::Into(nodes))
}

/// Emits a float op from its dequantised input (first name) into its output
/// (second name).
type FloatOp<'f> = dyn Fn(&mut Ctx<'_>, &str, &str) -> Result<Vec<NodeProto>> + 'f;

/// The unary ops `X, X_scale, X_zero_point?, Y_scale, Y_zero_point?`:
/// `DequantizeLinear`, the float op (`make` emits it from the dequantised
/// input into the given output), `QuantizeLinear`.
fn unary(ctx: &mut Ctx<'_>, node: &NodeProto, make: &FloatOp<'_>) -> Result<Rewrite> {
    inputs(ctx, node, (4, 5), &[0, 1, 3])?;
    need_qdq_opset(ctx)?;
    let x = ctx.required(node, 0)?;
    let xq = quant(ctx, node, "X", 1, Some(2), Grain::Tensor)?;
    let yq = quant(ctx, node, "Y", 3, Some(4), Grain::Tensor)?;
    let ty = same_type(ctx, &[&xq, &yq])?;
    let (mut nodes, xf) = dequantize(ctx, x, &xq, 1, None)?;
    let yf = ctx.name("y_float");
    nodes.extend(make(ctx, &xf, &yf)?);
    nodes.push(quantize(ctx, &yf, &yq, ty, &node.output[0])?);
    Ok(Rewrite::Into(nodes))
}

/// `com.microsoft.QLinearSigmoid` (contrib docs,
/// "com.microsoft.QLinearSigmoid"): `quantize(Sigmoid(dequantize(X)))`.
fn qlinear_sigmoid(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    copy_attributes(ctx, node, &[], &[])?;
    unary(ctx, node, &|ctx, x, y| Ok(vec![ctx.node("Sigmoid", &[x], &[y], vec![])]))
}

/// `com.microsoft.QLinearLeakyRelu` (contrib docs,
/// "com.microsoft.QLinearLeakyRelu"): `quantize(LeakyRelu(dequantize(X),
/// alpha))`, alpha 0.01 by default as LeakyRelu's.
fn qlinear_leaky_relu(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    let attrs = copy_attributes(ctx, node, &[("alpha", AttrKind::Float)], &[])?;
    if let Some(a) = ctx.attr_float(node, "alpha")?
        && !a.is_finite()
    {
        return Err(ctx.bad(format!("alpha is {a}")));
    }
    unary(ctx, node, &|ctx, x, y| Ok(vec![ctx.node("LeakyRelu", &[x], &[y], attrs.clone())]))
}

/// `com.microsoft.QLinearAveragePool` (contrib docs,
/// "com.microsoft.QLinearAveragePool"): "Dequantize(Input) -> AveragePool on
/// fp32 data -> Quantize(output)", with AveragePool's attributes. Only
/// `channels_last=0`.
fn qlinear_average_pool(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    let attrs = copy_attributes(
        ctx,
        node,
        &[
            ("auto_pad", AttrKind::String),
            ("ceil_mode", AttrKind::Int),
            ("count_include_pad", AttrKind::Int),
            ("kernel_shape", AttrKind::Ints),
            ("pads", AttrKind::Ints),
            ("strides", AttrKind::Ints),
        ],
        &["channels_last"],
    )?;
    if ctx.attr_int(node, "channels_last")?.unwrap_or(0) != 0 {
        return Err(ctx.bad("channels_last=1 (NHWC) is not supported"));
    }
    if ctx.attr_ints(node, "kernel_shape")?.is_none() {
        return Err(ctx.bad("attribute 'kernel_shape' is missing"));
    }
    unary(ctx, node, &|ctx, x, y| Ok(vec![ctx.node("AveragePool", &[x], &[y], attrs.clone())]))
}

/// `com.microsoft.QLinearReduceMean` (contrib docs,
/// "com.microsoft.QLinearReduceMean"): "Dequantize(Input) -> ReduceMean on
/// fp32 data -> Quantize(output)"; `axes` and `keepdims` are required.
fn qlinear_reduce_mean(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    copy_attributes(ctx, node, &[("axes", AttrKind::Ints), ("keepdims", AttrKind::Int)], &[])?;
    let axes =
        ctx.attr_ints(node, "axes")?.ok_or_else(|| ctx.bad("attribute 'axes' is missing"))?;
    let keep = ctx
        .attr_int(node, "keepdims")?
        .ok_or_else(|| ctx.bad("attribute 'keepdims' is missing"))?;
    unary(ctx, node, &|ctx, x, y| Ok(ctx.reduce_mean(x, &axes, keep != 0, y)))
}

/// `com.microsoft.QLinearSoftmax` (contrib docs,
/// "com.microsoft.QLinearSoftmax"): Softmax with the semantics of the opset
/// named by its required `opset` attribute: from 13 along `axis` (default
/// -1), before 13 over the input coerced to 2-D at `axis` (default 1).
/// Emitted as `Softmax` when the model's opset has the same semantics;
/// old semantics in a new model become `Flatten(axis)`, `Softmax(-1)`,
/// `Reshape` to the input's shape. New semantics in an old model are
/// supported only for the last axis.
fn qlinear_softmax(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    inputs(ctx, node, (5, 5), &[0, 1, 3, 4])?;
    copy_attributes(ctx, node, &[("opset", AttrKind::Int), ("axis", AttrKind::Int)], &[])?;
    let opset =
        ctx.attr_int(node, "opset")?.ok_or_else(|| ctx.bad("attribute 'opset' is missing"))?;
    let new = opset >= 13;
    let axis = ctx.attr_int(node, "axis")?.unwrap_or(if new { -1 } else { 1 });
    let model_new = ctx.opset >= 13;
    if new && !model_new && axis != -1 {
        return Err(ctx.bad(format!(
            "Softmax-{opset} semantics along axis {axis} cannot be written at the model's opset {} \
             without the input's rank",
            ctx.opset
        )));
    }
    let x = ctx.required(node, 0)?.to_owned();
    unary(ctx, node, &|ctx, xf, y| {
        if new == model_new || axis == -1 {
            return Ok(vec![ctx.node("Softmax", &[xf], &[y], vec![emit::int("axis", axis)])]);
        }
        // Softmax-1/11 semantics in an opset >= 13 model.
        let (flat, f) = ctx.node1("Flatten", &[xf], "flat", vec![emit::int("axis", axis)]);
        let (soft, s) = ctx.node1("Softmax", &[&f], "softmax", vec![emit::int("axis", -1)]);
        let (shape, sh) = ctx.node1("Shape", &[&x], "shape", vec![]);
        let back = ctx.node("Reshape", &[&s, &sh], &[y], vec![]);
        Ok(vec![flat, soft, shape, back])
    })
}

/// `com.microsoft.QLinearConcat(Y_scale, Y_zero_point, (X, X_scale,
/// X_zero_point)…)` with `axis` (contrib docs, "com.microsoft.QLinearConcat"):
/// each input dequantised, `Concat`, `QuantizeLinear`. (onnxruntime copies
/// an input whose parameters equal the output's; DequantizeLinear then
/// QuantizeLinear with equal parameters gives the same integers back.)
fn qlinear_concat(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    let n = node.input.len();
    if n < 5 || !(n - 2).is_multiple_of(3) {
        return Err(ctx.bad(format!(
            "expects Y_scale, Y_zero_point and then (tensor, scale, zero point) triples, has {n} inputs"
        )));
    }
    let required: Vec<usize> = (0..n).filter(|s| *s < 2 || (s - 2) % 3 != 2).collect();
    inputs(ctx, node, (5, n), &required)?;
    need_qdq_opset(ctx)?;
    let attrs = copy_attributes(ctx, node, &[("axis", AttrKind::Int)], &[])?;
    if ctx.attr_int(node, "axis")?.is_none() {
        return Err(ctx.bad("attribute 'axis' is missing"));
    }
    let yq = quant(ctx, node, "Y", 0, Some(1), Grain::Tensor)?;
    let mut quants = Vec::new();
    for k in 0..(n - 2) / 3 {
        let slot = 2 + 3 * k;
        quants.push(quant(
            ctx,
            node,
            &format!("input {k}"),
            slot + 1,
            Some(slot + 2),
            Grain::Tensor,
        )?);
    }
    let mut all: Vec<&Quant> = quants.iter().collect();
    all.push(&yq);
    let ty = same_type(ctx, &all)?;
    let mut nodes = Vec::new();
    let mut floats = Vec::new();
    for (k, q) in quants.iter().enumerate() {
        let x = ctx.required(node, 2 + 3 * k)?;
        check_operand(ctx, x, q)?;
        let (dq, xf) = dequantize(ctx, x, q, 1, None)?;
        nodes.extend(dq);
        floats.push(xf);
    }
    let refs: Vec<&str> = floats.iter().map(String::as_str).collect();
    let (concat, yf) = ctx.node1("Concat", &refs, "y_float", attrs);
    nodes.push(concat);
    nodes.push(quantize(ctx, &yf, &yq, ty, &node.output[0])?);
    Ok(Rewrite::Into(nodes))
}

/// `com.microsoft.QLinearWhere(condition, X, x_scale, x_zero_point, Y,
/// y_scale, y_zero_point, z_scale, z_zero_point)` (contrib docs,
/// "com.microsoft.QLinearWhere"): `Where` of the dequantised X and Y,
/// quantised with z's parameters.
fn qlinear_where(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (9, 9), (1, 1))?;
    need_qdq_opset(ctx)?;
    copy_attributes(ctx, node, &[], &[])?;
    let cond = ctx.required(node, 0)?;
    let x = ctx.required(node, 1)?;
    let y = ctx.required(node, 4)?;
    let xq = quant(ctx, node, "X", 2, Some(3), Grain::Tensor)?;
    let yq = quant(ctx, node, "Y", 5, Some(6), Grain::Tensor)?;
    let zq = quant(ctx, node, "Z", 7, Some(8), Grain::Tensor)?;
    let ty = same_type(ctx, &[&xq, &yq, &zq])?;
    check_operand(ctx, x, &xq)?;
    check_operand(ctx, y, &yq)?;
    let (mut nodes, xf) = dequantize(ctx, x, &xq, 1, None)?;
    let (yn, yf) = dequantize(ctx, y, &yq, 1, None)?;
    nodes.extend(yn);
    let (w, zf) = ctx.node1("Where", &[cond, &xf, &yf], "z_float", vec![]);
    nodes.push(w);
    nodes.push(quantize(ctx, &zf, &zq, ty, &node.output[0])?);
    Ok(Rewrite::Into(nodes))
}

/// `DequantizeLinear(b)` of a MatMul's right operand, per column (its last
/// axis) when the parameters are per column.
fn dequantize_columns(
    ctx: &mut Ctx<'_>,
    b: &str,
    bq: &Quant,
) -> Result<(Vec<NodeProto>, String, Option<usize>)> {
    check_operand(ctx, b, bq)?;
    let dims = const_dims(ctx, b);
    let cols = dims.as_ref().and_then(|d| d.last().copied());
    if let (Some(n), Some(d)) = (bq.channels, &dims)
        && cols != Some(n as i64)
    {
        return Err(ctx.bad(format!(
            "{} scale/zero point have {n} values but {} has shape {d:?}",
            bq.what, bq.what
        )));
    }
    let axis = dims.as_ref().map_or(-1, |d| d.len() as i64 - 1);
    let (nodes, bf) = dequantize(ctx, b, bq, axis, dims.as_ref().map(Vec::len))?;
    Ok((nodes, bf, cols.map(|c| c as usize)))
}

/// `MatMul(a, b)` then, with a float bias, `Add(·, bias)`, into `out`.
fn matmul_bias(
    ctx: &mut Ctx<'_>,
    a: &str,
    b: &str,
    bias: Option<&str>,
    out: &str,
) -> Vec<NodeProto> {
    match bias {
        None => vec![ctx.node("MatMul", &[a, b], &[out], vec![])],
        Some(bias) => {
            let (mm, y) = ctx.node1("MatMul", &[a, b], "matmul", vec![]);
            vec![mm, ctx.node("Add", &[&y, bias], &[out], vec![])]
        }
    }
}

/// `com.microsoft.DynamicQuantizeMatMul(A, B, b_scale, b_zero_point?,
/// bias?)` (contrib docs, "com.microsoft.DynamicQuantizeMatMul"): A (float)
/// is quantised to uint8 at run time as DynamicQuantizeLinear does, then
/// multiplied with B (per tensor or per column), bias added; float output.
/// → `DynamicQuantizeLinear(A)`, `DequantizeLinear` × 2, `MatMul`, `Add`.
fn dynamic_quantize_matmul(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    inputs(ctx, node, (3, 5), &[0, 1, 2])?;
    copy_attributes(ctx, node, &[], &[])?;
    if ctx.opset < 11 {
        return Err(ctx.bad(format!(
            "the model imports opset {}; DynamicQuantizeLinear needs opset >= 11",
            ctx.opset
        )));
    }
    let a = ctx.required(node, 0)?;
    let b = ctx.required(node, 1)?;
    let bq = quant(ctx, node, "B", 2, Some(3), Grain::Channel)?;
    let aq_name = ctx.name("a_quantized");
    let as_name = ctx.name("a_scale");
    let az_name = ctx.name("a_zero_point");
    let dql = ctx.node("DynamicQuantizeLinear", &[a], &[&aq_name, &as_name, &az_name], vec![]);
    let aq = Quant {
        what: "A".into(),
        scale: as_name.clone(),
        zero: Some(az_name.clone()),
        ty: Some(QType::U8),
        scales: None,
        zeros: None,
        channels: None,
        maybe_channels: false,
    };
    let mut nodes = vec![dql];
    let (an, af) = dequantize(ctx, &aq_name, &aq, 1, None)?;
    nodes.extend(an);
    let (bn, bf, _) = dequantize_columns(ctx, b, &bq)?;
    nodes.extend(bn);
    nodes.extend(matmul_bias(ctx, &af, &bf, ctx.input(node, 4), &node.output[0]));
    Ok(Rewrite::Into(nodes))
}

/// `com.microsoft.MatMulIntegerToFloat(A, B, a_scale, b_scale,
/// a_zero_point?, b_zero_point?, bias?)` (contrib docs,
/// "com.microsoft.MatMulIntegerToFloat"): `(A - a_zp)(B - b_zp) a_scale
/// b_scale + bias`, float output; A per tensor (a per-column A scale, as
/// the document allows, is not supported), B per tensor or per column. →
/// `DequantizeLinear` × 2, `MatMul`, `Add`.
fn matmul_integer_to_float(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    inputs(ctx, node, (4, 7), &[0, 1, 2, 3])?;
    need_qdq_opset(ctx)?;
    copy_attributes(ctx, node, &[], &[])?;
    let a = ctx.required(node, 0)?;
    let b = ctx.required(node, 1)?;
    let aq = quant(ctx, node, "A", 2, Some(4), Grain::Tensor)?;
    let bq = quant(ctx, node, "B", 3, Some(5), Grain::Channel)?;
    let (mut nodes, af) = dequantize(ctx, a, &aq, 1, None)?;
    let (bn, bf, _) = dequantize_columns(ctx, b, &bq)?;
    nodes.extend(bn);
    nodes.extend(matmul_bias(ctx, &af, &bf, ctx.input(node, 6), &node.output[0]));
    Ok(Rewrite::Into(nodes))
}

#[cfg(test)]
mod tests {
    //! Rules checked against the ONNX specification (QLinearConv-10,
    //! QLinearMatMul-10, QuantizeLinear/DequantizeLinear-13) and
    //! onnxruntime's contrib operator documentation (1.23), sections named
    //! beside each test.

    use super::*;
    use crate::load::ExternalData;
    use crate::lower::{Lowered, lower};
    use crate::proto::{GraphProto, ModelProto, OperatorSetIdProto};

    /// A one-node model in its own small world: `inits` are initializers.
    struct Case {
        nodes: Vec<NodeProto>,
        inits: Vec<TensorProto>,
        opset: i64,
    }

    impl Case {
        fn new(opset: i64) -> Case {
            Case { nodes: Vec::new(), inits: Vec::new(), opset }
        }

        fn f32(&mut self, name: &str, dims: &[i64], v: &[f32]) -> &mut Case {
            self.inits.push(TensorProto {
                name: name.into(),
                dims: dims.to_vec(),
                data_type: FLOAT,
                float_data: v.to_vec(),
                ..Default::default()
            });
            self
        }

        /// An int8/uint8/int32 initializer in `int32_data` (as the standard
        /// stores them when not raw: any int32 can appear).
        fn int(&mut self, name: &str, dtype: i32, dims: &[i64], v: &[i32]) -> &mut Case {
            self.inits.push(TensorProto {
                name: name.into(),
                dims: dims.to_vec(),
                data_type: dtype,
                int32_data: v.to_vec(),
                ..Default::default()
            });
            self
        }

        fn node(&mut self, domain: &str, op: &str, inputs: &[&str], attrs: Vec<AttributeProto>) {
            self.nodes.push(NodeProto {
                input: inputs.iter().map(|s| (*s).to_owned()).collect(),
                output: vec!["out".into()],
                name: "q".into(),
                op_type: op.into(),
                domain: domain.into(),
                attribute: attrs,
                doc_string: String::new(),
            });
        }

        fn lower(&self) -> Result<Lowered> {
            let model = ModelProto {
                ir_version: 8,
                opset_import: vec![
                    OperatorSetIdProto { domain: String::new(), version: self.opset },
                    OperatorSetIdProto { domain: MS_DOMAIN.into(), version: 1 },
                ],
                graph: Some(GraphProto {
                    node: self.nodes.clone(),
                    initializer: self.inits.clone(),
                    ..Default::default()
                }),
                ..Default::default()
            };
            lower(model, &ExternalData::none(), &crate::lower::LowerConfig::STANDARD)
        }
    }

    fn ops(l: &Lowered) -> Vec<String> {
        l.model.graph.as_ref().unwrap().node.iter().map(|n| n.op_type.clone()).collect()
    }

    fn nodes(l: &Lowered) -> &[NodeProto] {
        &l.model.graph.as_ref().unwrap().node
    }

    fn init<'a>(l: &'a Lowered, name: &str) -> &'a TensorProto {
        l.model.graph.as_ref().unwrap().initializer.iter().find(|t| t.name == name).unwrap()
    }

    fn axis(n: &NodeProto) -> Option<i64> {
        n.attribute.iter().find(|a| a.name == "axis").map(|a| a.i)
    }

    /// The parameters of a uint8 activation (scale 0.5, zero point 128) and
    /// an int8 per-channel weight of 2 output channels.
    fn conv_case(opset: i64) -> Case {
        let mut c = Case::new(opset);
        c.f32("xs", &[], &[0.5])
            .int("xz", UINT8, &[], &[128])
            .int("w", INT8, &[2, 1, 1, 1], &[3, -4])
            .f32("ws", &[2], &[0.25, 0.125])
            .int("wz", INT8, &[2], &[0, 0])
            .f32("ys", &[], &[0.1])
            .int("yz", UINT8, &[], &[0])
            .int("b", INT32, &[2], &[8, -16]);
        c
    }

    fn err(c: &Case) -> String {
        c.lower().expect_err("an error").message().to_owned()
    }

    // ONNX spec, QLinearConv-10: DQ(x), DQ(w) per output channel (axis 0),
    // Conv, Q(y); the int32 bias dequantised with x_scale * w_scale.
    #[test]
    fn qlinear_conv_becomes_dq_conv_q() {
        let mut c = conv_case(17);
        c.node(
            "",
            "QLinearConv",
            &["x", "xs", "xz", "w", "ws", "wz", "ys", "yz", "b"],
            vec![emit::ints("pads", &[0, 0, 0, 0]), emit::int("group", 1)],
        );
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "DequantizeLinear", "Conv", "QuantizeLinear"]);
        let n = nodes(&l);
        assert_eq!(n[0].input, ["x", "xs", "xz"]);
        assert_eq!(axis(&n[0]), None);
        assert_eq!(n[1].input, ["w", "ws", "wz"]);
        assert_eq!(axis(&n[1]), Some(0));
        assert_eq!(n[2].attribute.len(), 2);
        let bias = init(&l, &n[2].input[2]);
        // 8 * 0.5 * 0.25 = 1, -16 * 0.5 * 0.125 = -1.
        assert_eq!(bias.float_data, [1.0, -1.0]);
        assert_eq!(n[3].input[1..], ["ys", "yz"]);
        assert_eq!(n[3].output, ["out"]);
        assert!(l.origins.iter().all(|o| o.as_ref().is_some_and(|o| o.name == "q")));
    }

    // Below opset 13 DequantizeLinear has no axis: a per-channel weight is
    // dequantised as (Cast(w) - zp) * scale laid along axis 0.
    #[test]
    fn per_channel_weight_below_opset_13_is_written_out() {
        let mut c = conv_case(11);
        c.node("", "QLinearConv", &["x", "xs", "xz", "w", "ws", "wz", "ys", "yz"], vec![]);
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "Cast", "Mul", "Conv", "QuantizeLinear"]);
        let s = init(&l, &nodes(&l)[2].input[1]);
        assert_eq!(s.dims, [2, 1, 1, 1]);
        assert_eq!(s.float_data, [0.25, 0.125]);
    }

    #[test]
    fn conv_checks_name_the_node() {
        let bad = |f: &dyn Fn(&mut Case)| {
            let mut c = conv_case(17);
            f(&mut c);
            if c.nodes.is_empty() {
                c.node(
                    "",
                    "QLinearConv",
                    &["x", "xs", "xz", "w", "ws", "wz", "ys", "yz", "b"],
                    vec![],
                );
            }
            let e = err(&c);
            assert!(e.contains("node 'q' (QLinearConv)"), "{e}");
            e
        };
        let zero_scale = bad(&|c| c.inits[0].float_data = vec![0.0]);
        assert!(zero_scale.contains("finite and positive"), "{zero_scale}");
        let nan = bad(&|c| c.inits[0].float_data = vec![f32::NAN]);
        assert!(nan.contains("finite and positive"), "{nan}");
        let negative = bad(&|c| c.inits[3].float_data = vec![0.25, -0.125]);
        assert!(negative.contains("-0.125"), "{negative}");
        // uint8 zero point 300 stored in int32_data.
        let range = bad(&|c| c.inits[1].int32_data = vec![300]);
        assert!(range.contains("outside uint8's range"), "{range}");
        let range8 = bad(&|c| c.inits[4].int32_data = vec![0, -129]);
        assert!(range8.contains("outside int8's range"), "{range8}");
        let shape = bad(&|c| {
            c.inits[0].dims = vec![2];
            c.inits[0].float_data = vec![0.5, 0.5];
        });
        assert!(shape.contains("expected a scalar"), "{shape}");
        let channels = bad(&|c| {
            c.inits[3].dims = vec![3];
            c.inits[3].float_data = vec![0.25, 0.125, 1.0];
            c.inits[4].dims = vec![3];
            c.inits[4].int32_data = vec![0, 0, 0];
        });
        assert!(channels.contains("2 output channels"), "{channels}");
        let mismatch = bad(&|c| {
            c.inits[4].dims = vec![3];
            c.inits[4].int32_data = vec![0, 0, 0];
        });
        assert!(mismatch.contains("must agree"), "{mismatch}");
        let float_zp = bad(&|c| c.inits[1].data_type = FLOAT);
        assert!(float_zp.contains("expected uint8 or int8"), "{float_zp}");
        let bias_type = bad(&|c| c.inits[7].data_type = FLOAT);
        assert!(bias_type.contains("expected int32"), "{bias_type}");
        let missing =
            bad(&|c| c.node("", "QLinearConv", &["x", "xs", "xz", "w", "ws", "wz", "ys"], vec![]));
        assert!(missing.contains("expects 8 to 9 inputs"), "{missing}");
        let omitted = bad(&|c| {
            c.node("", "QLinearConv", &["x", "xs", "", "w", "ws", "wz", "ys", "yz"], vec![])
        });
        assert!(omitted.contains("input 2 is missing"), "{omitted}");
        let attr = bad(&|c| {
            c.node(
                "",
                "QLinearConv",
                &["x", "xs", "xz", "w", "ws", "wz", "ys", "yz"],
                vec![emit::int("pads", 1)],
            )
        });
        assert!(attr.contains("attribute 'pads'"), "{attr}");
        let unknown = bad(&|c| {
            c.node(
                "",
                "QLinearConv",
                &["x", "xs", "xz", "w", "ws", "wz", "ys", "yz"],
                vec![emit::int("channels_last", 0)],
            )
        });
        assert!(unknown.contains("unsupported attribute 'channels_last'"), "{unknown}");
    }

    // Contrib docs, "com.microsoft.QLinearConv": channels_last=1 is refused.
    #[test]
    fn ms_qlinear_conv_nhwc_is_refused() {
        let mut c = conv_case(17);
        c.node(
            MS_DOMAIN,
            "QLinearConv",
            &["x", "xs", "xz", "w", "ws", "wz", "ys", "yz"],
            vec![emit::int("channels_last", 1)],
        );
        assert!(err(&c).contains("channels_last=1"));
        c.nodes[0].attribute[0].i = 0;
        assert_eq!(ops(&c.lower().unwrap())[2], "Conv");
    }

    /// QLinearAdd's operands: uint8 scalars, zero points optional.
    fn add_case() -> Case {
        let mut c = Case::new(17);
        c.f32("as", &[], &[0.5])
            .int("az", UINT8, &[], &[10])
            .f32("bs", &[1], &[0.25])
            .int("bz", UINT8, &[1], &[20])
            .f32("cs", &[], &[0.75])
            .int("cz", UINT8, &[], &[0]);
        c
    }

    // Contrib docs, "com.microsoft.QLinearAdd": the merge becomes a real Add
    // of the two dequantised operands; 1-element parameters become scalars.
    #[test]
    fn qlinear_add_is_a_merge() {
        let mut c = add_case();
        c.node(MS_DOMAIN, "QLinearAdd", &["a", "as", "az", "b", "bs", "bz", "cs", "cz"], vec![]);
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "DequantizeLinear", "Add", "QuantizeLinear"]);
        let n = nodes(&l);
        assert_eq!(n[2].input, [n[0].output[0].clone(), n[1].output[0].clone()]);
        assert_eq!(n[0].input, ["a", "as", "az"]);
        assert!(init(&l, &n[1].input[1]).dims.is_empty());
        assert!(init(&l, &n[1].input[2]).dims.is_empty());
        assert_eq!(init(&l, &n[1].input[2]).int32_data, [20]);
        assert_eq!(n[3].output, ["out"]);
    }

    // Zero points are optional in QLinearAdd/QLinearMul; an int8 output
    // without one gets an int8 zero (QuantizeLinear would otherwise make
    // uint8), and no type at all is an error.
    #[test]
    fn output_type_without_zero_point() {
        let mut c = Case::new(17);
        c.f32("as", &[], &[0.5]).int("az", INT8, &[], &[-3]).f32("s", &[], &[1.0]);
        c.node(MS_DOMAIN, "QLinearMul", &["a", "as", "az", "b", "s", "", "s"], vec![]);
        let l = c.lower().unwrap();
        let q = nodes(&l).last().unwrap();
        assert_eq!(q.op_type, "QuantizeLinear");
        assert_eq!(init(&l, &q.input[2]).data_type, INT8);
        assert_eq!(ops(&l)[2], "Mul");
        let mut c = Case::new(17);
        c.f32("s", &[], &[1.0]);
        c.node(MS_DOMAIN, "QLinearAdd", &["a", "s", "", "b", "s", "", "s"], vec![]);
        assert!(err(&c).contains("no zero point"));
    }

    #[test]
    fn binary_checks() {
        let mut c = add_case();
        c.inits[3].data_type = INT8;
        c.node(MS_DOMAIN, "QLinearAdd", &["a", "as", "az", "b", "bs", "bz", "cs", "cz"], vec![]);
        let e = err(&c);
        assert!(e.contains("node 'q' (com.microsoft.QLinearAdd)"), "{e}");
        assert!(e.contains("one element type"), "{e}");
        let mut c = add_case();
        c.node(MS_DOMAIN, "QLinearAdd", &["a", "as", "az", "b", "bs", "bz"], vec![]);
        assert!(err(&c).contains("expects 7 to 8 inputs"));
        let mut c = add_case();
        c.inits[2].float_data = vec![f32::INFINITY];
        c.node(MS_DOMAIN, "QLinearAdd", &["a", "as", "az", "b", "bs", "bz", "cs", "cz"], vec![]);
        assert!(err(&c).contains("finite and positive"));
    }

    // ONNX spec, QLinearMatMul-10: b per column (its last axis).
    #[test]
    fn qlinear_matmul_per_column() {
        let mut c = Case::new(17);
        c.f32("as", &[], &[0.5])
            .int("az", UINT8, &[], &[128])
            .int("b", INT8, &[3, 2], &[1, 2, 3, 4, 5, 6])
            .f32("bs", &[2], &[0.1, 0.2])
            .int("bz", INT8, &[2], &[0, 0])
            .f32("ys", &[], &[0.3])
            .int("yz", UINT8, &[], &[0]);
        c.node("", "QLinearMatMul", &["a", "as", "az", "b", "bs", "bz", "ys", "yz"], vec![]);
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "DequantizeLinear", "MatMul", "QuantizeLinear"]);
        assert_eq!(axis(&nodes(&l)[1]), Some(1));
        c.inits[3].float_data = vec![0.1, 0.2, 0.3];
        c.inits[3].dims = vec![3];
        c.inits[4].int32_data = vec![0, 0, 0];
        c.inits[4].dims = vec![3];
        assert!(err(&c).contains("b has shape [3, 2]"));
    }

    // Contrib docs, "com.microsoft.QGemm": C int32 with scale
    // alpha * a_scale * b_scale; float output when y_scale is absent.
    #[test]
    fn qgemm_float_and_quantised_outputs() {
        let mut c = Case::new(17);
        c.f32("as", &[], &[0.5])
            .int("az", UINT8, &[], &[128])
            .int("b", INT8, &[2, 3], &[1, 2, 3, 4, 5, 6])
            .f32("bs", &[2], &[0.25, 0.5])
            .int("bz", INT8, &[2], &[0, 0])
            .int("c", INT32, &[2], &[4, -4])
            .f32("ys", &[], &[0.3])
            .int("yz", UINT8, &[], &[0]);
        let attrs = vec![emit::int("transB", 1), emit::float("alpha", 2.0)];
        c.node(MS_DOMAIN, "QGemm", &["a", "as", "az", "b", "bs", "bz", "c"], attrs.clone());
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "DequantizeLinear", "Gemm"]);
        let n = nodes(&l);
        // transB: B is (N, K), its columns are axis 0.
        assert_eq!(axis(&n[1]), Some(0));
        assert_eq!(n[2].output, ["out"]);
        // 4 * 2 * 0.5 * 0.25 = 1, -4 * 2 * 0.5 * 0.5 = -2.
        assert_eq!(init(&l, &n[2].input[2]).float_data, [1.0, -2.0]);
        c.nodes.clear();
        c.node(MS_DOMAIN, "QGemm", &["a", "as", "az", "b", "bs", "bz", "", "ys", "yz"], attrs);
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "DequantizeLinear", "Gemm", "QuantizeLinear"]);
        assert_eq!(nodes(&l)[2].input.len(), 2);
        c.nodes[0].input.pop();
        assert!(err(&c).contains("must be given together"));
    }

    // Contrib docs, "com.microsoft.QLinearGlobalAveragePool".
    #[test]
    fn qlinear_global_average_pool() {
        let mut c = add_case();
        c.node(MS_DOMAIN, "QLinearGlobalAveragePool", &["x", "as", "az", "cs", "cz"], vec![]);
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "GlobalAveragePool", "QuantizeLinear"]);
        c.nodes[0].attribute.push(emit::int("channels_last", 1));
        assert!(err(&c).contains("channels_last=1"));
        c.nodes[0].attribute[0] = emit::float("channels_last", 1.0);
        assert!(err(&c).contains("attribute 'channels_last'"));
    }

    #[test]
    fn opset_below_10_is_refused() {
        let mut c = add_case();
        c.opset = 9;
        c.node(MS_DOMAIN, "QLinearAdd", &["a", "as", "az", "b", "bs", "bz", "cs", "cz"], vec![]);
        assert!(err(&c).contains("opset >= 10"));
    }

    /// The operands of a unary op: X and Y uint8 with scalar parameters.
    fn unary_case(opset: i64) -> Case {
        let mut c = Case::new(opset);
        c.f32("xs", &[], &[0.5]).int("xz", UINT8, &[], &[128]).f32("ys", &[], &[0.25]).int(
            "yz",
            UINT8,
            &[],
            &[0],
        );
        c
    }

    // Contrib docs, "com.microsoft.QLinearSigmoid" / "QLinearLeakyRelu":
    // quantize(f(dequantize(X))); the activation is a single node.
    #[test]
    fn activations() {
        let mut c = unary_case(17);
        c.node(MS_DOMAIN, "QLinearSigmoid", &["x", "xs", "xz", "ys", "yz"], vec![]);
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "Sigmoid", "QuantizeLinear"]);
        let mut c = unary_case(17);
        c.node(
            MS_DOMAIN,
            "QLinearLeakyRelu",
            &["x", "xs", "xz", "ys", "yz"],
            vec![emit::float("alpha", 0.2)],
        );
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "LeakyRelu", "QuantizeLinear"]);
        assert_eq!(nodes(&l)[1].attribute[0].f, 0.2);
        c.nodes[0].attribute[0] = emit::int("alpha", 1);
        assert!(err(&c).contains("attribute 'alpha'"));
        c.nodes[0].attribute.clear();
        c.nodes[0].input.truncate(3);
        assert!(err(&c).contains("expects 4 to 5 inputs"));
    }

    // Contrib docs, "com.microsoft.QLinearAveragePool" and
    // "QLinearReduceMean": DQ → float op → Q.
    #[test]
    fn pools_and_reduce_mean() {
        let mut c = unary_case(17);
        c.node(
            MS_DOMAIN,
            "QLinearAveragePool",
            &["x", "xs", "xz", "ys", "yz"],
            vec![emit::ints("kernel_shape", &[2, 2]), emit::int("count_include_pad", 1)],
        );
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "AveragePool", "QuantizeLinear"]);
        assert_eq!(nodes(&l)[1].attribute.len(), 2);
        c.nodes[0].attribute.push(emit::int("channels_last", 1));
        assert!(err(&c).contains("channels_last=1"));
        c.nodes[0].attribute.remove(0);
        c.nodes[0].attribute.pop();
        assert!(err(&c).contains("'kernel_shape' is missing"));
        // ReduceMean: axes an attribute before opset 18, an input from 18.
        for (opset, inputs) in [(17, 1), (18, 2)] {
            let mut c = unary_case(opset);
            c.node(
                MS_DOMAIN,
                "QLinearReduceMean",
                &["x", "xs", "xz", "ys", "yz"],
                vec![emit::ints("axes", &[2, 3]), emit::int("keepdims", 1)],
            );
            let l = c.lower().unwrap();
            assert_eq!(ops(&l), ["DequantizeLinear", "ReduceMean", "QuantizeLinear"]);
            assert_eq!(nodes(&l)[1].input.len(), inputs);
            c.nodes[0].attribute.pop();
            assert!(err(&c).contains("'keepdims' is missing"));
        }
    }

    // Contrib docs, "com.microsoft.QLinearSoftmax": the `opset` attribute
    // names the Softmax semantics.
    #[test]
    fn softmax_semantics() {
        let soft = |model_opset: i64, op_opset: i64, axis: Option<i64>| {
            let mut c = unary_case(model_opset);
            let mut attrs = vec![emit::int("opset", op_opset)];
            attrs.extend(axis.map(|a| emit::int("axis", a)));
            c.node(MS_DOMAIN, "QLinearSoftmax", &["x", "xs", "xz", "ys", "yz"], attrs);
            c.lower().map(|l| ops(&l))
        };
        let plain = ["DequantizeLinear", "Softmax", "QuantizeLinear"];
        assert_eq!(soft(17, 13, None).unwrap(), plain);
        assert_eq!(soft(11, 11, Some(1)).unwrap(), plain);
        assert_eq!(soft(11, 13, None).unwrap(), plain);
        assert_eq!(
            soft(17, 11, None).unwrap(),
            ["DequantizeLinear", "Flatten", "Softmax", "Shape", "Reshape", "QuantizeLinear"]
        );
        let e = soft(11, 13, Some(1)).unwrap_err().message().to_owned();
        assert!(e.contains("axis 1"), "{e}");
        let mut c = unary_case(17);
        c.node(MS_DOMAIN, "QLinearSoftmax", &["x", "xs", "xz", "ys", "yz"], vec![]);
        assert!(err(&c).contains("'opset' is missing"));
    }

    // Contrib docs, "com.microsoft.QLinearConcat": Y's parameters, then
    // (tensor, scale, zero point) triples.
    #[test]
    fn concat() {
        let mut c = unary_case(17);
        let attrs = vec![emit::int("axis", 1)];
        c.node(
            MS_DOMAIN,
            "QLinearConcat",
            &["ys", "yz", "a", "xs", "xz", "b", "xs", ""],
            attrs.clone(),
        );
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "DequantizeLinear", "Concat", "QuantizeLinear"]);
        assert_eq!(nodes(&l)[1].input.len(), 2);
        c.nodes[0].input.pop();
        assert!(err(&c).contains("triples"));
        c.nodes[0].input[3] = String::new();
        c.nodes[0].input.push("xz".into());
        assert!(err(&c).contains("input 3 is missing"));
        c.nodes[0].input[3] = "xs".into();
        c.nodes[0].attribute.clear();
        assert!(err(&c).contains("'axis' is missing"));
    }

    // Contrib docs, "com.microsoft.QLinearWhere".
    #[test]
    fn where_op() {
        let mut c = unary_case(17);
        c.node(
            MS_DOMAIN,
            "QLinearWhere",
            &["cond", "a", "xs", "xz", "b", "xs", "xz", "ys", "yz"],
            vec![],
        );
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "DequantizeLinear", "Where", "QuantizeLinear"]);
        assert_eq!(nodes(&l)[2].input[0], "cond");
    }

    // Contrib docs, "com.microsoft.DynamicQuantizeMatMul" and
    // "MatMulIntegerToFloat": float outputs, B per column, bias added.
    #[test]
    fn float_output_matmuls() {
        let mut c = Case::new(17);
        c.int("b", INT8, &[3, 2], &[1, 2, 3, 4, 5, 6])
            .f32("bs", &[2], &[0.1, 0.2])
            .int("bz", INT8, &[2], &[0, 1])
            .f32("bias", &[2], &[1.0, 2.0])
            .f32("as", &[], &[0.5]);
        c.node(MS_DOMAIN, "DynamicQuantizeMatMul", &["a", "b", "bs", "bz", "bias"], vec![]);
        let l = c.lower().unwrap();
        assert_eq!(
            ops(&l),
            ["DynamicQuantizeLinear", "DequantizeLinear", "DequantizeLinear", "MatMul", "Add"]
        );
        let n = nodes(&l);
        assert_eq!(n[1].input, n[0].output);
        assert_eq!(axis(&n[2]), Some(1));
        assert_eq!(n[4].output, ["out"]);
        c.opset = 10;
        assert!(err(&c).contains("opset >= 11"));
        c.opset = 17;
        c.nodes.clear();
        c.node(MS_DOMAIN, "MatMulIntegerToFloat", &["a", "b", "as", "bs"], vec![]);
        let l = c.lower().unwrap();
        assert_eq!(ops(&l), ["DequantizeLinear", "DequantizeLinear", "MatMul"]);
        assert_eq!(nodes(&l)[2].output, ["out"]);
        c.nodes[0].input[3] = "as".into();
        c.nodes[0].input[2] = "bs".into();
        assert!(err(&c).contains("A scale 'bs' has shape [2], expected a scalar"));
    }
}
