"""The telephone channel: band-pass response, decimation, level, noise, alignment."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from nenv.dsp import channel, g711
from nenv.errors import InputError

SR = 16000


def _tone(f, n=16000, amp=0.5):
    return amp * np.sin(2 * np.pi * f * np.arange(n) / SR)


def _gain_db(f):
    """Measured gain of the whole channel (band-pass + decimation) for a sine at f Hz."""
    nb = channel.telephone(_tone(f), sr=SR, level_dbov=None)
    mid = nb[2000:6000]
    return 20 * np.log10(np.sqrt(2) * np.std(mid) / 0.5 + 1e-12)


def test_bandpass_response_mask():
    # Our design targets (nenv.dsp.channel): flat within +-0.05 dB over 300-3400 Hz, never above 0.05 dB,
    # >= 55 dB rejection below 100 Hz and from 3.6 kHz up. For scale, ITU-T G.712's mask for PCM
    # channels asks much less (from memory: >= 14 dB at 4 kHz, >= 32 dB from 4.6 kHz up).
    w, h = signal.freqz(channel.bandpass_taps(), worN=32768, fs=SR)
    db = 20 * np.log10(np.abs(h) + 1e-15)
    band = (w >= 300) & (w <= 3400)
    assert np.max(np.abs(db[band])) < 0.05
    assert db.max() < 0.05
    assert db[w >= 3600].max() < -55
    assert db[w >= 4000].max() < -55
    assert db[w <= 100].max() < -55


@pytest.mark.parametrize("f, lo, hi", [(400, -0.1, 0.1), (1000, -0.1, 0.1), (3000, -0.1, 0.1), (3300, -0.1, 0.1)])
def test_channel_passes_telephone_band(f, lo, hi):
    assert lo < _gain_db(f) < hi


@pytest.mark.parametrize("f", [50, 4000, 5000, 6000, 7500])
def test_channel_rejects_out_of_band_and_aliases(f):
    # A 5 kHz tone would alias to 3 kHz after decimation if the band-pass let it through.
    assert _gain_db(f) < -50


def test_channel_equals_an_independent_band_pass_and_decimation(arctic_refs):
    """Reference built from scipy alone: scipy.signal.resample_poly (its own anti-alias FIR,
    delay compensated, so the output is aligned with the input) and a zero-phase Butterworth
    band-pass 400-3200 Hz (scipy.signal.butter + sosfiltfilt) applied to both signals, so only
    the band where both channels are flat is compared. Same length, no lag, and equal within
    -50 dB (the two designs' pass-band ripple and transition bands)."""
    _, ref = arctic_refs[0]
    nb = channel.telephone(ref, sr=SR, level_dbov=None)
    assert nb.size == ref.size // 2
    want = signal.resample_poly(ref, 1, 2)
    band = signal.butter(6, [400, 3200], btype="bandpass", fs=8000, output="sos")
    a, b = signal.sosfiltfilt(band, nb), signal.sosfiltfilt(band, want)
    lag = np.argmax(np.correlate(a[4000:12000], b[4000 - 20 : 12000 + 20], mode="valid")) - 20
    assert lag == 0
    err_db = 10 * np.log10(np.sum((a - b)[2000:-2000] ** 2) / np.sum(b[2000:-2000] ** 2))
    assert err_db < -50, err_db  # measured -62.6 dB; one sample of lag gives -4 dB


def test_level_in_dbov_of_a_full_scale_sine():
    # 0 dBov = RMS of a full-scale square wave, so a full-scale sine is -3.01 dBov (20 log10(1/sqrt 2)).
    assert channel.active_level_dbov(_tone(1000, amp=1.0), sr=SR) == pytest.approx(-3.0103, abs=1e-3)
    nb = channel.telephone(_tone(1000, amp=0.3), sr=SR, level_dbov=-26.0)
    assert channel.active_level_dbov(nb, sr=8000) == pytest.approx(-26.0, abs=0.01)


def test_active_level_counts_frames_within_50_db_of_the_loudest(rng):
    # Worked example (our simplified activity rule, not ITU-T P.56): 1 s of a steady sine at -20 dBov
    # (RMS) then 1 s of noise. Noise 55 dB down is not active: the level is the sine's, -20.0 dBov.
    # Noise 45 dB down is: the mean energy of both halves, 10 log10((1e-2 + 10**-6.5) / 2) = -23.01 dBov.
    t = np.arange(8000) / 8000
    tone = np.sqrt(2) * 0.1 * np.sin(2 * np.pi * 400 * t)  # RMS 0.1 = -20 dBov
    for down, want in [(55, -20.0), (45, 10 * np.log10((1e-2 + 10**-6.5) / 2))]:
        noise = rng.standard_normal(8000) * 0.1 * 10 ** (-down / 20)
        assert channel.active_level_dbov(np.concatenate([tone, noise]), sr=8000) == pytest.approx(want, abs=0.02)


def test_snr_of_added_noise(rng):
    y = _tone(1000, n=160000, amp=0.3)
    noisy = channel.add_noise(y, sr=SR, snr_db=20.0, rng=rng)
    snr = 10 * np.log10(np.mean(y**2) / np.mean((noisy - y) ** 2))
    assert snr == pytest.approx(20.0, abs=0.1)


@pytest.mark.parametrize("law", ["mulaw", "alaw"])
def test_companded_output_lies_on_the_g711_grid(law, arctic_refs):
    _, ref = arctic_refs[1]
    nb = channel.telephone(ref, sr=SR, law=law)
    np.testing.assert_array_equal(g711.compand(nb, law=law), nb)


def test_channel_is_reproducible_with_a_seed(arctic_refs):
    _, ref = arctic_refs[0]
    a = channel.telephone(ref, sr=SR, snr_db=15, seed=3)
    b = channel.telephone(ref, sr=SR, snr_db=15, seed=3)
    c = channel.telephone(ref, sr=SR, snr_db=15, seed=4)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


def test_channel_refuses_narrowband_input_and_silence():
    with pytest.raises(InputError, match="wideband"):
        channel.telephone(np.ones(800), sr=8000)
    with pytest.raises(InputError, match="silence"):
        channel.telephone(np.zeros(16000), sr=SR)
