"""Training recipes: flat, commented TOML files in configs/, with command-line overrides.

Every key must be a field of :class:`Recipe`, have its type and, for a number, be finite and lie in
its range (:data:`LIMITS`); anything else is refused with a message naming the key, before any work.
"""

from __future__ import annotations

import math
import os
import tomllib
import typing
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path

from nenv.errors import ConfigError


@dataclass
class Recipe:
    """One training run, start to finish. Units in the names; see configs/default.toml for comments."""

    # corpus and survey
    corpus: str = ""
    manifest: str = ""
    speaker_rule: str = "parent"
    min_active_s: float = 0.3
    max_clipped_fraction: float = 0.002
    min_snr_db: float = 20.0
    exclude_bandlimited: bool = True
    min_cutoff_hz: float = 7300.0
    val_fraction: float = 0.2
    split_seed: int = 0
    val_speakers: list[str] = field(default_factory=list)
    train_speakers: list[str] = field(default_factory=list)
    max_files: int = 0
    # paired features and augmentation
    copies: int = 2
    warp_max: float = 1.0
    laws: list[str] = field(default_factory=lambda: ["none", "mulaw", "alaw"])
    level_min_dbov: float = -36.0
    level_max_dbov: float = -16.0
    noise_probability: float = 0.3
    snr_min_db: float = 20.0
    snr_max_db: float = 45.0
    active_range_db: float = 50.0
    workers: int = 2
    # model
    context: int = 4
    hidden: list[int] = field(default_factory=lambda: [256, 256])
    dropout: float = 0.0
    # optimisation
    epochs: int = 60
    batch_size: int = 512
    learning_rate: float = 2e-3
    weight_decay: float = 1e-5
    patience: int = 8
    loss: str = "cepstra"
    level_weight: float = 1.0
    over_weight: float = 4.0
    seed: int = 0
    threads: int = 2
    # codebook and guard
    codebook_size: int = 64
    stability_margin: float = 1e-3
    level_margin_db: float = 3.0
    guard_percentile: float = 99.9
    # calibration written to the model folder
    band_trim_db: float = 0.0

    def to_dict(self) -> dict:
        return asdict(self)


def _check_type(key: str, value, tp) -> object:
    origin = typing.get_origin(tp)
    if origin is list:
        (inner,) = typing.get_args(tp)
        if not isinstance(value, list):
            raise ConfigError(f"recipe key '{key}' must be a list of {inner.__name__}, got {value!r}")
        try:
            return [_check_type(key, v, inner) for v in value]
        except ConfigError:
            raise ConfigError(f"recipe key '{key}' must be a list of {inner.__name__}, got {value!r}") from None
    if tp is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"recipe key '{key}' must be true or false, got {value!r}")
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"recipe key '{key}' must be a whole number, got {value!r}")
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"recipe key '{key}' must be a number, got {value!r}")
        return float(value)
    if tp is str:
        if not isinstance(value, str):
            raise ConfigError(f"recipe key '{key}' must be a string, got {value!r}")
        return value
    raise AssertionError(f"unhandled recipe type {tp}")


def _parse_override(item: str) -> tuple[str, object]:
    if "=" not in item:
        raise ConfigError(f"override '{item}' must look like key=value")
    key, raw = item.split("=", 1)
    key = key.strip()
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw  # a bare word is taken as a string
    return key, value


