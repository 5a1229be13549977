//! Half-precision models and what tract 0.23.9 can run of them.
//!
//! Measured on one-op models and on converted ResNet and Transformer encoder
//! exports (onnxconverter-common 1.16.0 `convert_float_to_float16`), against
//! onnxruntime 1.23.2 on the same float16 inputs:
//!
//! - float16: tract runs Conv, MatMul, Add, Relu, LayerNormalization,
//!   Softmax, GlobalAveragePool and Cast from and to float32 natively. Gemm
//!   with a bias input fails to prepare ("Output mismatch after rewiring
//!   expansion … expected F16 got F32"): tract expands Gemm into
//!   `A·B + beta·C` with `beta` (and `alpha`) as float32 scalars, and the
//!   product with a float16 tensor is float32. [`split_half_gemms`] rewrites
//!   such a Gemm as a Gemm without bias followed by a float16 `Add` (and
//!   `Mul` by `alpha`, `beta` when they are not 1), which tract runs.
//! - bfloat16: tract has no bfloat16 datum type at all ("Unknown DatumType
//!   Bfloat16", at the first bfloat16 initializer, input or Cast), and
//!   onnxruntime's CPU provider has no bfloat16 kernel for Conv, Gemm,
//!   MatMul, Add or Relu. A bfloat16 model runs as its [`float32_twin`].
//!
//! These functions change only what tract runs; the analysed model is the
//! lowered one as it is. Every original tensor keeps its name.

use std::collections::{HashMap, HashSet};

use crate::error::Result;
use crate::load::{ExternalData, tensor};
use crate::proto::tensor_proto::DataType;
use crate::proto::{
    AttributeProto, GraphProto, ModelProto, NodeProto, TensorProto, ValueInfoProto,
    attribute_proto, type_proto,
};

/// The half-precision type a model computes in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Half {
    /// IEEE 754 binary16.
    Float16,
    /// bfloat16 (8 exponent bits, 8 significant bits).
    Bfloat16,
}

impl Half {
    /// The ONNX name of the type.
    pub fn name(self) -> &'static str {
        match self {
            Half::Float16 => "float16",
            Half::Bfloat16 => "bfloat16",
        }
    }
}

const F16: i32 = DataType::Float16 as i32;
const BF16: i32 = DataType::Bfloat16 as i32;
const F32: i32 = DataType::Float as i32;

/// The half-precision type of a model: bfloat16 when any initializer,
/// declared value, Cast target or constant is bfloat16, else float16 when
/// any is float16, else `None`.
pub fn half_type(model: &ModelProto) -> Option<Half> {
    let mut seen = HashSet::new();
    if let Some(g) = &model.graph {
        types_in(g, &mut seen);
    }
    if seen.contains(&BF16) {
        Some(Half::Bfloat16)
    } else if seen.contains(&F16) {
        Some(Half::Float16)
    } else {
        None
    }
}

fn types_in(g: &GraphProto, seen: &mut HashSet<i32>) {
    seen.extend(g.initializer.iter().map(|t| t.data_type));
    for v in g.input.iter().chain(&g.output).chain(&g.value_info) {
        if let Some(t) = elem_type(v) {
            seen.insert(t);
        }
    }
    for n in &g.node {
        for a in &n.attribute {
            if (a.name == "to" || a.name == "dtype")
                && a.r#type == attribute_proto::AttributeType::Int as i32
            {
                seen.insert(a.i as i32);
            }
            if let Some(t) = &a.t {
                seen.insert(t.data_type);
            }
            for sub in a.g.iter().chain(&a.graphs) {
                types_in(sub, seen);
            }
        }
    }
}

fn elem_type(v: &ValueInfoProto) -> Option<i32> {
    match v.r#type.as_ref()?.value.as_ref()? {
        type_proto::Value::TensorType(t) => Some(t.elem_type),
        _ => None,
    }
}

