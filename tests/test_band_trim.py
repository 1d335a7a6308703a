"""A model folder's calibration of its added band (band_trim_db) and the --band-trim override.

The trim is a gain on the isolated high band only: by linearity of the all-pole synthesis and of
the isolation filter, the trimmed output minus the unextended one must be the trained output minus
the unextended one, times 10^(trim/20); the telephone band and the low band do not move. The band's
level is also measured independently with scipy.signal.welch (Welch's averaged periodogram).
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import numpy as np
import pytest
from scipy.signal import welch

from nenv.chain import checkpoint, pipeline
from nenv.dsp import channel
from nenv.errors import ConfigError, InputError
from tests.conftest import ARCTIC


@pytest.fixture(scope="module")
def call():
    """The first ARCTIC sentence through G.711 mu-law at -26 dBov (8 kHz)."""
    from nenv.report.evaluate import prepare_reference

    return channel.telephone(prepare_reference(ARCTIC[0]), sr=16000, law="mulaw", level_dbov=None)


def _out(nb, name, **kw):
    return pipeline.extend(nb, system=pipeline.make_system(name, **kw)).y


def _band_db(y, lo, hi):
    f, p = welch(y, fs=16000, nperseg=512)
    return 10 * np.log10(p[(f >= lo) & (f <= hi)].sum())


def _assert_band_scaled(y, y0, u, trim_db):
    """``y`` is the trained output ``y0`` with its added band (``y0`` minus the unextended ``u``) scaled
    by ``trim_db``, to rounding."""
    assert np.max(np.abs((y - u) - 10 ** (trim_db / 20) * (y0 - u))) < 1e-12 * np.max(np.abs(y0))


@pytest.mark.parametrize("name", ["neural", "codebook"])
def test_trim_scales_the_added_band_and_nothing_else(call, name):
    u = _out(call, "unextended")
    y0 = _out(call, name)
    y6 = _out(call, name, band_trim_db=-6.0)
    _assert_band_scaled(y6, y0, u, -6.0)
    assert _band_db(y0, 4000, 7500) - _band_db(y6, 4000, 7500) == pytest.approx(6.0, abs=0.05)  # Welch, 4-7.5 kHz
    assert _band_db(y6, 500, 3000) == pytest.approx(_band_db(y0, 500, 3000), abs=0.01)  # the telephone band stays
    assert np.array_equal(_out(call, name, band_trim_db=0.0), y0)  # 0 dB: the trained output, bit for bit


def test_the_low_band_keeps_its_own_level(call):
    """The trim is the high band's: with the low band on, 50-300 Hz does not move."""
    a = _out(call, "neural", low_band=True)
    b = _out(call, "neural", low_band=True, band_trim_db=-10.0)
    assert _band_db(b, 60, 250) == pytest.approx(_band_db(a, 60, 250), abs=0.05)
    assert _band_db(a, 4000, 7500) - _band_db(b, 4000, 7500) == pytest.approx(10.0, abs=0.05)


def _calibrated(tmp_path, value):
    folder = tmp_path / "model"
    shutil.copytree(checkpoint.default_path(), folder, ignore=shutil.ignore_patterns("*.png", "model.pt"))
    info = json.loads((folder / "nenv.json").read_text())
    info["calibration"] = {"band_trim_db": value}
    (folder / "nenv.json").write_text(json.dumps(info))
    return folder


