"""Narrowband excitation (LPC residual) and its extension to the 0-8 kHz band.

The narrowband residual comes from inverse filtering each hop with that hop's
``A(z)``; the filter memory is the samples before the hop, taken from the same
analysis frame, so no separate state is needed. The extension runs at 16 kHz:

* ``fold``: spectral folding by zero insertion (the 0-4 kHz residual is
  mirrored into 4-8 kHz);
* ``modulate``: the interpolated residual multiplied by a cosine at
  ``shift_hz`` (its spectrum moves up by that much);
* ``rectify``: full-wave rectification of the interpolated residual, a
  nonlinearity whose harmonics fill the whole band, followed by DC removal and
  power renormalisation to the residual's power.

Each extended excitation is then whitened by a per-hop LPC inverse filter and
its per-hop RMS is reported so the synthesis gain can normalise it.
"""

from __future__ import annotations

from typing import Literal

import numpy as np

from nenv.dsp import kernels, lpc
from nenv.errors import InputError
from nenv.settings import HOP_WB, WB_SR, WIN_WB
from nenv.dsp.rows import ALL, RowState
from nenv.dsp.synthesis import UPSAMPLER_DELAY, UPSAMPLER_HISTORY, upsample_rows

Method = Literal["fold", "modulate", "rectify"]
METHODS = ("fold", "modulate", "rectify")
WHITEN_ORDER = 8  # LPC order of the whitening filter at 16 kHz
DC_POLE = 0.99  # pole of the DC-removal filter (-3 dB near 26 Hz at 16 kHz)
DEFAULT_SHIFT_HZ = 3400.0  # Hz, modulation shift: the band edge of the telephone channel


def residual(frames: np.ndarray, a: np.ndarray, *, hop_length: int) -> np.ndarray:
    """LPC residual of the last ``hop_length`` samples of each frame.

    ``e[n] = sum_k a_k x[n-k]`` with the hop's own coefficients; the
    ``order`` samples before the hop are read from the same frame, so frames
    from :class:`nenv.dsp.lpc.FrameBuffer` give a residual with state carried across hops.

    Parameters
    ----------
    frames : np.ndarray [shape=(n, L)], raw samples, L >= hop_length + order
    a : np.ndarray [shape=(n, order+1)]
    hop_length : int [samples]

    Returns
    -------
    np.ndarray [shape=(n * hop_length,)]
    """
    n, length = frames.shape
    p = a.shape[1] - 1
    if length < hop_length + p:
        raise ValueError(f"frames of {length} samples are too short for hop {hop_length} and order {p}")
    return kernels.residual(np.ascontiguousarray(frames, dtype=np.float64), np.ascontiguousarray(a, dtype=np.float64), hop_length).reshape(-1)


def mean_square(x: np.ndarray) -> np.ndarray:
    """Mean of squares along the last axis [shape=(..., n)] -> [shape=(...)] (one pass, no temporaries)."""
    return np.einsum("...n,...n->...", x, x) / x.shape[-1]


