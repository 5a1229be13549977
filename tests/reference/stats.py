"""Per-tensor reference statistics of an ONNX model, computed with onnxruntime.

Usage:
    python tests/reference/stats.py MODEL.onnx INPUTS.npy|INPUTS.npz OUT.json [--check-reference]
        [--batch-axis NAME=AXIS ...] [--control-flow]

The model is rewritten with the onnx package so that the tensors a residual
audit looks at become extra graph outputs:

- every graph input,
- every input and the output of every ``Add``/``Sum`` node none of whose
  inputs is a constant (an initializer or a ``Constant`` node's output),
- every tensor read by more than one node (the candidate forks).

The model then runs with onnxruntime (CPUExecutionProvider, one thread, all
graph optimisations off so that no watched tensor is fused away), one sample
at a time: run ``s`` is fed the batch-1 slice ``[s:s+1]`` of every input, as
some models declare a fixed batch of 1 (``--batch-axis NAME=AXIS`` names another
sample axis of an input; a 0-d array, a scalar input, is fed whole to every
run). From each run's tensors, numpy computes
in float64

- ``tensors[name].rms[s]`` = sqrt(mean(x**2)) over all elements of sample s,
- ``adds[output].cosine[s]`` = dot(a, b) / (|a| |b|) of the node's two inputs
  when they have the same shape (``null`` when either is all zeros).

With ``--control-flow`` the tensors inside control flow are brought out
first, with the onnx package: every ``If`` of the main graph is replaced by
the branch its condition takes on the first sample (the condition computed
by onnxruntime, and the inlined model's outputs checked against the
original's on that sample), and every ``Scan`` of the main graph gets each
tensor its body would watch (the rules above, applied to the body) as an
extra scan output, stacked over the steps; its statistics are then over all
steps of the sample, under the body's own tensor name.

The JSON also records the versions of python, numpy, onnx and onnxruntime.
With ``--check-reference`` the same runs are repeated with
``onnx.reference.ReferenceEvaluator`` and the script fails unless every
RMS agrees with onnxruntime within 1e-5 relative and every cosine within 1e-5
absolute (the largest differences are recorded in the JSON).

Sources: onnxruntime Python API (InferenceSession, SessionOptions,
intra_op_num_threads, GraphOptimizationLevel.ORT_DISABLE_ALL),
https://onnxruntime.ai/docs/api/python/api_summary.html ; onnx shape
inference and ReferenceEvaluator, https://onnx.ai/onnx/api/shape_inference.html
and https://onnx.ai/onnx/api/reference.html .
"""

import argparse
import json
import platform
import sys

import numpy as np
import onnx
import onnxruntime as ort
from onnx import helper, shape_inference

NUMPY_OF_ONNX = {
    onnx.TensorProto.FLOAT: np.float32,
    onnx.TensorProto.FLOAT16: np.float16,
    onnx.TensorProto.DOUBLE: np.float64,
    onnx.TensorProto.INT64: np.int64,
    onnx.TensorProto.INT32: np.int32,
    onnx.TensorProto.BOOL: np.bool_,
}


def watched(model):
    """The tensors to expose, in graph order, and the merge nodes."""
    g = model.graph
    constants = {i.name for i in g.initializer}
    constants |= {o for n in g.node if n.op_type == "Constant" for o in n.output}
    inputs = [i.name for i in g.input if i.name not in constants]
    consumers = {}
    for n in g.node:
        for x in set(n.input):
            if x:
                consumers[x] = consumers.get(x, 0) + 1
    merges = []
    names = list(inputs)
    for n in g.node:
        if n.op_type in ("Add", "Sum") and len(n.input) >= 2:
            if not any(x in constants for x in n.input):
                merges.append(n)
                names.extend(n.input)
                names.append(n.output[0])
        for o in n.output:
            if consumers.get(o, 0) > 1:
                names.append(o)
    seen = set()
    ordered = [x for x in names if x and not (x in seen or seen.add(x))]
    return inputs, ordered, merges


def exposed(model, names):
    """A copy of the model whose outputs include every name (typed by shape inference)."""
    m = onnx.ModelProto()
    m.CopyFrom(model)
    inferred = shape_inference.infer_shapes(m)
    types = {v.name: v for v in inferred.graph.value_info}
    types.update({v.name: v for v in inferred.graph.input})
    types.update({v.name: v for v in inferred.graph.output})
    present = {o.name for o in m.graph.output}
    graph_inputs = {i.name for i in m.graph.input}
    for name in names:
        if name in present or name in graph_inputs:
            continue
        if name not in types:
            raise SystemExit(f"shape inference gives no type for tensor '{name}'")
        vi = onnx.ValueInfoProto()
        vi.CopyFrom(types[name])
        # Drop the shape: ORT checks declared output shapes, and a symbolic
        # batch would not match a batch-1 run any better than none.
        elem = vi.type.tensor_type.elem_type
        m.graph.output.append(helper.make_tensor_value_info(name, elem, None))
    return m


def constant_names(g):
    names = {i.name for i in g.initializer}
    return names | {o for n in g.node if n.op_type == "Constant" for o in n.output}


