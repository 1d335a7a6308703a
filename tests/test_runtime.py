"""The streaming engine: any chunking gives the offline output, with a fixed, reported latency."""

from __future__ import annotations

import re
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from nenv.dsp import channel
from nenv.chain import pipeline
from nenv.serve.runtime import ALGORITHMIC_LATENCY_MS, CallEngine
from tests.conftest import env_without_unbuffered_output, narrowed_guard


@pytest.fixture(scope="module")
def call_audio(arctic_refs):
    _, ref = arctic_refs[1]
    return ref, channel.telephone(ref, sr=16000, law="mulaw")


def _stream(x, chunks, system):
    eng = CallEngine(system=system)
    out, pos = [], 0
    for c in chunks:
        out.append(eng.feed(x[pos : pos + c]))
        pos += c
    out.append(eng.feed(x[pos:]))
    out.append(eng.flush())
    return np.concatenate(out), eng


@settings(max_examples=30, deadline=None)
@given(chunks=st.lists(st.integers(0, 2000), min_size=0, max_size=40), name=st.sampled_from(["imaging", "oracle", "unextended"]))
def test_any_chunking_equals_offline(call_audio, chunks, name):
    ref, x = call_audio
    x = x[:12000]
    offline = pipeline.extend(x, system=pipeline.make_system(name, reference=ref)).y
    streamed, eng = _stream(x, chunks, pipeline.make_system(name, reference=ref))
    assert streamed.shape == offline.shape == (2 * x.size,)
    np.testing.assert_allclose(streamed, offline, atol=1e-9)
    assert eng.samples_out == 2 * x.size


def test_single_samples_and_empty_input(call_audio):
    _, x = call_audio
    x = x[:1000]
    offline = pipeline.extend(x, system=pipeline.make_system("imaging")).y
    streamed, _ = _stream(x, [1] * x.size, pipeline.make_system("imaging"))
    np.testing.assert_allclose(streamed, offline, atol=1e-9)
    eng = CallEngine(system=pipeline.make_system("imaging"))
    assert eng.feed(np.zeros(0)).size == 0 and eng.flush().size == 0


def test_a_call_keeps_its_guard_verdicts_only_when_asked(call_audio):
    """``keep_decisions=True``: one verdict per hop, in order, equal to an offline run's of the same
    signal (whose estimator keeps them by default; measures to 1e-12), whatever the chunking;
    before the first hop the record is empty with each field's type; without it nothing is kept. A
    guard narrowed to 16 dB of level rejects some hops, so the verdicts compared are not all alike."""
    from dataclasses import fields

    from nenv.chain import checkpoint
    from nenv.chain.guard import Decisions

    _, x = call_audio
    x = x[:9000]
    ck = narrowed_guard(checkpoint.load(checkpoint.default_path()))
    offline = pipeline.make_system("neural", model=ck)
    pipeline.extend(x, system=offline)
    want = offline.estimator.record()
    assert 0 < want.rejected.sum() < want.rejected.size
    eng = CallEngine(ck, keep_decisions=True)
    empty = eng.system.estimator.record()
    assert empty.rejected.size == 0
    assert (empty.rejected.dtype.kind, empty.reasons.dtype.kind, empty.cell.dtype.kind, empty.max_k.dtype.kind) == ("b", "i", "i", "f")
    for start in range(0, x.size, 333):
        eng.feed(x[start : start + 333])
    eng.flush()
    got = eng.system.estimator.record()
    for f in fields(Decisions):
        g, w = getattr(got, f.name), getattr(want, f.name)
        assert g.dtype == w.dtype, f.name
        if g.dtype.kind == "f":  # a batch of another size may round the network's last digits otherwise
            np.testing.assert_allclose(g, w, rtol=1e-12, err_msg=f.name)
        else:  # verdicts, reasons and cells exactly
            np.testing.assert_array_equal(g, w, err_msg=f.name)
    quiet = CallEngine(ck)
    quiet.feed(x)
    quiet.flush()
    assert quiet.system.estimator.record().rejected.size == 0


