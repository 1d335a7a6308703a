"""Training recipes: flat TOML, typed, unknown keys refused, overrides from the command line."""

from __future__ import annotations

from pathlib import Path

import pytest

from nenv.errors import ConfigError
from nenv.train import recipe

CONFIGS = Path(__file__).resolve().parents[1] / "configs"


@pytest.mark.parametrize("path", sorted(CONFIGS.glob("*.toml")), ids=lambda p: p.name)
def test_shipped_recipes_load(path):
    r = recipe.load(path)
    assert r.epochs >= 1 and r.laws


def test_overrides_and_types(tmp_path):
    p = tmp_path / "r.toml"
    p.write_text('# a comment\nepochs = 5\nhidden = [64, 32]\ncorpus = "data"\n')
    r = recipe.load(p, overrides=["epochs=7", "laws=['mulaw']", "speaker_rule=depth:1", "learning_rate=1e-3"])
    assert r.epochs == 7 and r.hidden == [64, 32] and r.laws == ["mulaw"] and r.speaker_rule == "depth:1"
    assert r.corpus == str((tmp_path / "data").resolve())  # relative to the recipe file
    assert isinstance(r.learning_rate, float)


@pytest.mark.parametrize(
    "text, needle",
    [
        ("epoch = 5\n", "unknown recipe key"),
        ('epochs = "five"\n', "whole number"),
        ("epochs = 2.5\n", "whole number"),
        ("exclude_bandlimited = 1\n", "true or false"),
        ("hidden = [64, 'x']\n", "list of int"),
        ("[model]\nhidden = [1]\n", "flat"),
        ("laws = ['ulaw']\n", "laws"),
        ("val_fraction = 1.5\n", "val_fraction"),
        ("epochs = \n", "not valid TOML"),
    ],
)
def test_bad_recipes_are_refused(tmp_path, text, needle):
    p = tmp_path / "r.toml"
    p.write_text(text)
    with pytest.raises(ConfigError, match=needle):
        recipe.load(p)


def test_bad_overrides_are_refused():
    with pytest.raises(ConfigError, match="key=value"):
        recipe.load(None, overrides=["epochs"])
    with pytest.raises(ConfigError, match="unknown"):
        recipe.load(None, overrides=["nonsense=1"])
    with pytest.raises(ConfigError, match="does not exist"):
        recipe.load("/no/such/recipe.toml")
