"""Many calls on one core: the chain steps all active calls and their queued hops together.

:class:`MultiCallEngine` keeps every call as one row of a :class:`nenv.chain.pipeline.Chain` (the
same chain ``extend`` and :class:`nenv.serve.runtime.CallEngine` run), so each kernel, numpy
operation and onnxruntime run serves all calls at once, and all hops queued since the
last step (a 20 ms packet holds two) in one pass; Python overhead is paid per step, not
per call or hop. Calls join (:meth:`open`) and leave (:meth:`close`) at any time. Each
call's output equals what its own CallEngine would produce.

One call's non-finite input is replaced by zeros for that call alone.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from nenv.media.audio import PEAK_CEILING as CEILING
from nenv.chain.pipeline import Chain, System, make_system, tail_padding
from nenv.dsp.rows import ALL
from nenv.serve.runtime import OutputGate, as_samples
from nenv.settings import HOP_NB

MAX_HOPS_PER_BATCH = 10  # hops of each call processed together when more are queued (bounds working memory)
_WARM_UP = "(warm-up)"  # the call id of warm_up()'s silent call
_NOTHING = np.zeros(0)  # an empty queue (never written to: a queue is replaced, not changed in place)


@dataclass
class _Call:
    pending: np.ndarray = field(default_factory=lambda: np.zeros(0))
    out: list = field(default_factory=list)
    gate: OutputGate = field(default_factory=OutputGate)
    samples_in: int = 0
    bad_samples: int = 0
    rejected_hops: int = 0
    hops: int = 0


class MultiCallEngine:
    """Batched streaming extension for many calls sharing one model (or one model-free method).

    Not thread-safe: open, feed, step and close from one thread (or under one lock). Engines in
    different threads are independent and may share one loaded model."""

    def __init__(self, model=None, *, method: str = "neural", guard: bool = True, system: System | None = None, low_band: bool = False):
        """``model``: a checkpoint (loaded, a folder, or None for the shipped model) for 'neural' and
        'codebook'; ``method``: any system that serves several calls ('neural', 'codebook', 'imaging',
        'unextended'); ``system``: a ready-made system instead. ``guard=False`` turns the neural
        method's guard off (for measurements only). ``low_band``: add the 50-300 Hz band as well."""
        if system is None:
            system = make_system(method, model=model, low_band=low_band)
            if not guard and hasattr(system, "estimator"):
                system.estimator.guard = None
        if hasattr(getattr(system, "estimator", None), "keep_decisions"):
            system.estimator.keep_decisions = False  # verdicts are counted per call, not kept
        self.system = system
        self._chain = Chain(system, rows=0)
        self._calls: dict[str, _Call] = {}  # in row order: a call's row is its place in this dict
        self._on_rejected = None
        self._round: tuple[list, int] = ([], 0)  # the call ids of the rows being processed, and hops per row

    # ---- calls joining and leaving -------------------------------------------------
    def open(self, call_id: str) -> None:
        """Start a call (its state starts from silence, like a new CallEngine)."""
        if call_id in self._calls:
            raise ValueError(f"call {call_id!r} is already open")
        self._calls[call_id] = _Call()
        self._chain.add_rows(1)

    def close(self, call_id: str, *, stats: dict | None = None) -> np.ndarray:
        """End a call: flush its tail (total output = 2 x its input) and forget it.

        ``stats``: a dict to fill with the call's final :meth:`stats` (tail included).
        """
        call = self._call(call_id)
        call.pending = np.concatenate([call.pending, np.zeros(tail_padding(call.pending.size))])
        self._run(only=call_id)
        y = call.gate.finish(np.concatenate(call.out), call.samples_in)  # never empty: the tail padding makes at least one hop
        if stats is not None:
            stats.update(self.stats(call_id))
        self._chain.keep_rows(np.arange(len(self._calls)) != list(self._calls).index(call_id))
        del self._calls[call_id]
        return y

    def warm_up(self) -> None:
        """Run one step of a silent call that is then forgotten, so the first real call does not wait
        for what a first step does once (its tables and the network's first batched run; the network's
        session is made with the engine). Call it with no call open; nothing of it stays."""
        if self._calls:
            raise ValueError("warm_up() runs before any call is open")
        self.open(_WARM_UP)
        self.feed(_WARM_UP, np.zeros(2 * HOP_NB))
        self.step()
        self.close(_WARM_UP)

    @property
    def calls(self) -> list[str]:
        return list(self._calls)

    def stats(self, call_id: str) -> dict:
        c = self._call(call_id)
        return {"samples_in": c.samples_in, "samples_out": c.gate.samples_out, "limited": c.gate.limited, "bad_samples": c.bad_samples, "hops": c.hops, "rejected_hops": c.rejected_hops}

    # ---- audio in and out ------------------------------------------------------------
    def _call(self, call_id: str) -> "_Call":
        try:
            return self._calls[call_id]
        except KeyError:
            raise KeyError(f"call {call_id!r} is not open (open it first; a closed call cannot be fed)") from None

    def feed(self, call_id: str, x: np.ndarray) -> None:
        """Queue 8 kHz samples for a call (processed by the next :meth:`step`)."""
        call = self._call(call_id)
        x = as_samples(x)  # non-finite samples are replaced per hop, in _run
        call.samples_in += x.size
        call.pending = np.concatenate([call.pending, x]) if call.pending.size else x

    def step(self) -> dict[str, np.ndarray]:
        """Process every whole hop queued, all calls together; return each call's new 16 kHz samples."""
        self._run()
        out = {}
        for cid, call in self._calls.items():
            parts = call.out
            # a copy, never a view: a chunk the caller keeps must not pin the whole batch's array
            out[cid] = parts[0].copy() if len(parts) == 1 else np.concatenate(parts) if parts else np.zeros(0)
            call.out = []
        return out

    @property
    def on_rejected(self):
        """None, or called as ``on_rejected(call_id, first_hop, decisions, stacked_inputs, a_nb)`` for each
        call with a hop the guard rejected in a round (the call's hops from first_hop on), e.g. to write
        the guard's record (:class:`nenv.report.records.CallRecords`)."""
        return self._on_rejected

    @on_rejected.setter
    def on_rejected(self, callback) -> None:
        est = getattr(self.system, "estimator", None)
        if not hasattr(est, "batch_listener"):
            raise ValueError(f"the {getattr(self.system, 'name', 'given')} method has no guard whose verdicts could be reported")
        self._on_rejected = callback
        est.batch_listener = None if callback is None else self._verdicts

    def _verdicts(self, dec, stacked: np.ndarray, a_nb: np.ndarray) -> None:
        """The guard's verdicts on a round (rows x hops, row-major): each call's with a rejected hop to
        :attr:`on_rejected`, with the call's first hop of the round (its hops are counted after)."""
        if not dec.rejected.any():
            return
        ids, n_hops = self._round
        for r in np.flatnonzero(dec.rejected.reshape(len(ids), n_hops).any(axis=1)):
            hops = slice(r * n_hops, (r + 1) * n_hops)
            self._on_rejected(ids[r], self._calls[ids[r]].hops, dec.part(hops), stacked[hops], a_nb[hops])

    # ---- one hop for a set of calls ----------------------------------------------------
    def _run(self, only: str | None = None) -> None:
        """Process queued whole hops: each round takes every call with a hop queued, as many hops
        as all of them have (H), and runs them as one batch of B calls x H hops."""
        order, ids = list(self._calls.values()), list(self._calls)  # row order
        candidates = range(len(order)) if only is None else (ids.index(only),)
        while True:
            rows = [i for i in candidates if order[i].pending.size >= HOP_NB]
            if not rows:
                return
            calls = order if len(rows) == len(order) else [order[i] for i in rows]
            n_hops = min(MAX_HOPS_PER_BATCH, min(c.pending.size for c in calls) // HOP_NB)
            n = n_hops * HOP_NB
            x = np.concatenate([c.pending[:n] for c in calls]).reshape(len(calls), n)
            for c in calls:
                c.pending = c.pending[n:] if c.pending.size > n else _NOTHING
            finite = np.isfinite(x)
            if not finite.all():  # one corrupt packet must not poison a call's filter state
                for r in np.flatnonzero(~finite.all(axis=1)):
                    calls[r].bad_samples += int(np.count_nonzero(~finite[r]))
                x = np.where(finite, x, 0.0)
            # rows are in call order, so a round of every call reads its state as views, not gathers
            self._round = ([ids[i] for i in rows], n_hops)
            y = self._chain.process(x, ALL if len(rows) == len(order) else np.array(rows))
            dec = getattr(getattr(self.system, "estimator", None), "last", None)
            if dec is not None and dec.rejected.any():
                for c, n_rej in zip(calls, dec.rejected.reshape(len(calls), n_hops).sum(axis=1)):
                    c.rejected_hops += int(n_rej)
            # the output gate, batched: limit every row at once, then each call's own bookkeeping
            over = np.abs(y) > CEILING
            if over.any():
                n_over, y_lim = over.sum(axis=1).tolist(), np.clip(y, -CEILING, CEILING)
            else:
                n_over, y_lim = [0] * len(calls), y
            for c, row, row_lim, n_lim in zip(calls, y, y_lim, n_over):
                c.hops += n_hops
                c.out.append(c.gate.emit(row) if c.gate.skip else c.gate.emit_limited(row_lim, n_lim))
