"""hold_freed_memory: a batched step's freed memory is reused instead of faulted in again.

Reference: glibc's documented dynamic mmap threshold (mallopt(3), M_MMAP_THRESHOLD: freeing a block
that was served by mmap raises the mmap threshold to its size, and the trim threshold to twice it).
Measured in fresh processes, by their minor page faults (getrusage), on glibc only.
"""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys

import pytest

CHILD = r"""
import json, resource, sys
import numpy as np
if sys.argv[1] == "hold":
    from nenv.serve.memory import hold_freed_memory
    hold_freed_memory()

def step():  # like a batched step: many 1 MB temporaries alive at once, all freed at the end
    live = [np.ones(2**17) for _ in range(24)]
    return sum(float(a[0]) for a in live)

for _ in range(3):  # glibc's own adaptation to these sizes happens here
    step()
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(10):
    step()
print(json.dumps((resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before) / 10))
"""


def _faults_per_step(mode: str) -> float:
    # glibc's defaults: no tunables, no MALLOC_* variables (a library imported by another test, dask's,
    # sets MALLOC_TRIM_THRESHOLD_ in os.environ, and an explicit threshold turns glibc's adaptation off)
    env = {k: v for k, v in os.environ.items() if k != "GLIBC_TUNABLES" and not k.startswith("MALLOC_")}
    out = subprocess.run([sys.executable, "-c", CHILD, mode], capture_output=True, text=True, check=True, env=env)
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="the thresholds are glibc's")
def test_held_memory_is_reused_without_page_faults():
    default, held = _faults_per_step("default"), _faults_per_step("hold")
    # 24 MB freed per step: with glibc's defaults most of it goes back to the system and comes
    # back page by page (4 KiB pages: thousands of faults); held, it is reused
    assert default > 1000
    assert held < default / 20
