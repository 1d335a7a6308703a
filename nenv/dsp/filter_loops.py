"""Compiled loops of filtering and synthesis: the rectify excitation, second-order sections, FIR,
the 2x interpolator and the all-pole synthesis (per row; see :mod:`nenv.dsp.kernels`)."""

from __future__ import annotations

import math

import numpy as np

from nenv.dsp import jit
from nenv.dsp.lpc_loops import step_up_row


@jit.sums
def rectify(up, dc_state, pole, hop):
    """The ``rectify`` excitation per row: |x|, DC removal (1 - z^-1) / (1 - pole z^-1) with state,
    then each hop scaled to the power of the input hop it came from.

    up [shape=(B, n * hop)]; dc_state [shape=(B,)] the filter's state (transposed direct form,
    as ``scipy.signal.lfilter``'s ``zi``), updated in place. Returns u [shape=(B, n * hop)].
    """
    n_rows, total = up.shape
    u = np.empty((n_rows, total))
    for b in range(n_rows):
        z = dc_state[b]
        for i in range(total):
            x = abs(up[b, i])
            y = x + z
            z = pole * y - x
            u[b, i] = y
        dc_state[b] = z
        for s in range(0, total, hop):
            p_in = 0.0
            p_out = 0.0
            for i in range(s, s + hop):
                p_in += up[b, i] * up[b, i]
                p_out += u[b, i] * u[b, i]
            scale = math.sqrt((p_in / hop) / max(p_out / hop, 1e-30))
            for i in range(s, s + hop):
                u[b, i] *= scale
    return u


@jit.plain
def sosfilt(sos, x, state):
    """Second-order sections (transposed direct form II, as ``scipy.signal.sosfilt``) per row.

    sos [shape=(S, 6)], a0 = 1; x [shape=(B, n)]; state [shape=(B, S, 2)], updated in place.
    Returns y [shape=(B, n)].
    """
    n_rows, n = x.shape
    n_sec = sos.shape[0]
    y = np.empty((n_rows, n))
    for b in range(n_rows):
        # sections over the whole row up to three at a time, each one sample behind the one before
        # it (their chains of dependent steps overlap), states in locals: the same operations in the
        # same order per sample as sample by sample through every section
        for i in range(n):
            y[b, i] = x[b, i]
        s = 0
        while s < n_sec:
            g = min(3, n_sec - s)
            p0, p1, p2, p4, p5 = sos[s, 0], sos[s, 1], sos[s, 2], sos[s, 4], sos[s, 5]
            z0, z1 = state[b, s, 0], state[b, s, 1]
            q0 = q1 = q2 = q4 = q5 = w0 = w1 = 0.0
            r0 = r1 = r2 = r4 = r5 = v0 = v1 = 0.0
            if g > 1:
                q0, q1, q2, q4, q5 = sos[s + 1, 0], sos[s + 1, 1], sos[s + 1, 2], sos[s + 1, 4], sos[s + 1, 5]
                w0, w1 = state[b, s + 1, 0], state[b, s + 1, 1]
            if g > 2:
                r0, r1, r2, r4, r5 = sos[s + 2, 0], sos[s + 2, 1], sos[s + 2, 2], sos[s + 2, 4], sos[s + 2, 5]
                v0, v1 = state[b, s + 2, 0], state[b, s + 2, 1]
            o1 = 0.0  # the first section's output at the previous sample
            o2 = 0.0  # the second section's output at the sample before that
            for i in range(n + g - 1):
                # at step i: the third section on sample i - 2, the second on i - 1, the first on i
                if g > 2 and i >= 2:
                    out = r0 * o2 + v0
                    v0 = r1 * o2 - r4 * out + v1
                    v1 = r2 * o2 - r5 * out
                    y[b, i - 2] = out
                if g > 1 and i >= 1 and i - 1 < n:
                    out = q0 * o1 + w0
                    w0 = q1 * o1 - q4 * out + w1
                    w1 = q2 * o1 - q5 * out
                    if g == 2:
                        y[b, i - 1] = out
                    o2 = out
                if i < n:
                    v = y[b, i]
                    out = p0 * v + z0
                    z0 = p1 * v - p4 * out + z1
                    z1 = p2 * v - p5 * out
                    if g == 1:
                        y[b, i] = out
                    o1 = out
            state[b, s, 0], state[b, s, 1] = z0, z1
            if g > 1:
                state[b, s + 1, 0], state[b, s + 1, 1] = w0, w1
            if g > 2:
                state[b, s + 2, 0], state[b, s + 2, 1] = v0, v1
            s += g
    return y


