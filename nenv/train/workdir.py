"""A training run's working folder: made beside the output, kept after a kill for --resume, moved into place when whole."""

from __future__ import annotations

import json
import os
import shutil
import uuid
from pathlib import Path

from nenv.errors import ConfigError
from nenv.train.recipe import Recipe

RESUME_FILE = "resume.pt"  # training state after the last finished epoch
RECIPE_FILE = "run.json"  # the recipe and record id of the run a partial folder belongs to


def partial_folder(out: str | os.PathLike) -> Path:
    """Where a run for ``out`` works until it is finished (kept after a kill, for --resume)."""
    out = Path(out)
    return out.parent / f".{out.name}.partial"


def open_work(work: Path, recipe: Recipe, *, resume: bool, force: bool) -> dict | None:
    """Prepare the partial folder; return the saved training state when resuming (None: start fresh)."""
    if work.exists() and not resume:
        if not force:
            raise ConfigError(f"an interrupted run left '{work}': pass --resume to continue it, or --force to start over")
        shutil.rmtree(work)
    if not resume:
        work.mkdir()
        return None
    if not (work / RECIPE_FILE).is_file():
        raise ConfigError(f"nothing to resume: '{work}' does not hold an interrupted run")
    saved = json.loads((work / RECIPE_FILE).read_text(encoding="utf-8"))
    diff = sorted(k for k, v in recipe.to_dict().items() if saved["recipe"].get(k) != v)
    if diff:
        raise ConfigError(f"the interrupted run in '{work}' used another recipe (differs in: {', '.join(diff)}); resume it with the same recipe, or pass --force to start over")
    # the saved training state itself is read later, once the feature workers are done (no fork after torch)
    return {"record_id": saved["record_id"]}


def load_state(work: Path) -> dict | None:
    """The training state saved after the last finished epoch (None if killed before the first ended)."""
    if not (work / RESUME_FILE).is_file():
        return None
    import torch

    try:
        return torch.load(work / RESUME_FILE, weights_only=True)
    except Exception as e:
        raise ConfigError(f"cannot read the saved training state '{work / RESUME_FILE}': {str(e).splitlines()[0]}") from e


def save_state(work: Path, *, record_id, epoch, finished, model, opt, sched, gen, history, best, wall_s) -> None:
    import torch

    from nenv.media.files import atomic_output

    state = {
        "record_id": record_id,
        "epoch": epoch,
        "finished": finished,
        "model": model.state_dict(),
        "optimizer": opt.state_dict(),
        "scheduler": sched.state_dict(),
        "generator": gen.get_state(),
        "torch_rng": torch.get_rng_state(),
        "history": history,
        "best": list(best),
        "wall_s": wall_s,
    }
    with atomic_output(work / RESUME_FILE) as tmp:
        with open(tmp, "wb") as fh:
            torch.save(state, fh)
            fh.flush()
            os.fsync(fh.fileno())


def install(work: Path, out: Path) -> None:
    """Move the finished folder into place; an old folder is replaced only once the new one is whole."""
    if out.exists():
        old = out.parent / f".{out.name}.old-{uuid.uuid4().hex[:6]}"
        os.replace(out, old)
        os.replace(work, out)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(work, out)
