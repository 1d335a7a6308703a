"""The chain: one per-hop source-filter extension for any number of calls at once (rows).

For every hop of 8 kHz input the :class:`Chain`

1. frames and analyses the narrowband signal (LPC, order NB_ORDER), for systems that use it;
2. asks its *system* for a 16 kHz high-band candidate for the hop;
3. keeps only the band above 3.4 kHz of that candidate (elliptic high-pass), at the system's
   ``band_trim_db`` (a model's calibration, 0 dB otherwise), and, for a system made
   with ``low_band=True``, also its 50-300 Hz band weighted per hop by the system (elliptic band
   filter, :func:`nenv.dsp.synthesis.low_band_sos`);
4. adds them to the interpolated narrowband signal, which is never altered.

Every stage keeps its state as rows (:class:`nenv.dsp.rows.RowState`): row ``i`` is call ``i``.
One call offline (:func:`extend`, in blocks), one call streaming
(:class:`nenv.serve.runtime.CallEngine`) and many calls stepped together
(:class:`nenv.serve.multicall.MultiCallEngine`) all run this one chain, so they cannot drift
apart; any whole number of hops at a time gives the same result. The output lags the
input by :data:`LATENCY` samples at 16 kHz (the interpolator's delay), which the callers
remove; :func:`tail_padding` is the one end-of-signal rule.

Systems (:mod:`nenv.chain.systems`): source-filter systems build the candidate from the
inverse-filtered residual, extended to 16 kHz (:mod:`nenv.dsp.excitation`) and shaped by an
all-pole wideband envelope from an estimator (:mod:`nenv.chain.estimators`); the imaging
baseline, the unextended reference and the true-band ceiling share steps 1, 3 and 4.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from nenv.dsp import kernels, lpc
from nenv.media.audio import limit_peaks
from nenv.errors import InputError
from nenv.chain.estimators.base import NarrowbandAnalysis
from nenv.dsp.rows import ALL, RowState
from nenv.settings import HOP_NB, HOP_WB, NB_ORDER, NB_SR, WIN_NB
from nenv.dsp.synthesis import UPSAMPLER_DELAY, UPSAMPLER_HISTORY, isolation_sos, low_band_sos, upsample_rows
from nenv.chain.systems import DEFAULT_EXCITATION, LOW_BAND_SYSTEMS, MODEL_SYSTEMS, REFERENCE_SYSTEMS, SYSTEMS, System, check_low_band, load_model, make_system

__all__ = ["Chain", "DEFAULT_EXCITATION", "Extended", "LATENCY", "LOW_BAND_SYSTEMS", "MODEL_SYSTEMS", "REFERENCE_SYSTEMS", "SYSTEMS", "System", "check_low_band", "extend", "load_model", "make_system", "tail_padding"]

LATENCY = UPSAMPLER_DELAY  # samples at 16 kHz of processing delay inside Chain.process


class Chain:
    """Stateful narrowband -> wideband processor around one :class:`System`, one row per call."""

    def __init__(self, system: System, *, rows: int = 1):
        kernels.warm()  # compiled (or loaded from cache) before the first hop, not during it
        self.system = system
        system.reset()  # a system starts with no calls: this chain's rows are its rows
        self._iso = np.ascontiguousarray(isolation_sos())
        self.low_band = bool(getattr(system, "low_band", False))
        trim = getattr(system, "band_trim_db", 0.0)
        self._band_gain = 10 ** (trim / 20) if trim else None  # None: the trained output, untouched
        state = dict(nb=np.zeros(WIN_NB - HOP_NB), up=np.zeros(UPSAMPLER_HISTORY), iso=np.zeros((self._iso.shape[0], 2)))
        if self.low_band:
            self._low = np.ascontiguousarray(low_band_sos())
            state.update(low=np.zeros((self._low.shape[0], 2)), lw=np.zeros(()))  # filter memory, last hop's weight
        self._state = RowState(**state)
        self.add_rows(rows)

    @property
    def rows(self) -> int:
        return len(self._state)

    def add_rows(self, n: int = 1) -> None:
        """Start ``n`` new calls (rows at the end), each from silence."""
        self._state.add(n)
        self.system.add_rows(n)

    def keep_rows(self, mask: np.ndarray) -> None:
        """Forget the rows where ``mask`` is False (calls that ended)."""
        self._state.keep(mask)
        self.system.keep_rows(mask)

    def process(self, x: np.ndarray, sel=ALL) -> np.ndarray:
        """Extend whole hops of 8 kHz input of the rows ``sel``.

        x : np.ndarray [shape=(B, H * HOP_NB)] -> np.ndarray [shape=(B, 2 * H * HOP_NB)] at 16 kHz,
        delayed by LATENCY samples. ``sel``: all rows (B = rows), or an index array of B rows.
        A one-dimensional ``x`` is the one row of a one-row chain and gives a one-dimensional result.
        """
        if x.ndim == 1:
            if self.rows != 1:
                raise ValueError(f"a signal without rows needs a chain of one row, this one has {self.rows}")
            return self.process(x[None, :])[0]
        n = x.shape[1]
        if n % HOP_NB:
            raise ValueError(f"Chain.process takes whole hops of {HOP_NB} samples, got {n}")
        H = n // HOP_NB
        B = x.shape[0]
        x = np.ascontiguousarray(x, dtype=np.float64)
        if H == 0:
            return np.zeros((B, 0))
        analysis = self._analyse(x, sel) if self.system.needs_analysis else NarrowbandAnalysis(np.zeros((0, WIN_NB)), np.zeros((0, NB_ORDER + 1)), np.zeros(0), rows=B)
        candidate = self.system.highband(x, analysis, sel)
        up = self._state.get("up", sel)
        low = upsample_rows(x, up)
        self._state.put("up", sel, up)
        candidate = np.ascontiguousarray(candidate, dtype=np.float64)
        iso = self._state.get("iso", sel)
        high = kernels.sosfilt(self._iso, candidate, iso)
        self._state.put("iso", sel, iso)
        if self._band_gain is not None:  # a model folder's calibration of its band
            high *= self._band_gain
        out = low + high
        if self.low_band:
            out += self._low_band(candidate, sel, B, H)
        return out

    def _low_band(self, candidate: np.ndarray, sel, B: int, H: int) -> np.ndarray:
        """The candidate's 50-300 Hz band, weighted per hop (linearly from one hop's weight to the
        next's across each hop, so a weight change makes no step) and then isolated."""
        prev = self._state.get("lw", sel)
        weighted = kernels.hop_ramp(candidate, np.ascontiguousarray(self.system.low_weights, dtype=np.float64), prev, HOP_WB)
        self._state.put("lw", sel, prev)
        mem = self._state.get("low", sel)
        y = kernels.sosfilt(self._low, weighted, mem)
        self._state.put("low", sel, mem)
        return y

    def _analyse(self, x: np.ndarray, sel) -> NarrowbandAnalysis:
        frames = self._state.frames("nb", sel, x, hop=HOP_NB)
        a, gain = lpc.analyse(frames, order=NB_ORDER, sr=NB_SR)
        return NarrowbandAnalysis(frames=frames, a=a, gain=gain, rows=x.shape[0])


