"""Write MODEL.md (the model card) and evaluation.json for a model folder.

Usage: python -m nenv.train.model_card checkpoints/default [--sources corpora/default/SOURCES.md]

Evaluates the model against every other system on the held-out CMU ARCTIC
sentences in tests/data, through a plain and a G.711 mu-law channel, and
combines that with the training record (held-out speakers of the training
sources, corpus survey). The regression test tests/test_default_model.py
recomputes the same numbers and compares them with evaluation.json.
"""

from __future__ import annotations

import argparse
import json
import shutil
from pathlib import Path

import numpy as np

from nenv import checkpoint, evaluate
from nenv.figures import spectrogram_grid
from nenv.files import write_text

DATA = Path(__file__).resolve().parents[2] / "tests" / "data"
CLIPS = ("arctic_a0007.wav", "arctic_a0009.wav")
LAWS = ("none", "mulaw")
TARGETS = """\
| goal (held-out read speech, plain and G.711) | reached |
|---|---|
| high-band LSD at least 1.5 dB below the codebook's | {cb_gap} |
| high-band LSD at least 6 dB below imaging's | {im_gap} |
| high-band LSD within 3 dB of the oracle's | {or_gap} |
| median high-band level error within +-3 dB, never a systematic over-estimate | {level} |
| WB-PESQ not more than 0.1 below the unextended input's | {pesq} |
| guard rejects fewer than 5% of active hops on clean speech | {reject} |
"""


def measure(folder: Path) -> dict:
    """Every system's scores on the held-out clips, and the guard's rejection rate there."""
    ck = checkpoint.load(folder)
    rows, clips = evaluate.run([DATA / c for c in CLIPS], systems=evaluate.ALL_SYSTEMS, laws=LAWS, model=ck)
    from nenv import channel, pipeline

    rejected = []
    for c in CLIPS:
        ref = evaluate.prepare_reference(DATA / c)
        for law in LAWS:
            system = pipeline.make_system("neural", model=ck)
            pipeline.extend(channel.telephone(ref, sr=16000, law=law, level_dbov=None), system=system)
            dec = system.estimator.record()
            rejected.append(float(np.mean(dec.rejected)))
    table = [{"clip": r.clip, "law": r.law, "system": r.system, **r.scores.__dict__} for r in rows + evaluate.means(rows)]
    return {"table": table, "guard_rejection_rate": float(np.mean(rejected)), "clips": clips}


def _mean(table, system, key, law=None):
    vals = [r[key] for r in table if r["clip"] != "mean" and r["system"] == system and (law is None or r["law"] == law)]
    return float(np.mean(vals))


def _ablation_rows(ablations: dict[str, Path], table: list[dict]) -> str:
    """Markdown rows: the network trained on each subset of the sources vs the full model."""
    lines = ["| trained on | LSD 3.4-8k [dB] | env LSD 3.4-8k [dB] | HB level err [dB] | WB-PESQ |", "|---|---:|---:|---:|---:|"]

    def row(label, tab):
        vals = [_mean(tab, "neural", k) for k in ("lsd_high", "lsd_env_high", "level_error_high", "pesq_wb")]
        lines.append(f"| {label} | {vals[0]:.2f} | {vals[1]:.2f} | {vals[2]:+.2f} | {vals[3]:.2f} |")

    for label, path in ablations.items():
        row(label, measure(path)["table"])
    row("**all sources (this model)**", table)
    return "\n".join(lines) + "\n"


def write(folder: Path, *, sources: Path | None = None, ablations: dict[str, Path] | None = None) -> dict:
    info = json.loads((folder / "nenv.json").read_text())
    record = json.loads((folder / "record.json").read_text())
    res = measure(folder)
    table = res["table"]
    ev = {"table": table, "guard_rejection_rate": res["guard_rejection_rate"], "record_id": info["record_id"]}
    write_text(folder / "evaluation.json", json.dumps(ev, indent=1))
    c = res["clips"]
    panels = [[("reference", x.reference)] + [(s, x.outputs[s]) for s in ("unextended", "imaging", "codebook", "neural", "oracle")] for x in c if x.law == "mulaw"]
    spectrogram_grid(panels, folder / "evaluation.png", title="held-out CMU ARCTIC sentences, G.711 mu-law channel", dpi=60)
    if sources is not None and sources.is_file():
        shutil.copyfile(sources, folder / "SOURCES.md")
    nn = _mean(table, "neural", "lsd_high")
    gaps = {k: nn - _mean(table, k, "lsd_high") for k in ("codebook", "imaging", "oracle")}
    level = _mean(table, "neural", "level_error_high")
    dpesq = _mean(table, "neural", "pesq_wb") - _mean(table, "unextended", "pesq_wb")
    ok = lambda cond: "yes" if cond else "no"  # noqa: E731
    targets = TARGETS.format(
        cb_gap=f"{-gaps['codebook']:.2f} dB below ({ok(-gaps['codebook'] >= 1.5)})",
        im_gap=f"{-gaps['imaging']:.2f} dB below ({ok(-gaps['imaging'] >= 6)})",
        or_gap=f"{gaps['oracle']:.2f} dB above the oracle ({ok(gaps['oracle'] <= 3)})",
        level=f"{level:+.2f} dB ({ok(abs(level) <= 3 and level <= 0.5)})",
        pesq=f"{dpesq:+.2f} ({ok(dpesq >= -0.1)})",
        reject=f"{100 * res['guard_rejection_rate']:.2f}% of hops ({ok(res['guard_rejection_rate'] < 0.05)})",
    )
    m = record["metrics"]
    corpus = info["corpus"]
    ablation_md = ""
    if ablations:
        ablation_md = (
            "### Which sources help\n\nThe same recipe trained on part of the corpus, scored the same way (means over both clips\n"
            "and both channels; the network only).\n\n"
            + _ablation_rows(ablations, table)
            + "\n"
        )
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
  {info['guard']['novelty_max']:.2f}, reflection coefficients below {1 - info['guard']['stability_margin']:.3f}.
