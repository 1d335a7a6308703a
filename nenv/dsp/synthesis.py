"""The interpolator, the high-band isolation filter and the all-pole synthesis, one row of state per call.

Each keeps its state across calls, so a signal processed in pieces gives the same output as
processed at once. The loops themselves are compiled kernels (:mod:`nenv.dsp.kernels`).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from nenv.dsp import designs, kernels
from nenv.settings import BAND_EDGE_HZ, HOP_WB, N_SUBFRAMES, WB_SR

UPSAMPLER_TAPS = 47  # at 16 kHz, linear phase
UPSAMPLER_DELAY = (UPSAMPLER_TAPS - 1) // 2  # samples at 16 kHz = 1.44 ms
ISOLATION_ORDER = 10  # elliptic high-pass that keeps only the new band
ISOLATION_PASS_HZ = BAND_EDGE_HZ + 50.0  # Hz, pass-band edge (0.2 dB ripple)
ISOLATION_STOP_DB = 60.0  # dB of rejection, reached by 3300 Hz
MAX_REFLECTION = 0.9999  # |k| ceiling applied before synthesis
LOW_PASS_HZ = 250.0  # Hz, pass-band edge of the low band's upper side (0.5 dB ripple, 60 dB from 290 Hz)
LOW_HIGHPASS_HZ = 60.0  # Hz, pass-band edge of its lower side (0.5 dB ripple, 40 dB below 32 Hz)


def upsampler_taps() -> np.ndarray:
    """Interpolation low-pass for 8 -> 16 kHz, with the x2 gain of zero insertion.

    Parks-McClellan, pass 0-3500 Hz (+-0.06 dB), stop from 4500 Hz (<= -63 dB): the
    telephone band passes untouched and its image above 4.6 kHz is removed.
    """
    return designs.stored("upsampler")


def design_upsampler() -> np.ndarray:
    """:func:`upsampler_taps` designed afresh (scipy.signal.remez, equiripple)."""
    from scipy import signal

    return 2.0 * signal.remez(UPSAMPLER_TAPS, [0, 3500, 4500, WB_SR / 2], [1, 0], weight=[1, 10], fs=WB_SR)


def isolation_sos() -> np.ndarray:
    """Elliptic high-pass that isolates the added band (above 3.4 kHz).

    Its phase is irrelevant (it filters synthetic content only), so an IIR filter
    keeps the latency low. Measured: <= -60 dB below 3300 Hz, 0.2 dB ripple above 3450 Hz.
    """
    return designs.stored("isolation")


def design_isolation() -> np.ndarray:
    """:func:`isolation_sos` designed afresh (scipy.signal.ellip)."""
    from scipy import signal

    return signal.ellip(ISOLATION_ORDER, 0.2, ISOLATION_STOP_DB, ISOLATION_PASS_HZ, btype="highpass", fs=WB_SR, output="sos")


def low_band_sos() -> np.ndarray:
    """The filter that isolates the added low band (about 50-300 Hz): elliptic low-pass (order 8,
    pass to 250 Hz) and elliptic high-pass (order 4, pass from 60 Hz), as second-order sections.

    Measured (tests/test_lowband.py): at or below -60 dB from 300 Hz up, so the telephone band is
    left alone; within 0.75 dB of 0 dB over 65-250 Hz; -11 dB at 50 Hz, below -29 dB under 40 Hz and
    below -40 dB under 30 Hz: no rumble. Like the high band's filter it is causal (IIR) and filters
    synthetic content only; its group delay is about 3 ms over 60-200 Hz (9 ms at 240 Hz).
    """
    return designs.stored("low_band")


def design_low_band() -> np.ndarray:
    """:func:`low_band_sos` designed afresh (scipy.signal.ellip, twice)."""
    from scipy import signal

    low = signal.ellip(8, 0.5, 60.0, LOW_PASS_HZ, fs=WB_SR, output="sos")
    high = signal.ellip(4, 0.5, 40.0, LOW_HIGHPASS_HZ, btype="highpass", fs=WB_SR, output="sos")
    return np.vstack([low, high])


@lru_cache(maxsize=None)
def upsampler_phases() -> tuple[np.ndarray, np.ndarray]:
    """The :func:`upsampler_taps` split into the even and odd output phases, each reversed (read-only):
    zero insertion followed by the FIR is, per output phase, a short FIR on the 8 kHz samples."""
    taps = upsampler_taps()
    even, odd = np.ascontiguousarray(taps[0::2][::-1]), np.ascontiguousarray(taps[1::2][::-1])
    even.flags.writeable = odd.flags.writeable = False
    return even, odd


UPSAMPLER_HISTORY = UPSAMPLER_TAPS // 2  # 8 kHz samples of interpolator state


def upsample_rows(x: np.ndarray, history: np.ndarray) -> np.ndarray:
    """Interpolate B rows of 8 kHz samples by 2: x [shape=(B, n)] -> [shape=(B, 2n)] at 16 kHz, delay
    UPSAMPLER_DELAY; ``history`` [shape=(B, UPSAMPLER_HISTORY)], each row's last inputs, is updated in place."""
    even, odd = upsampler_phases()
    return kernels.upsample2(np.ascontiguousarray(x, dtype=np.float64), history, even, odd)


