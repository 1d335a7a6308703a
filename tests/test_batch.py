"""Extending many files: mirrored layout, skip finished, failures reported, kills leave complete-or-absent outputs."""

from __future__ import annotations

import csv
import io
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from typer.testing import CliRunner

from nenv.media import audio
from nenv.chain import pipeline
from nenv.serve import batch, streamfile
from nenv.dsp import channel
from nenv.report import records
from nenv.cli import app
from nenv.errors import InputError, NenvError, OutputError
from tests.conftest import ARCTIC, as_if_from_a_terminal

runner = CliRunner()
REPO = Path(__file__).resolve().parents[1]


def _run(*args):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)


def _telephone(i: int, seconds: float) -> np.ndarray:
    y, sr = sf.read(ARCTIC[i % 2])
    y = np.tile(y, int(np.ceil(seconds * sr / y.size)))[: int(seconds * sr)]
    return channel.telephone(y, sr=sr, law="mulaw")


@pytest.fixture
def tree(tmp_path):
    """calls/ with good files in sub-folders (wav and flac), a broken one and a silent one (extended to silence)."""
    root = tmp_path / "calls"
    for rel, i, sec in [("north/a.wav", 0, 3.0), ("north/b.flac", 1, 2.0), ("south/deep/c.wav", 0, 2.5)]:
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        sf.write(root / rel, _telephone(i, sec), 8000, subtype="PCM_16")
    (root / "south" / "broken.wav").write_bytes(b"RIFF\x00\x00\x00\x00WAVEjunk" * 10)
    sf.write(root / "south" / "silent.wav", np.zeros(4000), 8000)
    (root / "notes.md").write_text("not audio, not picked up")
    return root


GOOD = {"north/a.wav": "north/a.wav", "north/b.flac": "north/b.wav", "south/deep/c.wav": "south/deep/c.wav", "south/silent.wav": "south/silent.wav"}


def test_folder_mirrors_layout_reports_failures_and_skips_finished(tree, tmp_path):
    out = tmp_path / "wide"
    res = _run("extend", tree, out, "--method", "imaging", "--jobs", "2")
    assert res.exit_code == 1, res.output  # one file failed: reported, the others done
    assert "done 4, skipped 0 (output exists), failed 1" in res.stdout
    assert "broken.wav" in res.stderr  # the silent file is no failure: extended to silence
    assert "files/h" not in res.stdout  # a batch of seconds reports no extrapolated hourly rate
    silent, sr = sf.read(out / "south" / "silent.wav")
    assert sr == 16000 and silent.size == 8000 and not np.any(silent)
    for src, dst in GOOD.items():
        # each output equals the single-file command's output for the same input
        single = tmp_path / f"single-{Path(dst).stem}.wav"
        assert _run("extend", tree / src, single, "--method", "imaging").exit_code == 0
        assert sf.read(out / dst, dtype="int16")[0].tobytes() == sf.read(single, dtype="int16")[0].tobytes()
    assert not (out / "south" / "broken.wav").exists()
    report = (out / batch.REPORT_NAME).read_text().splitlines()
    assert len(report) == 1 + 5 and sum(",failed," in r for r in report) == 1
    # rows in the order of the inputs, whichever worker finished first (the broken file fails at once)
    assert [r.split(",")[0] for r in report[1:]] == [str(j.src) for j in batch.plan([tree], out)]
    # rerun: finished outputs are skipped, failures tried again
    mtimes = {d: (out / d).stat().st_mtime_ns for d in GOOD.values()}
    res = _run("extend", tree, out, "--method", "imaging")
    assert "done 0, skipped 4 (output exists), failed 1" in res.stdout
    assert all((out / d).stat().st_mtime_ns == t for d, t in mtimes.items())
    rows = list(csv.DictReader(io.StringIO((out / batch.REPORT_NAME).read_text())))
    for row in rows:  # nothing extended: no length, no time, no hops, whether skipped or failed
        assert row["status"] in ("skipped", "failed") and row["seconds"] == "0.000" and row["x_real_time"] == "", row
        assert (row["hops"], row["rejected_hops"], row["limited_samples"]) == ("0", "0", "0"), row
        assert row["status"] == "failed" or row["wall_s"] == "0.000", row
    res = _run("extend", tree, out, "--method", "imaging", "--overwrite", "--format", "flac")
    assert "done 4, skipped 0" in res.stdout and (out / "north" / "a.flac").is_file()


