"""The shipped model still meets its own card: recompute evaluation.json's numbers on the held-out clips.

A change anywhere in the signal chain, the features or the runtime that degrades quality moves these
numbers and fails here. If a change improves them on purpose, regenerate the card:
python -m nenv.train.model_card checkpoints/default
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from nenv.chain import checkpoint

DEFAULT = Path(__file__).resolve().parents[1] / "checkpoints" / "default"
pytestmark = pytest.mark.skipif(not (DEFAULT / "model.onnx").is_file(), reason="no shipped default model in this checkout")

LSD_TOL = 0.05  # dB: float and library differences only
LEVEL_TOL = 0.1  # dB
PESQ_TOL = 0.03  # MOS
VISQOL_TOL = 0.03  # MOS


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
    assert now.keys() == then.keys()
    for key, r in then.items():
        for m in ("lsd_high", "lsd_full", "lsd_env_high", "lsd_env_full"):
            assert now[key][m] == pytest.approx(r[m], abs=LSD_TOL), (key, m)
        assert now[key]["level_error_high"] == pytest.approx(r["level_error_high"], abs=LEVEL_TOL), key
        assert now[key]["pesq_wb"] == pytest.approx(r["pesq_wb"], abs=PESQ_TOL, nan_ok=True), key
        assert now[key]["visqol"] == pytest.approx(r["visqol"], abs=VISQOL_TOL), key
    assert recomputed["guard_rejection_rate"] == pytest.approx(card["guard_rejection_rate"], abs=0.01)


def test_model_beats_the_simple_methods(recomputed):
    """On unseen real speakers the network is closer to the true band than its codebook and the
    no-model imaging baseline by the spectral measures, scores above both by WB-PESQ (ITU-T P.862.2)
    and above the codebook by ViSQOL (speech mode), and never adds a systematically too loud band."""
    from nenv.train.model_card import _mean

    table = recomputed["table"]
    nn = _mean(table, "neural", "lsd_high")
    assert nn < _mean(table, "codebook", "lsd_high") - 0.5
    assert nn < _mean(table, "imaging", "lsd_high") - 3.0
    assert nn < _mean(table, "oracle", "lsd_high") + 3.5
    assert _mean(table, "neural", "pesq_wb") > _mean(table, "codebook", "pesq_wb") + 0.3
    assert _mean(table, "neural", "pesq_wb") > _mean(table, "imaging", "pesq_wb") + 0.5
    assert _mean(table, "neural", "visqol") > _mean(table, "codebook", "visqol") + 0.2
    assert _mean(table, "neural", "visqol") >= _mean(table, "imaging", "visqol")
    for g in ("female", "male"):
        lev = np.median([r["level_error_high"] for r in table if not r["clip"].startswith("mean") and r["system"] == "neural" and r["group"] == g])
        assert -10.0 <= lev <= 0.5, g  # never a systematic over-estimate; and a band, not nothing
    assert recomputed["guard_rejection_rate"] < 0.05


def test_the_card_states_every_goal_and_whether_it_is_met(recomputed):
    """The model card's goals table is computed from the recomputed numbers, met or not."""
    from nenv.train.model_card import goals

    text = (DEFAULT / "MODEL.md").read_text()
    for goal, value, met in goals(recomputed["table"], recomputed["guard_rejection_rate"]):
        assert f"| {goal} | {value} | {'yes' if met else '**no**'} |" in text


def test_shipped_folder_is_small_and_loads():
    size = sum(p.stat().st_size for p in DEFAULT.iterdir())
    assert size < 5 * 2**20
    ck = checkpoint.load(DEFAULT)
    assert ck.info["record_id"] == json.loads((DEFAULT / "record.json").read_text())["record_id"]
    assert "estimated, not recorded" in (DEFAULT / "MODEL.md").read_text()
    assert checkpoint.default_path() is not None
