"""Compare extension systems on wideband reference recordings.

For each reference: read it, resample to 16 kHz, set its active level to
-26 dBov, pass it through the telephone channel (once per G.711 law asked
for), extend the narrowband result with every system, and score each output
against the reference with :mod:`nenv.report.measures`. The table goes to the screen,
to CSV and to Markdown; one figure shows the spectrograms of every system.
"""

from __future__ import annotations

import csv
import io
import os
from dataclasses import asdict, dataclass, fields
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from nenv.media import audio
from nenv.dsp import channel
from nenv.chain import pipeline
from nenv.chain.checkpoint import check_trim
from nenv.chain.systems import trim_source
from nenv.errors import InputError
from nenv.report.measures import Scores
from nenv.settings import WB_SR

DEFAULT_SYSTEMS = ("unextended", "imaging", "oracle", "true-band")  # when no model is available
ALL_SYSTEMS = ("unextended", "imaging", "codebook", "neural", "oracle", "true-band")
EVAL_LEVEL_DBOV = channel.NOMINAL_LEVEL_DBOV
MEASURE_NAMES = [f.name for f in fields(Scores)]
MEASURE_LABELS = {
    "lsd_high": "LSD 3.4-8k [dB]",
    "lsd_full": "LSD 0-8k [dB]",
    "lsd_env_high": "env LSD 3.4-8k [dB]",
    "lsd_env_full": "env LSD 0-8k [dB]",
    "level_error_high": "HB level err [dB]",
    "lsd_low": "LSD 50-300 [dB]",
    "level_error_low": "LB level err [dB]",
    "pesq_wb": "WB-PESQ [MOS]",
    "visqol": "ViSQOL [MOS]",
}


@dataclass(frozen=True)
class Row:
    """One system on one clip through one channel."""

    clip: str
    law: str
    system: str
    scores: Scores


@dataclass(frozen=True)
class Clip:
    """A reference and what the channel made of it."""

    name: str
    law: str
    reference: np.ndarray  # 16 kHz
    narrowband: np.ndarray  # 8 kHz
    outputs: dict[str, np.ndarray]  # system -> 16 kHz output


def reference_at_16k(a: audio.Audio, path: str | os.PathLike) -> np.ndarray:
    """A loaded reference resampled to 16 kHz; refuses narrowband or silent ones (``path`` names it in the error)."""
    if a.sr < WB_SR:
        raise InputError(f"'{path}' is sampled at {a.sr} Hz: a reference must be wideband (16 kHz or more)")
    if audio.is_silent(a.y):
        raise InputError(f"'{path}' is digital silence: nothing to compare against")
    return audio.resample(a.y, orig_sr=a.sr, target_sr=WB_SR)


