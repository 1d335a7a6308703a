"""The oracle: the true wideband envelope, measured on a wideband reference.

Evaluation only. It shows what the source-filter pipeline can reach when the
envelope is perfect, so the gap between an estimator and the oracle is the
estimator's own error.
"""

from __future__ import annotations

import numpy as np

from nenv.dsp import lpc
from nenv.errors import InputError
from nenv.chain.estimators.base import Envelope, EnvelopeEstimator, NarrowbandAnalysis
from nenv.settings import HOP_WB, WB_ORDER, WB_SR, WIN_WB


class OracleEstimator(EnvelopeEstimator):
    """LPC analysis (order WB_ORDER) of the time-aligned 16 kHz reference, hop by hop (one call only)."""

    name = "oracle"
    order = WB_ORDER

    def __init__(self, reference: np.ndarray):
        reference = np.asarray(reference, dtype=np.float64)
        if reference.ndim != 1 or reference.size == 0:
            raise InputError("the oracle needs a non-empty mono 16 kHz reference signal")
        self.reference = reference
        self._rows = 0
        self._pos = 0
        self._frames = lpc.FrameBuffer(frame_length=WIN_WB, hop_length=HOP_WB)

    def add_rows(self, n: int) -> None:
        if self._rows + n > 1:
            raise InputError("the oracle reads one reference recording: it serves one call, not several")
        self._rows += n

    def keep_rows(self, mask) -> None:
        self._rows = int(np.count_nonzero(mask))

    def reset(self) -> None:
        self._rows = 0
        self._pos = 0
        self._frames = lpc.FrameBuffer(frame_length=WIN_WB, hop_length=HOP_WB)

    def estimate(self, analysis: NarrowbandAnalysis, sel=slice(None)) -> Envelope:
        n = len(analysis)
        seg = self.reference[self._pos : self._pos + n * HOP_WB]
        seg = np.pad(seg, (0, n * HOP_WB - seg.size))
        self._pos += n * HOP_WB
        a, gain = lpc.analyse(self._frames.push(seg), order=self.order, sr=WB_SR)
        return Envelope(a=a, gain=gain)
