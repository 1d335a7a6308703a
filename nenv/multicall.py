"""Many calls on one core: every stage runs once per hop for all active calls together.

:class:`MultiCallEngine` keeps the state of every call as one row of shared
arrays (filter memories, analysis history, context, synthesis memory), so each
numpy operation and the single onnxruntime run per hop serve all calls at once;
Python overhead is paid per hop, not per call. Calls join (:meth:`open`) and
leave (:meth:`close`) at any time. Each call's output equals what its own
:class:`nenv.runtime.CallEngine` would produce (tested to 1e-6).

Only the neural system is batched (the gateway's case); one call's non-finite
input is replaced by zeros for that call alone.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import signal

from nenv import lpc
from nenv.checkpoint import Checkpoint
from nenv.estimators.base import NarrowbandAnalysis
from nenv.estimators.neural import guarded_envelopes
from nenv.excitation import DC_POLE, WHITEN_ORDER, residual
from nenv.features import narrowband_features
from nenv.guard import Guard
from nenv.pipeline import tail_padding
from nenv.audio import PEAK_CEILING as CEILING
from nenv.runtime import OutputGate
from nenv.settings import HOP_NB, HOP_WB, N_SUBFRAMES, NB_ORDER, NB_SR, WB_SR, WIN_NB, WIN_WB
from nenv.synthesis import MAX_REFLECTION, block_synthesis, direct_synthesis, isolation_sos, upsampler_taps

DIRECT_MIN_CALLS = 8  # from this many calls per hop the sample-by-sample recursion beats the block form


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
        self.ck = checkpoint
        self.guard = Guard(checkpoint.limits) if guard else None
        self.p = checkpoint.features.wb_order
        self.context = checkpoint.features.context
        self._up_taps = upsampler_taps()
        self._iso = isolation_sos()
        self._ids: list[str] = []
        self._calls: dict[str, _Call] = {}
        n_in = checkpoint.features.n_inputs
        self._state = {
            "nb_hist": np.zeros((0, WIN_NB - HOP_NB)),
            "wb_hist": np.zeros((0, WIN_WB - HOP_WB)),
            "ctx": np.zeros((0, self.context * n_in)),
            "ctx_ready": np.zeros(0, dtype=bool),
            "up_x": np.zeros((0, self._up_taps.size // 2)),  # last 8 kHz inputs of the interpolation FIR
            "up_e": np.zeros((0, self._up_taps.size // 2)),
            "dc": np.zeros((0, 1)),
            "iso": np.zeros((self._iso.shape[0], 0, 2)),
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
            if k == "iso":
                self._state[k] = np.concatenate([v, np.zeros((v.shape[0], 1, 2))], axis=1)
            elif k == "g_prev":
                self._state[k] = np.append(v, np.log(1e-9))
            else:
                self._state[k] = np.concatenate([v, np.zeros((1,) + v.shape[1:], dtype=v.dtype)])

    def close(self, call_id: str) -> np.ndarray:
        """End a call: flush its tail (total output = 2 x its input) and forget it."""
        call = self._calls[call_id]
        call.pending = np.concatenate([call.pending, np.zeros(tail_padding(call.pending.size))])
        self._run(only=call_id)
        y = np.concatenate(call.out) if call.out else np.zeros(0)
        want = 2 * call.samples_in - (call.gate.samples_out - y.size)
        y = y[: max(want, 0)]
        i = self._ids.index(call_id)
        keep = np.arange(len(self._ids)) != i
        for k, v in self._state.items():
            self._state[k] = v[:, keep] if k == "iso" else v[keep]
        self._ids.pop(i)
        del self._calls[call_id]
        return y

    @property
    def calls(self) -> list[str]:
        return list(self._ids)

    def stats(self, call_id: str) -> dict:
        c = self._calls[call_id]
        return {"samples_in": c.samples_in, "samples_out": c.gate.samples_out, "limited": c.gate.limited, "bad_samples": c.bad_samples, "hops": c.hops, "rejected_hops": c.rejected_hops}

    # ---- audio in and out ------------------------------------------------------------
    def feed(self, call_id: str, x: np.ndarray) -> None:
        """Queue 8 kHz samples for a call (processed by the next :meth:`step`)."""
        call = self._calls[call_id]
        x = np.asarray(x, dtype=np.float64).reshape(-1)  # non-finite samples are replaced per hop, in _run
        call.samples_in += x.size
        call.pending = np.concatenate([call.pending, x]) if call.pending.size else x

    def step(self) -> dict[str, np.ndarray]:
        """Process every whole hop queued, all calls together; return each call's new 16 kHz samples."""
        self._run()
        out = {}
        for cid, call in self._calls.items():
            out[cid] = np.concatenate(call.out) if call.out else np.zeros(0)
            call.out = []
        return out

    # ---- one hop for a set of calls ----------------------------------------------------
    def _run(self, only: str | None = None) -> None:
        while True:
            rows = [i for i, cid in enumerate(self._ids) if (only is None or cid == only) and self._calls[cid].pending.size >= HOP_NB]
            if not rows:
                return
            calls = [self._calls[self._ids[i]] for i in rows]
            x = np.stack([c.pending[:HOP_NB] for c in calls])
            for c in calls:
                c.pending = c.pending[HOP_NB:]
            finite = np.isfinite(x)
            if not finite.all():  # one corrupt packet must not poison a call's filter state
                for r in np.flatnonzero(~finite.all(axis=1)):
                    calls[r].bad_samples += int(np.count_nonzero(~finite[r]))
                x = np.where(finite, x, 0.0)
            y = self._hop(np.array(rows), x)
            # the output gate, batched: limit every row at once, then each call's own bookkeeping
            over = np.abs(y) > CEILING
            n_over = over.sum(axis=1) if over.any() else np.zeros(len(rows), dtype=int)
            y_lim = np.clip(y, -CEILING, CEILING) if over.any() else y
            for r, c in enumerate(calls):
                c.hops += 1
                c.out.append(c.gate.emit(y[r]) if c.gate.skip else c.gate.emit_limited(y_lim[r], int(n_over[r])))

    def _hop(self, rows: np.ndarray, x: np.ndarray) -> np.ndarray:
        st = self._state
        B = rows.size
        # narrowband analysis and features
        frames = np.concatenate([st["nb_hist"][rows], x], axis=1)
        st["nb_hist"][rows] = frames[:, HOP_NB:]
        a_nb, g_nb = lpc.analyse(frames, order=NB_ORDER, sr=NB_SR)
        feats = narrowband_features(NarrowbandAnalysis(frames, a_nb, g_nb))
        fresh = ~st["ctx_ready"][rows]
        if np.any(fresh):
            st["ctx"][rows[fresh]] = np.tile(feats[fresh], (1, self.context))
            st["ctx_ready"][rows[fresh]] = True
        stacked = np.concatenate([st["ctx"][rows], feats], axis=1)
        if self.context:
            st["ctx"][rows] = stacked[:, feats.shape[1] :]
        # the network, once for all calls, then the guard
        a_wb, gain, dec = guarded_envelopes(self.ck, self.guard, feats=feats, stacked=stacked, a_nb=a_nb)
        if dec is not None:
            for r in np.flatnonzero(dec.rejected):
                self._calls[self._ids[rows[r]]].rejected_hops += 1
        # excitation: residual -> interpolate -> rectify -> DC removal -> power match -> whiten
        e = residual(frames, a_nb, hop_length=HOP_NB).reshape(B, HOP_NB)
        up = self._fir(e, "up_e", rows)
        r, st["dc"][rows] = signal.lfilter([1.0, -1.0], [1.0, -DC_POLE], np.abs(up), axis=1, zi=st["dc"][rows])
        scale = np.sqrt(np.mean(up**2, axis=1) / np.maximum(np.mean(r**2, axis=1), 1e-30))
        u = r * scale[:, None]
        wb_frames = np.concatenate([st["wb_hist"][rows], u], axis=1)
        st["wb_hist"][rows] = wb_frames[:, HOP_WB:]
        a_w, _ = lpc.analyse(wb_frames, order=WHITEN_ORDER, sr=WB_SR)
        u = residual(wb_frames, a_w, hop_length=HOP_WB).reshape(B, HOP_WB)
        rms = np.maximum(np.sqrt(np.mean(u**2, axis=1)), 1e-9)
        # synthesis: interpolated envelopes, memory carried per call
        k, _ = lpc.reflection(a_wb)
        k = np.clip(np.nan_to_num(k), -MAX_REFLECTION, MAX_REFLECTION)
        log_g = np.log(np.maximum(gain / rms, 1e-12))
        w = (np.arange(N_SUBFRAMES) + 1.0) / N_SUBFRAMES
        k_sub = st["k_prev"][rows][:, None, :] * (1 - w)[None, :, None] + k[:, None, :] * w[None, :, None]
        g_sub = np.exp(st["g_prev"][rows][:, None] * (1 - w)[None, :] + log_g[:, None] * w[None, :])
        st["k_prev"][rows] = k
        st["g_prev"][rows] = log_g
        a_sub = lpc.from_reflection(k_sub)  # (B, n_sub, p+1)
        synth = self._synthesize(rows, u.reshape(B, N_SUBFRAMES, -1), a_sub, g_sub)
        # band isolation and mixing with the interpolated input
        low = self._fir(x, "up_x", rows)
        iso_zi = st["iso"][:, rows]
        hb, iso_zi = signal.sosfilt(self._iso, synth, axis=1, zi=iso_zi)
        st["iso"][:, rows] = iso_zi
        return low + hb

    def _fir(self, x: np.ndarray, key: str, rows: np.ndarray) -> np.ndarray:
        """Interpolate B rows of 8 kHz samples by 2 with the upsampler's FIR, in polyphase form.

        Zero insertion followed by the FIR is, per output phase, a short FIR on the 8 kHz
        samples (even taps -> even outputs, odd taps -> odd outputs); state = the last
        ``len(taps) // 2`` input samples. One slice product per tap serves every call.
        """
        h = self._up_taps
        hist = self._state[key][rows]
        m = hist.shape[1]
        buf = np.concatenate([hist, x], axis=1)
        self._state[key][rows] = buf[:, x.shape[1] :]
        n = x.shape[1]
        out = np.zeros((x.shape[0], 2 * n))
        even, odd = out[:, 0::2], out[:, 1::2]
        for j in range(0, h.size, 2):
            even += h[j] * buf[:, m - j // 2 : m - j // 2 + n]
        for j in range(1, h.size, 2):
            odd += h[j] * buf[:, m - j // 2 : m - j // 2 + n]
        return out

    def _synthesize(self, rows: np.ndarray, u: np.ndarray, a_sub: np.ndarray, g_sub: np.ndarray) -> np.ndarray:
        """All-pole synthesis of one hop for B calls, each with its own filter memory."""
        synth = direct_synthesis if u.shape[0] >= DIRECT_MIN_CALLS else block_synthesis
        y, self._state["past"][rows] = synth(u, a_sub, g_sub, self._state["past"][rows])
        return y.reshape(u.shape[0], -1)