@jit.plain
def hop_ramp(x, w, prev, hop):
    """``x`` times per-hop weights that move linearly from one hop's to the next's across each hop
    (sample ``j`` of hop ``h`` gets ``w[h-1] + (w[h] - w[h-1]) * (j + 1) / hop``; before the first,
    ``prev``), so a weight change makes no step. x [shape=(B, H * hop)], w [shape=(B, H)], prev
    [shape=(B,)] each row's last weight, updated in place. Returns [shape=(B, H * hop)]."""
    n_rows, n_hops = w.shape
    y = np.empty(x.shape)
    for b in range(n_rows):
        g0 = prev[b]
        for h in range(n_hops):
            g1 = w[b, h]
            for j in range(hop):
                y[b, h * hop + j] = x[b, h * hop + j] * (g0 + (g1 - g0) * ((j + 1) / hop))
            g0 = g1
        prev[b] = g0
    return y


@jit.sums
def fir(taps, x, history):
    """FIR filter per row with state: y[n] = sum_j taps[j] x[n - j]; history [shape=(B, len(taps) - 1)]
    holds the last inputs (oldest first) and is updated in place. x [shape=(B, n)] -> y [shape=(B, n)]."""
    n_rows, n = x.shape
    m = taps.shape[0] - 1
    y = np.zeros((n_rows, n))
    buf = np.empty(m + n)
    for b in range(n_rows):
        for i in range(m):
            buf[i] = history[b, i]
        for i in range(n):
            buf[m + i] = x[b, i]
        out = y[b]
        for j in range(m + 1):
            tj = taps[j]
            src = buf[m - j : m - j + n]  # a slice, so the loop's indices are plainly >= 0 (SIMD)
            for i in range(n):
                out[i] += tj * src[i]
        for i in range(m):
            history[b, i] = buf[n + i]
    return y


@jit.sums
def upsample2(x, history, even, odd):
    """Interpolation by 2 (zero insertion and a linear-phase FIR) per row, in polyphase form.

    even, odd: the FIR's even and odd taps, each reversed; history [shape=(B, H)] with
    H = len(even) - 1 holds the last 8 kHz inputs (oldest first), updated in place.
    x [shape=(B, n)] -> y [shape=(B, 2n)]: y[2m] = sum_j even[j] buf[m + j] and
    y[2m + 1] = sum_j odd[j] buf[m + 1 + j], where buf is the history followed by x.
    """
    n_rows, n = x.shape
    h = history.shape[1]
    n_even, n_odd = even.shape[0], odd.shape[0]
    y = np.empty((n_rows, 2 * n))
    buf = np.empty(h + n)
    for b in range(n_rows):
        for i in range(h):
            buf[i] = history[b, i]
        for i in range(n):
            buf[h + i] = x[b, i]
        for m in range(n):
            s = 0.0
            for j in range(n_even):
                s += buf[m + j] * even[j]
            y[b, 2 * m] = s
            s = 0.0
            for j in range(n_odd):
                s += buf[m + 1 + j] * odd[j]
            y[b, 2 * m + 1] = s
        for i in range(h):
            history[b, i] = buf[n + i]
    return y