/// Rewrites every float16 Gemm of the main graph that has a bias (or an
/// `alpha` other than 1) as `Gemm(A, B)` without bias, then `Mul` by
/// `alpha`, then `Add` of `C` (times `beta`), all in float16, the last node
/// writing the Gemm's output name. Returns how many Gemms were split.
///
/// The result is the ONNX Gemm (Operators.md, Gemm: `Y = alpha·A'·B' +
/// beta·C`, C broadcast unidirectionally to (M, N), which `Add` does) with
/// one rounding to float16 after the product and one after each scaling,
/// where onnxruntime rounds once: a relative difference of about 2^-11 per
/// extra rounding. A Gemm whose element type is not known from an
/// initializer or a declared value is left alone.
pub fn split_half_gemms(model: &mut ModelProto) -> usize {
    let Some(g) = model.graph.as_mut() else { return 0 };
    let mut types: HashMap<String, i32> =
        g.initializer.iter().map(|t| (t.name.clone(), t.data_type)).collect();
    for v in g.input.iter().chain(&g.output).chain(&g.value_info) {
        if let Some(t) = elem_type(v) {
            types.entry(v.name.clone()).or_insert(t);
        }
    }
    let mut names = Names::of(g);
    let mut split = 0;
    let mut nodes = Vec::with_capacity(g.node.len());
    let mut added = Vec::new();
    for n in std::mem::take(&mut g.node) {
        let is_f16 = n.op_type == "Gemm"
            && (n.domain.is_empty() || n.domain == "ai.onnx")
            && n.input.iter().any(|i| types.get(i) == Some(&F16));
        let float = |name: &str, default: f32| {
            n.attribute.iter().find(|a| a.name == name).map_or(default, |a| a.f)
        };
        let (alpha, beta) = (float("alpha", 1.0), float("beta", 1.0));
        let bias = n.input.get(2).filter(|c| !c.is_empty() && beta != 0.0).cloned();
        if !is_f16 || (bias.is_none() && alpha == 1.0) || n.output.is_empty() {
            nodes.push(n);
            continue;
        }
        split += 1;
        let out = n.output[0].clone();
        let base = if n.name.is_empty() { out.clone() } else { n.name.clone() };
        let mut gemm = n.clone();
        gemm.input.truncate(2);
        gemm.attribute.retain(|a| a.name == "transA" || a.name == "transB");
        let mut last = names.fresh(&format!("{base}/precision/ab"));
        gemm.output = vec![last.clone()];
        nodes.push(gemm);
        let mut scaled = |x: String, k: f32, hint: &str, nodes: &mut Vec<NodeProto>| {
            let c = names.fresh(&format!("{base}/precision/{hint}"));
            added.push(f16_scalar(&c, k));
            let y = names.fresh(&format!("{base}/precision/{hint}_x"));
            nodes.push(node("Mul", &base, hint, vec![x, c], y.clone()));
            y
        };
        if alpha != 1.0 {
            last = scaled(last, alpha, "alpha", &mut nodes);
        }
        if let Some(c) = bias {
            let c = if beta != 1.0 { scaled(c, beta, "beta", &mut nodes) } else { c };
            nodes.push(node("Add", &base, "bias", vec![last.clone(), c], String::new()));
        } else {
            nodes.push(node("Identity", &base, "out", vec![last.clone()], String::new()));
        }
        nodes.last_mut().expect("just pushed").output = vec![out];
    }
    g.node = nodes;
    g.initializer.extend(added);
    split
}

/// The float32 twin of a half-precision model, in place: every float16 and
/// bfloat16 initializer and constant widened to float32 (exactly), every
/// declared float16/bfloat16 value and `dtype` made float32, and every Cast
/// to a half type made a Cast to float32, except that a Cast to float16 is
/// kept and followed by a Cast to float32, so the model's explicit roundings
/// to float16 stay (tract has no bfloat16 to round to). The twin computes
/// between those casts in float32: it measures what the model would give
/// without rounding each op's result to half precision. Subgraphs are
/// converted too.
pub fn float32_twin(model: &mut ModelProto, external: &ExternalData) -> Result<()> {
    if let Some(g) = model.graph.as_mut() {
        let mut names = Names::of(g);
        twin_graph(g, external, &mut names)?;
    }
    Ok(())
}

