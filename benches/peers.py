"""`shunt audit` end to end against the programs one would run instead, on
the same ResNet-50-shaped model and the same batch of 8 inputs.

    cargo build --release --bins --examples
    target/reference-venv/bin/python benches/peers.py [ROUNDS]

`cargo build --release --example peers` and `target/release/examples/peers
write` make the model (full-width ResNet-50, 102.5 MB) and the audit's own 8
seeded samples in target/peers/. Each program then runs as its own process,
ROUNDS times (default 5), interleaved; wall time is from process start to
exit, CPU time and peak memory (ru_maxrss) come from wait4 for that process:

- shunt: `shunt audit MODEL --feed INPUT` (scan, tract load and optimise,
  run with per-block statistics, findings, JSON report) with its default
  threads (every core: passes of one sample, as many at once as cores),
  and with `--threads 1`;
- tract: tract's plain forward (`peers tract`: load, optimise, run once on
  the batch of 8), on one thread and with its multithreaded kernels on two;
- onnxruntime: a plain forward (session with default options, run once);
- practitioner: benches/practitioner.py (onnxruntime with every merge input
  as an extra output, statistics in numpy).

onnxruntime uses its default thread count (one per core).
"""
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), ".."))
DIR = os.path.join(ROOT, "target", "peers")
MODEL = os.path.join(DIR, "resnet50.onnx")
INPUT = os.path.join(DIR, "input.npy")
SHUNT = os.path.join(ROOT, "target", "release", "shunt")
PEERS = os.path.join(ROOT, "target", "release", "examples", "peers")

ORT_PLAIN = """
import sys, numpy as np, onnxruntime as ort
s = ort.InferenceSession(sys.argv[1], providers=["CPUExecutionProvider"])
y = s.run(None, {s.get_inputs()[0].name: np.load(sys.argv[2])})[0]
print(y.shape, float(y.sum()))
"""


def measure(argv):
    start = time.perf_counter()
    p = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(p.pid, 0)
    wall = time.perf_counter() - start
    err = p.stderr.read().decode()
    p.stderr.close()
    code = os.waitstatus_to_exitcode(status)
    if code not in (0, 1):
        sys.exit(f"{argv[0]} failed ({code}): {err}")
    return wall, usage.ru_utime + usage.ru_stime, usage.ru_maxrss / 1024


def main():
    rounds = int(sys.argv[1]) if len(sys.argv) > 1 else 5
    if not (os.path.exists(MODEL) and os.path.exists(INPUT)):
        subprocess.run([PEERS, "write", DIR], check=True)
    out = tempfile.mkdtemp(prefix="shunt-peers-")
    py = sys.executable
    variants = {
        "shunt audit": [SHUNT, "audit", MODEL, "--feed", INPUT, "--format", "json",
                        "-o", os.path.join(out, "report.json"), "-q"],
        "shunt audit --threads 1": [SHUNT, "audit", MODEL, "--feed", INPUT, "--format", "json",
                                    "-o", os.path.join(out, "report1.json"), "-q",
                                    "--threads", "1"],
        "tract plain forward": [PEERS, "tract", MODEL, INPUT],
        "tract plain forward, 2 threads": [PEERS, "tract", MODEL, INPUT, "2"],
        "onnxruntime plain forward": [py, "-c", ORT_PLAIN, MODEL, INPUT],
        "practitioner script (onnxruntime + numpy)":
            [py, os.path.join(ROOT, "benches", "practitioner.py"), MODEL, INPUT],
    }
    load_before = os.getloadavg()
    rows = {k: [] for k in variants}
    for r in range(rounds):
        for name, argv in variants.items():
            rows[name].append(measure(argv))
        print(f"round {r + 1}/{rounds} done", file=sys.stderr)
    load_after = os.getloadavg()
    import numpy
    import onnxruntime
    cpu = next((line.split(":", 1)[1].strip() for line in open("/proc/cpuinfo")
                if line.startswith("model name")), platform.processor())
    print(f"machine: {os.cpu_count()} logical CPUs, {cpu}, Linux {platform.release()}; "
          f"onnxruntime {onnxruntime.__version__}, numpy {numpy.__version__}, "
          f"python {platform.python_version()}")
    print(f"load average before {load_before[0]:.2f}, after {load_after[0]:.2f}; "
          f"{rounds} rounds, medians")
    print()
    med = {k: [statistics.median(x[i] for x in v) for i in range(3)] for k, v in rows.items()}
    base = med["shunt audit"]
    print("| program | wall (s) | wall min (s) | CPU (s) | peak memory (MiB) "
          "| wall / shunt | peak / shunt |")
    print("|---|---:|---:|---:|---:|---:|---:|")
    for k, (wall, cpu_s, peak) in med.items():
        wmin = min(x[0] for x in rows[k])
        print(f"| {k} | {wall:.2f} | {wmin:.2f} | {cpu_s:.2f} | {peak:.0f} "
              f"| {wall / base[0]:.2f}x | {peak / base[2]:.2f}x |")


if __name__ == "__main__":
    main()
