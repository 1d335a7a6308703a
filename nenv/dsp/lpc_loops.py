"""Compiled loops of linear prediction: autocorrelation, Levinson-Durbin, step-down/step-up, cepstra,
residual, and the band spectra the guard compares (per row; see :mod:`nenv.dsp.kernels`)."""

from __future__ import annotations

import math

import numpy as np

from nenv.dsp import jit


@jit.sums
def autocorrelation(x, order):
    """r[b, k] = sum_n x[b, n] x[b, n + k] for k = 0..order (biased, no normalisation).

    x [shape=(B, L)] -> r [shape=(B, order + 1)]
    """
    n_rows, length = x.shape
    r = np.zeros((n_rows, order + 1))
    for b in range(n_rows):
        for k in range(min(order, length - 1) + 1):
            s = 0.0
            for i in range(length - k):
                s += x[b, i] * x[b, i + k]
            r[b, k] = s
    return r


@jit.plain
def levinson(r, order, silent_energy):
    """Levinson-Durbin recursion per row (conventions of :mod:`nenv.dsp.lpc`).

    r [shape=(B, >= order + 1)] -> a [shape=(B, order + 1)], k [shape=(B, order)], err [shape=(B,)].
    Rows with ``not r[0] > silent_energy`` (silence, NaN) give a = [1, 0, ...], k = 0, err = 0.
    """
    n_rows = r.shape[0]
    a = np.zeros((n_rows, order + 1))
    k = np.zeros((n_rows, order))
    err = np.zeros(n_rows)
    prev = np.empty(order + 1)
    for b in range(n_rows):
        a[b, 0] = 1.0
        if not r[b, 0] > silent_energy:
            continue
        e = r[b, 0]
        for i in range(1, order + 1):
            acc = 0.0
            for j in range(i):
                acc += a[b, j] * r[b, i - j]
            ki = acc / -e
            for j in range(i):
                prev[j] = a[b, j]
            for j in range(1, i):
                a[b, j] = prev[j] + ki * prev[i - j]
            a[b, i] = ki
            k[b, i - 1] = ki
            e *= 1.0 - ki * ki
        err[b] = e
    return a, k, err


@jit.sums
def lpc_analyse(frames, window, lag_window, order, silent_energy, window_energy):
    """Windowed autocorrelation, lag window and white-noise correction, Levinson-Durbin; per row.

    frames [shape=(B, L)] raw samples; window [shape=(L,)]; lag_window [shape=(order + 1,)]
    (its lag 0 holds the white-noise factor). Returns a [shape=(B, order + 1)],
    k [shape=(B, order)], gain [shape=(B,)] = sqrt(max(err, 0) / window_energy).
    """
    n_rows, length = frames.shape
    xw = np.empty((1, length))  # one windowed row at a time: no frame-sized temporary per call
    r = np.empty((n_rows, order + 1))
    for b in range(n_rows):
        for i in range(length):
            xw[0, i] = frames[b, i] * window[i]
        rb = autocorrelation(xw, order)
        for i in range(order + 1):
            r[b, i] = rb[0, i] * lag_window[i]
    a, k, err = levinson(r, order, silent_energy)
    gain = np.empty(n_rows)
    for b in range(n_rows):
        gain[b] = math.sqrt(max(err[b], 0.0) / window_energy)
    return a, k, gain


@jit.plain
def reflection(a):
    """Step-down recursion per row: a [shape=(B, p + 1)] -> k [shape=(B, p)], stable [shape=(B,)] (every |k| < 1).

    Entries below the first |k| >= 1 are not meaningful; a vanishing ``1 - k**2`` divides by 1.
    """
    n_rows, p = a.shape[0], a.shape[1] - 1
    k = np.zeros((n_rows, p))
    stable = np.ones(n_rows, dtype=np.bool_)
    cur = np.empty(p)
    prev = np.empty(p)
    for b in range(n_rows):
        for j in range(p):
            cur[j] = a[b, j + 1]
        for i in range(p, 0, -1):
            ki = cur[i - 1]
            k[b, i - 1] = ki
            if not abs(ki) < 1.0:
                stable[b] = False
            if i > 1:
                denom = 1.0 - ki * ki
                if abs(denom) < 1e-300:
                    denom = 1.0
                for j in range(i - 1):
                    prev[j] = cur[j]
                for j in range(i - 1):
                    cur[j] = (prev[j] - ki * prev[i - 2 - j]) / denom
    return k, stable


