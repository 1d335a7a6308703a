"""The neural estimator: an MLP (run by onnxruntime) behind the guard, with codebook fallback."""

from __future__ import annotations

import numpy as np

from nenv.dsp import lpc
from nenv.chain.checkpoint import Checkpoint
from nenv.chain.estimators.base import Envelope, EnvelopeEstimator, NarrowbandAnalysis
from nenv.chain.features import ENERGY_COLUMN, ENERGY_FLOOR_DB, VOICING_COLUMN, envelope_from_prediction, low_band_level, narrowband_features, stack_context
from nenv.chain.guard import Decisions, Guard
from nenv.dsp.rows import RowState
from nenv.settings import LOW_BAND_GAIN_DB


def guarded_envelopes(checkpoint: Checkpoint, guard: Guard | None, *, feats: np.ndarray, stacked: np.ndarray, a_nb: np.ndarray) -> tuple[np.ndarray, np.ndarray, Decisions | None, np.ndarray]:
    """Network -> envelope -> guard -> codebook fallback, for a batch of hops (of one call or many).

    feats : [shape=(n, N_INPUTS)] current-hop features; stacked : [shape=(n, input_dim)] network input;
    a_nb : [shape=(n, NB_ORDER+1)] narrowband LPC. Returns a, gain (0 for silent hops), the verdicts
    (hops of digital silence are never rejected: their gain is 0 whatever the envelope) and the
    reflection coefficients of ``a`` (from the recursion that built it; recomputed only for the hops
    the guard replaced).
    """
    energy = feats[:, ENERGY_COLUMN]
    silent = energy <= ENERGY_FLOOR_DB
    ceps, level = checkpoint.predict(stacked)
    a, gain, k = envelope_from_prediction(ceps, level, energy, order=checkpoint.features.wb_order, with_reflection=True)
    dec = None
    if guard is not None:
        book = checkpoint.codebook
        cell, novelty = book.nearest(feats)
        low_db = low_band_level(a, gain, energy) + LOW_BAND_GAIN_DB if guard.low_band else None
        dec, k = guard.assess(ceps=ceps, level_db=level, a=a, gain=gain, a_nb=a_nb, novelty=novelty, cell=cell, k=k, low_db=low_db)
        if silent.any():  # digital silence: nothing is added, nothing to judge
            dec.rejected[silent] = False
            dec.reasons[silent] = 0
        if dec.rejected.any():
            a_cb, g_cb = book.envelopes(cell[dec.rejected], energy[dec.rejected])
            a[dec.rejected] = a_cb
            gain[dec.rejected] = g_cb
            k[dec.rejected] = lpc.reflection(a_cb)[0]
    return a, np.where(silent, 0.0, gain), dec, k


class NeuralEstimator(EnvelopeEstimator):
    """Stacked narrowband features -> network -> envelope; the guard swaps in the codebook when needed.

    Each call (row) stacks its hop's features with its own ``context`` previous hops (before its
    first hop: the first hop repeated). With one call, every hop's verdict is kept for
    :meth:`record` unless ``keep_decisions`` is False (long files and calls: a ``listener`` sees
    each batch of verdicts as it happens, and nothing grows with the call's length). With
    several calls, :attr:`last` holds the verdicts of the latest batch (rows x hops, row-major).
    """

    name = "neural"

    def __init__(self, checkpoint: Checkpoint, *, guard: bool = True, keep_decisions: bool = True, low_band: bool = False):
        checkpoint.prepare()  # the network is ready before a call's first hop
        self.checkpoint = checkpoint
        self.keep_decisions = keep_decisions
        self.order = checkpoint.features.wb_order
        self.guard = Guard(checkpoint.limits, low_band=low_band) if guard else None
        self.listener = None  # called as listener(first_hop, decisions, stacked_inputs, a_nb) after each batch (one call)
        self.batch_listener = None  # called as batch_listener(decisions, stacked_inputs, a_nb) after each batch of any rows (row-major)
        self.context = checkpoint.features.context
        n_in = checkpoint.features.n_inputs
        self._state = RowState(ctx=np.zeros(self.context * n_in), ready=np.zeros((), dtype=bool))
        self._parts: list[Decisions] = []
        self._hops = 0
        self.last: Decisions | None = None

    def add_rows(self, n: int) -> None:
        self._state.add(n)

    def keep_rows(self, mask) -> None:
        self._state.keep(mask)

    def reset(self) -> None:
        self._state.clear()
        self._parts = []
        self._hops = 0
        self.last = None

    def _stack(self, feats: np.ndarray, sel, B: int, H: int) -> np.ndarray:
        """Each hop's features with its call's ``context`` previous hops (:func:`nenv.chain.features.stack_context`)."""
        stacked, ctx, ready = stack_context(self._state.get("ctx", sel), self._state.get("ready", sel), feats.reshape(B, H, -1), context=self.context)
        self._state.put("ctx", sel, ctx)
        self._state.put("ready", sel, ready)
        return stacked

    def estimate(self, analysis: NarrowbandAnalysis, sel=slice(None)) -> Envelope:
        B = analysis.rows
        H = len(analysis) // B
        feats = narrowband_features(analysis)
        stacked = self._stack(feats, sel, B, H)
        a, gain, dec, k = guarded_envelopes(self.checkpoint, self.guard, feats=feats, stacked=stacked, a_nb=analysis.a)
        self.last = dec
        if dec is not None and self.batch_listener is not None:
            self.batch_listener(dec, stacked, analysis.a)
        if dec is not None and len(self._state) == 1:
            if self.listener is not None:
                self.listener(self._hops, dec, stacked, analysis.a)
            if self.keep_decisions:
                self._parts.append(dec)
        self._hops += H
        return Envelope(a=a, gain=gain, k=k, voicing=feats[:, VOICING_COLUMN])

    def record(self) -> Decisions:
        """All verdicts of the one call so far, one per hop in order (hop t starts at t * 10 ms)."""
        return Decisions.concat(self._parts)
