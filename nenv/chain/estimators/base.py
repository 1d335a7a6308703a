"""The interface every envelope estimator implements."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from nenv.errors import InputError


@dataclass(frozen=True)
class NarrowbandAnalysis:
    """LPC analysis of consecutive hops of narrowband input.

    frames : np.ndarray [shape=(n, WIN_NB)], raw 8 kHz samples, each ending at its hop's end
    a : np.ndarray [shape=(n, NB_ORDER+1)], predictor coefficients
    gain : np.ndarray [shape=(n,)], all-pole gain (RMS prediction error per sample)
    rows : int, the calls these hops belong to: n = rows x H, row-major (each call's H hops in order)
    """

    frames: np.ndarray
    a: np.ndarray
    gain: np.ndarray
    rows: int = 1

    def __len__(self) -> int:
        return self.a.shape[0]


@dataclass(frozen=True)
class Envelope:
    """One wideband all-pole envelope per hop.

    a : np.ndarray [shape=(n, p+1)], stable predictor coefficients at 16 kHz
    gain : np.ndarray [shape=(n,)], amplitude G of G/A(z) for a unit-power excitation
    k : np.ndarray [shape=(n, p)] or None, the reflection coefficients of ``a`` when the
        estimator has them already (exactly what :func:`nenv.dsp.lpc.reflection` gives for ``a``);
        the synthesis computes them otherwise
    voicing : np.ndarray [shape=(n,)] or None, the narrowband voicing of each hop when the estimator
        computed it (:func:`nenv.chain.features.voicing`); the low band computes it otherwise
    """

    a: np.ndarray
    gain: np.ndarray
    k: np.ndarray | None = None
    voicing: np.ndarray | None = None


class EnvelopeEstimator:
    """Base class: maps narrowband hops to wideband envelopes, in order, hop by hop, one row per call.

    Estimators without state between hops keep the default :meth:`add_rows` / :meth:`keep_rows`.
    """

    name: str = "estimator"
    order: int = 16

    def estimate(self, analysis: NarrowbandAnalysis, sel=slice(None)) -> Envelope:
        """Envelopes of the hops of ``analysis`` (rows ``sel`` of the estimator's state, H hops each)."""
        raise NotImplementedError

    def add_rows(self, n: int) -> None:
        """Start ``n`` new calls."""

    def keep_rows(self, mask) -> None:
        """Forget the calls where ``mask`` is False."""

    def reset(self) -> None:
        """Forget every call (rows and anything recorded about them)."""


class ReferenceReader:
    """What reads one time-aligned 16 kHz reference recording (oracle, true band): one call only,
    and a position in the reference that starts again at :meth:`reset`."""

    name = "reference"

    def __init__(self, reference: np.ndarray):
        reference = np.asarray(reference, dtype=np.float64)
        if reference.ndim != 1 or reference.size == 0:
            raise InputError(f"the {self.name} system needs a non-empty mono 16 kHz reference signal")
        self.reference = reference
        self._rows = 0
        self._pos = 0

    def take(self, n: int) -> np.ndarray:
        """The next ``n`` reference samples (zeros past its end)."""
        seg = self.reference[self._pos : self._pos + n]
        self._pos += n
        return np.pad(seg, (0, n - seg.size))

    def add_rows(self, n: int) -> None:
        if self._rows + n > 1:
            raise InputError(f"the {self.name} system reads one reference recording: it serves one call, not several")
        self._rows += n

    def keep_rows(self, mask) -> None:
        self._rows = int(np.count_nonzero(mask))

    def reset(self) -> None:
        self._rows = 0
        self._pos = 0
