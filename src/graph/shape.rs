//! A small shape inference for the ops residual networks are made of, used
//! where the model carries no `value_info`. It never guesses: a shape it
//! cannot derive stays unknown.

use crate::graph::{Dim, Graph, NodeId, ValueId};
use crate::load::attr;

/// Fills in the shape of every value whose shape the model does not declare
/// and that follows from its inputs.
pub(crate) fn infer(g: &mut Graph) {
    for i in 0..g.order.len() {
        let n = g.order[i];
        let outputs = g.node(n).outputs.clone();
        let Some(&first) = outputs.first() else { continue };
        if g.value(first).fact.shape.is_some() {
            continue;
        }
        if let Some(shape) = infer_node(g, n) {
            let dtype = match g.node(n).op.as_str() {
                "Cast" => attr::int(&g.node(n).attrs, "to").unwrap_or(0) as i32,
                "Constant" => constant_fact(g, n).map_or(0, |(dtype, _)| dtype),
                "Shape" => 7, // int64
                _ => g.input(n, 0).map_or(0, |v| g.value(v).fact.dtype),
            };
            let fact = &mut g.values[first.0 as usize].fact;
            fact.shape = Some(shape);
            if fact.dtype == 0 {
                fact.dtype = dtype;
            }
        }
    }
}

fn shape_of(g: &Graph, n: NodeId, slot: usize) -> Option<Vec<Dim>> {
    g.input(n, slot).and_then(|v| g.shape(v)).map(<[Dim]>::to_vec)
}

fn known(d: &Dim) -> Option<u64> {
    match d {
        Dim::Known(k) => Some(*k),
        _ => None,
    }
}

fn ints_attr_or_input(g: &Graph, n: NodeId, name: &str, slot: usize) -> Option<Vec<i64>> {
    if let Some(v) = attr::ints(&g.node(n).attrs, name) {
        return Some(v.to_vec());
    }
    g.input(n, slot).and_then(|v: ValueId| g.constant_i64(v))
}

fn norm_axis(axis: i64, rank: usize) -> Option<usize> {
    let a = if axis < 0 { axis + rank as i64 } else { axis };
    (0..rank as i64).contains(&a).then_some(a as usize)
}

/// The element type and shape of a Constant node's value (the ONNX operator
/// specification of Constant, recalled from memory: exactly one attribute of
/// `value`, `sparse_value`, `value_float(s)`, `value_int(s)`, `value_string(s)`).
fn constant_fact(g: &Graph, n: NodeId) -> Option<(i32, Vec<Dim>)> {
    let a = g.node(n).attrs.first()?;
    let dims = |d: &[i64]| {
        d.iter().map(|&k| u64::try_from(k).ok().map(Dim::Known)).collect::<Option<Vec<Dim>>>()
    };
    match a.name.as_str() {
        "value" => a.t.as_deref().and_then(|t| Some((t.data_type, dims(&t.dims)?))),
        "sparse_value" => a
            .sparse_tensor
            .as_deref()
            .and_then(|s| Some((s.values.as_ref().map_or(0, |v| v.data_type), dims(&s.dims)?))),
        "value_float" => Some((1, Vec::new())),
        "value_int" => Some((7, Vec::new())),
        "value_floats" => Some((1, vec![Dim::Known(a.floats.len() as u64)])),
        "value_ints" => Some((7, vec![Dim::Known(a.ints.len() as u64)])),
        _ => None,
    }
}

