"""Framing, autocorrelation, Levinson-Durbin and reflection coefficients (cepstra and spectra: :mod:`nenv.dsp.cepstrum`).

Conventions used throughout nenv:

* The inverse (analysis) filter is ``A(z) = 1 + sum_{k=1..p} a_k z^-k``; arrays
  of predictor coefficients hold ``[1, a_1, ..., a_p]`` in their last axis.
* Reflection coefficients ``k_i`` are the ones the Levinson-Durbin recursion
  produces with that sign (``a_i^(i) = k_i``); ``A`` is minimum phase (the
  synthesis filter ``1/A`` is stable) exactly when every ``|k_i| < 1``.
* ``gain`` is the amplitude ``G`` of the all-pole model ``G / A(z)``: for an
  analysis frame, ``G**2`` is the prediction-error power per sample.
* Cepstra are those of the log *magnitude* ``ln|G / A(e^jw)|``:
  ``c_0 = ln G`` and ``ln|H(w)| = c_0 + sum_{n>=1} c_n cos(n w)``; for n >= 1 these
  are the complex cepstrum of the minimum-phase model, i.e. twice the real
  cepstrum (inverse FFT of ``ln|H|``).

Everything is vectorised over frames: the leading axes are frames, the last
axis is samples, lags or coefficients.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import scipy.fft

from nenv.dsp import kernels

LAG_WINDOW_HZ = 60.0  # Hz, Gaussian lag-window bandwidth (ITU-T G.729 clause 3.2.1 uses 60 Hz)
WHITE_NOISE_CORRECTION = 1.0001  # r[0] factor = -40 dB noise floor (ITU-T G.729 clause 3.2.1)


class FrameBuffer:
    """Streaming version of :func:`frame`: keeps the last ``frame_length - hop_length`` samples.

    ``push`` takes any whole number of hops and returns their frames; pushing a
    signal in pieces gives the same frames as framing it at once.
    """

    def __init__(self, *, frame_length: int, hop_length: int):
        if frame_length < hop_length:
            raise ValueError(f"frame_length={frame_length} must be >= hop_length={hop_length}")
        self.frame_length = frame_length
        self.hop_length = hop_length
        self._history = np.zeros(frame_length - hop_length)

    def push(self, y: np.ndarray) -> np.ndarray:
        """Frames of the hops in ``y`` [shape=(len(y) // hop, frame_length)]; len(y) must be whole hops."""
        if y.size % self.hop_length:
            raise ValueError(f"push takes whole hops of {self.hop_length} samples, got {y.size}")
        buf = np.concatenate([self._history, np.asarray(y, dtype=np.float64)])
        if self._history.size:
            self._history = buf[buf.size - self._history.size :].copy()
        n_frames = y.size // self.hop_length
        if n_frames == 0:
            return np.zeros((0, self.frame_length))
        return hop_frames(buf[None, :], frame_length=self.frame_length, hop_length=self.hop_length, n_frames=n_frames)[0]


def hop_frames(buf: np.ndarray, *, frame_length: int, hop_length: int, n_frames: int) -> np.ndarray:
    """Read-only view of ``n_frames`` frames per row: frame ``t`` of row ``b`` is
    ``buf[b, t*hop_length : t*hop_length + frame_length]``.

    buf : np.ndarray [shape=(B, T)], T >= (n_frames - 1) * hop_length + frame_length
    -> np.ndarray [shape=(B, n_frames, frame_length)], sharing buf's memory (no copy)
    """
    buf = np.ascontiguousarray(buf)
    if n_frames < 1 or (n_frames - 1) * hop_length + frame_length > buf.shape[1]:
        raise ValueError(f"{n_frames} frames of {frame_length} every {hop_length} do not fit in {buf.shape[1]} samples")
    step = buf.itemsize
    view = np.ndarray((buf.shape[0], n_frames, frame_length), buf.dtype, buf, 0, (buf.strides[0], hop_length * step, step))
    view.flags.writeable = False
    return view


def frame(y: np.ndarray, *, frame_length: int, hop_length: int) -> np.ndarray:
    """Cut ``y`` into overlapping frames that end at each hop's last sample.

    Frame ``t`` holds ``y[(t+1)*hop - frame_length : (t+1)*hop]``, zeros before the start.
    Only whole hops are framed.

    Parameters
    ----------
    y : np.ndarray [shape=(n,)]
    frame_length, hop_length : int > 0 [samples]

    Returns
    -------
    np.ndarray [shape=(n // hop_length, frame_length)], a read-only view where possible
    """
    n_whole = (y.size // hop_length) * hop_length
    return FrameBuffer(frame_length=frame_length, hop_length=hop_length).push(y[:n_whole])


@lru_cache(maxsize=None)
def asymmetric_window(length: int) -> np.ndarray:
    """The ITU-T G.729 (clause 3.2.1) style asymmetric analysis window.

    A half Hamming window over the first 5/6 of the frame and a quarter cosine
    over the last 1/6; for 240 samples this is G.729's 200 + 40 window. Its peak
    sits ``length/6`` samples before the frame end, which on nenv's grid (30 ms
    frames, 10 ms hops) is the centre of the current hop.

    Returns
    -------
    np.ndarray [shape=(length,)], read-only
    """
    l1 = (5 * length) // 6
    l2 = length - l1
    n1 = np.arange(l1)
    n2 = np.arange(l2)
    w = np.concatenate([0.54 - 0.46 * np.cos(2 * np.pi * n1 / (2 * l1 - 1)), np.cos(2 * np.pi * n2 / (4 * l2 - 1))])
    w.flags.writeable = False
    return w


def autocorrelation(frames: np.ndarray, *, order: int) -> np.ndarray:
    """Biased autocorrelation ``r[k] = sum_n x[n] x[n+k]`` for lags 0..order.

    frames : np.ndarray [shape=(..., L)] -> np.ndarray [shape=(..., order+1)]
    """
    length = frames.shape[-1]
    if order <= DIRECT_MAX_ORDER and frames.dtype == np.float64:  # a few lags: the compiled direct sums
        r = kernels.autocorrelation(np.ascontiguousarray(frames.reshape(-1, length)), order)
        return r.reshape(frames.shape[:-1] + (order + 1,))
    # circular autocorrelation equals the linear one for lags <= order once n_fft >= length + order
    n_fft = scipy.fft.next_fast_len(length + order, real=True)
    spec = scipy.fft.rfft(frames, n=n_fft, axis=-1)
    power = spec.real**2 + spec.imag**2
    return scipy.fft.irfft(power, n=n_fft, axis=-1, overwrite_x=True)[..., : order + 1]


DIRECT_MAX_ORDER = 24  # autocorrelation up to this many lags by direct products, beyond by FFT


def condition(r: np.ndarray, *, sr: int, lag_window_hz: float = LAG_WINDOW_HZ, white_noise: float = WHITE_NOISE_CORRECTION) -> np.ndarray:
    """Apply a Gaussian lag window and white-noise correction to autocorrelations.

    Both are common practice in speech codecs (ITU-T G.729 clause 3.2.1 uses
    60 Hz and 1.0001): the lag window widens sharp formant peaks, the
    correction lifts the spectral floor by -40 dB, keeping Levinson-Durbin
    well-conditioned.

    r : np.ndarray [shape=(..., p+1)]; sr : int [Hz] -> np.ndarray, same shape
    """
    return r * _lag_window(r.shape[-1], sr, lag_window_hz, white_noise)


@lru_cache(maxsize=None)
def _lag_window(n_lags: int, sr: int, lag_window_hz: float, white_noise: float) -> np.ndarray:
    lags = np.arange(n_lags)
    w = np.exp(-0.5 * (2 * np.pi * lag_window_hz * lags / sr) ** 2)
    w[0] = white_noise
    w.flags.writeable = False
    return w


@lru_cache(maxsize=None)
def window_energy(length: int) -> float:
    """Sum of the squared :func:`asymmetric_window` of ``length`` samples."""
    w = asymmetric_window(length)
    return float(np.sum(w * w))


# Autocorrelation energy below which a frame counts as silent: samples of about 1e-140 full scale,
# thousands of dB below any real signal, where r's values near the bottom of float64's range
# keep too few bits for the recursion (the white-noise correction is lost in rounding).
SILENT_ENERGY = 1e-280


def levinson(r: np.ndarray, *, order: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Levinson-Durbin recursion, vectorised over frames.

    Parameters
    ----------
    r : np.ndarray [shape=(..., >= order+1)], autocorrelation, lag 0 first
    order : int > 0

    Returns
    -------
    a : np.ndarray [shape=(..., order+1)], ``[1, a_1..a_p]``
    k : np.ndarray [shape=(..., order)], reflection coefficients
    err : np.ndarray [shape=(...)], final prediction-error energy (same unit as r[0])

    Frames with ``r[0] <= SILENT_ENERGY`` (digital silence, or values so small that float64
keeps only a few bits of them) get ``a = [1, 0, ...]``, ``k = 0``, ``err = 0``.
    """
    r = np.asarray(r, dtype=np.float64)
    lead = r.shape[:-1]
    rows = np.ascontiguousarray(r.reshape(-1, r.shape[-1])[:, : order + 1])
    a, k, err = kernels.levinson(rows, order, SILENT_ENERGY)
    return a.reshape(*lead, order + 1), k.reshape(*lead, order), err.reshape(lead)


def analyse(frames: np.ndarray, *, order: int, sr: int) -> tuple[np.ndarray, np.ndarray]:
    """LPC analysis of raw frames: asymmetric window, conditioned autocorrelation, Levinson.

    Parameters
    ----------
    frames : np.ndarray [shape=(n, L)], unwindowed samples
    order : int > 0
    sr : int [Hz], for the lag window

    Returns
    -------
    a : np.ndarray [shape=(n, order+1)]
    gain : np.ndarray [shape=(n,)], amplitude G, G**2 = error power per sample
    """
    length = frames.shape[-1]
    rows = np.ascontiguousarray(np.asarray(frames, dtype=np.float64).reshape(-1, length))  # frames may be views of a signal
    a, _, gain = kernels.lpc_analyse(rows, asymmetric_window(length), _lag_window(order + 1, sr, LAG_WINDOW_HZ, WHITE_NOISE_CORRECTION), order, SILENT_ENERGY, window_energy(length))
    return a.reshape(frames.shape[:-1] + (order + 1,)), gain.reshape(frames.shape[:-1])


def reflection(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Reflection coefficients by the step-down (backward Levinson) recursion.

    Parameters
    ----------
    a : np.ndarray [shape=(..., p+1)], ``[1, a_1..a_p]``

    Returns
    -------
    k : np.ndarray [shape=(..., p)]; entries below the first ``|k| >= 1`` are not meaningful
    stable : np.ndarray of bool [shape=(...)], True when every ``|k_i| < 1``
    """
    a = np.asarray(a, dtype=np.float64)
    lead = a.shape[:-1]
    p = a.shape[-1] - 1
    k, stable = kernels.reflection(np.ascontiguousarray(a.reshape(-1, p + 1)))
    return k.reshape(*lead, p), stable.reshape(lead)


def is_stable(a: np.ndarray, *, margin: float = 0.0) -> np.ndarray:
    """True where every reflection coefficient satisfies ``|k| < 1 - margin`` (step-down test).

    a : np.ndarray [shape=(..., p+1)] -> np.ndarray of bool [shape=(...)]
    """
    k, stable = reflection(a)
    return stable & np.all(np.abs(k) < 1.0 - margin, axis=-1)


def from_reflection(k: np.ndarray) -> np.ndarray:
    """Predictor coefficients from reflection coefficients (step-up recursion).

    k : np.ndarray [shape=(..., p)] -> a : np.ndarray [shape=(..., p+1)]
    """
    k = np.asarray(k, dtype=np.float64)
    lead = k.shape[:-1]
    p = k.shape[-1]
    return kernels.from_reflection(np.ascontiguousarray(k.reshape(-1, p))).reshape(*lead, p + 1)
