"""The oracle: the true wideband envelope, measured on a wideband reference.

Evaluation only. It shows what the source-filter pipeline can reach when the
envelope is perfect, so the gap between an estimator and the oracle is the
estimator's own error.
"""

from __future__ import annotations

import numpy as np

from nenv.dsp import lpc
from nenv.chain.estimators.base import Envelope, EnvelopeEstimator, NarrowbandAnalysis, ReferenceReader
from nenv.settings import HOP_WB, WB_ORDER, WB_SR, WIN_WB


class OracleEstimator(ReferenceReader, EnvelopeEstimator):
    """LPC analysis (order WB_ORDER) of the time-aligned 16 kHz reference, hop by hop (one call only)."""

    name = "oracle"
    order = WB_ORDER

    def __init__(self, reference: np.ndarray):
        super().__init__(reference)
        self._frames = lpc.FrameBuffer(frame_length=WIN_WB, hop_length=HOP_WB)

    def reset(self) -> None:
        super().reset()
        self._frames = lpc.FrameBuffer(frame_length=WIN_WB, hop_length=HOP_WB)

    def estimate(self, analysis: NarrowbandAnalysis, sel=slice(None)) -> Envelope:
        seg = self.take(len(analysis) * HOP_WB)
        a, gain = lpc.analyse(self._frames.push(seg), order=self.order, sr=WB_SR)
        return Envelope(a=a, gain=gain)