fn infer_node(g: &Graph, n: NodeId) -> Option<Vec<Dim>> {
    let node = g.node(n);
    let attrs = &node.attrs;
    match node.op.as_str() {
        "Constant" if g.node(n).attrs.len() == 1 => constant_fact(g, n).map(|(_, shape)| shape),
        "Relu"
        | "LeakyRelu"
        | "Elu"
        | "Selu"
        | "Celu"
        | "Sigmoid"
        | "HardSigmoid"
        | "Tanh"
        | "Softplus"
        | "Softsign"
        | "Gelu"
        | "HardSwish"
        | "Mish"
        | "Clip"
        | "Erf"
        | "Sqrt"
        | "Neg"
        | "Exp"
        | "Log"
        | "Abs"
        | "Reciprocal"
        | "Identity"
        | "Cast"
        | "CastLike"
        | "Dropout"
        | "BatchNormalization"
        | "InstanceNormalization"
        | "GroupNormalization"
        | "LayerNormalization"
        | "RMSNormalization"
        | "SimplifiedLayerNormalization"
        | "Softmax"
        | "LogSoftmax"
        | "QuantizeLinear"
        | "DequantizeLinear"
        | "Not"
        | "Floor"
        | "Ceil"
        | "Round"
        | "Sign"
        | "LpNormalization"
        | "ThresholdedRelu"
        | "Swish" => shape_of(g, n, 0),
        "Add" | "Sub" | "Mul" | "Div" | "Pow" | "Max" | "Min" | "Sum" | "Mean" | "Equal"
        | "Greater" | "Less" | "And" | "Or" | "Where" | "PRelu" | "BiasGelu" => {
            let shapes: Option<Vec<Vec<Dim>>> =
                node.inputs.iter().flatten().map(|&v| g.shape(v).map(<[Dim]>::to_vec)).collect();
            broadcast(&shapes?)
        }
        "Conv" | "ConvInteger" | "FusedConv" => {
            let x = shape_of(g, n, 0)?;
            let w = g.input(n, 1).and_then(|v| g.shape(v))?.to_vec();
            spatial(&x, known(w.first()?)?, w.get(2..)?, attrs, false)
        }
        "QLinearConv" => {
            let x = shape_of(g, n, 0)?;
            let w = g.input(n, 3).and_then(|v| g.shape(v))?.to_vec();
            spatial(&x, known(w.first()?)?, w.get(2..)?, attrs, false)
        }
        "MaxPool" | "AveragePool" | "LpPool" => {
            let x = shape_of(g, n, 0)?;
            let channels = known(x.get(1)?)?;
            let kernel: Vec<Dim> =
                attr::ints(attrs, "kernel_shape")?.iter().map(|&k| Dim::Known(k as u64)).collect();
            let ceil = attr::int(attrs, "ceil_mode") == Some(1);
            spatial(&x, channels, &kernel, attrs, ceil)
        }
        "GlobalAveragePool" | "GlobalMaxPool" => {
            let x = shape_of(g, n, 0)?;
            let mut out = x.clone();
            for d in out.iter_mut().skip(2) {
                *d = Dim::Known(1);
            }
            Some(out)
        }
        "Gemm" | "FusedGemm" => {
            let a = shape_of(g, n, 0)?;
            let b = shape_of(g, n, 1)?;
            if a.len() != 2 || b.len() != 2 {
                return None;
            }
            let m = if attr::int(attrs, "transA") == Some(1) { a[1].clone() } else { a[0].clone() };
            let k = if attr::int(attrs, "transB") == Some(1) { b[0].clone() } else { b[1].clone() };
            Some(vec![m, k])
        }
        "MatMul" | "MatMulInteger" | "FusedMatMul" => {
            let a = shape_of(g, n, 0)?;
            let b = shape_of(g, n, 1)?;
            matmul(&a, &b)
        }
        "Flatten" => {
            let x = shape_of(g, n, 0)?;
            let axis = norm_axis(attr::int(attrs, "axis").unwrap_or(1), x.len() + 1)?;
            let product = |dims: &[Dim]| -> Dim {
                if dims.len() == 1 {
                    return dims[0].clone();
                }
                dims.iter()
                    .try_fold(1u64, |acc, d| known(d).and_then(|k| acc.checked_mul(k)))
                    .map_or(Dim::Unknown, Dim::Known)
            };
            let head = if axis == 0 { Dim::Known(1) } else { product(&x[..axis]) };
            let tail = if axis == x.len() { Dim::Known(1) } else { product(&x[axis..]) };
            Some(vec![head, tail])
        }
        "Reshape" => {
            let x = shape_of(g, n, 0)?;
            let allow_zero = attr::int(attrs, "allowzero") == Some(1);
            if let Some(target) = g.input(n, 1).and_then(|v| g.constant_i64(v)) {
                return reshape(&x, &target, allow_zero);
            }
            // A target computed at run time from shape metadata.
            let target = g.input(n, 1).and_then(|v| shape_value(g, v, 0))?;
            reshape_symbolic(&x, &target, allow_zero)
        }
        "Expand" => {
            let x = shape_of(g, n, 0)?;
            let target = g.input(n, 1).and_then(|v| shape_value(g, v, 0))?;
            let target: Vec<Dim> = target
                .into_iter()
                .map(|e| match e {
                    Elem::Int(k) if k >= 0 => Dim::Known(k as u64),
                    Elem::Int(_) => Dim::Unknown,
                    Elem::Dim(d) => d,
                })
                .collect();
            broadcast(&[x, target])
        }
        "Shape" => {
            let x = shape_of(g, n, 0)?;
            let (start, end) = shape_range(attrs, x.len());
            Some(vec![Dim::Known(end.saturating_sub(start) as u64)])
        }
        "Transpose" => {
            let x = shape_of(g, n, 0)?;
            let perm: Vec<usize> = match attr::ints(attrs, "perm") {
                Some(p) => p.iter().map(|&i| usize::try_from(i).ok()).collect::<Option<_>>()?,
                None => (0..x.len()).rev().collect(),
            };
            perm.iter().map(|&i| x.get(i).cloned()).collect()
        }
        "Concat" => {
            let shapes: Vec<Vec<Dim>> = node
                .inputs
                .iter()
                .flatten()
                .map(|&v| g.shape(v).map(<[Dim]>::to_vec))
                .collect::<Option<_>>()?;
            let first = shapes.first()?.clone();
            let axis = norm_axis(attr::int(attrs, "axis")?, first.len())?;
            let total: Option<u64> = shapes.iter().map(|s| s.get(axis).and_then(known)).sum();
            let mut out = first;
            out[axis] = total.map_or(Dim::Unknown, Dim::Known);
            Some(out)
        }
        "Unsqueeze" => {
            let x = shape_of(g, n, 0)?;
            let axes = ints_attr_or_input(g, n, "axes", 1)?;
            let rank = x.len() + axes.len();
            let mut axes: Vec<usize> =
                axes.iter().map(|&a| norm_axis(a, rank)).collect::<Option<_>>()?;
            axes.sort_unstable();
            let mut out = x;
            for a in axes {
                if a > out.len() {
                    return None;
                }
                out.insert(a, Dim::Known(1));
            }
            Some(out)
        }
        "Squeeze" => {
            let x = shape_of(g, n, 0)?;
            let axes: Vec<usize> = match ints_attr_or_input(g, n, "axes", 1) {
                Some(a) => a.iter().map(|&a| norm_axis(a, x.len())).collect::<Option<_>>()?,
                None => x
                    .iter()
                    .enumerate()
                    .filter(|(_, d)| **d == Dim::Known(1))
                    .map(|(i, _)| i)
                    .collect(),
            };
            Some(
                x.into_iter()
                    .enumerate()
                    .filter(|(i, _)| !axes.contains(i))
                    .map(|(_, d)| d)
                    .collect(),
            )
        }
        "ReduceMean" | "ReduceSum" | "ReduceMax" | "ReduceMin" | "ReduceProd" | "ReduceL2"
        | "ReduceSumSquare" => {
            let x = shape_of(g, n, 0)?;
            let keep = attr::int(attrs, "keepdims").unwrap_or(1) == 1;
            let axes: Vec<usize> = match ints_attr_or_input(g, n, "axes", 1) {
                Some(a) => a.iter().map(|&a| norm_axis(a, x.len())).collect::<Option<_>>()?,
                None => (0..x.len()).collect(),
            };
            Some(
                x.into_iter()
                    .enumerate()
                    .filter_map(|(i, d)| match (axes.contains(&i), keep) {
                        (true, true) => Some(Dim::Known(1)),
                        (true, false) => None,
                        (false, _) => Some(d),
                    })
                    .collect(),
            )
        }
        "Resize" | "Upsample" => {
            let x = shape_of(g, n, 0)?;
            let (scales_slot, sizes_slot) =
                if node.op == "Upsample" { (1, usize::MAX) } else { (2, 3) };
            if let Some(sizes) = g.input(n, sizes_slot).and_then(|v| g.constant_i64(v))
                && sizes.len() == x.len()
            {
                return Some(sizes.iter().map(|&s| Dim::Known(s.max(0) as u64)).collect());
            }
            let scales = g.input(n, scales_slot).and_then(|v| g.constant_f32(v, 1 << 12))?;
            if scales.len() != x.len() {
                return None;
            }
            Some(
                x.iter()
                    .zip(&scales)
                    .map(|(d, &s)| match d {
                        Dim::Known(k) => Dim::Known((*k as f64 * s as f64).floor() as u64),
                        other if s == 1.0 => other.clone(),
                        _ => Dim::Unknown,
                    })
                    .collect(),
            )
        }
        "Pad" => {
            let x = shape_of(g, n, 0)?;
            let pads = ints_attr_or_input(g, n, "pads", 1)?;
            if pads.len() != 2 * x.len() {
                return None;
            }
            Some(
                x.iter()
                    .enumerate()
                    .map(|(i, d)| {
                        // i128: a hostile file's pads must not overflow.
                        let p = i128::from(pads[i]) + i128::from(pads[i + x.len()]);
                        Some(match (d, p) {
                            (Dim::Known(k), p) => Dim::Known(dim_of(i128::from(*k) + p)?),
                            (other, 0) => other.clone(),
                            _ => Dim::Unknown,
                        })
                    })
                    .collect::<Option<_>>()?,
            )
        }
        "Slice" => {
            let x = shape_of(g, n, 0)?;
            let starts = ints_attr_or_input(g, n, "starts", 1)?;
            let ends = ints_attr_or_input(g, n, "ends", 2)?;
            let axes = ints_attr_or_input(g, n, "axes", 3)
                .unwrap_or_else(|| (0..starts.len() as i64).collect());
            let steps = g
                .input(n, 4)
                .and_then(|v| g.constant_i64(v))
                .unwrap_or_else(|| vec![1; starts.len()]);
            let mut out = x.clone();
            for (i, &axis) in axes.iter().enumerate() {
                let a = norm_axis(axis, x.len())?;
                let Dim::Known(len) = x[a] else {
                    out[a] = Dim::Unknown;
                    continue;
                };
                out[a] = Dim::Known(slice_len(
                    len as i64,
                    *starts.get(i)?,
                    *ends.get(i)?,
                    *steps.get(i)?,
                )?);
            }
            Some(out)
        }
        "Gather" => {
            let data = shape_of(g, n, 0)?;
            let idx = shape_of(g, n, 1)?;
            let axis = norm_axis(attr::int(attrs, "axis").unwrap_or(0), data.len())?;
            let mut out = data[..axis].to_vec();
            out.extend(idx);
            out.extend_from_slice(&data[axis + 1..]);
            Some(out)
        }
        _ => None,
    }
}

