//! Op families the structural analysis reasons about. Everything is keyed on
//! the ONNX op type (and, for contrib ops, its domain), never on node names.

use crate::graph::{Graph, NodeId};

/// What role an op can play on a shortcut or in a branch.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Family {
    /// Moves or re-labels data without changing values: reshapes, casts,
    /// quantize/dequantize, dropout (inference), identity.
    PassThrough,
    /// A layer with a weight tensor: convolution, fully connected, matmul
    /// with a static operand.
    Linear,
    /// A normalisation op.
    Norm,
    /// Elementwise arithmetic with a static operand: a folded scale or shift.
    Affine,
    /// A pointwise non-linearity.
    Activation,
    /// Changes spatial size or pads: pooling, strided slice, pad, resize.
    Resample,
    /// Anything else.
    Other,
}

/// Op types that merge a shortcut with a branch by addition.
pub fn is_merge(op: &str) -> bool {
    matches!(op, "Add" | "Sum" | "QLinearAdd")
}

/// Op types that join tensors along an axis.
pub fn is_concat(op: &str) -> bool {
    op == "Concat"
}

/// Normalisation ops, as one op.
pub fn is_norm_op(op: &str) -> bool {
    matches!(
        op,
        "BatchNormalization"
            | "InstanceNormalization"
            | "GroupNormalization"
            | "LayerNormalization"
            | "SimplifiedLayerNormalization"
            | "RMSNormalization"
            | "LpNormalization"
            | "MeanVarianceNormalization"
    )
}

/// Normalisations over the feature axis of each token or position: the
/// "norm" of pre-norm and post-norm.
pub fn is_layer_norm_op(op: &str) -> bool {
    matches!(op, "LayerNormalization" | "SimplifiedLayerNormalization" | "RMSNormalization")
}

/// Pointwise activation ops.
pub fn is_activation_op(op: &str) -> bool {
    matches!(
        op,
        "Relu"
            | "LeakyRelu"
            | "PRelu"
            | "Elu"
            | "Selu"
            | "Celu"
            | "Sigmoid"
            | "HardSigmoid"
            | "Tanh"
            | "Softplus"
            | "Softsign"
            | "Gelu"
            | "FastGelu"
            | "QuickGelu"
            | "BiasGelu"
            | "HardSwish"
            | "Mish"
            | "Swish"
            | "ThresholdedRelu"
            | "Clip"
    )
}

/// Whether `op` is one of the ops that carry a weight tensor when one of
/// their operands is static.
pub fn is_linear_op(op: &str) -> bool {
    matches!(
        op,
        "Conv"
            | "ConvTranspose"
            | "Gemm"
            | "MatMul"
            | "MatMulInteger"
            | "ConvInteger"
            | "QLinearConv"
            | "QLinearMatMul"
            | "FusedConv"
            | "FusedGemm"
            | "FusedMatMul"
            | "Einsum"
    )
}

/// Recurrent ops; parametrised, but never on a shortcut.
fn is_recurrent_op(op: &str) -> bool {
    matches!(op, "LSTM" | "GRU" | "RNN")
}

/// The slot of the weight operand of a linear node, if one is static.
pub fn weight_slot(g: &Graph, n: NodeId) -> Option<usize> {
    let node = g.node(n);
    let candidates: &[usize] = match node.op.as_str() {
        "Conv" | "ConvTranspose" | "ConvInteger" | "FusedConv" => &[1],
        "QLinearConv" => &[3],
        "QLinearMatMul" => &[3, 0],
        "Gemm" | "MatMul" | "MatMulInteger" | "FusedGemm" | "FusedMatMul" => &[1, 0],
        "Einsum" => &[1, 0],
        "LSTM" | "GRU" | "RNN" => &[1],
        _ => return None,
    };
    candidates.iter().copied().find(|&slot| {
        g.input(n, slot).is_some_and(|v| {
            let value = g.value(v);
            // A weight is a static tensor with at least two axes (or unknown rank).
            value.is_static && value.fact.shape.as_ref().is_none_or(|s| s.len() >= 2)
        })
    })
}

