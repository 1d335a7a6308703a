"""All-pole synthesis, band isolation and mixing with the narrowband signal.

Every class here is a causal stage with its state carried across calls, so a
signal processed in pieces gives the same output as processed at once.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import signal
from scipy.linalg import lapack

from nenv import filters, lpc
from nenv.settings import BAND_EDGE_HZ, HOP_NB, HOP_WB, N_SUBFRAMES, WB_SR

UPSAMPLER_TAPS = 47  # at 16 kHz, linear phase
UPSAMPLER_DELAY = (UPSAMPLER_TAPS - 1) // 2  # samples at 16 kHz = 1.44 ms
ISOLATION_ORDER = 10  # elliptic high-pass that keeps only the new band
ISOLATION_PASS_HZ = BAND_EDGE_HZ + 50.0  # Hz, pass-band edge (0.2 dB ripple)
ISOLATION_STOP_DB = 60.0  # dB of rejection, reached by 3300 Hz
MAX_REFLECTION = 0.9999  # |k| ceiling applied before synthesis


@lru_cache(maxsize=None)
def upsampler_taps() -> np.ndarray:
    """Interpolation low-pass for 8 -> 16 kHz, with the x2 gain of zero insertion.

    Parks-McClellan, pass 0-3500 Hz (+-0.06 dB), stop from 4500 Hz (<= -63 dB): the
    telephone band passes untouched and its image above 4.6 kHz is removed.
    """
    return 2.0 * signal.remez(UPSAMPLER_TAPS, [0, 3500, 4500, WB_SR / 2], [1, 0], weight=[1, 10], fs=WB_SR)


@lru_cache(maxsize=None)
def isolation_sos() -> np.ndarray:
    """Elliptic high-pass that isolates the added band (above 3.4 kHz).

    Its phase is irrelevant (it filters synthetic content only), so an IIR filter
    keeps the latency low. Measured: <= -60 dB below 3300 Hz, 0.2 dB ripple above 3450 Hz.
    """
    return signal.ellip(ISOLATION_ORDER, 0.2, ISOLATION_STOP_DB, ISOLATION_PASS_HZ, btype="highpass", fs=WB_SR, output="sos")


class FirStage:
    """FIR filter with state."""

    def __init__(self, taps: np.ndarray):
        self.taps = taps
        self._zi = np.zeros(taps.size - 1)

    def process(self, x: np.ndarray) -> np.ndarray:
        if x.size == 0:
            return np.zeros(0)
        y, self._zi = signal.lfilter(self.taps, [1.0], x, zi=self._zi)
        return y


class SosStage:
    """IIR filter in second-order sections with state (:func:`nenv.filters.sos`)."""

    def __init__(self, sos: np.ndarray):
        self.sos = np.ascontiguousarray(sos, dtype=np.float64)
        self._zi = np.zeros((1, sos.shape[0], 2))

    def process(self, x: np.ndarray) -> np.ndarray:
        if x.size == 0:
            return np.zeros(0)
        y, self._zi = filters.sos(self.sos, x[None, :], self._zi)
        return y[0]


@lru_cache(maxsize=None)
def upsampler_matrix(hop: int = HOP_NB) -> np.ndarray:
    """The interpolator for one hop as a banded (Toeplitz) matrix: 8 kHz history + hop -> 16 kHz hop.

    Zero insertion followed by the :func:`upsampler_taps` FIR is, per output phase, a short
    FIR on the 8 kHz samples (even taps -> even outputs, odd taps -> odd outputs). A hop's
    input vector ``[last UPSAMPLER_HISTORY samples, the hop]`` times this matrix gives the
    hop's ``2 * hop`` outputs, interleaved; every hop of every call is one row of a single
    matrix product (mostly zeros, still cheaper than per-tap work on small arrays).

    Returns np.ndarray [shape=(UPSAMPLER_HISTORY + hop, 2 * hop)], read-only.
    """
    taps = upsampler_taps()
    even, odd = taps[0::2][::-1], taps[1::2][::-1]
    t = np.zeros((UPSAMPLER_HISTORY + hop, 2 * hop))
    for m in range(hop):
        t[m : m + even.size, 2 * m] = even
        t[m + 1 : m + 1 + odd.size, 2 * m + 1] = odd
    t.flags.writeable = False
    return t


UPSAMPLER_HISTORY = UPSAMPLER_TAPS // 2  # 8 kHz samples of interpolator state


def upsample_hops(buf: np.ndarray, n_hops: int) -> np.ndarray:
    """Interpolate ``n_hops`` hops per row: buf [shape=(B, UPSAMPLER_HISTORY + n_hops * HOP_NB)]
    (each row's history, then its hops) -> [shape=(B, n_hops * HOP_WB)]."""
    t = upsampler_matrix()
    segs = lpc.hop_frames(buf, frame_length=t.shape[0], hop_length=HOP_NB, n_frames=n_hops)
    return (segs.reshape(-1, t.shape[0]) @ t).reshape(buf.shape[0], n_hops * HOP_WB)


class Upsampler:
    """8 -> 16 kHz by zero insertion and the :func:`upsampler_taps` low-pass; delay UPSAMPLER_DELAY.

    Whole hops go through :func:`upsample_hops` (one matrix product); other lengths through
    the same polyphase FIR sample by sample. State: the last UPSAMPLER_HISTORY inputs.
    """

    def __init__(self):
        self._hist = np.zeros(UPSAMPLER_HISTORY)

    def process(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        if x.size == 0:
            return np.zeros(0)
        buf = np.concatenate([self._hist, x])
        self._hist = buf[x.size :].copy()
        if x.size % HOP_NB == 0:
            return upsample_hops(buf[None, :], x.size // HOP_NB)[0]
        taps = upsampler_taps()
        win = np.lib.stride_tricks.sliding_window_view(buf, UPSAMPLER_HISTORY + 1)
        y = np.empty(2 * x.size)
        y[0::2] = win @ taps[0::2][::-1]
        y[1::2] = win[:, 1:] @ taps[1::2][::-1]
        return y


class Delay:
    """Pure delay of ``n`` samples."""

    def __init__(self, n: int):
        self._buf = np.zeros(n)

    def process(self, x: np.ndarray) -> np.ndarray:
        if self._buf.size == 0:
            return x
        buf = np.concatenate([self._buf, x])
        self._buf = buf[x.size :].copy()
        return buf[: x.size]


def clamp_reflection(k: np.ndarray) -> np.ndarray:
    """Reflection coefficients ready for synthesis: NaN -> 0, then within +-MAX_REFLECTION."""
    return np.minimum(np.maximum(np.where(np.isnan(k), 0.0, k), -MAX_REFLECTION), MAX_REFLECTION)


def interpolate_envelopes(k_prev: np.ndarray, k: np.ndarray, log_g_prev, log_g: np.ndarray, *, n_sub: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-sub-frame envelopes interpolated from the previous frame to each frame.

    Interpolation is linear in the reflection coefficients (so every sub-frame
    is stable when the frames are) and linear in log gain. Sub-frame ``j`` of
    frame ``t`` has weight ``(j+1)/n_sub`` on frame ``t``. Leading axes (``...``)
    are independent streams: one call, or many calls batched.

    Parameters
    ----------
    k_prev : np.ndarray [shape=(..., p)], each stream's last frame before these
    k : np.ndarray [shape=(..., n, p)]
    log_g_prev : float or np.ndarray [shape=(...)]; log_g : np.ndarray [shape=(..., n)]

    Returns
    -------
    a : np.ndarray [shape=(..., n, n_sub, p+1)]; gain : np.ndarray [shape=(..., n, n_sub)]
    """
    k_before = np.concatenate([np.asarray(k_prev)[..., None, :], k[..., :-1, :]], axis=-2)
    g_before = np.concatenate([np.asarray(log_g_prev, dtype=np.float64)[..., None], log_g[..., :-1]], axis=-1)
    w, w_before = _sub_frame_weights(n_sub)
    k_sub = k_before[..., :, None, :] * w_before[:, None] + k[..., :, None, :] * w[:, None]
    g_sub = g_before[..., :, None] * w_before + log_g[..., :, None] * w
    return lpc.from_reflection(k_sub), np.exp(g_sub)


@lru_cache(maxsize=None)
def _sub_frame_weights(n_sub: int) -> tuple[np.ndarray, np.ndarray]:
    """Weights of each sub-frame on the current frame, ``(j+1)/n_sub``, and on the previous one (read-only)."""
    w = (np.arange(n_sub) + 1.0) / n_sub
    w_before = 1 - w
    w.flags.writeable = w_before.flags.writeable = False
    return w, w_before


class AllPoleSynthesizer:
    """``G / A(z)`` synthesis with per-sub-frame interpolated coefficients.

    The filter memory is the last ``order`` output samples (direct form), so a
    coefficient change at a sub-frame boundary continues the recursion on the
    true past output: no clicks at frame boundaries.
    """

    def __init__(self, *, order: int, hop_length: int = HOP_WB, n_sub: int = N_SUBFRAMES):
        if hop_length % n_sub:
            raise ValueError(f"hop_length={hop_length} must be a multiple of n_sub={n_sub}")
        self.order = order
        self.hop_length = hop_length
        self.n_sub = n_sub
        self._past = np.zeros(order)  # y[n-1], y[n-2], ..., y[n-order]
        self._k_prev = np.zeros(order)
        self._log_g_prev = np.log(1e-9)

    def process(self, u: np.ndarray, *, a: np.ndarray, gain: np.ndarray, k: np.ndarray | None = None) -> np.ndarray:
        """Synthesize one or more hops.

        Parameters
        ----------
        u : np.ndarray [shape=(n * hop_length,)], excitation
        a : np.ndarray [shape=(n, order+1)], stable predictor coefficients per hop
        gain : np.ndarray [shape=(n,)], amplitude per hop (> 0)
        k : np.ndarray [shape=(n, order)] or None, reflection coefficients of ``a`` if known

        Returns
        -------
        np.ndarray [shape=(n * hop_length,)]
        """
        n = a.shape[0]
        if n == 0:
            return np.zeros(0)
        if k is None:
            k, _ = lpc.reflection(a)
        k = clamp_reflection(k)
        log_g = np.log(np.maximum(gain, 1e-12))
        a_sub, g_sub = interpolate_envelopes(self._k_prev, k, self._log_g_prev, log_g, n_sub=self.n_sub)
        self._k_prev = k[-1].copy()
        self._log_g_prev = float(log_g[-1])
        u = u.reshape(1, n * self.n_sub, self.hop_length // self.n_sub)
        y, past = banded_synthesis(u, a_sub.reshape(1, n * self.n_sub, self.order + 1), g_sub.reshape(1, -1), self._past[None])
        self._past = past[0]
        return y.reshape(-1)


BANDED_MAX_ROWS = 16384  # rows of one banded solve (17 values each at order 16: ~2 MiB, within a core's L2 cache)


def banded_synthesis(u: np.ndarray, a_sub: np.ndarray, g_sub: np.ndarray, past: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """All-pole synthesis of consecutive sub-frames for B independent streams (calls), exactly.

    The recursion ``y[n] + sum_i a_i(n) y[n-i] = g(n) u[n]`` over a stretch of samples is a
    unit lower-triangular linear system with bandwidth ``order``, whose forward substitution
    *is* the recursion; LAPACK's banded triangular solver (``dtbtrs``, through
    ``scipy.linalg.lapack``) runs it in compiled code. Each stream's block starts with
    ``order`` identity rows holding its memory (the last ``order`` outputs), so any number
    of streams stack into one system without touching each other. The band is stored as
    the transpose of an upper-triangular band (``uplo='U', trans='T'``), whose column for
    sample ``n`` is ``[a_p(n), ..., a_1(n), 1]``: every sample's row is its sub-frame's
    coefficients reversed, written by one broadcast, with no skewed copy. Long stretches
    are cut into solves of at most ``BANDED_MAX_ROWS`` rows, the memory carried between them.

    Parameters
    ----------
    u : np.ndarray [shape=(B, J, L)], excitation of J sub-frames of L samples per stream
    a_sub : np.ndarray [shape=(B, J, order+1)]; g_sub : np.ndarray [shape=(B, J)]
    past : np.ndarray [shape=(B, order)], y[n-1], ..., y[n-order] of each stream

    Returns
    -------
    y : np.ndarray [shape=(B, J, L)]; past : np.ndarray [shape=(B, order)], updated
    """
    B, J, length = u.shape
    p = a_sub.shape[-1] - 1
    rows = J * length + p
    if rows <= BANDED_MAX_ROWS:  # whole streams, as many per solve as fit
        per = BANDED_MAX_ROWS // rows
        if per >= B:
            return _banded_solve(u, a_sub, g_sub, past)
        y, new_past = np.empty_like(u), np.empty_like(past)
        for b in range(0, B, per):
            y[b : b + per], new_past[b : b + per] = _banded_solve(u[b : b + per], a_sub[b : b + per], g_sub[b : b + per], past[b : b + per])
        return y, new_past
    span = max(1, (BANDED_MAX_ROWS - p) // length)  # sub-frames per solve, memory carried across solves
    y, new_past = np.empty_like(u), past.copy()
    for b in range(B):
        for j in range(0, J, span):
            y[b : b + 1, j : j + span], new_past[b : b + 1] = _banded_solve(u[b : b + 1, j : j + span], a_sub[b : b + 1, j : j + span], g_sub[b : b + 1, j : j + span], new_past[b : b + 1])
    return y, new_past


def _banded_solve(u: np.ndarray, a_sub: np.ndarray, g_sub: np.ndarray, past: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One ``dtbtrs`` call for B streams stacked (see :func:`banded_synthesis`)."""
    B, J, length = u.shape
    p = a_sub.shape[-1] - 1
    n = p + J * length
    band = np.empty((B, n, p + 1))  # C-order (rows, p+1) = Fortran-order band (p+1, rows): no copy on the way in
    band[:, :p] = 0.0  # memory rows: identity (the unit diagonal is implied)
    band[:, p:].reshape(B, J, length, p + 1)[...] = a_sub[:, :, None, ::-1]
    rhs = np.empty((B, n))
    rhs[:, :p] = past[:, ::-1]
    rhs[:, p:] = (g_sub[:, :, None] * u).reshape(B, -1)
    x, info = lapack.dtbtrs(band.reshape(B * n, p + 1).T, rhs.reshape(B * n, 1), uplo="U", trans="T", diag="U", overwrite_b=1)
    if info != 0:
        raise RuntimeError(f"dtbtrs: argument {-info} rejected")
    x = x.reshape(B, n)
    return x[:, p:].reshape(B, J, length), x[:, : -p - 1 : -1].copy()


def direct_synthesis(u: np.ndarray, a_sub: np.ndarray, g_sub: np.ndarray, past: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The same result as :func:`banded_synthesis` by the plain recursion, one sample at a time for all streams.

    ``y[n] = g u[n] - sum_i a_i y[n-i]``, each numpy operation serving all B streams: the
    cheaper route when many streams advance a few sub-frames (a gateway's hop), where
    one banded solve per stream-group costs more than J * L vector steps. Time runs
    along the first axis (streams along the second), so every step reads and writes
    contiguous memory.
    """
    B, J, length = u.shape
    p = a_sub.shape[-1] - 1
    n = J * length
    y = np.empty((p + n, B))
    y[:p] = past[:, ::-1].T
    gu = (g_sub[:, :, None] * u).reshape(B, n).T.copy()
    neg = np.ascontiguousarray((-a_sub[:, :, :0:-1]).transpose(1, 2, 0))  # (J, p, B): -a_p .. -a_1
    acc = np.empty(B)
    dot, add = filters.einsum, np.add  # 2 x J x L calls: no attribute lookups, no einsum dispatch
    for j in range(J):
        aj = neg[j]
        for t in range(j * length, (j + 1) * length):
            dot("ib,ib->b", aj, y[t : t + p], out=acc)
            add(gu[t], acc, out=y[p + t])
    return y[p:].T.reshape(B, J, length), y[: -p - 1 : -1].T.copy()
