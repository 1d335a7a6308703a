"""Many calls on one core: every stage runs once per step for all active calls and their queued hops.

:class:`MultiCallEngine` keeps the state of every call as one row of shared
arrays (filter memories, analysis history, context, synthesis memory), so each
numpy operation and the single onnxruntime run serve all calls at once, and
all hops queued since the last step (a 20 ms packet holds two) in one pass;
Python overhead is paid per step, not per call or hop. Calls join (:meth:`open`) and
leave (:meth:`close`) at any time. Each call's output equals what its own
:class:`nenv.runtime.CallEngine` would produce (tested to 1e-6).

Only the neural system is batched (the gateway's case); one call's non-finite
input is replaced by zeros for that call alone.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from nenv import filters, heap, lpc
from nenv.audio import PEAK_CEILING as CEILING
from nenv.checkpoint import Checkpoint
from nenv.estimators.base import NarrowbandAnalysis
from nenv.estimators.neural import guarded_envelopes
from nenv.excitation import rectify_hops, residual, whiten_hops
from nenv.features import narrowband_features
from nenv.guard import Guard
from nenv.pipeline import tail_padding
from nenv.runtime import OutputGate, as_samples
from nenv.settings import HOP_NB, HOP_WB, N_SUBFRAMES, NB_ORDER, NB_SR, WIN_NB, WIN_WB
from nenv.synthesis import UPSAMPLER_HISTORY, banded_synthesis, clamp_reflection, direct_synthesis, interpolate_envelopes, isolation_sos, upsample_hops

DIRECT_MIN_CALLS = 100  # from this many calls per hop the sample-by-sample recursion beats the banded solve (measured: even at 80-90)
MAX_HOPS_PER_BATCH = 10  # hops of each call processed together when more are queued (bounds working memory)


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
    """Batched streaming extension for many calls sharing one model."""

    def __init__(self, checkpoint: Checkpoint, *, guard: bool = True):
        heap.settle()  # per-step temporaries reuse heap memory instead of faulting in fresh pages
        self.ck = checkpoint
        self.guard = Guard(checkpoint.limits) if guard else None
        self.p = checkpoint.features.wb_order
        self.context = checkpoint.features.context
        self._iso = np.ascontiguousarray(isolation_sos())
        self._ids: list[str] = []
        self._calls: dict[str, _Call] = {}
        n_in = checkpoint.features.n_inputs
        self._state = {
            "nb_hist": np.zeros((0, WIN_NB - HOP_NB)),
            "wb_hist": np.zeros((0, WIN_WB - HOP_WB)),
            "ctx": np.zeros((0, self.context * n_in)),
            "ctx_ready": np.zeros(0, dtype=bool),
            "up_x": np.zeros((0, UPSAMPLER_HISTORY)),  # last 8 kHz inputs of the interpolation FIR
            "up_e": np.zeros((0, UPSAMPLER_HISTORY)),
            "dc": np.zeros((0, 1)),
            "iso": np.zeros((0, self._iso.shape[0], 2)),
            "past": np.zeros((0, self.p)),
            "k_prev": np.zeros((0, self.p)),
            "g_prev": np.zeros(0),
        }

    # ---- calls joining and leaving -------------------------------------------------
    def open(self, call_id: str) -> None:
        """Start a call (its state starts from silence, like a new CallEngine)."""
        if call_id in self._calls:
            raise ValueError(f"call {call_id!r} is already open")
        self._ids.append(call_id)
        self._calls[call_id] = _Call()
        for k, v in self._state.items():
            if k == "g_prev":
                self._state[k] = np.append(v, np.log(1e-9))
            else:
                self._state[k] = np.concatenate([v, np.zeros((1,) + v.shape[1:], dtype=v.dtype)])

    def close(self, call_id: str, *, stats: dict | None = None) -> np.ndarray:
        """End a call: flush its tail (total output = 2 x its input) and forget it.

        ``stats``: a dict to fill with the call's final :meth:`stats` (tail included).
        """
        call = self._call(call_id)
        call.pending = np.concatenate([call.pending, np.zeros(tail_padding(call.pending.size))])
        self._run(only=call_id)
        y = np.concatenate(call.out) if call.out else np.zeros(0)
        want = 2 * call.samples_in - (call.gate.samples_out - y.size)
        y = y[: max(want, 0)]
        if stats is not None:
            stats.update(self.stats(call_id))
        i = self._ids.index(call_id)
        keep = np.arange(len(self._ids)) != i
        for k, v in self._state.items():
            self._state[k] = v[keep]
        self._ids.pop(i)
        del self._calls[call_id]
        return y

    @property
    def calls(self) -> list[str]:
        return list(self._ids)

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

    # ---- one hop for a set of calls ----------------------------------------------------
    def _run(self, only: str | None = None) -> None:
        """Process queued whole hops: each round takes every call with a hop queued, as many hops
        as all of them have (H), and runs them as one batch of B calls x H hops."""
        while True:
            ready = [(i, self._calls[cid]) for i, cid in enumerate(self._ids) if (only is None or cid == only) and self._calls[cid].pending.size >= HOP_NB]
            if not ready:
                return
            rows = [i for i, _ in ready]
            calls = [c for _, c in ready]
            n_hops = min(MAX_HOPS_PER_BATCH, min(c.pending.size for c in calls) // HOP_NB)
            n = n_hops * HOP_NB
            x = np.concatenate([c.pending[:n] for c in calls]).reshape(len(calls), n)
            for c in calls:
                c.pending = c.pending[n:]
            finite = np.isfinite(x)
            if not finite.all():  # one corrupt packet must not poison a call's filter state
                for r in np.flatnonzero(~finite.all(axis=1)):
                    calls[r].bad_samples += int(np.count_nonzero(~finite[r]))
                x = np.where(finite, x, 0.0)
            y = self._hops(np.array(rows), x, n_hops)
            # the output gate, batched: limit every row at once, then each call's own bookkeeping
            over = np.abs(y) > CEILING
            if over.any():
                n_over, y_lim = over.sum(axis=1).tolist(), np.clip(y, -CEILING, CEILING)
            else:
                n_over, y_lim = [0] * len(calls), y
            for c, row, row_lim, n_lim in zip(calls, y, y_lim, n_over):
                c.hops += n_hops
                c.out.append(c.gate.emit(row) if c.gate.skip else c.gate.emit_limited(row_lim, n_lim))

    def _hops(self, rows: np.ndarray, x: np.ndarray, H: int) -> np.ndarray:
        """``H`` consecutive hops of B calls: x [shape=(B, H * HOP_NB)] -> 16 kHz [shape=(B, H * HOP_WB)]."""
        st = self._state
        B = rows.size
        # rows are in call order, so a batch of every call is the whole state: views, not gathers
        sel = slice(None) if B == len(self._ids) else rows
        # narrowband analysis and features, B x H frames at once
        buf = np.concatenate([st["nb_hist"][sel], x], axis=1)
        st["nb_hist"][sel] = buf[:, H * HOP_NB :]
        frames = lpc.hop_frames(buf, frame_length=WIN_NB, hop_length=HOP_NB, n_frames=H).reshape(B * H, WIN_NB)
        a_nb, g_nb = lpc.analyse(frames, order=NB_ORDER, sr=NB_SR)
        feats = narrowband_features(NarrowbandAnalysis(frames, a_nb, g_nb))
        d = feats.shape[1]
        first = feats.reshape(B, H, d)[:, 0]
        fresh = ~st["ctx_ready"][sel]
        if np.any(fresh):
            st["ctx"][rows[fresh]] = np.tile(first[fresh], (1, self.context))
            st["ctx_ready"][rows[fresh]] = True
        hist = np.concatenate([st["ctx"][sel].reshape(B, self.context, d), feats.reshape(B, H, d)], axis=1)
        # row (b, h) = hist[b, h : h + context + 1] flattened: frames of (context + 1) * d values every d
        stacked = lpc.hop_frames(hist.reshape(B, -1), frame_length=(self.context + 1) * d, hop_length=d, n_frames=H).reshape(B * H, -1)
        if self.context:
            st["ctx"][sel] = hist[:, H:].reshape(B, self.context * d)
        # the network, once for all calls and hops, then the guard
        a_wb, gain, dec, k = guarded_envelopes(self.ck, self.guard, feats=feats, stacked=stacked, a_nb=a_nb)
        if dec is not None and dec.rejected.any():
            for r, n_rej in enumerate(dec.rejected.reshape(B, H).sum(axis=1)):
                self._calls[self._ids[rows[r]]].rejected_hops += int(n_rej)
        # excitation: residual -> interpolate -> rectify -> DC removal -> power match -> whiten
        e = residual(frames, a_nb, hop_length=HOP_NB).reshape(B, H * HOP_NB)
        u, st["dc"][sel] = rectify_hops(self._fir(e, "up_e", sel), st["dc"][sel])
        wbuf = np.concatenate([st["wb_hist"][sel], u], axis=1)
        st["wb_hist"][sel] = wbuf[:, H * HOP_WB :]
        wb_frames = lpc.hop_frames(wbuf, frame_length=WIN_WB, hop_length=HOP_WB, n_frames=H).reshape(B * H, WIN_WB)
        u, rms = whiten_hops(wb_frames)
        # synthesis: envelopes interpolated in the reflection domain from the previous hop's, memory per call
        k = clamp_reflection(k).reshape(B, H, self.p)
        log_g = np.log(np.maximum(gain / rms, 1e-12)).reshape(B, H)
        a_sub, g_sub = interpolate_envelopes(st["k_prev"][sel], k, st["g_prev"][sel], log_g, n_sub=N_SUBFRAMES)
        st["k_prev"][sel] = k[:, -1]
        st["g_prev"][sel] = log_g[:, -1]
        J = H * N_SUBFRAMES
        synth = self._synthesize(sel, u.reshape(B, J, -1), a_sub.reshape(B, J, self.p + 1), g_sub.reshape(B, J))
        # band isolation and mixing with the interpolated input
        low = self._fir(x, "up_x", sel)
        hb, st["iso"][sel] = filters.sos(self._iso, synth, st["iso"][sel])
        return low + hb

    def _fir(self, x: np.ndarray, key: str, rows: np.ndarray | slice) -> np.ndarray:
        """Interpolate B rows of whole 8 kHz hops by 2 (:func:`nenv.synthesis.upsample_hops`), state per row."""
        buf = np.concatenate([self._state[key][rows], x], axis=1)
        self._state[key][rows] = buf[:, x.shape[1] :]
        return upsample_hops(buf, x.shape[1] // HOP_NB)

    def _synthesize(self, rows: np.ndarray | slice, u: np.ndarray, a_sub: np.ndarray, g_sub: np.ndarray) -> np.ndarray:
        """All-pole synthesis of one hop for B calls, each with its own filter memory."""
        synth = direct_synthesis if u.shape[0] >= DIRECT_MIN_CALLS else banded_synthesis
        y, self._state["past"][rows] = synth(u, a_sub, g_sub, self._state["past"][rows])
        return y.reshape(u.shape[0], -1)