def test_latency_is_a_hop_plus_the_interpolator():
    # 10 ms hop + 23 samples at 16 kHz; no look-ahead
    assert ALGORITHMIC_LATENCY_MS == pytest.approx(10.0 + 23 / 16)
    assert ALGORITHMIC_LATENCY_MS <= 20.0
    eng = CallEngine(system=pipeline.make_system("imaging"))
    assert eng.feed(np.zeros(79)).size == 0  # nothing before the first hop is whole
    assert eng.feed(np.zeros(1)).size == 160 - 23


def test_bad_samples_do_not_poison_the_call(call_audio):
    _, x = call_audio
    eng = CallEngine(system=pipeline.make_system("imaging"))
    y1 = eng.feed(x[:800])
    bad = x[800:1600].copy()
    bad[100:110] = np.nan
    y2 = eng.feed(bad)
    y3 = eng.feed(x[1600:4000])
    assert all(np.all(np.isfinite(y)) for y in (y1, y2, y3))
    assert eng.bad_samples == 10
    # each bad sample is a zero: the call goes on exactly as if those samples had been silent
    fixed = x[:4000].copy()
    fixed[900:910] = 0.0
    want = pipeline.extend(fixed, system=pipeline.make_system("imaging")).y
    got = np.concatenate([y1, y2, y3, eng.flush()])
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)


def test_streaming_counts_the_samples_it_limits_as_offline_extension_does(call_audio):
    """A call loud enough to clip: the peak limiter's count is the same offline, streamed and batched."""
    from nenv.serve.multicall import MultiCallEngine

    _, x = call_audio
    loud = np.clip(8.0 * x[:16000], -1.0, 1.0)  # 18 dB hotter, clipped at full scale like a hot line
    want = pipeline.extend(loud, system=pipeline.make_system("neural")).n_limited
    assert want > 0
    eng = CallEngine()
    for i in range(0, loud.size, 160):
        eng.feed(loud[i : i + 160])
    assert eng.flush().size > 0 and eng.flush().size == 0  # a second flush has nothing left to give
    with pytest.raises(RuntimeError, match="flushed"):
        eng.feed(loud[:160])
    many, stats = MultiCallEngine(), {}
    many.open("a")
    for i in range(0, loud.size, 160):
        many.feed("a", loud[i : i + 160])
        many.step()
    many.close("a", stats=stats)
    assert eng.limited == stats["limited"] == want


def test_integer_pcm_is_refused_with_the_conversion_to_use(call_audio):
    from nenv.errors import InputError
    from nenv.serve.multicall import MultiCallEngine
    from nenv.chain.checkpoint import default_path, load

    _, x = call_audio
    pcm = np.round(x[:800] * 32767).astype(np.int16)  # what a gateway holds before conversion
    eng = CallEngine(system=pipeline.make_system("imaging"))
    with pytest.raises(InputError, match="divide 16-bit PCM by 32768"):
        eng.feed(pcm)
    assert eng.samples_in == 0  # refused before anything changed
    np.testing.assert_array_equal(eng.feed(pcm / 32768.0), CallEngine(system=pipeline.make_system("imaging")).feed(pcm.astype(np.float64) / 32768.0))
    if default_path() is not None:
        multi = MultiCallEngine(load(default_path()))
        multi.open("a")
        with pytest.raises(InputError, match="integers"):
            multi.feed("a", pcm)
        multi.feed("a", pcm / 32768.0)
        assert multi.step()["a"].size > 0


def _nenv(*args, **kw):
    import subprocess
    import sys

    return subprocess.run([sys.executable, "-m", "nenv", *map(str, args)], capture_output=True, **kw)