@jit.plain
def step_up_row(k_row, a_row):
    """Step-up of one row of reflection coefficients into ``a_row`` (length p + 1)."""
    p = k_row.shape[0]
    a_row[0] = 1.0
    for j in range(1, p + 1):
        a_row[j] = 0.0
    for i in range(1, p + 1):
        ki = k_row[i - 1]
        # a_j += k_i a_{i-j} for j = 1..i-1 on the old values: pairs (j, i-j) updated together
        lo, hi = 1, i - 1
        while lo < hi:
            x, y = a_row[lo], a_row[hi]
            a_row[lo] = x + ki * y
            a_row[hi] = y + ki * x
            lo += 1
            hi -= 1
        if lo == hi:
            a_row[lo] = a_row[lo] + ki * a_row[lo]
        a_row[i] = ki


@jit.plain
def from_reflection(k):
    """Step-up recursion per row: k [shape=(B, p)] -> a [shape=(B, p + 1)]."""
    n_rows, p = k.shape
    a = np.empty((n_rows, p + 1))
    for b in range(n_rows):
        step_up_row(k[b], a[b])
    return a


@jit.plain
def to_cepstrum(a, n_ceps):
    """Cepstrum c_1..c_n of 1/A(z) per row by the recursion ``n c_n = -n a_n - sum_{j=1}^{min(p, n-1)} a_j (n-j) c_{n-j}``.

    a [shape=(B, p + 1)] -> c [shape=(B, n_ceps + 1)] with c[:, 0] = 0.
    """
    n_rows, p = a.shape[0], a.shape[1] - 1
    c = np.zeros((n_rows, n_ceps + 1))
    d = np.zeros(n_ceps + 1)  # d_n = n c_n
    for b in range(n_rows):
        for n in range(1, n_ceps + 1):
            acc = -n * a[b, n] if n <= p else 0.0
            for j in range(1, min(p, n - 1) + 1):
                acc -= a[b, j] * d[n - j]
            d[n] = acc
            c[b, n] = acc / n
    return c


@jit.sums
def residual(frames, a, hop):
    """LPC residual of the last ``hop`` samples of each frame, e[n] = sum_k a_k x[n - k], per row.

    frames [shape=(B, L)], L >= hop + p; a [shape=(B, p + 1)] -> e [shape=(B, hop)].
    """
    n_rows, length = frames.shape
    p = a.shape[1] - 1
    start = length - hop
    e = np.zeros((n_rows, hop))
    for b in range(n_rows):
        out = e[b]
        for j in range(p + 1):
            aj = a[b, j]
            src = frames[b, start - j : start - j + hop]  # a slice, so the loop's indices are plainly >= 0 (SIMD)
            for t in range(hop):
                out[t] += aj * src[t]
    return e


@jit.sums
def band_ratio(a_wb, a_nb, cos_wb, sin_wb, cos_nb, sin_nb):
    """|A_nb|^2 / |A_wb|^2 on common frequencies, per row: the envelope 1/|A_wb|^2 over 1/|A_nb|^2.

    a_wb [shape=(B, p + 1)], a_nb [shape=(B, q + 1)]; cos_*/sin_* [shape=(terms, bins)] the cosine
    and sine of i w on each polynomial's grid at the same frequencies. Each squared magnitude is
    floored at 1e-300 and the ratio clipped to 1e-30..1e30 (a zero on the unit circle gives a huge,
    finite value). Returns [shape=(B, bins)].
    """
    n_rows = a_wb.shape[0]
    n_bins = cos_wb.shape[1]
    out = np.empty((n_rows, n_bins))
    re_w, im_w, re_n, im_n = np.empty(n_bins), np.empty(n_bins), np.empty(n_bins), np.empty(n_bins)
    for b in range(n_rows):
        re_w[:] = 0.0
        im_w[:] = 0.0
        re_n[:] = 0.0
        im_n[:] = 0.0
        for i in range(a_wb.shape[1]):
            c = a_wb[b, i]
            for f in range(n_bins):
                re_w[f] += c * cos_wb[i, f]
                im_w[f] += c * sin_wb[i, f]
        for i in range(a_nb.shape[1]):
            c = a_nb[b, i]
            for f in range(n_bins):
                re_n[f] += c * cos_nb[i, f]
                im_n[f] += c * sin_nb[i, f]
        for f in range(n_bins):
            m_nb = max(re_n[f] * re_n[f] + im_n[f] * im_n[f], 1e-300)
            m_wb = max(re_w[f] * re_w[f] + im_w[f] * im_w[f], 1e-300)
            out[b, f] = min(max(m_nb / m_wb, 1e-30), 1e30)
    return out