def test_a_folder_calibration_reaches_every_engine(call, tmp_path):
    """What the folder says is what extend, one streaming call and the batched engine give: the same as
    asking for the trim explicitly."""
    import nenv

    folder = _calibrated(tmp_path, -4.5)
    assert nenv.load_model(folder).band_trim_db == -4.5
    want = _out(call, "neural", band_trim_db=-4.5)
    assert np.array_equal(_out(call, "neural", model=folder), want)
    assert not np.array_equal(_out(call, "neural"), want)  # the shipped folder: the trained level
    one = nenv.CallEngine(nenv.load_model(folder))
    streamed = np.concatenate([one.feed(call[i : i + 160]) for i in range(0, call.size, 160)] + [one.flush()])
    np.testing.assert_allclose(streamed, want, rtol=0, atol=1e-9)
    many = nenv.MultiCallEngine(nenv.load_model(folder))
    many.open("a")
    parts = []
    for i in range(0, call.size, 160):
        many.feed("a", call[i : i + 160])
        parts.append(many.step().get("a", np.zeros(0)))
    parts.append(many.close("a"))
    np.testing.assert_allclose(np.concatenate(parts), want, rtol=0, atol=1e-9)
    # an explicit trim wins over the folder's
    assert np.array_equal(_out(call, "neural", model=folder, band_trim_db=0.0), _out(call, "neural"))


@pytest.mark.parametrize("value", ["loud", 20.0, -41, float("nan"), True, None])
def test_a_bad_calibration_is_refused_naming_the_file(tmp_path, value):
    folder = _calibrated(tmp_path, value)
    with pytest.raises(ConfigError, match="nenv.json.*band_trim_db"):
        checkpoint.load(folder)


def test_the_calibration_range_includes_its_ends_and_a_folder_without_one_is_at_the_trained_level(tmp_path):
    """TRIM_RANGE_DB runs from -40 to 12 dB, both ends allowed; a folder written before calibrations
    existed (no 'calibration' in nenv.json) ships its band at the trained level."""
    for value in (-40, 12, -40.0, 12.0):
        assert checkpoint.check_trim(value, what="t") == float(value)
    for value in (-40.001, 12.001):
        with pytest.raises(ConfigError, match="from -40 to 12"):
            checkpoint.check_trim(value, what="t")
    folder = _calibrated(tmp_path, 0.0)
    info = json.loads((folder / "nenv.json").read_text())
    del info["calibration"]
    (folder / "nenv.json").write_text(json.dumps(info))
    assert checkpoint.load(folder).band_trim_db == 0.0


def test_a_calibration_that_is_not_a_table_is_refused(tmp_path):
    folder = _calibrated(tmp_path, 0.0)
    info = json.loads((folder / "nenv.json").read_text())
    info["calibration"] = -6
    (folder / "nenv.json").write_text(json.dumps(info))
    with pytest.raises(ConfigError, match="'calibration' must be a table"):
        checkpoint.load(folder)


def test_a_trim_is_only_for_the_model_systems(call):
    for name in ("imaging", "unextended"):
        with pytest.raises(InputError, match="calibrates a model's band"):
            pipeline.make_system(name, band_trim_db=-3.0)
    for bad in (13.0, float("inf")):
        with pytest.raises(InputError, match="from -40 to 12"):
            pipeline.make_system("neural", band_trim_db=bad)
    from nenv.report import evaluate

    with pytest.raises(InputError, match="add neural or codebook"):
        evaluate.run([ARCTIC[0]], systems=("unextended", "imaging"), band_trim_db=-3.0)


def test_evaluate_trims_the_model_systems_band_and_no_other(call):
    """``evaluate.run(band_trim_db=...)`` passes the trim to the model systems only: the neural output
    is the trimmed one (as above), the unextended one is as without a trim."""
    from nenv.report import evaluate

    _, (clip,) = evaluate.run([ARCTIC[0]], systems=("unextended", "neural"), laws=("mulaw",), band_trim_db=-6.0)
    u, y0 = _out(call, "unextended"), _out(call, "neural")
    assert np.array_equal(clip.outputs["unextended"], u)
    _assert_band_scaled(clip.outputs["neural"], y0, u, -6.0)


def test_the_recipe_refuses_a_trim_out_of_range():
    from nenv.train import recipe

    assert recipe.load(None, overrides=["band_trim_db=-6"]).band_trim_db == -6.0
    with pytest.raises(ConfigError, match="band_trim_db"):
        recipe.load(None, overrides=["band_trim_db=30"])


