"""The imaging baseline: spectral folding of the signal itself, no model.

Zero insertion (8 -> 16 kHz without an interpolation filter) leaves a mirror
image of the 0-4 kHz spectrum in 4-8 kHz; a fixed shaping filter whose gain
falls with frequency tames the image, whose strongest (low-frequency) content
lands at the top of the band. It has no envelope estimator: it produces its
high-band candidate directly and shares the band isolation and mixing stages.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from nenv.dsp import designs, kernels
from nenv.chain.estimators.base import NarrowbandAnalysis
from nenv.dsp.rows import ALL, RowState
from nenv.settings import WB_SR
from nenv.dsp.synthesis import UPSAMPLER_DELAY

# Shaping gain, linear in dB from 4 kHz to 8 kHz. Chosen from a coarse grid (4 kHz: -8..-20 dB,
# 8 kHz: -24..-40 dB) as the pair whose median high-band level error on the two CMU ARCTIC
# sentences in tests/data was closest to 0 dB; it is a baseline, not a fitted model.
SHAPING_DB_AT_4K = -16.0  # dB
SHAPING_DB_AT_8K = -32.0  # dB
SHAPING_TAPS = 33  # linear-phase prototype; the filter used is its minimum-phase version


def shaping_taps(db_at_4k: float = SHAPING_DB_AT_4K, db_at_8k: float = SHAPING_DB_AT_8K) -> np.ndarray:
    """Minimum-phase FIR with the falling shaping gain (flat below 4 kHz); for the default gains, the
    stored design (:mod:`nenv.dsp.designs`)."""
    if (db_at_4k, db_at_8k) == (SHAPING_DB_AT_4K, SHAPING_DB_AT_8K):
        return designs.stored("shaping")
    return design_shaping(db_at_4k, db_at_8k)


@lru_cache(maxsize=None)
def design_shaping(db_at_4k: float = SHAPING_DB_AT_4K, db_at_8k: float = SHAPING_DB_AT_8K) -> np.ndarray:
    """:func:`shaping_taps` designed afresh (scipy.signal.firwin2 and minimum_phase)."""
    from scipy import signal

    freq = np.array([0.0, 4000.0, 8000.0]) / (WB_SR / 2)
    gain_db = np.array([db_at_4k, db_at_4k, db_at_8k])
    # minimum_phase (homomorphic) matches the square root of the prototype's magnitude,
    # so design the prototype on the squared gain.
    proto = signal.firwin2(SHAPING_TAPS, freq, 10 ** (gain_db / 10))
    return signal.minimum_phase(proto, method="homomorphic")


class ImagingSystem:
    """Zero insertion + falling shaping gain, aligned with the interpolated narrowband path, per row.

    The alignment delay (UPSAMPLER_DELAY samples) is folded into the shaping FIR as leading zero
    taps, so one FIR with state per call does both.
    """

    name = "imaging"
    needs_analysis = False
    low_band = False  # nothing to shape a low band with
    low_weights = None

    def __init__(self, *, db_at_4k: float = SHAPING_DB_AT_4K, db_at_8k: float = SHAPING_DB_AT_8K):
        self._taps = np.ascontiguousarray(np.concatenate([np.zeros(UPSAMPLER_DELAY), shaping_taps(db_at_4k, db_at_8k)]))
        self._state = RowState(fir=np.zeros(self._taps.size - 1))

    def add_rows(self, n: int) -> None:
        self._state.add(n)

    def keep_rows(self, mask: np.ndarray) -> None:
        self._state.keep(mask)

    def reset(self) -> None:
        self._state.clear()

    def highband(self, x: np.ndarray, analysis: NarrowbandAnalysis, sel=ALL) -> np.ndarray:
        z = np.zeros((x.shape[0], 2 * x.shape[1]))
        z[:, ::2] = 2.0 * x  # zero insertion with the interpolator's gain: the image has the band's level
        hist = self._state.get("fir", sel)
        y = kernels.fir(self._taps, z, hist)
        self._state.put("fir", sel, hist)
        return y
