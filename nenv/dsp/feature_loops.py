"""Compiled loops of the per-hop network inputs: frame measures, the voicing peak, context stacking and
the nearest codebook cell (per row; see :mod:`nenv.dsp.kernels`). Each replaces a run of small numpy
calls that cost one hop of one call more in Python than in arithmetic; the FFTs and large matrix
products stay with scipy/BLAS. :mod:`nenv.chain.features` and :mod:`nenv.chain.estimators.codebook`
document what is computed; their numpy formulations are the references in the tests.
"""

from __future__ import annotations

import math

import numpy as np

from nenv.dsp import jit
from nenv.dsp.lpc_loops import to_cepstrum


@jit.plain
def _db(power, floor_db):
    """max(10 log10(max(power, 1e-30)), floor_db) as numpy computes it (NaN propagates)."""
    v = 10.0 * math.log10(power if not power < 1e-30 else 1e-30)
    return v if not v < floor_db else floor_db


@jit.plain
def hop_measures(frames, window, a, gain, window_energy, n_ceps, hop, floor_db):
    """Per frame: cepstrum of 1/A, energy and prediction gain in dB, zero-crossing rate, and the
    windowed frame scaled to unit peak in single precision (the voicing's input).

    frames [shape=(B, L)] raw; window [shape=(L,)]; a [shape=(B, p + 1)]; gain [shape=(B,)] the
    all-pole gain. Returns ceps [shape=(B, n_ceps + 1)] (c_0 = 0), energy_db, prediction_gain_db
    (clamped to 0..60), zcr [shape=(B,)] (sign changes over the last ``hop`` samples and the one
    before, per sample) and xn [shape=(B, L)] float32.
    """
    n, length = frames.shape
    ceps = to_cepstrum(a, n_ceps)
    energy = np.empty(n)
    pred = np.empty(n)
    zcr = np.empty(n)
    xn = np.empty((n, length), dtype=np.float32)
    xw = np.empty(length)
    for b in range(n):
        peak = 0.0
        s = 0.0
        for i in range(length):
            v = frames[b, i] * window[i]
            xw[i] = v
            s += v * v
            if abs(v) > peak or v != v:
                peak = abs(v)
        energy[b] = _db(s / window_energy, floor_db)
        err = _db(gain[b] * gain[b], floor_db)
        d = energy[b] - err
        d = d if not d < 0.0 else 0.0
        pred[b] = d if not d > 60.0 else 60.0
        scale = peak if peak > 0 else 1.0
        for i in range(length):
            xn[b, i] = np.float32(xw[i] / scale)
        changes = 0
        for i in range(length - hop, length):
            if np.signbit(frames[b, i]) != np.signbit(frames[b, i - 1]):
                changes += 1
        zcr[b] = changes / hop
    return ceps, energy, pred, zcr, xn


@jit.plain
def voicing_peak(r, window_r, first_lag, last_lag):
    """Largest window-corrected normalised autocorrelation over lags first..last, clamped to [0, 1].

    r [shape=(B, >= last + 1)] float32 autocorrelations of the unit-peak frames; window_r
    [shape=(last - first + 1,)] the window's own autocorrelation at those lags over its lag 0.
    Rows with r[0] <= 0 (silence) give 0. Returns [shape=(B,)].
    """
    n = r.shape[0]
    out = np.zeros(n)
    for b in range(n):
        r0 = np.float64(r[b, 0])
        if not r0 > 0:
            continue
        best = np.float64(r[b, first_lag]) / r0 / window_r[0]
        for j in range(1, last_lag - first_lag + 1):
            v = np.float64(r[b, first_lag + j]) / r0 / window_r[j]
            if v > best or v != v:
                best = v
            if best != best:
                break
        best = best if not best < 0.0 else 0.0
        out[b] = best if not best > 1.0 else 1.0
    return out


@jit.plain
def stack_context(history, ready, feats, context):
    """Each hop's features with its call's ``context`` previous hops, oldest first.

    history [shape=(B, context * d)]; ready [shape=(B,)] bool, True where the call has hops already
    (else its history is its first hop repeated); feats [shape=(B, H, d)]. Returns stacked
    [shape=(B * H, (context + 1) * d)] and the new history [shape=(B, context * d)].
    """
    n, hops, d = feats.shape
    width = (context + 1) * d
    stacked = np.empty((n * hops, width))
    new_history = np.empty((n, context * d))
    line = np.empty((context + hops) * d)
    for b in range(n):
        for j in range(context * d):
            line[j] = history[b, j] if ready[b] else feats[b, 0, j % d]
        for h in range(hops):
            for j in range(d):
                line[(context + h) * d + j] = feats[b, h, j]
        for h in range(hops):
            for j in range(width):
                stacked[b * hops + h, j] = line[h * d + j]
        for j in range(context * d):
            new_history[b, j] = line[hops * d + j]
    return stacked, new_history


@jit.plain
def nearest_cell(feats, mean, std, centroids_t, centroid_norms):
    """Nearest codebook cell per row and its RMS distance per dimension, in normalised feature space.

    feats [shape=(B, d)] raw; mean, std [shape=(d,)]; centroids_t [shape=(d, K)] (normalised, one
    column per cell); centroid_norms [shape=(K,)]. Non-finite normalised values count as +-1e6 (NaN
    as +1e6). Returns cell [shape=(B,)] int64 and distance [shape=(B,)].
    """
    n, d = feats.shape
    z = np.empty((n, d))
    zz = np.empty(n)
    for b in range(n):
        s = 0.0
        for j in range(d):
            v = (feats[b, j] - mean[j]) / std[j]
            if v != v:
                v = 1e6
            elif v == np.inf:
                v = 1e6
            elif v == -np.inf:
                v = -1e6
            z[b, j] = v
            s += v * v
        zz[b] = s
    cross = z @ centroids_t
    cell = np.zeros(n, dtype=np.int64)
    dist = np.empty(n)
    for b in range(n):
        best = zz[b] - 2.0 * cross[b, 0] + centroid_norms[0]
        for c in range(1, cross.shape[1]):
            v = zz[b] - 2.0 * cross[b, c] + centroid_norms[c]
            if v < best:
                best = v
                cell[b] = c
        dist[b] = math.sqrt((best if best > 0.0 else 0.0) / d)
    return cell, dist


@jit.plain
def ramp_weights(value, gain, lo, hi, scale):
    """scale x (value - lo) / (hi - lo) clamped to [0, 1], per row; 0 where ``gain`` is not finite
    and positive (numpy.clip semantics: NaN stays NaN). value, gain [shape=(B,)] -> [shape=(B,)]."""
    out = np.empty(value.shape[0])
    for b in range(value.shape[0]):
        g = gain[b]
        if not (np.isfinite(g) and g > 0):
            out[b] = 0.0
            continue
        w = (value[b] - lo) / (hi - lo)
        w = w if not w < 0.0 else 0.0
        w = w if not w > 1.0 else 1.0
        out[b] = w * scale
    return out
