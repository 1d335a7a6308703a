"""The neural estimator: an MLP (run by onnxruntime) behind the guard, with codebook fallback."""

from __future__ import annotations

import numpy as np

from nenv.checkpoint import Checkpoint
from nenv.estimators.base import Envelope, EnvelopeEstimator, NarrowbandAnalysis
from nenv.estimators.codebook import ENERGY_COLUMN
from nenv.features import ENERGY_FLOOR_DB, ContextStacker, envelope_from_prediction, narrowband_features
from nenv.guard import Decisions, Guard
from nenv.settings import HOP_NB, NB_SR


class NeuralEstimator(EnvelopeEstimator):
    """Stacked narrowband features -> network -> envelope; the guard swaps in the codebook when needed.

    Every hop's verdict is kept in :attr:`decisions` (see :meth:`record`).
    """

    name = "neural"

    def __init__(self, checkpoint: Checkpoint, *, guard: bool = True):
        self.checkpoint = checkpoint
        self.order = checkpoint.features.wb_order
        self.guard = Guard(checkpoint.limits) if guard else None
        self.listener = None  # called as listener(first_hop, decisions, stacked_inputs, a_nb) after each batch
        self.reset()

    def reset(self) -> None:
        self._stack = ContextStacker(self.checkpoint.features.context)
        self._parts: list[Decisions] = []
        self._hops = 0

    def estimate(self, analysis: NarrowbandAnalysis) -> Envelope:
        feats = narrowband_features(analysis)
        energy = feats[:, ENERGY_COLUMN]
        stacked = self._stack.push(feats)
        ceps, level = self.checkpoint.predict(stacked)
        a, gain = envelope_from_prediction(ceps, level, energy, order=self.order)
        book = self.checkpoint.codebook
        cell, novelty = book.nearest(feats)
        if self.guard is not None:
            dec = self.guard.check(ceps=ceps, level_db=level, a=a, gain=gain, a_nb=analysis.a, novelty=novelty, cell=cell)
            if np.any(dec.rejected):
                a_cb, g_cb = book.envelopes(cell[dec.rejected], energy[dec.rejected])
                a = a.copy()
                gain = gain.copy()
                a[dec.rejected] = a_cb
                gain[dec.rejected] = g_cb
            if self.listener is not None:
                self.listener(self._hops, dec, stacked, analysis.a)
            self._parts.append(dec)
        self._hops += len(analysis)
        gain = np.where(energy <= ENERGY_FLOOR_DB, 0.0, gain)
        return Envelope(a=a, gain=gain)

    def record(self) -> Decisions:
        """All verdicts since the last reset, one per hop in order (hop t starts at t * 10 ms)."""
        return Decisions.concat(self._parts)

    @staticmethod
    def hop_times(n: int) -> np.ndarray:
        """Start time in seconds of each of ``n`` hops."""
        return np.arange(n) * HOP_NB / NB_SR
