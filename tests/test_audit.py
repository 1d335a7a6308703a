"""Guard records on disk and the audit that reads them."""

from __future__ import annotations

import json

import numpy as np
import pytest
import soundfile as sf
from typer.testing import CliRunner

from nenv.chain import checkpoint
from nenv.report import audit, records
from nenv.report.audit import rerun, table
from nenv.cli import app
from nenv.errors import InputError
from tests.conftest import ARCTIC, perturb_predictions

pytestmark = pytest.mark.skipif(checkpoint.default_path() is None, reason="no default model")
runner = CliRunner()


@pytest.fixture(scope="module")
def record_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("rec")
    nb = d / "call.wav"
    assert runner.invoke(app, ["degrade", str(ARCTIC[1]), str(nb), "--law", "alaw"]).exit_code == 0
    t = np.arange(16000) / 8000
    sf.write(d / "tone.wav", 0.2 * np.sin(2 * np.pi * 1000 * t), 8000)  # unlike any speech: trips the novelty check
    rec = d / "guard.jsonl"
    for src, grp in ((nb, "female"), (d / "tone.wav", "test-tones")):
        res = runner.invoke(app, ["extend", str(src), str(d / f"{src.stem}-wb.wav"), "--record", str(rec), "--group", grp])
        assert res.exit_code == 0, res.output
    return rec


def test_records_are_self_describing_and_complete(record_file):
    lines = [json.loads(l) for l in record_file.read_text().splitlines()]
    heads = [l for l in lines if l["type"] == "header"]
    assert len(heads) == 2 and heads[0]["schema"] == records.SCHEMA and heads[0]["version"] == records.VERSION
    assert len(heads[0]["x_names"]) == checkpoint.load(checkpoint.default_path()).features.input_dim
    rec = records.read([record_file])
    rows = {r.source.split("/")[-1]: r for r in table(rec)}
    tone = rows["tone.wav"]
    assert tone.hops == 200 and tone.rejected > 180 and tone.group == "test-tones"
    # the summaries' counts equal the reject lines written for each source
    for r in table(rec):
        assert r.rejected == sum(1 for x in rec.rejects if x["source"] == r.source)
    reasons = {name for x in rec.rejects if x["source"].endswith("tone.wav") for name in x["reasons"]}
    assert "novel" in reasons  # (every check is tripped on purpose in tests/test_guard_spectra.py)
    one = next(x for x in rec.rejects if x["source"].endswith("tone.wav"))
    assert one["fallback"]["kind"] == "codebook" and one["limits"]["level_max_db"] == heads[0]["limits"]["level_max_db"]


def test_a_truncated_record_still_loads(record_file, tmp_path):
    data = record_file.read_bytes()
    cut = tmp_path / "cut.jsonl"
    cut.write_bytes(data[: len(data) - 37])  # killed mid-line
    rec = records.read([cut])
    assert rec.skipped_lines == 1
    assert len(rec.rejects) + len(rec.summaries) >= sum(1 for l in data.splitlines() if b'"type":"reject"' in l or b'"type":"summary"' in l) - 1


def test_rerun_with_the_same_model_reproduces_every_verdict(record_file):
    rec = records.read([record_file])
    again = rerun(rec, checkpoint.load(checkpoint.default_path()))
    assert len(again) == len(rec.rejects)
    assert all(sorted(r["new"]) == sorted(r["old"]) for r in again)


def test_audit_command_writes_report(record_file, tmp_path):
    res = runner.invoke(app, ["audit", str(record_file), "--out", str(tmp_path / "a"), "--model", str(checkpoint.default_path())])
    assert res.exit_code == 0, res.output
    page = (tmp_path / "a" / "audit.html").read_text()
    assert page.count("data:image/png;base64,") == 3 and "tone.wav" in page and "test-tones" in page
    assert "0 of" in res.stdout  # re-run line: the same model fixes none
    rows = (tmp_path / "a" / "by_source.csv").read_text().splitlines()
    assert len(rows) == 3


