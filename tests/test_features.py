"""Feature definitions on signals whose answers are known."""

from __future__ import annotations

import numpy as np
import pytest

from nenv.dsp import cepstrum, lpc
from nenv.chain.estimators.base import NarrowbandAnalysis
from nenv.chain.features import INPUT_NAMES, ContextStacker, FeatureSettings, band_power, envelope_from_prediction, narrowband_features, voicing
from nenv.errors import ConfigError


def _features(x):
    frames = lpc.frame(x, frame_length=240, hop_length=80)
    a, gain = lpc.analyse(frames, order=10, sr=8000)
    return narrowband_features(NarrowbandAnalysis(frames, a, gain))[5:]


def col(name):
    return INPUT_NAMES.index(name)


def test_white_noise_and_a_pulse_train(rng):
    noise = _features(0.1 * rng.standard_normal(8000))
    assert np.median(noise[:, col("prediction_gain_db")]) < 1.0  # white: nothing to predict
    assert np.median(noise[:, col("voicing")]) < 0.3
    assert np.median(noise[:, col("zcr")]) == pytest.approx(0.5, abs=0.08)  # sign flips half the time
    # energy of uniform noise of std 0.1 = -20 dB re full scale
    assert np.median(noise[:, col("energy_db")]) == pytest.approx(-20.0, abs=0.5)
    pulses = np.zeros(8000)
    pulses[::64] = 1.0  # 125 Hz
    from scipy.signal import lfilter

    voiced = _features(lfilter([1.0], [1.0, -1.8 * np.cos(2 * np.pi * 700 / 8000), 0.81], pulses) * 0.05)
    assert np.median(voiced[:, col("voicing")]) > 0.7
    assert np.median(voiced[:, col("prediction_gain_db")]) > 5


def test_a_steady_sine_is_fully_voiced():
    # A periodic signal's normalised autocorrelation at its period is 1 once the window's own taper is
    # divided out (Boersma 1993): measured 0.9995 (median) for 440 Hz, never above 1.
    v = _features(0.3 * np.sin(2 * np.pi * 440 * np.arange(8000) / 8000))[:, col("voicing")]
    assert np.median(v) > 0.99 and v.max() <= 1.0


def test_voicing_searches_lags_20_to_147_and_no_further(rng):
    # The documented pitch range, 400 Hz down to 54 Hz at 8 kHz, checked at both ends: white noise
    # plus an echo of itself L samples later has a normalised autocorrelation of 0.5 at lag L and
    # none at other lags. With L inside the range the voicing finds it (median measured 0.50 and
    # 0.49 at L = 20 and 147); one lag outside, only the noise's own largest value is left (0.28 at
    # 19, 0.26 at 148).
    s = rng.standard_normal(8200)
    for lag, inside in ((19, False), (20, True), (147, True), (148, False)):
        x = 0.1 * (s[200:] + s[200 - lag : 8200 - lag])
        frames = np.ascontiguousarray(lpc.frame(x, frame_length=240, hop_length=80)[5:])
        v = voicing(frames)
        assert (np.median(v) > 0.4) if inside else (np.median(v) < 0.35), (lag, np.median(v))
        np.testing.assert_array_equal(voicing(frames[1:2]), v[1:2])  # one frame alone as in a batch


def test_alternating_signal_crosses_zero_every_sample():
    x = 0.1 * (-1.0) ** np.arange(2000)
    assert np.all(_features(x)[:, col("zcr")] == 1.0)


def test_silence_is_floored_not_nan():
    f = _features(np.zeros(2000))
    assert np.all(np.isfinite(f)) and np.all(f[:, col("energy_db")] == -100.0)


def test_context_stacking_is_chunk_invariant(rng):
    f = rng.standard_normal((50, 14))
    whole = ContextStacker(3).push(f)
    s = ContextStacker(3)
    parts = np.vstack([s.push(f[:1]), s.push(f[1:2]), s.push(f[2:30]), s.push(f[30:])])
    np.testing.assert_array_equal(whole, parts)
    np.testing.assert_array_equal(whole[10], f[7:11].reshape(-1))  # oldest first, current last
    np.testing.assert_array_equal(whole[0], np.tile(f[0], 4))


def test_level_targets_are_band_powers_per_sample(rng):
    """The training targets' levels (wideband_targets, low_band_target) against textbook values: a
    sine of amplitude A carries power A^2/2 per sample, all of it in the band that holds its
    frequency (Parseval); white noise of variance s^2 carries s^2 (8000 - 3400) / 8000 above 3.4 kHz;
    a tone outside the band adds nothing; the narrowband frame energy is subtracted in dB."""
    from nenv.chain.features import low_band_target, wideband_targets

    t = np.arange(32000)
    a = 0.3
    want = 10 * np.log10(a * a / 2)  # -13.47 dB

    def frames(x):
        return lpc.frame(x, frame_length=480, hop_length=160)

    def level(x, nb_db=0.0):
        f = frames(x)
        return wideband_targets(f, np.full(f.shape[0], nb_db), settings=FeatureSettings())[1]

    high, low, off = (a * np.sin(2 * np.pi * f * t / 16000 + 0.3) for f in (5000, 150, 1000))
    assert np.median(level(high)) == pytest.approx(want, abs=0.02)
    assert np.median(level(high + 3 * off)) == pytest.approx(want, abs=0.02)  # a strong 1 kHz tone is not in the band
    assert np.median(level(3 * off)) < want - 40
    np.testing.assert_allclose(level(high, nb_db=6.0), level(high) - 6.0, atol=1e-9)
    noise = 0.2 * rng.standard_normal(t.size)
    assert np.mean(level(noise)) == pytest.approx(10 * np.log10(0.04 * 4600 / 8000), abs=0.3)
    f = frames(low + 3 * off)
    assert np.median(low_band_target(f, np.zeros(f.shape[0]))) == pytest.approx(want, abs=0.05)  # 50-300 Hz
    np.testing.assert_allclose(low_band_target(f, np.full(f.shape[0], 6.0)), low_band_target(f, np.zeros(f.shape[0])) - 6.0, atol=1e-9)
    f = frames(high)
    assert np.median(low_band_target(f, np.full(f.shape[0], 6.0))) < want - 40
    # the band's edge on the 31.25 Hz grid of 512 points: a tone on its last bin inside (281.25 Hz)
    # keeps its power (measured -0.7 dB: the window's leakage), one on the first bin above (312.5 Hz)
    # only what leaks back (measured -8.3 dB)
    edge = {f0: np.median(low_band_target(frames(a * np.sin(2 * np.pi * f0 * t / 16000 + 0.3)), np.zeros(200))) - want for f0 in (281.25, 312.5)}
    assert edge[281.25] > -1.5 and edge[312.5] < -5, edge


