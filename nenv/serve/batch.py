"""Extending many files in parallel (local processes or a Dask cluster), mirroring their layout.

:func:`plan` turns folders, files and list files into jobs that mirror the
input layout under one output folder; :func:`run` executes them on all cores
(or on a ``dask.distributed`` scheduler) with :func:`nenv.serve.streamfile.extend_file`,
reports each file as it finishes, skips outputs that already exist, and never
lets one bad file stop the rest. Because every output is written atomically,
a batch killed at any moment leaves each output either complete or absent;
the next run removes the temporary files a kill left behind and carries on.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable, Optional

from nenv.media.audio import READ_SUFFIXES, find_audio
from nenv.errors import InputError, NenvError
from nenv.media.files import is_within, same_path
from nenv.serve.streamfile import OUTPUT_SUFFIXES, FileResult, Options, extend_file, load_checkpoint

INPUT_SUFFIXES = READ_SUFFIXES
LIST_SUFFIXES = (".txt", ".lst")
REPORT_NAME = "extend-report.csv"


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
    return [p for p in find_audio(folder) if not is_within(p, exclude)]  # never treat earlier outputs as inputs


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
        if item.is_dir() and same_path(item, out):
            raise InputError(f"the output folder '{out}' is the input folder: choose another one (a folder inside it, such as '{out / 'wide'}', is skipped when searching for inputs)")
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
        if same_path(dst, src):
            raise InputError(f"'{src}' would be replaced by its own output: choose an output folder other than the one holding the inputs")
        if dst in seen:
            raise InputError(f"'{src}' and '{seen[dst]}' would both be written to '{dst}': rename one or extend them separately")
        seen[dst] = src
        jobs.append(Job(src, dst, i))
    return jobs


def _stale_temporaries(dst: Path) -> list[Path]:
    """Temporary files an earlier, killed run left for ``dst`` (see :func:`nenv.media.files.atomic_output`)."""
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
        record = check_record(record, jobs)
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
        from nenv.serve.parallel import as_done

        rec = None if record is None else str(record)
        for _, r in as_done(_work, [(job, opts, rec) for job in todo], workers=workers, scheduler=scheduler):
            collect(r)
    order = {str(j.src): j.index for j in jobs}
    results.sort(key=lambda r: order.get(r.source, 0))
    return Summary(results, time.perf_counter() - t0)


def check_record(record: str | os.PathLike, jobs: list[Job]) -> str:
    """The batch's record file, checked before any work: a .jsonl file that is new or a guard record
    already (records are appended to), and none of the inputs."""
    from nenv.media.files import check_distinct, check_output
    from nenv.report.records import check_appendable

    path = check_appendable(check_output(record, suffixes=(".jsonl",)))
    for job in jobs:
        check_distinct(path, what="the record", others={"an input": job.src})
    return str(path)


def check_options(opts: Options) -> None:
    """Load the model once up front, so a missing or corrupt model stops the batch before it starts."""
    from nenv.chain.pipeline import MODEL_SYSTEMS, REFERENCE_SYSTEMS, SYSTEMS

    if opts.method not in SYSTEMS:
        raise InputError(f"--method {opts.method} is not known: choose one of {', '.join(SYSTEMS)}")
    if opts.method in REFERENCE_SYSTEMS:
        raise InputError(f"--method {opts.method} needs a reference per file: extend those files one at a time")
    if opts.method in MODEL_SYSTEMS:
        load_checkpoint(opts.model)


def _append(part: Path, record: Path) -> None:
    if not part.exists():
        return
    with open(record, "ab") as out, open(part, "rb") as fh:
        out.write(fh.read())
        out.flush()
        os.fsync(out.fileno())
    part.unlink()