def test_report_figures_draw_runs_not_hops(record_file, monkeypatch):
    """A long call with thousands of rejected hops is drawn with a few artists, not one per hop
    (12,000 rejected hops took 65 s and 800 MB before; the structure, not the time, is checked here)."""
    import matplotlib.axes

    from nenv.report import audit

    rec = records.read([record_file])
    tone = [r for r in rec.rejects if r["source"].endswith("tone.wav")]
    assert len(tone) > 50
    # the tone's rejected hops again at later times, each copy right after the last: one long run, as a
    # long call would give (the copies are spaced by the span of the rejected hops, whichever they are)
    times = sorted(r["t"] for r in tone)
    assert np.allclose(np.diff(times), 0.01)  # one unbroken run of rejected hops
    span = times[-1] - times[0] + 0.01
    rec.rejects.extend({**r, "t": r["t"] + span * k} for k in range(1, 40) for r in tone)
    calls = {"scatter": 0, "broken_barh": 0, "axvspan": 0}
    for name in calls:
        original = getattr(matplotlib.axes.Axes, name)

        def counted(self, *a, _name=name, _original=original, **kw):
            calls[_name] += 1
            return _original(self, *a, **kw)

        monkeypatch.setattr(matplotlib.axes.Axes, name, counted)
    figs = audit.figures(rec, table(rec))
    assert set(figs) == {"timeline", "values", "worst"}
    n_reasons = len(audit.CHECKS) + 1
    assert calls["scatter"] <= 2 * n_reasons + len(audit.CHECKS)  # per source and first reason, plus the legend's
    assert calls["broken_barh"] <= 2 and calls["axvspan"] == 0  # one bar set per drawn source
    assert audit.segments([r["t"] for r in rec.rejects if r["source"] == tone[0]["source"]], hop_s=0.01, join_s=0.005, pad_s=0.0)[0][1] > 40


def test_not_a_record_is_refused(tmp_path):
    p = tmp_path / "x.jsonl"
    p.write_text('{"type": "header", "schema": "something-else", "version": 1}\n')
    with pytest.raises(InputError, match="not a nenv guard record"):
        records.read([p])
    p.write_text("hello\n")
    with pytest.raises(InputError, match="no nenv record header"):
        records.read([p])


def test_segments_merge_and_pad():
    from nenv.report.audit import segments

    spans = segments([1.00, 1.01, 1.02, 1.50, 3.00], pad_s=0.1)
    assert [(round(a, 2), round(b, 2)) for a, b in spans] == [(0.9, 1.13), (1.4, 1.61), (2.9, 3.11)]


def test_manifest_lists_the_worst_sources_and_trains_from_it(record_file, tmp_path):
    import csv

    res = runner.invoke(app, ["audit", str(record_file), "--out", str(tmp_path / "a"), "--manifest", str(tmp_path / "m.csv"), "--top", "1"])
    assert res.exit_code == 0, res.output
    rows = list(csv.DictReader(open(tmp_path / "m.csv")))
    assert len(rows) == 1 and rows[0]["path"].endswith("tone.wav") and rows[0]["speaker"] == "test-tones"
    assert rows[0]["main_reason"] in ("level", "novel") and rows[0]["segments"].startswith("0.00-")
    from nenv.train import corpus

    found = corpus.scan(tmp_path, manifest=str(tmp_path / "m.csv"))  # the trainer reads it as is
    assert [f.speaker for f in found] == ["test-tones"]


def test_report_renders_in_a_headless_browser(record_file, tmp_path):
    # Debian's chromium, as a reader would open the page; the figures must be drawn (not broken images).
    import shutil
    import subprocess

    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("chromium is not installed (apt-get install chromium)")
    assert runner.invoke(app, ["audit", str(record_file), "--out", str(tmp_path / "a")]).exit_code == 0
    shot = tmp_path / "shot.png"
    cmd = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1300,2400",
           f"--screenshot={shot}", (tmp_path / "a" / "audit.html").as_uri()]
    subprocess.run(cmd, capture_output=True, timeout=120)
    import matplotlib.image as mpimg

    img = mpimg.imread(shot)[:, :, :3]
    assert img.shape[0] == 2400
    dark = np.mean(img.mean(axis=2) < 0.5)  # spectrograms and plots are largely dark; a text-only page is not
    assert dark > 0.05