def test_shape_targets_are_the_cepstrum_of_the_wideband_envelope_from_its_definition(rng):
    """The training targets' shapes (wideband_targets) are c_1..c_n of the order-16 LPC envelope of
    each 16 kHz frame, by the FFT definition rather than nenv's recursion: for the minimum-phase
    1/A the complex cepstrum is twice the real cepstrum, 2 IDFT(log|1/A|), for n >= 1 (Oppenheim
    and Schafer, Discrete-Time Signal Processing, the cepstrum of minimum-phase sequences)."""
    from nenv.chain.features import wideband_targets

    settings = FeatureSettings()
    t = np.arange(9600)
    x = 0.3 * np.sin(2 * np.pi * 700 * t / 16000) + 0.1 * np.sin(2 * np.pi * 4500 * t / 16000) + 0.05 * rng.standard_normal(t.size)
    frames = lpc.frame(x, frame_length=480, hop_length=160)[:12]
    ceps, level = wideband_targets(frames, np.zeros(frames.shape[0]), settings=settings)
    assert ceps.shape == (frames.shape[0], settings.n_wb_ceps) and level.shape == (frames.shape[0],)
    a, _ = lpc.analyse(frames, order=settings.wb_order, sr=settings.wb_sr)
    n_fft = 8192
    real_cepstrum = np.fft.irfft(-np.log(np.abs(np.fft.rfft(a, n=n_fft, axis=1))), n=n_fft, axis=1)
    np.testing.assert_allclose(ceps, 2 * real_cepstrum[:, 1 : settings.n_wb_ceps + 1], atol=1e-9)


def test_empty_inputs_give_empty_features_and_leave_the_context_alone(rng):
    """No hops in: no rows out, with the right widths; an empty push between two pushes changes
    nothing that follows."""
    from nenv.chain.features import N_INPUTS

    empty = NarrowbandAnalysis(np.zeros((0, 240)), np.zeros((0, 11)), np.zeros(0))
    assert narrowband_features(empty).shape == (0, N_INPUTS)
    assert voicing(np.zeros((0, 240))).shape == (0,)
    f = rng.standard_normal((9, 5))
    s = ContextStacker(2)
    first = s.push(f[:4])
    assert s.push(f[4:4]).shape == (0, 15)
    np.testing.assert_array_equal(np.vstack([first, s.push(f[4:])]), ContextStacker(2).push(f))


def test_one_narrowband_energy_for_every_row_equals_it_repeated(rng):
    """envelope_from_prediction takes the narrowband energy (and level) per row or one for all."""
    ceps = rng.normal(0, 0.3, (6, 20)) / np.arange(1, 21)
    level = rng.normal(-20, 5, 6)
    a1, g1 = envelope_from_prediction(ceps, level, np.float64(-30.0))
    a2, g2 = envelope_from_prediction(ceps, level, np.full(6, -30.0))
    np.testing.assert_array_equal(a1, a2)
    np.testing.assert_array_equal(g1, g2)
    _, g3 = envelope_from_prediction(ceps, -20.0, np.full(6, -30.0))
    np.testing.assert_array_equal(g3, envelope_from_prediction(ceps, np.full(6, -20.0), np.full(6, -30.0))[1])


def test_envelope_gain_gives_the_requested_high_band_power(rng):
    # Parseval: for a unit-power white excitation through G/A, the 3.4-8 kHz power of the
    # output must be nb_power * 10^(level/10). Checked by filtering real noise (scipy.signal.lfilter).
    from scipy.signal import lfilter

    a = lpc.from_reflection(np.array([[0.7, -0.4, 0.2, 0.1, -0.1, 0.05]]))
    ceps = cepstrum.to_cepstrum(a, n_ceps=20)[:, 1:]
    a2, gain = envelope_from_prediction(ceps, np.array([-12.0]), np.array([-30.0]), order=6)
    y = lfilter([gain[0]], a2[0], rng.standard_normal(400000))
    frames = y[1000 : 1000 + 480 * 800].reshape(-1, 480)
    hb = np.mean(band_power(frames, lo=3400, hi=8000))
    assert 10 * np.log10(hb) == pytest.approx(-42.0, abs=0.3)


def test_feature_settings_compatibility():
    s = FeatureSettings()
    s.check_compatible(FeatureSettings(context=2), what="x")  # context is the model's own choice
    with pytest.raises(ConfigError, match="nb_order=12"):
        s.check_compatible(FeatureSettings(nb_order=12), what="the model")
    with pytest.raises(ConfigError, match="unknown keys"):
        FeatureSettings.from_dict({**s.to_dict(), "mystery": 1})