def load(path: str | os.PathLike | None, *, overrides: typing.Sequence[str] = ()) -> Recipe:
    """Read a recipe file (or start from defaults) and apply ``key=value`` overrides."""
    data: dict = {}
    if path is not None:
        p = Path(path)
        if not p.is_file():
            raise ConfigError(f"recipe '{p}' does not exist")
        try:
            data = tomllib.loads(p.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
            raise ConfigError(f"recipe '{p}' is not valid TOML: {e}") from e
        nested = [k for k, v in data.items() if isinstance(v, dict)]
        if nested:
            raise ConfigError(f"recipe '{p}' must be flat (key = value lines), but has tables {nested}")
        for key in ("corpus", "manifest"):  # relative paths are relative to the recipe's folder
            if isinstance(data.get(key), str) and data[key]:
                c = Path(data[key]).expanduser()
                data[key] = str(c if c.is_absolute() else (p.parent / c).resolve())
    for item in overrides:
        k, v = _parse_override(item)
        data[k] = v
    types = typing.get_type_hints(Recipe)
    known = {f.name for f in fields(Recipe)}
    unknown = sorted(set(data) - known)
    if unknown:
        raise ConfigError(f"unknown recipe {'key' if len(unknown) == 1 else 'keys'} {unknown}; known keys: {', '.join(sorted(known))}")
    recipe = Recipe(**{k: _check_type(k, v, types[k]) for k, v in data.items()})
    _validate(recipe)
    return recipe


# Allowed values of the numeric keys: (lowest, highest, lowest allowed, highest allowed); None = no bound.
# Every number must also be finite (TOML can spell nan and inf).
LIMITS: dict[str, tuple[float | None, float | None, bool, bool]] = {
    "min_active_s": (0, None, True, True),
    "max_clipped_fraction": (0, 1, True, True),
    "min_cutoff_hz": (0, 8000, False, True),
    "val_fraction": (0, 1, False, False),
    "split_seed": (0, None, True, True),
    "max_files": (0, None, True, True),  # 0: every file
    "copies": (1, None, True, True),
    "warp_max": (1.0, 1.3, True, True),  # 1.0: off
    "level_min_dbov": (None, 0, True, True),
    "level_max_dbov": (None, 0, True, True),
    "noise_probability": (0, 1, True, True),
    "active_range_db": (0, None, False, True),
    "workers": (1, None, True, True),
    "context": (0, None, True, True),
    "dropout": (0, 1, True, False),
    "epochs": (1, None, True, True),
    "batch_size": (1, None, True, True),
    "learning_rate": (0, None, False, True),
    "weight_decay": (0, None, True, True),
    "patience": (1, None, True, True),
    "level_weight": (0, None, True, True),
    "over_weight": (0, None, True, True),
    "seed": (0, None, True, True),
    "threads": (1, None, True, True),
    "codebook_size": (2, None, True, True),
    "stability_margin": (0, 1, True, False),
    "level_margin_db": (0, None, True, True),
    "guard_percentile": (50, 100, False, True),  # the guard's range spans the central part of the training values
}


def _within(value: float, lo: float | None, hi: float | None, lo_in: bool, hi_in: bool) -> bool:
    """Whether ``value`` lies in the range (a NaN lies in none)."""
    above = lo is None or (value >= lo if lo_in else value > lo)
    below = hi is None or (value <= hi if hi_in else value < hi)
    return bool(above and below)


def _range_words(lo: float | None, hi: float | None, lo_in: bool, hi_in: bool) -> str:
    """A range in words: 'at least 1', 'more than 0 and at most 8000', ..."""
    parts = ([f"{'at least' if lo_in else 'more than'} {lo:g}"] if lo is not None else []) + ([f"{'at most' if hi_in else 'less than'} {hi:g}"] if hi is not None else [])
    return " and ".join(parts)


def _validate(r: Recipe) -> None:
    from nenv.dsp.g711 import LAWS

    bad = [law for law in r.laws if law not in LAWS]
    if bad or not r.laws:
        raise ConfigError(f"recipe key 'laws' must list some of {LAWS}, got {r.laws}")
    for key, value in asdict(r).items():
        if isinstance(value, float) and not math.isfinite(value):
            raise ConfigError(f"recipe key '{key}' must be a finite number, got {value}")
        if key in LIMITS and not _within(value, *LIMITS[key]):
            raise ConfigError(f"recipe key '{key}' must be {_range_words(*LIMITS[key])}, got {value:g}")
    if not r.hidden or min(r.hidden) < 1:
        raise ConfigError(f"recipe key 'hidden' must list the width of each hidden layer, each at least 1, got {r.hidden}")
    if not (r.speaker_rule == "parent" or r.speaker_rule.startswith("depth:") and r.speaker_rule[6:].isdigit()):
        raise ConfigError(f"recipe key 'speaker_rule' must be 'parent' or 'depth:N', got {r.speaker_rule!r}")
    if r.loss not in ("cepstra", "spectrum"):
        raise ConfigError(f"recipe key 'loss' must be 'cepstra' or 'spectrum', got {r.loss!r}")
    from nenv.chain.checkpoint import check_trim

    check_trim(r.band_trim_db, what="recipe key 'band_trim_db'")
    if r.level_min_dbov > r.level_max_dbov or r.snr_min_db > r.snr_max_db:
        raise ConfigError("recipe ranges must have min <= max (level_*_dbov, snr_*_db)")
