"""Write MODEL.md (the model card) and evaluation.json for a model folder.

Usage: python -m nenv.train.model_card checkpoints/default [--sources corpora/default/SOURCES.md]

Evaluates the model against every other system on the held-out evaluation set
of real speech in tests/data/heldout (12 speakers, female and male; see its
clips.csv), through the G.711 mu-law channel at -26 dBov, and combines that
with the training record (validation speakers of the training sources, corpus
survey). The regression test tests/test_default_model.py
recomputes the same numbers and compares them with evaluation.json.
"""

from __future__ import annotations

import argparse
import json
import shutil
from pathlib import Path

import numpy as np

from nenv.words import count
from nenv.chain import checkpoint
from nenv.report import evaluate
from nenv.report.figures import spectrogram_grid
from nenv.media.files import write_text

HELDOUT = Path(__file__).resolve().parents[2] / "tests" / "data" / "heldout"
LAWS = ("mulaw",)
GROUPS = ("female", "male")


def clips() -> list[dict]:
    """The held-out clips (rows of tests/data/heldout/clips.csv: clip, speaker, group, ...)."""
    import csv

    with open(HELDOUT / "clips.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def measure(folder: Path) -> dict:
    """Every system's scores on the held-out clips, and the guard's rejection rate there."""
    ck = checkpoint.load(folder)
    meta = {c["clip"]: c for c in clips()}
    rows, signals = evaluate.run([HELDOUT / f"{c}.flac" for c in meta], systems=evaluate.ALL_SYSTEMS, laws=LAWS, model=ck)
    from nenv.dsp import channel
    from nenv.chain import pipeline

    rejected, active = 0, 0
    for c in meta:
        ref = evaluate.prepare_reference(HELDOUT / f"{c}.flac")
        for law in LAWS:
            system = pipeline.make_system("neural", model=ck)
            pipeline.extend(channel.telephone(ref, sr=16000, law=law, level_dbov=None), system=system)
            dec = system.estimator.record()
            rejected += int(np.count_nonzero(dec.rejected))
            active += int(dec.rejected.size)
    table = [{"clip": r.clip, "group": meta[r.clip]["group"], "law": r.law, "system": r.system, **r.scores.__dict__} for r in rows]
    for g in GROUPS:
        table += [{"clip": f"mean {g}", "group": g, "law": r.law, "system": r.system, **r.scores.__dict__} for r in evaluate.means([r for r in rows if meta[r.clip]["group"] == g])]
    table += [{"clip": "mean", "group": "all", "law": r.law, "system": r.system, **r.scores.__dict__} for r in evaluate.means(rows)]
    return {"table": table, "guard_rejection_rate": rejected / max(active, 1), "clips": signals}


BELOW_INPUT = """\
- **On these measures the added band does not yet sound better than no band** (see the goals above):
  ViSQOL rates the unextended input higher than the extended output, while it rates the true band and
  the oracle envelope higher than the input. The estimated envelope's shape is the cause (measured on
  validation speakers: with the true shape and this model's level the output scores near the
  unextended input; with the true level and this model's shape, lower). Whether listeners prefer it
  should be checked by listening tests for your use: `nenv panel YOUR_RECORDINGS.wav... --out panel
  --method neural` prepares a blind test of this model against your own recordings (the hidden
  reference and the unextended call are always in), and `nenv verdicts` analyses the results.
"""


def _trim(info: dict) -> str:
    from nenv.chain.checkpoint import band_trim

    trim = band_trim(info.get("calibration", {}), where="nenv.json")
    return "the level it was trained to give" if trim == 0 else f"{trim:+g} dB against the level it was trained to give"


def _low_range(guard: dict) -> str:
    """The low band's range in words, for models that have one (trained or updated since the low band)."""
    if guard.get("low_min_db") is None:
        return ""
    return f"; with --low-band, the low band's level {guard['low_min_db']:.1f} to {guard['low_max_db']:.1f} dB re the narrowband frame"


def _mean(table, system, key, group="all"):
    """Mean of ``key`` for ``system`` over the clips of ``group`` (NaN-aware)."""
    vals = [r[key] for r in table if not r["clip"].startswith("mean") and r["system"] == system and group in ("all", r["group"])]
    return float(np.nanmean(vals)) if vals else float("nan")


def _per_clip(table, system, key) -> dict[str, float]:
    return {r["clip"]: r[key] for r in table if not r["clip"].startswith("mean") and r["system"] == system}


def goals(table: list[dict], guard_rejection_rate: float) -> list[tuple[str, str, bool]]:
    """The perceptual and spectral goals of the default model: (goal, value reached, met)."""
    out = []
    ceiling_v = _mean(table, "true-band", "visqol") - _mean(table, "unextended", "visqol")
    ceiling_p = _mean(table, "true-band", "pesq_wb") - _mean(table, "unextended", "pesq_wb")
    dv = _mean(table, "neural", "visqol") - _mean(table, "unextended", "visqol")
    dp = _mean(table, "neural", "pesq_wb") - _mean(table, "unextended", "pesq_wb")
    out.append(("mean ViSQOL at least 0.3 above unextended, and a third of the way to the true band", f"{dv:+.2f} (true band {ceiling_v:+.2f})", dv >= max(0.3, ceiling_v / 3)))
    out.append(("mean WB-PESQ at least 0.1 above unextended, and a third of the way to the true band", f"{dp:+.2f} (true band {ceiling_p:+.2f})", dp >= max(0.1, ceiling_p / 3)))
    nn, un = _per_clip(table, "neural", "visqol"), _per_clip(table, "unextended", "visqol")
    groups = {r["clip"]: r["group"] for r in table if not r["clip"].startswith("mean")}
    for g in GROUPS:
        sel = [c for c in nn if groups[c] == g]
        share = float(np.mean([nn[c] > un[c] for c in sel])) if sel else float("nan")
        out.append((f"ViSQOL above unextended on at least 80% of clips ({g})", f"{100 * share:.0f}% of {len(sel)}", share >= 0.8))
    gap = _mean(table, "codebook", "lsd_high") - _mean(table, "neural", "lsd_high")
    lsd_nn, lsd_cb = _per_clip(table, "neural", "lsd_high"), _per_clip(table, "codebook", "lsd_high")
    worse = [c for c in lsd_nn if lsd_nn[c] >= lsd_cb[c]]
    out.append(("high-band LSD at least 1.5 dB below the codebook's, and below it on every clip", f"{gap:.2f} dB below; not below on {count(len(worse), 'clip')}{': ' + ', '.join(worse) if worse else ''}", gap >= 1.5 and not worse))
    for g in GROUPS:
        lev = float(np.median([r["level_error_high"] for r in table if not r["clip"].startswith("mean") and r["system"] == "neural" and r["group"] == g]))
        out.append((f"median high-band level error within +-3 dB, never a systematic over-estimate ({g})", f"{lev:+.2f} dB", -3.0 <= lev <= 0.5))
    out.append(("guard falls back on fewer than 5% of hops", f"{100 * guard_rejection_rate:.2f}%", guard_rejection_rate < 0.05))
    return out


def _group_rows(table: list[dict]) -> str:
    systems = list(dict.fromkeys(r["system"] for r in table))
    lines = ["| system | ViSQOL female | ViSQOL male | ViSQOL all | WB-PESQ all | LSD 3.4-8k all [dB] | HB level err all [dB] |", "|---|---:|---:|---:|---:|---:|---:|"]
    for s in systems:
        v = [_mean(table, s, "visqol", g) for g in (*GROUPS, "all")]
        lines.append(f"| {s} | {v[0]:.2f} | {v[1]:.2f} | {v[2]:.2f} | {_mean(table, s, 'pesq_wb'):.2f} | {_mean(table, s, 'lsd_high'):.2f} | {_mean(table, s, 'level_error_high'):+.2f} |")
    return "\n".join(lines) + "\n"


def write(folder: Path, *, sources: Path | None = None, selection: Path | None = None) -> dict:
    info = json.loads((folder / "nenv.json").read_text())
    record = json.loads((folder / "record.json").read_text())
    res = measure(folder)
    table = res["table"]
    ev = {"table": table, "guard_rejection_rate": res["guard_rejection_rate"], "record_id": info["record_id"]}
    write_text(folder / "evaluation.json", json.dumps(ev, indent=1))
    show = [x for x in res["clips"] if x.name in ("arctic_a0009", "ami_fee078", "arctic_a0007", "codec2_speech_orig")]
    panels = [[("reference", x.reference)] + [(s, x.outputs[s]) for s in ("unextended", "codebook", "neural", "oracle")] for x in show]
    spectrogram_grid(panels, folder / "evaluation.png", title="held-out real speech (2 female, 2 male speakers), G.711 mu-law channel", dpi=60)
    if sources is not None and sources.is_file():
        shutil.copyfile(sources, folder / "SOURCES.md")
    reached = goals(table, res["guard_rejection_rate"])
    goal_md = "| goal (held-out real speech, G.711 mu-law, -26 dBov) | reached | met |\n|---|---|---|\n" + "".join(f"| {g} | {v} | {'yes' if ok else '**no**'} |\n" for g, v, ok in reached)
    selection_md = selection.read_text(encoding="utf-8") if selection is not None and selection.is_file() else ""
    m = record["metrics"]
    corpus = info["corpus"]
    per_clip = [r for r in table if not r["clip"].startswith("mean")]
    md = f"""# nenv default model `{info['record_id']}`

The envelope network and codebook that `nenv extend` uses when no `--model` is given. Trained by
`nenv train --config configs/default.toml` on open wideband speech (nenv {info['nenv_version']}).

> **The added 3.4-8 kHz band is estimated, not recorded.** It is the model's statistical guess from
> the telephone band. Never treat it as evidence of what was said or who said it; keep the original
> narrowband recording for any such purpose, and follow local rules and licensed practice. Listen
> at a moderate level: an over-estimated high band is harsh, and clipping is reported by `extend`.

## What it is

- An MLP with {len(info["model"]["hidden"])} hidden layers ({' x '.join(map(str, info['model']['hidden']))}, GELU) from {info['features']['n_inputs']} narrowband
  features of the current and {info['features']['context']} past 10 ms hops to {info['features']['n_wb_ceps']} wideband cepstra and the
  high-band level; ONNX, run by onnxruntime on one thread. Algorithmic latency 11.4 ms.
- A {record['recipe']['codebook_size']}-cell paired codebook: the guard's fallback and the `codebook` baseline.
- Guard thresholds learned from the training data: level {info['guard']['level_min_db']:.1f} to {info['guard']['level_max_db']:.1f} dB
  re the narrowband frame, telephone-band mismatch up to {info['guard']['mismatch_max_db']:.2f} dB, novelty up to
  {info['guard']['novelty_max']:.2f}, reflection coefficients below {1 - info['guard']['stability_margin']:.3f}{_low_range(info['guard'])}.
- Calibration: the added band at {_trim(info)} (`band_trim_db` in `nenv.json`; `--band-trim` overrides it).
- Training: {record['data']['train_hops']} hops (10 ms) of training speakers, {record['data']['val_hops']} of validation
  speakers for early stopping (best epoch {m['best_epoch']}), {record['wall_s'] / 60:.1f} minutes on 2 CPU cores.

## Training corpus, licences and exclusions

{corpus['files']} files surveyed, {corpus['kept_files']} kept ({corpus['kept_active_hours'] * 60:.0f} minutes of active speech, {corpus['speakers']} speakers or voices).
Excluded files, by reason (a file may have several): {', '.join(f'{k} {v}' for k, v in corpus['exclusion_reasons'].items()) or 'none'}.
The per-file survey is in `survey.csv` and `survey.png`; the sources and their licences in `SOURCES.md`.
The corpus is rebuilt offline from Debian packages by `python -m nenv.train.open_corpus`. Nothing
from the held-out evaluation set's sources (below) and nothing made from a CMU ARCTIC speaker was used.

Because part of the training data is GPL-3.0-or-later, these weights are distributed under the
GPL-3.0-or-later.

## Evaluation on held-out real speech

The held-out set in `tests/data/heldout` ({len(per_clip) // len(set(r['system'] for r in per_clip))} clips of {len({r['clip'] for r in per_clip})} speakers from six open sources,
none in the training data; `clips.csv` there names each source, speaker, group and licence), each at
-26 dBov through the telephone channel with G.711 mu-law. `true-band` is the unextended signal plus
the reference's own band above 3.4 kHz: the best any extension could do.

Means per speaker group (ViSQOL and WB-PESQ: higher is better; LSD: lower is better):

{_group_rows(table)}
### Goals

{goal_md}
Guard on these clips: {100 * res['guard_rejection_rate']:.2f}% of hops fell back to the codebook.

On the validation speakers of the training sources ({len(record['corpus']['val_speakers'])} speakers or voices):
envelope LSD over 3.4-8 kHz {m['val_envelope_lsd_high_db']['neural']:.2f} dB (codebook {m['val_envelope_lsd_high_db']['codebook']:.2f} dB), median level
error {m['val_median_level_error_db']['neural']:+.2f} dB, guard rejections {100 * m['val_guard_rejection_rate']:.2f}%.

{selection_md}
### Every clip

{evaluate.to_markdown([evaluate.Row(r['clip'], r['law'], r['system'], evaluate.Scores(**{k: r.get(k, float('nan')) for k in evaluate.MEASURE_NAMES})) for r in table])}
{evaluate.MEASURES_NOTE}
![spectrograms](evaluation.png)

## Limitations

{BELOW_INPUT if _mean(table, "neural", "visqol") < _mean(table, "unextended", "visqol") else ""}- Trained on acted game dialogue (Czech, Dutch), single words and letters in ~20 languages, and
  rendered (diphone) voices; conversational, emotional or far-field speech, children and tonal
  languages are poorly covered. Expect larger errors there; the guard catches only gross failures.
- Twelve evaluation clips are a small sample: means carry an uncertainty of about 0.1 MOS.
- Noise, reverberation and codecs other than G.711 were seen in training only as mild white noise.
"""
    write_text(folder / "MODEL.md", md)
    return ev


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("folder", type=Path)
    ap.add_argument("--sources", type=Path, default=None)
    ap.add_argument("--selection", type=Path, default=None, help="a Markdown section with the recipe's selection evidence (validation speakers)")
    args = ap.parse_args()
    write(args.folder, sources=args.sources, selection=args.selection)
    print(f"wrote {args.folder / 'MODEL.md'}")


if __name__ == "__main__":
    main()