def test_each_check_tripped_lands_in_the_record_with_its_reason(tmp_path, monkeypatch, arctic_refs):
    # A model made to fail on chosen hops (as in test_train, but with the default model and on disk).
    from nenv.dsp import channel
    from nenv.chain import pipeline
    from nenv.chain.guard import Check

    ck = checkpoint.load(checkpoint.default_path())
    _, ref = arctic_refs[0]
    x = channel.telephone(ref, sr=16000)
    blocks = {Check.NONFINITE: range(40, 45), Check.LEVEL: range(80, 85), Check.UNSTABLE: range(120, 125), Check.MISMATCH: range(160, 165)}
    perturb_predictions(ck, blocks, monkeypatch)
    from nenv.serve.streamfile import watch

    system = pipeline.make_system("neural", model=ck)
    n_hops = -(-x.size // 80)
    tally, writer = watch(system, tmp_path / "r.jsonl", source="perturbed", group="lab", n_hops=n_hops)
    pipeline.extend(x, system=system)
    writer.summary(source="perturbed", group="lab", tally=tally, seconds=x.size / 8000)
    writer.close()
    assert tally.hops == n_hops and tally.rejected == sum(len(h) for h in blocks.values())
    rec = records.read([tmp_path / "r.jsonl"])
    by_hop = {r["hop"]: r for r in rec.rejects}
    for check, hops in blocks.items():
        for h in hops:
            assert check.name.lower() in by_hop[h]["reasons"], (check, h, by_hop.get(h))
            assert by_hop[h]["t"] == pytest.approx(h * 0.010)  # hop h starts h x 10 ms into the input
    assert rec.summaries[0]["rejected"] == len(rec.rejects)
    assert rec.summaries[0]["by_reason"][Check.LEVEL.name.lower()] >= 5


def test_a_killed_stream_leaves_a_readable_record(tmp_path):
    import signal
    import subprocess
    import sys
    import time

    from nenv.media.audio import to_int16

    t = np.arange(8000 * 20) / 8000
    tone = to_int16(0.2 * np.sin(2 * np.pi * 1000 * t)).astype("<i2").tobytes()  # every hop is rejected
    rec_path = tmp_path / "live.jsonl"
    p = subprocess.Popen([sys.executable, "-m", "nenv", "stream", "--record", str(rec_path), "--call-id", "call-7"],
                         stdin=subprocess.PIPE, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    p.stdin.write(tone)
    p.stdin.flush()
    deadline = time.time() + 120
    while time.time() < deadline and (not rec_path.exists() or rec_path.read_bytes().count(b'"reject"') < 50):
        time.sleep(0.2)
    p.send_signal(signal.SIGKILL)  # no chance to finish a line or write the summary
    p.wait(timeout=30)
    rec = records.read([rec_path])
    assert len(rec.headers) == 1 and len(rec.rejects) >= 50 and rec.skipped_lines <= 1
    assert rec.summaries == []  # killed before the end of the call
    rows = table(rec)
    assert rows[0].source == "call-7" and rows[0].rejected == len(rec.rejects)


def test_silence_with_a_click(tmp_path):
    # Digital silence is never judged (nothing is added there). With the shipped model the click's own
    # hops pass every check (measured: novelty up to 1.06 against a limit of 1.16): a click is broadband
    # in a wideband world too. So the record holds no rejection at all, and says so in its summary.
    y = np.zeros(16000)
    y[8000] = 0.9
    sf.write(tmp_path / "click.wav", y, 8000, subtype="FLOAT")
    res = runner.invoke(app, ["extend", str(tmp_path / "click.wav"), str(tmp_path / "o.wav"), "--record", str(tmp_path / "r.jsonl")])
    assert res.exit_code == 0, res.output
    rec = records.read([tmp_path / "r.jsonl"])
    assert all(100 <= r["hop"] <= 104 for r in rec.rejects)  # never in the silence around the click
    assert rec.summaries[0]["hops"] == 200 and rec.summaries[0]["rejected"] == len(rec.rejects)
    out, _ = sf.read(tmp_path / "o.wav")
    assert np.all(np.abs(out[:15000]) < 1e-3)  # silence stays silent up to the click (sample 16000 at 16 kHz)


def test_sources_are_listed_worst_first_and_totals_add_up():
    rec = records.Records(
        summaries=[
            {"source": "b", "group": "g1", "hops": 20, "rejected": 10, "by_reason": {"level": 3, "novel": 7}},
            {"source": "c", "group": "g2", "hops": 400, "rejected": 50, "by_reason": {"level": 4}},
            {"source": "a", "group": "g1", "hops": 100, "rejected": 0, "by_reason": {}},
        ],
        rejects=[{"source": "killed", "group": "g2", "hop": 5, "reasons": ["level", "mismatch"]}],
    )
    rows = audit.table(rec)
    # highest rejection rate first; a source whose session died before its summary (hops unknown) and
    # the sources with none rejected after, by name
    assert [r.source for r in rows] == ["b", "c", "a", "killed"]  # 10 of 20 hops is worse than 50 of 400
    assert (rows[0].rate, rows[1].rate, rows[2].rate) == (0.5, 0.125, 0.0) and np.isnan(rows[3].rate)
    assert rows[3].hops == 0 and rows[3].rejected == 1 and rows[3].by_reason == {"level": 1, "mismatch": 1}
    (total,) = audit.totals(rows)
    assert (total.hops, total.rejected) == (520, 61) and total.by_reason == {"level": 8, "novel": 7, "mismatch": 1}
    by_group = {t.source: t for t in audit.totals(rows, key=lambda r: r.group)}
    assert by_group["g1"].rejected == 10 and by_group["g2"].by_reason == {"level": 5, "mismatch": 1}


def test_rejected_hops_are_merged_into_listening_spans():
    # hops closer than join_s (0.1 s) after the previous span's end join it; each span is padded by
    # pad_s (0.2 s) on both sides, never before 0
    np.testing.assert_allclose(audit.segments([1.0, 1.01, 1.15, 1.2]), [(0.8, 1.22), (0.95, 1.41)], atol=1e-12)
    np.testing.assert_allclose(audit.segments([0.05, 0.06]), [(0.0, 0.27)], atol=1e-12)
    assert audit.segments([]) == []


def _limited_files(max_bytes: int):
    """preexec_fn: the child may not grow any file beyond ``max_bytes`` (writes then fail with EFBIG,
    as on a full disk; Python ignores the SIGXFSZ that comes with it)."""
    import resource

    return lambda: resource.setrlimit(resource.RLIMIT_FSIZE, (max_bytes, max_bytes))


def test_a_record_that_cannot_be_written_stops_recording_not_the_call(tmp_path):
    """A live call whose guard record hits a full disk (here a file-size limit) keeps its audio whole;
    recording stops at the first failed line, the process says so at once and at the end (exit
    status 2), and the record holds every whole line written before, with the lost ones counted."""
    import re
    import subprocess
    import sys

    from nenv.media.audio import to_int16

    t = np.arange(8000 * 2) / 8000
    tone = to_int16(0.2 * np.sin(2 * np.pi * 1000 * t)).astype("<i2").tobytes()  # nearly every one of 200 hops is rejected
    rec_path = tmp_path / "live.jsonl"
    r = subprocess.run([sys.executable, "-m", "nenv", "stream", "--record", str(rec_path), "--call-id", "call-9"], input=tone,
                       capture_output=True, preexec_fn=_limited_files(20000), timeout=300)
    err = r.stderr.decode()
    assert len(r.stdout) == 2 * len(tone)  # the call's audio, all of it
    assert r.returncode == 2 and err.count("recording stopped, the audio goes on") == 1, err
    lost = int(re.search(r"incomplete: (\d+) lines? not written \(File too large\)", err).group(1))
    rec = records.read([rec_path])
    assert len(rec.headers) == 1 and rec.summaries == [] and rec.skipped_lines <= 1 and len(rec.rejects) >= 5
    rejected = int(re.search(r"guard: (\d+) of 200 hops", err).group(1))  # the call's own count, printed at its end
    assert rejected > 150 and len(rec.rejects) + lost == rejected + 1  # every reject line and the summary: written whole, or counted lost
