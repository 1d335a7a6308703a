"""Objective measures of extended speech against a wideband reference.

All measures compare two time-aligned 16 kHz signals of equal length.

Spectral analysis (both signals alike): frames of 512 samples (32 ms) every
160 samples (10 ms), periodic Hann window, 512-point FFT, power per bin
``|X|**2 / sum(w**2)``. A frame is *active* when its reference energy is
within 40 dB of the reference's loudest frame. Power below a floor of 80 dB
under the loudest reference bin of the file is raised to that floor in both
signals, so empty bands compare at the floor instead of at -infinity.

The perceptual measures (WB-PESQ, ViSQOL) take a pair of up to 30 s whole, a longer one window by
window (:func:`perceptual_windows`, :func:`perceptual`).
"""

from __future__ import annotations

import os
import sys
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np

from nenv.dsp import cepstrum, lpc
from nenv.errors import InputError
from nenv.settings import BAND_EDGE_HZ, LOW_BAND_HZ, WB_SR

N_FFT = 512  # samples at 16 kHz = 32 ms
HOP = 160  # samples = 10 ms
ACTIVE_DB = 40.0  # dB below the loudest reference frame still counted as active
FLOOR_DB = 80.0  # dB below the loudest reference bin: power floor
ENVELOPE_ORDER = 16  # LPC order of the smoothed (envelope-only) spectra
HIGH_BAND = (BAND_EDGE_HZ, WB_SR / 2)  # Hz
FULL_BAND = (0.0, WB_SR / 2)  # Hz
LOW_BAND = LOW_BAND_HZ  # Hz, 50-300: the low band wideband telephony adds (bins 62.5-281 Hz on this grid)
LOW_PRESENT_DB = 30.0  # dB: frames whose reference low band is within this of its loudest frame's hold a low band
LONG_S = 30.0  # s: a longer pair gets its perceptual measures window by window
WINDOW_S = 12.0  # s: nominal window length, cut at the quietest 100 ms within CUT_SEARCH_S of it
CUT_SEARCH_S = 2.0  # s
MIN_WINDOW_ACTIVE_S = 1.0  # s of active speech a window needs to be scored
BLOCK_10MS = WB_SR // 100  # samples: blocks that find the windows' cuts and their active speech


