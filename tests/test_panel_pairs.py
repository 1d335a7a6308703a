"""Pairs panels (comparison category rating, ITU-T P.800 Annex E): the analysis against a worked example,
the prepared pairs (balanced, blind, level-aligned), bad results refused, and the page driven in a real
browser with its results fed back to the analysis."""

from __future__ import annotations

import base64
import io
import json
import math
import shutil

import numpy as np
import pytest
import soundfile as sf
from scipy import stats

from nenv.dsp import channel
from nenv.errors import InputError
from nenv.report import ccr, panel
from tests.conftest import ARCTIC
from tests.test_panel import _browser, _collector, _open_in_chromium, _page_data

U, N, R = "unextended", "neural", "reference"


def _write(tmp_path, answers: dict[str, dict[tuple[str, str, str], int]]):
    """A pairs key and one results file per listener: answers[listener][(clip, first, second)] = score."""
    pairs = sorted({p for a in answers.values() for p in a})
    key = {"panel": "p2", "design": "ccr", "trials": {}, "pairs": {}, "stimuli": {}}
    ids = {}
    for i, (clip, first, second) in enumerate(pairs):
        ids[(clip, first, second)] = tid = f"t{i + 1}"
        key["trials"][tid] = clip
        key["pairs"][tid] = {"clip": clip, "first": first, "second": second}
    (tmp_path / "key.json").write_text(json.dumps(key))
    files = []
    for who, a in answers.items():
        f = tmp_path / f"{who}.json"
        f.write_text(json.dumps({"panel": "p2", "listener": who, "ratings": [{"trial": ids[p], "score": s, "seconds": 9.0} for p, s in a.items()]}))
        files.append(f)
    return files, tmp_path / "key.json"


def _listener(c0: tuple[int, int], c1: tuple[int, int], control: tuple[int, int]) -> dict:
    """Scores of (U, N) and (N, U) on clips c0 and c1, and of the controls (R, U) on c0 and (U, R) on c1."""
    return {("c0", U, N): c0[0], ("c0", N, U): c0[1], ("c1", U, N): c1[0], ("c1", N, U): c1[1], ("c0", R, U): control[0], ("c1", U, R): control[1]}


def test_pairs_analysis_reproduces_a_worked_example_and_screens_a_listener_who_hears_no_band(tmp_path):
    # Worked by hand. A score is the second's quality against the first's; against unextended it is
    # negated where the system came first. L1: c0 +2 and -(-1) -> unit 1.5; c1 +1 and -0 -> 0.5.
    # L2: c0 0 and +2 -> 1.0; c1 +1 and -1 -> 0.0. L3 rated the original worse (-1) and the same (0)
    # as unextended: better in 0 of 2 control pairs -> excluded (our rule: at least half).
    files, key = _write(tmp_path, {
        "L1": _listener((2, -1), (1, 0), (-2, 3)),
        "L2": _listener((0, -2), (1, 1), (-1, 2)),
        "L3": _listener((3, 3), (3, 3), (1, 0)),
    })
    a = ccr.analyse(ccr.read(files, key))
    assert a.listeners == ["L1", "L2"] and list(a.excluded) == ["L3"] and "0 of 2" in a.excluded["L3"]
    pref = {p.system: p for p in a.preferences}
    assert [p.system for p in a.preferences] == [R, N]  # the control first
    # units 1.5, 0.5, 1.0, 0.0: mean 0.75, s = sqrt(1.25 / 3) = 0.6455; t(0.975, 3 df) = 3.182 (t table)
    iv = pref[N].cmos
    assert iv.n == 4 and iv.mean == pytest.approx(0.75)
    assert iv.low == pytest.approx(0.75 - 3.182446 * math.sqrt(1.25 / 3) / 2, abs=1e-5)
    assert iv.low == pytest.approx(-0.277, abs=1e-3) and iv.high == pytest.approx(1.777, abs=1e-3)
    assert pref[N].t_p == pytest.approx(stats.ttest_1samp([1.5, 0.5, 1.0, 0.0], 0).pvalue)
    # Wilcoxon signed-rank on 1.5, 0.5, 1.0 (the zero dropped): all positive, exact two-sided p = 2 / 2**3
    assert pref[N].wilcoxon_p == pytest.approx(0.25)
    # order: neural second (U, N): 2, 1, 0, 1 -> 1.0; neural first (N, U), negated: 1, 0, 2, -1 -> 0.5
    assert pref[N].second == pytest.approx(1.0) and pref[N].first == pytest.approx(0.5)
    assert pref[N].per_clip["c0"].mean == pytest.approx(1.25) and pref[N].per_clip["c1"].mean == pytest.approx(0.25)
    # the control: L1 +2 (c0, negated) and +3; L2 +1 and +2 -> 2.0
    assert pref[R].cmos.mean == pytest.approx(2.0) and pref[R].cmos.n == 4
    md = ccr.to_markdown(a)
    assert "excluded L3" in md and "| neural | +0.75 [-0.28, +1.78] | 4 |" in md and "original (control)" in md
    assert "all,neural,0.75" in ccr.to_csv(a)
    # per speaker group: c0 female (units 1.5, 1.0 -> 1.25), c1 not in the table -> "(no group)" (0.5, 0.0 -> 0.25)
    g = {p.system: p for p in ccr.analyse(ccr.read(files, key), groups={"c0": "female"}).preferences}
    assert g[N].per_group["female"].mean == pytest.approx(1.25) and g[N].per_group["female"].n == 2
    assert g[N].per_group["(no group)"].mean == pytest.approx(0.25) and pref[N].per_group == {}
    assert "Per speaker group" in ccr.to_markdown(ccr.analyse(ccr.read(files, key), groups={"c0": "female"})) and "Per speaker group" not in md
    rows = ccr.ratings_csv(ccr.read(files, key)).splitlines()
    assert rows[0] == "listener,trial,clip,first,second,score,seconds" and len(rows) == 1 + 18