def prepare_reference(path: str | os.PathLike, *, channel_index: int | None = None, mix: bool = False) -> np.ndarray:
    """Load a wideband reference at 16 kHz (an odd last sample dropped) and nominal level; refuse narrowband or silent files."""
    y = reference_at_16k(audio.load(path, channel=channel_index, mix=mix), path)
    y = y[: y.size // 2 * 2]  # an even length: every output is twice its 8 kHz input's
    return channel.set_level(y, sr=WB_SR, level_dbov=EVAL_LEVEL_DBOV)


def run(
    references: Sequence[str | os.PathLike],
    *,
    systems: Sequence[str] = DEFAULT_SYSTEMS,
    laws: Sequence[str] = ("none",),
    excitation: str = pipeline.DEFAULT_EXCITATION,
    model=None,
    on_step: Callable[[str], None] | None = None,
    low_band: bool | str = False,
    workers: int = 1,
    band_trim_db: float | None = None,
) -> tuple[list[Row], list[Clip]]:
    """Score every system on every reference and channel law (``low_band``: systems that can add
    the 50-300 Hz band do, the true band adds the reference's own; ``"both"``: those systems run
    without and with it, side by side). ``workers``: references scored
    in that many processes (0 = one per core; each loads the model itself); ``on_step(label)`` once
    per system, clip and law, as each is scored (in this process) or as each reference is done.
    ``band_trim_db``: the level of the model systems' added band against their trained level (None:
    the model folder's calibration; see :func:`nenv.chain.systems.make_system`).

    Returns the rows of the table and the signals (for figures), in the order of ``references``.
    """
    for s in systems:
        if s not in pipeline.SYSTEMS:
            raise InputError(f"system {s!r} is not known: choose from {', '.join(pipeline.SYSTEMS)}")
    # loaded once, failing early; None when no system needs one
    model = pipeline.load_model(model) if any(s in pipeline.MODEL_SYSTEMS for s in systems) else None
    if band_trim_db is not None:
        if model is None:
            raise InputError(f"band_trim_db (--band-trim) calibrates a model's band: add neural or codebook to the systems ({', '.join(systems)})")
        band_trim_db = check_trim(band_trim_db, what="band_trim_db (--band-trim)", error=InputError)
    refs = [(Path(p).stem, prepare_reference(p)) for p in references]  # fail early, before any scoring
    apart = workers != 1 and len(refs) > 1
    # a worker (a new interpreter) gets the model's folder, not the loaded model, and reads it once
    model_arg = str(model.path) if apart and model is not None else model
    tasks = [(name, ref, tuple(systems), tuple(laws), excitation, model_arg, low_band, band_trim_db) for name, ref in refs]
    if apart:
        from nenv.serve import parallel

        done: list = [None] * len(tasks)
        for i, (rows, clips) in parallel.as_done(score_reference, tasks, workers=workers, fresh=True):
            done[i] = (rows, clips)
            for r in rows:
                if on_step:
                    on_step(f"{r.clip} / {r.law} / {r.system}")
    else:
        done = [score_reference(*t, on_step=on_step) for t in tasks]
    return [r for rows, _ in done for r in rows], [c for _, clips in done for c in clips]


def variants(systems: Sequence[str], low_band: bool | str) -> list[tuple[str, bool]]:
    """``(system, with the low band)`` in the table's order for ``low_band`` False, True or ``"both"``
    (see :func:`run`); systems with nothing to shape a low band with run without one."""
    if low_band not in (False, True, "both"):
        raise ValueError(f"low_band must be False, True or 'both', not {low_band!r}")
    out = []
    for s in systems:
        can = s in pipeline.LOW_BAND_SYSTEMS
        out += [(s, False), (s, True)] if low_band == "both" and can else [(s, bool(low_band) and can)]
    return out


_models: dict = {}  # in a worker process: model folder -> loaded model, read on first use


def score_reference(name: str, ref: np.ndarray, systems: Sequence[str], laws: Sequence[str], excitation: str, model, low_band: bool | str, band_trim_db: float | None = None, on_step: Callable[[str], None] | None = None) -> tuple[list[Row], list[Clip]]:
    """Every system through every law on one prepared reference (:func:`prepare_reference`); ``model``:
    a loaded model, its folder, or None when no system needs one; ``low_band`` and ``band_trim_db`` as for :func:`run`.
    The clips' outputs are keyed by the table's system labels."""
    if isinstance(model, str):
        model = _models.get(model) or _models.setdefault(model, pipeline.load_model(model))
    rows: list[Row] = []
    clips: list[Clip] = []
    for law in laws:
        nb = channel.telephone(ref, sr=WB_SR, law=law, level_dbov=None)
        outs = {}
        for s, with_low in variants(systems, low_band):
            trim = band_trim_db if s in pipeline.MODEL_SYSTEMS else None
            system = pipeline.make_system(s, reference=ref, excitation=excitation, model=model, low_band=with_low, band_trim_db=trim)
            y = pipeline.extend(nb, system=system).y
            label = f"{s} +low band" if with_low else s  # the table says what ran
            outs[label] = y
            rows.append(Row(name, law, label, Scores.compute(ref, y)))
            if on_step:
                on_step(f"{name} / {law} / {label}")
        clips.append(Clip(name, law, ref, nb, outs))
    return rows, clips


def read_groups(path: str | os.PathLike) -> dict[str, str]:
    """Speaker groups from a CSV file with a header naming (at least) ``clip`` and ``group`` columns.

    ``clip`` is a reference's name as the table shows it (its stem, or its relative path without suffix)."""
    p = Path(path)
    try:
        with open(p, newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
    except (OSError, UnicodeDecodeError, csv.Error) as e:
        raise InputError(f"cannot read the groups file '{p}': {e}") from e
    if not rows or not {"clip", "group"} <= set(rows[0]):
        raise InputError(f"the groups file '{p}' needs a header with the columns clip and group (and a row per clip)")
    return {r["clip"].strip(): r["group"].strip() for r in rows if r.get("clip") and r.get("group")}


def group_of(clip: str, groups: dict[str, str] | None) -> str | None:
    """The group of ``clip`` (its name as the table shows it, else its last path part), or None."""
    if not groups:
        return None
    return groups.get(clip, groups.get(Path(clip).name))


def mean_scores(scores: Sequence[Scores]) -> Scores:
    """Mean of every measure, leaving out NaN values (NaN where every value is)."""
    sel = [asdict(s) for s in scores]
    return Scores(**{m: float(np.nanmean([s[m] for s in sel])) if any(np.isfinite(s[m]) for s in sel) else float("nan") for m in MEASURE_NAMES})


def group_means(items: Sequence[tuple[object, str, Scores]], groups: dict[str, str] | None = None) -> list[tuple[object, str | None, int, Scores]]:
    """Means of ``(key, clip, scores)`` items per key, in first-seen order: over all its clips (group
    None), then with ``groups`` (clip -> group, :func:`read_groups`) over each group's. Each mean comes
    as ``(key, group, number of clips, scores)``."""
    out = []
    for key in dict.fromkeys(k for k, _, _ in items):
        mine = [(clip, sc) for k, clip, sc in items if k == key]
        out.append((key, None, len(mine), mean_scores([sc for _, sc in mine])))
        if groups:
            label = {clip: group_of(clip, groups) or "(no group)" for clip, _ in mine}
            for g in sorted(set(label.values())):
                sel = [sc for clip, sc in mine if label[clip] == g]
                out.append((key, g, len(sel), mean_scores(sel)))
    return out


def means(rows: Sequence[Row], groups: dict[str, str] | None = None) -> list[Row]:
    """Mean of every measure per (law, system) over clips (NaN-aware); with ``groups`` also per group,
    as rows named "mean GROUP"."""
    avg = group_means([((r.law, r.system), r.clip, r.scores) for r in rows], groups)
    return [Row("mean" if g is None else f"mean {g}", law, system, sc) for (law, system), g, _, sc in avg]


BLANK_REASONS = {
    "visqol": "the visqol package found nothing to align (a clip shorter than about half a second, or without speech)",
    "pesq_wb": "the pesq package scores nothing shorter than a quarter of a second (beyond its alignment margins), without speech it can find, or with more than 50 utterances in one window (its reference code's limit; recordings over 30 s are scored in windows of about 12 s)",
}
BLANK_DEFAULT = "the reference has no active frames (none within 40 dB of its loudest)"


def blank_notes(rows: Sequence[Row]) -> list[str]:
    """One line per measure and clip whose value is NaN (not measurable), saying why it is blank;
    the mean rows leave such values out."""
    notes = []
    for m in MEASURE_NAMES:
        where = list(dict.fromkeys(f"{r.clip} ({r.law})" for r in rows if r.clip != "mean" and not np.isfinite(getattr(r.scores, m))))
        if where:
            notes.append(f"{MEASURE_LABELS[m]} is blank (nan) for {', '.join(where)}: {BLANK_REASONS.get(m, BLANK_DEFAULT)}; the means leave it out")
    return notes


def trim_notes(systems: Sequence[str], band_trim_db: float | None, model=None) -> list[str]:
    """A line for the table when the model systems' added band is not at its trained level (the trim
    given, else the model folder's calibration)."""
    named = [s for s in systems if s in pipeline.MODEL_SYSTEMS]
    if not named:
        return []
    trim = band_trim_db if band_trim_db is not None else pipeline.load_model(model).band_trim_db
    if trim == 0:
        return []
    verb = "adds its" if len(named) == 1 else "add their"
    return [f"{' and '.join(named)} {verb} band {trim:+g} dB against the trained level ({trim_source(band_trim_db is not None)})"]


def to_csv(rows: Sequence[Row]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["clip", "law", "system", *MEASURE_NAMES])
    for r in rows:
        w.writerow([r.clip, r.law, r.system, *(f"{getattr(r.scores, m):.4f}" for m in MEASURE_NAMES)])
    return buf.getvalue()


def to_markdown(rows: Sequence[Row]) -> str:
    head = ["clip", "channel", "system", *(MEASURE_LABELS[m] for m in MEASURE_NAMES)]
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join(["---"] * 3 + ["---:"] * len(MEASURE_NAMES)) + "|"]
    for r in rows:
        vals = [f"{getattr(r.scores, m):.2f}" for m in MEASURE_NAMES]
        clip = f"**{r.clip}**" if r.clip == "mean" or r.clip.startswith("mean ") else r.clip
        lines.append("| " + " | ".join([clip, r.law, r.system, *vals]) + " |")
    return "\n".join(lines) + "\n"


MEASURES_NOTE = """\
Measures (nenv.report.measures): LSD = log-spectral distance, 512-point Hann frames every 10 ms, power
floored 80 dB below the reference's loudest bin, mean over frames within 40 dB of the loudest;
"env" = the same on order-16 LPC envelopes; HB level err = median over active frames of the
3.4-8 kHz energy ratio, output / reference (positive = too loud); LSD 50-300 and LB level err: the
same for the low band, the level over frames where the reference holds a low band; WB-PESQ = ITU-T P.862.2 via the
`pesq` package; ViSQOL = ViSQOL v3 speech mode with its lattice model (Chinen et al. 2020) via
the `visqol-python` package; a recording over 30 s gets both as the mean over windows of about
12 s cut at pauses, weighted by active speech. Lower is better except WB-PESQ and ViSQOL. "true-band" adds the
reference's own band above 3.4 kHz (with --low-band, also its own 50-300 Hz) to the unextended signal: the
ceiling of any extension. The added band is estimated, not recorded.
"""
