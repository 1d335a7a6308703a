"""The two ways nenv compiles a per-hop kernel (numba, cached on disk)."""

from __future__ import annotations

import numba

# IEEE results for every float error (error_model="numpy"): a division by zero gives inf or NaN as
# numpy would, never an exception, so one corrupt row cannot stop the others
plain = numba.njit(cache=True, error_model="numpy", nogil=True)
# sums and dot products may also be reordered and fused (SIMD): results move by a few units in the
# last place, never more; NaN and inf keep their IEEE meaning (no "fast" assumptions about them)
sums = numba.njit(cache=True, error_model="numpy", nogil=True, fastmath={"reassoc", "contract"})
