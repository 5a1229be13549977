"""Reference values for the range and error checks of issue 14, computed with
numpy and onnxruntime.

Usage:
    python tests/reference/precision.py limits
        numpy's finfo of float16 and ml_dtypes' finfo of bfloat16, as JSON.
    python tests/reference/precision.py tensors MODEL.onnx INPUTS.npy NAMES.json OUT.json
        Runs MODEL with onnxruntime and writes, for every tensor named in
        NAMES.json (a list), its non-finite count and largest finite |x|.
    python tests/reference/precision.py errors A.onnx B.onnx INPUTS.npy PAIRS.json OUT.json
        PAIRS.json is a list of {"a": [names], "b": [names]}: each side's
        tensors whose sum is compared (a merge output, a shortcut, or the
        branch inputs summed). Runs A and B on the same inputs (B's input cast
        to its declared element type) and writes, per pair, ||B - A|| / ||A||
        over all samples in float64 over the positions where both are finite,
        and the number of other positions.

onnxruntime runs on the CPU, one thread, graph optimisations off
(GraphOptimizationLevel.ORT_DISABLE_ALL) so that every watched tensor exists
and a QDQ model computes DequantizeLinear -> float op -> QuantizeLinear as
the ONNX operators define them, one sample at a time (the models may declare
a batch of 1).

Sources: onnxruntime Python API (InferenceSession, SessionOptions,
GraphOptimizationLevel), https://onnxruntime.ai/docs/api/python/api_summary.html ;
numpy.finfo, https://numpy.org/doc/stable/reference/generated/numpy.finfo.html ;
ml_dtypes.finfo (bfloat16), https://github.com/jax-ml/ml_dtypes .
"""

import json
import sys

import numpy as np
import onnx
import onnxruntime as ort
from onnx import helper

NUMPY_OF_ONNX = {
    onnx.TensorProto.FLOAT: np.float32,
    onnx.TensorProto.FLOAT16: np.float16,
}


def limits():
    import ml_dtypes

    out = {}
    for name, info in (("fp16", np.finfo(np.float16)), ("bf16", ml_dtypes.finfo(ml_dtypes.bfloat16))):
        out[name] = {
            "largest": float(info.max),
            "smallest_normal": float(info.smallest_normal),
            "smallest_subnormal": float(info.smallest_subnormal),
        }
    out["versions"] = {"numpy": np.__version__, "ml_dtypes": ml_dtypes.__version__}
    print(json.dumps(out))


def session(path, names):
    m = onnx.load(path)
    have = {o.name for o in m.graph.output}
    for n in names:
        if n not in have:
            m.graph.output.append(helper.make_empty_tensor_value_info(n))
            have.add(n)
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    s = ort.InferenceSession(m.SerializeToString(), opts, providers=["CPUExecutionProvider"])
    inp = m.graph.input[0]
    dtype = NUMPY_OF_ONNX[inp.type.tensor_type.elem_type]
    return s, inp.name, dtype


def run(path, x, names):
    """Each name's values over all samples, flattened, in float64 (the graph
    input itself as fed, in the model's element type)."""
    s, inp, dtype = session(path, [n for n in names if n != onnx.load(path).graph.input[0].name])
    computed = [n for n in names if n != inp]
    out = {n: [] for n in names}
    for i in range(x.shape[0]):
        fed = x[i : i + 1].astype(dtype)
        got = s.run(computed, {inp: fed}) if computed else []
        for n, v in zip(computed, got):
            out[n].append(np.asarray(v, dtype=np.float64).ravel())
        if inp in out:
            out[inp].append(fed.astype(np.float64).ravel())
    return {n: np.concatenate(v) for n, v in out.items()}


def tensors(model, inputs, names_path, out_path):
    names = json.load(open(names_path))
    x = np.load(inputs)
    values = run(model, x, names)
    res = {}
    for n, v in values.items():
        finite = np.isfinite(v)
        res[n] = {
            "non_finite": int((~finite).sum()),
            "max_abs": float(np.abs(v[finite]).max()) if finite.any() else None,
        }
    json.dump({"tensors": res, "versions": versions()}, open(out_path, "w"), indent=1)


def errors(a, b, inputs, pairs_path, out_path):
    pairs = json.load(open(pairs_path))
    x = np.load(inputs)
    names_a = sorted({n for p in pairs for n in p["a"]})
    names_b = sorted({n for p in pairs for n in p["b"]})
    va = run(a, x, names_a)
    vb = run(b, x, names_b)
    res = []
    for p in pairs:
        ta = sum(va[n] for n in p["a"])
        tb = sum(vb[n] for n in p["b"])
        both = np.isfinite(ta) & np.isfinite(tb)
        d = tb[both] - ta[both]
        ref = float(np.dot(ta[both], ta[both]))
        res.append(
            {
                "rel_l2": float(np.sqrt(np.dot(d, d) / ref)) if ref > 0 else None,
                "non_finite": int((~both).sum()),
            }
        )
    json.dump({"pairs": res, "versions": versions()}, open(out_path, "w"), indent=1)


def versions():
    return {"numpy": np.__version__, "onnx": onnx.__version__, "onnxruntime": ort.__version__}


def main():
    kind = sys.argv[1]
    if kind == "limits":
        limits()
    elif kind == "tensors":
        tensors(*sys.argv[2:6])
    elif kind == "errors":
        errors(*sys.argv[2:7])
    else:
        raise SystemExit(f"unknown kind {kind}")


if __name__ == "__main__":
    main()
