"""Every compiled kernel (nenv.dsp.kernels) against a plain numpy/scipy reference, on random batches and edge rows.

References are general-purpose libraries and defining formulas, not nenv code:
scipy.linalg.solve_toeplitz (normal equations), numpy.correlate, numpy.roots and numpy.poly
(polynomials), the FFT definition of the cepstrum, scipy.signal.lfilter/lfiltic, sosfilt,
upfirdn and freqz.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from scipy import signal

from nenv.dsp import kernels

SILENT = 1e-280


def _stable_a(rng, n, p, radius=0.95):
    """Predictor polynomials [1, a_1..a_p] with random roots inside ``radius`` (numpy.poly of the roots)."""
    out = np.empty((n, p + 1))
    for i in range(n):
        r = rng.uniform(0.2, radius, p // 2)
        th = rng.uniform(0.05, np.pi - 0.05, p // 2)
        roots = np.concatenate([r * np.exp(1j * th), r * np.exp(-1j * th)] + ([rng.uniform(-radius, radius, 1)] if p % 2 else []))
        out[i] = np.real(np.poly(roots))
    return out


def _speech_like_r(rng, n, order, length=240):
    a = _stable_a(rng, n, 10)
    x = np.array([signal.lfilter([1.0], a[i], rng.standard_normal(length + 100))[100:] for i in range(n)])
    return np.array([np.correlate(row, row, "full")[length - 1 : length + order] for row in x]), x


def test_autocorrelation_equals_numpy_correlate_and_rows_are_independent(rng):
    x = rng.standard_normal((7, 240))
    r = kernels.autocorrelation(x, 16)
    ref = np.array([np.correlate(row, row, "full")[239 : 240 + 16] for row in x])  # numpy.correlate
    np.testing.assert_allclose(r, ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(kernels.autocorrelation(x[3:4], 16), r[3:4])
    short = kernels.autocorrelation(x[:1, :5], 8)[0]  # more lags than samples: the rest are 0
    np.testing.assert_allclose(short[:5], np.correlate(x[0, :5], x[0, :5], "full")[4:], rtol=1e-12, atol=1e-12)  # the last lag too
    np.testing.assert_array_equal(short[5:], 0.0)
    assert kernels.autocorrelation(np.zeros((0, 10)), 4).shape == (0, 5)


def test_levinson_solves_the_normal_equations_like_scipy_solve_toeplitz(rng):
    r, _ = _speech_like_r(rng, 12, 10)
    a, k, err = kernels.levinson(r, 10, SILENT)
    for i in range(r.shape[0]):
        ref = scipy.linalg.solve_toeplitz(r[i, :10], -r[i, 1:11])  # scipy, the normal equations
        np.testing.assert_allclose(a[i, 1:], ref, rtol=1e-9, atol=1e-11)
        np.testing.assert_allclose(err[i], r[i, 0] + ref @ r[i, 1:11], rtol=1e-9)
        for m in (1, 4, 10):  # k_m is the last coefficient of the order-m solution
            np.testing.assert_allclose(k[i, m - 1], scipy.linalg.solve_toeplitz(r[i, :m], -r[i, 1 : m + 1])[-1], rtol=1e-9, atol=1e-12)


def _levinson_written_out(r, order):
    """The recursion as in a textbook (Rabiner & Schafer 1978, eq. 8.67-8.72), Python floats, numpy's IEEE division."""
    a, err, ks = [1.0] + [0.0] * order, r[0], []
    with np.errstate(all="ignore"):
        for i in range(1, order + 1):
            acc = sum(a[j] * r[i - j] for j in range(i))
            ki = float(np.float64(-acc) / np.float64(err))
            a = [1.0] + [a[j] + ki * a[i - j] for j in range(1, i)] + [ki] + [0.0] * (order - i)
            ks.append(ki)
            err = err * (1.0 - ki * ki)
    return np.array(a), np.array(ks), err


