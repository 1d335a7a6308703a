"""Listening panels: the analysis against a worked example, the prepared page, and the page driven in a
real browser (Debian's chromium through Playwright) with its results fed back to the analysis."""

from __future__ import annotations

import base64
import io
import json
import math
import os
import re
import shutil

import numpy as np
import pytest
import soundfile as sf
from scipy import stats

from nenv.dsp import channel
from nenv.report import panel, verdicts
from tests.conftest import ARCTIC, missing_tool


def _write_panel(tmp_path, scores: dict[str, dict[str, list[float]]], systems=("reference", "unextended", "neural")):
    """A key and one results file per listener: scores[listener][system] = one score per trial."""
    n_trials = len(next(iter(next(iter(scores.values())).values())))
    key = {"panel": "p1", "stimuli": {}, "trials": {}}
    for t in range(n_trials):
        key["trials"][f"t{t}"] = f"clip{t}"
        for s in systems:
            key["stimuli"][f"{s}-{t}"] = {"clip": f"clip{t}", "system": s, "trial": f"t{t}"}
    (tmp_path / "key.json").write_text(json.dumps(key))
    files = []
    for who, by in scores.items():
        ratings = [{"trial": f"t{t}", "stimulus": f"{s}-{t}", "score": by[s][t], "seconds": 30.0} for t in range(n_trials) for s in systems]
        f = tmp_path / f"{who}.json"
        f.write_text(json.dumps({"panel": "p1", "listener": who, "ratings": ratings}))
        files.append(f)
    return files, tmp_path / "key.json"


def test_analysis_reproduces_a_worked_example_and_flags_a_careless_listener(tmp_path):
    # Worked by hand. Listeners L1, L2 rate two trials; L3 rates the hidden reference 50 in both (careless).
    scores = {
        "L1": {"reference": [100, 95], "unextended": [35, 40], "neural": [60, 70]},
        "L2": {"reference": [100, 100], "unextended": [20, 45], "neural": [50, 80]},
        "L3": {"reference": [50, 50], "unextended": [90, 10], "neural": [40, 60]},
    }
    files, key = _write_panel(tmp_path, scores)
    a = verdicts.analyse(verdicts.read(files, key))
    assert list(a.excluded) == ["L3"] and "hidden reference below 90 in 2 of 2" in a.excluded["L3"]
    assert a.listeners == ["L1", "L2"]
    # neural: 60, 70, 50, 80 -> mean 65, s = sqrt(500/3) = 12.910; t(0.975, 3 df) = 3.182 (t table)
    # half-width 3.182 * 12.910 / 2 = 20.54 -> [44.46, 85.54]
    iv = a.overall["neural"]
    assert iv.n == 4 and iv.mean == 65.0
    assert iv.low == pytest.approx(65 - 3.182446 * math.sqrt(500 / 3) / 2, abs=1e-4)
    assert iv.low == pytest.approx(44.457, abs=1e-3) and iv.high == pytest.approx(85.543, abs=1e-3)
    # per clip: clip0 neural 60, 50 -> mean 55, s = 7.071, t(0.975, 1 df) = 12.706 -> half 12.706 * 7.071 / sqrt(2) = 63.53
    assert a.per_clip["clip0"]["neural"].high == pytest.approx(55 + 12.7062 * 5, abs=1e-3)
    # neural - unextended on the same trials: 25, 30, 30, 35 -> mean 30, s = 4.0825, half 6.496;
    # t = 30 / (4.0825 / 2) = 14.70 on 3 df (scipy.stats.ttest_rel); Wilcoxon: all 4 differences
    # positive, exact two-sided p = 2 / 2**4 = 0.125
    p = next(p for p in a.paired if (p.a, p.b) == ("neural", "unextended"))
    assert p.difference.mean == 30.0 and p.difference.n == 4
    assert p.difference.low == pytest.approx(30 - 3.182446 * math.sqrt(50 / 3) / 2, abs=1e-4)
    assert p.t_p == pytest.approx(stats.ttest_rel([60, 70, 50, 80], [35, 40, 20, 45]).pvalue) and p.t_p < 0.001
    assert p.wilcoxon_p == pytest.approx(0.125)
    md = verdicts.to_markdown(a)
    assert "excluded L3" in md and "65.0 [44.5, 85.5]" in md
    # per speaker group: clip0 female (neural 60, 50 -> 55), clip1 not in the table -> "(no group)" (70, 80 -> 75)
    g = verdicts.analyse(verdicts.read(files, key), groups={"clip0": "female"})
    assert list(g.per_group) == ["(no group)", "female"]
    assert (g.per_group["female"]["neural"].mean, g.per_group["female"]["neural"].n) == (55.0, 2) and g.per_group["(no group)"]["neural"].mean == 75.0
    assert "Per speaker group" in verdicts.to_markdown(g) and "group female,neural,55.0" in verdicts.to_csv(g)
    assert a.per_group == {} and "Per speaker group" not in md  # no groups given, no group table
    assert "neural,65.0" in verdicts.to_csv(a).replace("all,", "")