/// One element of a small integer tensor computed from shape metadata: a
/// number, or a dimension of some tensor (possibly symbolic).
#[derive(Debug, Clone, PartialEq)]
enum Elem {
    Int(i64),
    Dim(Dim),
}

/// The `[start, end)` range of axes a `Shape` node returns (opset 15 adds
/// `start` and `end`; negative values count from the end, clamped).
fn shape_range(attrs: &[crate::proto::AttributeProto], rank: usize) -> (usize, usize) {
    let clamp = |a: i64| {
        let a = if a < 0 { a + rank as i64 } else { a };
        a.clamp(0, rank as i64) as usize
    };
    let start = clamp(attr::int(attrs, "start").unwrap_or(0));
    let end = clamp(attr::int(attrs, "end").unwrap_or(rank as i64));
    (start, end.max(start))
}

/// The value of a 0-D or 1-D integer tensor computed from constants and
/// shape metadata (`Shape` of a tensor whose shape is known, then `Slice`,
/// `Gather`, `Concat`, `Unsqueeze`, `Squeeze`, `Cast`, `Identity`), as
/// PyTorch's exporter spells a Reshape or Expand target that keeps the
/// batch. Never guesses: any other producer gives `None`.
fn shape_value(g: &Graph, v: ValueId, depth: usize) -> Option<Vec<Elem>> {
    if depth > 16 {
        return None;
    }
    if let Some(k) = g.constant_i64(v) {
        return Some(k.into_iter().map(Elem::Int).collect());
    }
    let n = g.producer(v)?;
    let node = g.node(n);
    let input = |slot: usize| g.input(n, slot);
    match node.op.as_str() {
        "Shape" => {
            let x = g.shape(input(0)?)?;
            let (start, end) = shape_range(&node.attrs, x.len());
            Some(
                x[start..end]
                    .iter()
                    .map(|d| match d {
                        Dim::Known(k) => Elem::Int(i64::try_from(*k).ok().unwrap_or(-1)),
                        other => Elem::Dim(other.clone()),
                    })
                    .collect(),
            )
        }
        "Cast" | "Identity" | "Unsqueeze" | "Squeeze" => shape_value(g, input(0)?, depth + 1),
        // `H * W` of a flattened map: numbers only, a symbol stops it.
        "Mul" | "Div" | "Add" | "Sub" => {
            let a = shape_value(g, input(0)?, depth + 1)?;
            let b = shape_value(g, input(1)?, depth + 1)?;
            let int = |e: &Elem| if let Elem::Int(k) = e { Some(i128::from(*k)) } else { None };
            let len = a.len().max(b.len());
            if !(a.len() == len || a.len() == 1) || !(b.len() == len || b.len() == 1) {
                return None;
            }
            (0..len)
                .map(|i| {
                    let x = int(a.get(i).or(a.first())?)?;
                    let y = int(b.get(i).or(b.first())?)?;
                    let v = match node.op.as_str() {
                        "Mul" => x * y,
                        "Add" => x + y,
                        "Sub" => x - y,
                        _ if y != 0 => x / y, // ONNX integer Div truncates
                        _ => return None,
                    };
                    i64::try_from(v).ok().map(Elem::Int)
                })
                .collect()
        }
        "Concat" => {
            let mut out = Vec::new();
            for v in node.inputs.iter().flatten() {
                out.extend(shape_value(g, *v, depth + 1)?);
            }
            Some(out)
        }
        "Gather" => {
            let data = shape_value(g, input(0)?, depth + 1)?;
            let idx = g.constant_i64(input(1)?)?;
            idx.iter()
                .map(|&i| {
                    let i = if i < 0 { i + data.len() as i64 } else { i };
                    usize::try_from(i).ok().and_then(|i| data.get(i).cloned())
                })
                .collect()
        }
        "Slice" => {
            let data = shape_value(g, input(0)?, depth + 1)?;
            let starts = ints_attr_or_input(g, n, "starts", 1)?;
            let ends = ints_attr_or_input(g, n, "ends", 2)?;
            let steps = input(4).and_then(|v| g.constant_i64(v)).unwrap_or_else(|| vec![1]);
            let (&start, &end, &step) = (starts.first()?, ends.first()?, steps.first()?);
            if starts.len() != 1 || step != 1 {
                return None;
            }
            let len = data.len() as i64;
            let clamp = |a: i64| (if a < 0 { a + len } else { a }).clamp(0, len) as usize;
            let (s, e) = (clamp(start), clamp(end));
            Some(data.get(s..e.max(s))?.to_vec())
        }
        _ => None,
    }
}