def test_extend_says_the_band_is_trimmed(tmp_path):
    src = tmp_path / "in.wav"
    subprocess.run([sys.executable, "-m", "nenv", "degrade", str(ARCTIC[0]), str(src), "--law", "mulaw"], check=True, capture_output=True)
    r = subprocess.run([sys.executable, "-m", "nenv", "extend", str(src), str(tmp_path / "out.wav"), "--band-trim", "-6"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert "-6 dB against the model's trained level (--band-trim)" in r.stderr + r.stdout
    r = subprocess.run([sys.executable, "-m", "nenv", "extend", str(src), str(tmp_path / "img.wav"), "--method", "imaging", "--band-trim", "-6"], capture_output=True, text=True)
    assert r.returncode == 2 and "calibrates a model's band" in r.stderr
    assert not (tmp_path / "img.wav").exists()


def test_a_guard_record_says_at_which_level_the_band_was_played(tmp_path):
    """An audit must know which band a listener heard: the record's header carries the level in force,
    and the audit page names it beside the model (a record without it reads as the trained level)."""
    from typer.testing import CliRunner

    from nenv.cli import app
    from nenv.report import audit, records

    src, rec = tmp_path / "in.wav", tmp_path / "guard.jsonl"
    runner = CliRunner()
    assert runner.invoke(app, ["degrade", str(ARCTIC[0]), str(src), "--law", "mulaw"]).exit_code == 0
    for trim in (None, "-6"):
        res = runner.invoke(app, ["extend", str(src), str(tmp_path / f"out{trim}.wav"), "--record", str(rec)] + (["--band-trim", trim] if trim else []))
        assert res.exit_code == 0, res.output
    heads = records.read([rec]).headers
    assert [h["model"]["band_trim_db"] for h in heads] == [0.0, -6.0]
    labels = {audit._model_label(h["model"]) for h in heads}
    assert labels == {heads[0]["model"]["record_id"], f"{heads[0]['model']['record_id']} (band at -6 dB)"}
    assert audit._model_label({"record_id": "old-record"}) == "old-record"  # written before the level was recorded


def test_a_panel_key_says_which_model_and_level_was_heard(tmp_path):
    from nenv.report import panel

    folder = _calibrated(tmp_path, -4.5)
    key = panel.prepare([str(ARCTIC[0])], tmp_path / "p", systems=["neural"], model=folder)
    info = json.loads((folder / "nenv.json").read_text())
    assert key["model"] == {"folder": str(folder), "record_id": info["record_id"], "band_trim_db": -4.5}
    assert json.loads((tmp_path / "p" / "key.json").read_text())["model"]["band_trim_db"] == -4.5
    assert "model" not in panel.prepare([str(ARCTIC[0])], tmp_path / "q", systems=["imaging"])
    # the folder's own level asked again would be the same system under a second name
    with pytest.raises(InputError, match="-4.5 is the model folder's own level"):
        panel.prepare([str(ARCTIC[0])], tmp_path / "r", systems=["neural"], model=folder, band_trims=[-6.0, -4.5])
    assert not (tmp_path / "r").exists()  # refused before anything was written


def test_the_evaluation_table_says_when_the_band_is_not_at_its_trained_level(tmp_path):
    from nenv.report.evaluate import trim_notes

    assert trim_notes(["neural", "unextended"], None) == []  # the shipped folder: the trained level
    assert trim_notes(["neural", "unextended"], -6.0) == ["neural adds its band -6 dB against the trained level (--band-trim)"]
    folder = _calibrated(tmp_path, -4.5)
    assert trim_notes(["neural", "codebook"], None, folder) == ["neural and codebook add their band -4.5 dB against the trained level (the model folder's calibration)"]
    assert trim_notes(["imaging"], None, folder) == []


def test_stream_says_the_folder_trims_its_band(tmp_path, call):
    folder = _calibrated(tmp_path, -6.0)
    pcm = (np.clip(call[:8000], -1, 1) * 32767).astype("<i2").tobytes()
    r = subprocess.run([sys.executable, "-m", "nenv", "stream", "--model", str(folder)], input=pcm, capture_output=True)
    assert r.returncode == 0, r.stderr.decode()
    assert len(r.stdout) == 2 * len(pcm) and "-6 dB against the model's trained level (the model folder's calibration)" in r.stderr.decode()
    r = subprocess.run([sys.executable, "-m", "nenv", "stream"], input=pcm, capture_output=True)
    assert r.returncode == 0 and "trained level" not in r.stderr.decode()


def test_a_pairs_panel_asks_which_level_of_the_band_listeners_prefer(tmp_path):
    """--band-trim in a panel: each model system once more at that level, as a system of its own, in
    both orders against unextended; its samples carry the band that much quieter (Welch, 4-7.5 kHz);
    the analysis reads the labelled system like any other."""
    import base64
    import io

    import soundfile as sf

    from nenv.report import ccr, panel
    from tests.test_panel import _page_data

    key = panel.prepare([str(ARCTIC[0])], tmp_path / "p", systems=["neural"], design="ccr", band_trims=[-6.0, -6])
    assert key["systems"] == ["reference", "unextended", "neural", "neural -6 dB"]  # a level asked twice runs once
    assert sorted((p["first"], p["second"]) for p in key["pairs"].values() if "reference" not in (p["first"], p["second"])) == sorted(
        [("unextended", "neural"), ("neural", "unextended"), ("unextended", "neural -6 dB"), ("neural -6 dB", "unextended")]
    )
    audio = {}
    for t in _page_data(tmp_path / "p" / "page" / "index.html")["trials"]:
        for place in ("first", "second"):
            audio[key["stimuli"][t[place]["id"]]["system"]] = sf.read(io.BytesIO(base64.b64decode(t[place]["audio"])))[0]
    assert _band_db(audio["neural"], 4000, 7500) - _band_db(audio["neural -6 dB"], 4000, 7500) == pytest.approx(6.0, abs=0.3)
    # two listeners who prefer the quieter band: +1 for it, 0 for the trained level, the original +2
    ratings = []
    for tid, p in key["pairs"].items():
        sys_ = p["second"] if p["first"] == "unextended" else p["first"]
        score = {"neural": 0, "neural -6 dB": 1, "reference": 2}[sys_]
        ratings.append({"trial": tid, "score": score if p["first"] == "unextended" else -score, "seconds": 9.0})
    files = []
    for who in ("ana", "ben"):
        f = tmp_path / f"{who}.json"
        f.write_text(json.dumps({"panel": key["panel"], "listener": who, "ratings": ratings}))
        files.append(f)
    pref = {p.system: p.cmos.mean for p in ccr.analyse(ccr.read(files, tmp_path / "p" / "key.json")).preferences}
    assert pref == {"reference": pytest.approx(2.0), "neural": pytest.approx(0.0), "neural -6 dB": pytest.approx(1.0)}
    with pytest.raises(InputError, match="add --method neural or codebook"):
        panel.prepare([str(ARCTIC[0])], tmp_path / "q", systems=["imaging"], band_trims=[-6.0])
    with pytest.raises(InputError, match="from -40 to 12"):
        panel.prepare([str(ARCTIC[0])], tmp_path / "r", systems=["neural"], band_trims=[20.0])
    assert not (tmp_path / "q").exists() and not (tmp_path / "r").exists()  # refused before anything is written
    from typer.testing import CliRunner

    from nenv.cli import app

    res = CliRunner().invoke(app, ["panel", str(ARCTIC[0]), "--out", str(tmp_path / "cli"), "--method", "neural", "--band-trim", "-6", "--design", "ccr"])
    assert res.exit_code == 0 and "5 pairs (neural, neural -6 dB against unextended in both orders" in res.output, res.output
