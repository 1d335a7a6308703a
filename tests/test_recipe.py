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


def _edge_values(key: str) -> list[tuple[object, bool]]:
    """Values at and just past each bound of ``key`` (recipe.LIMITS), each with whether it is allowed."""
    lo, hi, lo_in, hi_in = recipe.LIMITS[key]
    whole = isinstance(getattr(recipe.Recipe(), key), int)
    step = 1 if whole else 1e-9
    out = []
    if lo is not None:
        out += [(lo, lo_in), (lo - step, False), (lo + step, True)]
    if hi is not None:
        out += [(hi, hi_in), (hi + step, False), (hi - step, True)]
    return [(int(v) if whole else float(v), ok) for v, ok in out]


@pytest.mark.parametrize("key", sorted(recipe.LIMITS))
def test_every_numeric_key_is_held_to_its_range_at_its_edges(key):
    """Each bound of recipe.LIMITS is enforced exactly where it lies, and the message names the key and range."""
    for value, ok in _edge_values(key):
        # the level range's other end kept out of the way (min <= max) while one edge is tried
        extra = [e for e in ("level_min_dbov=-60", "level_max_dbov=0") if key.startswith("level_") and not e.startswith(key)]
        if ok:
            assert getattr(recipe.load(None, overrides=[*extra, f"{key}={value!r}"]), key) == value
        else:
            with pytest.raises(ConfigError, match=rf"'{key}' must be (at least|more than|at most|less than) .*got"):
                recipe.load(None, overrides=[*extra, f"{key}={value!r}"])


@pytest.mark.parametrize(
    "override, needle",
    [
        # what each bound protects (worked examples, beside the table's own edges above)
        ("guard_percentile=150", "guard_percentile"),  # numpy.percentile refuses it, at the end of training
        ("guard_percentile=40", "guard_percentile"),  # the guard's range would be inverted: every hop rejected
        ("dropout=1.0", "dropout"),  # torch.nn.Dropout(p=1) zeroes every activation
        ("learning_rate=0", "learning_rate"),
        ("hidden=[64, 0]", "hidden"),
        ("hidden=[]", "hidden"),
        ("learning_rate=nan", "finite"),  # TOML spells nan and inf: both refused for every number
        ("level_min_dbov=-inf", "finite"),
        ("min_snr_db=inf", "finite"),
        ("level_min_dbov=-10", "min <= max"),  # above the default level_max_dbov (-16)
        ("snr_max_db=10", "min <= max"),
    ],
)
def test_values_that_would_fail_late_or_silently_are_refused_at_once(override, needle):
    with pytest.raises(ConfigError, match=needle):
        recipe.load(None, overrides=[override])


def test_the_bounds_that_protect_something_sit_where_it_begins():
    """Worked examples on both sides of the bounds that guard a later step (the edge test above takes
    the table as given; these pin the table)."""
    import numpy as np

    # numpy.percentile takes q up to 100 and refuses more: the guard's range is taken at the end of training
    assert np.isfinite(np.percentile(np.arange(10.0), 100.0))
    with pytest.raises(ValueError):
        np.percentile(np.arange(10.0), 100.5)
    assert recipe.load(None, overrides=["guard_percentile=100"]).guard_percentile == 100
    for bad in ("guard_percentile=100.5", "guard_percentile=50"):  # at 50 the range is one value: every hop rejected
        with pytest.raises(ConfigError, match="guard_percentile"):
            recipe.load(None, overrides=[bad])
    assert recipe.load(None, overrides=["guard_percentile=50.5"]).guard_percentile == 50.5
    # 16 kHz audio holds nothing above 8000 Hz (Nyquist): a cutoff there keeps every file, above it none
    assert recipe.load(None, overrides=["min_cutoff_hz=8000"]).min_cutoff_hz == 8000
    with pytest.raises(ConfigError, match="min_cutoff_hz"):
        recipe.load(None, overrides=["min_cutoff_hz=8000.5"])
    # fractions and probabilities run from 0 to 1
    for key in ("max_clipped_fraction", "noise_probability"):
        assert getattr(recipe.load(None, overrides=[f"{key}=1"]), key) == 1.0
        with pytest.raises(ConfigError, match=key):
            recipe.load(None, overrides=[f"{key}=1.01"])
    # one layer of one unit is a network; a layer of none is not
    assert recipe.load(None, overrides=["hidden=[1]"]).hidden == [1]
    # a range of one value is a fixed level or SNR
    r = recipe.load(None, overrides=["level_min_dbov=-20", "level_max_dbov=-20", "snr_min_db=30", "snr_max_db=30"])
    assert (r.level_min_dbov, r.level_max_dbov, r.snr_min_db, r.snr_max_db) == (-20, -20, 30, 30)


def test_speaker_rules_and_override_values_are_read_exactly():
    for rule in ("depth:x", "depth:", "parent2", "xxxxxx1"):
        with pytest.raises(ConfigError, match="speaker_rule"):
            recipe.load(None, overrides=[f"speaker_rule={rule}"])
    assert recipe.load(None, overrides=["speaker_rule=depth:12"]).speaker_rule == "depth:12"
    assert recipe.load(None, overrides=["corpus=/data/a=b"]).corpus == "/data/a=b"  # only the first '=' splits
    with pytest.raises(ConfigError, match="must be a number"):
        recipe.load(None, overrides=["learning_rate=true"])  # a TOML boolean is not a number
