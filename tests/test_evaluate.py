"""``nenv.report.evaluate``'s own rules, worked on small cases: how a reference is read, when the
references are scored in worker processes, what is reported as each is scored, how often a worker
reads the model folder, and the Markdown table's layout.

The scores themselves are checked in test_measures.py, the tables' means and groups in
test_heldout.py, the trim of the model systems' band in test_band_trim.py.
"""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest
import soundfile as sf

from nenv.errors import InputError
from nenv.report import evaluate
from tests.conftest import ARCTIC, run_bounded

SYSTEMS = ("unextended", "true-band")  # true-band can add a low band: it shows whether one was asked for


def _cut(tmp_path, src, seconds: float):
    """The first ``seconds`` of ``src`` as a 16 kHz float file (quick to score, long enough for ViSQOL)."""
    y, sr = sf.read(src)
    out = tmp_path / src.name
    sf.write(out, y[: int(seconds * sr)], sr, subtype="FLOAT")
    return out


def test_a_reference_keeps_an_even_length_and_its_first_samples(tmp_path):
    """Every output is twice its 8 kHz input's length, so an odd last sample of a reference is dropped
    before the level is set: the 16001-sample file reads as the 16000-sample file does, bit for bit."""
    y, sr = sf.read(ARCTIC[0])
    assert sr == 16000
    odd, even = tmp_path / "odd.wav", tmp_path / "even.wav"
    sf.write(odd, y[:16001], sr, subtype="FLOAT")
    sf.write(even, y[:16000], sr, subtype="FLOAT")
    a = evaluate.prepare_reference(odd)
    assert a.size == 16000
    assert np.array_equal(a, evaluate.prepare_reference(even))


def test_a_two_channel_reference_needs_a_choice(tmp_path):
    """As every command reads audio: a stereo reference is refused unless a channel is chosen or the
    channels are averaged; either choice reads as the mono file of that channel (or average) does."""
    y, sr = sf.read(ARCTIC[0])
    y = y[: 2 * sr]
    other = 0.5 * np.roll(y, 800)
    st = tmp_path / "stereo.wav"
    sf.write(st, np.stack([y, other], axis=1), sr, subtype="FLOAT")
    with pytest.raises(InputError, match="2 channels"):
        evaluate.prepare_reference(st)
    for kw, mono in (({"channel_index": 1}, other), ({"mix": True}, (y + other) / 2)):
        p = tmp_path / "mono.wav"
        sf.write(p, mono, sr, subtype="FLOAT")
        np.testing.assert_allclose(evaluate.prepare_reference(st, **kw), evaluate.prepare_reference(p), rtol=0, atol=1e-6)


def test_one_process_scores_everything_unless_workers_are_asked_for_and_there_is_more_than_one_reference(tmp_path, monkeypatch):
    """In this process (``workers`` 1, the default, or a single reference): no worker pool is started,
    ``on_step`` hears every system of every clip in the table's order, and no system adds a low band
    unless asked. The worker case is run in a child process (next test)."""
    from nenv.serve import parallel

    pools = []
    monkeypatch.setattr(parallel, "as_done", lambda *a, **kw: pools.append(kw) or iter(()))
    refs = [_cut(tmp_path, p, 2.0) for p in ARCTIC]
    heard: list[str] = []
    rows, clips = evaluate.run(refs, systems=SYSTEMS, laws=("mulaw",), on_step=heard.append)
    want = [f"{p.stem} / mulaw / {s}" for p in refs for s in SYSTEMS]
    assert heard == want
    assert [f"{r.clip} / {r.law} / {r.system}" for r in rows] == want
    assert [sorted(c.outputs) for c in clips] == [sorted(SYSTEMS)] * 2
    rows1, _ = evaluate.run(refs[:1], systems=SYSTEMS, laws=("mulaw",), workers=2)
    assert [r.system for r in rows1] == list(SYSTEMS)
    assert pools == []


