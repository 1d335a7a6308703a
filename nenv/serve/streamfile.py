"""Extending one file in bounded memory: read in blocks, stream through the engine, write atomically.

:func:`extend_file` streams a file of any length through a
:class:`nenv.serve.runtime.CallEngine` in blocks (the same output as the offline
pipeline, bit-exact in 16-bit) and writes the result block by block to a
temporary file that is renamed into place only when complete. Its working
memory does not grow with the file's length. :func:`watch` counts the
guard's verdicts (and writes the guard record) without keeping anything per
hop. :mod:`nenv.serve.batch` runs it over many files.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator, Optional

import numpy as np

from nenv.errors import InputError
from nenv.settings import HOP_NB, NB_SR, WB_SR

BLOCK_S = 10.0  # seconds of input per processing block in extend_file
OUTPUT_SUFFIXES = (".wav", ".flac")


@dataclass(frozen=True)
class Options:
    """How to extend (picklable: sent to worker processes and cluster workers)."""

    method: str = "neural"
    model: Optional[str] = None  # model folder; None = default model
    excitation: str = "rectify"
    low_band: bool = False
    band_trim_db: Optional[float] = None  # None = the model folder's calibration
    resample: bool = False
    channel: Optional[int] = None
    mix: bool = False
    group: Optional[str] = None


@dataclass
class FileResult:
    """What happened to one file."""

    source: str
    output: str
    status: str = "done"  # done | skipped | failed
    seconds: float = 0.0  # input duration
    wall_s: float = 0.0
    limited: int = 0  # output samples clipped by the peak limiter
    hops: int = 0
    rejected: int = 0  # hops where the guard fell back to the codebook
    by_reason: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    message: str = ""  # the error, for failed files


_CHECKPOINTS: dict = {}  # per process: model folder -> loaded checkpoint (a batch loads each model once)


def load_checkpoint(model: Optional[str]):
    from nenv.chain.pipeline import load_model

    key = str(model)
    if key not in _CHECKPOINTS:
        _CHECKPOINTS[key] = load_model(model)
        _CHECKPOINTS[key].session()  # a corrupt ONNX file fails here, before any output is opened
    return _CHECKPOINTS[key]


def _system(opts: Options, reference: Optional[np.ndarray]):
    from nenv.chain import pipeline
    from nenv.dsp.excitation import METHODS

    if opts.method not in pipeline.SYSTEMS:
        raise InputError(f"--method {opts.method} is not known: choose one of {', '.join(pipeline.SYSTEMS)}")
    if opts.excitation not in METHODS:
        raise InputError(f"--excitation {opts.excitation} is not known: choose one of {', '.join(METHODS)}")
    model = load_checkpoint(opts.model) if opts.method in pipeline.MODEL_SYSTEMS else None
    return pipeline.make_system(opts.method, reference=reference, excitation=opts.excitation, model=model, low_band=opts.low_band, band_trim_db=opts.band_trim_db)


def _narrowband_blocks(reader, *, resample: bool, notes: list) -> tuple[Iterator[np.ndarray], int]:
    """8 kHz blocks of a reader's signal (resampled on the fly if allowed) and their total length."""
    sr, path = reader.sr, reader.path
    block = int(BLOCK_S * sr)
    if sr == NB_SR:
        return reader.blocks(block), reader.frames
    if not resample:
        if sr >= 16000:
            raise InputError(
                f"'{path}' is sampled at {sr} Hz, which looks like wideband audio; extend takes 8 kHz telephone speech. "
                f"Make a telephone version with 'nenv degrade {path} OUT.wav', or pass --resample to resample it to 8 kHz as it is"
            )
        raise InputError(f"'{path}' is sampled at {sr} Hz: pass 8000 Hz narrowband input or add --resample")
    import soxr

    if sr > NB_SR:
        notes.append(f"resampled {sr} Hz to 8 kHz; this does not simulate a telephone channel (use 'nenv degrade' for that)")
    else:
        notes.append(f"resampled {sr} Hz up to 8 kHz; the input holds nothing above {sr / 2:.0f} Hz, so neither does the extension's base band")
    n_out = int(round(reader.frames * NB_SR / sr))

    def gen() -> Iterator[np.ndarray]:
        rs = soxr.ResampleStream(sr, NB_SR, 1, dtype="float64", quality="HQ")
        done = 0
        for y in reader.blocks(block):
            z = rs.resample_chunk(y)[: n_out - done]
            done += z.size
            yield z
        z = rs.resample_chunk(np.zeros(0), last=True)[: n_out - done]
        done += z.size
        yield np.concatenate([z, np.zeros(n_out - done)])

    return gen(), n_out


