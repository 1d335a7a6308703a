"""LPC toolkit against general-purpose references (scipy, numpy) and the defining formulas."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from nenv import cepstrum, lpc


def _ar_frames(rng, n_frames=20, length=240, order=10):
    """Frames of random stable AR processes (poles inside radius 0.95)."""
    out = []
    for _ in range(n_frames):
        r = rng.uniform(0.3, 0.95, order // 2)
        th = rng.uniform(0.1, np.pi - 0.1, order // 2)
        poles = np.concatenate([r * np.exp(1j * th), r * np.exp(-1j * th)])
        a = np.real(np.poly(poles))
        from scipy.signal import lfilter

        out.append(lfilter([1.0], a, rng.standard_normal(length + 200))[200:])
    return np.array(out)


def test_levinson_matches_scipy_solve_toeplitz(rng):
    # Reference: scipy.linalg.solve_toeplitz solves the normal equations R a = -r directly.
    frames = _ar_frames(rng) * lpc.asymmetric_window(240)
    r = lpc.autocorrelation(frames, order=10)
    a, k, err = lpc.levinson(r, order=10)
    for i in range(r.shape[0]):
        ref = scipy.linalg.solve_toeplitz(r[i, :10], -r[i, 1:11])
        np.testing.assert_allclose(a[i, 1:], ref, rtol=1e-9, atol=1e-10)
        # prediction-error energy of the normal equations: r0 + sum a_k r_k
        np.testing.assert_allclose(err[i], r[i, 0] + ref @ r[i, 1:11], rtol=1e-9)
    np.testing.assert_allclose(err, r[:, 0] * np.prod(1 - k**2, axis=1), rtol=1e-9)


def test_scipys_compiled_levinson_serves_few_rows_and_agrees_with_the_float_recursion(rng, monkeypatch):
    """For one or two rows SciPy's compiled Levinson recursion (behind scipy.linalg.solve_toeplitz)
    replaces the recursion on Python floats; both give the same a, k, err, including silent rows,
    an autocorrelation that is not positive definite and a singular one (which SciPy refuses)."""
    assert lpc.compiled_levinson()  # if a SciPy release moves it, nenv still works (Python floats) but this tells us
    order = 10
    speech = lpc.condition(lpc.autocorrelation(_ar_frames(rng) * lpc.asymmetric_window(240), order=order), sr=8000)
    odd = [np.zeros(order + 1), np.r_[1.0, 2.0, np.zeros(order - 1)], np.ones(order + 1), np.r_[np.inf, np.ones(order)], np.r_[1.0, np.nan, np.zeros(order - 1)]]
    odd += [np.r_[1e308, 1e308, np.zeros(order - 1)], np.r_[np.inf, -np.inf, np.zeros(order - 1)]]  # sums that overflow or are undefined
    for r in [row for row in speech] + odd:
        fast = lpc.levinson(r[None], order=order)
        monkeypatch.setitem(lpc._compiled, "ok", False)
        slow = lpc.levinson(r[None], order=order)
        monkeypatch.setitem(lpc._compiled, "ok", True)
        for u, v in zip(fast, slow):
            np.testing.assert_allclose(u, v, rtol=1e-10, atol=1e-12)
    a, k, err = lpc.levinson(speech[:1], order=order)  # and the normal equations, solved by a general solver
    np.testing.assert_allclose(a[0, 1:], scipy.linalg.solve(scipy.linalg.toeplitz(speech[0, :order]), -speech[0, 1:]), rtol=1e-9)


def test_autocorrelation_routes_match_the_defining_sum_and_numpy_correlate(rng):
    """One or two frames (np.correlate per frame), many frames with few lags (direct products) and
    many lags (FFT) all give r[k] = sum_n x[n] x[n+k]: checked against that sum written out and
    against numpy.correlate's full correlation."""
    x = rng.standard_normal((5, 240))
    for order in (10, 16, 147):
        ref = np.array([[sum(row[n] * row[n + k] for n in range(240 - k)) for k in range(order + 1)] for row in x])
        full = np.array([np.correlate(row, row, mode="full")[239 : 240 + order] for row in x])
        np.testing.assert_allclose(full, ref, atol=1e-10)
        for rows in (1, 2, 5):  # 5 rows take the array routes
            np.testing.assert_allclose(lpc.autocorrelation(x[:rows], order=order), ref[:rows], atol=1e-9)
    short = lpc.autocorrelation(x[:1, :8], order=10)[0]  # more lags than samples: the extra lags are 0
    np.testing.assert_allclose(short[8:], 0.0, atol=0)
    np.testing.assert_allclose(short[:8], [np.dot(x[0, : 8 - k], x[0, k:8]) for k in range(8)], atol=1e-12)