@pytest.mark.parametrize("error, message", [
    (InputError("'in.wav' holds no samples"), "'in.wav' holds no samples"),
    (MemoryError(), "out of memory"),
    (OSError(28, "No space left on device"), "No space left on device"),
    (RuntimeError("a defect"), "internal error (RuntimeError: a defect)"),
])
def test_a_file_that_fails_in_any_way_is_reported_and_the_batch_goes_on(tmp_path, monkeypatch, error, message):
    """Whatever one file's extension raises (short of Ctrl-C) becomes that file's failed row, with
    the time it took, and its partial record is removed; the next file is not touched."""
    record = tmp_path / "guard.jsonl"

    def fails(src, dst, opts, record=None):
        Path(record).write_text("half a line")
        time.sleep(0.05)
        raise error

    monkeypatch.setattr(batch, "extend_file", fails)
    job = batch.Job(tmp_path / "in.wav", tmp_path / "out" / "in.wav", index=3)
    res = batch._work(job, streamfile.Options(), str(record))
    assert (res.status, res.message, res.source, res.output) == ("failed", message, str(job.src), str(job.dst))
    assert 0.05 <= res.wall_s < 30.0 and list(tmp_path.glob(".guard.jsonl.*")) == []
    assert batch._succeeded(str(tmp_path / "gone.part")) is False  # a part that cannot be read is no finished record


def test_lists_and_several_files(tree, tmp_path):
    lst = tmp_path / "todo.txt"
    lst.write_text(f"# calls to extend\n{tree / 'north' / 'a.wav'}\ncalls/south/deep/c.wav\n\n")
    out = tmp_path / "from_list"
    res = _run("extend", lst, out, "--method", "imaging", "--jobs", "1")
    assert res.exit_code == 0, res.output
    assert sorted(str(p.relative_to(out)) for p in out.rglob("*.wav")) == ["north/a.wav", "south/deep/c.wav"]
    out2 = tmp_path / "loose"
    assert _run("extend", tree / "north" / "a.wav", tree / "north" / "b.flac", out2, "--method", "imaging").exit_code == 0
    assert sorted(p.name for p in out2.glob("*.wav")) == ["a.wav", "b.wav"]


def test_batch_refusals(tree, tmp_path):
    def err(res, needle):
        assert res.exit_code == 2 and needle in res.stderr, res.output

    sf.write(tree / "north" / "a.flac", _telephone(0, 1.0), 8000)  # a.wav and a.flac -> both a.wav
    err(_run("extend", tree / "north", tmp_path / "o", "--method", "imaging"), "would both be written")
    err(_run("extend", tree / "south" / "deep", tmp_path / "o.wav"), "must be a folder")
    err(_run("extend", tree / "south" / "deep", tmp_path / "o2", "--format", "mp3"), "'mp3' is not one of 'wav', 'flac'")
    err(_run("extend", tree / "south" / "deep", tmp_path / "o3", "--method", "oracle"), "reference per file")
    err(_run("extend", tree / "south" / "deep", tmp_path / "o4", "--model", tmp_path / "nomodel"), "does not exist")
    err(_run("extend", tree / "south" / "deep", tmp_path / "nope", "--figure", tmp_path / "f.png"), "one input file")
    err(_run("extend", tmp_path / "missing", tree / "north" / "a.wav", tmp_path / "o5"), "does not exist")
    empty = tmp_path / "empty"
    empty.mkdir()
    err(_run("extend", empty, tmp_path / "o6"), "holds no audio files")
    assert not any((tmp_path / f"o{i}").exists() for i in range(2, 7))


