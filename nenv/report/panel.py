"""Prepare a listening panel as one self-contained web page, in one of two designs.

* ``mushra`` (the default): a blind multi-stimulus test with hidden reference and anchor (the method
  of ITU-R BS.1534, "MUSHRA"). The stimuli of a trial are the hidden reference (the original), the
  anchor (``unextended``) and each system, rated against the open original: how close each comes to it.
* ``ccr``: comparison category rating (ITU-T P.800 Annex E). A trial is a pair, the unextended signal
  and one system, and the listener rates the second's quality against the first's on the 7 steps
  from -3 (much worse) to +3 (much better), with no original to compare with: as a caller hears a
  bridged call. Every system meets the unextended signal in both orders on every clip, so an
  order bias cancels; one more pair per clip, the original against the unextended signal (in
  alternating orders), checks that the listener hears the upper band at all
  (:mod:`nenv.report.ccr`).

For every wideband reference clip the telephone channel is applied and every system asked for runs
on it; with ``band_trims``, each model system (neural, codebook) runs once more for each of those
levels of its added band (dB against the trained level), as a system of its own ("neural -6 dB"):
a panel can then ask listeners which level they prefer. All stimuli of a clip are set to the
reference's active speech level (nenv's active-level measure,
:func:`nenv.dsp.channel.active_level_dbov`) and, if any would then clip, all are lowered together. The output folder holds

* ``page/index.html``: the test, audio included (WAV, base64), nothing to install: open it from a
  file or serve the folder from any static web server. Stimuli carry random tokens, in a random
  order, so neither their names nor the page's source say which system a stimulus is.
* ``key.json``: which token is which system and clip: what the analysis (``nenv verdicts``) reads.
  Keep it away from the listeners.

The page shows the cautions (moderate level, headphones, stop when tired), a level check, a
training trial, then every trial in an order drawn per listener (seeded by the listener's name and
the panel, recorded in the results); the results are saved as a file the listener sends back.
"""

from __future__ import annotations

import base64
import io
import json
import os
import secrets
from importlib import resources
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import soundfile as sf

from nenv.chain import pipeline
from nenv.chain.checkpoint import check_trim
from nenv.dsp import channel
from nenv.errors import InputError, OutputError
from nenv.media.files import output_folder, write_text
from nenv.report.evaluate import prepare_reference
from nenv.report.verdicts import ANCHOR, HIDDEN_REFERENCE
from nenv.settings import WB_SR

PEAK = 0.98  # highest sample after level alignment (full scale 1.0)
PANEL_SYSTEMS = ("neural",)  # what a panel compares by default, beside the hidden reference and the anchor
DESIGNS = ("mushra", "ccr")


def _wav_base64(y: np.ndarray) -> str:
    buf = io.BytesIO()
    sf.write(buf, y, WB_SR, format="WAV", subtype="PCM_16")
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _token(key: dict, clip: str, system: str, trial_id: str, y: np.ndarray) -> dict:
    """A stimulus for the page under a fresh random token; the key records what it is."""
    token = secrets.token_hex(4)
    key["stimuli"][token] = {"clip": clip, "system": system, "trial": trial_id}
    return {"id": token, "audio": _wav_base64(y)}


def _aligned(stimuli: dict[str, np.ndarray], target_dbov: float) -> dict[str, np.ndarray]:
    """Every stimulus at ``target_dbov`` active level; all lowered together if any would clip."""
    out = {}
    for s, y in stimuli.items():
        level = channel.active_level_dbov(y, sr=WB_SR)
        out[s] = y * 10 ** ((target_dbov - level) / 20) if np.isfinite(level) else y
    peak = max(float(np.max(np.abs(y))) for y in out.values())
    if peak > PEAK:
        out = {s: y * (PEAK / peak) for s, y in out.items()}
    return out