class ExcitationExtender:
    """Extend a narrowband residual to a whitened 16 kHz excitation, hop by hop, one row of state per call."""

    def __init__(self, method: Method = "rectify", *, shift_hz: float = DEFAULT_SHIFT_HZ, whiten: bool = True, rows: int = 1):
        if method not in METHODS:
            raise InputError(f"excitation={method!r} is not known: choose one of {', '.join(METHODS)}")
        if not 0 < shift_hz < WB_SR / 2:
            raise InputError(f"shift_hz={shift_hz} must lie between 0 and {WB_SR // 2} Hz")
        self.method = method
        self.shift_hz = shift_hz
        self.whiten = whiten
        # up: the interpolator's last inputs; delay: fold's alignment delay; n: samples produced so far
        # (the modulator's phase reference); dc: the DC filter's state; wb: the whitening frames' history
        self._state = RowState(up=np.zeros(UPSAMPLER_HISTORY), delay=np.zeros(UPSAMPLER_DELAY), n=np.zeros(()), dc=np.zeros(()), wb=np.zeros(WIN_WB - HOP_WB))
        self.add_rows(rows)

    def add_rows(self, n: int) -> None:
        self._state.add(n)

    def keep_rows(self, mask: np.ndarray) -> None:
        self._state.keep(mask)

    def process(self, e: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Extend whole hops of one call's narrowband residual (an extender of one row).

        e : np.ndarray [shape=(n * 80,)], residual at 8 kHz
        Returns u [shape=(n * 160,)], the extended excitation at 16 kHz, aligned with the
        interpolated narrowband signal (delay UPSAMPLER_DELAY), and each hop's RMS of u [shape=(n,)] (> 0).
        """
        u, rms = self.rows(np.asarray(e, dtype=np.float64)[None, :])
        return u[0], rms

    def rows(self, e: np.ndarray, sel=ALL) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`process` for the rows ``sel``: e [shape=(B, H * 80)] -> u [shape=(B, H * 160)], rms [shape=(B * H,)]."""
        st = self._state
        B = e.shape[0]
        if self.method == "fold":
            z = np.zeros((B, 2 * e.shape[1]))
            z[:, ::2] = np.sqrt(2.0) * e
            buf = np.concatenate([st.get("delay", sel), z], axis=1)
            st.put("delay", sel, buf[:, z.shape[1] :])
            u = buf[:, : z.shape[1]]
        else:
            hist = st.get("up", sel)
            up = upsample_rows(e, hist)
            st.put("up", sel, hist)
            if self.method == "modulate":
                n0 = st.get("n", sel)
                t = n0[:, None] + np.arange(up.shape[1], dtype=np.float64)  # each call's sample index: phase continues across hops
                u = up * 2.0 * np.cos(2 * np.pi * self.shift_hz * t / WB_SR)
            else:
                u, dc = rectify_hops(up, st.get("dc", sel))
                st.put("dc", sel, dc)
        st.put("n", sel, st.get("n", sel) + u.shape[1])
        if not self.whiten:
            return u, hop_rms(u.reshape(-1))
        w, rms = whiten_hops(st.frames("wb", sel, u, hop=HOP_WB))
        return w.reshape(B, -1), rms


def rectify_hops(up: np.ndarray, dc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The ``rectify`` extension for B rows of whole 16 kHz hops (one call, or many calls batched).

    Full-wave rectification, DC removal ``(1 - z^-1) / (1 - DC_POLE z^-1)`` with state, then each
    hop scaled back to the power of the interpolated residual it came from (:func:`nenv.dsp.kernels.rectify`).

    up : np.ndarray [shape=(B, n * HOP_WB)], interpolated residual; dc : [shape=(B,)], the DC filter's state
    Returns u [shape=(B, n * HOP_WB)] and the DC filter's new state [shape=(B,)].
    """
    dc = np.array(dc, dtype=np.float64)  # a copy: the kernel updates it in place
    return kernels.rectify(np.ascontiguousarray(up, dtype=np.float64), dc, DC_POLE, HOP_WB), dc


def whiten_hops(frames: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Whiten extended excitation: each hop through its own order-WHITEN_ORDER LPC inverse filter.

    frames : np.ndarray [shape=(n, WIN_WB)], 16 kHz frames ending at each hop's end
    Returns u [shape=(n * HOP_WB,)] and each hop's RMS [shape=(n,)] (> 0).
    """
    a, _ = lpc.analyse(frames, order=WHITEN_ORDER, sr=WB_SR)
    u = residual(frames, a, hop_length=HOP_WB)
    return u, hop_rms(u)


def hop_rms(u: np.ndarray) -> np.ndarray:
    """RMS of each 16 kHz hop of ``u`` [shape=(n * HOP_WB,)], floored at 1e-9."""
    return np.maximum(np.sqrt(mean_square(u.reshape(-1, HOP_WB))), 1e-9)