/// A layer with learned weights: a linear op with a static weight, or a
/// recurrent op.
pub fn is_parametrised(g: &Graph, n: NodeId) -> bool {
    let op = g.node(n).op.as_str();
    (is_linear_op(op) || is_recurrent_op(op)) && weight_slot(g, n).is_some()
}

/// Number of signal (non-static) inputs of a node.
pub fn signal_arity(g: &Graph, n: NodeId) -> usize {
    g.signal_inputs(n).count()
}

/// The family of a node, in context (a MatMul of two signals is `Other`, a
/// Mul by a constant is `Affine`).
pub fn family(g: &Graph, n: NodeId) -> Family {
    let node = g.node(n);
    let op = node.op.as_str();
    let arity = signal_arity(g, n);
    match op {
        "Identity"
        | "Reshape"
        | "Flatten"
        | "Squeeze"
        | "Unsqueeze"
        | "Cast"
        | "CastLike"
        | "QuantizeLinear"
        | "DequantizeLinear"
        | "DynamicQuantizeLinear"
        | "Dropout"
        | "Transpose"
        | "Expand" => {
            if arity == 1 {
                Family::PassThrough
            } else {
                Family::Other
            }
        }
        "MaxPool" | "AveragePool" | "LpPool" | "Pad" | "Resize" | "Upsample" | "SpaceToDepth"
        | "DepthToSpace" => {
            if arity == 1 {
                Family::Resample
            } else {
                Family::Other
            }
        }
        // A Slice with a stride, or any Slice of one signal, subsamples or crops.
        "Slice" if arity == 1 => Family::Resample,
        // Concatenation with constants only is zero-padding of channels.
        "Concat" if arity == 1 => Family::Resample,
        "Mul" | "Add" | "Sub" | "Div" if arity == 1 => Family::Affine,
        _ if is_norm_op(op) => Family::Norm,
        _ if is_activation_op(op) => Family::Activation,
        _ if is_parametrised(g, n) => Family::Linear,
        _ => Family::Other,
    }
}

/// Whether `op` in `domain` is an operator of the ONNX standard (the default
/// domain, as of opset 23) or of a domain shunt knows to be an operator set
/// (`ai.onnx.ml`, onnxruntime's `com.microsoft` contrib ops, whose names are
/// not checked). Anything else is kept as an opaque node and reported.
pub fn is_known(domain: &str, op: &str) -> bool {
    match domain {
        "" | "ai.onnx" => STANDARD_OPS.binary_search(&op).is_ok(),
        "ai.onnx.ml" | "ai.onnx.preview.training" | "com.microsoft" | "com.microsoft.nchwc" => true,
        _ => false,
    }
}