def test_a_batchs_throughput_counts_only_the_files_it_extended():
    done = [streamfile.FileResult("a", "A", seconds=3.0), streamfile.FileResult("b", "B", seconds=2.0)]
    others = [streamfile.FileResult("c", "C", status="skipped", seconds=60.0), streamfile.FileResult("d", "D", status="failed", seconds=60.0)]
    s = batch.Summary(done + others, wall_s=10.0)
    # 2 files in 10 s = 720 files per hour; 5 s of audio in 10 s = 0.5 hours of audio per hour
    assert s.count("done") == 2 and s.audio_s == 5.0 and s.throughput() == (720.0, 0.5)
    assert batch.Summary(done, wall_s=0.0).throughput()[0] > 1e9  # no time measured: large, never a division by zero
    # the report: a worker's record part (an internal note) never reaches the notes column
    r = streamfile.FileResult("a", "A", seconds=3.0, wall_s=0.5, notes=["record:/tmp/.guard.jsonl.part1", "resampled 16000 Hz to 8 kHz"])
    (row,) = list(csv.DictReader(io.StringIO(batch.Summary([r], wall_s=1.0).to_csv())))
    assert row["notes"] == "resampled 16000 Hz to 8 kHz" and row["x_real_time"] == "6.0" and row["seconds"] == "3.000"


def test_batch_record_holds_every_file(tree, tmp_path):
    rec = tmp_path / "guard.jsonl"
    res = _run("extend", tree / "north", tmp_path / "o", "--jobs", "2", "--record", rec, "--group", "north")
    assert res.exit_code == 0, res.output
    r = records.read([rec])
    assert sorted(Path(s["source"]).name for s in r.summaries) == ["a.wav", "b.flac"]
    assert [(s["hops"], s["seconds"]) for s in sorted(r.summaries, key=lambda s: s["source"])] == [(300, 3.0), (200, 2.0)]
    assert not list(tmp_path.glob(".guard.jsonl.*"))  # per-file parts were merged and removed


def _reference_outputs(tree, tmp_path) -> dict[str, bytes]:
    ref = tmp_path / "ref"
    res = _run("extend", tree, ref, "--jobs", "1")
    assert res.exit_code == 1
    return {d: sf.read(ref / d, dtype="int16")[0].tobytes() for d in GOOD.values()}


def test_killed_batch_leaves_every_output_complete_or_absent(tree, tmp_path):
    """SIGKILL and Ctrl-C (SIGINT) at random moments; then a rerun finishes the job."""
    (tree / "long").mkdir()
    n_long, long_s = 10, 180.0  # longer inputs, enough of them that every run still has some to write (a whole pass takes longer than the latest kill)
    for i in range(n_long):
        sf.write(tree / "long" / f"l{i}.wav", _telephone(i, long_s), 8000)
    expected = _reference_outputs(tree, tmp_path)
    long_ref = {f"long/l{i}.wav" for i in range(n_long)}
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "nenv", "extend", str(tree), str(out), "--jobs", "2"]
    rng = random.Random(7)

    def parts():  # temporary audio outputs (the report is written through a temporary file too, at the very end)
        return set(out.rglob(".*.part.wav"))

    for sig in (signal.SIGKILL, signal.SIGINT, signal.SIGKILL, signal.SIGINT):
        # Ctrl-C as a terminal delivers it: the child must not inherit an ignored SIGINT
        proc = subprocess.Popen(cmd, cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True,
                                preexec_fn=as_if_from_a_terminal)
        if sig == signal.SIGKILL:
            time.sleep(rng.uniform(1.5, 3.0))  # anywhere: start-up, reading, writing, renaming (a whole pass takes longer)
        else:
            before = parts()
            deadline = time.monotonic() + 30
            while not (parts() - before) and time.monotonic() < deadline and proc.poll() is None:
                time.sleep(0.005)  # Ctrl-C while an output is being written
            assert parts() - before, "no output was being written when Ctrl-C came"
        os.killpg(proc.pid, sig)
        _, err = proc.communicate(timeout=60)
        if sig == signal.SIGINT:
            assert proc.returncode == 130 and b"interrupted" in err, err.decode()[-2000:]
            assert b"rerun the same command" in err and (out / batch.REPORT_NAME).is_file()  # what is finished is said
            assert parts() <= before, "Ctrl-C left a temporary file: " + err.decode()[-3000:]
        for p in out.rglob("*.wav"):
            if p.name.startswith("."):
                continue  # a temporary file a SIGKILL left; never an output name
            y, sr = sf.read(p, dtype="int16")  # every output present is a whole, readable file
            rel = str(p.relative_to(out))
            if rel in expected:
                assert y.tobytes() == expected[rel], rel
            else:
                assert rel in long_ref and sr == 16000 and y.size == 2 * long_s * 8000, rel
    res = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True, timeout=300)
    assert res.returncode == 1 and "failed 1" in res.stdout, res.stdout + res.stderr  # the broken file
    assert not list(out.rglob(".*.part.*"))  # the rerun removed what the kills left
    for rel, data in expected.items():
        assert sf.read(out / rel, dtype="int16")[0].tobytes() == data


