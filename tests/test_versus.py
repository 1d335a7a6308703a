"""Systems head to head on the same clips (nenv.report.versus), in ``evaluate`` and ``measures``."""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
from scipy import stats

from nenv.report import versus
from nenv.report.measures import Scores


def _scores(visqol: float, pesq: float, lsd: float) -> Scores:
    nan = math.nan
    return Scores(lsd_high=lsd, lsd_full=nan, lsd_env_high=nan, lsd_env_full=nan, level_error_high=nan, lsd_low=nan, level_error_low=nan, pesq_wb=pesq, visqol=visqol)


def _items():
    """Five clips (three male, two female); system "x" beats "unextended" on ViSQOL on every clip, on
    WB-PESQ on none, has a lower (better) LSD on four, and WB-PESQ is blank for x on clip c4."""
    rng = np.random.default_rng(0)
    items = []
    for i in range(5):
        base = 3.0 + 0.1 * i
        items.append(("unextended", f"c{i}", _scores(base, 3.0, 15.0)))
        items.append(("x", f"c{i}", _scores(base + 0.2 + 0.05 * rng.standard_normal(), 2.5 if i != 4 else math.nan, 10.0 if i else 16.0)))
    return items


def test_wins_intervals_and_tests_match_independent_references():
    groups = {"c0": "male", "c1": "male", "c2": "male", "c3": "female", "c4": "female"}
    heads = versus.compare(_items(), [("x", "unextended")], groups)
    got = {(h.group, h.measure): h for h in heads}
    assert [g for g, m in got if m == "visqol"] == [None, "female", "male"]  # all clips first, then each group
    v = got[None, "visqol"]
    assert v.better == 5 and v.clips == 5
    # the 95% interval as scipy's paired t-test gives it (an independent path to the same statistic)
    by = {(s, c): sc for s, c, sc in _items()}
    a = [by["x", f"c{i}"].visqol for i in range(5)]
    b = [by["unextended", f"c{i}"].visqol for i in range(5)]
    ci = stats.ttest_rel(a, b).confidence_interval(0.95)
    assert (v.difference.low, v.difference.high) == pytest.approx((ci.low, ci.high), abs=1e-12)
    # Wilcoxon signed-rank, all 5 differences of one sign: exact two-sided p = 2 / 2**5 (textbook value)
    assert v.wilcoxon_p == pytest.approx(2 / 32)
    p = got[None, "pesq_wb"]
    assert p.better == 0 and p.clips == 4 and p.difference.mean == pytest.approx(-0.5)  # the blank clip is left out
    lsd = got[None, "lsd_high"]
    assert lsd.better == 4 and lsd.clips == 5  # lower is better for LSD
    assert got["female", "visqol"].clips == 2 and got["male", "lsd_high"].better == 2
    assert versus.summary(heads) == [f"x: ViSQOL above unextended on 5 of 5 clips (mean {np.mean(np.subtract(a, b)):+.2f})"]
    rows = list(csv.DictReader(versus.to_csv(heads).splitlines()))
    assert len(rows) == 3 * 3 and rows[0]["a_better"] == "5"
    md = versus.to_markdown(heads)
    assert md.count("\n") == 2 + 3 and "| x | unextended | all | 5 of 5 |" in md


def test_the_pairs_compared():
    systems = ["unextended", "imaging", "codebook", "neural", "neural +low band", "oracle", "true-band"]
    pairs = versus.pairs_to_compare(systems)
    assert pairs[:6] == [(s, "unextended") for s in systems[1:]]
    assert pairs[6:] == [("neural", "imaging"), ("neural", "codebook"), ("neural", "neural +low band"), ("neural +low band", "imaging"), ("neural +low band", "codebook")]
    assert versus.pairs_to_compare(["imaging", "neural"]) == [("neural", "imaging")]  # no baseline: only the default's
    assert versus.pairs_to_compare(["a.wav", "nb", "b"], baseline="nb", default=None) == [("a.wav", "nb"), ("b", "nb")]


