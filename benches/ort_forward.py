"""onnxruntime's plain forward pass on the model and input the audit bench writes.

Run `cargo bench --bench audit` first (it writes target/bench/resnet50.onnx and
target/bench/resnet50_input.npy, the audit's own 8 seeded samples), then

    /work/venvs/exp/bin/python benches/ort_forward.py

Each thread count runs in a fresh child process so that its peak memory
(ru_maxrss of that child) is its own; each child times a warm-up and 5 runs
(wall clock and process CPU time) and reports the median.
"""

import json
import os
import resource
import statistics
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
BENCH = os.path.join(HERE, "..", "target", "bench")
MODEL = os.path.join(BENCH, "resnet50.onnx")
INPUT = os.path.join(BENCH, "resnet50_input.npy")
RUNS = 5


def child(threads: int) -> None:
    import numpy as np
    import onnxruntime as ort

    x = np.load(INPUT)
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = threads
    opts.inter_op_num_threads = 1
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    start = time.perf_counter()
    sess = ort.InferenceSession(MODEL, opts, providers=["CPUExecutionProvider"])
    prepare = time.perf_counter() - start
    name = sess.get_inputs()[0].name
    sess.run(None, {name: x})
    wall, cpu = [], []
    for _ in range(RUNS):
        w, c = time.perf_counter(), time.process_time()
        sess.run(None, {name: x})
        wall.append(time.perf_counter() - w)
        cpu.append(time.process_time() - c)
    peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({
        "threads": threads,
        "onnxruntime": ort.__version__,
        "input": list(x.shape),
        "prepare_s": prepare,
        "wall_median_s": statistics.median(wall),
        "wall_min_s": min(wall),
        "cpu_median_s": statistics.median(cpu),
        "peak_mib": peak_mib,
    }))


def main() -> None:
    if len(sys.argv) == 3 and sys.argv[1] == "--child":
        child(int(sys.argv[2]))
        return
    if not (os.path.exists(MODEL) and os.path.exists(INPUT)):
        sys.exit(f"missing {MODEL} or {INPUT}: run `cargo bench --bench audit` first")
    rows = []
    for threads in (2, 1):
        out = subprocess.run([sys.executable, __file__, "--child", str(threads)],
                             check=True, capture_output=True, text=True).stdout
        rows.append(json.loads(out.strip().splitlines()[-1]))
    print(f"onnxruntime {rows[0]['onnxruntime']}, input {rows[0]['input']}, "
          f"median of {RUNS} runs after a warm-up")
    print()
    print("| threads | wall median (s) | wall min (s) | process CPU median (s) "
          "| session creation (s) | peak memory, ru_maxrss (MiB) |")
    print("|---:|---:|---:|---:|---:|---:|")
    for r in rows:
        print(f"| {r['threads']} | {r['wall_median_s']:.3f} | {r['wall_min_s']:.3f} "
              f"| {r['cpu_median_s']:.3f} | {r['prepare_s']:.3f} | {r['peak_mib']:.0f} |")


if __name__ == "__main__":
    main()
