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

from nenv import filters, lpc
from nenv.errors import InputError
from nenv.settings import HOP_WB, WB_SR, WIN_WB
from nenv.synthesis import UPSAMPLER_DELAY, Delay, Upsampler

Method = Literal["fold", "modulate", "rectify"]
METHODS = ("fold", "modulate", "rectify")
WHITEN_ORDER = 8  # LPC order of the whitening filter at 16 kHz
DC_POLE = 0.99  # pole of the DC-removal filter (-3 dB near 26 Hz at 16 kHz)
DC_B, DC_A = np.array([1.0, -1.0]), np.array([1.0, -DC_POLE])  # the DC-removal filter (1 - z^-1) / (1 - DC_POLE z^-1)
DEFAULT_SHIFT_HZ = 3400.0  # Hz, modulation shift: the band edge of the telephone channel


def residual(frames: np.ndarray, a: np.ndarray, *, hop_length: int) -> np.ndarray:
    """LPC residual of the last ``hop_length`` samples of each frame.

    ``e[n] = sum_k a_k x[n-k]`` with the hop's own coefficients; the
    ``order`` samples before the hop are read from the same frame, so frames
    from :class:`nenv.lpc.FrameBuffer` give a residual with state carried across hops.

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
    start = length - hop_length
    if n <= 2:  # a streaming hop: one convolution per frame
        return np.concatenate([np.convolve(frames[i, start - p :], a[i], mode="valid") for i in range(n)])
    # window[t, j] = frames[t, start - p + j : start + j + 1], so e[t, j] = window[t, j] @ a[t, ::-1]
    windows = lpc.hop_frames(frames[:, start - p :], frame_length=p + 1, hop_length=1, n_frames=hop_length)
    return np.matmul(windows, a[:, ::-1, None]).reshape(-1)


def mean_square(x: np.ndarray) -> np.ndarray:
    """Mean of squares along the last axis [shape=(..., n)] -> [shape=(...)] (one pass, no temporaries)."""
    return filters.einsum("...n,...n->...", x, x) / x.shape[-1]


class ExcitationExtender:
    """Extend a narrowband residual to a whitened 16 kHz excitation, hop by hop, with state."""

    def __init__(self, method: Method = "rectify", *, shift_hz: float = DEFAULT_SHIFT_HZ, whiten: bool = True):
        if method not in METHODS:
            raise InputError(f"excitation={method!r} is not known: choose one of {', '.join(METHODS)}")
        if not 0 < shift_hz < WB_SR / 2:
            raise InputError(f"shift_hz={shift_hz} must lie between 0 and {WB_SR // 2} Hz")
        self.method = method
        self.shift_hz = shift_hz
        self.whiten = whiten
        self._up = Upsampler()
        self._delay = Delay(UPSAMPLER_DELAY)
        self._n = 0  # samples produced so far: the modulator's phase reference
        self._dc_zi = np.zeros(1)
        self._frames = lpc.FrameBuffer(frame_length=WIN_WB, hop_length=HOP_WB)

    def process(self, e: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Extend whole hops of narrowband residual.

        Parameters
        ----------
        e : np.ndarray [shape=(n * 80,)], residual at 8 kHz

        Returns
        -------
        u : np.ndarray [shape=(n * 160,)], extended excitation at 16 kHz, aligned
            with :class:`nenv.synthesis.Upsampler` output (delay UPSAMPLER_DELAY)
        rms : np.ndarray [shape=(n,)], RMS of ``u`` over each hop (> 0)
        """
        if self.method == "fold":
            z = np.zeros(2 * e.size)
            z[::2] = np.sqrt(2.0) * e
            u = self._delay.process(z)
        else:
            up = self._up.process(e)
            if self.method == "modulate":
                t = self._n + np.arange(up.size, dtype=np.float64)  # global sample index: phase continues across calls
                u = up * 2.0 * np.cos(2 * np.pi * self.shift_hz * t / WB_SR)
            else:
                u, dc_zi = rectify_hops(up[None, :], self._dc_zi[None, :])
                u, self._dc_zi = u[0], dc_zi[0]
        self._n += u.size
        frames = self._frames.push(u)
        if self.whiten:
            return whiten_hops(frames)
        return u, hop_rms(u)


def rectify_hops(up: np.ndarray, dc_zi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The ``rectify`` extension for B rows of whole 16 kHz hops (one call, or many calls batched).

    Full-wave rectification, DC removal with state, then each hop scaled back to the power
    of the interpolated residual it came from.

    up : np.ndarray [shape=(B, n * HOP_WB)], interpolated residual; dc_zi : [shape=(B, 1)]
    Returns u [shape=(B, n * HOP_WB)] and the DC filter's new state [shape=(B, 1)].
    """
    z, dc_zi = filters.iir(DC_B, DC_A, np.abs(up), dc_zi)
    up_h, z_h = up.reshape(up.shape[0], -1, HOP_WB), z.reshape(z.shape[0], -1, HOP_WB)
    scale = np.sqrt(mean_square(up_h) / np.maximum(mean_square(z_h), 1e-30))
    return (z_h * scale[..., None]).reshape(up.shape), dc_zi


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
