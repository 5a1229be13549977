"""Half-precision versions of a float32 model, for the tests of half precision.

Usage:
    python tests/reference/half.py float16 IN.onnx OUT.onnx [--keep-io-types]
    python tests/reference/half.py bfloat16 IN.onnx OUT.onnx
    python tests/reference/half.py bfloat16-weights IN.onnx OUT.onnx

``float16``: onnxconverter-common's ``float16.convert_float_to_float16``
(keep_io_types as given), the converter people use on exported models.

``bfloat16``: every float32 initializer rounded to bfloat16 (round to
nearest, ties to even, on the float32 bits), every float32 value type made
bfloat16, the graph inputs and outputs included; opset raised to 22, where
Conv and GlobalAveragePool take bfloat16. No converter writes bfloat16 and
onnxruntime's CPU provider has no bfloat16 Conv, Gemm, Add or Relu, so:

``bfloat16-weights``: the float32 model with its initializers rounded to
bfloat16 and kept float32, i.e. what the bfloat16 model computes when every
op works in float32 (shunt's float32 twin of it), for onnxruntime to run.

Handles models whose only float tensors are initializers and value types
(no Constant or Cast nodes), like fixtures/torch/resnet_cifar_folded.onnx.
"""

import sys

import numpy as np
import onnx
from onnx import TensorProto, numpy_helper


def bf16_bits(x):
    """float32 array -> uint16 bfloat16 bits, round to nearest even."""
    b = np.ascontiguousarray(x, dtype=np.float32).view(np.uint32).astype(np.uint64)
    b = (b + 0x7FFF + ((b >> 16) & 1)) >> 16
    return b.astype(np.uint16)


def bf16_round(x):
    return (bf16_bits(x).astype(np.uint32) << 16).view(np.float32)


def to_bfloat16(m, keep_float32):
    g = m.graph
    for t in g.initializer:
        if t.data_type != TensorProto.FLOAT:
            continue
        a = numpy_helper.to_array(t)
        if keep_float32:
            t.CopyFrom(numpy_helper.from_array(bf16_round(a), t.name))
        else:
            t.CopyFrom(
                onnx.helper.make_tensor(
                    t.name, TensorProto.BFLOAT16, a.shape, bf16_bits(a).tobytes(), raw=True
                )
            )
    if keep_float32:
        return m
    for v in list(g.input) + list(g.output) + list(g.value_info):
        if v.type.tensor_type.elem_type == TensorProto.FLOAT:
            v.type.tensor_type.elem_type = TensorProto.BFLOAT16
    for o in m.opset_import:
        if o.domain in ("", "ai.onnx"):
            o.version = max(o.version, 22)
    m.ir_version = max(m.ir_version, 10)
    return m


def main():
    kind, src, dst = sys.argv[1:4]
    m = onnx.load(src)
    if kind == "float16":
        from onnxconverter_common import float16

        m = float16.convert_float_to_float16(m, keep_io_types="--keep-io-types" in sys.argv)
    elif kind in ("bfloat16", "bfloat16-weights"):
        m = to_bfloat16(m, keep_float32=kind == "bfloat16-weights")
    else:
        raise SystemExit(f"unknown kind {kind}")
    onnx.save(m, dst)


if __name__ == "__main__":
    main()
