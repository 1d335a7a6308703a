"""Line up a recording with its wideband reference in time and level, undoing what a capture went through.

A recording captured behind a gateway is late by some offset, at another level, and sometimes moved
during the call: a clock that runs fast or slow (drift), an adaptive jitter buffer that changes its
delay in steps (jumps), an automatic level control that rides the level. :func:`line_up` finds each
from the telephone band (500-3000 Hz), which any system leaves alone, undoes it, and says so in
notes; only time and overall level are changed, never the balance of the output's bands. The steps
and the numbers measured with them: ``docs/scoring-captured-calls.md``.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy import signal

from nenv.dsp import channel
from nenv.errors import InputError
from nenv.report import telband
from nenv.report.telband import LEVEL_ACTIVE_DB, LEVEL_BLOCK, SEGMENT, band, level_track, segment_levels, unmatched
from nenv.settings import WB_SR
from nenv.words import count

MAX_OFFSET_S = 2.0  # s: default search range of the offset, either way
ENVELOPE_BLOCK = 160  # samples at 16 kHz (10 ms): blocks of the band envelopes that find the coarse offset (longer
# than a pitch period, whose pulses would otherwise give peaks one period off)
MIN_CORRELATION = 0.5  # median segment correlation below which a pair is refused (our rule; measured in tests/test_pairs.py)
MIN_OVERLAP_S = 0.5  # s: shortest aligned overlap scored (ViSQOL needs about this much)
MIN_SHARED = 0.5  # offsets at which the two share less than this part of the shorter one are not considered
DRIFT_MIN_S = 6.0  # s: an overlap at least this long is also checked for drift (offset of its first vs last third)
DRIFT_NOTE_MS = 1.0  # ms: a drift larger than this is reported and undone (two clocks that differ)
UNDRIFT_PASSES = 3  # resampling passes at most
RESIDUAL_PPM = 10.0  # ppm: a drift left after resampling that is resampled again (1 ms over 100 s)
SEGMENT_REACH_S = 0.15  # s: each segment's lag is searched this far either way of the offset (reaches a jitter
# buffer's playout adjustments of one to several 10-30 ms packets, and 2000 ppm of drift over 75 s)
LAG_UNIQUE = 24  # samples (1.5 ms): a segment's lag must beat every lag further than this from it (a voice's
LAG_MARGIN = 0.1  # period is at least 2.5 ms) by this much correlation to count for jumps and drift (our rule;
# measured: 0.05-0.73 on real speech through a 10 dB SNR channel, about 0 on a tone or a pulse train)
JUMP_MIN_MS = 2.0  # ms: a step this large between neighbouring segments' lags (drift removed) is a jump (our rule)
JUMP_BLOCK = 80  # samples at 16 kHz (5 ms): a jump placed nearer than this to the end of its search is none


@dataclass(frozen=True)
class Alignment:
    """How an output lines up with its reference.

    offset : int, samples at 16 kHz; positive when the output lags the reference
    gain_db : float, dB, the output's telephone band re the reference's
    correlation : float, median over one-second segments of the two telephone bands' best waveform correlation (1 = same)
    drift_ms : float or None, offset over the last third minus over the first third (None: overlap too short to tell)
    rate_ppm : float or None, the output's clock against the reference's (the slope of the segments' lags,
        Theil-Sen), parts per million, positive when the output runs long; None where drift_ms is None
    pieces : ((start, offset), ...): where the output's offset jumps (an adaptive jitter buffer's playout
        adjustments), from which reference sample on each offset holds; empty when ``offset`` holds throughout.
        Drift and rate are measured with the jumps taken out.
    """

    offset: int
    gain_db: float
    correlation: float
    drift_ms: float | None = None
    rate_ppm: float | None = None
    pieces: tuple[tuple[int, int], ...] = ()
    segments: tuple[tuple[float, float], ...] = ()  # (s of the reference, lag in ms re offset) of the segments whose lag was found

    @property
    def jumps(self) -> list[tuple[int, int]]:
        """(reference sample, change of the offset in samples) of each jump, in order."""
        return [(self.pieces[i][0], self.pieces[i][1] - self.pieces[i - 1][1]) for i in range(1, len(self.pieces))]


def _envelope(band: np.ndarray) -> np.ndarray:
    n = band.size // ENVELOPE_BLOCK * ENVELOPE_BLOCK
    e = np.sqrt(np.mean(band[:n].reshape(-1, ENVELOPE_BLOCK) ** 2, axis=1))
    return e - e.mean() if e.size else e


def _envelope_lag(er: np.ndarray, eo: np.ndarray, reach: int) -> tuple[int, float]:
    """The lag within +-reach (in blocks) of the largest correlation of the envelopes, each lag's
    correlation normalised by the energies of the blocks the two share there (so a recording whose
    start or end is missing is not marked down), where they share at least half the shorter one
    (fewer shared blocks match other speech by chance)."""
    c = signal.correlate(eo, er, mode="full", method="fft")
    lags = signal.correlation_lags(eo.size, er.size, mode="full")
    cr = np.concatenate([[0.0], np.cumsum(er * er)])
    co = np.concatenate([[0.0], np.cumsum(eo * eo)])
    start = np.maximum(0, -lags)  # first reference block shared at each lag
    stop = np.minimum(er.size, eo.size - lags)  # one past the last
    shared = stop - start
    ok = (np.abs(lags) <= reach) & (shared >= max(MIN_OVERLAP_S * WB_SR / ENVELOPE_BLOCK, MIN_SHARED * min(er.size, eo.size)))
    if not np.any(ok):
        return 0, 0.0
    s0, s1, lg = start[ok], stop[ok], lags[ok]
    norm = np.sqrt((cr[s1] - cr[s0]) * (co[s1 + lg] - co[s0 + lg]))
    r = np.where(norm > 0, c[ok] / np.where(norm > 0, norm, 1.0), 0.0)
    i = int(np.argmax(r))
    return int(lg[i]), float(r[i])


def _fine_lag(ref_b: np.ndarray, out_b: np.ndarray, around: int, reach: int) -> int:
    """The lag in around +- reach of the largest cross-correlation of the waveforms, summed segment by
    segment (the same sums as one correlation of the whole signals, in memory of one segment)."""
    acc = np.zeros(2 * reach + 1)
    for start in range(0, ref_b.size, SEGMENT):
        r = ref_b[start : start + SEGMENT]
        lo = start + around - reach  # out[lo + k + n] meets r[n] at lag around - reach + k
        o = np.zeros(r.size + 2 * reach)
        a, b = max(lo, 0), min(lo + o.size, out_b.size)
        if b > a:
            o[a - lo : b - lo] = out_b[a:b]
            acc += signal.correlate(o, r, mode="valid")
    return around - reach + int(np.argmax(acc))


def overlap(ref: np.ndarray, out: np.ndarray, offset: int) -> tuple[np.ndarray, np.ndarray]:
    """The parts of ``ref`` and ``out`` that cover the same time, given the output's offset."""
    if offset >= 0:
        out = out[offset:]
    else:
        ref = ref[-offset:]
    n = min(ref.size, out.size)
    return ref[:n], out[:n]


