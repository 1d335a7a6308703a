"""Training on a synthetic corpus: numbers, not just that it ran; export parity; guard behaviour."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from nenv.dsp import channel
from nenv.chain import checkpoint, pipeline
from nenv.report import measures  # noqa: E402
from nenv.errors import ConfigError  # noqa: E402
from nenv.chain.guard import Check  # noqa: E402
from nenv.train import loop, recipe  # noqa: E402
from tests import synthetic  # noqa: E402
from tests.conftest import perturb_predictions  # noqa: E402

@pytest.fixture(scope="session")
def held_out():
    """Utterances of four synthetic speakers the model never saw (another seed)."""
    rng = np.random.default_rng(2024)
    refs = []
    for _ in range(4):
        spk = synthetic.speaker(rng)
        refs.append(channel.set_level(synthetic.utterance(rng, seconds=3.0, **spk), sr=16000, level_dbov=-26))
    return refs


def test_network_beats_codebook_on_held_out_speakers(trained):
    m = trained.record["metrics"]
    nn_lsd, cb_lsd = m["val_envelope_lsd_high_db"]["neural"], m["val_envelope_lsd_high_db"]["codebook"]
    # measured on this corpus: neural 2.75 dB, codebook 4.71 dB (validation speakers never trained on)
    assert nn_lsd < cb_lsd - 1.0
    assert nn_lsd < 0.8 * cb_lsd
    assert m["val_guard_rejection_rate"] < 0.05


def test_full_pipeline_on_unseen_speakers(trained, held_out):
    ck = checkpoint.load(trained.out)
    scores = {s: [] for s in ("imaging", "codebook", "neural")}
    for ref in held_out:
        nb = channel.telephone(ref, sr=16000, level_dbov=None, law="mulaw")
        for s in scores:
            y = pipeline.extend(nb, system=pipeline.make_system(s, model=ck)).y
            scores[s].append(measures.Scores.compute(ref, y))
    env = {s: np.mean([x.lsd_env_high for x in v]) for s, v in scores.items()}
    assert env["neural"] < env["codebook"] - 0.3
    assert env["neural"] < env["imaging"] - 3
    level = np.median([x.level_error_high for x in scores["neural"]])
    assert -4 < level < 2  # under- rather than over-estimated


def test_level_is_not_systematically_overestimated(trained):
    m = trained.record["metrics"]["val_median_level_error_db"]["neural"]
    assert -3 < m < 0.5
    h = trained.record["history"]
    assert all(np.isfinite(e["val_loss"]) for e in h)
    assert h[-1]["val_loss"] < h[0]["val_loss"]


def test_the_saved_weights_are_the_best_epochs(trained):
    # Selection on the held-out speakers: the model that ships has the lowest validation loss of the
    # run, not the last epoch's (recomputed with the saved weights after training).
    m, h = trained.record["metrics"], trained.record["history"]
    best = min(h, key=lambda e: e["val_loss"])
    assert m["best_epoch"] == best["epoch"] and m["best_val_loss"] == pytest.approx(best["val_loss"])
    assert m["saved_model_val_loss"] == pytest.approx(best["val_loss"], rel=1e-5)
    assert h[-1]["val_loss"] > best["val_loss"] * (1 + 1e-4)  # the run went on past its best (else this test could not fail)
    r = trained.record["recipe"]
    assert len(h) == r["epochs"] or len(h) == m["best_epoch"] + r["patience"]  # early stop: `patience` epochs without a gain


def test_model_folder_is_complete_and_self_describing(trained):
    out = trained.out
    for name in ("model.onnx", "codebook.npz", "nenv.json", "model.pt", "record.json", "curves.png", "survey.csv", "survey.png"):
        assert (out / name).is_file(), name
    info = json.loads((out / "nenv.json").read_text())
    assert info["features"]["context"] == 4 and info["model"]["hidden"] == [128, 128]
    assert info["recipe"]["codebook_size"] == 16
    assert info["calibration"] == {"band_trim_db": 0.0}  # the recipe's calibration (its default: the trained level)
    assert set(info["normalisation"]) == {"x_mean", "x_std", "y_mean", "y_std"}
    rec = json.loads((out / "record.json").read_text())
    assert rec["record_id"] == info["record_id"] and rec["wall_s"] > 0
    assert rec["data"]["feature_x_real_time"] > 1
    assert set(rec["corpus"]["train_speakers"]).isdisjoint(rec["corpus"]["val_speakers"])
    assert not list(out.parent.glob(".*partial*"))


def test_onnx_matches_torch_and_passes_checker(trained):
    import onnx
    import onnxruntime as ort

    from nenv.train.export import load_torch

    onnx.checker.check_model(onnx.load(str(trained.out / "model.onnx")), full_check=True)
    model, blob = load_torch(trained.out / "model.pt")
    norm = {k: v.numpy().astype(np.float64) for k, v in blob["normalisation"].items()}
    rng = np.random.default_rng(5)
    x = (norm["x_mean"] + norm["x_std"] * rng.standard_normal((500, blob["config"]["input_dim"])) * 3).astype(np.float32)
    with torch.no_grad():
        c_ref, l_ref = (t.numpy() for t in model(torch.from_numpy(x)))
    c, l = ort.InferenceSession(str(trained.out / "model.onnx"), providers=["CPUExecutionProvider"]).run(None, {"features": x})
    # within 1e-5 in the network's own units (each output's training std); float32 throughout
    assert np.max(np.abs(c - c_ref) / norm["y_std"][:-1]) < 1e-5
    assert np.max(np.abs(l - l_ref) / norm["y_std"][-1]) < 1e-5


def test_an_export_that_disagrees_with_torch_is_refused_and_nothing_written(trained, tmp_path, monkeypatch):
    # A network whose torch outputs differ from what was exported (here: +0.01 outside the export
    # trace, in the network's units) must not produce a model file.
    from nenv.errors import ConfigError
    from nenv.train import export

    real = export.load_torch

    class Drifting(torch.nn.Module):
        def __init__(self, inner):
            super().__init__()
            self.inner = inner

        def forward(self, x):
            c, lv = self.inner(x)
            return (c, lv) if torch.onnx.is_in_onnx_export() else (c + 0.01, lv)

    monkeypatch.setattr(export, "load_torch", lambda p: (lambda m, b: (Drifting(m), b))(*real(p)))
    out = tmp_path / "model.onnx"
    with pytest.raises(ConfigError, match="disagree"):
        export.export(trained.out / "model.pt", out, metadata={})
    assert not out.exists() and list(tmp_path.iterdir()) == []


def _copy_with_features(trained, folder, **changes):
    """A copy of the trained model folder whose nenv.json states other feature settings."""
    shutil.copytree(trained.out, folder)
    info = json.loads((folder / "nenv.json").read_text())
    info["features"].update(changes)
    (folder / "nenv.json").write_text(json.dumps(info))
    return folder


def test_runtime_refuses_other_feature_settings(trained, tmp_path):
    with pytest.raises(ConfigError, match="nb_order=12"):
        checkpoint.load(_copy_with_features(trained, tmp_path / "bad", nb_order=12))
    # settings this nenv could run (context is the model's own choice) but not those model.onnx was
    # made with (context 4): a model.onnx from another folder, refused at first use
    mixed = checkpoint.load(_copy_with_features(trained, tmp_path / "mixed", context=2))
    for _ in range(2):  # at every use: a session that failed its checks is not kept
        with pytest.raises(ConfigError, match="disagree on the feature settings"):
            mixed.session()
    # an ONNX file whose embedded settings differ from nenv.json is refused at first use
    import onnx

    shutil.copytree(trained.out, tmp_path / "bad2")
    proto = onnx.load(str(tmp_path / "bad2" / "model.onnx"))
    for p in proto.metadata_props:
        if p.key == checkpoint.META_FEATURES:
            d = json.loads(p.value)
            d["hop_nb"] = 160
            p.value = json.dumps(d)
    onnx.save(proto, str(tmp_path / "bad2" / "model.onnx"))
    ck = checkpoint.load(tmp_path / "bad2")
    with pytest.raises(ConfigError, match="hop_nb=160"):
        ck.session()


def test_missing_or_corrupt_model_files(trained, tmp_path):
    with pytest.raises(ConfigError, match="does not exist"):
        checkpoint.load(tmp_path / "nothing")
    part = tmp_path / "part"
    shutil.copytree(trained.out, part)
    (part / "codebook.npz").unlink()
    with pytest.raises(ConfigError, match="codebook.npz"):
        checkpoint.load(part)
    trunc = tmp_path / "trunc"
    shutil.copytree(trained.out, trunc)
    data = (trunc / "model.onnx").read_bytes()
    (trunc / "model.onnx").write_bytes(data[: len(data) // 3])
    with pytest.raises(ConfigError, match="cannot load"):
        checkpoint.load(trunc).session()


def _decisions(model, x):
    system = pipeline.make_system("neural", model=model)
    out = pipeline.extend(x, system=system)
    return out, system.estimator.record()


def test_guard_falls_back_on_exactly_the_perturbed_hops(trained, held_out, monkeypatch):
    nb = channel.telephone(held_out[0], sr=16000, level_dbov=None)
    ck = checkpoint.load(trained.out)
    _, base = _decisions(ck, nb)
    n = base.rejected.size
    blocks = {Check.NONFINITE: range(40, 50), Check.LEVEL: range(80, 90), Check.UNSTABLE: range(120, 130), Check.MISMATCH: range(160, 170)}
    perturb_predictions(ck, blocks, monkeypatch)
    out, dec = _decisions(ck, nb)
    assert dec.rejected.size == n
    for check, hops in blocks.items():
        hops = np.array(list(hops))
        assert np.all(dec.reasons[hops] & check), (check, dec.reasons[hops])
    others = np.setdiff1d(np.arange(n), np.concatenate([list(h) for h in blocks.values()]))
    np.testing.assert_array_equal(dec.rejected[others], base.rejected[others])
    assert np.all(np.isfinite(out.y)) and np.max(np.abs(out.y)) <= 0.99


def test_guard_catches_perturbed_onnx_weights(trained, held_out, tmp_path):
    import onnx
    from onnx import numpy_helper

    bad = tmp_path / "bad"
    shutil.copytree(trained.out, bad)
    proto = onnx.load(str(bad / "model.onnx"))
    # the last Add of the graph carries the level's de-normalisation offset: push it 150 dB up
    y_mean = next(i for i in proto.graph.initializer if "y_mean" in i.name)
    arr = numpy_helper.to_array(y_mean).copy()
    arr[-1] += 150.0
    y_mean.CopyFrom(numpy_helper.from_array(arr, y_mean.name))
    onnx.save(proto, str(bad / "model.onnx"))
    nb = channel.telephone(held_out[1], sr=16000, level_dbov=None)
    out, dec = _decisions(checkpoint.load(bad), nb)
    assert np.all(dec.reasons & Check.LEVEL)
    assert np.all(np.isfinite(out.y)) and np.max(np.abs(out.y)) <= 0.99
    cb = pipeline.extend(nb, system=pipeline.make_system("codebook", model=checkpoint.load(trained.out))).y
    np.testing.assert_allclose(out.y, cb, atol=1e-9)  # every hop fell back: the codebook system's output


def test_guard_rejects_inputs_unlike_training(trained):
    # Measured with this model: a 1 kHz tone trips level + mismatch on ~98% of hops,
    # full-scale noise (far louder than any training level) trips novel on every hop.
    ck = checkpoint.load(trained.out)
    tone = 0.1 * np.sin(2 * np.pi * 1000 * np.arange(16000) / 8000)
    out, dec = _decisions(ck, tone)
    assert np.mean(dec.rejected[10:]) > 0.9 and np.mean(dec.reasons[10:] & (Check.LEVEL | Check.MISMATCH) > 0) > 0.9
    assert np.all(np.isfinite(out.y)) and np.max(np.abs(out.y)) <= 0.99
    noise = np.random.default_rng(0).uniform(-1, 1, 16000)
    out, dec = _decisions(ck, noise)
    assert np.mean(dec.reasons & Check.NOVEL > 0) > 0.9
    assert np.all(np.isfinite(out.y)) and np.max(np.abs(out.y)) <= 0.99


def test_train_refuses_to_overwrite_and_keeps_old_model(trained, tmp_path):
    r = recipe.load(None, overrides=[f'corpus="{tmp_path / "none"}"'])
    dst = tmp_path / "m"
    shutil.copytree(trained.out, dst)
    with pytest.raises(ConfigError, match="--force"):
        loop.train(r, dst)
    from nenv.errors import InputError

    with pytest.raises(InputError, match="does not exist"):
        loop.train(r, dst, force=True)
    assert (dst / "model.onnx").is_file()  # a failed run leaves the old model whole
    assert not list(tmp_path.glob(".*partial*"))


def test_neural_runtime_runs_without_torch(trained):
    import subprocess
    import sys

    code = f"""
