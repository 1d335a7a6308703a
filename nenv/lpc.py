"""Framing, autocorrelation, Levinson-Durbin, reflection coefficients and cepstra.

Conventions used throughout nenv:

* The inverse (analysis) filter is ``A(z) = 1 + sum_{k=1..p} a_k z^-k``; arrays
  of predictor coefficients hold ``[1, a_1, ..., a_p]`` in their last axis.
* Reflection coefficients ``k_i`` are the ones the Levinson-Durbin recursion
  produces with that sign (``a_i^(i) = k_i``); ``A`` is minimum phase (the
  synthesis filter ``1/A`` is stable) exactly when every ``|k_i| < 1``.
* ``gain`` is the amplitude ``G`` of the all-pole model ``G / A(z)``: for an
  analysis frame, ``G**2`` is the prediction-error power per sample.
* Cepstra are those of the log *magnitude* ``ln|G / A(e^jw)|``:
  ``c_0 = ln G`` and ``ln|H(w)| = c_0 + sum_{n>=1} c_n cos(n w)``; for n >= 1 these
  are the complex cepstrum of the minimum-phase model, i.e. twice the real
  cepstrum (inverse FFT of ``ln|H|``).

Everything is vectorised over frames: the leading axes are frames, the last
axis is samples, lags or coefficients.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

LAG_WINDOW_HZ = 60.0  # Hz, Gaussian lag-window bandwidth (ITU-T G.729 clause 3.2.1 uses 60 Hz)
WHITE_NOISE_CORRECTION = 1.0001  # r[0] factor = -40 dB noise floor (ITU-T G.729 clause 3.2.1)
STABLE_FLOOR_DB = 80.0  # dB below the peak: floor of the spectrum in the always-stable route


class FrameBuffer:
    """Streaming version of :func:`frame`: keeps the last ``frame_length - hop_length`` samples.

    ``push`` takes any whole number of hops and returns their frames; pushing a
    signal in pieces gives the same frames as framing it at once.
    """

    def __init__(self, *, frame_length: int, hop_length: int):
        if frame_length < hop_length:
            raise ValueError(f"frame_length={frame_length} must be >= hop_length={hop_length}")
        self.frame_length = frame_length
        self.hop_length = hop_length
        self._history = np.zeros(frame_length - hop_length)

    def push(self, y: np.ndarray) -> np.ndarray:
        """Frames of the hops in ``y`` [shape=(len(y) // hop, frame_length)]; len(y) must be whole hops."""
        if y.size % self.hop_length:
            raise ValueError(f"push takes whole hops of {self.hop_length} samples, got {y.size}")
        buf = np.concatenate([self._history, np.asarray(y, dtype=np.float64)])
        if self._history.size:
            self._history = buf[buf.size - self._history.size :].copy()
        n_frames = y.size // self.hop_length
        if n_frames == 0:
            return np.zeros((0, self.frame_length))
        view = np.lib.stride_tricks.sliding_window_view(buf, self.frame_length)
        return view[:: self.hop_length][:n_frames]


def frame(y: np.ndarray, *, frame_length: int, hop_length: int) -> np.ndarray:
    """Cut ``y`` into overlapping frames that end at each hop's last sample.

    Frame ``t`` holds ``y[(t+1)*hop - frame_length : (t+1)*hop]``, zeros before the start.
    Only whole hops are framed.

    Parameters
    ----------
    y : np.ndarray [shape=(n,)]
    frame_length, hop_length : int > 0 [samples]

    Returns
    -------
    np.ndarray [shape=(n // hop_length, frame_length)], a read-only view where possible
    """
    n_whole = (y.size // hop_length) * hop_length
    return FrameBuffer(frame_length=frame_length, hop_length=hop_length).push(y[:n_whole])


@lru_cache(maxsize=None)
def asymmetric_window(length: int) -> np.ndarray:
    """The ITU-T G.729 (clause 3.2.1) style asymmetric analysis window.

    A half Hamming window over the first 5/6 of the frame and a quarter cosine
    over the last 1/6; for 240 samples this is G.729's 200 + 40 window. Its peak
    sits ``length/6`` samples before the frame end, which on nenv's grid (30 ms
    frames, 10 ms hops) is the centre of the current hop.

    Returns
    -------
    np.ndarray [shape=(length,)], read-only
    """
    l1 = (5 * length) // 6
    l2 = length - l1
    n1 = np.arange(l1)
    n2 = np.arange(l2)
    w = np.concatenate([0.54 - 0.46 * np.cos(2 * np.pi * n1 / (2 * l1 - 1)), np.cos(2 * np.pi * n2 / (4 * l2 - 1))])
    w.flags.writeable = False
    return w


def autocorrelation(frames: np.ndarray, *, order: int) -> np.ndarray:
    """Biased autocorrelation ``r[k] = sum_n x[n] x[n+k]`` for lags 0..order.

    frames : np.ndarray [shape=(..., L)] -> np.ndarray [shape=(..., order+1)]
    """
    length = frames.shape[-1]
    if order <= DIRECT_MAX_ORDER:  # a few lags: direct products beat an FFT of the whole frame
        x = np.asarray(frames, dtype=np.float64)
        r = np.empty(x.shape[:-1] + (order + 1,))
        for k in range(order + 1):
            r[..., k] = np.einsum("...n,...n->...", x[..., : length - k], x[..., k:])
        return r
    n_fft = 1 << int(np.ceil(np.log2(length + order + 1)))
    spec = np.fft.rfft(frames, n=n_fft, axis=-1)
    return np.fft.irfft(spec.real**2 + spec.imag**2, n=n_fft, axis=-1)[..., : order + 1]


DIRECT_MAX_ORDER = 24  # autocorrelation up to this many lags by direct products, beyond by FFT


@lru_cache(maxsize=None)
def _cosines(n_terms: int, n_fft: int, first_bin: int = 0, last_bin: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """cos(i w_k) and sin(i w_k) for i < n_terms on rfft bins first_bin..last_bin of an n_fft grid."""
    last = n_fft // 2 if last_bin is None else last_bin
    w = 2 * np.pi * np.arange(first_bin, last + 1) / n_fft
    arg = np.outer(np.arange(n_terms), w)
    c, s = np.cos(arg), np.sin(arg)
    c.flags.writeable = s.flags.writeable = False
    return c, s


def condition(r: np.ndarray, *, sr: int, lag_window_hz: float = LAG_WINDOW_HZ, white_noise: float = WHITE_NOISE_CORRECTION) -> np.ndarray:
    """Apply a Gaussian lag window and white-noise correction to autocorrelations.

    Both are common practice in speech codecs (ITU-T G.729 clause 3.2.1 uses
    60 Hz and 1.0001): the lag window widens sharp formant peaks, the
    correction lifts the spectral floor by -40 dB, keeping Levinson-Durbin
    well-conditioned.

    r : np.ndarray [shape=(..., p+1)]; sr : int [Hz] -> np.ndarray, same shape
    """
    lags = np.arange(r.shape[-1])
    w = np.exp(-0.5 * (2 * np.pi * lag_window_hz * lags / sr) ** 2)
    w[0] = white_noise
    return r * w


# Autocorrelation energy below which a frame counts as silent: samples of about 1e-140 full scale,
# thousands of dB below any real signal, where r's values near the bottom of float64's range
# keep too few bits for the recursion (the white-noise correction is lost in rounding).
SILENT_ENERGY = 1e-280


def levinson(r: np.ndarray, *, order: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Levinson-Durbin recursion, vectorised over frames.

    Parameters
    ----------
    r : np.ndarray [shape=(..., >= order+1)], autocorrelation, lag 0 first
    order : int > 0

    Returns
    -------
    a : np.ndarray [shape=(..., order+1)], ``[1, a_1..a_p]``
    k : np.ndarray [shape=(..., order)], reflection coefficients
    err : np.ndarray [shape=(...)], final prediction-error energy (same unit as r[0])

    Frames with ``r[0] <= SILENT_ENERGY`` (digital silence, or values so small that float64
keeps only a few bits of them) get ``a = [1, 0, ...]``, ``k = 0``, ``err = 0``.
    """
    r = np.asarray(r, dtype=np.float64)
    lead = r.shape[:-1]
    r = r.reshape(-1, r.shape[-1])[:, : order + 1]
    n = r.shape[0]
    if n <= SCALAR_MAX_ROWS:
        a, k, err = _levinson_scalar(r, order)
        return a.reshape(*lead, order + 1), k.reshape(*lead, order), err.reshape(lead)
    silent = ~(r[:, 0] > SILENT_ENERGY)
    r = np.where(silent[:, None], np.eye(1, order + 1), r)
    a = np.zeros((n, order + 1))
    a[:, 0] = 1.0
    k = np.zeros((n, order))
    err = r[:, 0].copy()
    for i in range(1, order + 1):
        acc = np.einsum("nj,nj->n", a[:, :i], r[:, i:0:-1])
        ki = -acc / err
        k[:, i - 1] = ki
        a[:, 1:i] = a[:, 1:i] + ki[:, None] * a[:, i - 1 : 0 : -1]
        a[:, i] = ki
        err = err * (1.0 - ki * ki)
    err = np.where(silent, 0.0, err)
    return a.reshape(*lead, order + 1), k.reshape(*lead, order), err.reshape(lead)


SCALAR_MAX_ROWS = 2  # up to this many rows the order recursions run on Python floats (fewer, cheaper steps)


def _div(num: float, den: float) -> float:
    """num / den with IEEE results for den == 0 (as numpy gives), not an exception."""
    if den != 0.0:
        return num / den
    if num == 0.0 or math.isnan(num):
        return math.nan
    return math.copysign(math.inf, num) * math.copysign(1.0, den)


def _levinson_scalar(r: np.ndarray, order: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`levinson` for a few rows, on Python floats (same recursion, same edge cases)."""
    n = r.shape[0]
    a_out, k_out, e_out = np.zeros((n, order + 1)), np.zeros((n, order)), np.zeros(n)
    for row in range(n):
        rr = r[row].tolist()
        a = [1.0] + [0.0] * order
        if not rr[0] > SILENT_ENERGY:  # digital silence
            a_out[row] = a
            continue
        err = rr[0]
        ks = []
        for i in range(1, order + 1):
            acc = 0.0
            for j in range(i):
                acc += a[j] * rr[i - j]
            ki = -_div(acc, err)
            ks.append(ki)
            prev = a[:]
            for j in range(1, i):
                a[j] = prev[j] + ki * prev[i - j]
            a[i] = ki
            err = err * (1.0 - ki * ki)
        a_out[row], k_out[row], e_out[row] = a, ks, err
    return a_out, k_out, e_out


def analyse(frames: np.ndarray, *, order: int, sr: int) -> tuple[np.ndarray, np.ndarray]:
    """LPC analysis of raw frames: asymmetric window, conditioned autocorrelation, Levinson.

    Parameters
    ----------
    frames : np.ndarray [shape=(n, L)], unwindowed samples
    order : int > 0
    sr : int [Hz], for the lag window

    Returns
    -------
    a : np.ndarray [shape=(n, order+1)]
    gain : np.ndarray [shape=(n,)], amplitude G, G**2 = error power per sample
    """
    w = asymmetric_window(frames.shape[-1])
    r = condition(autocorrelation(frames * w, order=order), sr=sr)
    a, _, err = levinson(r, order=order)
    gain = np.sqrt(np.maximum(err, 0.0) / np.sum(w * w))
    return a, gain


def reflection(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Reflection coefficients by the step-down (backward Levinson) recursion.

    Parameters
    ----------
    a : np.ndarray [shape=(..., p+1)], ``[1, a_1..a_p]``

    Returns
    -------
    k : np.ndarray [shape=(..., p)]; entries below the first ``|k| >= 1`` are not meaningful
    stable : np.ndarray of bool [shape=(...)], True when every ``|k_i| < 1``
    """
    a = np.asarray(a, dtype=np.float64)
    lead = a.shape[:-1]
    p = a.shape[-1] - 1
    if a.size <= SCALAR_MAX_ROWS * (p + 1):
        k, stable = _reflection_scalar(a.reshape(-1, p + 1))
        return k.reshape(*lead, p), stable.reshape(lead)
    cur = a.reshape(-1, p + 1)[:, 1:].copy()
    k = np.zeros_like(cur)
    stable = np.ones(cur.shape[0], dtype=bool)
    for i in range(p, 0, -1):
        ki = cur[:, i - 1]
        k[:, i - 1] = ki
        stable &= np.abs(ki) < 1.0
        if i > 1:
            denom = 1.0 - ki * ki
            denom = np.where(np.abs(denom) < 1e-300, 1.0, denom)
            prev = cur[:, : i - 1]
            cur[:, : i - 1] = (prev - ki[:, None] * prev[:, ::-1]) / denom[:, None]
    return k.reshape(*lead, p), stable.reshape(lead)


def _reflection_scalar(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`reflection` for a few rows, on Python floats (same recursion, same edge cases)."""
    n, p = a.shape[0], a.shape[1] - 1
    k_out, st_out = np.zeros((n, p)), np.ones(n, dtype=bool)
    for row in range(n):
        cur = a[row, 1:].tolist()
        ks = [0.0] * p
        stable = True
        for i in range(p, 0, -1):
            ki = cur[i - 1]
            ks[i - 1] = ki
            stable = stable and abs(ki) < 1.0
            if i > 1:
                denom = 1.0 - ki * ki
                if abs(denom) < 1e-300:
                    denom = 1.0
                prev = cur[: i - 1]
                cur[: i - 1] = [(prev[j] - ki * prev[i - 2 - j]) / denom for j in range(i - 1)]  # |denom| >= 1e-300
        k_out[row], st_out[row] = ks, stable
    return k_out, st_out


def is_stable(a: np.ndarray, *, margin: float = 0.0) -> np.ndarray:
    """True where every reflection coefficient satisfies ``|k| < 1 - margin`` (step-down test).

    a : np.ndarray [shape=(..., p+1)] -> np.ndarray of bool [shape=(...)]
    """
    k, stable = reflection(a)
    return stable & np.all(np.abs(k) < 1.0 - margin, axis=-1)


def from_reflection(k: np.ndarray) -> np.ndarray:
    """Predictor coefficients from reflection coefficients (step-up recursion).

    k : np.ndarray [shape=(..., p)] -> a : np.ndarray [shape=(..., p+1)]
    """
    k = np.asarray(k, dtype=np.float64)
    lead = k.shape[:-1]
    p = k.shape[-1]
    kk = k.reshape(-1, p)
    if kk.shape[0] <= SCALAR_MAX_ROWS:
        out = np.zeros((kk.shape[0], p + 1))
        for row in range(kk.shape[0]):
            a = [1.0] + [0.0] * p
            for i, ki in enumerate(kk[row].tolist(), start=1):
                prev = a[:]
                for j in range(1, i):
                    a[j] = prev[j] + ki * prev[i - j]
                a[i] = ki
            out[row] = a
        return out.reshape(*lead, p + 1)
    a = np.zeros((kk.shape[0], p + 1))
    a[:, 0] = 1.0
    for i in range(1, p + 1):
        ki = kk[:, i - 1]
        a[:, 1:i] = a[:, 1:i] + ki[:, None] * a[:, i - 1 : 0 : -1]
        a[:, i] = ki
    return a.reshape(*lead, p + 1)


def to_cepstrum(a: np.ndarray, *, n_ceps: int, gain: np.ndarray | None = None) -> np.ndarray:
    """Cepstrum of the all-pole model ``G / A(z)`` by the standard recursion.

    ``c_0 = ln G``; for n >= 1, ``c_n = -a_n - sum_{k=1}^{n-1} (k/n) c_k a_{n-k}``
    with ``a_n = 0`` for n > p (Markel & Gray, *Linear Prediction of Speech*, 1976;
    Rabiner & Schafer, *Digital Processing of Speech Signals*, 1978).

    Parameters
    ----------
    a : np.ndarray [shape=(..., p+1)]
    n_ceps : int >= 1, number of coefficients after c_0
    gain : np.ndarray [shape=(...)] or None (then c_0 = 0)

    Returns
    -------
    np.ndarray [shape=(..., n_ceps+1)], ``[c_0, c_1, ..., c_n_ceps]``
    """
    a = np.asarray(a, dtype=np.float64)
    p = a.shape[-1] - 1
    c = np.zeros(a.shape[:-1] + (n_ceps + 1,))
    if gain is not None:
        c[..., 0] = np.log(np.maximum(gain, 1e-300))
    if a.ndim == 2 and a.shape[0] <= SCALAR_MAX_ROWS:  # the same recursion on Python floats
        for row in range(a.shape[0]):
            ar, cr = a[row].tolist() + [0.0] * max(0, n_ceps - p), c[row].tolist()
            for n in range(1, n_ceps + 1):
                acc = -ar[n]
                for k in range(max(1, n - p), n):
                    acc = acc - (k / n) * cr[k] * ar[n - k]
                cr[n] = acc
            c[row] = cr
        return c
    for n in range(1, n_ceps + 1):
        acc = -a[..., n] if n <= p else np.zeros(a.shape[:-1])
        for k in range(max(1, n - p), n):
            acc = acc - (k / n) * c[..., k] * a[..., n - k]
        c[..., n] = acc
    return c


def from_cepstrum(c: np.ndarray, *, order: int) -> tuple[np.ndarray, np.ndarray]:
    """Predictor coefficients from cepstra by inverting the recursion.

    ``a_n = -c_n - sum_{k=1}^{n-1} (k/n) c_k a_{n-k}`` for n = 1..order. Exact for
    cepstra of an all-pole model of that order, but *not* guaranteed stable for
    arbitrary cepstra (e.g. a network's output): use :func:`from_cepstrum_stable` there.

    Returns
    -------
    a : np.ndarray [shape=(..., order+1)]; gain : np.ndarray [shape=(...)] = exp(c_0)
    """
    c = np.asarray(c, dtype=np.float64)
    a = np.zeros(c.shape[:-1] + (order + 1,))
    a[..., 0] = 1.0
    n_c = c.shape[-1] - 1
    for n in range(1, order + 1):
        acc = -c[..., n] if n <= n_c else np.zeros(c.shape[:-1])
        for k in range(1, n):
            if k <= n_c:
                acc = acc - (k / n) * c[..., k] * a[..., n - k]
        a[..., n] = acc
    return a, np.exp(c[..., 0])


def log_magnitude(c: np.ndarray, *, n_fft: int) -> np.ndarray:
    """``ln|H(w)| = c_0 + sum_{n>=1} c_n cos(n w)`` on the rfft grid.

    c : np.ndarray [shape=(..., m+1)] -> np.ndarray [shape=(..., n_fft//2+1)]
    """
    m = c.shape[-1] - 1
    if m >= n_fft // 2:
        raise ValueError(f"n_fft={n_fft} is too small for {m} cepstral coefficients")
    cos, _ = _cosines(m + 1, n_fft)  # a cosine series of a few terms: one matrix product
    return np.asarray(c, dtype=np.float64) @ cos


def from_cepstrum_stable(c: np.ndarray, *, order: int, n_fft: int = 512) -> tuple[np.ndarray, np.ndarray]:
    """Always-stable route from cepstra to an all-pole model of ``order``.

    cepstrum -> log magnitude -> power spectrum -> autocorrelation (inverse FFT)
    -> Levinson-Durbin. The autocorrelation of a positive power spectrum is
    positive definite, so the result is minimum phase for *any* finite cepstrum;
    it is the order-``order`` all-pole fit of the envelope the cepstrum describes.

    Returns
    -------
    a : np.ndarray [shape=(..., order+1)]
    gain : np.ndarray [shape=(...)], amplitude G with G**2 the model's error power;
        +inf (never NaN) when the cepstrum's level overflows float64
    """
    logmag = log_magnitude(np.asarray(c, dtype=np.float64), n_fft=n_fft)
    top = np.max(logmag, axis=-1, keepdims=True)
    # Spectrum relative to its peak, floored at -STABLE_FLOOR_DB: keeps Levinson well
    # conditioned in float64 however extreme the cepstrum.
    rel = np.maximum(logmag - top, -STABLE_FLOOR_DB * np.log(10) / 20)
    r = np.exp(2.0 * rel) @ _inverse_cosines(order + 1, n_fft)  # = irfft(...)[:order+1]
    a, _, err = levinson(r, order=order)
    with np.errstate(over="ignore"):  # an absurd c_0 gives gain = inf, which the guard rejects
        gain = np.sqrt(np.maximum(err, 0.0)) * np.exp(top[..., 0])
    return a, gain


@lru_cache(maxsize=None)
def _inverse_cosines(n_lags: int, n_fft: int) -> np.ndarray:
    """W with ``S @ W == irfft(S, n_fft)[..., :n_lags]`` for real, even spectra S on the rfft grid."""
    cos, _ = _cosines(n_lags, n_fft)
    wt = np.full(n_fft // 2 + 1, 2.0 / n_fft)
    wt[0] = wt[-1] = 1.0 / n_fft
    w = (cos * wt).T.copy()
    w.flags.writeable = False
    return w


def power_spectrum(a: np.ndarray, *, gain: np.ndarray | float = 1.0, n_fft: int = 512, bins: tuple[int, int] | None = None) -> np.ndarray:
    """Envelope power ``G**2 / |A(e^jw)|**2`` on the rfft grid (or its bins ``first..last``).

    A polynomial of a few terms is evaluated as two matrix products (cosine and sine
    parts), cheaper than an FFT of the whole grid.

    a : np.ndarray [shape=(..., p+1)] -> np.ndarray [shape=(..., n_fft//2+1)] (or last-first+1)
    """
    a = np.asarray(a, dtype=np.float64)
    cos, sin = _cosines(a.shape[-1], n_fft, *(bins or (0, None)))
    re, im = a @ cos, a @ sin
    g = np.asarray(gain, dtype=np.float64)[..., None]
    return g * g / np.maximum(re * re + im * im, 1e-300)