@jit.plain
def _rms_db(ratio, b):
    """RMS of the mean-removed 10 log10(ratio[b]) over its bins; each log in single precision."""
    n = ratio.shape[1]
    d = np.empty(n)
    mean = 0.0
    for f in range(n):
        d[f] = 10.0 * np.float64(math.log10(np.float32(ratio[b, f])))
        mean += d[f]
    mean /= n
    s = 0.0
    for f in range(n):
        v = d[f] - mean
        s += v * v
    return math.sqrt(s / n)


@jit.plain
def mismatch_db(ratio):
    """Per row, :func:`_rms_db` of a :func:`band_ratio` result: ratio [shape=(B, bins)] -> [shape=(B,)]."""
    out = np.empty(ratio.shape[0])
    for b in range(ratio.shape[0]):
        out[b] = _rms_db(ratio, b)
    return out


@jit.plain
def guard_rules(ceps, level, a, gain, k, stable, ratio, novelty, low_db, limits):
    """The guard's checks per hop (:mod:`nenv.chain.guard` documents them), in one pass.

    ceps [shape=(n, c)], level, gain, novelty, low_db [shape=(n,)] (low_db NaN when the low band is
    off), a [shape=(n, p + 1)], k [shape=(n, p)] reflection coefficients (non-finite ones count as 0),
    stable [shape=(n,)] 1.0 where the step-down found the envelope stable, ratio [shape=(n, bins)]
    the band spectra of a with its non-finite values zeroed; limits = (level_min, level_max,
    mismatch_max, novelty_max, stability_margin, low_on, low_min, low_max).
    Returns reasons (bit flags, int64), max |k|, the mismatch in dB (inf where not finite) and k
    with its non-finite values zeroed.
    """
    n = ceps.shape[0]
    reasons = np.zeros(n, dtype=np.int64)
    max_k = np.zeros(n)
    mismatch = np.full(n, np.inf)
    k_out = np.empty(k.shape)
    level_min, level_max, mismatch_max, novelty_max, margin, low_on, low_min, low_max = limits[0], limits[1], limits[2], limits[3], limits[4], limits[5], limits[6], limits[7]
    for b in range(n):
        finite = np.isfinite(level[b]) and np.isfinite(gain[b]) and gain[b] > 0
        for j in range(ceps.shape[1]):
            finite = finite and np.isfinite(ceps[b, j])
        for j in range(a.shape[1]):
            finite = finite and np.isfinite(a[b, j])
        m = 0.0
        for j in range(k.shape[1]):
            v = k[b, j] if np.isfinite(k[b, j]) else 0.0
            k_out[b, j] = v
            m = max(m, abs(v))
        max_k[b] = m
        r = 0
        if not finite:
            r |= 1  # NONFINITE
        else:
            if not (stable[b] > 0.5 and m < 1.0 - margin):
                r |= 2  # UNSTABLE
            mismatch[b] = _rms_db(ratio, b)
            if mismatch[b] > mismatch_max:
                r |= 8  # MISMATCH
            if low_on > 0.5 and not (low_db[b] >= low_min and low_db[b] <= low_max):
                r |= 32  # LOW_BAND
        if np.isfinite(level[b]) and not (level[b] >= level_min and level[b] <= level_max):
            r |= 4  # LEVEL
        if novelty[b] > novelty_max:
            r |= 16  # NOVEL
        reasons[b] = r
    return reasons, max_k, mismatch, k_out



@jit.plain
def frames_after(x, history, hop):
    """Frames ending at each hop of each row of ``x``, each preceded by the row's ``history``.

    x [shape=(B, H * hop)]; history [shape=(B, K)] the K samples before x, advanced in place to the
    last K samples of history + x. Returns frames [shape=(B * H, K + hop)], row-major by row then hop
    (frame h of row b is (history + x)[b, h * hop : h * hop + K + hop]).
    """
    n_rows, n = x.shape
    hops = n // hop
    keep = history.shape[1]
    length = keep + hop
    frames = np.empty((n_rows * hops, length))
    for b in range(n_rows):
        for h in range(hops):
            r = b * hops + h
            start = h * hop - keep  # where the frame starts in x; before 0 it is the history
            split = min(max(-start, 0), length)  # samples taken from the history
            # slices, so the copies' indices are plainly >= 0 (no wrap-around checks; SIMD)
            frames[r, :split] = history[b, keep + start : keep + start + split]
            frames[r, split:] = x[b, start + split : start + length]
        if n >= keep:
            for i in range(keep):
                history[b, i] = x[b, n - keep + i]
        else:
            for i in range(keep - n):  # forwards: each value moves to a lower index
                history[b, i] = history[b, i + n]
            for i in range(n):
                history[b, keep - n + i] = x[b, i]
    return frames