def test_post_screening_follows_the_15_percent_rule(tmp_path):
    # ITU-R BS.1534-3 4.1.2: more than 15% of the trials. 1 of 7 (14%) keeps a listener, 2 of 7 (29%) does not;
    # the anchor rated above 90 is judged the same way.
    base = {"reference": [100] * 7, "unextended": [20] * 7, "neural": [50] * 7}
    one = {**base, "reference": [80] + [100] * 6}
    two = {**base, "reference": [80, 85] + [100] * 5}
    loud_anchor = {**base, "unextended": [95, 95] + [20] * 5}
    files, key = _write_panel(tmp_path, {"A": base, "B": one, "C": two, "D": loud_anchor})
    excluded = verdicts.screen(verdicts.read(files, key))
    assert sorted(excluded) == ["C", "D"] and "anchor" in excluded["D"]
    # exactly 15% (3 of 20) is not more than 15%: kept; 4 of 20 is
    twenty = {"reference": [100] * 20, "unextended": [20] * 20, "neural": [50] * 20}
    (tmp_path / "t20").mkdir()
    files, key = _write_panel(tmp_path / "t20", {"E": {**twenty, "reference": [80] * 3 + [100] * 17}, "F": {**twenty, "reference": [80] * 4 + [100] * 16}})
    assert list(verdicts.screen(verdicts.read(files, key))) == ["F"]
    # the same edge for the anchor; and a rating of exactly 90 is neither below 90 nor above it
    (tmp_path / "a20").mkdir()
    files, key = _write_panel(tmp_path / "a20", {"G": {**twenty, "unextended": [95] * 3 + [20] * 17}, "H": {**twenty, "unextended": [95] * 4 + [20] * 16},
                                                 "I": {**twenty, "reference": [90] * 20, "unextended": [90] * 20}})
    assert list(verdicts.screen(verdicts.read(files, key))) == ["H"]


def test_pairs_need_two_shared_trials_and_the_default_system_meets_every_other(tmp_path):
    """Paired differences: each system against the anchor, and the default system against each other
    system; a pair rated on fewer than two shared trials has no interval and is left out. Identical
    ratings differ by nothing: both tests give p = 1 (scipy.stats.ttest_rel would give NaN)."""
    scores = {"A": {"reference": [100, 100], "unextended": [20, 30], "neural": [50, 60], "codebook": [50, 60]}}
    files, key = _write_panel(tmp_path, scores, systems=("reference", "unextended", "neural", "codebook"))
    a = verdicts.analyse(verdicts.read(files, key))
    pairs = {(p.a, p.b): p for p in a.paired}
    assert set(pairs) == {("reference", "unextended"), ("codebook", "unextended"), ("neural", "unextended"), ("neural", "reference"), ("neural", "codebook")}
    same = pairs[("neural", "codebook")]
    assert (same.difference.mean, same.difference.n, same.t_p, same.wilcoxon_p) == (0.0, 2, 1.0, 1.0)
    # the same difference on every trial (30, 30): no spread, so the t-test's p is 0; Wilcoxon's exact
    # two-sided p for two positive differences is 2 / 2**2 = 0.5
    steady = pairs[("neural", "unextended")]
    assert (steady.difference.mean, steady.t_p, steady.wilcoxon_p) == (30.0, 0.0, 0.5)
    # the ends of the scale are ratings like any other
    (tmp_path / "ends").mkdir()
    files_e, key_e = _write_panel(tmp_path / "ends", {"A": {"reference": [100, 100], "unextended": [0, 0], "neural": [0, 100]}})
    assert sorted(r.score for r in verdicts.read(files_e, key_e)) == [0, 0, 0, 100, 100, 100]
    assert list(a.overall) == ["reference", "unextended", "codebook", "neural"]  # reference, anchor, then by name
    b = verdicts.analyse(verdicts.read(files, key), default_system="codebook")
    assert ("codebook", "neural") in {(p.a, p.b) for p in b.paired} and ("neural", "codebook") not in {(p.a, p.b) for p in b.paired}
    # a trial the listener left without rating one system (a session that ended early) pairs nothing for it
    data = json.loads(files[0].read_text())
    data["ratings"] = [r for r in data["ratings"] if r["stimulus"] != "codebook-1"]
    files[0].write_text(json.dumps(data))
    c = {(p.a, p.b): p for p in verdicts.analyse(verdicts.read(files, key)).paired}
    assert ("neural", "codebook") not in c and c[("neural", "unextended")].difference.n == 2  # codebook has one trial left
    (tmp_path / "one").mkdir()
    files, key = _write_panel(tmp_path / "one", {"A": {"reference": [100], "unextended": [20], "neural": [50]}})
    assert verdicts.analyse(verdicts.read(files, key)).paired == []  # one trial: no interval, no test


