"""The guard's per-hop record on disk: JSON Lines, appended safely, readable after a crash.

A record file is a sequence of lines, each one JSON object with a ``type``:

* ``header``: starts every session that appends to the file. ``schema`` is
  ``"nenv-guard-record"``, ``version`` is :data:`VERSION`; it names the model
  (record id, folder, and ``band_trim_db``: the level its added band was played at
  relative to the trained one, 0 for the trained level), the guard limits, the
  check names and their bits, the hop length, and the feature names of the stored
  inputs.
* ``reject``: one rejected hop. ``source`` (file or call id), ``group``
  (speaker group or null), ``hop`` (index) and ``t`` (start time, s),
  ``reasons`` (check names), ``values`` (each check's measured value) and
  ``limits`` (the thresholds it was held to), ``fallback`` (``{"kind":
  "codebook", "cell": N}``), and what is needed to recompute the verdict:
  ``x`` (the network's raw stacked input) and ``a_nb`` (narrowband LPC).
* ``summary``: closes one source: hops seen, hops rejected, counts by reason,
  and the output file if there is one (the audit draws its spectrogram).

Lines are written whole and flushed (and fsynced at each summary), so a
killed process leaves at most one incomplete last line; :func:`read` skips
it. Nothing is ever rewritten.
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numpy as np

from nenv import __version__
from nenv.errors import InputError, OutputError
from nenv.chain.features import INPUT_NAMES
from nenv.chain.guard import CHECK_NAMES, Decisions, Tally, reason_names
from nenv.settings import HOP_NB, NB_SR
from nenv.words import count

SCHEMA = "nenv-guard-record"
VERSION = 1
HOP_S = HOP_NB / NB_SR


def check_appendable(path: str | os.PathLike) -> Path:
    """Raise OutputError unless ``path`` can take more record lines: a new or empty file, or one
    whose first line is a nenv record header (a record is appended to, so anything else would be damaged)."""
    p = Path(path)
    if not p.parent.is_dir():
        raise OutputError(f"cannot write the record '{p}': folder '{p.parent}' does not exist")
    if p.is_dir():
        raise OutputError(f"cannot write the record '{p}': it is a folder")
    try:
        if not p.exists() or p.stat().st_size == 0:
            return p
        with open(p, "rb") as fh:
            first = fh.readline(1 << 20)
        head = json.loads(first)
    except OSError as e:
        raise OutputError(f"cannot write the record '{p}': {e.strerror or e}") from e
    except ValueError:
        head = None
    if not (isinstance(head, dict) and head.get("type") == "header" and head.get("schema") == SCHEMA):
        raise OutputError(f"the record '{p}' exists and is not a nenv guard record: records are appended to, so nenv will not touch it; choose another name")
    return p


class RecordWriter:
    """Appends one session's decisions to a record file (new, or a record already).

    A line that cannot be written (a full disk, a file-size limit) raises OutputError, unless
    ``keep_going`` (a live call or relay, whose audio matters more than its record): then recording
    stops at the first failure, ``on_failure(message)`` is told once, and :attr:`failed` (the system's
    reason) and :attr:`unwritten` (lines not written since) say what the record lacks. The file keeps every
    whole line written before; :func:`read` skips a last line the failure cut.
    """

    def __init__(self, path: str | os.PathLike, *, checkpoint, context: int, band_trim_db: float = 0.0, keep_going: bool = False, on_failure=None):
        p = check_appendable(path)
        try:
            self._fh = open(p, "a", encoding="utf-8")
        except OSError as e:
            raise OutputError(f"cannot write the record '{p}': {e.strerror or e}") from e
        self.path = p
        self.keep_going, self.on_failure = keep_going, on_failure
        self.failed: str | None = None
        self.unwritten = 0
        self.limits = checkpoint.limits.to_dict()
        names = [f"{n}@t-{k}" for k in range(context, 0, -1) for n in INPUT_NAMES] + [f"{n}@t" for n in INPUT_NAMES]
        self._write(
            {
                "type": "header",
                "schema": SCHEMA,
                "version": VERSION,
                "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "nenv_version": __version__,
                "model": {"record_id": checkpoint.info.get("record_id"), "path": str(checkpoint.path), "band_trim_db": float(band_trim_db)},
                "limits": self.limits,
                "checks": {name: int(bit) for bit, name in CHECK_NAMES.items()},
                "hop_s": HOP_S,
                "x_names": names,
            },
            sync=True,
        )

    def _write(self, obj: dict, *, sync: bool = False) -> None:
        if self.failed is not None:
            self.unwritten += 1
            return
        try:
            self._fh.write(json.dumps(obj, separators=(",", ":")) + "\n")
            self._fh.flush()
            if sync:
                os.fsync(self._fh.fileno())
        except OSError as e:
            reason = e.strerror or str(e)
            self.failed, self.unwritten = reason, 1
            if not self.keep_going:
                raise OutputError(f"cannot write the record '{self.path}': {reason}") from e
            if self.on_failure is not None:
                self.on_failure(f"cannot write the guard record '{self.path}' ({reason}): recording stopped, the audio goes on")

    def hops(self, *, source: str, group: str | None, first_hop: int, dec: Decisions, x: np.ndarray, a_nb: np.ndarray) -> None:
        """Write a line for every rejected hop among ``dec`` (hops first_hop, first_hop+1, ...)."""
        for i in np.flatnonzero(dec.rejected):
            hop = first_hop + int(i)
            self._write(
                {
                    "type": "reject",
                    "source": source,
                    "group": group,
                    "hop": hop,
                    "t": round(hop * HOP_S, 4),
                    "reasons": reason_names(int(dec.reasons[i])),
                    "values": {"max_k": _f(dec.max_k[i]), "level_db": _f(dec.level_db[i]), "mismatch_db": _f(dec.mismatch_db[i]), "novelty": _f(dec.novelty[i]), "low_db": _f(dec.low_db[i])},
                    "limits": self.limits,
                    "fallback": {"kind": "codebook", "cell": int(dec.cell[i])},
                    "x": [_f(v) for v in x[i]],
                    "a_nb": [_f(v) for v in a_nb[i]],
                }
            )

    def summary(self, *, source: str, group: str | None, tally: Tally, seconds: float, output: str | None = None) -> None:
        """Close one source with its counts (a :class:`nenv.chain.guard.Tally`)."""
        self._write({"type": "summary", "source": source, "group": group, "hops": tally.hops, "rejected": tally.rejected, "by_reason": dict(sorted(tally.by_reason.items())), "seconds": round(seconds, 3), "output": output}, sync=True)

    def close(self) -> None:
        try:
            self._fh.close()  # flushes what a failed write left in the buffer: it may fail again
        except OSError:
            if self.failed is None:
                raise

    def incomplete(self) -> str | None:
        """None if every line was written, else what the record lacks (for the closing report)."""
        return None if self.failed is None else f"the guard record '{self.path}' is incomplete: {count(self.unwritten, 'line')} not written ({self.failed})"


class CallRecords:
    """One record for the calls of a batched engine (``nenv relay``): each call's rejected hops as the
    engine reports them (:attr:`nenv.serve.multicall.MultiCallEngine.on_rejected`) and its summary
    when it ends; ``source`` is the call id."""

    def __init__(self, writer: RecordWriter, *, group: str | None = None):
        self.writer, self.group = writer, group
        self._tallies: dict[str, Tally] = {}

    def rejected(self, call_id: str, first_hop: int, dec: Decisions, x: np.ndarray, a_nb: np.ndarray) -> None:
        dec = self._tallies.setdefault(call_id, Tally()).add(first_hop, dec)
        self.writer.hops(source=call_id, group=self.group, first_hop=first_hop, dec=dec, x=x, a_nb=a_nb)

    def ended(self, call_id: str, *, hops: int, seconds: float) -> None:
        tally = self._tallies.pop(call_id, Tally())
        tally.hops = hops  # every hop of the call (the engine's count), not only those of rounds with a rejection
        self.writer.summary(source=call_id, group=self.group, tally=tally, seconds=seconds)

    def close(self) -> None:
        self.writer.close()


def _f(v) -> float | None:
    v = float(v)
    return v if np.isfinite(v) else None


@dataclass
class Records:
    """Everything read from one or more record files."""

    headers: list[dict] = field(default_factory=list)
    rejects: list[dict] = field(default_factory=list)
    summaries: list[dict] = field(default_factory=list)
    skipped_lines: int = 0


def _lines(path: Path) -> Iterator[tuple[int, str]]:
    with open(path, encoding="utf-8", errors="replace") as fh:
        for n, line in enumerate(fh, 1):
            yield n, line


def read(paths: list[str | os.PathLike]) -> Records:
    """Read record files; an incomplete or corrupt line (e.g. the last one after a kill) is skipped and counted."""
    out = Records()
    for path in paths:
        p = Path(path)
        if not p.is_file():
            raise InputError(f"record file '{p}' does not exist")
        seen_header = False
        for _, line in _lines(p):
            try:
                obj = json.loads(line)
            except ValueError:
                out.skipped_lines += 1
                continue
            kind = obj.get("type") if isinstance(obj, dict) else None
            if kind == "header":
                if obj.get("schema") != SCHEMA:
                    raise InputError(f"'{p}' is not a nenv guard record (schema {obj.get('schema')!r})")
                if obj.get("version") != VERSION:
                    raise InputError(f"'{p}' has record version {obj.get('version')}; this nenv reads version {VERSION}")
                seen_header = True
                out.headers.append({**obj, "file": str(p)})
            elif kind == "reject" and seen_header:
                out.rejects.append(obj)
            elif kind == "summary" and seen_header:
                out.summaries.append(obj)
            else:
                out.skipped_lines += 1
        if not seen_header:
            raise InputError(f"'{p}' has no nenv record header: not a guard record file")
    return out
