"""Synthetic wideband 'speech' for training tests: random all-pole vocal tracts, speech-like excitation.

Each speaker has a vocal-tract length factor (all formants scale together) and
a pitch. Each 10 ms hop has five formants driven by three slowly moving
articulation parameters, so the high-band formants (4-7 kHz) are a smooth but
nonlinear function of what the telephone band shows: a network can learn the
mapping, a small codebook can only quantise it. Voiced hops are excited by a
pulse train, unvoiced ones by noise with a stronger high band. Invented data,
for tests only.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import soundfile as sf
from scipy import signal

SR = 16000
HOP = 160


def _smooth_walk(rng, n, k, step=0.08):
    x = np.cumsum(rng.normal(0, step, (n, k)), axis=0)
    x = 0.5 + 0.45 * np.sin(x + rng.uniform(0, 2 * np.pi, k))
    return signal.filtfilt(np.ones(5) / 5, [1.0], x, axis=0)


def utterance(rng: np.random.Generator, *, seconds: float, tract: float, f0: float) -> np.ndarray:
    """One synthetic utterance at 16 kHz, peak about 0.5."""
    n = int(seconds * SR) // HOP
    u = np.clip(_smooth_walk(rng, n, 3), 0, 1)
    voiced = (signal.filtfilt(np.ones(9) / 9, [1.0], rng.standard_normal(n)) > -0.25).astype(float)
    formants = np.column_stack([
        300 + 600 * u[:, 0],
        900 + 1400 * u[:, 1],
        2300 + 800 * u[:, 2],
        3900 + 900 * u[:, 0] * u[:, 1] + 300 * u[:, 2],
        5400 + 1200 * np.sin(np.pi * u[:, 1] * u[:, 2]),
    ]) * tract
    formants = np.minimum(formants, 7600)
    bw = np.array([80, 100, 140, 250, 400])
    out = np.zeros(n * HOP)
    zi = None
    phase = 0.0
    for t in range(n):
        poles = []
        for f, b in zip(formants[t], bw):
            r = np.exp(-np.pi * b / SR)
            poles += [r * np.exp(2j * np.pi * f / SR), r * np.exp(-2j * np.pi * f / SR)]
        if not voiced[t]:  # a fricative-like resonance high up
            f = 6000 * tract * (0.9 + 0.2 * u[t, 2])
            r = np.exp(-np.pi * 600 / SR)
            poles += [r * np.exp(2j * np.pi * f / SR), r * np.exp(-2j * np.pi * f / SR)]
        a = np.real(np.poly(poles))
        if voiced[t]:
            e = np.zeros(HOP)
            period = SR / (f0 * (1 + 0.1 * (u[t, 0] - 0.5)))
            while phase < HOP:
                e[int(phase)] = np.sqrt(period)
                phase += period
            phase -= HOP
            e += 0.05 * rng.standard_normal(HOP)
            e = signal.lfilter([1.0], [1.0, -0.7], e)  # glottal tilt
        else:
            e = 0.6 * rng.standard_normal(HOP)
        if zi is None or zi.size != a.size - 1:
            zi = np.zeros(a.size - 1)
        seg, zi = signal.lfilter([1.0], a, e, zi=zi)
        out[t * HOP : (t + 1) * HOP] = seg
    out = signal.lfilter([1.0, -1.0], [1.0, -0.995], out)  # no DC
    return 0.5 * out / np.max(np.abs(out))


def speaker(rng: np.random.Generator) -> dict:
    return {"tract": rng.uniform(0.88, 1.12), "f0": rng.uniform(90, 240)}


def write_corpus(root: Path, *, n_speakers: int, files_per_speaker: int, seconds: float, seed: int) -> list[dict]:
    """Write root/spkNN/uttMM.wav (16 kHz); return the speakers' parameters."""
    rng = np.random.default_rng(seed)
    speakers = []
    for s in range(n_speakers):
        spk = speaker(rng)
        speakers.append(spk)
        d = root / f"spk{s:02d}"
        d.mkdir(parents=True, exist_ok=True)
        for k in range(files_per_speaker):
            sf.write(d / f"utt{k:02d}.wav", utterance(rng, seconds=seconds, **spk), SR, subtype="PCM_16")
    return speakers
