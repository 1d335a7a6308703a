"""Audio reading, validation, resampling and atomic writing."""

from __future__ import annotations

import os

import numpy as np
import pytest
import soundfile as sf
from scipy import signal

from nenv.media import audio
from nenv.errors import InputError, OutputError


@pytest.mark.parametrize("orig, target", [(44100, 16000), (16000, 8000), (8000, 16000), (48000, 8000)])
def test_resample_matches_scipy_polyphase_on_a_sine(orig, target):
    # Reference: scipy.signal.resample_poly (a different polyphase design); both must agree on an in-band sine.
    f = 1000.0
    n = orig  # 1 s
    y = 0.5 * np.sin(2 * np.pi * f * np.arange(n) / orig)
    ours = audio.resample(y, orig_sr=orig, target_sr=target)
    g = np.gcd(orig, target)
    ref = signal.resample_poly(y, target // g, orig // g)
    assert ours.size == ref.size == target
    mid = slice(target // 10, -target // 10)
    err = ours[mid] - ref[mid]
    # scipy's default Kaiser (beta=5) filter is the less exact of the two (measured: -59 dB on 44.1->16 kHz)
    assert 10 * np.log10(np.sum(err**2) / np.sum(ref[mid] ** 2)) < -55
    expected = 0.5 * np.sin(2 * np.pi * f * np.arange(target) / target)
    np.testing.assert_allclose(ours[mid], expected[mid], atol=1e-5)


def test_load_reads_mono_float(tmp_path):
    p = tmp_path / "a.wav"
    sf.write(p, np.linspace(-0.5, 0.5, 800), 8000, subtype="PCM_16")
    a = audio.load(p)
    assert a.sr == 8000 and a.y.shape == (800,) and a.y.dtype == np.float64


def test_load_errors_are_clear(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        audio.load(tmp_path / "missing.wav")
    with pytest.raises(InputError, match="folder"):
        audio.load(tmp_path)
    bad = tmp_path / "notes.wav"
    bad.write_text("this is not audio")
    with pytest.raises(InputError, match="cannot read"):
        audio.load(bad)
    empty = tmp_path / "empty.wav"
    sf.write(empty, np.zeros(0), 8000)
    with pytest.raises(InputError, match="no samples"):
        audio.load(empty)
    nan = tmp_path / "nan.wav"
    sf.write(nan, np.array([0.1, np.nan, 0.2, np.inf]), 8000, subtype="FLOAT")
    with pytest.raises(InputError, match="NaN"):
        audio.load(nan)


def test_multichannel_needs_a_choice(tmp_path):
    p = tmp_path / "st.wav"
    st = np.stack([np.full(800, 0.25), np.full(800, -0.5)], axis=1)
    sf.write(p, st, 8000, subtype="FLOAT")
    with pytest.raises(InputError, match="--channel"):
        audio.load(p)
    assert audio.load(p, channel=1).y[0] == pytest.approx(-0.5)
    assert audio.load(p, mix=True).y[0] == pytest.approx(-0.125)
    with pytest.raises(InputError, match="channel=2"):
        audio.load(p, channel=2)


def test_write_is_atomic(tmp_path, monkeypatch):
    target = tmp_path / "out.wav"
    audio.write(target, np.zeros(160), sr=16000)
    before = target.read_bytes()

    def boom(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(sf.SoundFile, "write", boom)
    with pytest.raises(OutputError, match="No space"):
        audio.write(target, np.ones(160) * 0.1, sr=16000)
    assert target.read_bytes() == before  # the old file is intact
    assert sorted(os.listdir(tmp_path)) == ["out.wav"]  # no temporary left behind


def test_write_refuses_bad_paths(tmp_path):
    with pytest.raises(OutputError, match="does not exist"):
        audio.write(tmp_path / "nope" / "x.wav", np.zeros(10), sr=8000)
    with pytest.raises(OutputError, match=".wav"):
        audio.write(tmp_path / "x.mp3", np.zeros(10), sr=8000)


def test_written_file_has_normal_permissions(tmp_path):
    p = tmp_path / "x.wav"
    audio.write(p, np.zeros(10), sr=8000)
    mask = os.umask(0)
    os.umask(mask)
    assert (p.stat().st_mode & 0o777) == (0o666 & ~mask)


def test_limit_peaks_counts():
    y, n = audio.limit_peaks(np.array([0.0, 0.5, 1.5, -2.0, 0.99]))
    assert n == 2 and np.max(np.abs(y)) <= 0.99
    # just over the ceiling (0.99 of full scale) is limited and counted too; at it, untouched
    y, n = audio.limit_peaks(np.array([0.9901, -0.9905, 0.99, -0.5]))
    assert n == 2
    np.testing.assert_array_equal(y, [0.99, -0.99, 0.99, -0.5])