/// The operators of the default ONNX domain, sorted.
const STANDARD_OPS: &[&str] = &[
    "Abs",
    "Acos",
    "Acosh",
    "Add",
    "AffineGrid",
    "And",
    "ArgMax",
    "ArgMin",
    "Asin",
    "Asinh",
    "Atan",
    "Atanh",
    "Attention",
    "AveragePool",
    "BatchNormalization",
    "Bernoulli",
    "BitShift",
    "BitwiseAnd",
    "BitwiseNot",
    "BitwiseOr",
    "BitwiseXor",
    "BlackmanWindow",
    "Cast",
    "CastLike",
    "Ceil",
    "Celu",
    "CenterCropPad",
    "Clip",
    "Col2Im",
    "Compress",
    "Concat",
    "ConcatFromSequence",
    "Constant",
    "ConstantOfShape",
    "Conv",
    "ConvInteger",
    "ConvTranspose",
    "Cos",
    "Cosh",
    "CumSum",
    "DFT",
    "DeformConv",
    "DepthToSpace",
    "DequantizeLinear",
    "Det",
    "Div",
    "Dropout",
    "DynamicQuantizeLinear",
    "Einsum",
    "Elu",
    "Equal",
    "Erf",
    "Exp",
    "Expand",
    "EyeLike",
    "Flatten",
    "Floor",
    "GRU",
    "Gather",
    "GatherElements",
    "GatherND",
    "Gelu",
    "Gemm",
    "GlobalAveragePool",
    "GlobalLpPool",
    "GlobalMaxPool",
    "Greater",
    "GreaterOrEqual",
    "GridSample",
    "GroupNormalization",
    "HammingWindow",
    "HannWindow",
    "HardSigmoid",
    "HardSwish",
    "Hardmax",
    "Identity",
    "If",
    "ImageDecoder",
    "InstanceNormalization",
    "IsInf",
    "IsNaN",
    "LRN",
    "LSTM",
    "LayerNormalization",
    "LeakyRelu",
    "Less",
    "LessOrEqual",
    "Log",
    "LogSoftmax",
    "Loop",
    "LpNormalization",
    "LpPool",
    "MatMul",
    "MatMulInteger",
    "Max",
    "MaxPool",
    "MaxRoiPool",
    "MaxUnpool",
    "Mean",
    "MeanVarianceNormalization",
    "MelWeightMatrix",
    "Min",
    "Mish",
    "Mod",
    "Mul",
    "Multinomial",
    "Neg",
    "NegativeLogLikelihoodLoss",
    "NonMaxSuppression",
    "NonZero",
    "Not",
    "OneHot",
    "Optional",
    "OptionalGetElement",
    "OptionalHasElement",
    "Or",
    "PRelu",
    "Pad",
    "Pow",
    "QLinearConv",
    "QLinearMatMul",
    "QuantizeLinear",
    "RMSNormalization",
    "RNN",
    "RandomNormal",
    "RandomNormalLike",
    "RandomUniform",
    "RandomUniformLike",
    "Range",
    "Reciprocal",
    "ReduceL1",
    "ReduceL2",
    "ReduceLogSum",
    "ReduceLogSumExp",
    "ReduceMax",
    "ReduceMean",
    "ReduceMin",
    "ReduceProd",
    "ReduceSum",
    "ReduceSumSquare",
    "RegexFullMatch",
    "Relu",
    "Reshape",
    "Resize",
    "ReverseSequence",
    "RoiAlign",
    "RotaryEmbedding",
    "Round",
    "STFT",
    "Scan",
    "Scatter",
    "ScatterElements",
    "ScatterND",
    "Selu",
    "SequenceAt",
    "SequenceConstruct",
    "SequenceEmpty",
    "SequenceErase",
    "SequenceInsert",
    "SequenceLength",
    "SequenceMap",
    "Shape",
    "Shrink",
    "Sigmoid",
    "Sign",
    "Sin",
    "Sinh",
    "Size",
    "Slice",
    "Softmax",
    "SoftmaxCrossEntropyLoss",
    "Softplus",
    "Softsign",
    "SpaceToDepth",
    "Split",
    "SplitToSequence",
    "Sqrt",
    "Squeeze",
    "StringConcat",
    "StringNormalizer",
    "StringSplit",
    "Sub",
    "Sum",
    "Swish",
    "Tan",
    "Tanh",
    "TensorScatter",
    "TfIdfVectorizer",
    "ThresholdedRelu",
    "Tile",
    "TopK",
    "Transpose",
    "Trilu",
    "Unique",
    "Unsqueeze",
    "Upsample",
    "Where",
    "Xor",
];

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn standard_ops_are_sorted_and_known() {
        assert!(STANDARD_OPS.windows(2).all(|w| w[0] < w[1]), "sorted, no repeats");
        assert!(is_known("", "Conv") && is_known("ai.onnx", "Add"));
        assert!(!is_known("", "Frobnicate"));
        assert!(!is_known("com.example", "Conv"));
        assert!(is_known("com.microsoft", "QLinearAdd"));
    }
}