def test_step_down_agrees_with_numpy_roots(rng):
    # Reference: numpy.roots pole magnitudes; A(z) is minimum phase iff all roots lie inside the unit circle.
    agree = 0
    for _ in range(400):
        order = int(rng.integers(2, 17))
        radius = rng.uniform(0.2, 1.3, order)
        ang = rng.uniform(0, np.pi, order)
        roots = radius * np.exp(1j * ang)
        roots[order // 2 :] = np.conj(roots[: order - order // 2])[: order - order // 2]
        a = np.real(np.poly(roots))
        true_stable = np.max(np.abs(np.roots(a))) < 1.0
        assert bool(lpc.is_stable(a)) == true_stable
        agree += 1
    assert agree == 400


def test_step_up_inverts_step_down(rng):
    k = rng.uniform(-0.99, 0.99, (50, 16))
    a = lpc.from_reflection(k)
    k2, stable = lpc.reflection(a)
    assert stable.all()
    np.testing.assert_allclose(k2, k, atol=1e-7)  # |k| near 1 amplifies rounding in the step-down


def test_stability_margin():
    a = lpc.from_reflection(np.array([0.5, -0.97, 0.2]))
    assert lpc.is_stable(a)
    assert not lpc.is_stable(a, margin=0.05)


def test_cepstrum_recursion_matches_fft_definition(rng):
    # Definition: the complex cepstrum of minimum-phase G/A(z) is, for n >= 1, twice the
    # real cepstrum (inverse FFT of ln|H|); recursion from Markel & Gray (1976).
    frames = _ar_frames(rng, n_frames=8)
    a, gain = lpc.analyse(frames, order=10, sr=8000)
    c = cepstrum.to_cepstrum(a, n_ceps=40, gain=gain)
    n_fft = 8192
    logmag = np.log(gain)[:, None] - np.log(np.abs(np.fft.fft(a, n_fft, axis=1)))
    real_ceps = np.fft.ifft(logmag, axis=1).real
    np.testing.assert_allclose(c[:, 0], real_ceps[:, 0], atol=1e-9)
    np.testing.assert_allclose(c[:, 1:], 2 * real_ceps[:, 1:41], atol=1e-9)
    # and log_magnitude() evaluates the same envelope
    np.testing.assert_allclose(cepstrum.log_magnitude(cepstrum.to_cepstrum(a, n_ceps=400, gain=gain), n_fft=n_fft), logmag[:, : n_fft // 2 + 1], atol=1e-6)


def test_cepstrum_round_trips(rng):
    frames = _ar_frames(rng, n_frames=10)
    a, gain = lpc.analyse(frames, order=10, sr=8000)
    c = cepstrum.to_cepstrum(a, n_ceps=10, gain=gain)
    a_rec, g_rec = cepstrum.from_cepstrum(c, order=10)
    np.testing.assert_allclose(a_rec, a, atol=1e-10)
    np.testing.assert_allclose(g_rec, gain, rtol=1e-12)
    # The stable route recovers the model when the cepstrum is long enough to describe it.
    c_long = cepstrum.to_cepstrum(a, n_ceps=200, gain=gain)
    a_st, g_st = cepstrum.from_cepstrum_stable(c_long, order=10, n_fft=2048)
    np.testing.assert_allclose(a_st, a, atol=2e-3)
    np.testing.assert_allclose(g_st, gain, rtol=2e-3)


@pytest.mark.parametrize("scale", [0.1, 0.5, 2.0, 10.0])
def test_stable_route_is_stable_for_random_cepstra(rng, scale):
    # Reference: numpy.roots; the recursion alone is unstable for many of these.
    c = rng.standard_normal((300, 21)) * scale
    a, gain = cepstrum.from_cepstrum_stable(c, order=16)
    assert np.all(np.isfinite(a)) and np.all(np.isfinite(gain)) and np.all(gain > 0)
    radii = np.array([np.max(np.abs(np.roots(row))) for row in a])
    assert np.all(radii < 1.0)
    assert np.all(lpc.is_stable(a))
    if scale >= 0.5:
        a_rec, _ = cepstrum.from_cepstrum(c, order=16)
        assert not np.all(lpc.is_stable(a_rec))  # the point of having a stable route


def test_asymmetric_window_is_g729_window():
    # ITU-T G.729 clause 3.2.1: w(n) = 0.54 - 0.46 cos(2 pi n / 399), n = 0..199;
    # w(n) = cos(2 pi (n - 200) / 159), n = 200..239.
    w = lpc.asymmetric_window(240)
    n = np.arange(240)
    ref = np.where(n < 200, 0.54 - 0.46 * np.cos(2 * np.pi * n / 399), np.cos(2 * np.pi * (n - 200) / 159))
    np.testing.assert_allclose(w, ref, atol=1e-15)


def test_lag_window_values():
    # ITU-T G.729 clause 3.2.1: w_lag(k) = exp(-0.5 (2 pi f0 k / fs)^2), f0 = 60 Hz, fs = 8000; r(0) *= 1.0001.
    r = np.ones(11)
    out = lpc.condition(r, sr=8000)
    assert out[0] == pytest.approx(1.0001)
    assert out[1] == pytest.approx(np.exp(-0.5 * (2 * np.pi * 60 / 8000) ** 2), rel=1e-12)
    assert out[10] == pytest.approx(np.exp(-0.5 * (2 * np.pi * 600 / 8000) ** 2), rel=1e-12)


def test_frame_buffer_is_chunk_invariant(rng):
    y = rng.standard_normal(80 * 37)
    whole = lpc.frame(y, frame_length=240, hop_length=80)
    buf = lpc.FrameBuffer(frame_length=240, hop_length=80)
    cuts = [0, 80, 400, 480, 1600, 80 * 37]
    parts = np.vstack([buf.push(y[s:e]) for s, e in zip(cuts[:-1], cuts[1:])])
    np.testing.assert_array_equal(parts, whole)
    assert whole.shape == (37, 240)
    np.testing.assert_array_equal(whole[5], y[5 * 80 + 80 - 240 : 6 * 80])
    np.testing.assert_array_equal(whole[0, :160], 0.0)


degenerate = st.sampled_from(["zeros", "dc", "impulse", "square", "noise", "tiny"])


@settings(max_examples=60, deadline=None)
@given(kind=degenerate, amp=st.floats(1e-6, 1.0), seed=st.integers(0, 2**16))
def test_analysis_is_finite_and_stable_on_degenerate_frames(kind, amp, seed):
    r = np.random.default_rng(seed)
    n = 240
    x = {
        "zeros": np.zeros(n),
        "dc": np.full(n, amp),
        "impulse": np.eye(1, n, int(r.integers(n)))[0] * amp,
        "square": amp * np.sign(np.sin(2 * np.pi * np.arange(n) * r.uniform(50, 3900) / 8000) + 1e-12),
        "noise": amp * r.uniform(-1, 1, n),
        "tiny": np.full(n, 1e-300),
    }[kind]
    a, gain = lpc.analyse(x[None], order=10, sr=8000)
    assert a.shape == (1, 11) and np.all(np.isfinite(a)) and np.all(np.isfinite(gain))
    assert lpc.is_stable(a)[0]
    w = lpc.asymmetric_window(n)
    # the prediction error never exceeds the (noise-corrected) windowed energy
    assert 0 <= gain[0] <= np.sqrt(np.sum((w * x) ** 2) * 1.0001 / np.sum(w * w)) * (1 + 1e-9) + 1e-300


@settings(max_examples=40, deadline=None)
@given(arrays(np.float64, st.tuples(st.integers(1, 5), st.integers(2, 24)), elements=st.floats(-50, 50)))
def test_stable_route_property(c):
    a, gain = cepstrum.from_cepstrum_stable(c, order=16)
    assert np.all(np.isfinite(a)) and np.all(lpc.is_stable(a))
    assert not np.any(np.isnan(gain)) and np.all(gain > 0)  # +inf allowed for absurd levels


def test_scalar_paths_for_few_rows_match_the_vectorised_ones():
    """Levinson, step-down, step-up (1-2 rows) and the cepstrum recursion (up to 8 rows) run on Python floats; same results as the array code."""
    rng = np.random.default_rng(1)
    for p in (8, 10, 16):
        for trial in range(200):
            n = 1 + trial % lpc.SCALAR_MAX_ROWS
            r = lpc.autocorrelation(rng.standard_normal((n, 240)), order=p)
            if trial % 7 == 0:
                r[0] = 0.0  # a silent frame
            few, many = lpc.levinson(r, order=p), lpc.levinson(np.concatenate([r] * 3), order=p)
            for u, v in zip(few, many):
                np.testing.assert_allclose(u, v[:n], rtol=1e-10, atol=1e-12)
            a = lpc.from_reflection(rng.uniform(-0.99, 0.99, (n, p))) if trial % 2 else np.concatenate([np.ones((n, 1)), rng.standard_normal((n, p))], axis=1)
            (k1, s1), (k2, s2) = lpc.reflection(a), lpc.reflection(np.concatenate([a] * 3))
            assert np.array_equal(s1, s2[:n])
            np.testing.assert_allclose(k1[s1], k2[:n][s1], rtol=1e-8, atol=1e-10)  # k is meaningful only for stable rows
            kk = rng.uniform(-1, 1, (n, p))
            np.testing.assert_allclose(lpc.from_reflection(kk), lpc.from_reflection(np.concatenate([kk] * 3))[:n], rtol=1e-12, atol=1e-14)
            g = rng.uniform(0.1, 2.0, n)
            for n_ceps in (p - 2, p + 4):
                reps = cepstrum.SCALAR_MAX_ROWS + 1  # enough rows for the array code
                np.testing.assert_allclose(cepstrum.to_cepstrum(a, n_ceps=n_ceps, gain=g), cepstrum.to_cepstrum(np.concatenate([a] * reps), n_ceps=n_ceps, gain=np.tile(g, reps))[:n], rtol=1e-12, atol=1e-12)
            a8 = np.concatenate([np.ones((cepstrum.SCALAR_MAX_ROWS, 1)), rng.standard_normal((cepstrum.SCALAR_MAX_ROWS, p))], axis=1)
            np.testing.assert_allclose(cepstrum.to_cepstrum(a8, n_ceps=p), cepstrum.to_cepstrum(np.concatenate([a8, a8]), n_ceps=p)[: a8.shape[0]], rtol=1e-12, atol=1e-12)


def _recursion_reference(u, a, g, past):
    """The all-pole recursion ``y[n] = g u[n] - sum_i a_i y[n-i]`` written out in Python, one stream."""
    J, L = u.shape
    p = a.shape[-1] - 1
    mem, out = past[::-1].tolist(), []  # oldest first
    for j in range(J):
        for t in range(L):
            y = g[j] * u[j, t] - sum(a[j, i] * mem[-i] for i in range(1, p + 1))
            out.append(y)
            mem = mem[1:] + [y]
    return np.array(out).reshape(J, L), np.array(mem[::-1])


def test_synthesis_routes_equal_the_recursion_and_scipy_lfilter(monkeypatch):
    """The exact all-pole synthesis routes (LAPACK banded solve, sample by sample across streams) equal the
    recursion written out, and scipy.signal.lfilter with its initial conditions from scipy.signal.lfiltic
    (a general-purpose reference library) on each sub-frame, memory carried."""
    from scipy import signal

    from nenv import synthesis

    rng = np.random.default_rng(4)
    B, J, L, p = 9, 8, 40, 16
    a = lpc.from_reflection(rng.uniform(-0.95, 0.95, (B, J, p)))
    u, g, past = rng.standard_normal((B, J, L)), rng.uniform(0.1, 3.0, (B, J)), rng.standard_normal((B, p))
    results = [synthesis.banded_synthesis(u, a, g, past), synthesis.direct_synthesis(u, a, g, past)]
    # the banded solve split into several solves: streams in groups, and one stream's sub-frames in pieces
    monkeypatch.setattr(synthesis, "BANDED_MAX_ROWS", 2 * (J * L + p))
    results.append(synthesis.banded_synthesis(u, a, g, past))
    monkeypatch.setattr(synthesis, "BANDED_MAX_ROWS", 3 * L + p)
    results.append(synthesis.banded_synthesis(u, a, g, past))
    for b in range(B):
        y_ref, s_ref = _recursion_reference(u[b], a[b], g[b], past[b])
        mem, y_lf = past[b], []
        for j in range(J):
            y, _ = signal.lfilter([g[b, j]], a[b, j], u[b, j], zi=signal.lfiltic([g[b, j]], a[b, j], mem))
            y_lf.append(y)
            mem = np.concatenate([y[::-1], mem])[:p]
        np.testing.assert_allclose(np.array(y_lf), y_ref, rtol=1e-9, atol=1e-9)
        for y, state in results:
            np.testing.assert_allclose(y[b], y_ref, rtol=1e-9, atol=1e-9)
            np.testing.assert_allclose(state[b], s_ref, rtol=1e-9, atol=1e-9)


def test_banded_synthesis_with_fewer_samples_than_the_order_keeps_the_older_memory():
    """A stretch shorter than the filter order: the new memory is the new samples, then the oldest of the old memory."""
    from nenv import synthesis

    rng = np.random.default_rng(5)
    p = 16
    a = lpc.from_reflection(rng.uniform(-0.9, 0.9, (1, 1, p)))
    u, past = rng.standard_normal((1, 1, 5)), rng.standard_normal((1, p))
    y, state = synthesis.banded_synthesis(u, a, np.ones((1, 1)), past)
    y_ref, s_ref = _recursion_reference(u[0], a[0], np.ones(1), past[0])
    np.testing.assert_allclose(y[0], y_ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(state[0], s_ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(state[0, 5:], past[0, :-5])


def test_frames_at_the_bottom_of_float64_count_as_silent():
    """Values near the denormal range keep too few bits for Levinson-Durbin (found by the fuzz test): silent, finite."""
    for amp in (3.05e-161, 1e-150, 1e-300, 5e-324):
        a, gain = lpc.analyse(np.full((2, 240), amp), order=10, sr=8000)
        assert np.all(np.isfinite(a)) and np.all(np.isfinite(gain))
        np.testing.assert_array_equal(a, np.eye(1, 11).repeat(2, axis=0))
    a, gain = lpc.analyse(1e-100 * np.random.default_rng(0).standard_normal((3, 240)), order=10, sr=8000)
    assert np.all(np.isfinite(a)) and np.all(gain > 0) and np.all(lpc.is_stable(a))  # tiny but representable: analysed


def test_hop_frames_equal_numpy_sliding_windows(rng):
    # Reference: numpy.lib.stride_tricks.sliding_window_view, every hop_length-th window.
    buf = rng.standard_normal((3, 400))
    got = lpc.hop_frames(buf, frame_length=240, hop_length=80, n_frames=3)
    want = np.lib.stride_tricks.sliding_window_view(buf, 240, axis=1)[:, ::80][:, :3]
    np.testing.assert_array_equal(got, want)
    assert not got.flags.writeable
    with pytest.raises(ValueError):
        lpc.hop_frames(buf, frame_length=240, hop_length=80, n_frames=3 + 1)
