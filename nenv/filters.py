"""Recursive filters for the per-hop path: scipy's compiled loops without their per-call checking.

A gateway filters a few hundred samples at a time, so ``scipy.signal.lfilter``
and ``sosfilt`` spend most of each call validating and reshaping their
arguments (about 13 and 70 us) rather than filtering (about 4 us). nenv's own
stages always pass float64 arrays of known shapes, so they call the compiled
loops those functions end in directly. Both entry points are internal to
SciPy: if a SciPy release moves them, or a check at first use finds them
disagreeing with the public functions, nenv uses the public functions (same
results, slower); :func:`fast` tells which is in use.

:func:`einsum` is the same idea for numpy: ``np.einsum`` without ``optimize`` ends in
numpy's compiled ``c_einsum`` after a Python-level dispatch that costs about 1 us per
call, which the per-sample loops of the batched synthesis pay 160 times a hop.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

try:  # compiled loops behind scipy.signal.lfilter (IIR case) and scipy.signal.sosfilt
    from scipy.signal._sigtools import _linear_filter as _lfilter_loop
    from scipy.signal._sosfilt import _sosfilt as _sosfilt_loop
except ImportError:  # pragma: no cover - depends on the SciPy release
    _lfilter_loop = _sosfilt_loop = None
try:  # the compiled einsum that numpy.einsum(..., optimize=False) calls
    from numpy._core.multiarray import c_einsum as _c_einsum
except ImportError:  # pragma: no cover - numpy < 2 keeps it in numpy.core
    try:
        from numpy.core.multiarray import c_einsum as _c_einsum
    except ImportError:
        _c_einsum = None

_checked: dict[str, bool] = {}


def fast() -> bool:
    """True when the compiled loops are used (present and agreeing with the public functions)."""
    if "ok" not in _checked:
        _checked["ok"] = _agrees()
    return _checked["ok"]


def _agrees() -> bool:
    if _lfilter_loop is None or _sosfilt_loop is None:
        return False
    rng = np.random.default_rng(7)
    x = rng.standard_normal((3, 50))
    b, a = np.array([0.5, -0.2]), np.array([1.0, -0.9, 0.4])
    zi = rng.standard_normal((3, 2))
    sos = signal.butter(4, 0.3, output="sos")
    zs = rng.standard_normal((sos.shape[0], 3, 2))
    try:
        want_y, want_z = signal.lfilter(b, a, x, axis=1, zi=zi)
        got_y, got_z = _lfilter_loop(b, a, x, 1, zi)
        want_sy, want_sz = signal.sosfilt(sos, x, axis=1, zi=zs)
        sy, sz = x.copy(), np.ascontiguousarray(zs.transpose(1, 0, 2))
        _sosfilt_loop(sos, sy, sz)
    except Exception:  # pragma: no cover - an internal signature changed
        return False
    return bool(np.array_equal(got_y, want_y) and np.array_equal(got_z, want_z) and np.array_equal(sy, want_sy) and np.array_equal(sz.transpose(1, 0, 2), want_sz))


def _einsum_agrees() -> bool:
    if _c_einsum is None:
        return False
    rng = np.random.default_rng(7)
    x, y = rng.standard_normal((5, 9)), rng.standard_normal((5, 9))
    out = np.empty(9)
    try:
        got = _c_einsum("ib,ib->b", x, y, out=out)
        rows = _c_einsum("...n,...n->...", x, y)
    except Exception:  # pragma: no cover - an internal signature changed
        return False
    return bool(got is out and np.array_equal(out, np.einsum("ib,ib->b", x, y)) and np.array_equal(rows, np.einsum("...n,...n->...", x, y)))


def iir(b: np.ndarray, a: np.ndarray, x: np.ndarray, zi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``scipy.signal.lfilter(b, a, x, axis=-1, zi=zi)`` for float64 ``x`` and ``len(a) > 1``.

    b, a : np.ndarray [shape=(nb,), (na,)], float64, a[0] == 1
    x : np.ndarray [shape=(..., n)]; zi : np.ndarray [shape=(..., max(nb, na) - 1)]
    """
    if fast():
        return _lfilter_loop(b, a, x, -1, zi)
    return signal.lfilter(b, a, x, axis=-1, zi=zi)


def sos(sections: np.ndarray, x: np.ndarray, zi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``scipy.signal.sosfilt`` along the last axis of B signals, with the state stored signal-major.

    sections : np.ndarray [shape=(s, 6)], float64
    x : np.ndarray [shape=(B, n)]; zi : np.ndarray [shape=(B, s, 2)] (not modified)
    Returns y [shape=(B, n)], zf [shape=(B, s, 2)].
    """
    if fast():
        y = np.array(x, dtype=np.float64, order="C")
        zf = np.array(zi, dtype=np.float64, order="C")
        _sosfilt_loop(sections, y, zf)
        return y, zf
    y, zf = signal.sosfilt(sections, x, axis=-1, zi=np.moveaxis(zi, 1, 0))
    return y, np.ascontiguousarray(np.moveaxis(zf, 0, 1))


# ``numpy.einsum(subscripts, *operands, out=out)`` (same loop, same results) without its dispatch;
# chosen once at import, so a call costs nothing beyond numpy's own loop
einsum = _c_einsum if _einsum_agrees() else np.einsum
