"""What one would write instead of `shunt audit`: expose every merge's inputs
as extra outputs, run onnxruntime once, compute the statistics in numpy.

    python benches/practitioner.py MODEL.onnx INPUT.npy
"""
import sys

import numpy as np
import onnx
import onnxruntime as ort

model_path, input_path = sys.argv[1], sys.argv[2]
model = onnx.load(model_path)
graph = model.graph
weights = {t.name for t in graph.initializer}
# A residual merge: an Add (or Sum) of two tensors that are not weights.
merges = [n for n in graph.node
          if n.op_type in ("Add", "Sum") and sum(i not in weights for i in n.input) >= 2]
outputs = {o.name for o in graph.output}
for name in dict.fromkeys(i for n in merges for i in n.input):
    if name not in outputs:
        graph.output.append(onnx.ValueInfoProto(name=name))
session = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
x = np.load(input_path)
values = session.run(None, {session.get_inputs()[0].name: x})
tensors = dict(zip((o.name for o in session.get_outputs()), values))
for n in merges:
    a, b = (tensors[i].reshape(len(x), -1).astype(np.float64) for i in n.input[:2])
    rms_a, rms_b = np.sqrt((a * a).mean(axis=1)), np.sqrt((b * b).mean(axis=1))
    ratio = rms_b / rms_a
    cosine = (a * b).sum(axis=1) / np.sqrt((a * a).sum(axis=1) * (b * b).sum(axis=1))
    out = a + b
    print(f"{n.name}: ratio {ratio.mean():.4g} +- {ratio.std():.2g}, cosine {cosine.mean():.3f}, "
          f"output rms {np.sqrt((out * out).mean()):.4g}")