@pytest.mark.parametrize("fmt", ["s16le", "mulaw", "alaw"])
def test_stream_command_is_bit_exact_with_extend(tmp_path, call_audio, fmt):
    import soundfile as sf

    from nenv.dsp import g711
    from nenv.media.audio import to_int16

    _, x = call_audio
    x = x[:8000]
    if fmt == "s16le":
        raw = to_int16(x).astype("<i2").tobytes()
        sf.write(tmp_path / "nb.wav", to_int16(x), 8000, subtype="PCM_16")
    else:
        codes = g711.encode(x, law=fmt)
        raw = codes.tobytes()
        sf.write(tmp_path / "nb.wav", to_int16(g711.decode(codes, law=fmt)), 8000, subtype="PCM_16")
    res = _nenv("stream", "--method", "imaging", "--input-format", fmt, input=raw)
    assert res.returncode == 0, res.stderr
    y = np.frombuffer(res.stdout, dtype="<i2")
    assert _nenv("extend", tmp_path / "nb.wav", tmp_path / "wb.wav", "--method", "imaging").returncode == 0
    ref, _ = sf.read(tmp_path / "wb.wav", dtype="int16")
    np.testing.assert_array_equal(y, ref)


@pytest.mark.parametrize("options", [("--method", "neural", "--low-band"), ("--method", "codebook", "--excitation", "modulate")])
def test_stream_runs_the_options_asked_for(tmp_path, call_audio, options):
    # nenv stream with a method, the low band or an excitation equals nenv extend with the same options.
    import soundfile as sf

    from nenv.media.audio import to_int16

    _, x = call_audio
    pcm = to_int16(x[:8000])
    sf.write(tmp_path / "nb.wav", pcm, 8000, subtype="PCM_16")
    res = _nenv("stream", *options, input=pcm.astype("<i2").tobytes())
    assert res.returncode == 0, res.stderr
    assert _nenv("extend", tmp_path / "nb.wav", tmp_path / "wb.wav", *options).returncode == 0
    ref, _ = sf.read(tmp_path / "wb.wav", dtype="int16")
    np.testing.assert_array_equal(np.frombuffer(res.stdout, dtype="<i2"), ref)


