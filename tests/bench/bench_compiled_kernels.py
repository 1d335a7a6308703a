"""What compiled per-hop code would buy: three offline kernels, numpy (nenv's code) beside numba.

Run: python tests/bench/bench_compiled_kernels.py [--rounds N]

Evidence for the open decision on compiled per-hop code (DEVELOPERS.md): nenv's
runtime stays numpy, scipy and onnxruntime, and does not import numba. numba is
installed with every nenv install today only because librosa requires it. This
script writes the same three kernels as plain loops for numba and times them
side by side with nenv's own functions, in alternating rounds on one minute of
frames cut from real speech (both CMU ARCTIC sentences through the telephone
channel, tiled). The three kernels take about 40% of an offline `extend`:

* LPC analysis of 8 kHz frames (240 samples, order 10): the narrowband analysis;
* LPC analysis of 16 kHz frames (480 samples, order 8): the excitation's whitening;
* time-varying all-pole synthesis (order 16, 40-sample sub-frames): nenv's banded
  triangular solve (LAPACK ``dtbtrs``) beside the plain recursion.

It prints each kernel's median time per minute of audio, the ratio, the largest
difference from nenv's result, and the JIT compile time a process pays on first use.
It is not a test and asserts nothing. Without numba it says so and stops.
"""

from __future__ import annotations

import os

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ[var] = "1"  # one thread, as a gateway core would run it

import argparse
import statistics
import time
from pathlib import Path

import numpy as np

from nenv import channel, lpc, synthesis
from nenv.evaluate import prepare_reference
from nenv.settings import HOP_NB, HOP_WB, N_SUBFRAMES, WB_ORDER, WB_SR, WIN_NB, WIN_WB

DATA = Path(__file__).resolve().parents[1] / "data"
SECONDS = 60.0  # of audio per timed call


def compiled_kernels():
    """The three kernels for numba, or None without numba. Compiled on first call."""
    try:
        import numba
    except ImportError:
        return None
    silent = lpc.SILENT_ENERGY  # a closure constant: numba freezes it at compile time

    @numba.njit(fastmath=True)  # fastmath lets the sums use SIMD (their order differs from numpy's)
    def analyse(frames, window, lag_window, order, window_energy):
        n, length = frames.shape
        a = np.zeros((n, order + 1))
        gain = np.zeros(n)
        xw = np.empty(length)
        r = np.empty(order + 1)
        prev = np.empty(order + 1)
        for t in range(n):
            for i in range(length):
                xw[i] = frames[t, i] * window[i]
            for k in range(order + 1):
                s = 0.0
                for i in range(length - k):
                    s += xw[i] * xw[i + k]
                r[k] = s * lag_window[k]
            a[t, 0] = 1.0
            if not r[0] > silent:
                continue
            err = r[0]
            for i in range(1, order + 1):
                acc = 0.0
                for j in range(i):
                    acc += a[t, j] * r[i - j]
                ki = -acc / err
                for j in range(i):
                    prev[j] = a[t, j]
                for j in range(1, i):
                    a[t, j] = prev[j] + ki * prev[i - j]
                a[t, i] = ki
                err *= 1.0 - ki * ki
            gain[t] = np.sqrt(max(err, 0.0) / window_energy)
        return a, gain

    @numba.njit
    def synthesize(u, a_sub, g_sub, past):
        n_sub, length = u.shape
        p = a_sub.shape[1] - 1
        y = np.empty(p + n_sub * length)
        for i in range(p):
            y[p - 1 - i] = past[i]
        for j in range(n_sub):
            for t in range(length):
                n = p + j * length + t
                acc = g_sub[j] * u[j, t]
                for i in range(1, p + 1):
                    acc -= a_sub[j, i] * y[n - i]
                y[n] = acc
        return y[p:].reshape(n_sub, length), y[: -p - 1 : -1].copy()

    return analyse, synthesize


