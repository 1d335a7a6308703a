"""Score recordings that already exist (extended by nenv or by anything else) against wideband references.

``nenv evaluate`` makes its own telephone version of each reference, so its outputs line up with
the references sample for sample and at the same level. Recordings from a real gateway do not: the
narrowband side went through a network (delay, level plan, automatic gain), and the output may
come from any system. Here each output file is paired with its reference, the pair is lined up in
time and level (:mod:`nenv.report.lineup`: offset, drift, jumps, gain), and scored with
:class:`nenv.report.measures.Scores` at the level ``nenv evaluate`` uses: the reference at -26 dBov
active level, the output scaled by the same factor and by the level difference of the two
telephone bands. Only the output's overall level is changed, never the balance of its bands, which
is what is judged.

An 8 kHz file among the outputs is the unextended input: it is resampled to 16 kHz and scored as
such, so one table shows whether an extension beats no extension on the user's own calls.
"""

from __future__ import annotations

import csv
import io
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from nenv.media import audio
from nenv.errors import InputError, NenvError
from nenv.report import evaluate as ev, lineup
from nenv.report.measures import Scores
from nenv.settings import NB_SR, WB_SR
from nenv.words import count

@dataclass(frozen=True)
class Pair:
    """An output file and the reference it is scored against."""

    clip: str  # the reference's name: its stem, or its path inside the reference folder without suffix
    system: str  # the output as the user named it (a file, or the folder it was found in)
    output: Path
    reference: Path


def _key(path: Path, folder: Path) -> str:
    return path.relative_to(folder).with_suffix("").as_posix()


def plan(outputs: Sequence[str | os.PathLike], reference: str | os.PathLike) -> tuple[list[Pair], list[str]]:
    """Pairs of (output, reference) and notes on what could not be paired.

    A reference file: every output file (and every audio file inside an output folder) is scored
    against it. A reference folder: every output must be a folder, and its files pair with the
    reference files at the same relative path (any audio suffix on either side).
    """
    ref = Path(reference)
    outs = [Path(p) for p in outputs]
    if not outs:
        raise InputError("name at least one output file or folder to score")
    for what, p in [("reference", ref), *(("output", o) for o in outs)]:
        if not p.exists():
            raise InputError(f"the {what} '{p}' does not exist")
    pairs: list[Pair] = []
    notes: list[str] = []
    if ref.is_file():
        for o in outs:
            files = audio.find_audio(o) if o.is_dir() else [o]
            if not files:
                raise InputError(f"the folder '{o}' holds no audio files ({', '.join(audio.READ_SUFFIXES)})")
            pairs += [Pair(ref.stem, str(f), f, ref) for f in files]
        return pairs, notes
    refs = {_key(p, ref): p for p in audio.find_audio(ref)}
    if not refs:
        raise InputError(f"the reference folder '{ref}' holds no audio files ({', '.join(audio.READ_SUFFIXES)})")
    for o in outs:
        if not o.is_dir():
            raise InputError(f"'{o}' is a file, but the reference '{ref}' is a folder: a reference folder pairs with output folders (files at the same relative paths)")
        found = {_key(p, o): p for p in audio.find_audio(o)}
        matched = [k for k in found if k in refs]
        if not matched:
            raise InputError(f"no file in '{o}' has a counterpart in '{ref}' (pairs need the same relative path, e.g. {next(iter(refs))}.wav)")
        unmatched = [k for k in found if k not in refs]
        if unmatched:
            notes.append(f"{count(len(unmatched), 'file')} in '{o}' {'has' if len(unmatched) == 1 else 'have'} no reference and {'is' if len(unmatched) == 1 else 'are'} not scored (first: {unmatched[0]})")
        missing = [k for k in refs if k not in found]
        if missing:
            notes.append(f"'{o}' lacks {count(len(missing), 'reference clip')} (first: {missing[0]}): its means cover fewer clips than the references hold")
        pairs += [Pair(k, str(o), found[k], refs[k]) for k in matched]
    return pairs, notes


def _load(path: str | os.PathLike, channel_index: int | None, mix: bool) -> audio.Audio:
    """A file as mono; the channel choice applies to multichannel files only (a mono output beside
    stereo references is read as it is)."""
    import soundfile as sf

    try:
        mono = sf.info(str(path)).channels == 1
    except Exception:  # unreadable: audio.load says why
        mono = False
    return audio.load(path) if mono else audio.load(path, channel=channel_index, mix=mix)


