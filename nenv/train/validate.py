"""Score trained models on the validation speakers of their corpus with the perceptual measures.

Usage::

    python -m nenv.train.validate MODEL [MODEL ...] --out DIR [--clips-per-voice 4] [--trims DB ...]

Recipes are selected here, never on the held-out evaluation set. The validation speakers are the
ones the training run held out (its ``survey.csv`` and recorded split, in the model folder); their
files are joined, with 0.2 s of silence between them, into clips of about ``CLIP_S`` seconds (up
to ``clips_per_voice`` clips for a speaker with many files, one otherwise), rendered voices left
out (they are not what the model will hear). Each clip goes at -26 dBov through the telephone
channel with G.711 mu-law, and every model's neural output, the unextended input, the oracle and
the true band are scored with ViSQOL (speech mode) and WB-PESQ. Clips are grouped as female or
male by their median F0 (above 165 Hz: female; a rule of thumb for adult voices). ``--trims``
also scores each model's output with its added band at those levels in dB against the trained
level (the calibration ``band_trim_db`` of a model folder; :mod:`nenv.chain.checkpoint`). Writes
``validation.csv`` (every clip and system) and ``validation.md`` (means per group).
"""

from __future__ import annotations

import argparse
import csv
import json
from pathlib import Path

import numpy as np

from nenv.dsp import channel
from nenv.report import measures
from nenv.chain import pipeline
from nenv.settings import HOP_WB, WB_SR
from nenv.train.corpus import load_wideband
from nenv.train.heldout import F0_SPLIT_HZ, median_f0

CLIP_S = 5.0  # seconds of speech per validation clip, at least
GAP_S = 0.2  # seconds of silence between joined files
MANY_FILES = 100  # a speaker with more files gets several clips
RENDERED = ("festival/",)  # speaker-id prefixes of rendered voices


def validation_clips(model: Path, *, clips_per_voice: int = 4, seed: int = 1) -> list[tuple[str, str, np.ndarray]]:
    """(name, group, 16 kHz signal at -26 dBov) for the validation speakers of the run that made ``model``."""
    record = json.loads((model / "record.json").read_text())
    val = set(record["corpus"]["val_speakers"])
    with open(model / "survey.csv", newline="", encoding="utf-8") as fh:
        rows = [r for r in csv.DictReader(fh) if not r["excluded"] and r["speaker"] in val and not r["speaker"].startswith(RENDERED)]
    by: dict[str, list[str]] = {}
    for r in rows:
        by.setdefault(r["speaker"], []).append(r["path"])
    rng = np.random.default_rng(seed)
    out = []
    for speaker, paths in sorted(by.items()):
        paths = [paths[i] for i in rng.permutation(len(paths))]
        n_clips = clips_per_voice if len(paths) > MANY_FILES else 1
        for k in range(n_clips):
            parts, seconds = [], 0.0
            for p in paths[k::n_clips]:
                y = load_wideband(p)
                parts += [y, np.zeros(int(GAP_S * WB_SR))]
                seconds += y.size / WB_SR
                if seconds >= CLIP_S:
                    break
            if seconds < CLIP_S / 3:
                continue
            y = np.concatenate(parts)
            y = channel.set_level(y[: y.size // HOP_WB * HOP_WB], sr=WB_SR, level_dbov=-26.0)
            out.append((f"{speaker}#{k}", "female" if median_f0(y) > F0_SPLIT_HZ else "male", y))
    return out


def score(models: list[Path], clips: list[tuple[str, str, np.ndarray]], *, law: str = "mulaw", trims: tuple[float | None, ...] = (None,)) -> list[dict]:
    """One row per clip and system: the reference systems once, then each model's neural output at
    each of ``trims`` (dB against the trained level; None: the folder's own calibration)."""
    rows = []
    loaded = [(m.name, pipeline.load_model(m)) for m in models]
    for name, group, ref in clips:
        nb = channel.telephone(ref, sr=WB_SR, law=law, level_dbov=None)
        systems = {s: pipeline.make_system(s, reference=ref) for s in ("unextended", "oracle", "true-band")}
        for label, ck in loaded:
            for t in trims:
                systems[f"neural:{label}" + ("" if t is None else f" {t:+g} dB")] = pipeline.make_system("neural", model=ck, band_trim_db=t)
        for s, system in systems.items():
            y = pipeline.extend(nb, system=system).y
            rows.append({"clip": name, "group": group, "system": s, "visqol": measures.visqol_speech(ref, y), "pesq_wb": measures.pesq_wb(ref, y), "lsd_high": measures.lsd(ref, y), "level_error_high": measures.high_band_level_error(ref, y)})
    return rows


def to_markdown(rows: list[dict]) -> str:
    """Means per group; 'wins' = share of clips where the system's ViSQOL beats unextended."""
    base = {r["clip"]: r["visqol"] for r in rows if r["system"] == "unextended"}
    lines = ["| system | group | clips | ViSQOL | WB-PESQ | LSD 3.4-8k [dB] | HB level err (median) [dB] | ViSQOL above unextended |", "|---|---|---:|---:|---:|---:|---:|---:|"]
    for s in dict.fromkeys(r["system"] for r in rows):
        for g in ("female", "male", "all"):
            sel = [r for r in rows if r["system"] == s and g in ("all", r["group"])]
            if not sel:
                continue
            wins = "-" if s == "unextended" else f"{100 * np.mean([r['visqol'] > base[r['clip']] for r in sel]):.0f}%"
            lines.append(
                f"| {s} | {g} | {len(sel)} | {np.nanmean([r['visqol'] for r in sel]):.2f} | {np.nanmean([r['pesq_wb'] for r in sel]):.2f} | "
                f"{np.nanmean([r['lsd_high'] for r in sel]):.2f} | {np.nanmedian([r['level_error_high'] for r in sel]):+.2f} | {wins} |"
            )
    return "\n".join(lines) + "\n"


def main() -> None:
    from nenv.media.files import write_text

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("models", nargs="+", type=Path)
    ap.add_argument("--out", type=Path, required=True)
    ap.add_argument("--clips-per-voice", type=int, default=4)
    ap.add_argument("--trims", type=float, nargs="+", default=None, metavar="DB", help="levels of the added band in dB against the trained level (instead of each folder's calibration)")
    args = ap.parse_args()
    clips = validation_clips(args.models[0], clips_per_voice=args.clips_per_voice)
    rows = score(args.models, clips, trims=tuple(args.trims) if args.trims else (None,))
    args.out.mkdir(parents=True, exist_ok=True)
    with open(args.out / "validation.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
    md = to_markdown(rows)
    write_text(args.out / "validation.md", md)
    print(md)


if __name__ == "__main__":
    main()