def test_pairs_screening_at_exactly_half_and_the_tests_at_their_edges(tmp_path):
    """Our screening rule keeps a listener who rated the original better in at least half of the control
    pairs: 2 of 4 kept, 1 of 4 excluded. The scale's ends (-3, +3) are ratings like any other."""
    def listener(control):  # four clips, each with (U, N), (N, U) and one control pair (R, U)
        out = {}
        for i, c in enumerate(control):
            out.update({(f"c{i}", U, N): 1, (f"c{i}", N, U): -1, (f"c{i}", R, U): -c})  # (R, U) negated: the original's score is c
        return out

    files, key = _write(tmp_path, {"half": listener([3, 1, 0, -3]), "quarter": listener([3, 0, 0, -1]), "all": listener([3, 3, 3, 3])})
    a = ccr.analyse(ccr.read(files, key))
    assert a.listeners == ["all", "half"] and list(a.excluded) == ["quarter"] and "1 of 4" in a.excluded["quarter"]
    neural = next(p for p in a.preferences if p.system == N)
    # every unit is (+1 - -1) / 2 = 1: the same value throughout, so the t-test's p is 0 (no spread),
    # Wilcoxon's exact p for eight positive units 2 / 2**8
    assert (neural.cmos.mean, neural.cmos.n, neural.t_p) == (1.0, 8, 0.0) and neural.wilcoxon_p == pytest.approx(2 / 2**8)
    # one unit: no interval, no tests; units of 0 throughout: both tests p = 1
    (tmp_path / "one").mkdir()
    files, key = _write(tmp_path / "one", {"L": {("c0", U, N): 2, ("c0", R, U): -3}})
    one = next(p for p in ccr.analyse(ccr.read(files, key)).preferences if p.system == N)
    assert one.cmos.n == 1 and math.isnan(one.t_p) and math.isnan(one.wilcoxon_p)
    (tmp_path / "zero").mkdir()
    files, key = _write(tmp_path / "zero", {"L": {("c0", U, N): 0, ("c1", U, N): 0, ("c0", R, U): -3}})
    zero = next(p for p in ccr.analyse(ccr.read(files, key)).preferences if p.system == N)
    assert (zero.cmos.n, zero.t_p, zero.wilcoxon_p) == (2, 1.0, 1.0)
    # a panel whose listeners were all excluded says so
    (tmp_path / "deaf").mkdir()
    files, key = _write(tmp_path / "deaf", {"L": {("c0", U, N): 1, ("c0", R, U): 3}})
    md = ccr.to_markdown(ccr.analyse(ccr.read(files, key)))
    assert "excluded L" in md and "nothing to report" in md