def test_stream_reassembles_samples_split_across_reads(tmp_path, call_audio):
    # A pipe may deliver any number of bytes per read: 16-bit samples split across reads (chunks of 333
    # bytes, written apart so each read sees one) must come out as if written at once.
    import subprocess
    import sys
    import time

    from nenv.media.audio import to_int16

    _, x = call_audio
    raw = to_int16(x[:8000]).astype("<i2").tobytes()
    whole = _nenv("stream", "--method", "imaging", input=raw)
    p = subprocess.Popen([sys.executable, "-m", "nenv", "stream", "--method", "imaging"], stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    p.stdin.write(raw[:320])  # two whole hops; their output shows the reading loop is running
    p.stdin.flush()
    from nenv.chain.pipeline import LATENCY

    first = p.stdout.read(2 * 320 - 2 * LATENCY)  # 320 samples at 16 kHz, less the interpolator's delay
    for s in range(320, len(raw), 333):
        p.stdin.write(raw[s : s + 333])
        p.stdin.flush()
        time.sleep(0.003)
    out, err = p.communicate(timeout=60)
    assert p.returncode == 0, err
    assert first + out == whole.stdout and len(first + out) == 2 * len(raw)


def test_stream_says_when_s16le_input_ends_inside_a_sample():
    whole = _nenv("stream", "--method", "imaging", input=b"\x01\x02" * 80)
    odd = _nenv("stream", "--method", "imaging", input=b"\x01\x02" * 80 + b"\x03")
    assert whole.returncode == odd.returncode == 0
    assert odd.stdout == whole.stdout and len(odd.stdout) == 2 * 2 * 80  # the whole samples, extended
    assert b"odd byte" in odd.stderr and b"odd byte" not in whole.stderr


def test_stream_whose_reader_goes_away_says_so_and_completes_its_record(tmp_path, call_audio):
    import json
    import subprocess
    import sys

    from nenv.media.audio import to_int16
    from nenv.chain.checkpoint import default_path

    if default_path() is None:
        pytest.skip("no default model")
    _, x = call_audio
    (tmp_path / "in.raw").write_bytes(to_int16(np.tile(x, 4)).astype("<i2").tobytes())
    with open(tmp_path / "in.raw", "rb") as stdin:
        # a buffered stdout (as without PYTHONUNBUFFERED) must not fail again at exit
        p = subprocess.Popen([sys.executable, "-m", "nenv", "stream", "--record", tmp_path / "r.jsonl"], stdin=stdin, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                             env=env_without_unbuffered_output())
        assert len(p.stdout.read(3200)) == 3200  # the reader takes 0.1 s of output, then hangs up
        p.stdout.close()
        err = p.stderr.read().decode()
        assert p.wait(timeout=120) == 2
    assert "closed by its reader" in err and "Traceback" not in err and "Exception ignored" not in err
    kinds = [json.loads(line)["type"] for line in (tmp_path / "r.jsonl").read_text().splitlines()]
    assert kinds[0] == "header" and kinds[-1] == "summary"


def test_stream_flushes_its_tail_on_sigterm(call_audio):
    import signal
    import subprocess
    import sys
    import time

    from nenv.media.audio import to_int16

    _, x = call_audio
    p = subprocess.Popen([sys.executable, "-m", "nenv", "stream", "--method", "imaging"], stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    p.stdin.write(to_int16(x[:4001]).astype("<i2").tobytes())
    p.stdin.flush()
    deadline = time.time() + 60
    while time.time() < deadline:  # wait until the engine is running (it has written output)
        time.sleep(0.5)
        if p.poll() is not None:
            break
        import select

        if select.select([p.stdout], [], [], 0)[0]:
            break
    p.send_signal(signal.SIGTERM)
    time.sleep(0.003)
    p.send_signal(signal.SIGTERM)  # a supervisor's second signal a few ms later is absorbed, not fatal
    out, err = p.communicate(timeout=60)
    assert p.returncode == 0, err
    assert len(out) // 2 == 2 * 4001  # every sample that went in came out, tail included
    assert b"stream ended" in err


def test_loading_a_model_leaves_the_floating_point_mode_alone():
    # Subnormal numbers must still exist after a model has run (the library does not flush
    # denormals unless asked): 2**-1074 is the smallest positive float64 (IEEE 754).
    from nenv.chain import checkpoint

    path = checkpoint.default_path()
    if path is None:
        pytest.skip("no default model")
    ck = checkpoint.load(path)
    ck.predict(np.zeros((3, ck.features.input_dim)))
    tiny = np.array([2.0**-1074])
    assert tiny[0] > 0 and (tiny * 1.0)[0] > 0


def test_the_network_takes_a_batch_of_no_rows():
    from nenv.chain import checkpoint

    ck = checkpoint.load(checkpoint.default_path())
    ceps, level = ck.predict(np.zeros((0, ck.features.input_dim)))
    assert ceps.shape == (0, ck.features.n_wb_ceps) and level.shape == (0,)


def test_the_network_runs_on_one_thread_that_never_spins_and_flushes_denormals_only_when_asked():
    """A gateway runs many calls per core: each session uses the calling thread alone (onnxruntime's
    intra- and inter-op pools of one, sequential) and never spin-waits between hops; flushing
    denormals changes the thread's arithmetic for the whole process, so it is set only when asked."""
    import onnxruntime as ort

    from nenv.chain.checkpoint import session_options

    for flush in (False, True):
        so = session_options(flush_denormals=flush)
        assert (so.intra_op_num_threads, so.inter_op_num_threads, so.execution_mode) == (1, 1, ort.ExecutionMode.ORT_SEQUENTIAL)
        assert so.get_session_config_entry("session.intra_op.allow_spinning") == so.get_session_config_entry("session.inter_op.allow_spinning") == "0"
        if flush:
            assert so.get_session_config_entry("session.set_denormal_as_zero") == "1"
        else:
            with pytest.raises(Exception, match="set_denormal_as_zero"):  # not set at all
                so.get_session_config_entry("session.set_denormal_as_zero")


def test_a_long_call_keeps_no_verdicts_unless_asked(call_audio):
    """Memory must not grow with a call's length: the streaming engine keeps no per-hop verdicts by default."""
    from nenv.chain import checkpoint

    path = checkpoint.default_path()
    if path is None:
        pytest.skip("no default model")
    model = checkpoint.load(path)
    x = np.tile(call_audio[1], 3)
    quiet = CallEngine(system=pipeline.make_system("neural", model=model))
    kept = CallEngine(system=pipeline.make_system("neural", model=model), keep_decisions=True)
    for eng in (quiet, kept):
        for s in range(0, x.size, 160):
            eng.feed(x[s : s + 160])
    hops = x.size // 80
    assert quiet.system.estimator.record().rejected.size == 0
    assert kept.system.estimator.record().rejected.size == hops


def test_the_readme_embedding_example_runs_as_written():
    import re
    from pathlib import Path

    from nenv.chain.checkpoint import default_path

    if default_path() is None:
        pytest.skip("no default model")
    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(.*?)```", text, flags=re.S)
    assert len(blocks) == 1
    env: dict = {}
    exec(compile(blocks[0], "README.md", "exec"), env)
    assert env["wide"].size == 320  # 160 samples in, 320 out
    assert env["ready"]["call-1"].size + env["tail"].size == 320 and np.max(np.abs(env["wide"])) > 0.05
    np.testing.assert_allclose(np.concatenate([env["ready"]["call-1"], env["tail"]]), env["wide"], atol=1e-9)



def test_stream_prints_the_same_guard_summary_as_extend(tmp_path, call_audio):
    """The guard's one-line summary (hops that fell back, by reason) ends a neural stream as it ends extend."""
    import soundfile as sf

    from nenv.media.audio import to_int16

    _, x = call_audio
    x = x[:16000]
    sf.write(tmp_path / "nb.wav", to_int16(x), 8000, subtype="PCM_16")
    res = _nenv("stream", "--method", "neural", input=to_int16(x).astype("<i2").tobytes())
    assert res.returncode == 0, res.stderr
    line = [ln for ln in res.stderr.decode().splitlines() if ln.startswith("guard:")]
    ext = _nenv("extend", tmp_path / "nb.wav", tmp_path / "wb.wav", "--method", "neural")
    assert ext.returncode == 0
    assert line == [ln for ln in ext.stderr.decode().splitlines() if ln.startswith("guard:")]
    assert line and "200 hops" in line[0]


def test_stream_ends_with_its_counts_and_records_the_call_under_its_id(tmp_path, call_audio):
    """125.5 hops in: the end line says how long the input and output were; the record's summary holds the
    call id, the group, 126 hops (10 ms each: the half hop, extended only by the flush, counts; the tail
    padding does not) and the call's length; a 0 dBFS square wave, limited at -0.1 dBFS, is counted."""
    import json

    from nenv.media.audio import to_int16

    _, x = call_audio
    n = 10040
    res = _nenv("stream", "--method", "neural", "--record", tmp_path / "r.jsonl", "--call-id", "call-12", "--group", "female",
                input=to_int16(x[:n]).astype("<i2").tobytes())
    assert res.returncode == 0, res.stderr
    assert f"stream ended: {n / 8000:.2f} s in, {2 * n / 16000:.2f} s out, 0 samples limited, 0 bad samples" in res.stderr.decode()
    last = json.loads((tmp_path / "r.jsonl").read_text().splitlines()[-1])
    assert (last["type"], last["source"], last["group"], last["hops"], last["seconds"]) == ("summary", "call-12", "female", 126, round(n / 8000, 3))
    loud = np.where(np.arange(4000) % 40 < 20, 32767, -32768).astype("<i2").tobytes()  # 200 Hz, full scale
    res = _nenv("stream", "--method", "imaging", input=loud)
    said = re.search(r"stream ended: 0\.50 s in, 0\.50 s out, (\d+) samples? limited, 0 bad samples", res.stderr.decode())
    assert res.returncode == 0 and said and int(said[1]) > 0, res.stderr


def test_stream_writes_each_block_out_at_once_without_the_environment_asking(call_audio):
    """A live call cannot wait for an output buffer to fill: the stream flushes after every block itself,
    also where PYTHONUNBUFFERED is not set (some machines set it for every process; it would hide a
    missing flush). A tenth of a second of input, stdin left open: its extension (less than an output
    buffer holds) arrives within 60 s."""
    import os
    import select
    import subprocess
    import sys
    import time

    from nenv.chain.pipeline import LATENCY
    from nenv.media.audio import to_int16

    _, x = call_audio
    p = subprocess.Popen([sys.executable, "-m", "nenv", "stream", "--method", "imaging"], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, env=env_without_unbuffered_output())
    try:
        p.stdin.write(to_int16(x[:800]).astype("<i2").tobytes())
        p.stdin.flush()
        want, got, deadline = 2 * (1600 - LATENCY), b"", time.monotonic() + 60
        while len(got) < want and time.monotonic() < deadline:
            if select.select([p.stdout], [], [], 0.5)[0]:
                chunk = os.read(p.stdout.fileno(), 65536)
                if not chunk:
                    break
                got += chunk
        assert len(got) == want, f"{len(got)} of {want} bytes while the input stayed open"
    finally:
        p.stdin.close()  # end of the call: the tail follows
        rest = p.stdout.read()
        p.stderr.read()
        p.wait(timeout=60)
    assert p.returncode == 0 and len(got + rest) == 2 * 2 * 800


def test_stream_refuses_a_wav_header_and_a_terminal(tmp_path, call_audio):
    """A WAV file piped in whole would be played header and all (a click at -0.9 dBFS); binary audio
    written to a terminal is garbage on the screen. Both are refused in one line with what to do."""
    import os
    import subprocess
    import sys

    import soundfile as sf

    from nenv.media.audio import to_int16

    _, x = call_audio
    sf.write(tmp_path / "nb.wav", to_int16(x[:8000]), 8000, subtype="PCM_16")
    res = _nenv("stream", "--method", "imaging", input=(tmp_path / "nb.wav").read_bytes())
    assert res.returncode == 2 and res.stdout == b""
    assert b"is a WAV file" in res.stderr and b"nenv extend" in res.stderr
    raw = _nenv("stream", "--method", "imaging", input=to_int16(x[:8000]).astype("<i2").tobytes())
    assert raw.returncode == 0 and len(raw.stdout) == 2 * 2 * 8000  # the same samples without a header pass
    master, slave = os.openpty()
    try:
        tty = subprocess.run([sys.executable, "-m", "nenv", "stream", "--method", "imaging"], input=b"", stdout=slave, stderr=subprocess.PIPE, timeout=120)
    finally:
        os.close(slave)
        os.close(master)
    assert tty.returncode == 2 and b"standard output is a terminal" in tty.stderr


def test_the_network_runs_through_bound_buffers_exactly_as_a_plain_session_run(rng):
    """Checkpoint.predict keeps onnxruntime IOBinding buffers per thread and batch size; whatever the
    sequence of batch sizes and threads, its results are onnxruntime's plain ``run``, bit for bit."""
    import threading

    from nenv.chain import checkpoint

    model = pipeline.load_model(None)
    start = 0
    x = rng.normal(0, 3, (300, model.features.input_dim))
    want_c, want_l = model.session().run(None, {"features": x.astype(np.float32)})
    for n in (1, 1, 2, 5, 1, 31, 100, 100, 1):  # new sizes rebind, repeated ones reuse the buffers (large ones are not kept)
        c, lv = model.predict(x[start : start + n])
        np.testing.assert_array_equal(c, want_c[start : start + n].astype(np.float64))
        np.testing.assert_array_equal(lv, want_l[start : start + n, 0].astype(np.float64))
        assert c.dtype == lv.dtype == np.float64 and c.flags.owndata  # a copy: the next run cannot change it
        start += n
        assert ("shape" in model._bound.__dict__) == (n <= checkpoint.KEEP_BOUND_ROWS)
    got: dict[int, list] = {}

    def worker(i: int) -> None:
        got[i] = [model.predict(x[j : j + 1])[0] for j in range(i, 40, 4)]

    threads = [threading.Thread(target=worker, args=(i,)) for i in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    for i in range(4):
        np.testing.assert_array_equal(np.concatenate(got[i]), want_c[i:40:4].astype(np.float64))


def test_an_engine_has_the_network_ready_before_its_first_hop(call_audio, monkeypatch, tmp_path):
    """Making onnxruntime's session on a call's first hop made that hop take 30-300 ms (three hops'
    time and more); an engine makes and runs the session when it is made. Checked by taking
    onnxruntime's session away once the engines exist: their first hops must not need it. A broken
    model.onnx is refused when the engine is made, not on its first hop."""
    import shutil

    import onnxruntime

    from nenv.chain import checkpoint
    from nenv.errors import ConfigError
    from nenv.serve.multicall import MultiCallEngine

    path = checkpoint.default_path()
    if path is None:
        pytest.skip("no default model")
    _, x = call_audio
    want = CallEngine(checkpoint.load(path)).feed(x[:480])
    one = CallEngine(checkpoint.load(path))  # fresh loads: no session made by an earlier test
    many = MultiCallEngine(checkpoint.load(path))

    def no_session(*args, **kwargs):
        raise AssertionError("a session was made during a call")

    monkeypatch.setattr(onnxruntime, "InferenceSession", no_session)
    np.testing.assert_array_equal(one.feed(x[:480]), want)
    many.open("a")
    many.feed("a", x[:480])
    assert many.step()["a"].size > 0
    monkeypatch.undo()
    broken = tmp_path / "broken"
    shutil.copytree(path, broken)
    (broken / "model.onnx").write_bytes((path / "model.onnx").read_bytes()[:1000])
    with pytest.raises(ConfigError, match="cannot load"):
        CallEngine(checkpoint.load(broken))


def test_engines_made_in_several_threads_share_one_session_and_all_run(call_audio, monkeypatch):
    """Engines of one model made in several threads at once (a gateway's start-up): one onnxruntime
    session is made, even when making it takes long enough for every thread to ask (here 50 ms more),
    and each thread's engine runs as one made alone does."""
    import threading

    import onnxruntime

    from nenv.chain import checkpoint

    path = checkpoint.default_path()
    if path is None:
        pytest.skip("no default model")
    _, x = call_audio
    want = CallEngine(checkpoint.load(path)).feed(x[:800])
    made = []
    real = onnxruntime.InferenceSession

    def slow_session(*args, **kwargs):
        made.append(1)
        time.sleep(0.05)
        return real(*args, **kwargs)

    monkeypatch.setattr(onnxruntime, "InferenceSession", slow_session)
    model = checkpoint.load(path)  # no session yet
    barrier, got, errors = threading.Barrier(4), [], []

    def run():
        barrier.wait()
        try:
            got.append(CallEngine(model).feed(x[:800]))
        except Exception as e:  # collected: an exception in a thread would not fail the test
            errors.append(repr(e))

    threads = [threading.Thread(target=run) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == [] and len(got) == 4 and len(made) == 1
    for y in got:
        np.testing.assert_array_equal(y, want)
