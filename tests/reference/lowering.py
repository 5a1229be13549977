"""Agreement of a model lowered by `shunt lower` with the original, both run by onnxruntime.

Usage:
    python tests/reference/lowering.py ORIGINAL.onnx LOWERED.onnx INPUTS.npz REFERENCE.npz TOL

INPUTS.npz holds one entry per graph input (exact shapes); REFERENCE.npz the
original's outputs as committed by fixtures/transformed/make.py (used only when
onnxruntime has no CPU kernel for the original, e.g. com.microsoft.BiasAdd).

Checks, in order:
1. LOWERED holds only default-domain operators (the point of lowering);
2. LOWERED runs in onnxruntime (CPUExecutionProvider, one thread, graph
   optimisations off, so that no fusion re-creates a contrib op);
3. every output of ORIGINAL (by name; lowering keeps names) agrees:
   - float outputs: max |lowered - original| <= TOL * max |original|
     (an error relative to the tensor's magnitude, so that values near zero do
     not blow it up);
   - integer outputs (quantised codes): max |lowered - original| <= TOL codes
     (TOL is then a number of quantisation steps of the output's scale).
Prints one JSON line with the error of every output and exits 1 when any
exceeds TOL.

Sources: onnxruntime Python API (InferenceSession, SessionOptions,
GraphOptimizationLevel.ORT_DISABLE_ALL), https://onnxruntime.ai/docs/api/python/api_summary.html .
"""

import json
import sys

import numpy as np
import onnx
import onnxruntime as ort


def session(path):
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    opts.log_severity_level = 3
    return ort.InferenceSession(path, opts, providers=["CPUExecutionProvider"])


def main():
    original_path, lowered_path, inputs_path, reference_path, tol = sys.argv[1:6]
    tol = float(tol)
    lowered = onnx.load(lowered_path)
    foreign = sorted({f"{n.domain}.{n.op_type}" for n in lowered.graph.node if n.domain not in ("", "ai.onnx")})
    if foreign:
        print(json.dumps({"error": f"lowered model still holds {foreign}"}))
        return 1
    inputs = dict(np.load(inputs_path))
    names = [o.name for o in onnx.load(original_path, load_external_data=False).graph.output]
    try:
        want = dict(zip(names, session(original_path).run(names, inputs)))
        source = "onnxruntime"
    except Exception as e:  # no CPU kernel for a contrib op: the committed reference
        ref = dict(np.load(reference_path))
        want = {n: ref[n] for n in names}
        source = f"committed reference ({type(e).__name__})"
    # onnxruntime's CPU kernels leave some optional outputs uncomputed (the
    # mean and inv_std_var of SkipLayerNormalization in 1.23): those are
    # held to the committed reference, written by numpy from the documents.
    committed = None
    for n in names:
        if np.asarray(want[n]).size == 0 or np.asarray(want[n]).shape == ():
            committed = committed if committed is not None else dict(np.load(reference_path))
            if n in committed and np.asarray(committed[n]).size > 1:
                want[n] = committed[n]
                source += f"; {n} from the committed reference"
    got = dict(zip(names, session(lowered_path).run(names, inputs)))
    errors = {}
    worst = 0.0
    for n in names:
        a = np.asarray(got[n])
        b = np.asarray(want[n])
        if a.shape != b.shape:
            print(json.dumps({"error": f"output {n}: shape {a.shape}, original {b.shape}"}))
            return 1
        if np.issubdtype(b.dtype, np.integer):
            err = float(np.max(np.abs(a.astype(np.int64) - b.astype(np.int64)))) if b.size else 0.0
            kind = "codes"
        else:
            a64 = a.astype(np.float64)
            b64 = b.astype(np.float64)
            scale = float(np.max(np.abs(b64))) if b.size else 0.0
            diff = float(np.max(np.abs(a64 - b64))) if b.size else 0.0
            err = diff / scale if scale > 0 else diff
            kind = "relative to max |original|"
        errors[n] = {"error": err, "kind": kind}
        worst = max(worst, err)
    print(json.dumps({"source": source, "worst": worst, "tolerance": tol, "outputs": errors}))
    return 0 if worst <= tol else 1


if __name__ == "__main__":
    sys.exit(main())
