"""Cepstra and spectra of all-pole models: the recursion both ways, the always-stable route, power spectra.

Conventions are those of :mod:`nenv.dsp.lpc`: cepstra are those of the log *magnitude*
``ln|G / A(e^jw)|`` (``c_0 = ln G``, ``ln|H(w)| = c_0 + sum_{n>=1} c_n cos(n w)``).
Short cosine series and band-limited spectra are evaluated as matrix products
(cheaper than an FFT of the whole grid for a few terms).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from nenv.dsp import kernels
from nenv.dsp.lpc import levinson

STABLE_FLOOR_DB = 80.0  # dB below the peak: floor of the spectrum in the always-stable route
STABLE_FLOOR_NEPERS = -STABLE_FLOOR_DB * np.log(10) / 20  # the same floor on the natural-log magnitude
STABLE_N_FFT = 512  # grid of the always-stable route


@lru_cache(maxsize=None)
def band_bins(lo_hz: float, hi_hz: float, *, n_fft: int, sr: int) -> tuple[int, int]:
    """First and last bin of the rfft grid of ``n_fft`` points at ``sr`` inside ``lo_hz..hi_hz``
    (both edges included): the ``bins`` argument of :func:`power_spectrum` and :func:`squared_magnitude`."""
    f = np.fft.rfftfreq(n_fft, 1 / sr)
    sel = np.flatnonzero((f >= lo_hz) & (f <= hi_hz))
    if sel.size == 0:
        raise ValueError(f"no bin of a {n_fft}-point grid at {sr} Hz lies in {lo_hz}-{hi_hz} Hz")
    return int(sel[0]), int(sel[-1])


def cosine_table(n_terms: int, n_fft: int, first_bin: int = 0, last_bin: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """cos(i w_k) and sin(i w_k) [shape=(n_terms, bins)] for i < n_terms on rfft bins first_bin..last_bin
    of an n_fft grid (read-only, computed once): the tables of a short polynomial's spectrum."""
    return _cosines(n_terms, n_fft, first_bin, last_bin)


@lru_cache(maxsize=None)
def _cosines(n_terms: int, n_fft: int, first_bin: int = 0, last_bin: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """cos(i w_k) and sin(i w_k) for i < n_terms on rfft bins first_bin..last_bin of an n_fft grid."""
    last = n_fft // 2 if last_bin is None else last_bin
    w = 2 * np.pi * np.arange(first_bin, last + 1) / n_fft
    arg = np.outer(np.arange(n_terms), w)
    c, s = np.cos(arg), np.sin(arg)
    c.flags.writeable = s.flags.writeable = False
    return c, s


def to_cepstrum(a: np.ndarray, *, n_ceps: int, gain: np.ndarray | None = None) -> np.ndarray:
    """Cepstrum of the all-pole model ``G / A(z)`` by the standard recursion.

    ``c_0 = ln G``; for n >= 1, ``c_n = -a_n - sum_{k=1}^{n-1} (k/n) c_k a_{n-k}``
    with ``a_n = 0`` for n > p (Markel & Gray, *Linear Prediction of Speech*, 1976;
    Rabiner & Schafer, *Digital Processing of Speech Signals*, 1978), compiled
    (:func:`nenv.dsp.kernels.to_cepstrum`) on ``d_n = n c_n``.

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
    c = kernels.to_cepstrum(np.ascontiguousarray(a.reshape(-1, p + 1)), n_ceps).reshape(a.shape[:-1] + (n_ceps + 1,))
    if gain is not None:
        c[..., 0] = np.log(np.maximum(gain, 1e-300))
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


def from_cepstrum_stable(c: np.ndarray, *, order: int, n_fft: int = STABLE_N_FFT, with_reflection: bool = False) -> tuple[np.ndarray, ...]:
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
    k : np.ndarray [shape=(..., order)], only with ``with_reflection``: the reflection
        coefficients the Levinson-Durbin recursion produced on the way (those of ``a``)
    """
    logmag = log_magnitude(np.asarray(c, dtype=np.float64), n_fft=n_fft)
    top = logmag.max(axis=-1, keepdims=True)
    # Spectrum relative to its peak, floored at -STABLE_FLOOR_DB: keeps Levinson well
    # conditioned in float64 however extreme the cepstrum.
    logmag -= top
    np.maximum(logmag, STABLE_FLOOR_NEPERS, out=logmag)
    logmag *= 2.0
    r = np.exp(logmag, out=logmag) @ inverse_cosines(order + 1, n_fft)  # = irfft(...)[:order+1]
    a, k, err = levinson(r, order=order)
    with np.errstate(over="ignore"):  # an absurd c_0 gives gain = inf, which the guard rejects
        gain = np.sqrt(np.maximum(err, 0.0)) * np.exp(top[..., 0])
    return (a, gain, k) if with_reflection else (a, gain)


@lru_cache(maxsize=None)
def inverse_cosines(n_lags: int, n_fft: int) -> np.ndarray:
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
    g = np.asarray(gain, dtype=np.float64)[..., None]
    return g * g / np.maximum(squared_magnitude(a, n_fft=n_fft, bins=bins), 1e-300)


def squared_magnitude(a: np.ndarray, *, n_fft: int = 512, bins: tuple[int, int] | None = None) -> np.ndarray:
    """``|A(e^jw)|**2`` on the rfft grid (or its bins ``first..last``), as two matrix products.

    a : np.ndarray [shape=(..., p+1)] -> np.ndarray [shape=(..., n_fft//2+1)] (or last-first+1)
    """
    a = np.asarray(a, dtype=np.float64)
    cos, sin = _cosines(a.shape[-1], n_fft, *(bins or (0, None)))
    re, im = a @ cos, a @ sin
    re *= re
    im *= im
    re += im
    return re