def _lag_near(seg: np.ndarray, o: np.ndarray, start: int, centre: int, reach: int) -> tuple[int, float, float]:
    """The lag within ``centre`` +- ``reach`` of the largest correlation of ``seg`` with ``o`` (``seg[0]``
    meets ``o[start + lag]``), each lag's correlation normalised by the energies of the two stretches it
    compares; that correlation; and by how much it beats the best one further than LAG_UNIQUE from it
    (near 0 for a tone or a held vowel, whose lag is ambiguous by whole periods)."""
    lo = start + centre - reach
    window = np.zeros(seg.size + 2 * reach)  # o[lo : lo + window.size], zero outside o
    a, b = max(lo, 0), min(lo + window.size, o.size)
    if b > a:
        window[a - lo : b - lo] = o[a:b]
    c = signal.correlate(window, seg, mode="valid")  # c[j]: lag centre - reach + j
    cum = np.concatenate([[0.0], np.cumsum(window * window)])
    norm = np.sqrt(np.sum(seg * seg) * (cum[seg.size :] - cum[: -seg.size]))
    c = np.where(norm > 0, c / np.where(norm > 0, norm, 1.0), 0.0)
    j = int(np.argmax(c))
    far = np.abs(np.arange(c.size) - j) > LAG_UNIQUE
    return centre - reach + j, float(c[j]), float(c[j] - c[far].max()) if far.any() else 1.0


