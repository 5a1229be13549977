"""Branch knockout with onnxruntime, as an independent reference for `shunt audit --knockout`.

    python knockout.py MODEL.onnx INPUTS.npy MERGES.json

MERGES.json is a list of [merge output tensor, shortcut input tensor]. For
each, the merge node producing that output is replaced by an Identity of its
shortcut input (a two-input Add without its branch), the model is run with
onnxruntime (CPU, one thread) on all inputs at once, and the relative L2
change of the (first) output against the intact model is computed in
float64. Prints a JSON list of those changes, in the order given.
"""

import json
import sys

import numpy as np
import onnx
import onnxruntime as ort


def run(model, x):
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    sess = ort.InferenceSession(model.SerializeToString(), opts, providers=["CPUExecutionProvider"])
    return sess.run(None, {sess.get_inputs()[0].name: x})[0].astype(np.float64)


def main():
    path, inputs, merges = sys.argv[1:4]
    x = np.load(inputs).astype(np.float32)
    base = onnx.load(path)
    intact = run(base, x)
    out = []
    for output, shortcut in json.load(open(merges)):
        m = onnx.ModelProto()
        m.CopyFrom(base)
        node = next(n for n in m.graph.node if output in n.output)
        assert node.op_type == "Add" and len(node.input) == 2 and shortcut in node.input, node
        node.op_type = "Identity"
        del node.input[:]
        node.input.append(shortcut)
        y = run(m, x)
        out.append(float(np.linalg.norm(y - intact) / np.linalg.norm(intact)))
    print(json.dumps(out))


if __name__ == "__main__":
    main()
