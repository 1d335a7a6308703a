"""LPC toolkit against general-purpose references (scipy, numpy) and the defining formulas."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from nenv.dsp import cepstrum, lpc


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


def test_autocorrelation_routes_match_the_defining_sum_and_numpy_correlate(rng):
    """Few lags (compiled direct sums) and many lags (FFT), one frame or many, all give
    r[k] = sum_n x[n] x[n+k]: checked against that sum written out and against numpy.correlate's
    full correlation."""
    x = rng.standard_normal((5, 240))
    for order in (10, 16, 147):
        ref = np.array([[sum(row[n] * row[n + k] for n in range(240 - k)) for k in range(order + 1)] for row in x])
        full = np.array([np.correlate(row, row, mode="full")[239 : 240 + order] for row in x])
        np.testing.assert_allclose(full, ref, atol=1e-10)
        for rows in (1, 2, 5):
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
