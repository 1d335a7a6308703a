"""Property-based and fuzz tests: whatever comes in, nenv either says why not (its own error) or gives sane output.

Sane output: finite, never above full scale, exactly twice the input length.
"""

from __future__ import annotations

import io
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from nenv.chain import pipeline
from nenv.serve import streamfile
from nenv.errors import NenvError
from nenv.serve.runtime import CallEngine

HERE = Path(__file__).resolve().parent

# signals built from the pieces real calls and broken calls are made of
piece = st.one_of(
    st.builds(lambda n: np.zeros(n), st.integers(0, 400)),  # silence
    st.builds(lambda n, v: np.full(n, v), st.integers(1, 400), st.floats(-1, 1)),  # DC, full-scale steps
    st.builds(lambda n, s, a: a * np.random.default_rng(s).standard_normal(n), st.integers(1, 800), st.integers(0, 2**16), st.floats(0, 2)),  # noise, clipping
    st.builds(lambda n, f, a: a * np.sin(2 * np.pi * f * np.arange(n) / 8000), st.integers(1, 800), st.floats(0, 4000), st.floats(0, 1.5)),  # tones up to Nyquist
    st.builds(lambda k, a: np.eye(1, 40, k)[0] * a, st.integers(0, 39), st.floats(-1, 1)),  # clicks
    st.builds(lambda n, e: np.full(n, 10.0**e), st.integers(1, 200), st.integers(-300, -1)),  # tiny values, denormals
)
signals = st.lists(piece, min_size=1, max_size=8).map(np.concatenate).filter(lambda x: x.size > 0)
chunkings = st.lists(st.integers(1, 500), min_size=1, max_size=6)


def _systems():
    return {"imaging": pipeline.make_system("imaging"), "neural": pipeline.make_system("neural"), "codebook": pipeline.make_system("codebook")}


SYSTEMS = _systems()


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(x=signals, chunks=chunkings, name=st.sampled_from(sorted(SYSTEMS)))
@example(x=np.full(234, 3.0524418986189513e-161), chunks=[1], name="codebook")  # found by this test: NaN from denormal LPC
def test_any_signal_in_any_chunks_gives_sane_output(x, chunks, name):
    system = SYSTEMS[name]
    eng = CallEngine(system=system)
    out, pos, i = [], 0, 0
    while pos < x.size:
        n = chunks[i % len(chunks)]
        out.append(eng.feed(x[pos : pos + n]))
        pos, i = pos + n, i + 1
    out.append(eng.flush())
    y = np.concatenate(out)
    assert y.size == 2 * x.size
    assert np.all(np.isfinite(y)) and np.max(np.abs(y)) <= 0.99


def _seed_files() -> list[bytes]:
    rng = np.random.default_rng(0)
    x = 0.1 * rng.standard_normal(800)
    seeds = []
    for fmt, sub, sr in [("WAV", "PCM_16", 8000), ("WAV", "FLOAT", 8000), ("FLAC", "PCM_16", 8000), ("WAV", "PCM_U8", 11025), ("OGG", "VORBIS", 8000), ("WAV", "PCM_24", 44100)]:
        buf = io.BytesIO()
        sf.write(buf, x, sr, format=fmt, subtype=sub)
        seeds.append(buf.getvalue())
    return seeds


SEEDS = _seed_files()


@st.composite
def damaged_files(draw):
    """A valid file with bytes flipped, cut, repeated or inserted; or plain random bytes."""
    data = bytearray(draw(st.sampled_from(SEEDS)))
    for _ in range(draw(st.integers(0, 6))):
        op = draw(st.sampled_from(["flip", "cut", "insert", "repeat"]))
        pos = draw(st.integers(0, max(0, len(data) - 1)))
        if op == "flip" and data:
            data[pos] = draw(st.integers(0, 255))
        elif op == "cut":
            del data[pos : pos + draw(st.integers(1, 400))]
        elif op == "insert":
            data[pos:pos] = draw(st.binary(min_size=1, max_size=32))
        else:
            data += data[pos : pos + draw(st.integers(1, 400))]
    return bytes(data) if draw(st.booleans()) or not data else draw(st.binary(max_size=256))


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=damaged_files())
def test_damaged_files_get_our_error_or_a_sane_output(tmp_path, data):
    src, dst = tmp_path / "in.bin", tmp_path / "out.wav"
    src.write_bytes(data)
    dst.unlink(missing_ok=True)
    try:
        res = streamfile.extend_file(src, dst, streamfile.Options(method="imaging", resample=True, mix=True))
    except NenvError:
        assert not dst.exists()
        return
    y, sr = sf.read(dst)
    assert sr == 16000 and y.size == 2 * int(round(res.seconds * 8000))
    assert np.all(np.isfinite(y)) and np.max(np.abs(y), initial=0) <= 1.0


def test_atheris_on_the_file_path(tmp_path):
    """libFuzzer-guided mutation of real files through extend's file path (a short run; longer ones by hand)."""
    pytest.importorskip("atheris")
    corpus = tmp_path / "corpus"
    corpus.mkdir()
    for i, s in enumerate(SEEDS):
        (corpus / f"seed{i}").write_bytes(s)
    work = tmp_path / "work"
    work.mkdir()
    res = subprocess.run([sys.executable, str(HERE / "fuzz" / "fuzz_files.py"), str(corpus), "-runs=3000", "-max_len=8192", "-seed=1", "-timeout=20"],
                         capture_output=True, text=True, timeout=600, cwd=HERE.parent, env={**os.environ, "NENV_FUZZ_WORK": str(work)})
    assert res.returncode == 0, res.stderr[-3000:]
    assert "Done 3000 runs" in res.stderr, res.stderr[-2000:]
    assert (work / "in.bin").exists()  # the scratch files went to the test's folder, not a new one in /tmp