@dataclass(frozen=True)
class Extended:
    """Result of :func:`extend`.

    y : np.ndarray [shape=(2 * n,)], 16 kHz, |y| <= 0.99
    sr : int [Hz] = 16000
    n_limited : int, samples clipped by the peak limiter
    """

    y: np.ndarray
    sr: int
    n_limited: int


CHUNK_HOPS = 1000  # hops per processing step in extend() = 10 s of input


def tail_padding(pending: int) -> int:
    """Zeros to append after the last ``pending`` input samples of a signal or call.

    Enough to complete the last hop and push the interpolator's delay out, so the
    output reaches exactly twice the input length (offline and streaming alike).
    """
    total = pending + (LATENCY + 1) // 2
    return -(-total // HOP_NB) * HOP_NB - pending


def extend(x: np.ndarray, *, system: System, on_progress: Callable[[int, int], None] | None = None) -> Extended:
    """Extend a whole 8 kHz signal offline; output is time-aligned and exactly twice as long.

    The signal runs through a one-row :class:`Chain` in steps of CHUNK_HOPS hops (identical
    to processing it at once), which bounds the working memory and lets
    ``on_progress(done, total)`` report input samples done.

    Parameters
    ----------
    x : np.ndarray [shape=(n,)], 8 kHz, full scale 1.0
    system : a :class:`System` (see :func:`make_system`)
    """
    x = np.asarray(x, dtype=np.float64)
    if x.ndim != 1 or x.size == 0:
        raise InputError("extend needs a non-empty mono 8 kHz signal")
    xp = np.concatenate([x, np.zeros(tail_padding(x.size))])
    chain = Chain(system)
    step = CHUNK_HOPS * HOP_NB
    parts = []
    for start in range(0, xp.size, step):
        parts.append(chain.process(xp[start : start + step]))
        if on_progress:
            on_progress(min(start + step, x.size), x.size)
    y = np.concatenate(parts)[LATENCY : LATENCY + 2 * x.size]
    y, n_limited = limit_peaks(y)
    return Extended(y=y, sr=2 * NB_SR, n_limited=n_limited)
