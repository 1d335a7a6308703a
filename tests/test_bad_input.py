"""The bad-input table (docs/bad-input.md), row by row, through the command a user runs.

Each test is named after its row id (F = files, C = content, M = models and
configs). ``test_the_documented_table_lists_exactly_these_rows`` keeps the table and
these tests in step: a row without a test, or a test without a row, fails.
"""

from __future__ import annotations

import json
import os
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from typer.testing import CliRunner

from nenv.dsp import channel
from nenv.cli import app
from tests.conftest import ARCTIC

runner = CliRunner()
TABLE = Path(__file__).resolve().parents[1] / "docs" / "bad-input.md"
ROWS = [f"F{i}" for i in range(1, 18)] + [f"C{i}" for i in range(1, 11)] + [f"M{i}" for i in range(1, 10)]


def _run(*args):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)


def _refused(res, needle):
    """Exit status 2, one line on stderr naming the problem, no traceback."""
    assert res.exit_code == 2, res.output
    err = res.stderr.strip()
    assert err.startswith("nenv: error:") and len(err.splitlines()) == 1 and needle in err, err
    assert "Traceback" not in res.output


def _extended(res, out: Path, n_in: int) -> np.ndarray:
    """Exit status 0 and a 16 kHz output exactly twice as long as the 8 kHz input, finite, within full scale."""
    assert res.exit_code == 0, res.output
    y, sr = sf.read(out)
    assert sr == 16000 and y.size == 2 * n_in and np.all(np.isfinite(y)) and np.max(np.abs(y)) <= 0.99 + 1 / 32768
    return y


@pytest.fixture(scope="module")
def speech() -> np.ndarray:
    """3 s of real telephone speech at 8 kHz (CMU ARCTIC a0007 through the channel), about -26 dBov."""
    y, sr = sf.read(ARCTIC[0])
    return channel.telephone(y, sr=sr)[:24000]


def _no_output(folder: Path) -> None:
    left = [p.name for p in folder.iterdir() if p.name.startswith("out") or ".part" in p.name]
    assert left == [], left


def test_the_documented_table_lists_exactly_these_rows():
    text = TABLE.read_text(encoding="utf-8")
    ids = re.findall(r"^\| (F\d+|C\d+|M\d+) \|", text, flags=re.M)
    assert sorted(ids) == sorted(ROWS) and len(ids) == len(set(ids))
    tests = {name[5:].split("_")[0].upper() for name in globals() if name.startswith("test_") and re.match(r"test_[fcm]\d+_", name)}
    assert tests == set(ROWS)


# ---- files ---------------------------------------------------------------------------------


def test_f1_missing_file(tmp_path):
    _refused(_run("extend", tmp_path / "nope.wav", tmp_path / "out.wav"), "does not exist")
    _no_output(tmp_path)


def test_f2_unreadable_file(tmp_path, speech, monkeypatch):
    p = tmp_path / "locked.wav"
    sf.write(p, speech, 8000)
    p.chmod(0)
    if os.geteuid() == 0:  # root reads anything; make the permission check see what a user would
        real = os.access
        monkeypatch.setattr(os, "access", lambda path, mode, *a, **k: False if Path(path) == p else real(path, mode, *a, **k))
    _refused(_run("extend", p, tmp_path / "out.wav"), "permission denied")
    _no_output(tmp_path)


def test_f3_zero_length_file(tmp_path):
    (tmp_path / "empty.wav").write_bytes(b"")
    _refused(_run("extend", tmp_path / "empty.wav", tmp_path / "out.wav"), "empty (0 bytes)")
    _no_output(tmp_path)


def test_f4_header_only_file(tmp_path):
    sf.write(tmp_path / "h.wav", np.zeros(0), 8000)
    _refused(_run("extend", tmp_path / "h.wav", tmp_path / "out.wav"), "no samples")
    _no_output(tmp_path)


