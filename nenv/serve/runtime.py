"""The streaming engine a gateway embeds: torch-free (numpy, scipy, numba kernels, onnxruntime).

One :class:`CallEngine` per call. Feed it 8 kHz samples in chunks of any size
(one sample to minutes); it returns 16 kHz samples as soon as whole 10 ms hops
are complete. The concatenation of everything :meth:`CallEngine.feed`
returns plus :meth:`CallEngine.flush` equals the offline ``nenv extend``
output for the same input (same system, same model), whatever the chunking.

Latency: a sample waits at most one hop (10 ms) for its hop to complete, then
passes the interpolator's delay (23 samples at 16 kHz = 1.44 ms); the
analysis window ends at the hop's end, so there is no look-ahead. The output
stream therefore lags the input by ``ALGORITHMIC_LATENCY_MS`` = 11.44 ms at most.
"""

from __future__ import annotations

import numpy as np

from nenv.media.audio import limit_peaks
from nenv.errors import InputError
from nenv.chain.pipeline import LATENCY, Chain, System, make_system, tail_padding
from nenv.settings import HOP_NB, NB_SR, WB_SR

ALGORITHMIC_LATENCY_MS = 1000.0 * (HOP_NB / NB_SR + LATENCY / WB_SR)  # = 11.4375 ms


def as_samples(x) -> np.ndarray:
    """Fed samples as a flat float64 array; InputError for anything but floating point (full scale 1.0).

    Integer PCM passed as is would be read as thousands of times full scale, so it is refused
    with the conversion to use instead.
    """
    a = np.asarray(x)
    if a.dtype.kind != "f" and a.size:
        if a.dtype.kind in "iu":
            raise InputError(f"samples must be floating point with full scale 1.0, got {a.dtype} integers: divide 16-bit PCM by 32768, or decode G.711 bytes with nenv.dsp.g711.decode")
        raise InputError(f"samples must be floating point with full scale 1.0, got {a.dtype}")
    return a.astype(np.float64, copy=False).reshape(-1)


def sanitize(x: np.ndarray) -> tuple[np.ndarray, int]:
    """Samples as a flat float64 array (:func:`as_samples`) with non-finite values replaced by 0,
    and how many were replaced. One corrupt packet must not poison a call's filter state.
    """
    x = as_samples(x)
    finite = np.isfinite(x)
    if np.all(finite):
        return x, 0
    return np.where(finite, x, 0.0), int(np.count_nonzero(~finite))


class OutputGate:
    """What every engine does to its output: drop the first LATENCY samples, limit peaks, count."""

    def __init__(self):
        self.skip = LATENCY
        self.limited = 0
        self.samples_out = 0

    def emit(self, y: np.ndarray) -> np.ndarray:
        if self.skip:
            drop = min(self.skip, y.size)
            y = y[drop:]
            self.skip -= drop
        y, n = limit_peaks(y)
        self.limited += n
        self.samples_out += y.size
        return y

    def emit_limited(self, y: np.ndarray, n_limited: int) -> np.ndarray:
        """:meth:`emit` for samples already limited (``n_limited`` of them) once the delay is dropped."""
        self.limited += n_limited
        self.samples_out += y.size
        return y

    def finish(self, y: np.ndarray, samples_in: int) -> np.ndarray:
        """The end of a call: ``y``, its last emitted samples, cut so that the call's whole output is
        twice its input (the tail padding's extra samples dropped); the count follows the cut."""
        before = self.samples_out - y.size
        y = y[: max(2 * samples_in - before, 0)]
        self.samples_out = before + y.size
        return y


class CallEngine:
    """Streaming narrowband -> wideband conversion for one call.

    One thread at a time per engine; engines in different threads may share one loaded model (its
    session is made once, and each thread runs it through buffers of its own)."""

    latency_ms = ALGORITHMIC_LATENCY_MS

    def __init__(self, model=None, *, method: str = "neural", system: System | None = None, keep_decisions: bool = False, low_band: bool = False):
        """``model``: a checkpoint (loaded, a folder, or None for the shipped model) for the 'neural'
        and 'codebook' methods; ``method``: 'neural' (default), 'codebook', 'imaging' or
        'unextended'; ``system``: a ready-made system instead (any of :mod:`nenv.chain.systems`).
        ``keep_decisions``: keep every hop's guard verdict for ``system.estimator.record()``
        (memory grows with the call's length; off by default: count verdicts with the
        estimator's ``listener`` or :func:`nenv.serve.streamfile.watch` instead). ``low_band``: add the
        50-300 Hz band as well (neural and codebook; see :mod:`nenv.chain.systems`)."""
        if system is None:
            system = make_system(method, model=model, low_band=low_band)
        estimator = getattr(system, "estimator", None)
        if hasattr(estimator, "keep_decisions"):
            estimator.keep_decisions = keep_decisions
        self._ext = Chain(system)
        self._pending = np.zeros(0)
        self._out = OutputGate()
        self.samples_in = 0
        self.bad_samples = 0  # non-finite input samples replaced by 0
        self._closed = False

    @property
    def system(self) -> System:
        return self._ext.system

    @property
    def samples_out(self) -> int:
        return self._out.samples_out

    @property
    def limited(self) -> int:
        """Output samples clipped by the peak limiter."""
        return self._out.limited

    def feed(self, x: np.ndarray) -> np.ndarray:
        """Take any number of 8 kHz samples (float, full scale 1.0); return the 16 kHz samples now ready.

        Non-finite samples are replaced by 0 (and counted in ``bad_samples``), so one
        corrupt packet cannot poison the call's filter state.
        """
        if self._closed:
            raise RuntimeError("this call has been flushed; start a new CallEngine")
        x, bad = sanitize(x)
        self.bad_samples += bad
        self.samples_in += x.size
        buf = np.concatenate([self._pending, x]) if self._pending.size else x
        n_whole = (buf.size // HOP_NB) * HOP_NB
        self._pending = buf[n_whole:].copy()
        if n_whole == 0:
            return np.zeros(0)
        return self._out.emit(self._ext.process(buf[:n_whole]))

    def flush(self) -> np.ndarray:
        """End of call: process the last partial hop and drain the delay; total output = 2 x input."""
        if self._closed:
            return np.zeros(0)
        self._closed = True
        n_pad = tail_padding(self._pending.size)
        y = self._out.emit(self._ext.process(np.concatenate([self._pending, np.zeros(n_pad)])))
        return self._out.finish(y, self.samples_in)
