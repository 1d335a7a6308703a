"""Compiled loops from predicted cepstra to a stable all-pole envelope with a set high-band power
(per row; see :mod:`nenv.dsp.kernels`). Two kernels with numpy's exponential between them: the
matrix products go to BLAS from inside the kernels (as fast as numpy's for hundreds of rows) and
the exponential stays numpy's vectorised one, so one row pays three calls instead of some thirty.
Same steps, in the same order, as :func:`nenv.dsp.cepstrum.from_cepstrum_stable` followed by
:func:`nenv.dsp.cepstrum.power_spectrum` over the band, which are the references in the tests.
"""

from __future__ import annotations

import math

import numpy as np

from nenv.dsp import jit
from nenv.dsp.lpc_loops import levinson


@jit.plain
def _nan_max(x, y):
    """numpy.maximum on two floats: NaN if either is NaN."""
    if x != x or y != y:
        return x + y
    return x if x >= y else y


@jit.plain
def log_spectrum(ceps, cos, floor):
    """Twice the log magnitude of each row's cepstral series, relative to its peak and floored.

    ceps [shape=(B, m)] c_1..c_m (c_0 = 0; non-finite values count as 0); cos [shape=(>= m + 1, bins)]
    cos(i w) on the grid; floor < 0 in nepers. Returns S [shape=(B, bins)] = 2 max(L - top, floor)
    with L = sum_i c_i cos(i w), and top [shape=(B,)] = max L (NaN propagates as in numpy).
    """
    n, m = ceps.shape
    c = np.zeros((n, m + 1))
    for b in range(n):
        for i in range(m):
            v = ceps[b, i]
            c[b, i + 1] = v if np.isfinite(v) else 0.0
    out = c @ cos[: m + 1]
    top = np.empty(n)
    for b in range(n):
        t = out[b, 0]
        for f in range(1, out.shape[1]):
            t = _nan_max(t, out[b, f])
        top[b] = t
        for f in range(out.shape[1]):
            out[b, f] = 2.0 * _nan_max(out[b, f] - t, floor)
    return out, top


@jit.plain
def fit_envelope(power, inv_cos, order, silent_energy, band_cos, band_sin, top, energy_db, level_db, n_fft):
    """All-pole fit of each row's power spectrum, and the gain that sets its high-band power.

    power [shape=(B, bins)] exp(S) of :func:`log_spectrum`; inv_cos [shape=(bins, order + 1)] the
    inverse-FFT weights (``power @ inv_cos`` = the autocorrelation); band_cos/band_sin
    [shape=(order + 1, band bins)] cos/sin(i w) on the band's bins of the n_fft grid; top, energy_db,
    level_db [shape=(B,)]. Returns a [shape=(B, order + 1)], gain [shape=(B,)] (G / A(z) has power
    10**((energy_db + level_db) / 10) in the band for a unit-power white input; inf or NaN for an
    absurd input), k [shape=(B, order)] the reflection coefficients of the recursion.
    """
    n = power.shape[0]
    r = power @ inv_cos
    a, k, err = levinson(r, order, silent_energy)
    re = a @ band_cos
    im = a @ band_sin
    gain = np.empty(n)
    for b in range(n):
        g0 = math.sqrt(_nan_max(err[b], 0.0)) * math.exp(top[b])
        g2 = g0 * g0
        acc = 0.0
        for f in range(re.shape[1]):
            acc += g2 / _nan_max(re[b, f] * re[b, f] + im[b, f] * im[b, f], 1e-300)
        model = 2.0 * acc / n_fft
        target = 10.0 ** ((energy_db[b] + level_db[b]) / 10.0)
        gain[b] = g0 * math.sqrt(target / model)
    return a, gain, k


@jit.plain
def band_level_db(a, gain, band_cos, band_sin, energy_db, n_fft):
    """Power of each envelope ``gain / A`` for a unit-power white input over a band, in dB re the
    frame power ``energy_db``: 10 log10(2 sum_band gain^2 / |A|^2 / n_fft) - energy_db, per row.

    a [shape=(B, p + 1)]; band_cos/band_sin [shape=(p + 1, band bins)] on the n_fft grid. NaN and
    inf pass through (a zero gain gives -inf). Returns [shape=(B,)].
    """
    re = a @ band_cos
    im = a @ band_sin
    out = np.empty(a.shape[0])
    for b in range(a.shape[0]):
        g2 = gain[b] * gain[b]
        acc = 0.0
        for f in range(re.shape[1]):
            acc += g2 / _nan_max(re[b, f] * re[b, f] + im[b, f] * im[b, f], 1e-300)
        out[b] = 10.0 * np.log10(2.0 * acc / n_fft) - energy_db[b]
    return out