/// [`reshape`] with a target computed from shape metadata: a dim copied from
/// a tensor's shape is taken as it is, and `-1` is solved when the dims it
/// must absorb are known once the copied symbols cancel.
fn reshape_symbolic(x: &[Dim], target: &[Elem], allow_zero: bool) -> Option<Vec<Dim>> {
    if let Some(ints) = target
        .iter()
        .map(|e| match e {
            Elem::Int(k) => Some(*k),
            Elem::Dim(_) => None,
        })
        .collect::<Option<Vec<i64>>>()
    {
        return reshape(x, &ints, allow_zero);
    }
    let mut out = Vec::with_capacity(target.len());
    let mut infer_at = None;
    for (i, e) in target.iter().enumerate() {
        out.push(match e {
            Elem::Int(0) if !allow_zero => x.get(i)?.clone(),
            Elem::Int(-1) => {
                infer_at = Some(i);
                Dim::Unknown
            }
            Elem::Int(k) if *k >= 0 => Dim::Known(*k as u64),
            Elem::Int(_) => return None,
            Elem::Dim(d) => d.clone(),
        });
    }
    if let Some(i) = infer_at {
        // Cancel the symbols the output copies from the input.
        let mut rest: Vec<&Dim> = x.iter().collect();
        let mut known_out = 1u64;
        for (j, d) in out.iter().enumerate() {
            if j == i {
                continue;
            }
            match d {
                Dim::Known(k) => known_out = known_out.checked_mul(*k)?,
                Dim::Symbol(_) => {
                    let at = rest.iter().position(|r| *r == d)?;
                    rest.remove(at);
                }
                Dim::Unknown => return Some(out),
            }
        }
        let total: Option<u64> = rest.iter().map(|d| known(d)).product();
        if let Some(total) = total
            && known_out > 0
            && total % known_out == 0
        {
            out[i] = Dim::Known(total / known_out);
        }
    }
    Some(out)
}