def _segment_lags(r: np.ndarray, o: np.ndarray, reach: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """For each SEGMENT of the reference band ``r`` that holds speech (within 30 dB of the loudest
    segment): its index, and :func:`_lag_near`'s lag, correlation and margin against the output band
    ``o`` (sample ``i`` of ``o`` meets sample ``i`` of ``r`` at lag 0). Each lag is searched within
    +-``reach`` of 0 and, where a neighbour's clear lag is more than ``reach`` / 2 away from 0, around
    that lag too (the better kept), first forward then backward, so jumps and drift that add up beyond
    ``reach`` are followed. Short
    segments keep the correlation near 1 for the same speech even when two clocks drift or a jitter
    buffer moves the offset."""
    n = r.size // SEGMENT
    if n == 0:
        return np.zeros(0, int), np.zeros(0, int), np.zeros(0), np.zeros(0)
    e = np.sum(r[: n * SEGMENT].reshape(n, SEGMENT) ** 2, axis=1)
    which = np.flatnonzero(e >= e.max() * 10 ** (-LEVEL_ACTIVE_DB / 10)) if e.max() > 0 else np.zeros(0, int)
    segs = [r[k * SEGMENT : (k + 1) * SEGMENT] for k in which]
    found = [_lag_near(seg, o, k * SEGMENT, 0, reach) for seg, k in zip(segs, which)]

    def clear(f: tuple[int, float, float]) -> bool:
        return f[1] >= MIN_CORRELATION and f[2] >= LAG_MARGIN

    for order in (range(len(found)), range(len(found) - 1, -1, -1)):
        last = None  # the lag of the last clear segment met in this direction
        for i in order:
            if last is not None and abs(last) > reach // 2:  # where a search around 0 may not reach
                again = _lag_near(segs[i], o, which[i] * SEGMENT, last, reach)
                if clear(again) and again[1] > found[i][1]:
                    found[i] = again
            if clear(found[i]):
                last = found[i][0]
    lags, corrs, margins = (np.array(v) for v in zip(*found)) if found else (np.zeros(0),) * 3
    return which, lags.astype(int), corrs.astype(float), margins.astype(float)


def _steps(which: np.ndarray, lags: np.ndarray) -> np.ndarray:
    """Jumps between neighbouring segments' lags: for each pair (i, i + 1) the step left once the drift
    (the median step per segment, which a few jumps do not move) is taken out, zero where it is under
    JUMP_MIN_MS."""
    if lags.size < 2:
        return np.zeros(max(lags.size - 1, 0))
    dt, dl = np.diff(which), np.diff(lags).astype(float)
    step = dl - np.median(dl / dt) * dt
    return np.where(np.abs(step) >= JUMP_MIN_MS * WB_SR / 1000, step, 0.0)


def _slope(which: np.ndarray, lags: np.ndarray, run: np.ndarray) -> float | None:
    """Change of the lag per segment (Theil-Sen: the median of the slopes between any two segments of
    the same run, so a jump between runs does not tilt it); None when no two segments share a run."""
    i, j = np.triu_indices(which.size, 1)
    keep = (run[i] == run[j]) & (which[i] != which[j])
    if not np.any(keep):
        return None
    i, j = i[keep], j[keep]
    return float(np.median((lags[j] - lags[i]) / (which[j] - which[i])))


def _place(r: np.ndarray, o: np.ndarray, lo: int, hi: int, before: int, after: int) -> int | None:
    """Where in r[lo:hi] the lag changes from ``before`` to ``after``: the split that makes the two lags'
    waveform products largest, to the sample; None when it is within JUMP_BLOCK of either end (one lag
    fits the whole stretch: no jump)."""
    if hi - lo < 2 * JUMP_BLOCK:
        return None
    idx = np.arange(lo, hi)

    def products(lag: int) -> np.ndarray:
        j = idx + lag
        ok = (j >= 0) & (j < o.size)
        return np.where(ok, r[idx] * o[np.clip(j, 0, o.size - 1)], 0.0)

    p1, p2 = products(before), products(after)
    fit = np.concatenate([[0.0], np.cumsum(p1)]) + np.concatenate([np.cumsum(p2[::-1])[::-1], [0.0]])
    b = int(np.argmax(fit))
    return None if b < JUMP_BLOCK or b > idx.size - JUMP_BLOCK else lo + b


def _gain_db(r: np.ndarray, o: np.ndarray) -> float:
    """The output band's power re the reference band's over the LEVEL_BLOCK blocks where the reference's
    is within LEVEL_ACTIVE_DB of its loudest, in dB (0 for a silent reference)."""
    n = r.size // LEVEL_BLOCK * LEVEL_BLOCK
    e_ref = np.sum(r[:n].reshape(-1, LEVEL_BLOCK) ** 2, axis=1)
    e_out = np.sum(o[:n].reshape(-1, LEVEL_BLOCK) ** 2, axis=1)
    if not e_ref.size or e_ref.max() <= 0:
        return 0.0
    active = e_ref >= e_ref.max() * 10 ** (-LEVEL_ACTIVE_DB / 10)
    return float(10 * np.log10(max(e_out[active].sum(), 1e-300) / max(e_ref[active].sum(), 1e-300)))


def align(ref: np.ndarray, out: np.ndarray, *, max_offset_s: float = MAX_OFFSET_S) -> Alignment:
    """Offset, level difference and drift of ``out`` against ``ref`` (both 16 kHz, mono).

    Both are band-passed to 500-3000 Hz. The offset is found coarsely from the bands' envelopes (RMS in
    10 ms blocks, whose correlation survives noise, coding and clock drift), then to the sample from
    the waveforms within 15 ms of it. Whether the two hold the same speech is judged on the waveforms
    of one-second segments (median of their best correlations within +-150 ms of the offset or of
    their neighbours' lags); their lags also give
    the jumps of the offset (a step of at least 2 ms between neighbours once the drift is taken out,
    placed to the sample by the waveforms) and, with the jumps taken out, the drift. The gain is the ratio of
    the bands' powers over the blocks where the reference's band is within 30 dB of its loudest block.
    """
    ref_b, out_b = band(ref), band(out)
    coarse, _ = _envelope_lag(_envelope(ref_b), _envelope(out_b), int(round(max_offset_s * WB_SR / ENVELOPE_BLOCK)))
    offset = _fine_lag(ref_b, out_b, coarse * ENVELOPE_BLOCK, int(1.5 * ENVELOPE_BLOCK))
    r, o = overlap(ref_b, out_b, offset)
    if r.size < LEVEL_BLOCK:
        return Alignment(offset, 0.0, 0.0)
    gain_db = _gain_db(r, o)
    o_from = out_b[max(offset, 0) :]  # o_from[i] meets r[i] at the offset found
    which, lags, corrs, margins = _segment_lags(r, o_from, int(SEGMENT_REACH_S * WB_SR))
    similarity = float(np.median(corrs)) if corrs.size else 0.0
    good = (corrs >= MIN_CORRELATION) & (margins >= LAG_MARGIN)  # segments whose lag was found, and is the only one
    which, lags = which[good], lags[good]
    steps = _steps(which, lags)
    run = np.concatenate([[0], np.cumsum(steps != 0)]).astype(int)  # segments between two jumps share a run
    slope = _slope(which, lags, run)
    flat = lags.astype(float)  # the lags with the jumps taken out: each run moved onto the first
    if slope is not None:
        base = np.array([np.median((lags - slope * which)[run == k]) for k in range(run[-1] + 1)])  # each run's lag at segment 0
        flat = flat - (base[run] - base[0])
    drift = rate = None
    if r.size >= DRIFT_MIN_S * WB_SR and flat.size >= 3:
        third = max(1, flat.size // 3)
        drift = float(1000.0 * (np.median(flat[-third:]) - np.median(flat[:third])) / WB_SR)
        if slope is not None:
            rate = float(1e6 * slope / SEGMENT)
    pieces, now = [], int(lags[0]) if lags.size else 0
    for i in np.flatnonzero(steps):
        at = _place(r, o_from, int(which[i]) * SEGMENT, int(which[i + 1] + 1) * SEGMENT, now, int(lags[i + 1]))
        if at is not None and int(lags[i + 1]) != now and (not pieces or at > pieces[-1][0]):
            pieces.append((at, int(lags[i + 1])))
            now = int(lags[i + 1])
    start = max(0, -offset)  # r[0] is this sample of the reference
    if pieces:  # offsets from the reference's first sample: each piece's lag is its first segment's
        pieces = [(0, offset + int(lags[0]))] + [(start + at, offset + lag) for at, lag in pieces]
    segments = tuple((float((start + (k + 0.5) * SEGMENT) / WB_SR), float(1000 * lag / WB_SR)) for k, lag in zip(which, lags))
    return Alignment(offset, float(gain_db), similarity, drift, rate, tuple(pieces), segments)


def splice(ref: np.ndarray, out: np.ndarray, a: Alignment) -> tuple[np.ndarray, np.ndarray]:
    """The parts of ``ref`` and ``out`` that hold the same speech: :func:`overlap` at ``a.offset``, or,
    where the offset jumps, each piece at its own offset, joined. Where the output's offset grows it
    holds samples the reference does not (inserted by the jitter buffer): they are left out; where it
    shrinks the output lacks some of the reference's samples: those are left out of the reference."""
    if not a.pieces:
        return overlap(ref, out, a.offset)
    rs, os_ = [], []
    r_next, o_next = 0, 0  # first samples not yet used
    for j, (start, off) in enumerate(a.pieces):
        end = a.pieces[j + 1][0] if j + 1 < len(a.pieces) else ref.size
        s = max(start, r_next, o_next - off, -off)
        e = min(end, out.size - off, ref.size)
        if e > s:
            rs.append(ref[s:e])
            os_.append(out[s + off : e + off])
            r_next, o_next = e, e + off
    return (np.concatenate(rs), np.concatenate(os_)) if rs else (ref[:0], out[:0])


def undrift(out: np.ndarray, rate_ppm: float) -> np.ndarray:
    """``out`` resampled to undo a clock running ``rate_ppm`` long: to ``len(out) / (1 + rate)``
    samples through the FFT (band-limited, any ratio)."""
    return signal.resample(out, int(round(out.size / (1 + rate_ppm * 1e-6))))


@dataclass(frozen=True)
class LinedUp:
    """A pair lined up by :func:`line_up`, both at the level given, ready to score.

    ref, out : np.ndarray [shape=(n,)], 16 kHz, the time both hold
    alignment : the final alignment (after any resampling); found : the first, as the capture came
    clock_ppm : float, the clock rate undone (0: none); levels : ((s of the reference, dB), ...), the
    output's level re the reference's per segment; evened : whether that level was evened out
    notes : what was undone or is doubtful, in words
    """

    ref: np.ndarray
    out: np.ndarray
    alignment: Alignment
    found: Alignment
    clock_ppm: float
    levels: tuple[tuple[float, float], ...]
    evened: bool
    notes: tuple[str, ...]


def line_up(ref: np.ndarray, out: np.ndarray, *, level_dbov: float, max_offset_s: float = MAX_OFFSET_S) -> LinedUp:
    """Align ``out`` with ``ref`` (both 16 kHz, mono) in time and level and cut both to what they share:
    offset, clock drift (resampled), jumps of the offset (spliced), gain or a riding level; the reference
    is brought to ``level_dbov`` active level and the output with it. Raises InputError when the two hold
    no common speech or share less than MIN_OVERLAP_S."""
    a = found = align(ref, out, max_offset_s=max_offset_s)
    notes = []
    # two clocks that differ: the output is resampled to the reference's clock and aligned again; a
    # large drift blurs the first estimate (the lags move inside each segment) and jumps leave short
    # runs to measure it on, so up to UNDRIFT_PASSES passes while a notable drift is left, or, once
    # resampled, a rate of RESIDUAL_PPM
    drift_ms, total = a.drift_ms, 0.0
    for _ in range(UNDRIFT_PASSES):
        if a.rate_ppm is None or (abs(a.drift_ms) <= DRIFT_NOTE_MS and (not total or abs(a.rate_ppm) < RESIDUAL_PPM)):
            break
        out = undrift(out, a.rate_ppm)
        total = (1 + total * 1e-6) * (1 + a.rate_ppm * 1e-6) * 1e6 - 1e6
        a = align(ref, out, max_offset_s=max_offset_s)
    if total:
        notes.append(f"the output's clock drifts {total:+.0f} ppm from the reference's ({drift_ms:+.1f} ms from the first to the last third): resampled to match before scoring")
    if a.correlation < MIN_CORRELATION:
        raise InputError(
            f"no common speech found within +-{max_offset_s:g} s (telephone-band correlation {a.correlation:.2f}, "
            f"below {MIN_CORRELATION}): not the same recording, or offset further (raise --max-offset-s)"
        )
    r, o = splice(ref, out, a)
    if a.pieces:  # the gain found at one offset counted the other pieces' mismatched blocks: again, lined up
        a = replace(a, gain_db=_gain_db(band(r), band(o)))
        said = ", ".join(f"{1000 * d / WB_SR:+.1f} ms at {at / WB_SR:.2f} s" for at, d in a.jumps)
        notes.append(
            f"the output's offset jumps {count(len(a.jumps), 'time')} ({said}; a jitter buffer's playout adjustments): "
            "scored on the speech both hold, the stretches only one of them holds left out"
        )
    if r.size < MIN_OVERLAP_S * WB_SR:
        raise InputError(f"the aligned overlap is {r.size / WB_SR:.2f} s: at least {MIN_OVERLAP_S} s is needed")
    # both at the level asked for: the reference at its nominal active level, the output scaled with it so
    # that their telephone bands match (ViSQOL's verdict depends on the absolute level: its spectrograms
    # have an absolute floor, so the same pair scores differently louder or softer)
    k = 10 ** ((level_dbov - channel.active_level_dbov(r, sr=WB_SR)) / 20)
    at, g = segment_levels(r, o)
    track = level_track(r, o, levels=(at, g))
    levels = tuple((float((t + max(0, -a.offset)) / WB_SR), float(v)) for t, v in zip(at, g))  # s of the reference (jumps aside)
    if track is None:
        r, o = r * k, o * (k / 10 ** (a.gain_db / 20))
    else:  # every band of the output alike, moment by moment: the balance of its bands is untouched
        notes.append(
            f"the output's level re the reference's moves from {track.min():+.1f} to {track.max():+.1f} dB over the call "
            "(an automatic level control?): evened out second by second before scoring"
        )
        r, o = r * k, o * (k / 10 ** (track / 20))
    bad, checked = unmatched(r, o)
    if checked and bad >= telband.MATCH_NOTE * checked:
        notes.append(
            f"{bad} of the {checked} loudest 20 ms blocks ({100 * bad / checked:.0f}%) do not follow the reference in the telephone band "
            "(lost packets or their concealment, or a system that changed that band): they are scored as they are"
        )
    if a.drift_ms is not None and abs(a.drift_ms) > DRIFT_NOTE_MS:
        notes.append(f"the offset still drifts by {a.drift_ms:+.1f} ms from the first to the last third: the spectral measures are less reliable")
    return LinedUp(r, o, a, found, total, levels, track is not None, tuple(notes))