def body_watched(body):
    """The tensors and merges of a Scan body, by the rules of watched()."""
    constants = constant_names(body)
    consumers = {}
    for n in body.node:
        for x in set(n.input):
            if x:
                consumers[x] = consumers.get(x, 0) + 1
    merges, names = [], []
    for n in body.node:
        if n.op_type in ("Add", "Sum") and len(n.input) >= 2:
            if not any(x in constants for x in n.input):
                merges.append(n)
                names.extend(n.input)
                names.append(n.output[0])
        for o in n.output:
            if consumers.get(o, 0) > 1:
                names.append(o)
    names.extend(i.name for i in body.input if consumers.get(i.name, 0) > 1)
    seen = set()
    return [x for x in names if x and not (x in seen or seen.add(x))], merges


def expose_scans(model):
    """Every Scan body's watched tensors as extra scan outputs named NAME::steps."""
    m = onnx.ModelProto()
    m.CopyFrom(model)
    names, merges = [], []
    for node in m.graph.node:
        if node.op_type != "Scan":
            continue
        body = next(a.g for a in node.attribute if a.name == "body")
        inner, adds = body_watched(body)
        for name in inner:
            body.node.append(helper.make_node("Identity", [name], [name + "::step"]))
            body.output.append(helper.make_tensor_value_info(name + "::step", onnx.TensorProto.FLOAT, None))
            node.output.append(name + "::steps")
        for a in node.attribute:
            if a.name in ("scan_output_axes", "scan_output_directions"):
                a.ints.extend([0] * len(inner))
        names.extend(inner)
        merges.extend(adds)
    return m, names, merges


def inline_ifs(model, feed, axes):
    """Each If of the main graph replaced by the branch it takes on sample 0."""
    m = onnx.ModelProto()
    m.CopyFrom(model)
    ifs = [n for n in m.graph.node if n.op_type == "If"]
    if not ifs:
        return m
    probe = exposed(model, [n.input[0] for n in ifs])
    first = {k: sample(v, 0, axes[k]) for k, v in feed.items()}
    sess = ort.InferenceSession(probe.SerializeToString(), providers=["CPUExecutionProvider"])
    conds = dict(zip([n.input[0] for n in ifs], sess.run([n.input[0] for n in ifs], first)))
    for node in ifs:
        taken = "then_branch" if bool(np.asarray(conds[node.input[0]]).reshape(-1)[0]) else "else_branch"
        body = next(a.g for a in node.attribute if a.name == taken)
        at = list(m.graph.node).index(node)
        new = list(body.node) + [
            helper.make_node("Identity", [b.name], [o], name=f"{node.name}/inlined/{k}")
            for k, (b, o) in enumerate(zip(body.output, node.output)) if o
        ]
        del m.graph.node[at]
        for k, n in enumerate(new):
            m.graph.node.insert(at + k, n)
        m.graph.initializer.extend(body.initializer)
    outs = [o.name for o in model.graph.output]
    want = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"]).run(outs, first)
    got = ort.InferenceSession(m.SerializeToString(), providers=["CPUExecutionProvider"]).run(outs, first)
    for o, a, b in zip(outs, want, got):
        if not np.allclose(a, b, rtol=1e-6, atol=0):
            raise SystemExit(f"the inlined model's output '{o}' differs from the original's")
    return m


def load_feed(path, model_inputs, model, axes):
    decl = {i.name: i.type.tensor_type.elem_type for i in model.graph.input}
    if path.endswith(".npz"):
        with np.load(path) as z:
            feed = {k: z[k] for k in z.files}
    else:
        if len(model_inputs) != 1:
            raise SystemExit("a .npy feeds a model with one input; use a .npz")
        feed = {model_inputs[0]: np.load(path)}
    missing = [n for n in model_inputs if n not in feed]
    if missing:
        raise SystemExit(f"the feed has no entry for {missing}")
    feed = {n: feed[n].astype(NUMPY_OF_ONNX[decl[n]]) for n in model_inputs}
    # The sample axis of each input: --batch-axis, else the first; a scalar has none.
    for n, a in feed.items():
        axes.setdefault(n, 0 if a.ndim else None)
    samples = {a.shape[axes[n]] for n, a in feed.items() if axes[n] is not None}
    if len(samples) != 1:
        raise SystemExit("the inputs disagree on the number of samples")
    return feed, samples.pop()


def sample(a, s, axis):
    """Sample s of array a along its sample axis, keeping the axis (all of a when None)."""
    if axis is None:
        return a
    index = [slice(None)] * a.ndim
    index[axis] = slice(s, s + 1)
    return a[tuple(index)]


def rms(x):
    x = np.asarray(x, dtype=np.float64).ravel()
    return float(np.sqrt(np.mean(x * x))) if x.size else 0.0


def cosine(a, b):
    if a.shape != b.shape:
        return None
    a = np.asarray(a, dtype=np.float64).ravel()
    b = np.asarray(b, dtype=np.float64).ravel()
    na, nb = float(np.dot(a, a)), float(np.dot(b, b))
    if na == 0.0 or nb == 0.0:
        return None
    return float(np.clip(np.dot(a, b) / (np.sqrt(na) * np.sqrt(nb)), -1.0, 1.0))


