"""Compiled per-hop kernels: the sequential and small-array work of the chain, over a batch of rows.

Each kernel is a plain loop compiled by numba (``njit``, ``cache=True``: only the first
process after an install compiles; later ones load the machine code from numba's cache,
``__pycache__`` beside this file, or numba's per-user cache when that folder is read-only).
Rows are independent signals or frames (one hop of one call, many hops, many calls); every
kernel takes and returns C-contiguous float64 arrays whose first axis is the row.

Floating-point errors follow IEEE (``error_model="numpy"``): a division by zero gives inf or
NaN as numpy would, never an exception, so a corrupt row cannot stop the others.

The plain numpy/scipy formulations these replace are the references in ``tests/test_kernels.py``
(scipy ``solve_toeplitz``, ``lfilter`` with ``lfiltic``, ``sosfilt``, ``numpy.roots``, the FFT
definition of the cepstrum).
"""

from __future__ import annotations

import math
import sys
import threading
import time

import numba
import numpy as np

_jit = numba.njit(cache=True, error_model="numpy", nogil=True)
# sums and dot products may be reordered and fused (SIMD): results move by a few units in the last
# place, never more; NaN and inf keep their IEEE meaning (no "fast" assumptions about them)
_jit_sums = numba.njit(cache=True, error_model="numpy", nogil=True, fastmath={"reassoc", "contract"})


@_jit_sums
def _autocorrelation(x, order):
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