def test_levinson_edge_rows_silence_nan_inf_and_singular(rng):
    order = 10
    odd = [np.zeros(order + 1), np.r_[1e-300, np.zeros(order)], np.r_[np.nan, np.ones(order)], np.r_[1.0, 2.0, np.zeros(order - 1)], np.ones(order + 1), np.r_[np.inf, np.ones(order)], np.r_[1e308, 1e308, np.zeros(order - 1)]]
    r = np.array(odd)
    a, k, err = kernels.levinson(r, order, SILENT)
    for i in range(3):  # silence, values at the bottom of float64, NaN energy: no model
        np.testing.assert_array_equal(a[i], np.r_[1.0, np.zeros(order)])
        assert not k[i].any() and err[i] == 0
    for i in range(3, len(odd)):  # not positive definite, singular, infinite: what the recursion gives, IEEE values
        want_a, want_k, want_err = _levinson_written_out(odd[i].tolist(), order)
        np.testing.assert_allclose(a[i], want_a, rtol=1e-12, equal_nan=True)
        np.testing.assert_allclose(k[i], want_k, rtol=1e-12, equal_nan=True)
        np.testing.assert_allclose(err[i], want_err, rtol=1e-12, equal_nan=True)


def test_lpc_analyse_is_window_autocorrelation_lag_window_and_levinson(rng):
    _, x = _speech_like_r(rng, 6, 10)
    x *= np.array([1.0, 0.05, 1e-3, 3e-5, 0.3, 1e-6])[:, None]  # rows at unit variance down to far below speech at -26 dBov (full scale 1.0)
    w = np.hamming(240)
    lag = np.exp(-0.5 * (2 * np.pi * 60 * np.arange(11) / 8000) ** 2)
    lag[0] = 1.0001
    a, k, gain = kernels.lpc_analyse(x, w, lag, 10, SILENT, float(w @ w))
    for i in range(x.shape[0]):
        xw = x[i] * w
        r = np.correlate(xw, xw, "full")[239:250] * lag
        ref = scipy.linalg.solve_toeplitz(r[:10], -r[1:])
        np.testing.assert_allclose(a[i, 1:], ref, rtol=1e-9, atol=1e-11)
        np.testing.assert_allclose(gain[i] ** 2 * (w @ w), r[0] + ref @ r[1:], rtol=1e-9)


def _step_up_numpy(k):
    """A_i(z) = A_{i-1}(z) + k_i z^-i A_{i-1}(1/z), as polynomial arrays (the definition)."""
    a = np.array([1.0])
    for ki in k:
        a = np.r_[a, 0.0] + ki * np.r_[a, 0.0][::-1]
    return a


def test_step_up_and_step_down_against_the_polynomial_definition_and_numpy_roots(rng):
    k = rng.uniform(-0.99, 0.99, (50, 16))
    a = kernels.from_reflection(k)
    for i in range(k.shape[0]):
        np.testing.assert_allclose(a[i], _step_up_numpy(k[i]), rtol=1e-12, atol=1e-12)
    k_back, stable = kernels.reflection(a)
    assert stable.all()
    np.testing.assert_allclose(k_back, k, atol=1e-7)  # the step-down loses digits as |k| nears 1 (here 0.99, order 16)
    k9 = rng.uniform(-0.9, 0.9, (50, 16))
    np.testing.assert_allclose(kernels.reflection(kernels.from_reflection(k9))[0], k9, atol=1e-11)
    # stability agrees with numpy.roots: all roots of A inside the unit circle
    b = np.concatenate([np.ones((200, 1)), rng.standard_normal((200, 8)) * 0.4], axis=1)
    _, st = kernels.reflection(b)
    roots_inside = np.array([np.all(np.abs(np.roots(row)) < 1.0) for row in b])
    assert (st == roots_inside).mean() == 1.0 and 0 < st.sum() < len(st)  # both kinds present


