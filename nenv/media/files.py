"""Output files that are either complete or absent.

Every file nenv writes goes through :func:`atomic_output`: it is written to a
temporary file in the destination folder and renamed over the target only once
complete, so an error, a kill or Ctrl-C never leaves a half-written output.
"""

from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from nenv.errors import OutputError


def check_output(path: str | os.PathLike, *, suffixes: tuple[str, ...]) -> Path:
    """Validate an output path before any work is done; return it as a Path.

    Raises OutputError when the suffix is not one of ``suffixes``, the folder
    does not exist, or the path is a folder.
    """
    p = Path(path)
    if p.suffix.lower() not in suffixes:
        raise OutputError(f"cannot write '{p}': the file name must end in {' or '.join(suffixes)}")
    folder = p.parent
    if not folder.is_dir():
        raise OutputError(f"cannot write '{p}': folder '{folder}' does not exist")
    if p.is_dir():
        raise OutputError(f"cannot write '{p}': it is a folder")
    return p


def output_folder(path: str | os.PathLike, *, what: str = "--out", create: bool = True) -> Path:
    """An output folder: OutputError if ``path`` exists and is not a folder; created (with its
    parents) when ``create``, so a command can check early and create once it has something to write."""
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise OutputError(f"{what} '{p}' exists and is not a folder")
    if create:
        try:
            p.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            raise OutputError(f"cannot create {what} '{p}': {e.strerror or e}") from e
    return p


def same_path(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """True when ``a`` and ``b`` name the same file: one existing file (also through symbolic or
    hard links), or the same absolute path for a file not written yet."""
    try:
        if os.path.exists(a) and os.path.exists(b):
            return os.path.samefile(a, b)
        return Path(a).resolve() == Path(b).resolve()
    except OSError:
        return False


def is_within(path: str | os.PathLike, folder: str | os.PathLike) -> bool:
    """True when ``path`` is ``folder`` or lies below it (links resolved)."""
    p, f = Path(path).resolve(), Path(folder).resolve()
    return p == f or f in p.parents


def check_distinct(path: str | os.PathLike, *, what: str, others: dict) -> None:
    """Raise OutputError when ``path`` (the file called ``what``) is one of ``others``
    (label -> path, None entries skipped): nenv never writes over a file the same command reads or writes."""
    for label, other in others.items():
        if other is not None and same_path(path, other):
            raise OutputError(f"{what} '{path}' is the same file as {label} '{other}': nenv never writes over a file the command reads or writes; choose another name")


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextmanager
def atomic_output(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; rename it to ``path`` if the block succeeds.

    On any exception (including KeyboardInterrupt) the temporary file is removed
    and ``path`` is left as it was.
    """
    p = Path(path)
    folder = p.parent
    if not folder.is_dir():
        raise OutputError(f"cannot write '{p}': folder '{folder}' does not exist")
    fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".part" + p.suffix, dir=folder)
    os.close(fd)
    try:
        yield Path(tmp)
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, p)
    except OSError as e:
        raise OutputError(f"cannot write '{p}': {e.strerror or e}") from e
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def write_text(path: str | os.PathLike, text: str) -> None:
    """Write a text file atomically (UTF-8)."""
    with atomic_output(path) as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