def test_dask_cluster_gives_the_same_outputs(tree, tmp_path):
    distributed = pytest.importorskip("distributed")
    local = tmp_path / "local"
    assert _run("extend", tree, local, "--method", "codebook", "--jobs", "1").exit_code == 1
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        res = _run("extend", tree, tmp_path / "dask", "--method", "codebook", "--scheduler", cluster.scheduler_address)
    assert res.exit_code == 1 and "done 4, skipped 0 (output exists), failed 1" in res.stdout, res.output
    assert "scheduler tcp://" in res.stderr
    for d in GOOD.values():
        assert (tmp_path / "dask" / d).read_bytes() == (local / d).read_bytes()
    res = _run("extend", tree, tmp_path / "x", "--scheduler", "tcp://127.0.0.1:9")
    assert res.exit_code == 2 and "cannot reach the dask scheduler" in res.stderr


@pytest.mark.parametrize("address", ["nonsense", "tcp://host-without-port", "10.0.0.5:port"])
def test_a_malformed_scheduler_address_is_refused_before_dask_sees_it(tmp_path, address):
    import subprocess
    import sys

    (tmp_path / "calls").mkdir()
    sf.write(tmp_path / "calls" / "a.wav", 0.1 * np.sin(np.arange(8000) * 0.3), 8000)
    # a real process: the hang this prevents came at interpreter exit (a half-made client closing for 20 s)
    res = subprocess.run([sys.executable, "-m", "nenv", "extend", tmp_path / "calls", tmp_path / "out", "--method", "imaging", "--scheduler", address], capture_output=True, text=True, timeout=120)
    assert res.returncode == 2 and "must look like tcp://HOST:PORT" in res.stderr and "Traceback" not in res.stderr


def test_streamed_file_equals_offline_pipeline(tmp_path):
    """extend_file (blocks through the streaming engine) == pipeline.extend on the whole signal, in int16."""
    x = _telephone(1, 23.37)
    src = tmp_path / "x.wav"
    sf.write(src, x, 8000, subtype="FLOAT")
    streamfile.extend_file(src, tmp_path / "y.wav", streamfile.Options(method="neural"))
    offline = pipeline.extend(x, system=pipeline.make_system("neural"))
    assert sf.read(tmp_path / "y.wav", dtype="int16")[0].tobytes() == audio.to_int16(offline.y).tobytes()


def test_a_file_result_reports_its_length_and_progress_to_the_last_sample(tmp_path):
    x = _telephone(1, 12.5)  # more than one block of BLOCK_S seconds
    src = tmp_path / "x.wav"
    sf.write(src, x, 8000, subtype="FLOAT")
    seen = []
    res = streamfile.extend_file(src, tmp_path / "y.wav", streamfile.Options(method="imaging"), on_progress=lambda done, total: seen.append((done, total)))
    assert res.seconds == x.size / 8000 and 0 < res.wall_s < 600 and seen[-1] == (x.size, x.size) and len(seen) == 2
    assert [d for d, _ in seen] == [int(streamfile.BLOCK_S * 8000), x.size]
    assert res.notes == []  # speech at 8 kHz: nothing to note (no silence, no resampling, no trim)


