"""The compiled kernels never index outside their arrays.

numba compiles without bounds checks, so a kernel that reads or writes past an array's end (a row
count taken from the wrong axis, a scratch array one short) can still give right answers on the
sizes a test happens to use, and corrupt memory on others. numba's ``NUMBA_BOUNDSCHECK=1`` (numba's
documentation, "Environment variables") turns every index into a checked one that raises
IndexError; this test runs the kernels' own tests, which compare every kernel with its numpy/scipy
reference on batches of many sizes, once more in a child process with the checks on and a fresh,
private compile cache (checked code never mixes with the cached unchecked code).
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

from tests.conftest import run_bounded

ROOT = Path(__file__).resolve().parents[1]
KERNEL_TESTS = ["tests/test_kernels.py", "tests/test_kernels_hop.py", "tests/test_features.py", "tests/test_guard_spectra.py", "tests/test_lpc.py", "tests/test_multicall.py"]


def test_kernel_tests_pass_with_every_index_checked(tmp_path):
    env = dict(os.environ, NUMBA_BOUNDSCHECK="1", NUMBA_CACHE_DIR=str(tmp_path / "numba-cache"))
    cmd = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-x", *KERNEL_TESTS]
    res = run_bounded(cmd, timeout=900, cwd=ROOT, env=env)
    assert res.returncode == 0, res.stdout[-4000:] + res.stderr[-2000:]
    assert " passed" in res.stdout and "IndexError" not in res.stdout
