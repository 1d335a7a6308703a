"""Per-row state of the chain: row ``i`` of every array is call ``i``'s state.

Every stage of the chain keeps what it carries from hop to hop in one :class:`RowState`:
arrays whose first axis is the row (call). A call that joins gets a fresh row, a call that
leaves has its row dropped, and a step that processes some of the rows reads and writes
only those (``sel``: ``slice(None)`` for all rows, which reads views, or an index array).
"""

from __future__ import annotations

import numpy as np

from nenv.dsp import kernels

ALL = slice(None)


class RowState:
    """Named arrays with one row per call; ``fresh`` gives each name a new row's value."""

    def __init__(self, **fresh):
        self._fresh = {k: np.asarray(v) for k, v in fresh.items()}
        self._arrays = {k: np.zeros((0,) + v.shape, dtype=v.dtype) for k, v in self._fresh.items()}

    def __len__(self) -> int:
        return next(iter(self._arrays.values())).shape[0] if self._arrays else 0

    def add(self, n: int = 1) -> None:
        """Append ``n`` fresh rows."""
        for k, v in self._fresh.items():
            self._arrays[k] = np.concatenate([self._arrays[k], np.broadcast_to(v, (n,) + v.shape)])

    def clear(self) -> None:
        """Drop every row."""
        self.keep(np.zeros(len(self), dtype=bool))

    def keep(self, mask: np.ndarray) -> None:
        """Keep only the rows where ``mask`` is True (in order)."""
        for k in self._arrays:
            self._arrays[k] = np.ascontiguousarray(self._arrays[k][mask])

    def get(self, key: str, sel=ALL) -> np.ndarray:
        """The rows ``sel`` of ``key``: a C-contiguous view for all rows, a copy for an index array
        (write it back with :meth:`put` after changing it in place)."""
        return self._arrays[key][sel]

    def frames(self, key: str, sel, x: np.ndarray, *, hop: int) -> np.ndarray:
        """Frames ending at each of the ``H`` hops in ``x`` [shape=(B, H * hop)], each preceded by
        the row's history ``key`` (the last frame_length - hop samples), which is then advanced.
        Returns a C-contiguous [shape=(B * H, frame_length)], row-major by call then hop."""
        history = self.get(key, sel)
        frames = kernels.frames_after(kernels.f64(x), history, hop)
        self.put(key, sel, history)
        return frames

    def put(self, key: str, sel, value: np.ndarray) -> None:
        """Store the rows ``sel`` of ``key`` (nothing to do when ``value`` is the view :meth:`get` gave)."""
        target = self._arrays[key]
        if sel is ALL and (value is target or value.base is target) and value.shape == target.shape:
            return
        target[sel] = value