def test_an_empty_interval_and_a_panel_whose_listeners_were_all_excluded_say_so(tmp_path):
    from nenv.errors import InputError

    empty = verdicts.Interval.of([])
    assert empty.n == 0 and math.isnan(empty.mean) and empty.text() == "-"
    one = verdicts.Interval.of([42.0])
    assert (one.mean, one.n, one.text()) == (42.0, 1, "42.0") and math.isnan(one.low)
    files, key = _write_panel(tmp_path, {"A": {"reference": [50, 50], "unextended": [20, 20], "neural": [40, 40]}})
    a = verdicts.analyse(verdicts.read(files, key))
    assert a.listeners == [] and "nothing to report" in verdicts.to_markdown(a) and "excluded A" in verdicts.to_markdown(a)
    (tmp_path / "list.json").write_text("[1, 2]")  # JSON, but not a key
    with pytest.raises(InputError, match="not a panel key"):
        verdicts.load_key(tmp_path / "list.json")


def test_results_of_another_panel_or_out_of_range_are_refused(tmp_path):
    from nenv.errors import InputError

    files, key = _write_panel(tmp_path, {"A": {"reference": [100], "unextended": [20], "neural": [50]}})
    data = json.loads(files[0].read_text())
    files[0].write_text(json.dumps({**data, "panel": "other"}))
    with pytest.raises(InputError, match="another panel"):
        verdicts.read(files, key)
    data["ratings"][0]["score"] = 130
    files[0].write_text(json.dumps(data))
    with pytest.raises(InputError, match="outside 0..100"):
        verdicts.read(files, key)


def test_a_panel_folder_is_not_overwritten_by_accident(tmp_path):
    from typer.testing import CliRunner

    from nenv.cli import app

    runner = CliRunner()
    args = ["panel", str(ARCTIC[0]), "--out", str(tmp_path / "p"), "--method", "imaging"]
    first = runner.invoke(app, args)
    assert first.exit_code == 0
    # the command says what it wrote, what the page holds and how to analyse the results
    assert "index.html: 1 trial of 3 stimuli (reference, unextended, imaging)" in first.output, first.output
    assert f"nenv verdicts RESULTS.json... --key {tmp_path / 'p' / 'key.json'}" in first.output
    key = (tmp_path / "p" / "key.json").read_text()
    res = runner.invoke(app, args)
    assert res.exit_code != 0 and "holds a panel already" in res.output
    assert (tmp_path / "p" / "key.json").read_text() == key  # the key of the panel already sent out is kept
    assert runner.invoke(app, args + ["--overwrite"]).exit_code == 0
    assert (tmp_path / "p" / "key.json").read_text() != key
    res = runner.invoke(app, ["panel", str(tmp_path / "missing.wav"), "--out", str(tmp_path / "q")])
    assert res.exit_code != 0 and not (tmp_path / "q" / "key.json").exists()


def _page_data(page_file) -> dict:
    html = page_file.read_text()
    m = re.search(r"const DATA = (\{.*?\});\n", html, re.S)
    return json.loads(m.group(1))


