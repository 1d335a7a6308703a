"""Per-hop features: the network's inputs (narrowband) and its training targets (wideband).

Both training and the runtime compute inputs with these functions from the
same :class:`nenv.chain.estimators.base.NarrowbandAnalysis`, so a model sees at run
time exactly what it saw in training. :class:`FeatureSettings` records every
choice; a model carries it and the runtime refuses a model whose settings
differ from its own.

Inputs, per hop (``N_INPUTS`` values), from the narrowband analysis frame:
  * ``c_1 .. c_10``: cepstrum of the order-10 LPC envelope (shape only, no gain)
  * ``energy_db``: windowed frame power in dB re full scale (floored at -100 dB)
  * ``prediction_gain_db``: frame power over LPC prediction-error power, in dB (a
    spectral-flatness measure: 0 dB for white noise, high for peaky spectra)
  * ``voicing``: largest normalised autocorrelation at lags 20-147 (54-400 Hz
    pitch), corrected for the window; 0 for noise, near 1 for steady voiced speech
  * ``zcr``: zero-crossing rate of the hop, crossings per sample
The network sees the current hop and ``context`` past hops (no look-ahead).

Targets, per hop, from the time-aligned 16 kHz frame:
  * ``c_1 .. c_20``: cepstrum of the order-16 LPC envelope (shape only)
  * ``level_db``: high-band (3.4-8 kHz) power of the wideband frame relative to
    the narrowband frame power, in dB
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields
from functools import lru_cache

import numpy as np

from nenv.dsp import cepstrum, kernels, lpc
from nenv.errors import ConfigError
from nenv.chain.estimators.base import NarrowbandAnalysis
from nenv.settings import BAND_EDGE_HZ, HOP_NB, LOW_BAND_HZ, NB_ORDER, NB_SR, WB_ORDER, WB_SR, WIN_NB, WIN_WB

FEATURE_VERSION = 1
ENERGY_FLOOR_DB = -100.0  # dB re full scale
PITCH_LAGS = (20, 147)  # samples at 8 kHz: 400 Hz down to 54 Hz
LEVEL_N_FFT = 512  # FFT size for band powers at 16 kHz
N_CEPS_IN = 10  # narrowband cepstra c_1..c_10, the first inputs
INPUT_NAMES = [f"c{i}" for i in range(1, N_CEPS_IN + 1)] + ["energy_db", "prediction_gain_db", "voicing", "zcr"]
N_INPUTS = len(INPUT_NAMES)


@dataclass(frozen=True)
class FeatureSettings:
    """Everything that defines the features; stored in every model and compared at load time."""

    version: int = FEATURE_VERSION
    nb_sr: int = NB_SR
    wb_sr: int = WB_SR
    hop_nb: int = HOP_NB
    win_nb: int = WIN_NB
    win_wb: int = WIN_WB
    nb_order: int = NB_ORDER
    wb_order: int = WB_ORDER
    n_inputs: int = N_INPUTS
    n_wb_ceps: int = 20
    context: int = 4
    band_edge_hz: float = BAND_EDGE_HZ

    @property
    def input_dim(self) -> int:
        """Width of one stacked network input (current hop + context)."""
        return self.n_inputs * (self.context + 1)

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> "FeatureSettings":
        known = {f.name for f in fields(cls)}
        unknown = set(d) - known
        if unknown:
            raise ConfigError(f"feature settings have unknown keys {sorted(unknown)}: made by a newer nenv?")
        return cls(**d)

    def check_compatible(self, other: "FeatureSettings", *, what: str) -> None:
        """Raise ConfigError unless ``other`` computes the same features as ``self`` (context may differ)."""
        mine, theirs = self.to_dict(), other.to_dict()
        diff = [k for k in mine if k != "context" and mine[k] != theirs[k]]
        if diff:
            pairs = ", ".join(f"{k}={theirs[k]!r} (this nenv: {mine[k]!r})" for k in diff)
            raise ConfigError(f"{what} was made with other feature settings: {pairs}; retrain it with this version of nenv")


def narrowband_features(analysis: NarrowbandAnalysis) -> np.ndarray:
    """Per-hop input features [shape=(n, N_INPUTS)], see the module docstring (compiled:
    :func:`nenv.dsp.feature_loops.hop_measures`, the voicing's FFTs, :func:`_voicing`)."""
    frames, a, gain = analysis.frames, analysis.a, analysis.gain
    n = frames.shape[0]
    if n == 0:
        return np.zeros((0, N_INPUTS))
    length = frames.shape[1]
    ceps, energy_db, pred_gain, zcr, xn = kernels.hop_measures(kernels.f64(frames), lpc.asymmetric_window(length), kernels.f64(a), kernels.f64(gain), lpc.window_energy(length),
                                                               N_CEPS_IN, HOP_NB, ENERGY_FLOOR_DB)
    out = np.empty((n, N_INPUTS))
    out[:, :N_CEPS_IN] = ceps[:, 1:]
    out[:, ENERGY_COLUMN], out[:, PREDICTION_GAIN_COLUMN], out[:, ZCR_COLUMN] = energy_db, pred_gain, zcr
    out[:, VOICING_COLUMN] = _voicing(xn, length)
    return out


VOICING_COLUMN = INPUT_NAMES.index("voicing")
ENERGY_COLUMN = INPUT_NAMES.index("energy_db")
PREDICTION_GAIN_COLUMN = INPUT_NAMES.index("prediction_gain_db")
ZCR_COLUMN = INPUT_NAMES.index("zcr")


def voicing(frames: np.ndarray) -> np.ndarray:
    """The ``voicing`` input alone, per frame: frames [shape=(n, WIN_NB)] raw -> [shape=(n,)] in [0, 1]."""
    if frames.shape[0] == 0:
        return np.zeros(0)
    length = frames.shape[1]
    n = frames.shape[0]
    *_, xn = kernels.hop_measures(kernels.f64(frames), lpc.asymmetric_window(length), np.ones((n, 1)), np.ones(n), lpc.window_energy(length), 1, HOP_NB, ENERGY_FLOOR_DB)
    return _voicing(xn, length)


def _voicing(xn: np.ndarray, length: int) -> np.ndarray:
    # normalised autocorrelation over the pitch range, divided by the window's own normalised
    # autocorrelation to undo the window's taper (Boersma 1993, IFA Proceedings 17). Single
    # precision is ample for a value in [0, 1] and halves the FFTs' cost; each windowed frame comes
    # scaled to unit peak (xn, from hop_measures; the ratio does not depend on scale), so nothing underflows.
    r = np.ascontiguousarray(lpc.autocorrelation(xn, order=PITCH_LAGS[1]))
    return kernels.voicing_peak(r, _window_lag_ratio(length), PITCH_LAGS[0], PITCH_LAGS[1])


@lru_cache(maxsize=None)
def _window_lag_ratio(length: int) -> np.ndarray:
    """The window's autocorrelation at the pitch lags over its lag 0 (read-only, computed once)."""
    rw = _window_autocorrelation(length)
    out = rw[PITCH_LAGS[0] : PITCH_LAGS[1] + 1] / rw[0]
    out.flags.writeable = False
    return out


@lru_cache(maxsize=None)
def _window_autocorrelation(length: int) -> np.ndarray:
    """Autocorrelation of the analysis window over the pitch lags (read-only, computed once)."""
    rw = lpc.autocorrelation(lpc.asymmetric_window(length)[None, :], order=PITCH_LAGS[1])[0]
    rw.flags.writeable = False
    return rw


def stack_context(history: np.ndarray, ready: np.ndarray, feats: np.ndarray, *, context: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Each hop's features with its call's ``context`` previous hops, oldest first, for B calls.

    history [shape=(B, context * d)]: each call's last ``context`` hops; ready [shape=(B,)]: whether
    it holds any yet (before a call's first hop its history is that hop repeated, so stacking a
    signal in pieces gives the same rows as stacking it at once); feats [shape=(B, H, d)].
    Returns stacked [shape=(B * H, (context + 1) * d)] and the new history and ready flags.
    Training (:class:`ContextStacker`) and the runtime estimator both stack through here.
    """
    stacked, new_history = kernels.stack_context(kernels.f64(history), np.ascontiguousarray(ready, dtype=bool), kernels.f64(feats), context)
    return stacked, new_history, np.ones_like(ready)


class ContextStacker:
    """:func:`stack_context` for one signal, with state (training stacks a whole utterance at once)."""

    def __init__(self, context: int):
        self.context = context
        self.reset()

    def reset(self) -> None:
        self._history: np.ndarray | None = None
        self._ready = np.zeros(1, dtype=bool)

    def push(self, feats: np.ndarray) -> np.ndarray:
        """feats [shape=(n, d)] -> stacked [shape=(n, d * (context + 1))]."""
        n, d = feats.shape
        if n == 0:
            return np.zeros((0, d * (self.context + 1)))
        if self._history is None:
            self._history = np.zeros((1, self.context * d))
        stacked, self._history, self._ready = stack_context(self._history, self._ready, feats[None], context=self.context)
        return stacked


def band_power(frames: np.ndarray, *, lo: float, hi: float) -> np.ndarray:
    """Power per sample of windowed 16 kHz frames inside lo..hi Hz (Parseval, one-sided).

    frames : np.ndarray [shape=(n, WIN_WB)] raw -> np.ndarray [shape=(n,)]
    """
    w = lpc.asymmetric_window(frames.shape[1])
    n_fft = max(LEVEL_N_FFT, 1 << int(np.ceil(np.log2(frames.shape[1]))))
    spec = np.fft.rfft(frames * w, n=n_fft, axis=1)
    p = spec.real**2 + spec.imag**2
    first, last = cepstrum.band_bins(lo, hi, n_fft=n_fft, sr=WB_SR)
    return 2.0 * p[:, first : last + 1].sum(axis=1) / n_fft / lpc.window_energy(frames.shape[1])


def wideband_targets(wb_frames: np.ndarray, nb_energy_db: np.ndarray, *, settings: FeatureSettings) -> tuple[np.ndarray, np.ndarray]:
    """Training targets for hops whose 16 kHz frames are ``wb_frames`` [shape=(n, WIN_WB)].

    Returns
    -------
    ceps : np.ndarray [shape=(n, n_wb_ceps)], shape cepstrum of the order-16 envelope
    level_db : np.ndarray [shape=(n,)], high-band power re narrowband frame power, dB
    """
    a, _ = lpc.analyse(wb_frames, order=settings.wb_order, sr=settings.wb_sr)
    ceps = cepstrum.to_cepstrum(a, n_ceps=settings.n_wb_ceps)[:, 1:]
    hb = band_power(wb_frames, lo=settings.band_edge_hz, hi=settings.wb_sr / 2)
    hb_db = np.maximum(10 * np.log10(np.maximum(hb, 1e-30)), ENERGY_FLOOR_DB)
    return ceps, hb_db - nb_energy_db


def envelope_from_prediction(ceps: np.ndarray, level_db: np.ndarray, nb_energy_db: np.ndarray, *, order: int = WB_ORDER, with_reflection: bool = False) -> tuple[np.ndarray, ...]:
    """Stable all-pole envelopes whose high-band power matches the predicted level.

    The shape comes from the cepstrum by the always-stable route; the gain is then
    set so that a unit-power white excitation through ``G/A`` has power
    ``nb_power * 10**(level_db/10)`` in 3.4-8 kHz.

    Returns a [shape=(n, order+1)], gain [shape=(n,)] (may be inf/NaN for non-finite input) and,
    with ``with_reflection``, the reflection coefficients of ``a`` [shape=(n, order)] from the
    Levinson-Durbin recursion that produced it. Compiled (:mod:`nenv.dsp.envelope_loops`); the
    numpy route, :func:`nenv.dsp.cepstrum.from_cepstrum_stable` and
    :func:`nenv.dsp.cepstrum.power_spectrum`, is its reference in the tests.
    """
    n_fft = cepstrum.STABLE_N_FFT
    cos, _ = cepstrum.cosine_table(ceps.shape[1] + 1, n_fft)
    spec, top = kernels.log_spectrum(kernels.f64(ceps), cos, cepstrum.STABLE_FLOOR_NEPERS)
    np.exp(spec, out=spec)
    band_cos, band_sin = cepstrum.cosine_table(order + 1, LEVEL_N_FFT, *cepstrum.band_bins(BAND_EDGE_HZ, WB_SR / 2, n_fft=LEVEL_N_FFT, sr=WB_SR))
    a, gain, k = kernels.fit_envelope(spec, cepstrum.inverse_cosines(order + 1, n_fft), order, lpc.SILENT_ENERGY, band_cos, band_sin, top,
                                      _per_row(nb_energy_db, top.size), _per_row(level_db, top.size), float(LEVEL_N_FFT))
    return (a, gain, k) if with_reflection else (a, gain)


def _per_row(v, n: int) -> np.ndarray:
    """``v`` (one value per row, or one for all) as a C-contiguous float64 array [shape=(n,)]."""
    v = kernels.f64(v)
    return v if v.shape == (n,) else np.ascontiguousarray(np.broadcast_to(v, (n,)))


def low_band_target(wb_frames: np.ndarray, nb_energy_db: np.ndarray) -> np.ndarray:
    """The true low-band (50-300 Hz) power of 16 kHz frames re the narrowband frame power, dB [shape=(n,)]
    (what the guard's low-band range is learned from)."""
    lb = band_power(wb_frames, lo=LOW_BAND_HZ[0], hi=LOW_BAND_HZ[1])
    return np.maximum(10 * np.log10(np.maximum(lb, 1e-30)), ENERGY_FLOOR_DB) - nb_energy_db


def low_band_level(a: np.ndarray, gain: np.ndarray, nb_energy_db: np.ndarray) -> np.ndarray:
    """Power in 50-300 Hz of a unit-power white excitation through each envelope ``gain / A``, re the
    narrowband frame power, dB [shape=(n,)] (the level the low band is synthesised at; NaN/inf pass through;
    compiled, :func:`nenv.dsp.envelope_loops.band_level_db`; :func:`nenv.dsp.cepstrum.power_spectrum`
    summed over the band is its reference in the tests)."""
    a = kernels.f64(a)
    band_cos, band_sin = cepstrum.cosine_table(a.shape[1], LEVEL_N_FFT, *cepstrum.band_bins(LOW_BAND_HZ[0], LOW_BAND_HZ[1], n_fft=LEVEL_N_FFT, sr=WB_SR))
    return kernels.band_level_db(a, _per_row(gain, a.shape[0]), band_cos, band_sin, _per_row(nb_energy_db, a.shape[0]), float(LEVEL_N_FFT))