def statistics(runs, names, merges):
    """runs: per sample, a dict tensor name -> array."""
    tensors = {n: {"rms": [rms(r[n]) for r in runs]} for n in names}
    adds = {}
    for n in merges:
        entry = {"node": n.name, "op_type": n.op_type, "inputs": list(n.input)}
        if len(n.input) == 2:
            cos = [cosine(r[n.input[0]], r[n.input[1]]) for r in runs]
            entry["cosine"] = None if all(c is None for c in cos) else cos
        adds[n.output[0]] = entry
    return tensors, adds


def run_ort(model, feed, samples, names, axes):
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    sess = ort.InferenceSession(
        model.SerializeToString(), opts, providers=["CPUExecutionProvider"]
    )
    outs = [o.name for o in sess.get_outputs()]
    runs = []
    for s in range(samples):
        one = {k: sample(v, s, axes[k]) for k, v in feed.items()}
        values = dict(zip(outs, sess.run(outs, one)))
        values.update({k[: -len("::steps")]: v for k, v in values.items() if k.endswith("::steps")})
        values.update(one)
        runs.append({n: values[n] for n in names})
    return runs


def run_reference(model, feed, samples, names, axes):
    from onnx.reference import ReferenceEvaluator

    ev = ReferenceEvaluator(model)
    outs = list(ev.output_names)
    runs = []
    for s in range(samples):
        one = {k: sample(v, s, axes[k]) for k, v in feed.items()}
        values = dict(zip(outs, ev.run(outs, one)))
        values.update({k[: -len("::steps")]: v for k, v in values.items() if k.endswith("::steps")})
        values.update(one)
        runs.append({n: values[n] for n in names})
    return runs


def compare(a, b, tol, relative):
    """Largest (relative or absolute) difference between two statistics trees; fails above tol."""
    worst = 0.0
    for key in a:
        x = np.array([np.nan if v is None else v for v in a[key]], dtype=float)
        y = np.array([np.nan if v is None else v for v in b[key]], dtype=float)
        d = np.abs(x - y)
        if relative:
            d = d / np.maximum(np.maximum(np.abs(x), np.abs(y)), 1e-30)
        d = np.where(x == y, 0.0, d)
        worst = max(worst, float(np.nanmax(d)) if d.size else 0.0)
        if worst > tol:
            raise SystemExit(f"ReferenceEvaluator and onnxruntime differ on {key}: {x} vs {y}")
    return worst


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("model")
    p.add_argument("inputs")
    p.add_argument("out")
    p.add_argument("--check-reference", action="store_true")
    p.add_argument("--control-flow", action="store_true")
    p.add_argument(
        "--batch-axis",
        action="append",
        default=[],
        metavar="NAME=AXIS",
        help="the sample axis of an input (default: the first; none for a scalar)",
    )
    args = p.parse_args()

    model = onnx.load(args.model)
    inputs, _, _ = watched(model)
    axes = {}
    for item in args.batch_axis:
        name, axis = item.split("=")
        axes[name] = None if axis == "none" else int(axis)
    feed, samples = load_feed(args.inputs, inputs, model, axes)
    steps = []
    if args.control_flow:
        model, steps, step_merges = expose_scans(inline_ifs(model, feed, axes))
    inputs, names, merges = watched(model)
    m = exposed(model, names)
    names += steps
    m.graph.output.extend(
        helper.make_tensor_value_info(n + "::steps", onnx.TensorProto.FLOAT, None) for n in steps
    )
    if steps:
        merges += step_merges
    tensors, adds = statistics(run_ort(m, feed, samples, names, axes), names, merges)
    doc = {
        "model": args.model,
        "inputs": args.inputs,
        "samples": samples,
        "engine": "onnxruntime CPUExecutionProvider, 1 thread, optimisations off, batch 1 per run",
        "versions": {
            "python": platform.python_version(),
            "numpy": np.__version__,
            "onnx": onnx.__version__,
            "onnxruntime": ort.__version__,
        },
        "tensors": tensors,
        "adds": adds,
    }
    if args.check_reference:
        ref_t, ref_a = statistics(run_reference(m, feed, samples, names, axes), names, merges)
        worst = compare(
            {k: v["rms"] for k, v in tensors.items()},
            {k: v["rms"] for k, v in ref_t.items()},
            1e-5,
            relative=True,
        )
        cos = {k: v.get("cosine") or [] for k, v in adds.items()}
        ref_cos = {k: v.get("cosine") or [] for k, v in ref_a.items()}
        worst_cos = compare(cos, ref_cos, 1e-5, relative=False)
        doc["reference_evaluator"] = {
            "max_relative_difference_rms": worst,
            "max_absolute_difference_cosine": worst_cos,
        }
    with open(args.out, "w") as f:
        json.dump(doc, f, indent=1, sort_keys=False)
        f.write("\n")


if __name__ == "__main__":
    sys.exit(main())