def test_prepared_panel_is_blind_and_level_aligned(tmp_path):
    key = panel.prepare([ARCTIC[0], ARCTIC[1]], tmp_path / "p", systems=["neural", "imaging"])
    page = tmp_path / "p" / "page" / "index.html"
    assert sorted(os.listdir(tmp_path / "p" / "page")) == ["index.html"]  # nothing else to name a stimulus
    html = page.read_text()
    for name in ("neural", "imaging", "unextended", "codebook"):
        assert name not in html  # the page says nothing of which stimulus is which system
    data = _page_data(page)
    assert data["panel"] == key["panel"] and len(data["trials"]) == 2
    for trial in data["trials"]:
        assert {key["stimuli"][s["id"]]["system"] for s in trial["stimuli"]} == {"reference", "unextended", "neural", "imaging"}
        ref, _ = sf.read(io.BytesIO(base64.b64decode(trial["reference"])))
        level = channel.active_level_dbov(ref, sr=16000)
        for s in trial["stimuli"]:
            y, sr = sf.read(io.BytesIO(base64.b64decode(s["audio"])))
            assert sr == 16000 and np.max(np.abs(y)) <= panel.PEAK + 1e-4
            assert abs(channel.active_level_dbov(y, sr=16000) - level) < 0.1  # loudness-aligned (active speech level)


def test_level_alignment_lowers_every_stimulus_together_when_one_would_clip():
    # A steady tone and a sparse click train set to the same active level of -10 dBov: the clicks would
    # peak far above full scale, so both come down by the same factor until the clicks peak at PEAK.
    t = np.arange(16000) / 16000
    tone = 0.1 * np.sin(2 * np.pi * 440 * t)
    clicks = np.zeros(16000)
    clicks[::400] = 0.1
    out = panel._aligned({"tone": tone, "clicks": clicks}, -10.0)
    assert np.max(np.abs(out["clicks"])) == pytest.approx(panel.PEAK) and panel.PEAK < 1.0  # never clips
    lv = {k: channel.active_level_dbov(v, sr=16000) for k, v in out.items()}
    assert lv["tone"] == pytest.approx(lv["clicks"], abs=1e-9) and lv["tone"] < -10.0
    quiet = panel._aligned({"tone": tone}, -30.0)  # nothing near clipping: exactly the target level
    assert channel.active_level_dbov(quiet["tone"], sr=16000) == pytest.approx(-30.0, abs=1e-9)


def _browser(names: tuple[str, ...], client: str, install: str) -> str:
    """The first of ``names`` on the PATH, if the Python ``client`` that drives it imports too."""
    import importlib

    path = next((p for p in map(shutil.which, names) if p), None)
    try:
        importlib.import_module(client)
    except ImportError:
        path = None
    if path is None:
        missing_tool(f"{names[0]} or {client} is not installed ({install})")
    return path


def _collector():
    """A local HTTP server that takes POSTed JSON (answering the browser's CORS preflight)."""
    import threading
    from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
    from types import SimpleNamespace

    bodies: list = []

    class Handler(BaseHTTPRequestHandler):
        def _cors(self):
            self.send_header("Access-Control-Allow-Origin", "*")
            self.send_header("Access-Control-Allow-Methods", "POST")
            self.send_header("Access-Control-Allow-Headers", "Content-Type")

        def do_OPTIONS(self):
            self.send_response(204)
            self._cors()
            self.end_headers()

        def do_POST(self):
            bodies.append(json.loads(self.rfile.read(int(self.headers["Content-Length"]))))
            self.send_response(200)
            self._cors()
            self.end_headers()

        def log_message(self, *args):
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return SimpleNamespace(server=server, bodies=bodies, url=f"http://127.0.0.1:{server.server_address[1]}/results")


CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--autoplay-policy=no-user-gesture-required"]


def _open_in_chromium(pw, browser: str, page_file, listener: str):
    """A headless Chromium page on the panel with the listener's name entered, once every stimulus has
    decoded (Start enabled); returns the browser, the page and the list its page errors go to."""
    b = pw.chromium.launch(executable_path=browser, headless=True, args=CHROMIUM_ARGS)
    pg = b.new_page(accept_downloads=True)
    errors: list[str] = []
    pg.on("pageerror", lambda e: errors.append(str(e)))
    pg.goto(page_file.as_uri())
    pg.fill("#listener", listener)
    pg.wait_for_function("!document.getElementById('start').disabled", timeout=60000)
    return b, pg, errors


