"""Training killed at any moment leaves no model folder (complete or absent) and resumes to the same model."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

pytest.importorskip("torch")

from nenv.errors import ConfigError  # noqa: E402
from nenv.train import loop, recipe  # noqa: E402
from tests.conftest import as_if_from_a_terminal  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
QUICK = ["epochs=30", "patience=100", "hidden=[64, 64]", "codebook_size=8", "min_snr_db=0", "val_fraction=0.3", "workers=2", "copies=1"]


def _weights(folder: Path) -> dict:
    import torch

    return torch.load(folder / "model.pt", weights_only=True)["state_dict"]


def test_killed_training_resumes_to_the_same_model(synthetic_corpus, tmp_path):
    import torch

    r = recipe.load(None, overrides=[f'corpus="{synthetic_corpus}"', *QUICK])
    ref = loop.train(r, tmp_path / "ref")
    out = tmp_path / "m"
    partial = loop.partial_folder(out)
    cmd = [sys.executable, "-m", "nenv", "train", "--out", str(out), "--set", f"corpus={synthetic_corpus}"] + [a for q in QUICK for a in ("--set", q)]
    # kill 1: during the survey or features (before any epoch); kill 2: after some epochs
    for wait_for in (None, loop.RESUME_FILE):
        proc = subprocess.Popen(cmd + (["--resume"] if partial.exists() else []), cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True)
        deadline = time.monotonic() + 120
        if wait_for is None:
            while not (partial / "features").is_dir() and time.monotonic() < deadline and proc.poll() is None:
                time.sleep(0.05)
        else:
            while not (partial / wait_for).is_file() and time.monotonic() < deadline and proc.poll() is None:
                time.sleep(0.01)
        assert proc.poll() is None, proc.communicate()[1].decode()[-2000:]
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        assert not out.exists(), "a killed run must not leave a model folder"
        assert partial.is_dir()
    state = torch.load(partial / loop.RESUME_FILE, weights_only=True)
    assert 1 <= state["epoch"] < 30
    # without --resume the interrupted run is not silently thrown away
    with pytest.raises(ConfigError, match="--resume"):
        loop.train(r, out)
    with pytest.raises(ConfigError, match="another recipe"):
        loop.train(recipe.load(None, overrides=[f'corpus="{synthetic_corpus}"', *QUICK, "epochs=31"]), out, resume=True)
    res = loop.train(r, out, resume=True)
    assert [h["epoch"] for h in res.record["history"]] == list(range(1, 31))
    assert res.record["record_id"] == state["record_id"]
    assert not partial.exists() and sorted(p.name for p in out.iterdir()) == sorted(p.name for p in ref.out.iterdir())
    a, b = _weights(ref.out), _weights(out)
    assert a.keys() == b.keys()
    for k in a:  # same data, same seeds, same state after every epoch: the same numbers
        assert torch.equal(a[k], b[k]), k
    assert [h["val_loss"] for h in res.record["history"]] == [h["val_loss"] for h in ref.record["history"]]


def test_nothing_to_resume(synthetic_corpus, tmp_path):
    r = recipe.load(None, overrides=[f'corpus="{synthetic_corpus}"', *QUICK])
    with pytest.raises(ConfigError, match="nothing to resume"):
        loop.train(r, tmp_path / "none", resume=True)


def test_feature_extraction_on_a_dask_cluster_matches_local(synthetic_corpus, tmp_path):
    distributed = pytest.importorskip("distributed")
    import numpy as np

    from nenv.chain.features import FeatureSettings
    from nenv.train import corpus, dataset

    r = recipe.load(None, overrides=[f'corpus="{synthetic_corpus}"', *QUICK])
    files = [f.path for f in corpus.scan(r.corpus)][:6]
    local, _ = dataset.build(files, recipe=r, settings=FeatureSettings(), workers=2)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        remote, _ = dataset.build(files, recipe=r, settings=FeatureSettings(), scheduler=cluster.scheduler_address)
        reps = corpus.survey(corpus.scan(r.corpus)[:4], r, scheduler=cluster.scheduler_address)
    for name in ("x", "current", "ceps", "level", "a_nb", "group"):
        assert np.array_equal(getattr(local, name), getattr(remote, name)), name
    assert [rep.path for rep in reps] == [f.path for f in corpus.scan(r.corpus)[:4]] and all(rep.duration_s > 0 for rep in reps)


def test_a_finished_run_replaces_an_old_model_folder_whole_and_leaves_nothing_beside_it(tmp_path):
    """`train --force` over an existing model folder: the finished folder takes its place in one rename,
    the old one goes (only then), and no partial or old folder is left beside it."""
    from nenv.train import workdir

    out = tmp_path / "model"
    out.mkdir()
    (out / "nenv.json").write_text("old")
    (out / "stale.png").write_text("old figure")
    work = workdir.partial_folder(out)
    assert work == tmp_path / ".model.partial"
    work.mkdir()
    (work / "nenv.json").write_text("new")
    workdir.install(work, out)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model"]
    assert (out / "nenv.json").read_text() == "new" and not (out / "stale.png").exists()
    # no folder there yet: moved into place
    other = tmp_path / "first"
    work = workdir.partial_folder(other)
    work.mkdir()
    (work / "nenv.json").write_text("first")
    workdir.install(work, other)
    assert (other / "nenv.json").read_text() == "first" and not work.exists()


def test_a_run_stops_after_patience_epochs_without_gain_and_resumes_stopped(synthetic_corpus, tmp_path, monkeypatch):
    """A learning rate too small to move the validation loss (by the 1e-5 a gain must exceed): the best
    epoch stays the first and the run stops `patience` epochs later, not at `epochs`. Killed after that
    last epoch (in the codebook fit that follows), the resumed run stays stopped: the same four epochs."""
    r = recipe.load(None, overrides=[f'corpus="{synthetic_corpus}"', *QUICK, "epochs=20", "patience=3", "learning_rate=1e-12"])
    out = tmp_path / "m"

    def killed(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(loop.Codebook, "fit", killed)
    with pytest.raises(KeyboardInterrupt):
        loop.train(r, out)
    monkeypatch.undo()
    assert not out.exists() and (loop.partial_folder(out) / loop.RESUME_FILE).is_file()
    res = loop.train(r, out, resume=True)
    h, m = res.record["history"], res.record["metrics"]
    assert [e["epoch"] for e in h] == [1, 2, 3, 4]
    assert m["best_epoch"] == 1
    assert max(e["val_loss"] for e in h) - min(e["val_loss"] for e in h) < 1e-5


def test_ctrl_c_in_nenv_train_keeps_the_run_and_the_same_command_with_resume_finishes_it(synthetic_corpus, tmp_path):
    """Ctrl-C (SIGINT to the terminal's process group) during the epochs: exit status 130 (the shell's
    128 + SIGINT, common practice), a message naming the kept folder and --resume, no model folder;
    the same command with --resume then finishes, the kept state consumed."""
    out = tmp_path / "m"
    partial = loop.partial_folder(out)
    quick = [q for q in QUICK if not q.startswith("epochs=")] + ["epochs=6"]
    cmd = [sys.executable, "-m", "nenv", "train", "--out", str(out), "--set", f"corpus={synthetic_corpus}"] + [a for q in quick for a in ("--set", q)]
    proc = subprocess.Popen(cmd, cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True,
                            preexec_fn=as_if_from_a_terminal)
    deadline = time.monotonic() + 120
    while not (partial / loop.RESUME_FILE).is_file() and time.monotonic() < deadline and proc.poll() is None:
        time.sleep(0.01)
    assert proc.poll() is None, proc.communicate()[1][-2000:]
    os.killpg(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err[-2000:]
    assert "training interrupted" in err and str(partial) in err and "--resume" in err, err[-2000:]
    assert not out.exists() and (partial / loop.RESUME_FILE).is_file()
    done = subprocess.run(cmd + ["--resume"], cwd=REPO, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    assert (out / "model.onnx").is_file() and not partial.exists()