def test_only_a_pair_with_the_unextended_signal_on_one_side_is_a_rating_against_it():
    def rating(first, second, score):
        return ccr.PairRating("L", "t1", "c0", first, second, score, 1.0)

    assert rating(U, N, 2).against_anchor() == (N, 2) and rating(N, U, 2).against_anchor() == (N, -2)
    assert rating(U, U, 2).against_anchor() is None and rating(N, "codebook", 2).against_anchor() is None


def test_pairs_results_that_do_not_fit_the_key_are_refused(tmp_path):
    files, key = _write(tmp_path, {"A": _listener((1, -1), (0, 0), (-2, 2))})
    data = json.loads(files[0].read_text())
    for change, message in (
        (lambda d: d.update(panel="other"), "another panel"),
        (lambda d: d["ratings"][0].update(score=4), "not one of the steps"),
        (lambda d: d["ratings"][0].update(score=-4), "not one of the steps"),
        (lambda d: d["ratings"][0].update(score=1.5), "not one of the steps"),
        (lambda d: d["ratings"][0].update(trial="t99"), "not in the key"),
        (lambda d: d["ratings"].append(dict(d["ratings"][0])), "rated twice"),
        (lambda d: d["ratings"][0].update(score="much better"), "not a number"),
        (lambda d: d["ratings"][0].pop("score"), "not a number"),
        (lambda d: d.pop("listener"), "not a panel's results file"),
        (lambda d: d.update(ratings="all good"), "not a panel's results file"),
    ):
        bad = json.loads(json.dumps(data))
        change(bad)
        files[0].write_text(json.dumps(bad))
        with pytest.raises(InputError, match=message):
            ccr.read(files, key)
    # a key of the other design: its results cannot be read as pairs
    plain = {"panel": "p2", "trials": {"t1": "c0"}, "stimuli": {"x": {"clip": "c0", "system": U, "trial": "t1"}}}
    (tmp_path / "plain.json").write_text(json.dumps(plain))
    assert not ccr.is_pairs_key(tmp_path / "plain.json")
    with pytest.raises(InputError, match="not the key of a pairs panel"):
        ccr.read(files, tmp_path / "plain.json")
    # and pairs results read against that key (same panel id) are refused, not a traceback
    from nenv.report import verdicts

    files[0].write_text(json.dumps(data))
    with pytest.raises(InputError, match="other design"):
        verdicts.read(files, tmp_path / "plain.json")


def test_prepared_pairs_are_balanced_blind_and_level_aligned(tmp_path):
    third = tmp_path / "third.wav"
    shutil.copy(ARCTIC[0], third)
    key = panel.prepare([ARCTIC[0], ARCTIC[1], third], tmp_path / "p", systems=["imaging"], design="ccr")
    assert key["design"] == "ccr" and "P.800" in key["method"]
    names = ["arctic_a0007", "arctic_a0009", "third"]
    per_clip = {n: [(p["first"], p["second"]) for p in key["pairs"].values() if p["clip"] == n] for n in names}
    controls = []
    for n in names:  # the system against unextended in both orders, and one control pair with the original
        pairs = per_clip[n]
        assert sorted(pairs) == sorted([(U, "imaging"), ("imaging", U), next(p for p in pairs if R in p)]) and len(pairs) == 3
        controls.append(next(p for p in pairs if R in p))
    assert controls[0] == controls[2] != controls[1]  # the original's place alternates from clip to clip
    page = tmp_path / "p" / "page" / "index.html"
    html = page.read_text()
    for word in ("imaging", "unextended", "arctic"):
        assert word not in html.split("const DATA")[1]  # the page's data names no system and no clip
    data = _page_data(page)
    assert data["design"] == "ccr" and len(data["trials"]) == 9
    tokens = [t[place]["id"] for t in data["trials"] for place in ("first", "second")]
    assert len(set(tokens)) == 18  # a fresh token for every sample of every pair
    for t in data["trials"]:
        pair = key["pairs"][t["id"]]
        assert key["stimuli"][t["first"]["id"]]["system"] == pair["first"] and key["stimuli"][t["second"]["id"]]["system"] == pair["second"]
        levels = []
        for place in ("first", "second"):
            y, sr = sf.read(io.BytesIO(base64.b64decode(t[place]["audio"])))
            assert sr == 16000 and np.max(np.abs(y)) <= panel.PEAK + 1e-4
            levels.append(channel.active_level_dbov(y, sr=16000))
        assert abs(levels[0] - levels[1]) < 0.1
    with pytest.raises(InputError, match="design"):
        panel.prepare([ARCTIC[0]], tmp_path / "q", systems=["imaging"], design="abx")