def test_page_runs_in_a_real_browser_and_its_results_feed_the_analysis(tmp_path):
    """Headless chromium driven by Playwright: a listener goes through the cautions, the level check and
    the practice, plays every stimulus, moves every slider with the keyboard, saves the results; the
    analysis reads them back. Switching stimuli keeps the playback position."""
    from playwright.sync_api import sync_playwright
    from typer.testing import CliRunner

    from nenv.cli import app

    browser = _browser(("chromium", "chromium-browser"), "playwright.sync_api", "apt-get install chromium; pip install playwright")
    posted = _collector()  # the results are also POSTed here (the page's optional --post-url)
    runner = CliRunner()
    res = runner.invoke(app, ["panel", str(ARCTIC[0]), str(ARCTIC[1]), "--out", str(tmp_path / "p"), "--method", "imaging", "--post-url", posted.url])
    assert res.exit_code == 0, res.output
    key = json.loads((tmp_path / "p" / "key.json").read_text())
    saved = []
    for listener in ("ana", "ben"):
        with sync_playwright() as pw:
            b, pg, errors = _open_in_chromium(pw, browser, tmp_path / "p" / "page" / "index.html", listener)
            assert pg.locator("[data-design=ccr]").count() == 0 and pg.locator("[data-design=mushra]").count() == 3  # no word of pairs
            pg.click("#start")
            pg.click("#level-play")
            pg.click("#level-stop")
            pg.click("#level-next")
            pg.click("#training-next")
            first = True
            while pg.is_visible("#trial"):
                sliders = pg.locator("#stimuli input.score")
                assert pg.is_disabled("#next")  # every slider must be moved first
                for i in range(sliders.count()):
                    pg.click(f"#stimuli button.play >> nth={i}")
                    if first and i == 0:
                        pg.wait_for_timeout(600)
                    if first and i == 1:  # switched from A to B: playback went on from the same point
                        pos = pg.evaluate("position()")
                        assert 0.4 < pos < 1.5 and pg.evaluate("ctx.state") == "running"
                        pg.focus("#loop-start")
                        pg.keyboard.press("End")  # loop over the last 5% only: playback jumps into it
                        pg.wait_for_timeout(100)
                        dur = pg.evaluate("player.source.buffer.duration")
                        dbg = pg.evaluate("JSON.stringify({ls: player.loopStart, le: player.loopEnd, off: player.offset, id: player.id, idx: state.index, order: state.order, v: document.getElementById('loop-start').value, durs: Object.fromEntries(Object.entries(buffers).map(([k, b]) => [k, b.duration]))})")
                        assert 0.94 * dur <= pg.evaluate("position()") <= dur, dbg
                        pg.focus("#loop-start")
                        pg.keyboard.press("Home")
                    sliders.nth(i).focus()
                    pg.keyboard.press("End")  # 100, then down by 10 per position: the score says the position
                    for _ in range(10 * i):
                        pg.keyboard.press("ArrowLeft")
                first = False
                pg.click("#next")
            pg.wait_for_function("document.getElementById('status').textContent.startsWith('Results sent')", timeout=10000)
            with pg.expect_download() as d:
                pg.click("#save")
            out = tmp_path / f"{listener}.json"
            d.value.save_as(out)
            b.close()
        assert errors == []
        saved.append(out)
    posted.server.shutdown()
    results = [json.loads(f.read_text()) for f in saved]
    assert sorted(r["listener"] for r in posted.bodies) == ["ana", "ben"]
    assert all(p["ratings"] == next(r for r in results if r["listener"] == p["listener"])["ratings"] for p in posted.bodies)
    for r in results:
        assert sorted(r["order"]) == ["t1", "t2"] and len(r["ratings"]) == 2 * 3
        assert all(x["score"] == 100 - 10 * x["position"] for x in r["ratings"])
    res = runner.invoke(app, ["verdicts", *map(str, saved), "--key", str(tmp_path / "p" / "key.json"), "--out", str(tmp_path / "v")])
    assert res.exit_code == 0, res.output
    ratings = verdicts.read(saved, tmp_path / "p" / "key.json")
    assert {r.system for r in ratings} == {"reference", "unextended", "imaging"} and len(ratings) == 12
    for r in ratings:  # each rating reached the system of the stimulus it was given to
        tok = next(x["stimulus"] for res_ in results for x in res_["ratings"] if res_["listener"] == r.listener and x["trial"] == r.trial and x["score"] == r.score)
        assert key["stimuli"][tok]["system"] == r.system
    assert (tmp_path / "v" / "verdicts.md").is_file() and (tmp_path / "v" / "verdicts.csv").is_file()
    rows = (tmp_path / "v" / "ratings.csv").read_text().splitlines()
    assert rows[0] == "listener,trial,clip,system,score,seconds" and len(rows) == 13


