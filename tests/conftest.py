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