def test_cepstrum_recursion_equals_the_fft_definition(rng):
    a = _stable_a(rng, 20, 16, radius=0.9)
    c = kernels.to_cepstrum(a, 24)
    n_fft = 1 << 14
    log_mag = -np.log(np.abs(np.fft.rfft(a, n=n_fft, axis=1)))  # ln|1/A(e^jw)|
    real_cep = np.fft.irfft(log_mag, n=n_fft, axis=1)[:, :25]
    np.testing.assert_allclose(c[:, 1:], 2 * real_cep[:, 1:], atol=1e-9)  # minimum phase: c_n = 2 x real cepstrum
    assert not c[:, 0].any()


def test_residual_equals_lfilter_with_the_frame_as_history(rng):
    frames = rng.standard_normal((9, 240))
    a = _stable_a(rng, 9, 10)
    e = kernels.residual(frames, a, 80)
    for i in range(9):
        np.testing.assert_allclose(e[i], signal.lfilter(a[i], [1.0], frames[i])[-80:], rtol=1e-12, atol=1e-12)


def test_rectify_equals_abs_lfilter_and_per_hop_power(rng):
    up = rng.standard_normal((3, 640))
    state = rng.standard_normal(3) * 0.1
    got_state = state.copy()
    u = kernels.rectify(up, got_state, 0.99, 160)
    for i in range(3):
        z, zf = signal.lfilter([1.0, -1.0], [1.0, -0.99], np.abs(up[i]), zi=[state[i]])
        z = z.reshape(4, 160)
        scale = np.sqrt(np.mean(up[i].reshape(4, 160) ** 2, axis=1) / np.mean(z**2, axis=1))
        np.testing.assert_allclose(u[i], (z * scale[:, None]).ravel(), rtol=1e-11, atol=1e-13)
        np.testing.assert_allclose(got_state[i], zf[0], rtol=1e-12)


