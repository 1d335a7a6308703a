"""Offline real-time factor of each system on one thread, measured side by side in one run.

Run: python tests/bench/bench_offline.py [--repeats N]

Systems are timed in interleaved rounds on the same input (both CMU ARCTIC
sentences through the telephone channel, 7.1 s), so machine load affects
them alike; the table reports the median per system and its ratio to imaging.
Not a test: nothing is asserted, numbers go to the README's performance section.
"""

from __future__ import annotations

import os

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"  # one thread, as a gateway core would run it

import argparse
import statistics
import time
from pathlib import Path

import numpy as np

from nenv.dsp import channel
from nenv.chain import pipeline
from nenv.report.evaluate import prepare_reference

DATA = Path(__file__).resolve().parents[1] / "data"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=7)
    args = ap.parse_args()
    refs = [prepare_reference(DATA / n) for n in ("arctic_a0007.wav", "arctic_a0009.wav")]
    ref = np.concatenate(refs)
    x = channel.telephone(ref, sr=16000, level_dbov=None)
    seconds = x.size / 8000
    names = ["unextended", "imaging", "oracle"]
    times: dict[str, list[float]] = {n: [] for n in names}
    for _ in range(args.repeats):
        for n in names:
            system = pipeline.make_system(n, reference=ref)
            t0 = time.perf_counter()
            pipeline.extend(x, system=system)
            times[n].append(time.perf_counter() - t0)
    base = statistics.median(times["imaging"])
    print(f"input: {seconds:.2f} s of 8 kHz speech, {args.repeats} interleaved rounds, 1 thread")
    print(f"{'system':<12} {'median s':>9} {'x real time':>12} {'time / imaging':>15}")
    for n in names:
        med = statistics.median(times[n])
        print(f"{n:<12} {med:>9.4f} {seconds / med:>12.0f} {med / base:>15.2f}")


if __name__ == "__main__":
    main()