def test_f5_truncated_file(tmp_path, speech):
    sf.write(tmp_path / "whole.wav", speech, 8000, subtype="PCM_16")
    data = (tmp_path / "whole.wav").read_bytes()
    (tmp_path / "cut.wav").write_bytes(data[: 44 + 2 * 10000 + 1])  # header + 10000 samples + half a sample
    res = _run("extend", tmp_path / "cut.wav", tmp_path / "out.wav")
    _extended(res, tmp_path / "out.wav", 10000)
    assert "truncated" in res.stderr and "24000" in res.stderr
    # the same with an odd-sized chunk before the audio (RIFF pads it to an even length), as recorders
    # write; and a whole file says nothing of truncation
    listed = data[:36] + b"LIST" + (5).to_bytes(4, "little") + b"INFOx\x00" + data[36:]
    (tmp_path / "cut2.wav").write_bytes(listed[: 58 + 2 * 10000 + 1])
    res = _run("extend", tmp_path / "cut2.wav", tmp_path / "out3.wav")
    _extended(res, tmp_path / "out3.wav", 10000)
    assert "truncated" in res.stderr and "24000" in res.stderr
    res = _run("extend", tmp_path / "whole.wav", tmp_path / "out4.wav")
    _extended(res, tmp_path / "out4.wav", 24000)
    assert "is truncated" not in res.stderr  # (the folder of this test is named after it)
    # a truncated FLAC: libsndfile fails part-way through; the output is not written
    sf.write(tmp_path / "whole.flac", speech, 8000)
    data = (tmp_path / "whole.flac").read_bytes()
    (tmp_path / "cut.flac").write_bytes(data[: len(data) // 2])
    _refused(_run("extend", tmp_path / "cut.flac", tmp_path / "out2.wav"), "damaged")
    assert not (tmp_path / "out2.wav").exists() and not list(tmp_path.glob(".*part*"))


def test_f6_not_audio(tmp_path):
    (tmp_path / "notes.wav").write_text("minutes of the call, not the call\n" * 20)
    _refused(_run("extend", tmp_path / "notes.wav", tmp_path / "out.wav"), "cannot read")
    (tmp_path / "riff.wav").write_bytes(b"RIFF\x24\x00\x00\x00WAVEfmt " + os.urandom(200))
    _refused(_run("extend", tmp_path / "riff.wav", tmp_path / "out.wav"), "riff.wav")
    _no_output(tmp_path)


def test_f7_folder_given_as_one_file(tmp_path):
    (tmp_path / "calls").mkdir()
    _refused(_run("extend", tmp_path / "calls", tmp_path / "out.wav"), "must be a folder")
    _refused(_run("extend", tmp_path / "calls", tmp_path / "outdir"), "holds no audio files")
    _no_output(tmp_path)


def test_f8_wrong_extension(tmp_path, speech):
    sf.write(tmp_path / "call.wav", speech, 8000)
    shutil.copy(tmp_path / "call.wav", tmp_path / "call.mp3")  # WAV content, misleading name: read by content
    _extended(_run("extend", tmp_path / "call.mp3", tmp_path / "out.wav"), tmp_path / "out.wav", speech.size)
    _refused(_run("extend", tmp_path / "call.wav", tmp_path / "out.mp3"), ".wav or .flac")


@pytest.mark.parametrize("method", ["neural", "imaging"])
def test_f9_huge_file_streams_in_bounded_memory(tmp_path, speech, method):
    """Peak traced memory for 20 s and 200 s of input is the same: blocks in, blocks out (an hour streams alike)."""
    import tracemalloc

    from nenv.serve import streamfile

    peaks = []
    for seconds in (20, 200):
        src = tmp_path / f"in{seconds}.wav"
        sf.write(src, np.tile(speech, seconds // 3 + 1)[: seconds * 8000], 8000)
        tracemalloc.start()
        res = streamfile.extend_file(src, tmp_path / "out.wav", streamfile.Options(method=method))
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
        assert res.seconds == seconds and sf.info(tmp_path / "out.wav").frames == 2 * seconds * 8000
    # 10x the input, < 15% more peak memory (reading the whole file would grow it 10x)
    assert peaks[1] < 1.15 * peaks[0], peaks
    assert peaks[1] < 64e6, peaks  # about 45 MB: one 10 s block through the engine


@pytest.mark.parametrize("subtype", ["PCM_U8", "PCM_16", "PCM_24", "PCM_32", "FLOAT", "DOUBLE"])
def test_f10_sample_formats(tmp_path, speech, subtype):
    sf.write(tmp_path / "in.wav", speech, 8000, subtype=subtype)
    y = _extended(_run("extend", tmp_path / "in.wav", tmp_path / "out.wav", "--method", "imaging"), tmp_path / "out.wav", speech.size)
    sf.write(tmp_path / "ref.wav", speech, 8000, subtype="DOUBLE")
    assert _run("extend", tmp_path / "ref.wav", tmp_path / "ref_out.wav", "--method", "imaging").exit_code == 0
    ref = sf.read(tmp_path / "ref_out.wav")[0]
    err_db = 10 * np.log10(np.mean((y - ref) ** 2) / np.mean(ref**2))
    # 8-bit is coarse: -26 dBov speech keeps only about 26 dB SNR (6 dB per bit, common practice)
    assert err_db < (-15 if subtype == "PCM_U8" else -60), err_db


def test_f11_stereo_and_multichannel(tmp_path, speech):
    four = np.stack([speech, 0.5 * speech, np.zeros_like(speech), -speech], axis=1)
    sf.write(tmp_path / "quad.wav", four, 8000)
    _refused(_run("extend", tmp_path / "quad.wav", tmp_path / "out.wav"), "--channel N (0..3)")
    _refused(_run("extend", tmp_path / "quad.wav", tmp_path / "out.wav", "--channel", "4"), "channel=4 does not exist")
    _extended(_run("extend", tmp_path / "quad.wav", tmp_path / "out.wav", "--channel", "1"), tmp_path / "out.wav", speech.size)
    _extended(_run("extend", tmp_path / "quad.wav", tmp_path / "out2.wav", "--mix"), tmp_path / "out2.wav", speech.size)
    _refused(_run("extend", tmp_path / "quad.wav", tmp_path / "out3.wav", "--channel", "1", "--mix"), "contradict")


@pytest.mark.parametrize("sr", [4000, 11025, 16000, 22050, 44100, 48000, 96000, 192000])
def test_f12_every_rate_from_4_to_192_khz(tmp_path, speech, sr):
    from nenv.media.audio import resample

    x = resample(speech, orig_sr=8000, target_sr=sr)
    sf.write(tmp_path / "in.wav", x, sr)
    res = _run("extend", tmp_path / "in.wav", tmp_path / "out.wav")
    _refused(res, "degrade" if sr >= 16000 else f"{sr} Hz")
    n8 = int(round(x.size * 8000 / sr))
    res = _run("extend", tmp_path / "in.wav", tmp_path / "out.wav", "--resample")
    _extended(res, tmp_path / "out.wav", n8)
    assert "resampled" in res.stderr


@pytest.mark.parametrize("sr", [2000, 3999, 192001, 384000])
def test_f13_rates_outside_the_range(tmp_path, sr):
    sf.write(tmp_path / "in.wav", 0.1 * np.ones(4000), sr)
    _refused(_run("extend", tmp_path / "in.wav", tmp_path / "out.wav", "--resample"), "outside the supported range 4000..192000")
    _no_output(tmp_path)


def test_f14_output_that_is_an_input(tmp_path, speech):
    """No command writes over a file it reads: same name, a link to it, or a batch's own input."""
    sf.write(tmp_path / "call.wav", speech, 8000)
    sf.write(tmp_path / "wide.wav", np.repeat(speech, 2), 16000)
    before = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
    _refused(_run("extend", tmp_path / "call.wav", tmp_path / "call.wav"), "same file as the input")
    (tmp_path / "link.wav").symlink_to(tmp_path / "call.wav")
    _refused(_run("extend", tmp_path / "call.wav", tmp_path / "link.wav"), "same file as the input")
    os.link(tmp_path / "call.wav", tmp_path / "hard.wav")  # a hard link: another name, the same file
    _refused(_run("extend", tmp_path / "call.wav", tmp_path / "hard.wav"), "same file as the input")
    (tmp_path / "hard.wav").unlink()
    _refused(_run("degrade", tmp_path / "wide.wav", tmp_path / "wide.wav"), "same file as the input")
    _refused(_run("extend", tmp_path / "call.wav", tmp_path / "out.wav", "--record", tmp_path / "call.wav"), "same file as the input")
    _refused(_run("extend", tmp_path / "call.wav", tmp_path / "out.wav", "--record", tmp_path / "out.wav"), "same file as the output")
    shutil.copy(tmp_path / "call.wav", tmp_path / "call.png")  # inputs are read by content, so this is a call
    _refused(_run("extend", tmp_path / "call.png", tmp_path / "out.wav", "--figure", tmp_path / "call.png"), "same file as the input")
    (tmp_path / "link.wav").unlink()
    (tmp_path / "call.png").unlink()
    # batches: the output folder is the input folder, or a listed file's output would replace it
    _refused(_run("extend", tmp_path, tmp_path), "is the input folder")
    _refused(_run("extend", tmp_path / "call.wav", tmp_path / "wide.wav", tmp_path, "--overwrite"), "replaced by its own output")
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir() if p.name != "extend-report.csv"} == before
    _no_output(tmp_path)


def test_f16_record_that_cannot_be_written(tmp_path, speech):
    """A full disk under the record (here a file-size limit on the process: writes fail with EFBIG):
    extend stops with one line and leaves no output. The live paths keep their audio (row F16; their
    tests are in test_audit.py and test_rtp.py)."""
    import resource
    import subprocess
    import sys

    sf.write(tmp_path / "call.wav", speech, 8000)
    r = subprocess.run([sys.executable, "-m", "nenv", "extend", str(tmp_path / "call.wav"), str(tmp_path / "out.wav"), "--record", str(tmp_path / "rec.jsonl")],
                       capture_output=True, text=True, timeout=300, preexec_fn=lambda: resource.setrlimit(resource.RLIMIT_FSIZE, (500, 500)))
    err = r.stderr.strip()
    assert r.returncode == 2 and err.startswith("nenv: error: cannot write the record") and "File too large" in err and len(err.splitlines()) == 1, err
    assert not (tmp_path / "out.wav").exists()


def test_f15_record_file_that_is_not_a_record(tmp_path, speech):
    """A guard record is appended to, so an existing file must be a record already."""
    sf.write(tmp_path / "call.wav", speech, 8000)
    notes = tmp_path / "notes.jsonl"
    notes.write_text('{"type": "meeting", "text": "not a guard record"}\n')
    _refused(_run("extend", tmp_path / "call.wav", tmp_path / "out.wav", "--record", notes), "is not a nenv guard record")
    (tmp_path / "calls").mkdir()
    sf.write(tmp_path / "calls" / "c1.wav", speech, 8000)
    _refused(_run("extend", tmp_path / "calls", tmp_path / "wide", "--record", notes), "is not a nenv guard record")
    assert not (tmp_path / "wide").exists() or not any((tmp_path / "wide").iterdir())
    assert notes.read_text() == '{"type": "meeting", "text": "not a guard record"}\n'
    _no_output(tmp_path)
    rec = tmp_path / "guard.jsonl"  # a record takes a second session
    for out in ("a.wav", "b.wav"):
        assert _run("extend", tmp_path / "call.wav", tmp_path / out, "--record", rec).exit_code == 0
    headers = [line for line in rec.read_text().splitlines() if '"type":"header"' in line]
    assert len(headers) == 2


# ---- content -------------------------------------------------------------------------------


def test_f17_reference_that_is_not_the_inputs_original(tmp_path):
    src, ref, out = tmp_path / "in.wav", tmp_path / "ref.wav", tmp_path / "out.wav"
    y, sr = sf.read(ARCTIC[0])
    sf.write(ref, y, sr)
    x = channel.telephone(y, sr=sr, law="mulaw")
    other = channel.telephone(sf.read(ARCTIC[1])[0], sr=sr, law="mulaw")
    before = None
    for method in ("oracle", "true-band"):  # the second time an earlier output exists: --overwrite must not lose it
        sf.write(src, other, 8000, subtype="PCM_16")
        _refused(_run("extend", src, out, "--method", method, "--reference", ref, "--overwrite"), "is not the original of this input")
        sf.write(src, np.concatenate([np.zeros(160), x[:-160]]), 8000, subtype="PCM_16")
        _refused(_run("extend", src, out, "--method", method, "--reference", ref, "--overwrite"), "the input is 20.0 ms behind the reference")
        assert sorted(os.listdir(tmp_path)) == sorted(["in.wav", "ref.wav"] + (["out.wav"] if before else []))
        assert before is None or out.read_bytes() == before
        sf.write(src, x, 8000, subtype="PCM_16")
        assert _run("extend", src, out, "--method", method, "--reference", ref, "--overwrite").exit_code == 0
        before = out.read_bytes()


def test_degrade_refuses_digital_silence_but_not_a_quiet_recording(tmp_path):
    """degrade makes test calls from wideband recordings: an all-zero file cannot be one; a very quiet
    one (a single sample of 1 LSB) can."""
    sf.write(tmp_path / "zero.wav", np.zeros(16000), 16000, subtype="PCM_16")
    _refused(_run("degrade", tmp_path / "zero.wav", tmp_path / "nb.wav"), "digital silence")
    assert not (tmp_path / "nb.wav").exists()
    quiet = np.zeros(16000)
    quiet[8000] = 1 / 32768
    sf.write(tmp_path / "quiet.wav", quiet, 16000, subtype="PCM_16")
    assert _run("degrade", tmp_path / "quiet.wav", tmp_path / "nb.wav").exit_code == 0 and (tmp_path / "nb.wav").exists()


@pytest.mark.parametrize("method", ["neural", "codebook", "imaging", "unextended"])
def test_c1_digital_silence_gives_silence_of_twice_the_length(tmp_path, method):
    """A silent leg is common in a call archive: it is extended like any file (exit 0), to exact zeros
    of twice the length, with a one-line note; in a batch it counts as done."""
    sf.write(tmp_path / "s.wav", np.zeros(8001), 8000)
    res = _run("extend", tmp_path / "s.wav", tmp_path / "out.wav", "--method", method)
    assert res.exit_code == 0, res.output
    assert "digital silence" in res.stderr and "Traceback" not in res.output
    y, sr = sf.read(tmp_path / "out.wav")
    assert sr == 16000 and y.size == 2 * 8001 and not np.any(y)
    (tmp_path / "in").mkdir()
    sf.write(tmp_path / "in" / "leg.wav", np.zeros(4000), 8000)
    sf.write(tmp_path / "in" / "call.wav", 0.1 * np.sin(np.arange(4000) * 0.3), 8000)
    res = _run("extend", tmp_path / "in", tmp_path / "out", "--method", method, "--jobs", "1")
    assert res.exit_code == 0, res.output
    assert (tmp_path / "out" / "leg.wav").is_file() and (tmp_path / "out" / "call.wav").is_file()


def _highband_db(y: np.ndarray) -> float:
    spec = np.abs(np.fft.rfft(y)) ** 2
    f = np.fft.rfftfreq(y.size, 1 / 16000)
    return 10 * np.log10(spec[f > 3600].sum() / spec.sum() + 1e-30)


def test_c2_dc_offset(tmp_path, speech):
    sf.write(tmp_path / "dc.wav", speech + 0.2, 8000)
    y = _extended(_run("extend", tmp_path / "dc.wav", tmp_path / "out.wav"), tmp_path / "out.wav", speech.size)
    assert abs(np.mean(y[4000:-4000]) - 0.2) < 0.02  # the original band (DC included) is never altered
    assert _highband_db(y - np.mean(y)) < -10


def test_c3_single_click(tmp_path):
    x = np.zeros(16000)
    x[8000] = 0.9
    sf.write(tmp_path / "click.wav", x, 8000)
    res = _run("extend", tmp_path / "click.wav", tmp_path / "out.wav")
    y = _extended(res, tmp_path / "out.wav", x.size)
    assert np.sum(np.abs(y) > 0.01) < 400  # the response stays a click (< 25 ms), no ringing burst


def test_c4_clipped_speech(tmp_path, speech):
    x = np.clip(speech * 30, -0.99, 0.99)
    sf.write(tmp_path / "clip.wav", x, 8000)
    res = _run("extend", tmp_path / "clip.wav", tmp_path / "out.wav")
    _extended(res, tmp_path / "out.wav", x.size)  # the limiter holds the output below full scale


def test_c5_full_scale_noise(tmp_path):
    x = np.random.default_rng(0).uniform(-1, 1, 16000)
    sf.write(tmp_path / "noise.wav", x, 8000, subtype="FLOAT")
    res = _run("extend", tmp_path / "noise.wav", tmp_path / "out.wav")
    _extended(res, tmp_path / "out.wav", x.size)
    assert "limited" in res.stderr  # said, not hidden


def test_c6_nan_and_inf(tmp_path, speech):
    for bad in (np.nan, np.inf, -np.inf):
        x = speech.copy()
        x[12000] = bad
        sf.write(tmp_path / "bad.wav", x, 8000, subtype="FLOAT")
        _refused(_run("extend", tmp_path / "bad.wav", tmp_path / "out.wav"), "first at 1.500 s")
    _no_output(tmp_path)


def test_c7_pure_tone(tmp_path):
    x = 0.3 * np.sin(2 * np.pi * 1000 * np.arange(16000) / 8000)
    sf.write(tmp_path / "tone.wav", x, 8000)
    y = _extended(_run("extend", tmp_path / "tone.wav", tmp_path / "out.wav"), tmp_path / "out.wav", x.size)
    assert _highband_db(y) < -15  # a tone is not speech: little is added


def test_c8_already_wideband(tmp_path, speech):
    y16, sr = sf.read(ARCTIC[0])
    sf.write(tmp_path / "wide16.wav", y16, sr)
    _refused(_run("extend", tmp_path / "wide16.wav", tmp_path / "out.wav"), "nenv degrade")
    # 8 kHz audio that was never band-limited to 3.4 kHz: its own 3.4-4 kHz content is kept untouched
    from nenv.media.audio import resample

    full = resample(y16, orig_sr=sr, target_sr=8000)[:24000]
    sf.write(tmp_path / "full8.wav", full, 8000)
    y = _extended(_run("extend", tmp_path / "full8.wav", tmp_path / "out.wav", "--method", "unextended"), tmp_path / "out.wav", full.size)
    up = resample(full, orig_sr=8000, target_sr=16000)
    assert 10 * np.log10(np.mean((y - up) ** 2) / np.mean(up**2)) < -30


def test_c9_very_low_level(tmp_path, speech):
    x = speech * 10 ** (-45 / 20)  # about -71 dBov: near the 16-bit floor
    sf.write(tmp_path / "quiet.wav", x, 8000, subtype="FLOAT")
    y = _extended(_run("extend", tmp_path / "quiet.wav", tmp_path / "out.wav"), tmp_path / "out.wav", x.size)
    sf.write(tmp_path / "normal.wav", speech, 8000, subtype="FLOAT")
    ref = _extended(_run("extend", tmp_path / "normal.wav", tmp_path / "n.wav"), tmp_path / "n.wav", speech.size)
    # the added band scales with the input: no gain blow-up at low level
    assert 10 * np.log10((np.mean(y**2) + 1e-20) / np.mean(ref**2)) < -40


def test_c10_very_short_input(tmp_path):
    for n in (1, 79, 80, 81):
        x = 0.1 * np.random.default_rng(n).standard_normal(n)
        sf.write(tmp_path / "short.wav", x, 8000, subtype="FLOAT")
        _extended(_run("extend", tmp_path / "short.wav", tmp_path / "out.wav", "--overwrite"), tmp_path / "out.wav", n)


# ---- models and configs --------------------------------------------------------------------


def _model_copy(tmp_path) -> Path:
    from nenv.chain.checkpoint import default_path

    dst = tmp_path / "model"
    shutil.copytree(default_path(), dst, ignore=shutil.ignore_patterns("*.png", "*.csv", "model.pt"))
    return dst


@pytest.fixture
def call(tmp_path, speech) -> Path:
    sf.write(tmp_path / "call.wav", speech, 8000)
    return tmp_path / "call.wav"


def test_m1_missing_model(tmp_path, call):
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", tmp_path / "nomodel"), "does not exist")
    m = _model_copy(tmp_path)
    (m / "codebook.npz").unlink()
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", m), "incomplete")
    _no_output(tmp_path)


def test_m1_export_needs_both_the_weights_and_the_settings(tmp_path):
    """`nenv export` of a folder without model.pt, or with it but without nenv.json: refused in one
    line, the folder's model.onnx untouched."""
    pytest.importorskip("torch")
    from nenv.chain.checkpoint import default_path

    m = _model_copy(tmp_path)  # everything but model.pt
    onnx_before = (m / "model.onnx").read_bytes()
    _refused(_run("export", m), "needs model.pt and nenv.json")
    shutil.copy(default_path() / "model.pt", m / "model.pt")
    (m / "nenv.json").unlink()
    _refused(_run("export", m), "needs model.pt and nenv.json")
    assert (m / "model.onnx").read_bytes() == onnx_before
    assert sorted(f.name for f in m.iterdir()) == ["MODEL.md", "SOURCES.md", "codebook.npz", "evaluation.json", "model.onnx", "model.pt", "record.json"]


def test_m2_corrupt_onnx(tmp_path, call):
    m = _model_copy(tmp_path)
    (m / "model.onnx").write_bytes(os.urandom(4096))
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", m), "cannot load")
    _no_output(tmp_path)


def test_m3_truncated_onnx(tmp_path, call):
    m = _model_copy(tmp_path)
    data = (m / "model.onnx").read_bytes()
    (m / "model.onnx").write_bytes(data[: len(data) // 2])
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", m), "cannot load")
    _no_output(tmp_path)


def test_m4_model_of_another_feature_version(tmp_path, call):
    m = _model_copy(tmp_path)
    info = json.loads((m / "nenv.json").read_text())
    info["features"]["version"] = 99
    (m / "nenv.json").write_text(json.dumps(info))
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", m), "version=99")
    info["format_version"] = 7
    (m / "nenv.json").write_text(json.dumps(info))
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", m), "checkpoint format 7")
    (m / "nenv.json").write_text("{ not json")
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", m), "cannot read")
    _no_output(tmp_path)


@pytest.mark.parametrize(
    "text, needle",
    [("epochz = 3\n", "epochz"), ('epochs = "3"\n', "epochs"), ("hidden = 64\n", "hidden"), ("[section]\nx = 1\n", "flat"), ("\x00\x01", "TOML"),
     ("guard_percentile = 150\n", "guard_percentile' must be more than 50 and at most 100"), ("learning_rate = nan\n", "finite")],
)
def test_m5_config_unknown_keys_wrong_types_and_values_out_of_range(tmp_path, text, needle):
    cfg = tmp_path / "recipe.toml"
    cfg.write_text(text)
    _refused(_run("train", "--config", cfg, "--out", tmp_path / "m"), needle)
    _refused(_run("survey", tmp_path, "--config", cfg, "--out", tmp_path / "s"), needle)
    assert not (tmp_path / "m").exists()


def test_m6_torch_checkpoint_only_with_weights_only(tmp_path):
    torch = pytest.importorskip("torch")
    m = _model_copy(tmp_path)
    marker = tmp_path / "pwned"

    class Payload:  # unpickling this would run code
        def __reduce__(self):
            return (Path.touch, (marker,))

    torch.save({"config": {}, "state_dict": {}, "normalisation": Payload()}, m / "model.pt")
    _refused(_run("export", m), "cannot load")
    assert not marker.exists()  # weights_only=True refused the pickled object; nothing ran


def test_m7_model_files_of_the_wrong_kind(tmp_path, call):
    m = _model_copy(tmp_path)
    np.savez(m / "codebook.npz", nonsense=np.zeros(3))
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", m), "codebook")
    shutil.rmtree(m)
    m = _model_copy(tmp_path)
    shutil.copy(call, m / "model.onnx")  # a WAV named model.onnx
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", m), "cannot load")
    _no_output(tmp_path)


def test_m9_calibration_out_of_range(tmp_path, call):
    m = _model_copy(tmp_path)
    info = json.loads((m / "nenv.json").read_text())
    info["calibration"] = {"band_trim_db": 25}
    (m / "nenv.json").write_text(json.dumps(info))
    _refused(_run("extend", call, tmp_path / "out.wav", "--model", m), "calibration band_trim_db must be a number of dB from -40 to 12")
    _refused(_run("extend", call, tmp_path / "out.wav", "--band-trim", "-50"), "from -40 to 12, got -50")
    _refused(_run("extend", call, tmp_path / "out.wav", "--method", "imaging", "--band-trim", "-6"), "the imaging method has none")
    _refused(_run("evaluate", ARCTIC[0], "--out", tmp_path / "ev", "--method", "oracle", "--band-trim", "-6"), "add neural or codebook")
    _no_output(tmp_path)
    assert not (tmp_path / "ev").exists()


def test_m8_train_replaces_only_a_model_folder(tmp_path, synthetic_corpus):
    pytest.importorskip("torch")
    keep = tmp_path / "project"
    keep.mkdir()
    (keep / "notes.txt").write_text("keep me")
    _refused(_run("train", "--set", f"corpus={synthetic_corpus}", "--out", keep, "--force"), "not a nenv model folder")
    assert (keep / "notes.txt").read_text() == "keep me"
    m = _model_copy(tmp_path)
    shutil.copytree(synthetic_corpus, m / "corpus")  # a corpus kept inside the model folder would be deleted with it
    _refused(_run("train", "--set", f"corpus={m / 'corpus'}", "--out", m, "--force"), "is inside")
    _refused(_run("train", "--set", f"corpus={synthetic_corpus}", "--out", m, "--force", "--cache", m / "cache"), "is inside")
    assert (m / "corpus").is_dir() and (m / "nenv.json").is_file()
    (tmp_path / "file").write_text("x")
    _refused(_run("train", "--set", f"corpus={synthetic_corpus}", "--out", tmp_path / "file"), "is a file")
