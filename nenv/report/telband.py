"""The telephone band two recordings share (500-3000 Hz, inside any telephone channel), and what it
says about a lined-up pair besides time: the output's level re the reference's second by second (an
automatic level control rides it), and the 20 ms blocks of speech the output does not follow (lost
packets or their concealment). Used by :mod:`nenv.report.lineup`.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

from nenv.settings import WB_SR

ALIGN_BAND_HZ = (500.0, 3000.0)  # Hz: inside the pass band of any telephone channel (ITU-T G.712: 300-3400 Hz)
SEGMENT = WB_SR  # samples (1 s): segments whose waveform correlation says whether two recordings hold the same speech
LEVEL_BLOCK = 320  # samples at 16 kHz (20 ms): blocks for the level match
LEVEL_ACTIVE_DB = 30.0  # dB: blocks of the reference's band within this of its loudest block set the gain
LEVEL_TRACK_DB = 3.0  # dB: a spread of the output's level re the reference's over the call larger than this
# (one-second segments, a median of three) is evened out before scoring (our rule; an automatic level control)
MATCH_BLOCK = 320  # samples at 16 kHz (20 ms, a packet): blocks checked for speech the output does not hold
MATCH_ACTIVE_DB = 20.0  # dB: blocks of the reference's band within this of its loudest are checked
MATCH_MIN_CORRELATION = 0.5  # a checked block whose bands correlate less than this does not match (our rule)
MATCH_NOTE = 0.02  # a share of unmatched blocks from which a note says so
LEVEL_TRACK_SPEECH_DB = 15.0  # dB: segments of the reference's band within this of its loudest set the track


def band(y: np.ndarray) -> np.ndarray:
    """``y`` [shape=(n,)] at 16 kHz band-passed to ALIGN_BAND_HZ, with no delay (4th-order Butterworth,
    forward and backward)."""
    sos = signal.butter(4, ALIGN_BAND_HZ, btype="bandpass", fs=WB_SR, output="sos")
    return signal.sosfiltfilt(sos, y)


def segment_levels(r: np.ndarray, o: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The output's telephone-band level re the reference's, in dB, per one-second segment of an
    aligned pair ``r``, ``o`` that holds speech (a median of three segments, so one odd segment moves
    nothing): the segments' centres in samples, and the levels. Each side's noise floor (its power
    where the reference is quietest) is taken out first and only segments within
    LEVEL_TRACK_SPEECH_DB of the loudest count, so a noisy channel's quiet stretches do not look louder."""
    rb, ob = band(r), band(o)
    nb = rb.size // LEVEL_BLOCK
    n = nb * LEVEL_BLOCK // SEGMENT
    if n == 0:
        return np.zeros(0), np.zeros(0)
    pr = np.mean(rb[: nb * LEVEL_BLOCK].reshape(nb, LEVEL_BLOCK) ** 2, axis=1)
    po = np.mean(ob[: nb * LEVEL_BLOCK].reshape(nb, LEVEL_BLOCK) ** 2, axis=1)
    quiet = pr <= np.percentile(pr, 10)
    per = SEGMENT // LEVEL_BLOCK
    er = pr[: n * per].reshape(n, per).mean(axis=1) - np.median(pr[quiet])
    eo = po[: n * per].reshape(n, per).mean(axis=1) - np.median(po[quiet])
    which = np.flatnonzero((er >= er.max() * 10 ** (-LEVEL_TRACK_SPEECH_DB / 10)) & (eo > 0)) if er.max() > 0 else np.zeros(0, int)
    g = 10 * np.log10(eo[which] / er[which])
    g = np.array([np.median(g[max(i - 1, 0) : i + 2]) for i in range(g.size)])
    return (which + 0.5) * SEGMENT, g


def level_track(r: np.ndarray, o: np.ndarray, *, levels: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray | None:
    """The output's level re the reference's per sample, in dB: :func:`segment_levels` (or ``levels``,
    what it returned) joined by straight lines (flat beyond the first and last segment); None when
    there are fewer than three segments or the levels spread by no more than LEVEL_TRACK_DB (one gain
    then serves, as :func:`align` finds it)."""
    at, g = segment_levels(r, o) if levels is None else levels
    if g.size < 3 or np.ptp(g) <= LEVEL_TRACK_DB:
        return None
    return np.interp(np.arange(o.size), at, g)


def unmatched(r: np.ndarray, o: np.ndarray) -> tuple[int, int]:
    """Of an aligned pair's MATCH_BLOCK blocks where the reference's band is within MATCH_ACTIVE_DB of
    its loudest: how many the output's band does not follow (normalised correlation under
    MATCH_MIN_CORRELATION: a lost packet, its concealment, or a system that changed the telephone
    band), and how many were checked."""
    rb, ob = band(r), band(o)
    n = rb.size // MATCH_BLOCK
    if n == 0:
        return 0, 0
    rr, oo = rb[: n * MATCH_BLOCK].reshape(n, MATCH_BLOCK), ob[: n * MATCH_BLOCK].reshape(n, MATCH_BLOCK)
    er, eo = np.sum(rr * rr, axis=1), np.sum(oo * oo, axis=1)
    checked = er >= er.max() * 10 ** (-MATCH_ACTIVE_DB / 10) if er.max() > 0 else np.zeros(n, bool)
    corr = np.sum(rr * oo, axis=1) / np.sqrt(np.maximum(er * eo, 1e-300))
    return int(np.count_nonzero(checked & (corr < MATCH_MIN_CORRELATION))), int(np.count_nonzero(checked))
