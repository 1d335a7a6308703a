"""nenv.heap: the allocator setting is applied once, and the operator can opt out."""

from __future__ import annotations

import ctypes.util
import os
import subprocess
import sys

import pytest

CODE = "from nenv import heap; print(heap.settle(), heap.settle())"


def _run(**env):
    clean = {k: v for k, v in os.environ.items() if k not in ("NENV_MALLOC", "MALLOC_TRIM_THRESHOLD_", "MALLOC_MMAP_THRESHOLD_")}
    return subprocess.run([sys.executable, "-c", CODE], env={**clean, **env}, capture_output=True, text=True, check=True).stdout.split()


@pytest.mark.skipif(not sys.platform.startswith("linux") or ctypes.util.find_library("c") is None, reason="glibc only")
def test_settle_applies_on_glibc_and_is_idempotent():
    assert _run() == ["True", "True"]


def test_operator_choices_win():
    assert _run(NENV_MALLOC="default") == ["False", "False"]
    assert _run(MALLOC_TRIM_THRESHOLD_="131072") == ["False", "False"]