fn twin_graph(g: &mut GraphProto, external: &ExternalData, names: &mut Names) -> Result<()> {
    for t in &mut g.initializer {
        widen(t, external)?;
    }
    for v in g.input.iter_mut().chain(&mut g.output).chain(&mut g.value_info) {
        if let Some(type_proto::Value::TensorType(t)) =
            v.r#type.as_mut().and_then(|t| t.value.as_mut())
            && (t.elem_type == F16 || t.elem_type == BF16)
        {
            t.elem_type = F32;
        }
    }
    let mut nodes = Vec::with_capacity(g.node.len());
    for mut n in std::mem::take(&mut g.node) {
        for a in &mut n.attribute {
            twin_attribute(a, external, names)?;
        }
        let to = n.attribute.iter().position(|a| a.name == "to");
        let is_cast = n.op_type == "Cast" && (n.domain.is_empty() || n.domain == "ai.onnx");
        match to.map(|k| n.attribute[k].i as i32) {
            Some(F16) if is_cast && !n.output.is_empty() => {
                // Round to float16 as the model does, then widen.
                let out = n.output[0].clone();
                let base = if n.name.is_empty() { out.clone() } else { n.name.clone() };
                let rounded = names.fresh(&format!("{base}/precision/rounded"));
                n.output = vec![rounded.clone()];
                let mut widen = node("Cast", &base, "widen", vec![rounded], out);
                widen.attribute.push(AttributeProto {
                    name: "to".to_owned(),
                    r#type: attribute_proto::AttributeType::Int as i32,
                    i: i64::from(F32),
                    ..Default::default()
                });
                nodes.push(n);
                nodes.push(widen);
                continue;
            }
            Some(BF16) if is_cast => n.attribute[to.expect("found")].i = i64::from(F32),
            _ => {}
        }
        for a in &mut n.attribute {
            if a.name == "dtype"
                && a.r#type == attribute_proto::AttributeType::Int as i32
                && (a.i == i64::from(F16) || a.i == i64::from(BF16))
            {
                a.i = i64::from(F32);
            }
        }
        nodes.push(n);
    }
    g.node = nodes;
    Ok(())
}

fn twin_attribute(
    a: &mut AttributeProto,
    external: &ExternalData,
    names: &mut Names,
) -> Result<()> {
    if let Some(t) = a.t.as_deref_mut() {
        widen(t, external)?;
    }
    for t in &mut a.tensors {
        widen(t, external)?;
    }
    for g in a.g.iter_mut().chain(&mut a.graphs) {
        twin_graph(g, external, names)?;
    }
    Ok(())
}

/// A float16 or bfloat16 tensor as float32 (exact), inline.
fn widen(t: &mut TensorProto, external: &ExternalData) -> Result<()> {
    if t.data_type != F16 && t.data_type != BF16 {
        return Ok(());
    }
    let values = tensor::read_f32(t, external, u64::MAX)?;
    *t = TensorProto {
        name: std::mem::take(&mut t.name),
        dims: std::mem::take(&mut t.dims),
        data_type: F32,
        raw_data: values.iter().flat_map(|v| v.to_le_bytes()).collect::<Vec<u8>>().into(),
        ..Default::default()
    };
    Ok(())
}

fn f16_scalar(name: &str, v: f32) -> TensorProto {
    let bits = f16_bits(v);
    TensorProto {
        name: name.to_owned(),
        data_type: F16,
        raw_data: bits.to_le_bytes().to_vec().into(),
        ..Default::default()
    }
}

/// The float16 nearest to `v` (ties to even), as bits; overflow gives
/// infinity, NaN stays NaN.
fn f16_bits(v: f32) -> u16 {
    let x = v.to_bits();
    let sign = ((x >> 16) & 0x8000) as u16;
    let exp = ((x >> 23) & 0xff) as i32;
    let man = x & 0x7f_ffff;
    if exp == 0xff {
        return sign | 0x7c00 | if man != 0 { 0x200 } else { 0 };
    }
    let e = exp - 127 + 15;
    if e >= 0x1f {
        return sign | 0x7c00;
    }
    let round = |r: u32, rest: u32, half: u32| {
        if rest > half || (rest == half && r & 1 == 1) { r + 1 } else { r }
    };
    if e <= 0 {
        // Subnormal (or zero): the implicit bit joins the shifted significand.
        if e < -10 {
            return sign;
        }
        let m = man | 0x80_0000;
        let shift = (14 - e) as u32;
        let r = round(m >> shift, m & ((1 << shift) - 1), 1 << (shift - 1));
        return sign | r as u16;
    }
    // A carry out of the significand steps the exponent (to infinity at the top).
    sign | round(((e as u32) << 10) | (man >> 13), man & 0x1fff, 0x1000) as u16
}