- Training: {record['data']['train_hops']} hops (10 ms) of training speakers, {record['data']['val_hops']} of held-out
  speakers for early stopping (best epoch {m['best_epoch']}), {record['wall_s'] / 60:.1f} minutes on 2 CPU cores.

## Training corpus, licences and exclusions

{corpus['files']} files surveyed, {corpus['kept_files']} kept ({corpus['kept_active_hours'] * 60:.0f} minutes of active speech, {corpus['speakers']} speakers or voices).
Excluded files, by reason (a file may have several): {', '.join(f'{k} {v}' for k, v in corpus['exclusion_reasons'].items()) or 'none'}.
The per-file survey is in `survey.csv` and `survey.png`; the sources and their licences in `SOURCES.md`.
The corpus is rebuilt offline from Debian packages by `python -m nenv.train.open_corpus`. Nothing made
from a CMU ARCTIC speaker was used (the evaluation sentences below include one).

Because part of the training data is GPL-3.0-or-later, these weights are distributed under the
GPL-3.0-or-later.

## Evaluation on held-out speech

Two CMU ARCTIC sentences (tests/data; a male and a female speaker, neither in the training data),
through the telephone channel without and with G.711 mu-law. Lower is better except WB-PESQ.

{evaluate.to_markdown([evaluate.Row(r['clip'], r['law'], r['system'], evaluate.Scores(**{k: r[k] for k in evaluate.MEASURE_NAMES})) for r in table])}
{evaluate.MEASURES_NOTE}
Guard on these clips: {100 * res['guard_rejection_rate']:.2f}% of hops fell back to the codebook.

On the held-out speakers of the training sources ({', '.join(record['corpus']['val_speakers'])}):
envelope LSD over 3.4-8 kHz {m['val_envelope_lsd_high_db']['neural']:.2f} dB (codebook {m['val_envelope_lsd_high_db']['codebook']:.2f} dB), median level
error {m['val_median_level_error_db']['neural']:+.2f} dB, guard rejections {100 * m['val_guard_rejection_rate']:.2f}%.

{ablation_md}### Goals

{targets}
![spectrograms](evaluation.png)

## Limitations

- Trained mostly on rendered (diphone) speech and on isolated letters and syllables; conversational,
  emotional or far-field speech, children (one rendered child voice only) and tonal languages are
  poorly covered. Expect larger errors there; the guard catches only gross failures.
- WB-PESQ rates the extended output below the unextended input. On these clips WB-PESQ also rates
  the oracle's correct band higher the more it is attenuated (by 0.4 at -20 dB; README, "Measured
  quality"), so it measures how faint the added band is more than how right it is. LSD and the level
  error show the model is closer to the truth than the baselines; whether listeners prefer it should
  be checked by listening tests for your use.
- Two evaluation sentences are a small sample: the numbers above carry an uncertainty of the order of
  0.5 dB.
- Noise, reverberation and codecs other than G.711 were seen in training only as mild white noise.
"""
    write_text(folder / "MODEL.md", md)
    return ev


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("folder", type=Path)
    ap.add_argument("--sources", type=Path, default=None)
    ap.add_argument("--ablation", action="append", default=[], metavar="LABEL=FOLDER", help="a model trained on part of the sources, for the 'which sources help' table")
    args = ap.parse_args()
    abl = dict(a.split("=", 1) for a in args.ablation)
    write(args.folder, sources=args.sources, ablations={k: Path(v) for k, v in abl.items()})
    print(f"wrote {args.folder / 'MODEL.md'}")


if __name__ == "__main__":
    main()