def speech(seconds: float) -> tuple[np.ndarray, np.ndarray]:
    """The ARCTIC sentences tiled to ``seconds``: (8 kHz telephone signal, 16 kHz original)."""
    ref = np.concatenate([prepare_reference(DATA / n) for n in ("arctic_a0007.wav", "arctic_a0009.wav")])
    nb = channel.telephone(ref, sr=WB_SR, level_dbov=None)
    n_nb = int(seconds * 8000) // HOP_NB * HOP_NB
    return np.resize(nb, n_nb), np.resize(ref, 2 * n_nb)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=9)
    args = ap.parse_args()
    kernels = compiled_kernels()
    if kernels is None:
        print("numba is not installed: nothing to compare")
        return
    analyse_c, synthesize_c = kernels
    nb, wb = speech(SECONDS)
    nb_frames = np.ascontiguousarray(lpc.frame(nb, frame_length=WIN_NB, hop_length=HOP_NB))
    wb_frames = np.ascontiguousarray(lpc.frame(wb, frame_length=WIN_WB, hop_length=HOP_WB))
    # synthesis inputs: the original's own order-16 envelopes, interpolated per sub-frame as the pipeline does
    a_wb, g_wb = lpc.analyse(wb_frames, order=WB_ORDER, sr=WB_SR)
    k, _ = lpc.reflection(a_wb)
    a_sub, g_sub = synthesis.interpolate_envelopes(np.zeros(WB_ORDER), synthesis.clamp_reflection(k), np.log(1e-9), np.log(np.maximum(g_wb, 1e-12)), n_sub=N_SUBFRAMES)
    a_sub, g_sub = a_sub.reshape(-1, WB_ORDER + 1), g_sub.reshape(-1)
    u = np.random.default_rng(0).standard_normal((a_sub.shape[0], HOP_WB // N_SUBFRAMES))
    past = np.zeros(WB_ORDER)

    def lag_window(order: int, sr: int) -> np.ndarray:
        return lpc.condition(np.ones((1, order + 1)), sr=sr)[0]

    cases = {
        "LPC analysis, 8 kHz, 240 x order 10": (
            lambda: lpc.analyse(nb_frames, order=10, sr=8000),
            lambda: analyse_c(nb_frames, lpc.asymmetric_window(WIN_NB), lag_window(10, 8000), 10, lpc.window_energy(WIN_NB)),
        ),
        "LPC analysis, 16 kHz, 480 x order 8": (
            lambda: lpc.analyse(wb_frames, order=8, sr=WB_SR),
            lambda: analyse_c(wb_frames, lpc.asymmetric_window(WIN_WB), lag_window(8, WB_SR), 8, lpc.window_energy(WIN_WB)),
        ),
        "all-pole synthesis, order 16": (
            lambda: synthesis.banded_synthesis(u[None], a_sub[None], g_sub[None], past[None]),
            lambda: synthesize_c(u, a_sub, g_sub, past),
        ),
    }
    compile_s = {}
    for name, (_, compiled) in cases.items():
        t0 = time.perf_counter()
        compiled()  # the first call compiles (a second case of the same kernel reuses it unless types differ)
        compile_s[name] = time.perf_counter() - t0
    times: dict[str, tuple[list[float], list[float]]] = {name: ([], []) for name in cases}
    for _ in range(args.rounds):
        for name, fns in cases.items():
            for which, fn in enumerate(fns):
                t0 = time.perf_counter()
                fn()
                times[name][which].append(time.perf_counter() - t0)
    print(f"input: {SECONDS:.0f} s of speech ({nb_frames.shape[0]} hops), {args.rounds} alternating rounds, 1 thread")
    print(f"{'kernel':<38} {'numpy ms':>9} {'numba ms':>9} {'ratio':>6} {'max rel diff':>13} {'first call s':>13}")
    for name, (ref_fn, fn) in cases.items():
        want, got = ref_fn()[0], fn()[0]
        diff = float(np.max(np.abs(np.asarray(want) - np.asarray(got))) / np.max(np.abs(want)))
        t_np, t_c = (statistics.median(t) * 1e3 for t in times[name])
        print(f"{name:<38} {t_np:>9.2f} {t_c:>9.2f} {t_c / t_np:>6.2f} {diff:>13.1e} {compile_s[name]:>13.2f}")


if __name__ == "__main__":
    main()