def frames(y: np.ndarray) -> np.ndarray:
    """The analysis frames of ``y`` [shape=(1 + n // HOP, N_FFT)]: padded by N_FFT/2 on both sides,
    one every HOP samples; a read-only view (no copy of the overlapping samples)."""
    pad = np.pad(np.asarray(y, dtype=np.float64), (N_FFT // 2, N_FFT // 2))
    return lpc.hop_frames(pad[None, :], frame_length=N_FFT, hop_length=HOP, n_frames=1 + (pad.size - N_FFT) // HOP)[0]


def _window() -> np.ndarray:
    return 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(N_FFT) / N_FFT)


def power_spectra(y: np.ndarray) -> np.ndarray:
    """Short-time power spectra [shape=(n_frames, N_FFT//2+1)] on the grid above."""
    return frame_power(frames(y))


def frame_power(frames: np.ndarray) -> np.ndarray:
    """Power spectra of raw frames [shape=(n, N_FFT)]: Hann window, ``|X|**2 / sum(w**2)``."""
    w = _window()
    spec = np.fft.rfft(frames * w, axis=-1)
    return (spec.real**2 + spec.imag**2) / np.sum(w * w)


def envelope_spectra(y: np.ndarray) -> np.ndarray:
    """LPC envelopes (order 16, with gain) of the same frames [shape=(n_frames, N_FFT//2+1)]."""
    w = _window()
    fr = frames(y) * w
    r = lpc.autocorrelation(fr, order=ENVELOPE_ORDER)
    r[:, 0] *= 1.0 + 1e-9  # keeps digital-silence frames well defined
    a, _, err = lpc.levinson(r, order=ENVELOPE_ORDER)
    return cepstrum.power_spectrum(a, gain=np.sqrt(np.maximum(err, 0) / np.sum(w * w)), n_fft=N_FFT)


def _check(ref: np.ndarray, est: np.ndarray) -> None:
    if ref.shape != est.shape or ref.ndim != 1:
        raise InputError(f"measures need two mono signals of equal length, got {ref.shape} and {est.shape}")


def _band(band: tuple[float, float]) -> np.ndarray:
    f = np.fft.rfftfreq(N_FFT, 1 / WB_SR)
    return (f >= band[0]) & (f <= band[1])


def _active(p_ref: np.ndarray) -> np.ndarray:
    e = p_ref.sum(axis=1)
    return e >= e.max() * 10 ** (-ACTIVE_DB / 10) if e.max() > 0 else np.zeros(e.size, bool)


def _lsd(p_ref: np.ndarray, p_est: np.ndarray, band: tuple[float, float], floor_from: np.ndarray) -> float:
    active = _active(floor_from)
    if not np.any(active):
        return float("nan")
    floor = floor_from.max() * 10 ** (-FLOOR_DB / 10)
    sel = _band(band)
    d = 10 * np.log10(np.maximum(p_ref[active][:, sel], floor)) - 10 * np.log10(np.maximum(p_est[active][:, sel], floor))
    return float(np.mean(np.sqrt(np.mean(d * d, axis=1))))


def lsd(ref: np.ndarray, est: np.ndarray, *, band: tuple[float, float] = HIGH_BAND) -> float:
    """Log-spectral distance in dB over ``band`` (Hz), mean over active frames.

    Per frame: ``sqrt(mean over bins in band of (10 log10 P_ref - 10 log10 P_est)**2)``.
    """
    _check(ref, est)
    p_ref = power_spectra(ref)
    return _lsd(p_ref, power_spectra(est), band, p_ref)


def lsd_envelope(ref: np.ndarray, est: np.ndarray, *, band: tuple[float, float] = HIGH_BAND) -> float:
    """As :func:`lsd`, on order-16 LPC envelopes (with gain): spectral shape and level only.

    Active frames and the floor come from the reference's short-time spectra.
    """
    _check(ref, est)
    return _lsd(envelope_spectra(ref), envelope_spectra(est), band, power_spectra(ref))


def high_band_level_error(ref: np.ndarray, est: np.ndarray) -> float:
    """Median over active frames of ``10 log10(E_est / E_ref)`` in 3.4-8 kHz, in dB.

    Positive means the high band is louder than the reference (over-estimated).
    """
    _check(ref, est)
    p_ref, p_est = power_spectra(ref), power_spectra(est)
    active = _active(p_ref)
    if not np.any(active):
        return float("nan")
    floor = p_ref.max() * 10 ** (-FLOOR_DB / 10)
    sel = _band(HIGH_BAND)
    e_ref = np.maximum(p_ref[active][:, sel].sum(axis=1), floor)
    e_est = np.maximum(p_est[active][:, sel].sum(axis=1), floor)
    return float(np.median(10 * np.log10(e_est / e_ref)))


def low_band_level_error(ref: np.ndarray, est: np.ndarray) -> float:
    """Median of ``10 log10(E_est / E_ref)`` in 50-300 Hz, in dB, over the active frames where the
    reference holds a low band (its 50-300 Hz power within LOW_PRESENT_DB of its loudest frame's:
    voiced speech, in practice; a rule of our own). Positive: the low band is louder than the reference's.
    """
    _check(ref, est)
    p_ref, p_est = power_spectra(ref), power_spectra(est)
    return _low_level_error(p_ref, p_est)


def _low_level_error(p_ref: np.ndarray, p_est: np.ndarray) -> float:
    sel = _band(LOW_BAND)
    e_ref, e_est = p_ref[:, sel].sum(axis=1), p_est[:, sel].sum(axis=1)
    frames = _active(p_ref) & (e_ref > 0) & (e_ref >= e_ref.max() * 10 ** (-LOW_PRESENT_DB / 10))
    if not np.any(frames):
        return float("nan")
    floor = p_ref.max() * 10 ** (-FLOOR_DB / 10)
    return float(np.median(10 * np.log10(np.maximum(e_est[frames], floor) / np.maximum(e_ref[frames], floor))))


def pesq_wb(ref: np.ndarray, est: np.ndarray) -> float:
    """Wideband PESQ (ITU-T P.862.2) MOS-LQO via the ``pesq`` package; NaN where it cannot score.

    The package's C code raises for clips under a quarter second or without speech it finds, and
    crashes the process (a segmentation fault) on a clip with more than 50 utterances, the fixed
    limit of its reference code (measured: about three minutes of read sentences). So it runs in
    a worker process (:func:`isolated`); a crash there costs that value only.
    """
    _check(ref, est)
    return isolated(_pesq_wb, ref.astype(np.float64), est.astype(np.float64))


def _pesq_wb(ref: np.ndarray, est: np.ndarray) -> float:
    from pesq import pesq

    try:
        return float(pesq(WB_SR, ref, est, "wb"))
    except Exception:  # pesq raises its own NoUtterancesError / BufferTooShortError
        return float("nan")


_worker: list = []  # the one worker process of isolated(), started on first use


def isolated(fn, *args) -> float:
    """``fn(*args)`` in a separate worker process (spawned once, reused); NaN if the worker dies.

    For C code that can crash the interpreter instead of raising. A dead worker is replaced on the
    next call.
    """
    import concurrent.futures
    import multiprocessing

    if not _worker:
        import atexit

        from multiprocessing.util import Finalize

        pool = concurrent.futures.ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("spawn"))
        atexit.register(pool.shutdown)  # stopped while the interpreter is whole, not from a finaliser at teardown
        # and in a worker process of nenv's own pools, which ends without atexit but joins its
        # children first: stop this one before that join, or the worker never ends; before the
        # pool's own queue finalisers (priority 10) too, which would stop its sentinels reaching it
        Finalize(None, pool.shutdown, exitpriority=100)
        _worker.append(pool)
    try:
        return _worker[0].submit(fn, *args).result()
    except concurrent.futures.process.BrokenProcessPool:
        _worker.pop().shutdown(wait=False)
        return float("nan")


_visqol_api: list = []  # the one ViSQOL instance of this process, made on first use


@contextmanager
def _native_stderr_silenced():
    """Send the process's file descriptor 2 to /dev/null for the duration (native libraries' chatter)."""
    sys.stderr.flush()
    saved = os.dup(2)
    try:
        with open(os.devnull, "wb") as null:
            os.dup2(null.fileno(), 2)
            yield
    finally:
        os.dup2(saved, 2)
        os.close(saved)


def visqol_speech(ref: np.ndarray, est: np.ndarray) -> float:
    """ViSQOL v3 in speech mode (MOS-LQO, 1..5) via the ``visqol-python`` package; NaN where it cannot score.

    Speech mode at 16 kHz with the package's bundled lattice mapping model, the default of the
    reference implementation (Chinen et al. 2020, "ViSQOL v3: an open source production ready
    objective speech and audio metric", QoMEX). Its similarity is computed on gammatone
    spectrograms up to 8 kHz, so unlike LSD it sees whether an added band matches the
    original patch by patch. The first call in a process compiles the package's kernels
    (about 10 s).
    """
    _check(ref, est)
    if not _visqol_api:
        import logging

        from visqol.api import VisqolApi

        logging.getLogger("visqol").setLevel(logging.ERROR)
        api = VisqolApi()
        with _native_stderr_silenced():  # the LiteRT runtime announces its CPU delegate on fd 2
            api.create(mode="speech", use_lattice_model=True)
        _visqol_api.append(api)
    try:
        return float(_visqol_api[0].measure_from_arrays(ref.astype(np.float64), est.astype(np.float64), WB_SR).moslqo)
    except (ValueError, RuntimeError, IndexError):  # too short, or no patch of speech to align (silence)
        return float("nan")


def _block_energy(ref: np.ndarray) -> np.ndarray:
    """Energy of each 10 ms block of ``ref`` (the last one possibly shorter)."""
    return np.add.reduceat(ref.astype(np.float64) ** 2, np.arange(0, ref.size, BLOCK_10MS))


def perceptual_windows(ref: np.ndarray) -> list[tuple[int, int]]:
    """Windows ``(start, stop)`` in samples that score a long pair: one window for up to LONG_S
    seconds, else consecutive windows of about WINDOW_S seconds (the last between half and one and a
    half of that, plus the search), each cut in the quietest 100 ms of the reference within
    CUT_SEARCH_S of its nominal end, so no word is split.

    Why: the pesq package's reference code takes at most 50 utterances (it crashes on about three
    minutes of read sentences) and ViSQOL's memory grows with the length (about 1 GB for three
    minutes); splitting a long recording into short samples cut at pauses is common practice for
    PESQ, and ViSQOL averages over short patches in any case.
    """
    n = ref.size
    if n <= LONG_S * WB_SR:
        return [(0, n)]
    e = _block_energy(ref)
    quiet = np.convolve(e, np.ones(10), mode="valid")  # energy of the 100 ms starting at each block
    w, reach = int(WINDOW_S * 100), int(CUT_SEARCH_S * 100)  # in blocks
    cuts = [0]
    while e.size - cuts[-1] > 1.5 * w + reach:
        lo = cuts[-1] + w - reach
        cut = lo + int(np.argmin(quiet[lo : lo + 2 * reach])) + 5  # the middle of the quietest 100 ms
        cuts.append(cut)
    return [(a * BLOCK_10MS, b * BLOCK_10MS) for a, b in zip(cuts, cuts[1:])] + [(cuts[-1] * BLOCK_10MS, n)]


def _window_weights(ref: np.ndarray, windows: list[tuple[int, int]]) -> np.ndarray:
    """Seconds of active speech per window (10 ms blocks within ACTIVE_DB of the loudest block)."""
    e = _block_energy(ref)
    active = e >= e.max() * 10 ** (-ACTIVE_DB / 10) if e.max() > 0 else np.zeros(e.size, bool)
    return np.array([active[a // BLOCK_10MS : -(-b // BLOCK_10MS)].sum() / 100 for a, b in windows])


def perceptual(ref: np.ndarray, est: np.ndarray) -> tuple[float, float]:
    """(WB-PESQ, ViSQOL) of a pair: as they are up to LONG_S seconds; a longer pair as the mean over
    :func:`perceptual_windows` weighted by each window's active speech (windows with less than
    MIN_WINDOW_ACTIVE_S of it, and values a measure cannot give, left out)."""
    windows = perceptual_windows(ref)
    if len(windows) == 1:
        return pesq_wb(ref, est), visqol_speech(ref, est)
    weights = _window_weights(ref, windows)
    values = np.array([(pesq_wb(ref[a:b], est[a:b]), visqol_speech(ref[a:b], est[a:b])) if wt >= MIN_WINDOW_ACTIVE_S else (np.nan, np.nan) for (a, b), wt in zip(windows, weights)])
    out = []
    for col in values.T:
        ok = np.isfinite(col)
        out.append(float(np.average(col[ok], weights=weights[ok])) if ok.any() else float("nan"))
    return out[0], out[1]


@dataclass(frozen=True)
class Scores:
    """Every measure for one system on one clip (dB unless noted)."""

    lsd_high: float
    lsd_full: float
    lsd_env_high: float
    lsd_env_full: float
    level_error_high: float
    lsd_low: float  # 50-300 Hz
    level_error_low: float  # 50-300 Hz, frames where the reference holds a low band
    pesq_wb: float  # MOS-LQO, 1.04..4.64
    visqol: float  # MOS-LQO, 1..5 (speech mode)

    @classmethod
    def compute(cls, ref: np.ndarray, est: np.ndarray) -> "Scores":
        _check(ref, est)
        p_ref, p_est = power_spectra(ref), power_spectra(est)
        e_ref, e_est = envelope_spectra(ref), envelope_spectra(est)
        pesq, vq = perceptual(ref, est)
        return cls(
            lsd_high=_lsd(p_ref, p_est, HIGH_BAND, p_ref),
            lsd_full=_lsd(p_ref, p_est, FULL_BAND, p_ref),
            lsd_env_high=_lsd(e_ref, e_est, HIGH_BAND, p_ref),
            lsd_env_full=_lsd(e_ref, e_est, FULL_BAND, p_ref),
            level_error_high=high_band_level_error(ref, est),
            lsd_low=_lsd(p_ref, p_est, LOW_BAND, p_ref),
            level_error_low=_low_level_error(p_ref, p_est),
            pesq_wb=pesq,
            visqol=vq,
        )