/// Output length of a Slice along one axis (ONNX Slice semantics), in `i128`
/// so that no start, end or step a file declares can overflow.
fn slice_len(len: i64, start: i64, end: i64, step: i64) -> Option<u64> {
    if step == 0 {
        return None;
    }
    let (len, start, end, step) = (len as i128, start as i128, end as i128, step as i128);
    let clamp = |v: i128, lo: i128, hi: i128| v.max(lo).min(hi);
    let norm = |v: i128| if v < 0 { v + len } else { v };
    let (s, e) = if step > 0 {
        (clamp(norm(start), 0, len), clamp(norm(end), 0, len))
    } else {
        (clamp(norm(start), -1, len - 1), clamp(norm(end), -1, len - 1))
    };
    let n = if step > 0 { (e - s + step - 1) / step } else { (s - e - step - 1) / -step };
    dim_of(n)
}

/// A computed dim: negative counts as 0; past `i64::MAX` (no ONNX dim can be
/// that long) the shape stays unknown.
fn dim_of(n: i128) -> Option<u64> {
    u64::try_from(n.max(0)).ok().filter(|&d| d <= i64::MAX as u64)
}

/// `[N, C, spatial…]` of a convolution or pooling: [O2] in the ONNX operator
/// specification, floor((in + pad_begin + pad_end - dilation*(kernel-1) - 1) / stride) + 1.
fn spatial(
    x: &[Dim],
    channels: u64,
    kernel: &[Dim],
    attrs: &[crate::proto::AttributeProto],
    ceil: bool,
) -> Option<Vec<Dim>> {
    let rank = x.len().checked_sub(2)?;
    if kernel.len() != rank {
        return None;
    }
    let strides =
        attr::ints(attrs, "strides").map(<[i64]>::to_vec).unwrap_or_else(|| vec![1; rank]);
    let dilations =
        attr::ints(attrs, "dilations").map(<[i64]>::to_vec).unwrap_or_else(|| vec![1; rank]);
    let pads = attr::ints(attrs, "pads").map(<[i64]>::to_vec).unwrap_or_else(|| vec![0; 2 * rank]);
    let auto_pad = attr::string(attrs, "auto_pad").unwrap_or("NOTSET");
    let mut out = vec![x[0].clone(), Dim::Known(channels)];
    for i in 0..rank {
        let (Some(input), Some(k)) = (known(&x[i + 2]), known(&kernel[i])) else {
            // Stride 1 with "same" padding keeps any size, symbolic included.
            let same = known(&kernel[i]).is_some_and(|k| {
                let stride = strides.get(i).copied().unwrap_or(1);
                let dilation = dilations.get(i).copied().unwrap_or(1);
                let pad = i128::from(pads.get(i).copied().unwrap_or(0))
                    + i128::from(pads.get(i + rank).copied().unwrap_or(0));
                stride == 1
                    && auto_pad == "NOTSET"
                    && pad == i128::from(dilation) * (i128::from(k) - 1)
            });
            out.push(if same { x[i + 2].clone() } else { Dim::Unknown });
            continue;
        };
        // i128: no dim, pad, stride or dilation a file declares can overflow.
        let (input, k) = (i128::from(input), i128::from(k));
        let stride = i128::from(*strides.get(i)?);
        let dilation = i128::from(*dilations.get(i)?);
        if stride <= 0 {
            return None;
        }
        let size = match auto_pad {
            "SAME_UPPER" | "SAME_LOWER" => (input + stride - 1) / stride,
            "VALID" => (input - dilation * (k - 1) - 1) / stride + 1,
            _ => {
                let (begin, end) = (i128::from(*pads.get(i)?), i128::from(*pads.get(i + rank)?));
                let span = input + begin + end - dilation * (k - 1) - 1;
                if ceil { (span + stride - 1) / stride + 1 } else { span.div_euclid(stride) + 1 }
            }
        };
        out.push(Dim::Known(dim_of(size)?));
    }
    Some(out)
}

