"""A measure that never hears the original: DNSMOS P.808 of every system, per speaker group.

Run: pip install speechmos==0.0.1.1 && python tests/bench/nonintrusive_scores.py [CLIPS...] [--groups CSV]

ViSQOL and WB-PESQ score closeness to the original wideband recording; a caller never hears it. DNSMOS
(Reddy, Gopal and Cutler, ICASSP 2021; cited from memory) predicts listeners' absolute ratings (ITU-T
P.808) from the output alone. Its ONNX model ships in the `speechmos` package (MIT licence), which is
not a dependency of nenv: this script is research, and nothing in nenv is chosen by it. Every clip
runs through the telephone channel (G.711 mu-law) and every system as `nenv evaluate` runs them; two
controls show what the predictor rewards: the unextended signal plus a steady hiss above 3.6 kHz at
the true band's mean power, and the same hiss modulated by the true band's 20 ms level track.
The table in docs/2026-12-03-perceptual-quality.md comes from this script on tests/data/heldout.
"""

from __future__ import annotations

import argparse
import glob
from pathlib import Path

import numpy as np
import scipy.signal

from nenv.chain import pipeline
from nenv.dsp import channel
from nenv.report.evaluate import prepare_reference, read_groups

SYSTEMS = ("unextended", "true-band", "oracle", "imaging", "neural", "codebook")
HELDOUT = Path(__file__).resolve().parents[1] / "data" / "heldout"


def p808(y: np.ndarray) -> float:
    from speechmos import dnsmos

    return float(dnsmos.run(np.clip(y, -1.0, 1.0), 16000)["p808_mos"])


def controls(un: np.ndarray, band: np.ndarray, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """The unextended signal plus noise above 3.6 kHz: steady at the true band's mean power, and
    following the true band's 20 ms level track."""
    sos = scipy.signal.butter(10, 3600, "highpass", fs=16000, output="sos")
    hiss = scipy.signal.sosfilt(sos, rng.standard_normal(un.size))
    steady = hiss * np.sqrt(np.mean(band**2) / np.mean(hiss**2))
    track = np.sqrt(np.convolve(band**2, np.ones(320) / 320, mode="same"))
    return {"steady hiss": un + steady, "hiss on the true band's level track": un + scipy.signal.sosfilt(sos, rng.standard_normal(un.size)) * track}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("clips", nargs="*", help="wideband recordings (default: tests/data/heldout/*.flac)")
    ap.add_argument("--groups", help="CSV with clip,group columns (default: the held-out set's clips.csv)")
    args = ap.parse_args()
    clips = args.clips or sorted(glob.glob(str(HELDOUT / "*.flac")))
    groups = read_groups(args.groups or HELDOUT / "clips.csv")
    model = pipeline.load_model()
    rng = np.random.default_rng(0)
    scores: dict[str, dict[str, float]] = {}
    for path in clips:
        name = Path(path).stem
        ref = prepare_reference(path)
        nb = channel.telephone(ref, sr=16000, law="mulaw", level_dbov=None)
        outs = {s: pipeline.extend(nb, system=pipeline.make_system(s, reference=ref, model=model)).y for s in SYSTEMS}
        outs["neural with the low band"] = pipeline.extend(nb, system=pipeline.make_system("neural", model=model, low_band=True)).y
        outs.update(controls(outs["unextended"], outs["true-band"] - outs["unextended"], rng))
        scores[name] = {"the original": p808(ref), **{s: p808(y) for s, y in outs.items()}}
        print(name, " ".join(f"{s}={v:.2f}" for s, v in scores[name].items()), flush=True)
    names = list(scores)
    group = np.array([groups.get(n, "?") for n in names])
    base = np.array([scores[n]["unextended"] for n in names])
    print(f"\nDNSMOS P.808 ({len(names)} clips): {'system':<38} " + " ".join(f"{g:>7}" for g in sorted(set(group))) + "     all  minus unext  clips above")
    for s in scores[names[0]]:
        v = np.array([scores[n][s] for n in names])
        per = " ".join(f"{v[group == g].mean():7.2f}" for g in sorted(set(group)))
        print(f"{'':27}{s:<38} {per} {v.mean():7.2f} {np.mean(v - base):+12.2f} {int(np.sum(v > base)):>6}/{len(names)}")


if __name__ == "__main__":
    main()