# Runs evaluate.run with two workers on two references, watching the pool the module asks for.
_WORKERS = """
import json, sys
from nenv.report import evaluate
from nenv.serve import parallel
real, pools = parallel.as_done, []
def watched(fn, tasks, **kw):
    pools.append(kw)
    return real(fn, tasks, **kw)
parallel.as_done = watched
heard = []
rows, _ = evaluate.run(sys.argv[1:], systems=("unextended", "true-band"), laws=("mulaw",), workers=2, on_step=heard.append)
print(json.dumps({"pools": pools, "heard": heard, "csv": evaluate.to_csv(rows)}))
"""


def test_two_references_and_two_workers_share_the_work_out_and_report_every_row(tmp_path):
    """``workers=2`` with two references: one pool of two new interpreters (``fresh``: the perceptual
    measures' libraries cannot be forked once used), ``on_step`` hears each row as its reference is
    done, and the table is the one a single process writes, rows in the references' order. In a
    child process with a time limit: the failure this would show is a worker that never ends."""
    refs = [_cut(tmp_path, p, 2.0) for p in ARCTIC]
    res = run_bounded([sys.executable, "-c", _WORKERS, *map(str, refs)], timeout=240)
    assert res.returncode == 0, res.stderr[-3000:]
    got = json.loads(res.stdout.strip().splitlines()[-1])
    assert got["pools"] == [{"workers": 2, "fresh": True}]
    want = [f"{p.stem} / mulaw / {s}" for p in refs for s in SYSTEMS]
    assert sorted(got["heard"]) == sorted(want)
    rows, _ = evaluate.run(refs, systems=SYSTEMS, laws=("mulaw",))
    assert got["csv"] == evaluate.to_csv(rows)


def test_a_worker_reads_the_model_folder_once_however_many_references_it_scores(monkeypatch, arctic_refs):
    """A worker gets the model's folder (a loaded model does not travel between processes) and keeps
    what it read: two references, one reading; a loaded model is used as given."""
    from nenv.chain import checkpoint, pipeline

    folder = str(checkpoint.default_path())
    reads = []
    real = pipeline.load_model
    monkeypatch.setattr(pipeline, "load_model", lambda model=None, **kw: reads.append(model) or real(model, **kw))
    monkeypatch.setattr(evaluate, "_models", {})
    args = (("codebook",), ("mulaw",), pipeline.DEFAULT_EXCITATION)
    for name, ref in arctic_refs:
        rows, _ = evaluate.score_reference(name, ref[: 2 * 16000], *args, folder, False)
        assert [r.system for r in rows] == ["codebook"]
    assert reads == [folder]
    model = evaluate._models[folder]
    assert isinstance(model, checkpoint.Checkpoint)
    evaluate.score_reference("x", arctic_refs[0][1][: 2 * 16000], *args, model, False)
    assert reads == [folder]


def test_the_markdown_table_right_aligns_every_measure_and_bolds_the_means():
    """The Markdown table: clip, channel and system left-aligned, one right-aligned column per
    measure (GitHub's table syntax: ``---:``), values to two decimals, mean rows in bold."""
    from dataclasses import fields

    from nenv.report.measures import Scores

    n = len(fields(Scores))
    sc = Scores(**{f.name: 1.0 + i / 1000 for i, f in enumerate(fields(Scores))})
    md = evaluate.to_markdown([evaluate.Row("a0007", "mulaw", "neural", sc), evaluate.Row("mean female", "mulaw", "neural", sc)])
    head, rule, one, mean = md.splitlines()
    assert head.startswith("| clip | channel | system | LSD 3.4-8k [dB] |") and head.count("|") == n + 4
    assert rule == "|---|---|---|" + "|".join(["---:"] * n) + "|"
    assert one == "| a0007 | mulaw | neural | " + " | ".join(f"{1.0 + i / 1000:.2f}" for i in range(n)) + " |"
    assert mean.startswith("| **mean female** | mulaw | neural |")
    assert md.endswith("\n")