fn node(op: &str, base: &str, hint: &str, inputs: Vec<String>, output: String) -> NodeProto {
    NodeProto {
        name: format!("{base}/precision/{hint}"),
        op_type: op.to_owned(),
        input: inputs,
        output: vec![output],
        ..Default::default()
    }
}

/// Tensor names in use, to derive collision-free ones.
struct Names(HashSet<String>);

impl Names {
    fn of(g: &GraphProto) -> Names {
        let mut set: HashSet<String> = HashSet::new();
        collect_names(g, &mut set);
        Names(set)
    }

    fn fresh(&mut self, hint: &str) -> String {
        let mut name = hint.to_owned();
        let mut k = 1;
        while self.0.contains(&name) {
            k += 1;
            name = format!("{hint}_{k}");
        }
        self.0.insert(name.clone());
        name
    }
}

fn collect_names(g: &GraphProto, set: &mut HashSet<String>) {
    set.extend(g.initializer.iter().map(|t| t.name.clone()));
    set.extend(g.input.iter().chain(&g.output).chain(&g.value_info).map(|v| v.name.clone()));
    for n in &g.node {
        set.extend(n.input.iter().chain(&n.output).cloned());
        for a in &n.attribute {
            for sub in a.g.iter().chain(&a.graphs) {
                collect_names(sub, set);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::proto::{TypeProto, attribute_proto::AttributeType};

    #[test]
    fn float16_rounding_is_to_nearest_even() {
        // IEEE 754-2008 binary16: 1 = 0x3c00, largest finite 65504 = 0x7bff,
        // smallest subnormal 2^-24 = 0x0001.
        assert_eq!(f16_bits(1.0), 0x3c00);
        assert_eq!(f16_bits(-2.0), 0xc000);
        assert_eq!(f16_bits(0.1), 0x2e66);
        assert_eq!(f16_bits(1.0 / 3.0), 0x3555);
        assert_eq!(f16_bits(65504.0), 0x7bff);
        // 65520 is halfway to the next step (65536, past the range): to even, infinity.
        assert_eq!(f16_bits(65520.0), 0x7c00);
        assert_eq!(f16_bits(65519.0), 0x7bff);
        assert_eq!(f16_bits(2f32.powi(-24)), 0x0001);
        // Halfway between 0 and 2^-24: to even, zero; just above: 2^-24.
        assert_eq!(f16_bits(2f32.powi(-25)), 0x0000);
        assert_eq!(f16_bits(2f32.powi(-25) * 1.01), 0x0001);
        // 1 + 2^-11 is halfway between 1 and 1 + 2^-10: to even (1).
        assert_eq!(f16_bits(1.0 + 2f32.powi(-11)), 0x3c00);
        assert_eq!(f16_bits(1.0 + 3.0 * 2f32.powi(-11)), 0x3c02);
        assert_eq!(f16_bits(f32::INFINITY), 0x7c00);
        assert_eq!(f16_bits(f32::NAN) & 0x7e00, 0x7e00);
        // Every float16 round-trips through its float32 value.
        for h in 0..=0xffffu16 {
            let v = tensor::f16_to_f32(h);
            if !v.is_nan() {
                assert_eq!(f16_bits(v), h, "{h:#06x}");
            }
        }
    }

    fn value(name: &str, elem: i32) -> ValueInfoProto {
        ValueInfoProto {
            name: name.to_owned(),
            r#type: Some(TypeProto {
                value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                    elem_type: elem,
                    shape: None,
                })),
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    fn init(name: &str, dtype: i32, dims: &[i64], raw: Vec<u8>) -> TensorProto {
        TensorProto {
            name: name.to_owned(),
            data_type: dtype,
            dims: dims.to_vec(),
            raw_data: raw.into(),
            ..Default::default()
        }
    }

    fn attr_f(name: &str, f: f32) -> AttributeProto {
        AttributeProto {
            name: name.to_owned(),
            r#type: AttributeType::Float as i32,
            f,
            ..Default::default()
        }
    }

    fn attr_i(name: &str, i: i64) -> AttributeProto {
        AttributeProto {
            name: name.to_owned(),
            r#type: AttributeType::Int as i32,
            i,
            ..Default::default()
        }
    }

    fn gemm_model(dtype: i32, attrs: Vec<AttributeProto>) -> ModelProto {
        let node = NodeProto {
            name: "fc".into(),
            op_type: "Gemm".into(),
            input: vec!["x".into(), "w".into(), "b".into()],
            output: vec!["y".into()],
            attribute: attrs,
            ..Default::default()
        };
        ModelProto {
            graph: Some(GraphProto {
                node: vec![node],
                input: vec![value("x", dtype)],
                output: vec![value("y", dtype)],
                initializer: vec![
                    init("w", dtype, &[2, 2], vec![0; 8]),
                    init("b", dtype, &[2], vec![0; 4]),
                ],
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    #[test]
    fn a_float16_gemm_with_bias_becomes_gemm_then_add_keeping_its_output() {
        let mut m = gemm_model(F16, vec![attr_i("transB", 1)]);
        assert_eq!(half_type(&m), Some(Half::Float16));
        assert_eq!(split_half_gemms(&mut m), 1);
        let g = m.graph.as_ref().unwrap();
        let ops: Vec<&str> = g.node.iter().map(|n| n.op_type.as_str()).collect();
        assert_eq!(ops, ["Gemm", "Add"]);
        assert_eq!(g.node[0].input, ["x", "w"]);
        assert_eq!(g.node[0].name, "fc");
        assert_eq!(g.node[0].attribute.len(), 1, "transB kept, nothing else");
        assert_eq!(g.node[1].input, [g.node[0].output[0].as_str(), "b"]);
        assert_eq!(g.node[1].output, ["y"]);
        // alpha and beta become float16 scalars.
        let mut m = gemm_model(F16, vec![attr_f("alpha", 0.5), attr_f("beta", 2.0)]);
        assert_eq!(split_half_gemms(&mut m), 1);
        let g = m.graph.as_ref().unwrap();
        let ops: Vec<&str> = g.node.iter().map(|n| n.op_type.as_str()).collect();
        assert_eq!(ops, ["Gemm", "Mul", "Mul", "Add"]);
        assert_eq!(g.node[3].output, ["y"]);
        let scalars: Vec<&[u8]> =
            g.initializer.iter().skip(2).map(|t| t.raw_data.as_ref()).collect();
        assert_eq!(scalars, [&[0x00, 0x38][..], &[0x00, 0x40][..]]);
        // float32 Gemms are left alone.
        let mut m = gemm_model(F32, vec![]);
        assert_eq!(half_type(&m), None);
        assert_eq!(split_half_gemms(&mut m), 0);
    }

    #[test]
    fn the_float32_twin_widens_everything_and_keeps_float16_casts() {
        let mut m = gemm_model(BF16, vec![]);
        let g = m.graph.as_mut().unwrap();
        // bfloat16 1.0 and -2.0 (bits 0x3f80, 0xc000).
        g.initializer[1].raw_data = vec![0x80, 0x3f, 0x00, 0xc0].into();
        g.node.push(NodeProto {
            op_type: "Cast".into(),
            input: vec!["y".into()],
            output: vec!["h".into()],
            attribute: vec![attr_i("to", i64::from(F16))],
            ..Default::default()
        });
        g.node.push(NodeProto {
            op_type: "Cast".into(),
            input: vec!["h".into()],
            output: vec!["z".into()],
            attribute: vec![attr_i("to", i64::from(BF16))],
            ..Default::default()
        });
        assert_eq!(half_type(&m), Some(Half::Bfloat16));
        float32_twin(&mut m, &ExternalData::none()).unwrap();
        // Only the kept Cast to float16 still names a half type.
        assert_eq!(half_type(&m), Some(Half::Float16));
        let g = m.graph.as_ref().unwrap();
        assert!(g.initializer.iter().all(|t| t.data_type == F32));
        let b: Vec<f32> = g.initializer[1]
            .raw_data
            .chunks(4)
            .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
            .collect();
        assert_eq!(b, [1.0, -2.0]);
        assert_eq!(elem_type(&g.input[0]), Some(F32));
        let casts: Vec<(&str, &str, i64)> = g.node[1..]
            .iter()
            .map(|n| (n.input[0].as_str(), n.output[0].as_str(), n.attribute[0].i))
            .collect();
        let rounded = g.node[1].output[0].as_str();
        assert_eq!(
            casts,
            [
                ("y", rounded, i64::from(F16)),
                (rounded, "h", i64::from(F32)),
                ("h", "z", i64::from(F32))
            ]
        );
    }
}
