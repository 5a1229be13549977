"""How `shunt audit` uses threads: wall time, CPU time and peak memory per
configuration, on the full-width ResNet-50 of benches/peers.py at 8 samples.

    cargo build --release --bins --examples
    target/reference-venv/bin/python benches/threads.py [ROUNDS] [OLD_SHUNT]

Each configuration runs as its own process, ROUNDS times (default 3),
interleaved; wall time from process start to exit, CPU time (all threads)
and peak memory (ru_maxrss) from wait4. `SHUNT_LAYOUT=WxK` forces W passes
at once with K kernel threads each, to compare the layouts the audit could
choose (it never changes a result). OLD_SHUNT, when given, is a binary from
before threads, for the knockout's sequential figure.
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


def measure(argv, env=None):
    start = time.perf_counter()
    p = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                         env=dict(os.environ, **(env or {})))
    _, status, usage = os.wait4(p.pid, 0)
    wall = time.perf_counter() - start
    err = p.stderr.read().decode()
    p.stderr.close()
    code = os.waitstatus_to_exitcode(status)
    if code not in (0, 1):
        sys.exit(f"{argv[0]} failed ({code}): {err}")
    return wall, usage.ru_utime + usage.ru_stime, usage.ru_maxrss / 1024


def main():
    rounds = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    old = sys.argv[2] if len(sys.argv) > 2 else None
    if not (os.path.exists(MODEL) and os.path.exists(INPUT)):
        subprocess.run([PEERS, "write", DIR], check=True)
    out = tempfile.mkdtemp(prefix="shunt-threads-")

    def audit(*args, binary=SHUNT):
        return [binary, "audit", MODEL, "--feed", INPUT, "--format", "json",
                "-o", os.path.join(out, "report.json"), "-q", *args]

    # (name, argv, environment)
    variants = [
        ("audit, 8 passes of 1, --threads 1", audit("--threads", "1"), None),
        ("audit, 8 passes of 1, --threads 2 (chosen: 2 passes at once)",
         audit("--threads", "2"), None),
        ("audit, 8 passes of 1, forced 1 pass x 2 kernel threads",
         audit("--threads", "2"), {"SHUNT_LAYOUT": "1x2"}),
        ("audit, 8 passes of 1, forced 2 passes x 2 kernel threads",
         audit("--threads", "2"), {"SHUNT_LAYOUT": "2x2"}),
        ("audit, 1 pass of 8, --threads 1", audit("--threads", "1", "--pass-batch", "8"), None),
        ("audit, 1 pass of 8, --threads 2 (chosen: 2 kernel threads)",
         audit("--threads", "2", "--pass-batch", "8"), None),
        ("audit, 2 passes of 4, --threads 2 (chosen: 2 passes at once)",
         audit("--threads", "2", "--pass-batch", "4"), None),
        ("audit --knockout, --threads 1", audit("--knockout", "--threads", "1"), None),
        ("audit --knockout, --threads 2", audit("--knockout", "--threads", "2"), None),
        ("tract plain forward, 1 pass of 8, 1 thread", [PEERS, "tract", MODEL, INPUT, "1"], None),
        ("tract plain forward, 1 pass of 8, 2 kernel threads",
         [PEERS, "tract", MODEL, INPUT, "2"], None),
    ]
    if old:
        variants.append(("before threads: audit --knockout (one pass of 8, one thread)",
                         audit("--knockout", binary=old), None))
        variants.append(("before threads: audit (one pass of 8, one thread)", audit(binary=old),
                         None))
    load_before = os.getloadavg()
    rows = {name: [] for name, _, _ in variants}
    for r in range(rounds):
        for name, argv, env in variants:
            rows[name].append(measure(argv, env))
        print(f"round {r + 1}/{rounds} done", file=sys.stderr)
    load_after = os.getloadavg()
    cpu = next((line.split(":", 1)[1].strip() for line in open("/proc/cpuinfo")
                if line.startswith("model name")), platform.processor())
    print(f"machine: {os.cpu_count()} logical CPUs, {cpu}, Linux {platform.release()}")
    print(f"load average before {load_before[0]:.2f}, after {load_after[0]:.2f}; "
          f"{rounds} rounds, medians")
    print()
    print("| configuration | wall (s) | wall min (s) | CPU (s) | peak memory (MiB) |")
    print("|---|---:|---:|---:|---:|")
    for name, v in rows.items():
        wall, cpu_s, peak = (statistics.median(x[i] for x in v) for i in range(3))
        print(f"| {name} | {wall:.2f} | {min(x[0] for x in v):.2f} | {cpu_s:.2f} | {peak:.0f} |")


if __name__ == "__main__":
    main()