def test_the_batch_api_skips_what_is_done_unless_told_and_tells_of_every_file(tree, tmp_path):
    """``batch.run`` as a program embeds it: finished outputs are skipped by default, and every
    file, skipped or not, reaches ``on_result``; temporaries a killed run left (outputs, record
    parts) are removed before the batch starts."""
    out = tmp_path / "wide"
    jobs = batch.plan([tree / "north"], out)
    opts = streamfile.Options(method="imaging")
    assert [r.status for r in batch.run(jobs, opts, workers=1).results] == ["done", "done"]
    told = []
    again = batch.run(jobs, opts, workers=1, on_result=told.append)
    assert [r.status for r in again.results] == ["skipped", "skipped"] and told == again.results
    assert [r.status for r in batch.run(jobs, opts, workers=1).results] == ["skipped", "skipped"]  # nobody to tell
    rec = tmp_path / "guard.jsonl"
    stale = [tmp_path / ".guard.jsonl.4242.part", jobs[0].dst.parent / f".{jobs[0].dst.name}.x1y2.part.wav"]
    for p in stale:
        p.write_bytes(b"left by a killed run")
    redone = batch.run(jobs, streamfile.Options(method="neural"), workers=1, overwrite=True, record=str(rec), on_result=told.append)
    assert [r.status for r in redone.results] == ["done", "done"] and told[-2:] == redone.results
    assert not any(p.exists() for p in stale) and rec.is_file()
    # options that cannot work stop the batch before its first file, not once per file
    fresh = batch.plan([tree / "north"], tmp_path / "fresh")
    for bad, message in ((streamfile.Options(model=str(tmp_path / "nomodel")), "does not exist"),
                         (streamfile.Options(method="oracle"), "needs a reference per file"),
                         (streamfile.Options(method="nonsense"), "--method nonsense is not known")):
        told.clear()
        with pytest.raises(NenvError, match=message):
            batch.run(fresh, bad, workers=1, on_result=told.append)
        assert told == [] and not (tmp_path / "fresh").exists()


def test_the_oracle_takes_its_reference_at_the_inputs_level(tmp_path):
    """The oracle's reference is scaled so that its own telephone band has the narrowband input's power:
    an input 6 dB under the reference's telephone version gives the reference at half its amplitude."""
    from nenv.errors import InputError
    from nenv.report.evaluate import prepare_reference

    ref = prepare_reference(ARCTIC[0])
    x = 0.5 * channel.telephone(ref, sr=16000, level_dbov=None)
    np.testing.assert_allclose(streamfile._oracle_reference(ARCTIC[0], x), 0.5 * ref, rtol=1e-12, atol=1e-15)
    quiet = tmp_path / "quiet.wav"  # a reference recorded 60 dB quieter, an input 80 dB quieter: only the input's level counts
    sf.write(quiet, 1e-3 * ref, 16000, subtype="DOUBLE")
    np.testing.assert_allclose(streamfile._oracle_reference(quiet, 1e-4 * x), 0.5e-4 * ref, rtol=1e-9, atol=1e-18)
    src = tmp_path / "x.wav"
    sf.write(src, x, 8000, subtype="FLOAT")
    with pytest.raises(InputError, match="needs --reference"):
        streamfile.extend_file(src, tmp_path / "y.wav", streamfile.Options(method="oracle"))
    with pytest.raises(InputError, match="oracle and true-band only"):
        streamfile.extend_file(src, tmp_path / "y.wav", streamfile.Options(method="imaging"), reference=ARCTIC[0])
    res = streamfile.extend_file(src, tmp_path / "y.wav", streamfile.Options(method="oracle"), reference=ARCTIC[0])
    assert res.seconds == x.size / 8000 and (tmp_path / "y.wav").exists()
    # read whole (the reference is aligned to the whole input), then fed in blocks: the offline extension,
    # every block of it (the blocks once came from a generator over a name the loop rebound, so a file
    # longer than one block gave only its first block)
    for method in ("oracle", "true-band"):
        offline = pipeline.extend(x, system=pipeline.make_system(method, reference=streamfile._oracle_reference(ARCTIC[0], x))).y
        for block_s in (streamfile.BLOCK_S, 0.7):
            with pytest.MonkeyPatch.context() as m:
                m.setattr(streamfile, "BLOCK_S", block_s)
                streamfile.extend_file(src, tmp_path / "y.wav", streamfile.Options(method=method), reference=ARCTIC[0])
            y = sf.read(tmp_path / "y.wav", dtype="int16")[0]
            assert y.size == 2 * x.size and y.tobytes() == audio.to_int16(offline).tobytes(), (method, block_s)