@pytest.mark.parametrize("chunks", [[480], [1, 159, 320], [200, 280]])
def test_sosfilt_and_fir_with_state_equal_scipy_in_one_go(rng, chunks):
    sos = np.ascontiguousarray(signal.ellip(10, 0.2, 60, 3450, btype="highpass", fs=16000, output="sos"))
    taps = signal.firwin(33, 0.3)
    x = rng.standard_normal((4, sum(chunks)))
    zs, zf = np.zeros((4, sos.shape[0], 2)), np.zeros((4, 32))
    ys, yf, pos = [], [], 0
    for n in chunks:
        ys.append(kernels.sosfilt(sos, np.ascontiguousarray(x[:, pos : pos + n]), zs))
        yf.append(kernels.fir(taps, np.ascontiguousarray(x[:, pos : pos + n]), zf))
        pos += n
    np.testing.assert_allclose(np.hstack(ys), signal.sosfilt(sos, x, axis=1), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(np.hstack(yf), signal.lfilter(taps, [1.0], x, axis=1), rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("n_sections", range(1, 8))
def test_sosfilt_any_number_of_sections_equals_scipy(rng, n_sections):
    """The kernel runs sections three at a time: every remainder (1, 2) and count (1..7 sections),
    fed in chunks of 1, 2 and more samples, against scipy.signal.sosfilt (reference)."""
    sos = np.ascontiguousarray(signal.butter(2 * n_sections, 1000, btype="highpass", fs=16000, output="sos"))
    x = rng.standard_normal((3, 200))
    zs, ys, pos = np.zeros((3, n_sections, 2)), [], 0
    for n in (1, 2, 0, 197):
        ys.append(kernels.sosfilt(sos, np.ascontiguousarray(x[:, pos : pos + n]), zs))
        pos += n
    want, zf = signal.sosfilt(sos, x, axis=1, zi=np.zeros((n_sections, 3, 2)))
    np.testing.assert_allclose(np.hstack(ys), want, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(zs, zf.transpose(1, 0, 2), rtol=1e-10, atol=1e-12)


def test_upsample2_equals_zero_insertion_and_the_fir_by_upfirdn(rng):
    taps = signal.firwin(47, 0.45) * 2
    even, odd = np.ascontiguousarray(taps[0::2][::-1]), np.ascontiguousarray(taps[1::2][::-1])
    x = rng.standard_normal((2, 400))
    hist = np.zeros((2, 23))
    y = np.hstack([kernels.upsample2(np.ascontiguousarray(x[:, s : s + n]), hist, even, odd) for s, n in ((0, 80), (80, 7), (87, 313))])
    ref = np.array([signal.upfirdn(taps, row, up=2)[:800] for row in x])  # scipy: zero insertion, then the FIR
    np.testing.assert_allclose(y, ref, rtol=1e-12, atol=1e-13)


def _synthesis_reference(u, k, log_g, k_prev, g_prev, past, n_sub, max_k):
    """Interpolated envelopes in numpy, the step-up by polynomial definition, and scipy.signal.lfilter
    per sub-frame with its initial conditions from scipy.signal.lfiltic (memory carried)."""
    H, p = k.shape
    L = u.size // H
    sub = L // n_sub
    k = np.clip(np.nan_to_num(k, nan=0.0), -max_k, max_k)
    mem, out = past.copy(), []
    kb, gb = k_prev, g_prev
    for t in range(H):
        for j in range(n_sub):
            w = (j + 1) / n_sub
            a = _step_up_numpy(kb * (1 - w) + k[t] * w)
            g = np.exp(gb * (1 - w) + log_g[t] * w)
            seg = u[t * L + j * sub : t * L + (j + 1) * sub]
            y, _ = signal.lfilter([g], a, seg, zi=signal.lfiltic([g], a, mem))
            out.append(y)
            mem = np.concatenate([y[::-1], mem])[:p]
        kb, gb = k[t], log_g[t]
    return np.concatenate(out), mem


@pytest.mark.parametrize("p", [16, 10])  # 16: the wideband envelope's order, which has its own loop
def test_synthesize_equals_lfilter_per_sub_frame_with_interpolated_envelopes(rng, p):
    B, H, L, n_sub = 5, 3, 160, 4
    k = rng.uniform(-0.97, 0.97, (B, H, p))
    k[1, 1, 3] = np.nan  # NaN -> 0
    k[2, 0, 0] = 1.5  # clamped
    u, log_g = rng.standard_normal((B, H * L)), rng.uniform(-3, 1, (B, H))
    k_prev, g_prev, past = rng.uniform(-0.9, 0.9, (B, p)), rng.uniform(-3, 0, B), rng.standard_normal((B, p))
    want = [_synthesis_reference(u[b], k[b], log_g[b], k_prev[b], g_prev[b], past[b], n_sub, 0.9999) for b in range(B)]
    y = kernels.synthesize(u, k, log_g, k_prev, g_prev, past, n_sub, 0.9999)
    for b in range(B):
        np.testing.assert_allclose(y[b], want[b][0], rtol=1e-8, atol=1e-9)
        np.testing.assert_allclose(past[b], want[b][1], rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(k_prev, np.clip(np.nan_to_num(k[:, -1]), -0.9999, 0.9999))
    np.testing.assert_allclose(g_prev, log_g[:, -1])


def test_band_ratio_equals_freqz_on_the_band(rng):
    from nenv.dsp import cepstrum

    a_wb, a_nb = _stable_a(rng, 6, 16), _stable_a(rng, 6, 10)
    bins = cepstrum.band_bins(300.0, 3400.0, n_fft=512, sr=16000)
    cw, sw = cepstrum.cosine_table(17, 512, *bins)
    cn, sn = cepstrum.cosine_table(11, 256, *bins)
    got = kernels.band_ratio(a_wb, a_nb, cw, sw, cn, sn)
    f = np.arange(bins[0], bins[1] + 1) * 16000 / 512
    for i in range(6):
        _, h_wb = signal.freqz([1.0], a_wb[i], worN=f, fs=16000)  # scipy.signal.freqz
        _, h_nb = signal.freqz([1.0], a_nb[i], worN=f, fs=8000)
        np.testing.assert_allclose(got[i], np.abs(h_wb) ** 2 / np.abs(h_nb) ** 2, rtol=1e-9)


def test_first_process_compiles_and_says_so_later_ones_load_the_cache(tmp_path):
    """A cold cache (a fresh NUMBA_CACHE_DIR) compiles every kernel and tells; the next process loads them silently."""
    import os
    import subprocess
    import sys

    code = "from nenv.dsp import kernels; import sys; kernels.warm(notice=lambda t: print(t)); print(kernels.warm(notice=print))"
    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp_path))
    runs = [subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=300) for _ in range(2)]
    assert all(r.returncode == 0 for r in runs), [r.stderr for r in runs]
    cold, warm = runs[0].stdout.splitlines(), runs[1].stdout.splitlines()
    assert cold[0].startswith("compiling signal kernels (once") and cold[1].startswith("signal kernels compiled in ")
    assert warm == ["0.0"], warm  # loaded from the cache: no notice; a second warm() in a process does nothing
    assert any(tmp_path.rglob("*.nbi")), "numba wrote no cache index"


def test_after_warm_up_every_kernel_is_compiled_once_and_never_compiles_on_a_call():
    """Compilation must not land on a call: once warm, ``kernels.NAME`` is the compiled function itself,
    with its one signature, and compiling is off, so arguments of another type fail at once (TypeError)
    instead of compiling in the middle of a hop. No module but kernels.py (and the loops among
    themselves) reaches the loops, so nothing calls a kernel around the warm-up."""
    import re
    from pathlib import Path

    kernels.warm()
    for name in kernels.PUBLIC:
        fn = getattr(kernels.loops, name)
        assert getattr(kernels, name) is fn, name
        assert len(fn.signatures) == 1 and not fn._can_compile, name  # numba's Dispatcher
    with pytest.raises(TypeError, match="No matching definition"):
        kernels.autocorrelation(np.zeros((2, 8), dtype=np.float32), 2)
    package = Path(kernels.__file__).resolve().parents[1]
    reach = [str(f.relative_to(package)) for f in package.rglob("*.py") if f.name != "kernels.py" and not f.name.endswith("_loops.py") and re.search(r"^\s*(from nenv\.dsp(\.\w+_loops)? import .*\w+_loops|import nenv\.dsp\.\w+_loops|from nenv\.dsp\.\w+_loops import)", f.read_text(), re.M)]
    assert reach == []


def test_engines_made_in_several_threads_at_once_all_start():
    """A gateway may make its engines in several threads at start-up. Each engine warms the kernels;
    two warm-ups at once used to collide (the first to finish forbids compiling, and the other's
    next compile call raised "compilation disabled"). A fresh process, four threads released together."""
    import json
    import subprocess
    import sys

    code = """
import threading
from nenv.serve.runtime import CallEngine
barrier, errors, outs = threading.Barrier(4), [], []
def make():
    barrier.wait()
    try:
        outs.append(CallEngine(method="imaging").feed([0.1] * 160).size)
    except Exception as e:
        errors.append(repr(e))
threads = [threading.Thread(target=make) for _ in range(4)]
[t.start() for t in threads]
[t.join() for t in threads]
print(json.dumps([errors, outs]))
"""
    r = subprocess.run([sys.executable, "-c", "import json" + code], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    errors, outs = json.loads(r.stdout)
    assert errors == [] and len(outs) == 4 and len(set(outs)) == 1 and outs[0] > 0, r.stdout


def test_mismatch_equals_the_numpy_formula(rng):
    # Reference: numpy's float32 log10 of the ratios, mean removed, RMS. The kernel takes each log in
    # single precision too, with the C library's log10f: the two agree to about a unit in the last
    # place of a float32 (measured 1e-6 dB), far below any threshold's meaning.
    from nenv.dsp import kernels

    r = np.exp(rng.normal(0, 3, (300, 100)))
    r[0] = 1.0  # a flat row: 0 dB
    d = np.log10(r.astype(np.float32)).astype(np.float64) * 10
    d -= d.mean(axis=1, keepdims=True)
    want = np.sqrt((d * d).mean(axis=1))
    got = kernels.mismatch_db(r)
    np.testing.assert_allclose(got, want, atol=1e-5)
    assert got[0] == 0.0
