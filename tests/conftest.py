"""Shared fixtures: the open wideband test sentences and seeded generators."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

DATA = Path(__file__).parent / "data"
# Two CMU ARCTIC sentences (16 kHz, free licence; see data/COPYING.cmu_arctic and data/README.md).
ARCTIC = [DATA / "arctic_a0007.wav", DATA / "arctic_a0009.wav"]


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(1234)


@pytest.fixture(scope="session")
def arctic_refs():
    """Both ARCTIC sentences at 16 kHz and the nominal -26 dBov level, with their names."""
    from nenv.evaluate import prepare_reference

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
