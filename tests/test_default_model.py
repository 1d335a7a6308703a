"""The shipped model still meets its own card: recompute evaluation.json's numbers on the committed clips.

A change anywhere in the signal chain, the features or the runtime that degrades quality moves these
numbers and fails here. If a change improves them on purpose, regenerate the card:
python -m nenv.train.model_card checkpoints/default
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from nenv import checkpoint

DEFAULT = Path(__file__).resolve().parents[1] / "checkpoints" / "default"
pytestmark = pytest.mark.skipif(not (DEFAULT / "model.onnx").is_file(), reason="no shipped default model in this checkout")

LSD_TOL = 0.05  # dB: float and library differences only
LEVEL_TOL = 0.1  # dB
PESQ_TOL = 0.03  # MOS


@pytest.fixture(scope="module")
def recomputed():
    from nenv.train.model_card import measure

    return measure(DEFAULT)


@pytest.fixture(scope="module")
def card():
    return json.loads((DEFAULT / "evaluation.json").read_text())


def _rows(table):
    return {(r["clip"], r["law"], r["system"]): r for r in table}


def test_numbers_match_the_card(recomputed, card):
    now, then = _rows(recomputed["table"]), _rows(card["table"])
    assert then.keys() <= now.keys()  # a card may predate a system added to the comparison since
    for key, r in then.items():
        for m in ("lsd_high", "lsd_full", "lsd_env_high", "lsd_env_full"):
            assert now[key][m] == pytest.approx(r[m], abs=LSD_TOL), (key, m)
        assert now[key]["level_error_high"] == pytest.approx(r["level_error_high"], abs=LEVEL_TOL), key
        assert now[key]["pesq_wb"] == pytest.approx(r["pesq_wb"], abs=PESQ_TOL), key
    assert recomputed["guard_rejection_rate"] == pytest.approx(card["guard_rejection_rate"], abs=0.01)


def test_model_beats_the_simple_methods(recomputed):
    rows = _rows(recomputed["table"])
    for law in ("none", "mulaw"):
        nn = rows[("mean", law, "neural")]
        assert nn["lsd_high"] < rows[("mean", law, "codebook")]["lsd_high"] - 1.0
        assert nn["lsd_high"] < rows[("mean", law, "imaging")]["lsd_high"] - 5.0
        assert nn["lsd_high"] < rows[("mean", law, "oracle")]["lsd_high"] + 3.0
        assert -3.0 <= nn["level_error_high"] <= 0.5  # never a systematic over-estimate
    assert recomputed["guard_rejection_rate"] < 0.05


def test_shipped_folder_is_small_and_loads():
    size = sum(p.stat().st_size for p in DEFAULT.iterdir())
    assert size < 5 * 2**20
    ck = checkpoint.load(DEFAULT)
    assert ck.info["record_id"] == json.loads((DEFAULT / "record.json").read_text())["record_id"]
    assert "estimated, not recorded" in (DEFAULT / "MODEL.md").read_text()
    assert checkpoint.default_path() is not None
