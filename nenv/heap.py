"""Keep freed memory in the process's heap, so per-hop temporaries do not fault in fresh pages.

Every hop allocates numpy temporaries of a few hundred kilobytes (more when
many calls share a step). With glibc's defaults, freeing them can shrink the
heap (trim) or unmap them, and the next hop's allocation then page-faults on
every 4 KiB page again: measured on the development machine, ``np.maximum(x - t,
c)`` on a 200 x 257 array took 610 us instead of 51 us, and a 200-call step of
the multi-call engine 28 ms instead of 22 ms.

:func:`settle` raises glibc's trim and mmap thresholds (``mallopt``) once per
process, so such blocks are reused. The cost: up to ``TRIM_BYTES`` of freed
memory stays mapped. It does nothing on other C libraries, when the
environment sets ``NENV_MALLOC=default``, or when the glibc variables
``MALLOC_TRIM_THRESHOLD_`` / ``MALLOC_MMAP_THRESHOLD_`` are set (the operator's
choice wins).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os

M_TRIM_THRESHOLD = -1  # glibc malloc.h
M_MMAP_THRESHOLD = -3
TRIM_BYTES = 64 << 20  # freed memory kept before the heap is trimmed
MMAP_BYTES = 16 << 20  # blocks at least this large still get their own mapping (whole files)

_state: dict[str, bool] = {}


def settle() -> bool:
    """Apply the thresholds once per process; True when they are in force (glibc, not opted out)."""
    if "done" in _state:
        return _state["done"]
    _state["done"] = False
    if os.environ.get("NENV_MALLOC", "") == "default" or any(v in os.environ for v in ("MALLOC_TRIM_THRESHOLD_", "MALLOC_MMAP_THRESHOLD_")):
        return False
    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name) if name else None
        mallopt = libc.mallopt if libc is not None else None
        gnu = libc.gnu_get_libc_version if libc is not None else None
    except (OSError, AttributeError):  # not glibc (musl, macOS, Windows): leave the allocator alone
        return False
    if mallopt is None or gnu is None:
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    ok = bool(mallopt(M_MMAP_THRESHOLD, MMAP_BYTES)) and bool(mallopt(M_TRIM_THRESHOLD, TRIM_BYTES))
    _state["done"] = ok
    return ok
