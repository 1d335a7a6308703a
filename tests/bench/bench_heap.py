"""MultiCallEngine step time with glibc's default heap policy beside one that keeps freed memory,
measured side by side in one run (not a test; nothing is asserted).

Run: python tests/bench/bench_heap.py [--calls 300 400 500] [--rounds 3]

Prints, per number of calls, the median over rounds of each policy's mean and p99 step time.

A batched step allocates a few MB of temporaries; with glibc's defaults the heap hands them back to
the system after every step and takes them again on the next, page by page (thousands of minor page
faults per step). GLIBC_TUNABLES (read by glibc when a process starts, so each measurement runs in
its own child process, alternating) can keep that memory: the trim threshold and the mmap threshold
below. nenv never changes the heap policy of a process itself; a gateway's start script may.
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


def run(n_calls: int, tunables: str | None) -> dict:
    env = dict(os.environ)
    env.pop("GLIBC_TUNABLES", None)
    if tunables:
        env["GLIBC_TUNABLES"] = tunables
    data = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "data")
    out = subprocess.run([sys.executable, "-c", CHILD, data, str(n_calls)], env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--calls", type=int, nargs="+", default=[300, 400, 500])
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    print(f"MultiCallEngine, 20 ms packets, one thread; {args.rounds} alternating rounds of 60 steps per policy")
    print(f"keeping freed memory: GLIBC_TUNABLES={KEEP_FREED}")
    for n in args.calls:
        plain, kept = [], []
        for _ in range(args.rounds):
            plain.append(run(n, None))
            kept.append(run(n, KEEP_FREED))
        p = statistics.median(r["mean_ms"] for r in plain)
        k = statistics.median(r["mean_ms"] for r in kept)
        p99p, p99k = (statistics.median(r["p99_ms"] for r in rs) for rs in (plain, kept))
        print(f"  {n:4d} calls: mean step {p:6.2f} ms (p99 {p99p:6.2f}) with the defaults ({statistics.median(r['faults'] for r in plain):5.0f} page faults per step), "
              f"{k:6.2f} ms (p99 {p99k:6.2f}) keeping freed memory ({statistics.median(r['faults'] for r in kept):5.0f}): ratio {k / p:4.2f}; real time needs both under 20 ms")


if __name__ == "__main__":
    main()