def load_reference(path: str | os.PathLike, *, channel_index: int | None = None, mix: bool = False) -> np.ndarray:
    """A wideband reference at 16 kHz, as it is recorded (level and length untouched)."""
    return ev.reference_at_16k(_load(path, channel_index, mix), path)


def load_output(path: str | os.PathLike, *, channel_index: int | None = None, mix: bool = False) -> tuple[np.ndarray, str | None]:
    """An output at 16 kHz, and a note when it had to be resampled (8 kHz: the unextended input)."""
    a = _load(path, channel_index, mix)
    if audio.is_silent(a.y):
        raise InputError(f"'{path}' is digital silence: there is nothing to score")
    if a.sr == WB_SR:
        return a.y, None
    note = UNEXTENDED_NOTE if a.sr == NB_SR else f"{a.sr} Hz, resampled to 16 kHz"
    return audio.resample(a.y, orig_sr=a.sr, target_sr=WB_SR), note


UNEXTENDED_NOTE = "8 kHz: scored as the unextended input, resampled to 16 kHz"


def unextended_outputs(rows: Sequence["Scored"]) -> list[str]:
    """The outputs (as named) whose every scored file was at 8 kHz: the unextended input."""
    systems = list(dict.fromkeys(r.pair.system for r in rows if r.scores is not None))
    return [s for s in systems if all(UNEXTENDED_NOTE in r.notes for r in rows if r.pair.system == s and r.scores is not None)]


@dataclass(frozen=True)
class Scored:
    """One output scored against its reference, or the reason it could not be."""

    pair: Pair
    scores: Scores | None
    alignment: lineup.Alignment | None = None
    notes: tuple[str, ...] = ()
    error: str | None = None
    clock_ppm: float = 0.0  # the output's clock against the reference's, undone before scoring (0: none found)
    found: lineup.Alignment | None = None  # the first alignment, before any resampling (its segments' lags as recorded)
    levels: tuple[tuple[float, float], ...] = ()  # (s of the reference, dB): the output's level per segment as scored
    evened: bool = False  # the level was evened out second by second

    @property
    def undone(self) -> bool:
        """Whether more than one offset and one gain was needed (drift, jumps or a moving level)."""
        return bool(self.clock_ppm or (self.alignment is not None and self.alignment.pieces) or self.evened)


def score(pair: Pair, *, max_offset_s: float = lineup.MAX_OFFSET_S, channel_index: int | None = None, mix: bool = False) -> Scored:
    """Load, line up (:func:`nenv.report.lineup.line_up`) and score one pair; nenv's own errors come back
    as ``error`` (the others go on)."""
    try:
        ref = load_reference(pair.reference, channel_index=channel_index, mix=mix)
        out, note = load_output(pair.output, channel_index=channel_index, mix=mix)
        u = lineup.line_up(ref, out, level_dbov=ev.EVAL_LEVEL_DBOV, max_offset_s=max_offset_s)
        notes = ((note,) if note else ()) + u.notes
        return Scored(pair, Scores.compute(u.ref, u.out), u.alignment, notes, clock_ppm=u.clock_ppm, found=u.found, levels=u.levels, evened=u.evened)
    except NenvError as e:
        return Scored(pair, None, error=str(e))


def run(
    pairs: Sequence[Pair], *, max_offset_s: float = lineup.MAX_OFFSET_S, channel_index: int | None = None, mix: bool = False, workers: int = 1, on_step: Callable[[Scored], None] | None = None
) -> list[Scored]:
    """Score every pair (``workers`` processes, 0 = one per core; ``on_step`` after each); results in
    the order of ``pairs`` whichever way they ran."""
    from functools import partial

    from nenv.serve import parallel

    fn = partial(score, max_offset_s=max_offset_s, channel_index=channel_index, mix=mix)
    out: list = [None] * len(pairs)
    for i, s in parallel.as_done(fn, [(p,) for p in pairs], workers=workers, fresh=True):
        out[i] = s
        if on_step:
            on_step(s)
    return out


@dataclass(frozen=True)
class Mean:
    """Mean scores of one output (system) over the clips of one group (``group`` None: all its clips)."""

    system: str
    group: str | None
    clips: int
    scores: Scores