def test_a_reference_that_is_not_the_inputs_original_is_refused():
    """The oracle scales its reference to the input's level whatever the two hold, and true-band adds the
    reference's own band: both need the wideband original the input was made from, sample-aligned. The
    check is the telephone bands' correlation at lag 0 (at least lineup.MIN_CORRELATION, our rule): the
    input through G.711 (either law) or with noise at 10 dB SNR passes; another sentence, a shifted input
    (the message gives the shift) or an inverted one is refused (through the command: tests/test_bad_input.py, F17)."""
    from nenv.report.evaluate import prepare_reference

    ref = prepare_reference(ARCTIC[0])
    for law, snr in (("mulaw", None), ("alaw", None), ("mulaw", 10.0)):
        x = channel.telephone(ref, sr=16000, law=law, snr_db=snr)
        assert streamfile._oracle_reference(ARCTIC[0], x).size == ref.size
    x = channel.telephone(ref, sr=16000, law="mulaw")
    other = channel.telephone(prepare_reference(ARCTIC[1]), sr=16000, law="mulaw")
    cases = [
        (other, "is not the original of this input: its telephone band and the input correlate at most 0.0"),
        (np.concatenate([np.zeros(100), x[:-100]]), r"the input is 12\.5 ms behind the reference \(telephone-band correlation 1\.00 there"),
        (np.concatenate([x[40:], np.zeros(40)]), r"the input is 5\.0 ms ahead of the reference"),
        (-x, r"polarity inverted \(correlation -1\.00\)"),
    ]
    for bad, message in cases:
        with pytest.raises(InputError, match=message):
            streamfile._oracle_reference(ARCTIC[0], bad)
    assert streamfile._oracle_reference(ARCTIC[0], np.zeros_like(x)).size == ref.size  # silence in, silence out


def test_one_file_is_never_extended_over_itself_and_its_options_cannot_change_under_it(tmp_path):
    """``extend_file`` refuses an output that is its input or its reference (the input would be gone)
    before anything is written; its options are frozen, so one Options (the default argument, or one
    sent to every worker) cannot be changed by a caller between files."""
    import dataclasses

    src = tmp_path / "x.wav"
    sf.write(src, _telephone(0, 1.0), 8000, subtype="PCM_16")
    before = src.read_bytes()
    with pytest.raises(OutputError, match="the output .* is the same file as the input"):
        streamfile.extend_file(src, src, streamfile.Options(method="imaging"))
    with pytest.raises(OutputError, match="the output .* is the same file as the reference"):
        streamfile.extend_file(src, tmp_path / "ref.wav", streamfile.Options(method="oracle"), reference=tmp_path / "ref.wav")
    assert src.read_bytes() == before and not (tmp_path / "ref.wav").exists()
    with pytest.raises(dataclasses.FrozenInstanceError):
        streamfile.Options().method = "imaging"


def test_a_batch_record_is_never_one_of_its_inputs(tmp_path):
    """A list of files may name anything, even the record the batch is told to append to: refused
    before any work, as every command refuses to write over a file it reads."""
    rec = tmp_path / "guard.jsonl"
    jobs = [batch.Job(src=tmp_path / "a.wav", dst=tmp_path / "o" / "a.wav", index=0), batch.Job(src=rec, dst=tmp_path / "o" / "guard.wav", index=1)]
    assert batch.check_record(tmp_path / "other.jsonl", jobs) == str(tmp_path / "other.jsonl")
    with pytest.raises(OutputError, match="the record '.*guard.jsonl' is the same file as an input"):
        batch.check_record(rec, jobs)


def test_a_resampled_file_has_exactly_its_rounded_length_when_the_resampler_gives_one_more(tmp_path):
    """``--resample`` of 44101 samples at 16 kHz: 22050.5 samples at 8 kHz, which Python's round takes
    to 22050 and soxr's stream to 22051. The input is cut at round(n * 8000 / sr) samples, as
    ``audio.resample`` does, so the output is exactly twice that and equals the one-shot route."""
    import soxr

    x = 0.1 * np.random.default_rng(1).standard_normal(44101)
    src = tmp_path / "in.wav"
    sf.write(src, x, 16000, subtype="FLOAT")
    x = sf.read(src)[0]
    n_out = round(x.size * 8000 / 16000)
    assert n_out == 22050 and soxr.resample(x, 16000, 8000, quality="HQ").size >= n_out
    res = streamfile.extend_file(src, tmp_path / "out.wav", streamfile.Options(method="unextended", resample=True))
    got = sf.read(tmp_path / "out.wav", dtype="int16")[0]
    assert res.seconds == n_out / 8000 and got.size == 2 * n_out
    nb = audio.resample(x, orig_sr=16000, target_sr=8000)
    assert np.array_equal(got, audio.to_int16(pipeline.extend(nb, system=pipeline.make_system("unextended")).y))