def extend_file(
    src: str | os.PathLike,
    dst: str | os.PathLike,
    opts: Options = Options(),
    *,
    reference: Optional[str | os.PathLike] = None,
    record: Optional[str | os.PathLike] = None,
    on_progress: Optional[Callable[[int, int], None]] = None,
) -> FileResult:
    """Extend one 8 kHz file to a 16 kHz file in bounded memory; the output appears only when complete.

    Parameters
    ----------
    src : narrowband input (8 kHz; other rates with ``opts.resample``)
    dst : .wav or .flac output (16-bit); replaced atomically
    opts : :class:`Options`
    reference : wideband original, for the oracle and true-band methods only (held in memory)
    record : append the guard's record (JSON Lines) here (neural only)
    on_progress : called as (input samples done, total) after each block

    Raises
    ------
    InputError, OutputError, ConfigError (all :class:`nenv.errors.NenvError`)
    """
    from nenv.media import audio
    from nenv.media.files import check_distinct, check_output
    from nenv.chain.pipeline import REFERENCE_SYSTEMS
    from nenv.chain.systems import band_note
    from nenv.serve.runtime import CallEngine

    t0 = time.perf_counter()
    src, dst = Path(src), check_output(dst, suffixes=OUTPUT_SUFFIXES)
    check_distinct(dst, what="the output", others={"the input": src, "the reference": reference})
    if record is not None:
        check_distinct(record, what="the record", others={"the input": src, "the reference": reference, "the output": dst})
    notes: list[str] = []
    ref = None
    if opts.method in REFERENCE_SYSTEMS:
        if reference is None:
            raise InputError(f"--method {opts.method} needs --reference WIDEBAND.wav (the original the narrowband input was made from)")
    elif reference is not None:
        raise InputError("--reference is used by --method oracle and true-band only")
    with audio.Reader(src, channel=opts.channel, mix=opts.mix) as reader:
        if reader.truncated:
            notes.append(reader.truncated)
        blocks, n = _narrowband_blocks(reader, resample=opts.resample, notes=notes)
        if opts.method in REFERENCE_SYSTEMS:  # the reference is aligned to the whole input: read all its blocks first
            blocks = list(blocks)
            ref = _oracle_reference(reference, np.concatenate(blocks))
        system = _system(opts, ref)
        if getattr(system, "band_trim_db", 0.0):
            notes.append(band_note(system.band_trim_db, given=opts.band_trim_db is not None))
        n_hops = -(-n // HOP_NB)
        tally, writer = watch(system, record, source=str(src), group=opts.group, n_hops=n_hops)
        engine = CallEngine(system=system)
        done, heard = 0, False
        try:
            with audio.writer(dst, sr=WB_SR) as put:
                for block in blocks:
                    heard = heard or bool(np.any(block))
                    put(engine.feed(block))
                    done += block.size
                    if on_progress:
                        on_progress(done, n)
                put(engine.flush())
                if not heard:  # a silent leg of a call is normal: silence in, silence out
                    notes.append("the input is digital silence (every sample is zero): the output is silence too")
        except BaseException:
            if writer is not None:
                writer.close()
            raise
    res = FileResult(str(src), str(dst), seconds=n / NB_SR, wall_s=time.perf_counter() - t0, limited=engine.limited, notes=notes)
    if tally is not None:
        res.hops, res.rejected, res.by_reason = tally.hops, tally.rejected, dict(sorted(tally.by_reason.items()))
    if writer is not None:
        writer.summary(source=str(src), group=opts.group, tally=tally, seconds=n / NB_SR, output=str(dst.resolve()))
        writer.close()
    return res


def _oracle_reference(reference, x: np.ndarray) -> np.ndarray:
    """The wideband original at 16 kHz, brought to the narrowband input's level (the oracle needs both alike)."""
    from nenv.dsp import channel as chan
    from nenv.report.evaluate import prepare_reference

    ref = prepare_reference(reference)
    nb_of_ref = chan.telephone(ref, sr=WB_SR, level_dbov=None)
    n = min(nb_of_ref.size, x.size)
    num = float(np.dot(nb_of_ref[:n], nb_of_ref[:n]))
    check_reference_matches(nb_of_ref[:n], x[:n], reference)
    return ref * (float(np.sqrt(np.dot(x[:n], x[:n]) / num)) if num > 0 else 1.0)


def check_reference_matches(nb_of_ref: np.ndarray, x: np.ndarray, reference) -> None:
    """Refuse a reference that is not, sample for sample, the original the narrowband input ``x`` was made
    from: the oracle would take another recording's envelope (scaled to the input's level, however
    unlike), and true-band would add another recording's band. Both are the same length at 8 kHz.

    The test is the waveform correlation of the reference's telephone band with the input at lag 0, at
    least :data:`nenv.report.lineup.MIN_CORRELATION` (the rule ``nenv measures`` refuses a pair by; ours).
    G.711 keeps it near 1 (0.9999 at -26 dBov), noise at 0 dB SNR about 0.8 (both measured on ARCTIC a0007). When it
    fails, the lag of the largest correlation within +-1 s tells the user how far one is shifted. A
    silent input is let through (its output is silence whatever the reference).
    """
    from scipy import signal

    from nenv.report.lineup import MIN_CORRELATION

    e_ref, e_x = float(np.dot(nb_of_ref, nb_of_ref)), float(np.dot(x, x))
    if e_x == 0.0 or e_ref == 0.0:
        return
    norm = np.sqrt(e_ref * e_x)
    at_zero = float(np.dot(nb_of_ref, x)) / norm
    if at_zero >= MIN_CORRELATION:
        return
    if at_zero <= -MIN_CORRELATION:
        raise InputError(f"the input is the reference's telephone band with its polarity inverted (correlation {at_zero:.2f}): invert one of them")
    reach = min(NB_SR, x.size - 1)
    c = signal.correlate(x, nb_of_ref, mode="full", method="fft") / norm
    lags = signal.correlation_lags(x.size, nb_of_ref.size, mode="full")
    near = np.abs(lags) <= reach
    best = int(np.argmax(np.abs(c[near])))
    lag, corr = int(lags[near][best]), float(c[near][best])
    if abs(corr) >= MIN_CORRELATION:
        where = "behind" if lag > 0 else "ahead of"
        raise InputError(
            f"the input is {1000 * abs(lag) / NB_SR:.1f} ms {where} the reference (telephone-band correlation {corr:.2f} there, "
            f"{at_zero:.2f} as they are): --method oracle and true-band need the two sample-aligned, as `nenv degrade` makes them; "
            "shift one of them (recordings that are not aligned are scored by `nenv measures`)"
        )
    raise InputError(
        f"'{reference}' is not the original of this input: its telephone band and the input correlate at most {abs(corr):.2f} "
        f"within +-1 s (at least {MIN_CORRELATION} is needed); --reference must be the wideband recording the input was made from"
    )


def watch(system, record, *, source: str, group: Optional[str], n_hops: int, keep_going: bool = False, on_failure=None):
    """Count the guard's verdicts on the first ``n_hops`` hops (and write rejected ones to ``record``;
    ``keep_going``, ``on_failure``: what a failed write does, :class:`nenv.report.records.RecordWriter`).

    Returns ``(tally, writer)``: a :class:`nenv.chain.guard.Tally` (None for systems without a guard)
    and a :class:`nenv.report.records.RecordWriter` (None without ``record``). Nothing is kept per hop,
    so memory does not grow with the length of the file or call.
    """
    from nenv.chain.estimators.neural import NeuralEstimator
    from nenv.chain.guard import Tally

    est = getattr(system, "estimator", None)
    guarded = isinstance(est, NeuralEstimator) and est.guard is not None
    if record is not None and not guarded:
        raise InputError("--record needs the neural method (only the guard's decisions are recorded)")
    if not guarded:
        return None, None
    writer = None
    if record is not None:
        from nenv.report.records import RecordWriter

        writer = RecordWriter(record, checkpoint=est.checkpoint, context=est.checkpoint.features.context, band_trim_db=getattr(system, "band_trim_db", 0.0),
                              keep_going=keep_going, on_failure=on_failure)
    tally = Tally(limit=n_hops)

    def listen(first_hop, dec, x, a_nb):
        dec = tally.add(first_hop, dec)
        if writer is not None and dec.rejected.size:
            k = dec.rejected.size
            writer.hops(source=source, group=group, first_hop=first_hop, dec=dec, x=x[:k], a_nb=a_nb[:k])

    est.keep_decisions = False
    est.listener = listen
    return tally, writer