def test_page_runs_in_firefox(tmp_path):
    """The same page in Firefox ESR (Debian's), driven over its Marionette protocol, in both designs: every
    stimulus decodes, the listener goes through every screen, slider and pair, and the results come out complete. (Headless Firefox
    on a machine without a sound device keeps its audio context suspended, so playback itself is checked
    in the Chromium test only.)"""
    import socket
    import subprocess
    import tempfile
    import time

    firefox = _browser(("firefox-esr", "firefox"), "marionette_driver", "apt-get install firefox-esr; pip install marionette-driver")
    from marionette_driver.keys import Keys
    from marionette_driver.marionette import Marionette

    key = panel.prepare([ARCTIC[0], ARCTIC[1]], tmp_path / "p", systems=["imaging"])
    profile = tempfile.mkdtemp(dir=tmp_path)
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    (tmp_path / profile / "user.js").write_text(f'user_pref("marionette.port", {port});\nuser_pref("media.autoplay.default", 0);\n')
    ff = subprocess.Popen([firefox, "--headless", "--marionette", "--no-remote", "--profile", profile], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        for _ in range(200):
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                time.sleep(0.2)
        m = Marionette(host="127.0.0.1", port=port)
        m.start_session()
        m.navigate((tmp_path / "p" / "page" / "index.html").as_uri())
        m.find_element("id", "listener").send_keys("fox")
        t0 = time.time()
        while m.execute_script("return document.getElementById('start').disabled") and time.time() - t0 < 60:
            time.sleep(0.2)  # enabled once every stimulus has been decoded
        for button in ("start", "level-play", "level-stop", "level-next", "training-next"):
            m.find_element("id", button).click()
        trials = 0
        while m.execute_script("return document.getElementById('trial').classList.contains('on')"):
            for i, (b, slider) in enumerate(zip(m.find_elements("css selector", "#stimuli button.play"), m.find_elements("css selector", "#stimuli input.score"))):
                b.click()
                slider.send_keys(Keys.END)
                for _ in range(i):
                    slider.send_keys(Keys.ARROW_DOWN)
            m.find_element("id", "next").click()
            trials += 1
        results = json.loads(m.execute_script("return JSON.stringify(window.wrappedJSObject.results())"))
        # the pairs design (ITU-T P.800 Annex E) in the same browser: every pair played and answered
        pairs_key = panel.prepare([ARCTIC[0]], tmp_path / "pairs", systems=["imaging"], design="ccr")
        m.navigate((tmp_path / "pairs" / "page" / "index.html").as_uri())
        m.find_element("id", "listener").send_keys("fox")
        t0 = time.time()
        while m.execute_script("return document.getElementById('start').disabled") and time.time() - t0 < 60:
            time.sleep(0.2)
        for button in ("start", "level-play", "level-stop", "level-next", "training-next"):
            m.find_element("id", button).click()
        pairs = 0
        while m.execute_script("return document.getElementById('pair').classList.contains('on')"):
            m.find_element("id", "pair-play").click()
            m.find_element("css selector", "#categories input[value='-2']").click()
            m.find_element("id", "pair-next").click()
            pairs += 1
        pair_results = json.loads(m.execute_script("return JSON.stringify(window.wrappedJSObject.results())"))
        m.delete_session()
    finally:
        ff.kill()
        ff.wait()
    assert trials == 2 and results["listener"] == "fox" and results["panel"] == key["panel"]
    assert len(results["ratings"]) == 2 * 3 and all(r["score"] == 100 - r["position"] for r in results["ratings"])
    assert {key["stimuli"][r["stimulus"]]["system"] for r in results["ratings"]} == {"reference", "unextended", "imaging"}
    assert pairs == 3 and sorted(r["trial"] for r in pair_results["ratings"]) == sorted(pairs_key["pairs"])
    assert all(r["score"] == -2 for r in pair_results["ratings"])