def means(rows: Sequence[Scored], groups: dict[str, str] | None = None) -> list[Mean]:
    """Per output: the mean over all its scored clips, then (with ``groups``) over each group's."""
    return [Mean(*m) for m in ev.group_means([(r.pair.system, r.pair.clip, r.scores) for r in rows if r.scores is not None], groups)]


def to_markdown(rows: Sequence[Scored], avg: Sequence[Mean]) -> str:
    head = ["clip", "output", "offset [ms]", "gain [dB]", "clock [ppm]", "jumps", *(ev.MEASURE_LABELS[m] for m in ev.MEASURE_NAMES)]
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join(["---"] * 2 + ["---:"] * (len(head) - 2)) + "|"]
    for r in rows:
        if r.scores is None:
            continue
        vals = [f"{getattr(r.scores, m):.2f}" for m in ev.MEASURE_NAMES]
        lines.append("| " + " | ".join([r.pair.clip, r.pair.system, f"{1000 * r.alignment.offset / WB_SR:.1f}", f"{r.alignment.gain_db:+.1f}", f"{r.clock_ppm:+.0f}", str(len(r.alignment.jumps)), *vals]) + " |")
    for m in avg:
        label = f"**mean** ({count(m.clips, 'clip')})" if m.group is None else f"**mean {m.group}** ({count(m.clips, 'clip')})"
        vals = [f"{getattr(m.scores, k):.2f}" for k in ev.MEASURE_NAMES]
        lines.append("| " + " | ".join([label, m.system, "", "", "", "", *vals]) + " |")
    return "\n".join(lines) + "\n"


def to_csv(rows: Sequence[Scored], avg: Sequence[Mean], groups: dict[str, str] | None = None) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["clip", "group", "output", "offset_ms", "gain_db", "correlation", "clock_ppm", "jumps", *ev.MEASURE_NAMES, "error"])
    for r in rows:
        if r.scores is None:
            w.writerow([r.pair.clip, ev.group_of(r.pair.clip, groups) or "", r.pair.system, "", "", "", "", "", *([""] * len(ev.MEASURE_NAMES)), r.error])
            continue
        a = r.alignment
        w.writerow([r.pair.clip, ev.group_of(r.pair.clip, groups) or "", r.pair.system, f"{1000 * a.offset / WB_SR:.4f}", f"{a.gain_db:.3f}", f"{a.correlation:.3f}", f"{r.clock_ppm:.1f}", len(a.jumps), *(f"{getattr(r.scores, m):.4f}" for m in ev.MEASURE_NAMES), ""])
    for m in avg:
        w.writerow([f"mean ({m.clips})", m.group or "", m.system, "", "", "", "", "", *(f"{getattr(m.scores, k):.4f}" for k in ev.MEASURE_NAMES), ""])
    return buf.getvalue()


def blank_notes(rows: Sequence[Scored]) -> list[str]:
    """One line per measure whose value is NaN (not measurable) somewhere, saying where and why."""
    notes = []
    for m in ev.MEASURE_NAMES:
        where = list(dict.fromkeys(f"{r.pair.clip} ({r.pair.system})" for r in rows if r.scores is not None and not np.isfinite(getattr(r.scores, m))))
        if where:
            notes.append(f"{ev.MEASURE_LABELS[m]} is blank (nan) for {', '.join(where)}: {ev.BLANK_REASONS.get(m, ev.BLANK_DEFAULT)}; the means leave it out")
    return notes


ALIGN_NOTE = """\
Alignment (nenv.report.lineup): each output is shifted by "offset", the lag of the largest
cross-correlation of the two signals' 500-3000 Hz bands (positive: the output is late), and both are
cut to the time they share. "gain" is the output's 500-3000 Hz level re the reference's; the pair
is scored with the reference at -26 dBov and the output scaled to match it there (the balance of the
output's bands is untouched). ViSQOL needs this: its score depends on the absolute level. An
output whose clock drifts against the reference's (lags of one-second segments, Theil-Sen slope)
is resampled to the reference's clock first (a note gives the rate in ppm). Where the output's offset
jumps (a jitter buffer's playout adjustments; "jumps" counts them), each stretch is scored at its own
offset and what only one side holds is left out (a note says where and by how much). An output whose
level moves by more than 3 dB over the call (one-second segments) is evened out second by second.
Lost packets are counted (20 ms blocks of the loudest speech the output does not follow), not cut out.
"""
