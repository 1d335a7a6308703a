"""Give a model trained before the low band existed its guard's low-band range, from its own training data.

``python -m nenv.train.low_limits MODEL_FOLDER``: rebuilds the training pairs of the run that made
the model (the files its ``survey.csv`` kept, minus its recorded validation speakers, with the
recipe in its ``nenv.json``: the same augmentation), takes the range of their true 50-300 Hz
levels as ``nenv train`` now does (:func:`nenv.train.loop.guard_range`), and writes it into the
model's ``nenv.json`` (atomically). The corpus files must be where the survey found them (relative
paths from the folder the training ran in: run this from there too).
"""

from __future__ import annotations

import argparse
import csv
import json
from pathlib import Path

from nenv.chain.features import FeatureSettings
from nenv.media.files import write_text
from nenv.train import dataset
from nenv.train.loop import guard_range
from nenv.train.recipe import Recipe


def training_files(model: Path) -> list[str]:
    """The kept files of the model's training speakers (its survey minus its validation speakers)."""
    record = json.loads((model / "record.json").read_text(encoding="utf-8"))
    val = set(record["corpus"]["val_speakers"])
    with open(model / "survey.csv", newline="", encoding="utf-8") as fh:
        return [r["path"] for r in csv.DictReader(fh) if not r["excluded"] and r["speaker"] not in val]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("model", type=Path)
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    info = json.loads((args.model / "nenv.json").read_text(encoding="utf-8"))
    recipe = Recipe(**{k: tuple(v) if isinstance(v, list) else v for k, v in info["recipe"].items()})
    settings = FeatureSettings.from_dict(info["features"])
    files = training_files(args.model)
    pairs, facts = dataset.build(files, recipe=recipe, settings=settings, workers=args.workers)
    lo, hi = guard_range(pairs.low, recipe)
    info["guard"]["low_min_db"], info["guard"]["low_max_db"] = lo, hi
    write_text(args.model / "nenv.json", json.dumps(info, indent=1) + "\n")
    print(f"{len(files)} files, {pairs.low.size} hops ({facts['wall_s']:.0f} s): low band {lo:.1f} to {hi:.1f} dB re the narrowband frame")


if __name__ == "__main__":
    main()
