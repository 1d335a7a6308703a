"""Compiled per-hop kernels: the sequential and small-array work of the chain, over a batch of rows.

The kernels are plain loops (:mod:`nenv.dsp.lpc_loops`, :mod:`nenv.dsp.filter_loops`,
:mod:`nenv.dsp.envelope_loops`, :mod:`nenv.dsp.feature_loops`) compiled by numba with
``cache=True``: only the first process after an install compiles; later ones load the machine
code from numba's cache (``__pycache__`` beside the loops, or numba's per-user cache
when that folder is read-only; ``NUMBA_CACHE_DIR`` overrides both). Rows are independent signals
or frames (one hop of one call, many hops, many calls); every kernel takes C-contiguous arrays
whose first axis is the row (float64, but for the voicing's single-precision autocorrelations and
a flag array).

Callers use ``kernels.NAME``: :func:`warm` compiles every kernel for its one signature and runs
it once, before the first hop; until then ``kernels.NAME`` warms up first.

The plain numpy/scipy formulations these replace are the references in ``tests/test_kernels.py``
(scipy ``solve_toeplitz``, ``lfilter`` with ``lfiltic``, ``sosfilt``, ``upfirdn``, ``freqz``,
``numpy.roots``, the FFT definition of the cepstrum) and ``tests/test_kernels_hop.py`` (numpy.fft
band powers, ``numpy.correlate``, brute-force distances, numpy slicing).
"""

from __future__ import annotations

import sys
import threading
import time
from types import SimpleNamespace

import numba
import numpy as np

from nenv.dsp import envelope_loops, feature_loops, filter_loops, lpc_loops

LPC_KERNELS = ("autocorrelation", "levinson", "lpc_analyse", "reflection", "from_reflection", "to_cepstrum", "residual", "frames_after", "band_ratio", "mismatch_db", "guard_rules")
FILTER_KERNELS = ("rectify", "sosfilt", "hop_ramp", "fir", "upsample2", "synthesize")
ENVELOPE_KERNELS = ("log_spectrum", "fit_envelope", "band_level_db")
FEATURE_KERNELS = ("hop_measures", "voicing_peak", "stack_context", "nearest_cell", "ramp_weights")
PUBLIC = LPC_KERNELS + FILTER_KERNELS + ENVELOPE_KERNELS + FEATURE_KERNELS
_MODULES = ((lpc_loops, LPC_KERNELS), (filter_loops, FILTER_KERNELS), (envelope_loops, ENVELOPE_KERNELS), (feature_loops, FEATURE_KERNELS))
loops = SimpleNamespace(**{n: getattr(module, n) for module, names in _MODULES for n in names})


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
    r2_f32, r1_bool = t.Array(t.float32, 2, "C", readonly=True), t.Array(t.boolean, 1, "C", readonly=True)
    i, f = t.int64, t.float64
    return {
        loops.autocorrelation: (r2, i),
        loops.levinson: (r2, i, f),
        loops.lpc_analyse: (r2, r1, r1, i, f, f),
        loops.reflection: (r2,),
        loops.from_reflection: (r2,),
        loops.to_cepstrum: (r2, i),
        loops.residual: (r2, r2, i),
        loops.frames_after: (r2, w2, i),
        loops.rectify: (r2, w1, f, i),
        loops.sosfilt: (r2, r2, w3),
        loops.hop_ramp: (r2, r2, w1, i),
        loops.fir: (r1, r2, w2),
        loops.upsample2: (r2, w2, r1, r1),
        loops.synthesize: (r2, r3, r2, w2, w1, w2, i, f),
        loops.band_ratio: (r2, r2, r2, r2, r2, r2),
        loops.mismatch_db: (r2,),
        loops.guard_rules: (r2, r1, r2, r1, r2, r1, r2, r1, r1, r1),
        loops.log_spectrum: (r2, r2, f),
        loops.fit_envelope: (r2, r2, i, f, r2, r2, r1, r1, r1, f),
        loops.hop_measures: (r2, r1, r2, r1, f, i, i, f),
        loops.voicing_peak: (r2_f32, r1, i, i),
        loops.stack_context: (r2, r1_bool, r3, i),
        loops.nearest_cell: (r2, r1, r1, r2, r1),
        loops.band_level_db: (r2, r1, r2, r2, r1, f),
        loops.ramp_weights: (r1, r1, f, f, f),
    }


def _compile_all() -> None:
    """Compile (or load from numba's cache) every kernel for its signature, then forbid compiling at
    call time: a call whose arguments do not convert to the signature fails at once (a test finds it)
    instead of compiling in the middle of a call."""
    for kernel, sig in _signatures().items():
        kernel.compile(sig)
        kernel.disable_compile()