@_jit
def _levinson(r, order, silent_energy):
    """Levinson-Durbin recursion per row (conventions of :mod:`nenv.lpc`).

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


@_jit_sums
def _lpc_analyse(frames, window, lag_window, order, silent_energy, window_energy):
    """Windowed autocorrelation, lag window and white-noise correction, Levinson-Durbin; per row.

    frames [shape=(B, L)] raw samples; window [shape=(L,)]; lag_window [shape=(order + 1,)]
    (its lag 0 holds the white-noise factor). Returns a [shape=(B, order + 1)],
    k [shape=(B, order)], gain [shape=(B,)] = sqrt(max(err, 0) / window_energy).
    """
    n_rows, length = frames.shape
    xw = np.empty((n_rows, length))
    for b in range(n_rows):
        for i in range(length):
            xw[b, i] = frames[b, i] * window[i]
    r = _autocorrelation(xw, order)
    for b in range(n_rows):
        for i in range(order + 1):
            r[b, i] *= lag_window[i]
    a, k, err = _levinson(r, order, silent_energy)
    gain = np.empty(n_rows)
    for b in range(n_rows):
        gain[b] = math.sqrt(max(err[b], 0.0) / window_energy)
    return a, k, gain


@_jit
def _reflection(a):
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


@_jit
def _step_up_row(k_row, a_row):
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


@_jit
def _from_reflection(k):
    """Step-up recursion per row: k [shape=(B, p)] -> a [shape=(B, p + 1)]."""
    n_rows, p = k.shape
    a = np.empty((n_rows, p + 1))
    for b in range(n_rows):
        _step_up_row(k[b], a[b])
    return a


@_jit
def _to_cepstrum(a, n_ceps):
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


@_jit_sums
def _residual(frames, a, hop):
    """LPC residual of the last ``hop`` samples of each frame, e[n] = sum_k a_k x[n - k], per row.

    frames [shape=(B, L)], L >= hop + p; a [shape=(B, p + 1)] -> e [shape=(B, hop)].
    """
    n_rows, length = frames.shape
    p = a.shape[1] - 1
    start = length - hop
    e = np.zeros((n_rows, hop))
    for b in range(n_rows):
        for j in range(p + 1):
            aj = a[b, j]
            for t in range(hop):
                e[b, t] += aj * frames[b, start + t - j]
    return e


@_jit_sums
def _rectify(up, dc_state, pole, hop):
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


@_jit
def _sosfilt(sos, x, state):
    """Second-order sections (transposed direct form II, as ``scipy.signal.sosfilt``) per row.

    sos [shape=(S, 6)], a0 = 1; x [shape=(B, n)]; state [shape=(B, S, 2)], updated in place.
    Returns y [shape=(B, n)].
    """
    n_rows, n = x.shape
    n_sec = sos.shape[0]
    y = np.empty((n_rows, n))
    for b in range(n_rows):
        for i in range(n):
            v = x[b, i]
            for s in range(n_sec):
                z0, z1 = state[b, s, 0], state[b, s, 1]
                out = sos[s, 0] * v + z0
                state[b, s, 0] = sos[s, 1] * v - sos[s, 4] * out + z1
                state[b, s, 1] = sos[s, 2] * v - sos[s, 5] * out
                v = out
            y[b, i] = v
    return y


@_jit_sums
def _fir(taps, x, history):
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
        for j in range(m + 1):
            tj = taps[j]
            for i in range(n):
                y[b, i] += tj * buf[m + i - j]
        for i in range(m):
            history[b, i] = buf[n + i]
    return y


@_jit_sums
def _upsample2(x, history, even, odd):
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


@_jit_sums
def _synthesize(u, k, log_g, k_prev, log_g_prev, past, n_sub, max_reflection):
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
                _step_up_row(ks, a)
                for i in range(p):
                    ar[i] = a[p - i]  # a_p .. a_1: the dot product below reads the memory forwards
                g = math.exp(gb * wb + gc * w)
                start = t * length + j * sub
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


@_jit_sums
def _band_ratio(a_wb, a_nb, cos_wb, sin_wb, cos_nb, sin_nb):
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


# ---- start-up -------------------------------------------------------------------------------

_warm: dict[str, float] = {}
NOTICE_AFTER_S = 1.5  # a warm-up still running after this long is compiling (loading the cache takes ~0.4 s): say so


def _signatures() -> dict:
    """The one signature each kernel is compiled for: inputs as read-only C-contiguous arrays (writable
    ones and cached read-only tables both convert to it; contiguous rows let the loops use SIMD, so
    callers copy views of a signal first), state as writable C arrays."""
    t = numba.types
    r1, r2, r3 = (t.Array(t.float64, n, "C", readonly=True) for n in (1, 2, 3))
    w1, w2, w3 = (t.Array(t.float64, n, "C") for n in (1, 2, 3))
    i, f = t.int64, t.float64
    return {
        _autocorrelation: (r2, i),
        _levinson: (r2, i, f),
        _lpc_analyse: (r2, r1, r1, i, f, f),
        _reflection: (r2,),
        _from_reflection: (r2,),
        _to_cepstrum: (r2, i),
        _residual: (r2, r2, i),
        _rectify: (r2, w1, f, i),
        _sosfilt: (r2, r2, w3),
        _fir: (r1, r2, w2),
        _upsample2: (r2, w2, r1, r1),
        _synthesize: (r2, r3, r2, w2, w1, w2, i, f),
        _band_ratio: (r2, r2, r2, r2, r2, r2),
    }


def _compile_all() -> None:
    """Compile (or load from numba's cache) every kernel for its signature, then forbid compiling at
    call time: a call whose arguments do not convert to the signature fails at once (a test finds it)
    instead of compiling in the middle of a call."""
    for kernel, sig in _signatures().items():
        kernel.compile(sig)
        kernel.disable_compile()


def warm(*, notice=None) -> float:
    """Compile (first process after an install) or load from cache every kernel, once per process.

    ``notice(text)`` is told "compiling signal kernels (once) ..." if this takes longer than
    NOTICE_AFTER_S (a cold cache), and how long it took when done. Returns the seconds spent.
    """
    if "s" in _warm:
        return 0.0
    said = threading.Event()

    def tell() -> None:
        if notice is not None:
            said.set()
            notice("compiling signal kernels (once; later runs load them from numba's cache) ...")

    timer = threading.Timer(NOTICE_AFTER_S, tell)
    timer.daemon = True
    t0 = time.perf_counter()
    timer.start()
    try:
        _compile_all()
    finally:
        timer.cancel()
    for name in PUBLIC:  # from now on a call goes straight to the compiled code
        globals()[name] = globals()["_" + name]
    took = time.perf_counter() - t0
    _warm["s"] = took
    if said.is_set() and notice is not None:
        notice(f"signal kernels compiled in {took:.1f} s")
    return took


def stderr_notice(text: str) -> None:
    """Default ``notice`` of the command line: one line on stderr."""
    print(f"nenv: {text}", file=sys.stderr, flush=True)


PUBLIC = ("autocorrelation", "levinson", "lpc_analyse", "reflection", "from_reflection", "to_cepstrum", "residual", "rectify", "sosfilt", "fir", "upsample2", "synthesize", "band_ratio")


def _first_use(name: str):
    """Until :func:`warm` has run, ``kernels.NAME`` runs it first: every process uses the same compiled
    signatures (and so the same rounding), whether or not it warmed the kernels up itself."""

    def run(*args):
        warm()
        return globals()[name](*args)

    run.__name__ = run.__qualname__ = name
    run.__doc__ = globals()["_" + name].__doc__
    return run


for _name in PUBLIC:
    globals()[_name] = _first_use(_name)