@jit.plain
def _all_pole_16(ar, hist, u, y, start, stop, g):
    """The all-pole recursion of :func:`synthesize` for order 16 (the wideband envelope's), samples
    ``start`` to ``stop``: the same products and sums in the same order, with the last 16 outputs
    held in locals instead of re-read from ``hist`` (a read of the sample just written waits for
    that write: 1.7 -> 1.0-1.3 us per hop). ``hist`` is still written, for the caller's state."""
    c0, c1, c2, c3, c4, c5, c6, c7 = ar[0], ar[1], ar[2], ar[3], ar[4], ar[5], ar[6], ar[7]
    c8, c9, c10, c11, c12, c13, c14, c15 = ar[8], ar[9], ar[10], ar[11], ar[12], ar[13], ar[14], ar[15]
    h0, h1, h2, h3, h4, h5, h6, h7 = hist[start], hist[start + 1], hist[start + 2], hist[start + 3], hist[start + 4], hist[start + 5], hist[start + 6], hist[start + 7]
    h8, h9, h10, h11, h12, h13, h14, h15 = hist[start + 8], hist[start + 9], hist[start + 10], hist[start + 11], hist[start + 12], hist[start + 13], hist[start + 14], hist[start + 15]
    for n in range(start, stop):
        acc = 0.0  # a_16 y[n-16] + ... + a_1 y[n-1], left to right
        acc += c0 * h0
        acc += c1 * h1
        acc += c2 * h2
        acc += c3 * h3
        acc += c4 * h4
        acc += c5 * h5
        acc += c6 * h6
        acc += c7 * h7
        acc += c8 * h8
        acc += c9 * h9
        acc += c10 * h10
        acc += c11 * h11
        acc += c12 * h12
        acc += c13 * h13
        acc += c14 * h14
        acc += c15 * h15
        v = g * u[n] - acc
        hist[16 + n] = v
        y[n] = v
        h0, h1, h2, h3, h4, h5, h6, h7 = h1, h2, h3, h4, h5, h6, h7, h8
        h8, h9, h10, h11, h12, h13, h14, h15 = h9, h10, h11, h12, h13, h14, h15, v


@jit.plain  # not reordered (no SIMD sums): the recursion runs faster in order
def synthesize(u, k, log_g, k_prev, log_g_prev, past, n_sub, max_reflection):
    """All-pole synthesis G/A(z) with sub-frame interpolation, per row (one call or stream).

    u [shape=(B, H * L)] excitation of H hops of L samples; k [shape=(B, H, p)] each hop's
    reflection coefficients (NaN -> 0, then clamped to +-max_reflection); log_g [shape=(B, H)].
    Sub-frame j of hop t has weight (j + 1) / n_sub on hop t and the rest on hop t - 1 (for
    t = 0: ``k_prev``, ``log_g_prev``), linear in k (stable whenever both ends are) and in log G.
    ``past`` [shape=(B, p)] holds y[n-1], ..., y[n-p]; it, k_prev and log_g_prev are updated in
    place. Returns y [shape=(B, H * L)].
    """
    n_rows, total = u.shape
    n_hops, p = k.shape[1], k.shape[2]
    length = total // n_hops
    sub = length // n_sub
    y = np.empty((n_rows, total))
    kc = np.empty(p)
    kb = np.empty(p)
    ks = np.empty(p)
    a = np.empty(p + 1)
    ar = np.empty(p)
    hist = np.empty(p + total)  # hist[p + n] = y[n]; hist[p - i] = y[-i]
    for b in range(n_rows):
        for i in range(p):
            hist[p - 1 - i] = past[b, i]
            kb[i] = k_prev[b, i]
        gb = log_g_prev[b]
        for t in range(n_hops):
            for i in range(p):
                v = k[b, t, i]
                if v != v:
                    v = 0.0
                kc[i] = min(max(v, -max_reflection), max_reflection)
            gc = log_g[b, t]
            for j in range(n_sub):
                w = (j + 1.0) / n_sub
                wb = 1.0 - w
                for i in range(p):
                    ks[i] = kb[i] * wb + kc[i] * w
                step_up_row(ks, a)
                for i in range(p):
                    ar[i] = a[p - i]  # a_p .. a_1: the dot product below reads the memory forwards
                g = math.exp(gb * wb + gc * w)
                start = t * length + j * sub
                if p == 16:
                    _all_pole_16(ar, hist, u[b], y[b], start, start + sub, g)
                    continue
                for n in range(start, start + sub):
                    acc = 0.0
                    for i in range(p):
                        acc += ar[i] * hist[n + i]
                    v = g * u[b, n] - acc
                    hist[p + n] = v
                    y[b, n] = v
            for i in range(p):
                kb[i] = kc[i]
            gb = gc
        for i in range(p):
            past[b, i] = hist[p + total - 1 - i]
            k_prev[b, i] = kb[i]
        log_g_prev[b] = gb
    return y
