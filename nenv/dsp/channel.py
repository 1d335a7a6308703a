"""The telephone channel: what a wideband recording goes through to become a call.

Used to make training pairs and evaluation inputs from wideband speech, never
on the extension path. The chain, in order:

1. resample to 16 kHz if needed (soxr);
2. optional additive white Gaussian noise at a given SNR, measured over the
   active-speech frames of the full-band signal (background noise at the
   talker's side, before the channel);
3. a 300-3400 Hz linear-phase band-pass (Kaiser-window FIR at 16 kHz,
   applied with its delay removed so narrowband and wideband frames stay
   time-aligned);
4. decimation by 2 to 8 kHz (the band-pass is also the anti-alias filter);
5. level setting in dBov (active-speech level, see :func:`active_level_dbov`);
6. optional ITU-T G.711 companding (mu-law or A-law), which also quantises to
   the 8-bit characters a PCMU/PCMA call carries.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import signal

from nenv.dsp import g711
from nenv.media.audio import resample
from nenv.errors import InputError
from nenv.settings import NB_SR, WB_SR

BANDPASS_CUTOFFS = (200.0, 3500.0)  # Hz, -6 dB points of the band-pass
BANDPASS_WIDTH = 200.0  # Hz, transition width of each edge
BANDPASS_ATTEN = 60.0  # dB, Kaiser design target for the stop bands
NOMINAL_LEVEL_DBOV = -26.0  # common practice: nominal active speech level on telephone links


@lru_cache(maxsize=None)
def bandpass_taps() -> np.ndarray:
    """The channel band-pass, FIR taps at 16 kHz (odd length, linear phase).

    Kaiser-window design (scipy.signal.kaiserord + firwin): -6 dB at 200 and
    3500 Hz, transitions 100-300 Hz and 3400-3600 Hz. Measured
    (tests/test_channel.py): within +-0.01 dB over 300-3400 Hz, no gain above
    0 dB anywhere, and at least 55 dB of rejection from 3.6 kHz up and below 100 Hz.
    """
    n, beta = signal.kaiserord(BANDPASS_ATTEN, BANDPASS_WIDTH / (WB_SR / 2))
    return signal.firwin(n | 1, list(BANDPASS_CUTOFFS), window=("kaiser", beta), pass_zero=False, fs=WB_SR)


def bandpass(y: np.ndarray) -> np.ndarray:
    """Apply the channel band-pass at 16 kHz with zero net delay (same length out)."""
    h = bandpass_taps()
    d = (h.size - 1) // 2
    return signal.fftconvolve(y, h)[d : d + y.size]


def active_level_dbov(y: np.ndarray, *, sr: int, floor_db: float = 50.0) -> float:
    """Active-speech level in dBov: RMS over 10 ms frames within ``floor_db`` of the loudest.

    0 dBov is the RMS of a full-scale square wave (sample value 1.0), so a
    full-scale sine measures -3.01 dBov. This is a simplified activity rule of
    our own, not the ITU-T P.56 method; it agrees with plain RMS on steady signals.

    Returns -inf for digital silence.
    """
    hop = max(1, sr // 100)
    n = y.size // hop
    if n == 0:
        p = np.mean(y**2) if y.size else 0.0
        return 10 * np.log10(p) if p > 0 else -np.inf
    e = np.mean(y[: n * hop].reshape(n, hop) ** 2, axis=1)
    if e.max() <= 0:
        return -np.inf
    active = e >= e.max() * 10 ** (-floor_db / 10)
    return float(10 * np.log10(np.mean(e[active])))


def set_level(y: np.ndarray, *, sr: int, level_dbov: float) -> np.ndarray:
    """Scale ``y`` so that its active-speech level is ``level_dbov``."""
    cur = active_level_dbov(y, sr=sr)
    if not np.isfinite(cur):
        raise InputError("cannot set the level of digital silence")
    return y * 10 ** ((level_dbov - cur) / 20)


def add_noise(y: np.ndarray, *, sr: int, snr_db: float, rng: np.random.Generator) -> np.ndarray:
    """Add white Gaussian noise at ``snr_db`` below the active-speech level of ``y``."""
    level = active_level_dbov(y, sr=sr)
    if not np.isfinite(level):
        raise InputError("cannot set an SNR against digital silence")
    sigma = 10 ** ((level - snr_db) / 20)
    return y + rng.standard_normal(y.size) * sigma


def telephone(
    y: np.ndarray,
    *,
    sr: int,
    law: g711.Law = "none",
    level_dbov: float | None = NOMINAL_LEVEL_DBOV,
    snr_db: float | None = None,
    seed: int = 0,
) -> np.ndarray:
    """Pass wideband speech through the telephone channel.

    Parameters
    ----------
    y : np.ndarray [shape=(n,)], full scale 1.0
    sr : int [Hz], rate of ``y`` (resampled to 16 kHz first if different)
    law : 'mulaw' | 'alaw' | 'none'
    level_dbov : float or None [dBov]; None keeps the level
    snr_db : float or None [dB]; None adds no noise
    seed : int, seeds the noise generator

    Returns
    -------
    np.ndarray [shape=(ceil(n16 / 2),)] at 8 kHz, time-aligned with the input
    """
    if law not in g711.LAWS:
        raise InputError(f"law={law!r} is not known: choose one of {', '.join(g711.LAWS)}")
    if sr < WB_SR:
        raise InputError(f"sr={sr} Hz is below 16 kHz: the channel needs wideband input")
    x = resample(y, orig_sr=sr, target_sr=WB_SR)
    if snr_db is not None:
        x = add_noise(x, sr=WB_SR, snr_db=snr_db, rng=np.random.default_rng(seed))
    nb = bandpass(x)[::2]
    if level_dbov is not None:
        nb = set_level(nb, sr=NB_SR, level_dbov=level_dbov)
    return g711.compand(nb, law=law) if law != "none" else nb