/// Numpy-style multidirectional broadcasting ([O1]).
fn broadcast(shapes: &[Vec<Dim>]) -> Option<Vec<Dim>> {
    let rank = shapes.iter().map(Vec::len).max()?;
    let mut out = Vec::with_capacity(rank);
    for i in 0..rank {
        let mut dim = Dim::Known(1);
        for s in shapes {
            let Some(d) = (i + s.len()).checked_sub(rank).map(|j| &s[j]) else { continue };
            dim = match (&dim, d) {
                (Dim::Known(1), other) => other.clone(),
                (_, Dim::Known(1)) => dim,
                (a, b) if a == b => dim,
                (Dim::Unknown, b) | (b, Dim::Unknown) => b.clone(),
                _ => Dim::Unknown,
            };
        }
        out.push(dim);
    }
    Some(out)
}

fn matmul(a: &[Dim], b: &[Dim]) -> Option<Vec<Dim>> {
    match (a.len(), b.len()) {
        (0, _) | (_, 0) => None,
        (1, 1) => Some(vec![]),
        (1, _) => {
            let mut out = b[..b.len() - 2].to_vec();
            out.push(b[b.len() - 1].clone());
            Some(out)
        }
        (_, 1) => Some(a[..a.len() - 1].to_vec()),
        _ => {
            let mut out = broadcast(&[a[..a.len() - 2].to_vec(), b[..b.len() - 2].to_vec()])?;
            out.push(a[a.len() - 2].clone());
            out.push(b[b.len() - 1].clone());
            Some(out)
        }
    }
}

