"""Audio reading, validation, resampling and atomic writing."""

from __future__ import annotations

import os

import numpy as np
import pytest
import soundfile as sf
from scipy import signal

from nenv.media import audio
from nenv.errors import InputError, OutputError
from tests.conftest import open_descriptors


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
    assert audio.load(p, channel=0).y[0] == pytest.approx(0.25)  # numbered from 0
    with pytest.raises(InputError, match="channel=-1 does not exist"):
        audio.load(p, channel=-1)


def test_the_shortest_files_read_or_are_refused_clearly(tmp_path):
    """One sample is a file; a WAV cut after its header (a header promising audio it does not hold)
    is refused as holding no samples, not with a library's error."""
    one = tmp_path / "one.wav"
    sf.write(one, np.array([0.5]), 8000, subtype="PCM_16")
    assert audio.load(one).y.tolist() == [pytest.approx(0.5, abs=1e-4)]
    cut = tmp_path / "cut.wav"
    sf.write(cut, np.full(800, 0.1), 8000, subtype="PCM_16")
    cut.write_bytes(cut.read_bytes()[:44])
    with pytest.raises(InputError, match="no samples"):
        audio.load(cut)


def test_a_file_whose_reads_give_nothing_holds_no_samples(tmp_path, monkeypatch):
    """Should a file's header count samples that no read returns, loading it says so (not an error
    from joining no blocks)."""
    p = tmp_path / "a.wav"
    sf.write(p, np.full(800, 0.1), 8000, subtype="PCM_16")
    monkeypatch.setattr(audio.Reader, "blocks", lambda self, size=65536: iter(()))
    with pytest.raises(InputError, match="^'.*a.wav' holds no samples$"):
        audio.load(p)


def test_a_refused_file_is_left_closed(tmp_path):
    """Every refusal after the file was opened (stereo without a choice, a channel that does not exist,
    a rate out of range) closes it: a batch of thousands of bad files must not run out of descriptors."""
    st, fast = tmp_path / "st.wav", tmp_path / "fast.wav"
    sf.write(st, np.zeros((800, 2)), 8000)
    sf.write(fast, np.zeros(800), 384000)
    before = open_descriptors()
    kept = []  # the errors are kept, as a caller that logs them might
    for path, options in ((st, {}), (st, {"channel": 2}), (fast, {})):
        with pytest.raises(InputError) as e:
            audio.Reader(path, **options)
        kept.append(e)
    assert open_descriptors() == before


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


def test_16_bit_conversion_rounds_half_to_even_and_saturates_at_both_rails():
    """x 32768, rounded half to even, saturated: full scale +1.0 is 32767 (not a wrap to -32768), -1.0
    is -32768, and anything beyond stays at the rail (the two's-complement range of a 16-bit sample)."""
    y = np.array([0.0, 1.0, -1.0, 2.0, -2.0, 0.5 / 32768, 1.5 / 32768, -0.5 / 32768, 32766.5 / 32768, 1e-9])
    assert audio.to_int16(y).tolist() == [0, 32767, -32768, 32767, -32768, 0, 2, 0, 32766, 0]
    assert audio.to_int16(y).dtype == np.int16


def test_a_wav_of_unknown_length_is_not_called_truncated(tmp_path):
    """A WAV written by a program that did not know the length when it began (the data chunk's size
    left at 0 or 0xFFFFFFFF, common practice for piped WAV) is read without a truncation note; one whose
    header promises more than it holds gets one."""
    p = tmp_path / "streamed.wav"
    sf.write(p, np.full(800, 0.1), 8000, subtype="PCM_16")
    raw = bytearray(p.read_bytes())
    at = raw.index(b"data") + 4
    for size, note in ((0, False), (0xFFFFFFFF, False), (1600, False), (1602, True), (4000, True)):
        raw[at : at + 4] = size.to_bytes(4, "little")
        p.write_bytes(bytes(raw))
        assert (audio._wav_truncation(p, 800) is not None) == note, size
    assert "promises 2000 samples, the file holds 800" in audio._wav_truncation(p, 800)


def test_a_resampler_result_short_of_its_length_is_padded_at_the_end(monkeypatch):
    """``resample`` always returns round(n * target / orig) samples; should the resampler give fewer,
    the missing ones are zeros after the signal, which is not moved."""
    import soxr

    y = np.linspace(-0.5, 0.5, 441)
    full = audio.resample(y, orig_sr=44100, target_sr=8000)
    monkeypatch.setattr(soxr, "resample", lambda x, o, t, quality: full[:-3])
    short = audio.resample(y, orig_sr=44100, target_sr=8000)
    assert short.size == full.size == 80 and np.array_equal(short[:-3], full[:-3]) and not np.any(short[-3:])