def _run_each_once() -> None:
    """Call every kernel once on tiny inputs: a compiled function loaded from the cache unpacks its
    constants on its first call (a call back into Python), which must not happen in the middle of
    a call's hop, nor where a stop signal could interrupt it."""
    f = np.zeros((2, 32))
    f[:, ::3] = 1.0
    a, k, _ = loops.lpc_analyse(f, np.ones(32), np.ones(5), 4, 1e-280, 32.0)
    loops.levinson(loops.autocorrelation(f, 4), 4, 1e-280)
    loops.reflection(a)
    loops.from_reflection(k)
    loops.to_cepstrum(a, 6)
    loops.residual(f, a, 8)
    loops.frames_after(f, np.zeros((2, 16)), 8)
    loops.rectify(f, np.zeros(2), 0.99, 16)
    loops.sosfilt(np.array([[1.0, 0.0, 0.0, 1.0, 0.1, 0.0]]), f, np.zeros((2, 1, 2)))
    loops.hop_ramp(f, np.ones((2, 2)), np.zeros(2), 16)
    loops.fir(np.ones(3), f, np.zeros((2, 2)))
    loops.upsample2(f, np.zeros((2, 2)), np.ones(3), np.ones(2))
    loops.synthesize(np.ones((2, 16)), np.zeros((2, 2, 4)), np.zeros((2, 2)), np.zeros((2, 4)), np.zeros(2), np.zeros((2, 4)), 2, 0.9999)
    ratio = loops.band_ratio(a, a, np.ones((5, 3)), np.zeros((5, 3)), np.ones((5, 3)), np.zeros((5, 3)))
    loops.mismatch_db(ratio)
    loops.guard_rules(np.zeros((2, 3)), np.zeros(2), a, np.ones(2), k, np.ones(2), ratio, np.zeros(2), np.zeros(2), np.zeros(8))
    spec, top = loops.log_spectrum(np.zeros((2, 3)), np.ones((4, 9)), -9.0)
    loops.fit_envelope(np.exp(spec), np.ones((9, 5)), 4, 1e-280, np.ones((5, 3)), np.zeros((5, 3)), top, np.zeros(2), np.zeros(2), 16.0)
    _, _, _, _, xn = loops.hop_measures(f, np.ones(32), a, np.ones(2), 32.0, 6, 8, -100.0)
    loops.voicing_peak(xn, np.ones(3), 2, 4)
    loops.stack_context(np.zeros((2, 6)), np.zeros(2, dtype=bool), np.ones((2, 2, 3)), 2)
    loops.nearest_cell(np.zeros((2, 3)), np.zeros(3), np.ones(3), np.ones((3, 4)), np.ones(4))
    loops.band_level_db(a, np.ones(2), np.ones((5, 3)), np.zeros((5, 3)), np.zeros(2), 16.0)
    loops.ramp_weights(np.ones(2), np.ones(2), 0.4, 0.7, 1.0)


def warm(*, notice=None) -> float:
    """Compile (first process after an install) or load from cache every kernel, once per process.

    ``notice(text)`` is told "compiling signal kernels (once) ..." if this takes longer than
    NOTICE_AFTER_S (a cold cache), and how long it took when done. Returns the seconds spent.
    """
    if "s" in _warm:
        return 0.0
    with _warm_lock:  # engines made in several threads at once: one compiles or loads, the others wait
        return 0.0 if "s" in _warm else _warm_up(notice)


_warm_lock = threading.Lock()


def _warm_up(notice) -> float:
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
        _run_each_once()
    finally:
        timer.cancel()
    for name in PUBLIC:  # from now on a call goes straight to the compiled code
        globals()[name] = getattr(loops, name)
    took = time.perf_counter() - t0
    _warm["s"] = took
    if said.is_set() and notice is not None:
        notice(f"signal kernels compiled in {took:.1f} s")
    return took


def f64(values) -> np.ndarray:
    """``values`` as the kernels take an input: a C-contiguous float64 array (no copy when it is one already)."""
    return np.ascontiguousarray(values, dtype=np.float64)


def stderr_notice(text: str) -> None:
    """Default ``notice`` of the command line: one line on stderr."""
    print(f"nenv: {text}", file=sys.stderr, flush=True)


def _first_use(name: str):
    """Until :func:`warm` has run, ``kernels.NAME`` runs it first: every process uses the same compiled
    signatures (and so the same rounding), whether or not it warmed the kernels up itself."""

    def run(*args):
        warm()
        return globals()[name](*args)

    run.__name__ = run.__qualname__ = name
    run.__doc__ = getattr(loops, name).__doc__
    return run


for _name in PUBLIC:
    globals()[_name] = _first_use(_name)
