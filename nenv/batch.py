"""Extending files: one file in bounded memory, or many in parallel (local processes or a Dask cluster).

:func:`extend_file` streams a file of any length through a
:class:`nenv.runtime.CallEngine` in blocks (same output as the offline
pipeline, bit-exact in 16-bit) and writes the result block by block to a
temporary file that is renamed into place only when complete. Its working
memory does not grow with the file's length.

:func:`plan` turns folders, files and list files into jobs that mirror the
input layout under one output folder; :func:`run` executes them on all cores
(or on a ``dask.distributed`` scheduler), reports each file as it finishes,
skips outputs that already exist, and never lets one bad file stop the rest.
Because every output is written atomically, a batch killed at any moment
leaves each output either complete or absent; the next run removes the
temporary files a kill left behind and carries on.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Iterator, Optional

import numpy as np

from nenv.errors import InputError, NenvError
from nenv.settings import HOP_NB, NB_SR, WB_SR

BLOCK_S = 10.0  # seconds of input per processing block in extend_file
INPUT_SUFFIXES = (".wav", ".flac", ".ogg", ".oga", ".aif", ".aiff", ".au", ".caf", ".w64", ".rf64", ".mp3")
LIST_SUFFIXES = (".txt", ".lst")
OUTPUT_SUFFIXES = (".wav", ".flac")
REPORT_NAME = "extend-report.csv"


@dataclass(frozen=True)
class Options:
    """How to extend (picklable: sent to worker processes and cluster workers)."""

    method: str = "neural"
    model: Optional[str] = None  # model folder; None = default model
    excitation: str = "rectify"
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


# ---------------------------------------------------------------------------------------------
# one file


_CHECKPOINTS: dict = {}  # per process: model folder -> loaded checkpoint (a batch loads each model once)


def _checkpoint(model: Optional[str]):
    from nenv.pipeline import load_model

    key = str(model)
    if key not in _CHECKPOINTS:
        _CHECKPOINTS[key] = load_model(model)
        _CHECKPOINTS[key].session()  # a corrupt ONNX file fails here, before any output is opened
    return _CHECKPOINTS[key]


def _system(opts: Options, reference: Optional[np.ndarray]):
    from nenv import pipeline
    from nenv.excitation import METHODS

    if opts.method not in pipeline.SYSTEMS:
        raise InputError(f"--method {opts.method} is not known: choose one of {', '.join(pipeline.SYSTEMS)}")
    if opts.excitation not in METHODS:
        raise InputError(f"--excitation {opts.excitation} is not known: choose one of {', '.join(METHODS)}")
    model = _checkpoint(opts.model) if opts.method in pipeline.MODEL_SYSTEMS else None
    return pipeline.make_system(opts.method, reference=reference, excitation=opts.excitation, model=model)


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
    reference : wideband original, for the oracle method only (held in memory)
    record : append the guard's record (JSON Lines) here (neural only)
    on_progress : called as (input samples done, total) after each block

    Raises
    ------
    InputError, OutputError, ConfigError (all :class:`nenv.errors.NenvError`)
    """
    from nenv import audio
    from nenv.files import check_output
    from nenv.runtime import CallEngine

    t0 = time.perf_counter()
    src, dst = Path(src), check_output(dst, suffixes=OUTPUT_SUFFIXES)
    notes: list[str] = []
    ref = None
    if opts.method == "oracle":
        if reference is None:
            raise InputError("--method oracle needs --reference WIDEBAND.wav (the original the narrowband input was made from)")
    elif reference is not None:
        raise InputError("--reference is used by --method oracle only")
    with audio.Reader(src, channel=opts.channel, mix=opts.mix) as reader:
        if reader.truncated:
            notes.append(reader.truncated)
        blocks, n = _narrowband_blocks(reader, resample=opts.resample, notes=notes)
        if opts.method == "oracle":
            x = np.concatenate(list(blocks))
            ref = _oracle_reference(reference, x)
            blocks = (x[i : i + int(BLOCK_S * NB_SR)] for i in range(0, x.size, int(BLOCK_S * NB_SR)))
        system = _system(opts, ref)
        n_hops = -(-n // HOP_NB)
        tally, writer = watch(system, record, source=str(src), group=opts.group, n_hops=n_hops)
        engine = CallEngine(system)
        done, heard = 0, False
        try:
            with audio.writer(dst, sr=WB_SR) as put:
                for x in blocks:
                    heard = heard or bool(np.any(x))
                    put(engine.feed(x))
                    done += x.size
                    if on_progress:
                        on_progress(done, n)
                if not heard:
                    raise InputError(f"'{src}' is digital silence (every sample is zero): there is nothing to extend")
                put(engine.flush())
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
    from nenv import channel as chan
    from nenv.evaluate import prepare_reference

    ref = prepare_reference(reference)
    nb_of_ref = chan.telephone(ref, sr=WB_SR, level_dbov=None)
    n = min(nb_of_ref.size, x.size)
    num = float(np.dot(nb_of_ref[:n], nb_of_ref[:n]))
    return ref * (float(np.sqrt(np.dot(x[:n], x[:n]) / num)) if num > 0 else 1.0)


def watch(system, record, *, source: str, group: Optional[str], n_hops: int):
    """Count the guard's verdicts on the first ``n_hops`` hops (and write rejected ones to ``record``).

    Returns ``(tally, writer)``: a :class:`nenv.guard.Tally` (None for systems without a guard)
    and a :class:`nenv.records.RecordWriter` (None without ``record``). Nothing is kept per hop,
    so memory does not grow with the length of the file or call.
    """
    from nenv.estimators.neural import NeuralEstimator
    from nenv.guard import Tally

    est = getattr(system, "estimator", None)
    guarded = isinstance(est, NeuralEstimator) and est.guard is not None
    if record is not None and not guarded:
        raise InputError("--record needs the neural method (only the guard's decisions are recorded)")
    if not guarded:
        return None, None
    writer = None
    if record is not None:
        from nenv.records import RecordWriter

        writer = RecordWriter(record, checkpoint=est.checkpoint, context=est.checkpoint.features.context)
    tally = Tally(limit=n_hops)

    def listen(first_hop, dec, x, a_nb):
        dec = tally.add(first_hop, dec)
        if writer is not None and dec.rejected.size:
            k = dec.rejected.size
            writer.hops(source=source, group=group, first_hop=first_hop, dec=dec, x=x[:k], a_nb=a_nb[:k])

    est.keep_decisions = False
    est.listener = listen
    return tally, writer


# ---------------------------------------------------------------------------------------------
# many files


@dataclass(frozen=True)
class Job:
    src: Path
    dst: Path
    index: int = 0


def _is_list(p: Path) -> bool:
    return p.is_file() and p.suffix.lower() in LIST_SUFFIXES


def is_batch(inputs: list[Path]) -> bool:
    """True for folders, lists and several inputs; one file in means one file out."""
    return len(inputs) != 1 or inputs[0].is_dir() or _is_list(inputs[0])


def _audio_files(folder: Path, exclude: Path) -> list[Path]:
    ex = exclude.resolve()
    found = []
    for p in sorted(folder.rglob("*")):
        if not p.is_file() or p.suffix.lower() not in INPUT_SUFFIXES or any(part.startswith(".") for part in p.relative_to(folder).parts):
            continue
        if ex == p.resolve() or ex in p.resolve().parents:
            continue  # never treat earlier outputs as inputs
        found.append(p)
    return found


def _read_list(path: Path) -> list[Path]:
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except (OSError, UnicodeDecodeError) as e:
        raise InputError(f"cannot read the file list '{path}': {e}") from e
    out = []
    for line in lines:
        line = line.strip()
        if line and not line.startswith("#"):
            p = Path(line)
            out.append(p if p.is_absolute() else path.parent / p)
    if not out:
        raise InputError(f"the file list '{path}' names no files")
    return out


def plan(inputs: Iterable[str | os.PathLike], out: str | os.PathLike, *, suffix: str = ".wav") -> list[Job]:
    """Jobs for folders (searched recursively), audio files and list files (.txt/.lst, one path per line).

    Files found in a folder keep their path below it; listed files keep their
    path below the listed files' common folder; single files go to the top of
    ``out``. Every output gets ``suffix``.
    """
    if suffix not in OUTPUT_SUFFIXES:
        raise InputError(f"--format {suffix.lstrip('.')} is not supported: choose wav or flac")
    out = Path(out)
    pairs: list[tuple[Path, Path]] = []
    for item in map(Path, inputs):
        if item.is_dir():
            files = _audio_files(item, out)
            if not files:
                raise InputError(f"folder '{item}' holds no audio files ({', '.join(INPUT_SUFFIXES)})")
            pairs += [(f, f.relative_to(item)) for f in files]
        elif _is_list(item):
            files = _read_list(item)
            base = Path(os.path.commonpath([str(f.parent.absolute()) for f in files]))
            pairs += [(f, f.absolute().relative_to(base)) for f in files]
        elif item.exists():
            pairs.append((item, Path(item.name)))
        else:
            raise InputError(f"input '{item}' does not exist")
    jobs, seen = [], {}
    for i, (src, rel) in enumerate(pairs):
        dst = out / rel.with_suffix(suffix)
        if dst in seen:
            raise InputError(f"'{src}' and '{seen[dst]}' would both be written to '{dst}': rename one or extend them separately")
        seen[dst] = src
        jobs.append(Job(src, dst, i))
    return jobs


def _stale_temporaries(dst: Path) -> list[Path]:
    """Temporary files an earlier, killed run left for ``dst`` (see :func:`nenv.files.atomic_output`)."""
    return list(dst.parent.glob(f".{dst.name}.*.part{dst.suffix}")) if dst.parent.is_dir() else []


def _work(job: Job, opts: Options, record: Optional[str]) -> FileResult:
    """Run one job; never raises for a bad file (the batch goes on), only for Ctrl-C."""
    t0 = time.perf_counter()
    part = None
    try:
        job.dst.parent.mkdir(parents=True, exist_ok=True)
        if record is not None:
            part = str(Path(record).parent / f".{Path(record).name}.{job.index}.{os.getpid()}.part")
        res = extend_file(job.src, job.dst, opts, record=part)
        if part is not None:
            res.notes.append(f"record:{part}")
        return res
    except NenvError as e:
        return FileResult(str(job.src), str(job.dst), status="failed", wall_s=time.perf_counter() - t0, message=str(e))
    except MemoryError:
        return FileResult(str(job.src), str(job.dst), status="failed", wall_s=time.perf_counter() - t0, message="out of memory")
    except OSError as e:
        return FileResult(str(job.src), str(job.dst), status="failed", wall_s=time.perf_counter() - t0, message=f"{e.strerror or e}")
    except Exception as e:  # a defect in nenv: report it against this file and go on
        return FileResult(str(job.src), str(job.dst), status="failed", wall_s=time.perf_counter() - t0, message=f"internal error ({type(e).__name__}: {e})")
    finally:
        if part is not None and os.path.exists(part) and not _succeeded(part):
            os.unlink(part)


def _succeeded(part: str) -> bool:
    # a record part is kept (for the parent to append) only if extend_file finished its summary line
    try:
        with open(part, "rb") as fh:
            fh.seek(max(0, os.path.getsize(part) - 4096))
            return b'"type":"summary"' in fh.read()
    except OSError:
        return False


@dataclass
class Summary:
    """A batch's outcome."""

    results: list[FileResult]
    wall_s: float

    def count(self, status: str) -> int:
        return sum(1 for r in self.results if r.status == status)

    @property
    def audio_s(self) -> float:
        return sum(r.seconds for r in self.results if r.status == "done")

    def throughput(self) -> tuple[float, float]:
        """(files per hour, hours of audio per hour) of the files extended in this run."""
        w = max(self.wall_s, 1e-9)
        return self.count("done") * 3600 / w, self.audio_s / w

    def to_csv(self) -> str:
        import csv
        import io

        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(["source", "output", "status", "seconds", "wall_s", "x_real_time", "hops", "rejected_hops", "limited_samples", "notes", "message"])
        for r in self.results:
            notes = "; ".join(n for n in r.notes if not n.startswith("record:"))
            w.writerow([r.source, r.output, r.status, f"{r.seconds:.3f}", f"{r.wall_s:.3f}", f"{r.seconds / r.wall_s:.1f}" if r.wall_s > 0 and r.seconds else "", r.hops, r.rejected, r.limited, notes, r.message])
        return buf.getvalue()


def run(
    jobs: list[Job],
    opts: Options,
    *,
    workers: int = 0,
    scheduler: Optional[str] = None,
    overwrite: bool = False,
    record: Optional[str | os.PathLike] = None,
    on_result: Optional[Callable[[FileResult], None]] = None,
) -> Summary:
    """Extend every job; outputs that exist are skipped unless ``overwrite``.

    workers : local processes (0 = one per core); ignored with ``scheduler``
    scheduler : address of a dask.distributed scheduler (e.g. "tcp://10.0.0.5:8786");
        its workers must see the same paths (shared storage) and have nenv installed
    record : append every file's guard record to this JSON Lines file (in the order files finish)
    on_result : called in this process as each file finishes (or is skipped)
    """
    t0 = time.perf_counter()
    if record is not None:
        from nenv.files import check_output

        record = str(check_output(record, suffixes=(".jsonl",)))
        for stale in Path(record).parent.glob(f".{Path(record).name}.*.part"):
            stale.unlink(missing_ok=True)
    results: list[FileResult] = []
    todo = []
    for job in jobs:
        for stale in _stale_temporaries(job.dst):
            stale.unlink(missing_ok=True)
        if job.dst.exists() and not overwrite:
            r = FileResult(str(job.src), str(job.dst), status="skipped", message="output exists (pass --overwrite to redo it)")
            results.append(r)
            if on_result:
                on_result(r)
        else:
            todo.append(job)
    if todo:
        check_options(opts)
    finished = results.append if on_result is None else (lambda r: (results.append(r), on_result(r)))

    def collect(r: FileResult) -> None:
        if record is not None:
            for note in [n for n in r.notes if n.startswith("record:")]:
                _append(Path(note[len("record:") :]), Path(record))
        finished(r)

    if todo:
        from nenv.parallel import as_done

        rec = None if record is None else str(record)
        for _, r in as_done(_work, [(job, opts, rec) for job in todo], workers=workers, scheduler=scheduler):
            collect(r)
    order = {str(j.src): j.index for j in jobs}
    results.sort(key=lambda r: order.get(r.source, 0))
    return Summary(results, time.perf_counter() - t0)


def check_options(opts: Options) -> None:
    """Load the model once up front, so a missing or corrupt model stops the batch before it starts."""
    from nenv.pipeline import MODEL_SYSTEMS, SYSTEMS

    if opts.method not in SYSTEMS:
        raise InputError(f"--method {opts.method} is not known: choose one of {', '.join(SYSTEMS)}")
    if opts.method == "oracle":
        raise InputError("--method oracle needs a reference per file: extend those files one at a time")
    if opts.method in MODEL_SYSTEMS:
        _checkpoint(opts.model)


def _append(part: Path, record: Path) -> None:
    if not part.exists():
        return
    with open(record, "ab") as out, open(part, "rb") as fh:
        out.write(fh.read())
        out.flush()
        os.fsync(out.fileno())
    part.unlink()