def prepare(
    references: Sequence[str | os.PathLike],
    out: str | os.PathLike,
    *,
    systems: Sequence[str] = PANEL_SYSTEMS,
    model=None,
    law: str = "mulaw",
    post_url: str | None = None,
    on_step: Callable[[str], None] | None = None,
    overwrite: bool = False,
    design: str = "mushra",
    band_trims: Sequence[float] = (),
) -> dict:
    """Write the panel (see the module docstring) for ``references``; returns the key. A folder that
    holds a panel already is refused unless ``overwrite``: its key is what makes results readable."""
    if design not in DESIGNS:
        raise InputError(f"design {design!r} is not known: choose from {', '.join(DESIGNS)}")
    if (Path(out) / "key.json").exists() and not overwrite:
        raise OutputError(f"'{out}' holds a panel already (key.json): its listeners' results need that key; choose another folder, or pass --overwrite")
    if not references:
        raise InputError("a listening panel needs at least one reference recording")
    names = [Path(p).stem for p in references]
    if len(set(names)) != len(names):
        raise InputError("two references have the same file name: rename one (trials are named after their clip)")
    asked = [s for s in systems if s not in (ANCHOR, HIDDEN_REFERENCE)]
    for s in asked:
        if s not in pipeline.SYSTEMS or s in pipeline.REFERENCE_SYSTEMS:
            raise InputError(f"--method {s}: a panel compares neural, codebook or imaging (the reference and unextended are always in)")
    asked = list(dict.fromkeys(asked))
    with_model = [s for s in asked if s in pipeline.MODEL_SYSTEMS]
    if band_trims and not with_model:
        raise InputError("--band-trim sets the level of a model's band: add --method neural or codebook")
    if with_model:
        model = pipeline.load_model(model)
    # label -> (system, band trim in dB or None for the model folder's own level)
    runs = {s: (s, None) for s in asked}
    for t in dict.fromkeys(check_trim(t, what="band_trims (--band-trim)", error=InputError) for t in band_trims):
        if t == model.band_trim_db:  # listeners would hear the same system twice under two names
            raise InputError(f"--band-trim {t:g} is the model folder's own level: its {' and '.join(with_model)} already play at it; ask only for other levels")
        runs.update({f"{s} {t:+g} dB": (s, t) for s in with_model})
    asked = list(runs)
    refs = [(n, prepare_reference(p)) for n, p in zip(names, references)]  # fail early, before any work
    folder = output_folder(Path(out))
    panel_id = secrets.token_hex(4)
    trials = []
    key = {"panel": panel_id, "design": design, "law": law, "systems": [HIDDEN_REFERENCE, ANCHOR, *asked], "trials": {}, "stimuli": {}}
    if with_model:  # which model, at which level of its band, was heard
        key["model"] = {"folder": str(model.path), "record_id": model.info.get("record_id"), "band_trim_db": model.band_trim_db}
    if design == "ccr":
        key["method"] = "ITU-T P.800 Annex E (comparison category rating)"
        key["pairs"] = {}
    else:
        key["method"] = "ITU-R BS.1534 (multi-stimulus with hidden reference and anchor)"
    control_first = secrets.randbelow(2) == 1  # the original's place in the first clip's control pair
    for i, (name, ref) in enumerate(refs):
        nb = channel.telephone(ref, sr=WB_SR, law=law, level_dbov=None)
        raw = {HIDDEN_REFERENCE: ref, ANCHOR: pipeline.extend(nb, system=pipeline.make_system(ANCHOR)).y}
        for s, (system_name, trim) in runs.items():
            raw[s] = pipeline.extend(nb, system=pipeline.make_system(system_name, model=model, band_trim_db=trim)).y
            if on_step:
                on_step(f"{name} / {s}")
        aligned = _aligned(raw, channel.active_level_dbov(ref, sr=WB_SR))
        if design == "ccr":
            control = (HIDDEN_REFERENCE, ANCHOR) if (i % 2 == 0) == control_first else (ANCHOR, HIDDEN_REFERENCE)
            order = [p for s in asked for p in ((ANCHOR, s), (s, ANCHOR))] + [control]
            for first, second in sorted(order, key=lambda _: secrets.randbelow(2**30)):  # neither trial ids nor page order say which is which
                trial_id = f"t{len(trials) + 1}"
                key["trials"][trial_id] = name
                key["pairs"][trial_id] = {"clip": name, "first": first, "second": second}
                trials.append({"id": trial_id, **{place: _token(key, name, s, trial_id, aligned[s]) for place, s in (("first", first), ("second", second))}})
            continue
        trial_id = f"t{i + 1}"
        key["trials"][trial_id] = name
        stimuli = [_token(key, name, s, trial_id, aligned[s]) for s in sorted(aligned, key=lambda _: secrets.randbelow(2**30))]  # page order says nothing
        trials.append({"id": trial_id, "reference": _wav_base64(aligned[HIDDEN_REFERENCE]), "stimuli": stimuli})
    data = {"panel": panel_id, "design": design, "trials": trials, "post_url": post_url or ""}
    page = resources.files("nenv.report").joinpath("panel_page.html").read_text(encoding="utf-8")
    html = page.replace("/*PANEL_DATA*/null", json.dumps(data, separators=(",", ":")))
    (folder / "page").mkdir(exist_ok=True)
    write_text(folder / "page" / "index.html", html)
    write_text(folder / "key.json", json.dumps(key, indent=1) + "\n")
    return key