def test_evaluate_and_measures_write_the_head_to_head(tmp_path):
    import soundfile as sf
    from typer.testing import CliRunner

    from nenv.cli import app
    from tests.conftest import ARCTIC

    run = CliRunner()
    res = run.invoke(app, ["evaluate", *map(str, ARCTIC), "--out", str(tmp_path / "ev"), "--method", "unextended", "--method", "imaging", "--method", "true-band"], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    rows = list(csv.DictReader(open(tmp_path / "ev" / "versus.csv")))
    assert {(r["a"], r["b"]) for r in rows} == {("imaging", "unextended"), ("true-band", "unextended")}
    tb = next(r for r in rows if r["a"] == "true-band" and r["measure"] == "visqol")
    assert tb["clips"] == "2" and tb["a_better"] == "2"  # the right band beats no band on both sentences
    assert "true-band: ViSQOL above unextended on 2 of 2 clips" in res.stderr
    assert "Head to head" in (tmp_path / "ev" / "table.md").read_text()
    assert (tmp_path / "ev" / "versus.png").read_bytes()[:4] == b"\x89PNG"
    # measures: the 8 kHz output is the unextended input, the other is compared with it
    from nenv.dsp import channel
    from nenv.report.evaluate import prepare_reference

    ref = prepare_reference(ARCTIC[0])
    nb = channel.telephone(ref, sr=16000, law="mulaw", level_dbov=None)
    for sub in ("nb", "tb"):
        (tmp_path / sub).mkdir()
    sf.write(tmp_path / "nb" / "a.wav", nb, 8000)
    sf.write(tmp_path / "tb" / "a.wav", ref, 16000)  # the reference itself: the best any output can be
    res = run.invoke(app, ["measures", str(tmp_path / "tb"), str(tmp_path / "nb"), "--reference", str(ARCTIC[0]), "--out", str(tmp_path / "m")], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    rows = list(csv.DictReader(open(tmp_path / "m" / "versus.csv")))
    assert {(r["a"], r["b"]) for r in rows} == {(str(tmp_path / "tb" / "a.wav"), str(tmp_path / "nb" / "a.wav"))}  # one reference file: each output file is named as itself
    assert next(r for r in rows if r["measure"] == "visqol")["a_better"] == "1"
    assert (tmp_path / "m" / "versus.png").read_bytes()[:4] == b"\x89PNG"
    # without an 8 kHz output there is nothing to call the baseline: no head-to-head
    res = run.invoke(app, ["measures", str(tmp_path / "tb"), "--reference", str(ARCTIC[0]), "--out", str(tmp_path / "m2")], catch_exceptions=False)
    assert res.exit_code == 0 and not (tmp_path / "m2" / "versus.csv").exists() and not (tmp_path / "m2" / "versus.png").exists()
    # ... unless one is named: here the unextended input upsampled to 16 kHz, as a gateway would pass it on
    from nenv.media import audio

    (tmp_path / "up").mkdir()
    sf.write(tmp_path / "up" / "a.wav", audio.resample(nb, orig_sr=8000, target_sr=16000), 16000)
    up = str(tmp_path / "up" / "a.wav")
    res = run.invoke(app, ["measures", str(tmp_path / "tb"), str(tmp_path / "up"), "--reference", str(ARCTIC[0]), "--out", str(tmp_path / "m3"), "--baseline", up], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    assert {(r["a"], r["b"]) for r in csv.DictReader(open(tmp_path / "m3" / "versus.csv"))} == {(str(tmp_path / "tb" / "a.wav"), up)}
    res = run.invoke(app, ["measures", str(tmp_path / "tb"), "--reference", str(ARCTIC[0]), "--baseline", up])
    assert res.exit_code == 2 and "is not one of the outputs scored" in res.stderr


def test_the_figure_draws_only_pairs_with_clips_on_both_sides(tmp_path):
    from nenv.report.figures import versus_grid

    items = _items()
    assert not versus_grid(items, [("x", "nobody")], tmp_path / "none.png") and not (tmp_path / "none.png").exists()
    assert versus_grid(items, [("x", "unextended"), ("x", "nobody")], tmp_path / "v.png", groups={"c0": "male"})
    assert (tmp_path / "v.png").stat().st_size > 10000
