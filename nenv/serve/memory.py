"""Letting a serving process keep the memory its batched steps free (glibc).

A batched step of many calls allocates megabytes of temporaries and frees them at its end. With
glibc's default policy the heap hands freed memory at its top back to the system once it exceeds
the trim threshold, and the next step takes it again, page by page (some 2,000 minor page faults
per 500-call step, and a fifth to a quarter of the step's time: ``tests/bench/bench_heap.py``).

glibc adapts its thresholds by itself: when a block that was served by ``mmap`` is freed, the mmap
threshold rises to that block's size and the trim threshold to twice that, up to a 32 MB mmap
threshold on 64-bit systems (the dynamic mmap threshold: M_MMAP_THRESHOLD in glibc's manual page on
malloc tuning). :func:`hold_freed_memory` uses that adaptation once: it allocates and frees one block
just under the cap, after which the heap keeps up to about 60 MB of freed memory for reuse. Nothing
is configured (no tuning call, no environment variable): the thresholds stay glibc's own, and a
process whose thresholds were set explicitly (a tuning call, ``GLIBC_TUNABLES``, the ``MALLOC_*_``
variables, any of which also switches the adaptation off) keeps them. With another C library it is
an allocation and nothing more.

The raised thresholds hold for the whole process, so nenv never does this on import or when an
engine is made: a serving process asks for it (``nenv relay --hold-freed-memory``, or a gateway's
own start-up code calling :func:`hold_freed_memory` once).
"""

from __future__ import annotations

import numpy as np

BLOCK_BYTES = 30 * 2**20  # under glibc's 32 MB cap for the dynamic mmap threshold (64-bit)


def hold_freed_memory() -> None:
    """Raise glibc's adaptive heap thresholds once (see the module docstring); safe to call again."""
    block = np.empty(BLOCK_BYTES // 8)  # above the initial 128 KiB threshold: served by mmap, never touched
    del block  # freed: glibc moves its mmap threshold to this size and its trim threshold to twice it
