"""Stored outputs of every system on one sentence, to catch a change of output nobody meant.

A regression record, not a check of correctness: the values are nenv's own outputs at the commit that
wrote them (the file says which). ``tests/test_golden.py`` compares today's outputs with them.
When a change of output is meant (a new model, a new filter), write them again and say why in the
commit message::

    python -m tests.golden

What is stored: ARCTIC a0007 (``tests/data``) through the telephone channel (G.711 mu-law, -26 dBov),
extended offline by each system in :data:`SYSTEMS` with the shipped model, as the 16-bit samples a
user gets, in three stretches (:data:`STRETCHES_S`): the start-up, one second of speech and the end
(the flush). About 320 KB.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import soundfile as sf

ROOT = Path(__file__).resolve().parents[1]
STORE = ROOT / "tests" / "data" / "golden" / "outputs.npz"
CLIP = ROOT / "tests" / "data" / "arctic_a0007.wav"
# name: (method, keywords of make_system); the low band and both other excitations included
SYSTEMS = {
    "neural": ("neural", {}),
    "neural-low-band": ("neural", {"low_band": True}),
    "neural-fold": ("neural", {"excitation": "fold"}),
    "neural-modulate": ("neural", {"excitation": "modulate"}),
    "codebook": ("codebook", {}),
    "imaging": ("imaging", {}),
    "unextended": ("unextended", {}),
    "oracle": ("oracle", {}),
    "true-band": ("true-band", {}),
}
STRETCHES_S = ((0.0, 0.25), (1.25, 2.25), (-0.25, None))  # start-up, speech, end (seconds of the output; None = its end)


def stretches(y: np.ndarray, sr: int = 16000) -> np.ndarray:
    """The stored stretches of one output, joined."""
    def at(t):
        return None if t is None else int(round(t * sr))

    return np.concatenate([y[at(a):at(b)] for a, b in STRETCHES_S])


def outputs() -> dict[str, np.ndarray]:
    """Today's 16-bit outputs of every system, whole."""
    from nenv.chain import pipeline
    from nenv.dsp import channel
    from nenv.media import audio
    from nenv.serve import streamfile

    ref, sr = sf.read(CLIP)
    x = channel.telephone(ref, sr=sr, law="mulaw")
    found = {}
    for name, (method, kw) in SYSTEMS.items():
        reference = streamfile._oracle_reference(CLIP, x) if method in pipeline.REFERENCE_SYSTEMS else None  # as `nenv extend --reference` takes it
        system = pipeline.make_system(method, reference=reference, **kw)
        found[name] = audio.to_int16(pipeline.extend(x, system=system).y)
    return found


def write() -> None:
    commit = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"], capture_output=True, text=True).stdout.strip() or "unknown"
    STORE.parent.mkdir(parents=True, exist_ok=True)
    found = outputs()
    np.savez_compressed(STORE, commit=np.array(commit), n=np.array(next(iter(found.values())).size), **{k: stretches(v) for k, v in found.items()})
    print(f"wrote {STORE.relative_to(ROOT)} ({STORE.stat().st_size // 1024} KB) from {commit}: {', '.join(found)}")


if __name__ == "__main__":
    sys.exit(write())
