"""MultiCallEngine step time with glibc's default heap policy beside two ways of keeping freed memory,
measured side by side in one run (not a test; nothing is asserted).

Run: python tests/bench/bench_heap.py [--calls 300 400 500] [--rounds 3]

Prints, per number of calls, the median over rounds of each policy's mean and p99 step time and its
minor page faults per step.

A batched step allocates a few MB of temporaries; with glibc's defaults the heap hands them back to
the system after every step and takes them again on the next, page by page (thousands of minor page
faults per step). Two ways keep that memory: :func:`nenv.serve.memory.hold_freed_memory`, called once
in the process (glibc raises its own thresholds; ``nenv relay --hold-freed-memory``), and
GLIBC_TUNABLES set before the process starts (the trim and mmap thresholds below). A heap policy
lasts for a process, so each measurement runs in its own child process, the policies alternating.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys

KEEP_FREED = "glibc.malloc.trim_threshold=268435456:glibc.malloc.mmap_threshold=33554432"

CHILD = r"""
import json, os, resource, sys, time
for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"
from pathlib import Path
import numpy as np
from nenv.chain import checkpoint
from nenv.dsp import channel
from nenv.report.evaluate import prepare_reference
from nenv.serve.multicall import MultiCallEngine

data = Path(sys.argv[1])
n_calls, packet = int(sys.argv[2]), 160  # 20 ms of 8 kHz input per call per step
model = checkpoint.load(checkpoint.default_path())
ref = np.concatenate([prepare_reference(data / n) for n in ("arctic_a0007.wav", "arctic_a0009.wav")])
x = np.tile(channel.telephone(ref, sr=16000, law="mulaw"), 4)
if sys.argv[3] == "hold":
    from nenv.serve.memory import hold_freed_memory
    hold_freed_memory()
engine = MultiCallEngine(model)
for c in range(n_calls):
    engine.open(c)

def step(s):
    for c in range(n_calls):
        start = (s + 37 * c) % (x.size - packet)
        engine.feed(c, x[start : start + packet])
    engine.step()

for s in range(0, 20 * packet, packet):  # warm-up
    step(s)
faults = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
times = []
for s in range(0, 60 * packet, packet):
    t0 = time.perf_counter()
    step(s)
    times.append(time.perf_counter() - t0)
faults = (resource.getrusage(resource.RUSAGE_SELF).ru_minflt - faults) / 60
print(json.dumps({"mean_ms": 1000 * sum(times) / len(times), "p99_ms": 1000 * float(np.percentile(times, 99)), "faults": faults}))
"""


POLICIES = {"glibc's defaults": (None, ""), "hold_freed_memory()": (None, "hold"), "GLIBC_TUNABLES": (KEEP_FREED, "")}


def run(n_calls: int, policy: str) -> dict:
    tunables, mode = POLICIES[policy]
    env = dict(os.environ)
    env.pop("GLIBC_TUNABLES", None)
    if tunables:
        env["GLIBC_TUNABLES"] = tunables
    data = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "data")
    out = subprocess.run([sys.executable, "-c", CHILD, data, str(n_calls), mode], env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--calls", type=int, nargs="+", default=[300, 400, 500])
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    print(f"MultiCallEngine, 20 ms packets, one thread; {args.rounds} alternating rounds of 60 steps per policy")
    print(f"GLIBC_TUNABLES={KEEP_FREED}")
    for n in args.calls:
        results: dict[str, list[dict]] = {p: [] for p in POLICIES}
        for _ in range(args.rounds):
            for p in POLICIES:
                results[p].append(run(n, p))
        base = statistics.median(r["mean_ms"] for r in results["glibc's defaults"])
        print(f"  {n} calls (real time needs mean and p99 under 20 ms):")
        for p, rs in results.items():
            mean, p99, faults = (statistics.median(r[k] for r in rs) for k in ("mean_ms", "p99_ms", "faults"))
            print(f"    {p:20s} mean step {mean:6.2f} ms, p99 {p99:6.2f} ms, {faults:5.0f} page faults per step; {mean / base:4.2f} of the defaults' time")


if __name__ == "__main__":
    main()