import sys
class NoTorch:
    def find_spec(self, name, path=None, target=None):
        if name == "torch" or name.startswith("torch."):
            raise ImportError("blocked")
sys.meta_path.insert(0, NoTorch())
import numpy as np
from nenv.chain import pipeline
y = pipeline.extend(np.random.default_rng(0).standard_normal(8000) * 0.05, system=pipeline.make_system("neural", model={str(trained.out)!r})).y
assert y.shape == (16000,) and "torch" not in sys.modules
print("ok")
"""
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr


def test_quality_warnings_say_what_a_finished_run_should_not_hide(trained):
    # the shipped model's validation numbers (checkpoints/default/record.json): nothing to say
    shipped = {"val_envelope_lsd_high_db": {"neural": 7.51, "codebook": 9.51}, "val_median_level_error_db": {"neural": -3.93}}
    assert loop.quality_warnings(shipped, {"kept_active_hours": 1.54}) == []
    # a run on two short files for one epoch (measured): worse than its codebook, too loud, too little speech
    poor = {"val_envelope_lsd_high_db": {"neural": 9.27, "codebook": 5.37}, "val_median_level_error_db": {"neural": 3.40}}
    got = loop.quality_warnings(poor, {"kept_active_hours": 0.0015})
    assert len(got) == 3 and "codebook (9.27 vs 5.37 dB)" in got[0] and "+3.40 dB" in got[1] and "0.1 minutes" in got[2]
    edge = {"val_envelope_lsd_high_db": {"neural": 5.0, "codebook": 5.0}, "val_median_level_error_db": {"neural": 0.5}}
    assert len(loop.quality_warnings(edge, {"kept_active_hours": 5 / 60})) == 1  # equal LSD warns; +0.5 dB and 5 min do not
    slightly_loud = {"val_envelope_lsd_high_db": {"neural": 5.0, "codebook": 6.0}, "val_median_level_error_db": {"neural": 1.68}}
    assert "+1.68 dB" in loop.quality_warnings(slightly_loud, {"kept_active_hours": 1.0})[0]  # any systematic over-estimate warns
    assert trained.record["warnings"] == loop.quality_warnings(trained.record["metrics"], trained.record["corpus"])


def test_validation_scoring_uses_the_runs_own_validation_speakers(trained):
    """nenv.train.validate builds its clips from the validation speakers the run recorded (never a
    training speaker), at -26 dBov, and scores the references and the model on each."""
    from nenv.train import validate

    rec = json.loads((trained.out / "record.json").read_text())
    val, train = set(rec["corpus"]["val_speakers"]), set(rec["corpus"]["train_speakers"])
    clips = validate.validation_clips(trained.out, clips_per_voice=2)
    assert clips and {name.split("#")[0] for name, _, _ in clips} <= val
    assert not {name.split("#")[0] for name, _, _ in clips} & train
    for _, group, y in clips:
        assert group in ("female", "male") and y.size % 160 == 0
        assert channel.active_level_dbov(y, sr=16000) == pytest.approx(-26.0, abs=0.5)
    rows = validate.score([trained.out], clips[:1], trims=(None, -6.0))
    assert [r["system"] for r in rows] == ["unextended", "oracle", "true-band", f"neural:{trained.out.name}", f"neural:{trained.out.name} -6 dB"]
    assert rows[2]["lsd_high"] < rows[0]["lsd_high"] - 5  # the true band is the reference's own
    assert rows[4]["level_error_high"] < rows[3]["level_error_high"] - 3  # the trimmed band is quieter


def test_validation_table_counts_wins_against_the_unextended_clip():
    from nenv.train.validate import to_markdown

    rows = [
        {"clip": "a", "group": "female", "system": "unextended", "visqol": 3.0, "pesq_wb": 3.0, "lsd_high": 15.0, "level_error_high": -10.0},
        {"clip": "b", "group": "male", "system": "unextended", "visqol": 3.5, "pesq_wb": 3.0, "lsd_high": 15.0, "level_error_high": -10.0},
        {"clip": "a", "group": "female", "system": "neural:m", "visqol": 3.2, "pesq_wb": 2.0, "lsd_high": 9.0, "level_error_high": -2.0},
        {"clip": "b", "group": "male", "system": "neural:m", "visqol": 3.1, "pesq_wb": 2.0, "lsd_high": 11.0, "level_error_high": -4.0},
    ]
    md = to_markdown(rows)
    assert "| unextended | all | 2 | 3.25 | 3.00 | 15.00 | -10.00 | - |" in md  # no count against itself
    assert "| neural:m | female | 1 | 3.20 | 2.00 | 9.00 | -2.00 | 100% |" in md
    assert "| neural:m | male | 1 | 3.10 | 2.00 | 11.00 | -4.00 | 0% |" in md
    assert "| neural:m | all | 2 | 3.15 | 2.00 | 10.00 | -3.00 | 50% |" in md


def test_guard_range_is_the_central_percentiles_widened_by_the_margin():
    values = np.arange(1001, dtype=float) / 10  # 0.0 .. 100.0 in steps of 0.1
    r = recipe.load(None, overrides=["guard_percentile=99", "level_margin_db=3"])
    assert loop.guard_range(values, r) == pytest.approx((1.0 - 3.0, 99.0 + 3.0))
    r = recipe.load(None, overrides=["guard_percentile=90", "level_margin_db=0.5"])
    assert loop.guard_range(values[::-1], r) == pytest.approx((10.0 - 0.5, 90.0 + 0.5))


def test_validation_envelope_lsd_against_the_envelopes_own_spectra():
    # Equal envelopes: 0 dB. The same shape 4 dB louder: 4 dB at every frequency, so 4 dB. Two shapes at
    # one level: the RMS over 3.4-8 kHz of their dB difference, computed from the fitted envelopes with
    # scipy.signal.freqz (the level fit itself is nenv's, checked in tests/test_features.py).
    from scipy import signal

    from nenv.chain.features import envelope_from_prediction

    rng = np.random.default_rng(4)
    c1, c2 = rng.normal(0, 0.3, (3, 20)) / np.arange(1, 21), rng.normal(0, 0.3, (3, 20)) / np.arange(1, 21)
    lev = np.array([-10.0, -20.0, 0.0])
    np.testing.assert_allclose(loop.envelope_lsd(c1, lev, c1, lev), 0.0, atol=1e-9)
    np.testing.assert_allclose(loop.envelope_lsd(c1, lev, c1, lev + 4.0), 4.0, atol=1e-6)
    got = loop.envelope_lsd(c1, lev, c2, lev)
    a1, g1 = envelope_from_prediction(c1, lev, np.zeros(3))
    a2, g2 = envelope_from_prediction(c2, lev, np.zeros(3))
    w = np.pi * np.fft.rfftfreq(512, 1 / 16000)[np.fft.rfftfreq(512, 1 / 16000) >= 3400] / 8000
    for k in range(3):
        d = 20 * np.log10(np.abs(signal.freqz([g1[k]], a1[k], worN=w)[1]) / np.abs(signal.freqz([g2[k]], a2[k], worN=w)[1]))
        assert got[k] == pytest.approx(np.sqrt(np.mean(d**2)), rel=1e-6)
        assert got[k] > 0.5


def test_the_history_holds_each_epochs_losses_and_level_error_in_db(trained):
    # The training loss is the mean over the epoch's hops of the normalised loss (about 1 for a network
    # that predicts the mean, less once it learns), and the history's validation level error at the best
    # epoch is the record's (the weights that ship), in dB.
    h, m = trained.record["history"], trained.record["metrics"]
    assert all(0.01 < e["train_loss"] < 3.0 for e in h)  # measured 1.2 at the first epoch, 0.048 at the 40th
    assert h[-1]["train_loss"] < h[0]["train_loss"]
    best = h[m["best_epoch"] - 1]
    assert best["val_median_level_error_db"] == pytest.approx(m["val_median_level_error_db"]["neural"], abs=0.01)
    assert abs(best["val_median_level_error_db"]) > 0.05  # not zero by construction (else a scale slip would pass)
    assert abs(m["val_median_level_error_db"]["codebook"]) < 3.0  # the codebook's too (measured -0.14 dB on this corpus)