INITIAL_LOG_GAIN = float(np.log(1e-9))  # the envelope every synthesis interpolates from at its start


class AllPoleSynthesizer:
    """``G / A(z)`` synthesis with per-sub-frame interpolated coefficients (:func:`nenv.dsp.kernels.synthesize`).

    Sub-frame envelopes are interpolated from the previous hop's to each hop's, linearly in the
    reflection coefficients (so every sub-frame is stable when the hops are) and in log gain;
    sub-frame ``j`` has weight ``(j+1)/n_sub`` on its own hop. The filter memory is the last
    ``order`` output samples (direct form), so a coefficient change at a sub-frame boundary
    continues the recursion on the true past output: no clicks at frame boundaries.
    Reflection coefficients are clamped to +-MAX_REFLECTION (NaN -> 0) before use.
    """

    def __init__(self, *, order: int, hop_length: int = HOP_WB, n_sub: int = N_SUBFRAMES, rows: int = 1):
        if hop_length % n_sub:
            raise ValueError(f"hop_length={hop_length} must be a multiple of n_sub={n_sub}")
        self.order = order
        self.hop_length = hop_length
        self.n_sub = n_sub
        self.past = np.zeros((rows, order))  # y[n-1], y[n-2], ..., y[n-order] per row
        self.k_prev = np.zeros((rows, order))
        self.log_g_prev = np.full(rows, INITIAL_LOG_GAIN)

    def add_rows(self, n: int) -> None:
        """Start ``n`` new calls, each from silence."""
        self.past = np.concatenate([self.past, np.zeros((n, self.order))])
        self.k_prev = np.concatenate([self.k_prev, np.zeros((n, self.order))])
        self.log_g_prev = np.concatenate([self.log_g_prev, np.full(n, INITIAL_LOG_GAIN)])

    def keep_rows(self, mask: np.ndarray) -> None:
        self.past, self.k_prev, self.log_g_prev = self.past[mask], self.k_prev[mask], self.log_g_prev[mask]

    def process(self, u: np.ndarray, *, k: np.ndarray, gain: np.ndarray) -> np.ndarray:
        """Synthesize one or more hops of one row.

        u : np.ndarray [shape=(n * hop_length,)], excitation
        k : np.ndarray [shape=(n, order)], reflection coefficients per hop (of stable envelopes)
        gain : np.ndarray [shape=(n,)], amplitude per hop (> 0)
        Returns np.ndarray [shape=(n * hop_length,)].
        """
        n = k.shape[0]
        if n == 0:
            return np.zeros(0)
        log_g = np.log(np.maximum(np.asarray(gain, dtype=np.float64), 1e-12))
        return self.rows(u.reshape(1, -1), k.reshape(1, n, self.order), log_g.reshape(1, n))[0]

    def rows(self, u: np.ndarray, k: np.ndarray, log_g: np.ndarray, sel=slice(None)) -> np.ndarray:
        """Synthesize H hops of the rows ``sel`` of the state: u [shape=(B, H * hop_length)],
        k [shape=(B, H, order)], log_g [shape=(B, H)] -> [shape=(B, H * hop_length)]."""
        past, k_prev, g_prev = self.past[sel], self.k_prev[sel], self.log_g_prev[sel]  # copies when sel is an index array
        y = kernels.synthesize(np.ascontiguousarray(u, dtype=np.float64), np.ascontiguousarray(k, dtype=np.float64), np.ascontiguousarray(log_g, dtype=np.float64), k_prev, g_prev, past, self.n_sub, MAX_REFLECTION)
        self.past[sel], self.k_prev[sel], self.log_g_prev[sel] = past, k_prev, g_prev
        return y