def test_pairs_page_runs_in_a_real_browser_and_its_results_feed_the_analysis(tmp_path):
    """Headless chromium: a listener goes through the cautions, the level check and the practice; in
    every pair Next waits for both samples to be played and an answer; the answers saved and POSTed
    reach the analysis, each under the pair it was given to."""
    from playwright.sync_api import sync_playwright
    from typer.testing import CliRunner

    from nenv.cli import app

    browser = _browser(("chromium", "chromium-browser"), "playwright.sync_api", "apt-get install chromium; pip install playwright")
    posted = _collector()
    runner = CliRunner()
    res = runner.invoke(app, ["panel", str(ARCTIC[0]), str(ARCTIC[1]), "--out", str(tmp_path / "p"), "--method", "imaging", "--design", "ccr", "--post-url", posted.url])
    assert res.exit_code == 0, res.output
    assert "6 pairs" in res.output
    key = json.loads((tmp_path / "p" / "key.json").read_text())
    out = tmp_path / "ana.json"
    with sync_playwright() as pw:
        b, pg, errors = _open_in_chromium(pw, browser, tmp_path / "p" / "page" / "index.html", "ana")
        assert pg.locator("[data-design=mushra]").count() == 0 and pg.locator("[data-design=ccr]").count() == 3  # the intro, its cautions and the practice say pairs
        for button in ("#start", "#level-play", "#level-stop", "#level-next"):
            pg.click(button)
        assert pg.locator("#training-buttons button").count() == 4  # the pair, first, second, stop
        pg.click("#training-next")
        answered = {}
        while pg.is_visible("#pair"):
            tid = pg.evaluate("state.order[state.index]")
            pg.click("#categories input[value='2']")
            assert pg.is_disabled("#pair-next")  # an answer alone is not enough: both samples must be played
            pg.click("#first-button")
            assert pg.is_disabled("#pair-next")
            pg.click("#pair-play")
            assert pg.evaluate("ctx.state") == "running" and pg.evaluate("pairPlayer.sources.length") == 2
            score = 3 if key["pairs"][tid]["first"] == U else -1  # a listener who likes whatever is not unextended
            pg.click(f"#categories input[value='{score}']")
            assert not pg.is_disabled("#pair-next")
            answered[tid] = score
            pg.click("#pair-next")
        pg.wait_for_function("document.getElementById('status').textContent.startsWith('Results sent')", timeout=10000)
        with pg.expect_download() as d:
            pg.click("#save")
        d.value.save_as(out)
        b.close()
    posted.server.shutdown()
    assert errors == []
    saved = json.loads(out.read_text())
    assert posted.bodies[0]["ratings"] == saved["ratings"] and sorted(answered) == sorted(key["pairs"])
    assert {r["trial"]: r["score"] for r in saved["ratings"]} == answered
    (tmp_path / "groups.csv").write_text("clip,group\narctic_a0007,male\narctic_a0009,female\n")
    res = runner.invoke(app, ["verdicts", str(out), "--key", str(tmp_path / "p" / "key.json"), "--out", str(tmp_path / "v"), "--groups", str(tmp_path / "groups.csv")])
    assert res.exit_code == 0, res.output
    assert "| imaging | +2.00 (n=1) | +2.00 (n=1) |" in res.output  # female, male: one listener, one clip each
    assert "not in" not in res.output  # every clip has its group
    (tmp_path / "groups.csv").write_text("clip,group\narctic_a0009,female\n")
    res = runner.invoke(app, ["verdicts", str(out), "--key", str(tmp_path / "p" / "key.json"), "--out", str(tmp_path / "v"), "--groups", str(tmp_path / "groups.csv")])
    assert res.exit_code == 0 and "1 clip not in" in res.output and "(first: arctic_a0007) counts under '(no group)'" in res.output
    a = ccr.analyse(ccr.read([out], tmp_path / "p" / "key.json"))
    pref = {p.system: p for p in a.preferences}
    # imaging after unextended: +3; before it: -1, negated +1 -> every unit 2.0; the original the same way
    assert pref["imaging"].cmos.mean == pytest.approx(2.0) and pref["imaging"].second == 3 and pref["imaging"].first == 1
    assert a.listeners == ["ana"] and (tmp_path / "v" / "verdicts.png").is_file()
    assert "CMOS" in (tmp_path / "v" / "verdicts.md").read_text()