fn reshape(x: &[Dim], target: &[i64], allow_zero: bool) -> Option<Vec<Dim>> {
    let mut out: Vec<Dim> = Vec::with_capacity(target.len());
    let mut infer_at = None;
    for (i, &t) in target.iter().enumerate() {
        match t {
            0 if !allow_zero => out.push(x.get(i)?.clone()),
            -1 => {
                infer_at = Some(i);
                out.push(Dim::Unknown);
            }
            t if t >= 0 => out.push(Dim::Known(t as u64)),
            _ => return None,
        }
    }
    if let Some(i) = infer_at {
        let total: Option<u64> = x.iter().map(known).product();
        let rest: Option<u64> =
            out.iter().enumerate().filter(|(j, _)| *j != i).map(|(_, d)| known(d)).product();
        if let (Some(total), Some(rest)) = (total, rest) {
            if rest > 0 && total % rest == 0 {
                out[i] = Dim::Known(total / rest);
            }
        } else {
            // A symbolic batch carried through: [N, C, H, W] -> [N, -1] keeps
            // the product of the known dims when dim 0 is copied.
            let copied_head = target.first() == Some(&0) && !allow_zero;
            if copied_head && i == 1 && target.len() == 2 {
                let tail: Option<u64> = x[1..].iter().map(known).product();
                if let Some(t) = tail {
                    out[1] = Dim::Known(t);
                }
            }
        }
    }
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn k(v: &[u64]) -> Vec<Dim> {
        v.iter().map(|&d| Dim::Known(d)).collect()
    }

    #[test]
    fn conv_output_size_follows_the_spec() {
        // [O2]: floor((32 + 1 + 1 - 1*(3-1) - 1) / 2) + 1 = 16.
        let attrs = vec![
            crate::proto::AttributeProto {
                name: "strides".into(),
                ints: vec![2, 2],
                ..Default::default()
            },
            crate::proto::AttributeProto {
                name: "pads".into(),
                ints: vec![1, 1, 1, 1],
                ..Default::default()
            },
        ];
        let out = spatial(&k(&[1, 3, 32, 32]), 8, &k(&[3, 3]), &attrs, false).unwrap();
        assert_eq!(out, k(&[1, 8, 16, 16]));
        // 7x7 stride 2 pad 3 on 224: floor((224 + 6 - 6 - 1) / 2) + 1 = 112.
        let attrs7 = vec![
            crate::proto::AttributeProto {
                name: "strides".into(),
                ints: vec![2, 2],
                ..Default::default()
            },
            crate::proto::AttributeProto {
                name: "pads".into(),
                ints: vec![3, 3, 3, 3],
                ..Default::default()
            },
        ];
        assert_eq!(
            spatial(&k(&[1, 3, 224, 224]), 64, &k(&[7, 7]), &attrs7, false).unwrap(),
            k(&[1, 64, 112, 112])
        );
    }

    #[test]
    fn broadcasting_follows_numpy() {
        assert_eq!(broadcast(&[k(&[8, 1, 6, 1]), k(&[7, 1, 5])]).unwrap(), k(&[8, 7, 6, 5]));
        let sym = vec![Dim::Symbol("N".into()), Dim::Known(4)];
        assert_eq!(broadcast(&[sym.clone(), k(&[4])]).unwrap(), sym);
    }

    #[test]
    fn slices_and_reshapes() {
        assert_eq!(slice_len(8, 0, i64::MAX, 2), Some(4));
        assert_eq!(slice_len(7, 0, 7, 2), Some(4));
        assert_eq!(slice_len(8, -1, i64::MIN, -1), Some(8));
        assert_eq!(reshape(&k(&[2, 3, 4]), &[0, -1], false).unwrap(), k(&[2, 12]));
        let sym = vec![Dim::Symbol("N".into()), Dim::Known(3), Dim::Known(4)];
        assert_eq!(
            reshape(&sym, &[0, -1], false).unwrap(),
            vec![Dim::Symbol("N".into()), Dim::Known(12)]
        );
    }

    #[test]
    fn hostile_numbers_do_not_overflow() {
        // Regression (found by review for the fuzzing issue): these wrapped in
        // i64 and gave wrong lengths, or panicked with overflow checks on.
        assert_eq!(slice_len(10, 0, 10, i64::MAX), Some(1));
        assert_eq!(slice_len(10, 9, i64::MIN, i64::MIN), Some(1));
        assert_eq!(slice_len(10, i64::MIN, i64::MAX, 3), Some(4));
        assert_eq!(dim_of(i128::from(u64::MAX)), None);
        assert_eq!(dim_of(-5), Some(0));
    }
}
