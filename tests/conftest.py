"""Shared fixtures: the open wideband test sentences and seeded generators."""

from __future__ import annotations

from pathlib import Path

import os

import numpy as np
import pytest
from hypothesis import settings

# Property tests run the same examples on every run ("ci", the default), so CI is reproducible and a
# red run means a change broke something. Search fresh examples with NENV_HYPOTHESIS=explore
# (random examples on every run; 2000 where a test does not set its own count); anything found goes
# back in as an @example (as in tests/test_fuzz.py).
settings.register_profile("ci", derandomize=True)
settings.register_profile("explore", derandomize=False, max_examples=2000)
settings.load_profile(os.environ.get("NENV_HYPOTHESIS", "ci"))

DATA = Path(__file__).parent / "data"
# Two CMU ARCTIC sentences (16 kHz, free licence; see data/COPYING.cmu_arctic and data/README.md).
ARCTIC = [DATA / "arctic_a0007.wav", DATA / "arctic_a0009.wav"]


def as_if_from_a_terminal() -> None:
    """``preexec_fn`` for a child a test stops with Ctrl-C (SIGINT): the disposition a terminal's child
    has. A test run started in the background by a non-interactive shell inherits SIGINT ignored, and a
    Python child then keeps it ignored and never raises KeyboardInterrupt."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_DFL)


def env_without_unbuffered_output() -> dict:
    """This process's environment less ``PYTHONUNBUFFERED`` (some machines set it for every process), for
    a child whose own flushing a test checks: with it set, a missing flush goes unseen."""
    return {k: v for k, v in os.environ.items() if k != "PYTHONUNBUFFERED"}


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(1234)


@pytest.fixture(scope="session")
def arctic_refs():
    """Both ARCTIC sentences at 16 kHz and the nominal -26 dBov level, with their names."""
    from nenv.report.evaluate import prepare_reference

    return [(p.stem, prepare_reference(p)) for p in ARCTIC]


# A small recipe for the synthetic corpus (tests/synthetic.py): about 15 s of training on 2 cores.
SYNTHETIC_RECIPE = ["epochs=40", "codebook_size=16", "hidden=[128, 128]", "min_snr_db=0", "val_fraction=0.3", "patience=10", "workers=2"]


@pytest.fixture(scope="session")
def synthetic_corpus(tmp_path_factory):
    from tests import synthetic

    root = tmp_path_factory.mktemp("corpus")
    synthetic.write_corpus(root, n_speakers=10, files_per_speaker=4, seconds=3.0, seed=0)
    return root


@pytest.fixture(scope="session")
def trained(synthetic_corpus, tmp_path_factory):
    """A model trained on the synthetic corpus (needs the train extra)."""
    pytest.importorskip("torch")
    from nenv.train import loop, recipe

    r = recipe.load(None, overrides=[f'corpus="{synthetic_corpus}"', *SYNTHETIC_RECIPE])
    out = tmp_path_factory.mktemp("models") / "syn"
    return loop.train(r, out, cache_dir=str(tmp_path_factory.mktemp("cache")))


def narrowed_guard(ck):
    """A copy of checkpoint ``ck`` whose guard accepts only 16 dB of level around the middle of its
    range, so that it rejects a good share of real speech's hops (the shipped guard rejects almost
    none): counts of rejected hops are then worth comparing."""
    import dataclasses

    mid = 0.5 * (ck.limits.level_min_db + ck.limits.level_max_db)
    return dataclasses.replace(ck, limits=dataclasses.replace(ck.limits, level_min_db=mid - 8.0, level_max_db=mid + 8.0))


def perturb_predictions(ck, blocks: dict, monkeypatch) -> None:
    """Make ``ck.predict`` fail on chosen hops, one way per guard check.

    blocks : {Check: hop indices}. NONFINITE puts inf in a cepstrum, LEVEL a +90 dB level,
    UNSTABLE a resonance so sharp its reflection coefficient reaches 1, MISMATCH a telephone band
    unlike the input's. Hops are counted across calls in order.
    """
    from nenv.chain.guard import Check

    original = ck.predict
    pos = {"n": 0}

    def perturbed(x):
        ceps, level = original(x)
        idx = np.arange(pos["n"], pos["n"] + x.shape[0])
        pos["n"] += x.shape[0]
        n = np.arange(1, ceps.shape[1] + 1)
        for check, hops in blocks.items():
            sel = np.isin(idx, list(hops))
            if check == Check.NONFINITE:
                ceps[sel, 2] = np.inf
            elif check == Check.LEVEL:
                level[sel] = 90.0
            elif check == Check.UNSTABLE:
                ceps[sel] = 2 * 0.99995**n * np.cos(2 * np.pi * 5000 / 16000 * n) / n * 40
            elif check == Check.MISMATCH:
                ceps[sel, :8] = -ceps[sel, :8] * 3
        return ceps, level

    monkeypatch.setattr(ck, "predict", perturbed)


def missing_tool(msg: str) -> None:
    """A test's outside tool (a browser, GStreamer, ...) is missing: fail where CI installed them
    (NENV_INTEROP=required, set by .ci/run, so a broken install is not hidden), skip elsewhere."""
    if os.environ.get("NENV_INTEROP") == "required":
        pytest.fail(msg)
    pytest.skip(msg)


def open_descriptors() -> int:
    """How many file descriptors this process holds (Linux's /proc/self/fd); the test is skipped where
    the system does not list them. Tests of "a refused or failed open leaves nothing open" compare two
    counts."""
    if not os.path.isdir("/proc/self/fd"):
        pytest.skip("this system does not list a process's open descriptors (/proc/self/fd)")
    return len(os.listdir("/proc/self/fd"))


def run_bounded(cmd: list[str], *, timeout: float = 300, cwd=None, env=None):
    """``subprocess.run(cmd)`` capturing text, in its own process group, which is killed whole if it
    runs longer than ``timeout`` seconds (then the test fails, leaving no worker behind): for
    commands whose failure mode is never to end."""
    import signal
    import subprocess

    p = subprocess.Popen(cmd, cwd=cwd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        out, err = p.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        os.killpg(p.pid, signal.SIGKILL)
        out, err = p.communicate()
        pytest.fail(f"{' '.join(cmd[:4])} ... did not end within {timeout:g} s:\n{err[-3000:]}")
    return subprocess.CompletedProcess(cmd, p.returncode, out, err)
