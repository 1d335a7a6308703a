"""The guard's spectral measures against scipy.signal.freqz (a general-purpose reference)."""

from __future__ import annotations

import numpy as np
from scipy import signal

from nenv import cepstrum, lpc
from nenv.guard import telephone_band_mismatch


def _random_models(rng, n, order):
    return lpc.from_reflection(rng.uniform(-0.95, 0.95, (n, order)))


def test_power_spectrum_matches_freqz_on_the_whole_grid_and_on_a_band(rng):
    # Reference: scipy.signal.freqz(G, A, worN=n_fft//2+1 points of [0, pi]) evaluates G/A(e^jw) directly.
    a = _random_models(rng, 6, 16)
    g = rng.uniform(0.1, 3.0, 6)
    full = cepstrum.power_spectrum(a, gain=g, n_fft=512)
    band = cepstrum.power_spectrum(a, gain=g, n_fft=512, bins=(109, 256))
    for i in range(6):
        _, h = signal.freqz([g[i]], a[i], worN=np.arange(257) * 2 * np.pi / 512)
        np.testing.assert_allclose(full[i], np.abs(h) ** 2, rtol=1e-9)
        np.testing.assert_allclose(band[i], np.abs(h[109:]) ** 2, rtol=1e-9)


def test_mismatch_is_the_rms_of_mean_removed_log_envelopes_over_the_telephone_band(rng):
    # The definition in nenv.guard, evaluated independently with freqz at the same frequencies.
    a_wb, a_nb = _random_models(rng, 5, 16), _random_models(rng, 5, 10)
    f = np.arange(0, 8000.0 + 1, 31.25)
    f = f[(f >= 300) & (f <= 3400)]
    got = telephone_band_mismatch(a_wb, a_nb)
    for i in range(5):
        _, h_wb = signal.freqz([1.0], a_wb[i], worN=f, fs=16000)
        _, h_nb = signal.freqz([1.0], a_nb[i], worN=f, fs=8000)
        wb, nb = 20 * np.log10(np.abs(h_wb)), 20 * np.log10(np.abs(h_nb))
        d = (wb - wb.mean()) - (nb - nb.mean())
        np.testing.assert_allclose(got[i], np.sqrt(np.mean(d * d)), rtol=1e-5)  # logarithms in single precision


def test_a_zero_of_the_envelope_on_the_unit_circle_gives_a_large_finite_mismatch():
    # A(z) with zeros at +-1 kHz on the unit circle: the envelope 1/|A|^2 is infinite at one of the
    # 99 bins (about 300 dB above the rest), which must count as a large, finite mismatch (a NaN
    # would compare False against the limit and let the hop through).
    z = np.exp(2j * np.pi * 1000 / 16000)
    a_wb = np.real(np.poly([z, np.conj(z)]))
    got = telephone_band_mismatch(a_wb[None, :], np.array([[1.0, 0.0]]))
    assert np.isfinite(got[0]) and got[0] > 20.0


def test_stability_verdicts_from_the_recursions_coefficients_equal_the_step_down_and_numpy_roots(rng):
    """The guard judges stability on the reflection coefficients of the Levinson-Durbin recursion
    that built the envelope; the same verdicts and values come from the step-down of its predictor
    coefficients, and an envelope is judged unstable exactly where numpy.roots puts a pole at or
    beyond 1 - margin (the margin is on |k|, so only the direction is checked: a pole that close
    to the circle means a |k| that close to 1)."""
    from nenv.guard import Check, Guard, GuardLimits

    n, order = 300, 16
    m = np.arange(1, 21)
    ceps = rng.normal(0.0, 0.3, (n, 20)) / m
    sharp = rng.random(n) < 0.3  # resonances so sharp that some reflection coefficient nears 1
    f = rng.uniform(500, 7500, n)[:, None]
    ceps[sharp] = (2 * rng.uniform(0.995, 0.99999, (n, 1)) ** m * np.cos(2 * np.pi * f / 16000 * m) / m * rng.uniform(5, 60, (n, 1)))[sharp]
    c = np.concatenate([np.zeros((n, 1)), ceps], axis=1)
    a, gain, k_rec = cepstrum.from_cepstrum_stable(c, order=order, with_reflection=True)
    guard = Guard(GuardLimits(level_min_db=-100, level_max_db=100, mismatch_max_db=1e9, novelty_max=1e9, stability_margin=1e-3))
    common = dict(ceps=ceps, level_db=np.zeros(n), a=a, gain=gain, a_nb=np.tile(np.r_[1.0, np.zeros(10)], (n, 1)), novelty=np.zeros(n), cell=np.zeros(n, dtype=int))
    with_k, k_used = guard.assess(**common, k=k_rec)
    stepped, k_step = guard.assess(**common)
    np.testing.assert_array_equal(with_k.reasons, stepped.reasons)
    np.testing.assert_allclose(k_used, k_step, atol=1e-9)
    unstable = (with_k.reasons & Check.UNSTABLE) > 0
    assert 0 < unstable.sum() < n  # both verdicts occur
    pole = np.array([np.max(np.abs(np.roots(row))) for row in a])
    assert np.all(pole[~unstable] < 1.0)  # every accepted envelope is minimum phase
    assert np.all(pole[unstable] > 0.99)  # rejected ones have a pole near the unit circle
