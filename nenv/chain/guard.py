"""The safety guard: every hop's network envelope is checked before it is used.

Checks, each recorded per hop with its measured value:

* ``nonfinite``: a predicted value or the derived gain is NaN or infinite;
* ``unstable``: some reflection coefficient of the envelope has ``|k| >= 1 -
  stability_margin`` (the coefficients of the Levinson-Durbin recursion that built
  it when the caller has them, else the step-down of its predictor coefficients);
* ``level``: the predicted high-band level lies outside the range seen in
  training (0.1st..99.9th percentile of the training targets, widened by
  ``level_margin_db``);
* ``mismatch``: the predicted envelope's telephone-band part (300-3400 Hz)
  disagrees with the observed narrowband envelope by more than the training
  99.9th percentile (RMS difference of the mean-removed log envelopes, dB);
* ``novel``: the narrowband input lies farther from every codebook cell than
  99.9% of the training frames did;
* ``low_band`` (only when the low band is on): the level at which the envelope would
  synthesise the low band (50-300 Hz, re the narrowband frame power) lies outside the
  range of the true low band in training (0.1st..99.9th percentile, widened by
  ``level_margin_db``), or is not finite.

A rejected hop gets the codebook envelope of its nearest cell instead.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, fields
from enum import IntFlag

import numpy as np

from nenv.words import count
from nenv.dsp import cepstrum, kernels, lpc
from nenv.errors import ConfigError
from nenv.settings import BAND_EDGE_HZ, CHANNEL_LOW_HZ, WB_SR

MISMATCH_N_FFT_WB = 512  # 31.25 Hz bins at 16 kHz
MISMATCH_N_FFT_NB = 256  # the same 31.25 Hz bins at 8 kHz


class Check(IntFlag):
    """Reasons a hop can be rejected (bit flags, combinable)."""

    NONFINITE = 1
    UNSTABLE = 2
    LEVEL = 4
    MISMATCH = 8
    NOVEL = 16
    LOW_BAND = 32


CHECK_NAMES = {c: c.name.lower() for c in Check}


def reason_names(mask: int) -> list[str]:
    """Names of the checks set in ``mask``, e.g. ['unstable', 'level']."""
    return [CHECK_NAMES[c] for c in Check if mask & c]


@dataclass(frozen=True)
class GuardLimits:
    """Thresholds, learned from training data and stored with the model."""

    level_min_db: float
    level_max_db: float
    mismatch_max_db: float
    novelty_max: float
    stability_margin: float = 1e-3
    low_min_db: float | None = None  # low band's range; None: models trained before the low band (finiteness only)
    low_max_db: float | None = None

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> "GuardLimits":
        names = {f.name for f in fields(cls)}
        if set(d) - names or {"level_min_db", "level_max_db", "mismatch_max_db", "novelty_max"} - set(d):
            raise ConfigError(f"guard limits must have exactly the keys {sorted(names)}, got {sorted(d)}")
        return cls(**{k: None if v is None else float(v) for k, v in d.items()})


@dataclass
class Decisions:
    """The guard's verdict on consecutive hops (arrays of shape (n,))."""

    rejected: np.ndarray  # bool
    reasons: np.ndarray  # int, Check bit mask
    max_k: np.ndarray  # largest |reflection coefficient|
    level_db: np.ndarray  # predicted high-band level re narrowband power
    mismatch_db: np.ndarray  # telephone-band disagreement
    novelty: np.ndarray  # distance to the nearest codebook cell
    cell: np.ndarray  # int, nearest codebook cell (the fallback used when rejected)
    low_db: np.ndarray  # level of the low band the envelope implies (NaN when the low band is off)

    def head(self, n: int) -> "Decisions":
        """The verdicts on the first ``n`` hops."""
        return self.part(slice(0, n))

    def part(self, hops: slice) -> "Decisions":
        """The verdicts on the hops ``hops`` (a slice)."""
        return Decisions(*(getattr(self, f.name)[hops] for f in fields(Decisions)))

    @staticmethod
    def concat(parts: list["Decisions"]) -> "Decisions":
        if not parts:
            z = np.zeros(0)
            return Decisions(z.astype(bool), z.astype(int), z, z, z, z, z.astype(int), z)
        return Decisions(*(np.concatenate([getattr(p, f.name) for p in parts]) for f in fields(Decisions)))


@dataclass
class Tally:
    """Running counts of the guard's verdicts (constant memory, however long the call).

    Only hops before ``limit`` count (the tail padding after a signal's end is not part of it).
    """

    limit: int = 2**62
    hops: int = 0
    rejected: int = 0
    by_reason: dict = field(default_factory=dict)

    def add(self, first_hop: int, dec: Decisions) -> Decisions:
        """Count the verdicts on hops first_hop, first_hop+1, ... below the limit; return those."""
        dec = dec.head(max(0, min(dec.rejected.size, self.limit - first_hop)))
        self.hops += int(dec.rejected.size)
        self.rejected += int(dec.rejected.sum())
        for mask in dec.reasons[dec.rejected]:
            for name in reason_names(int(mask)):
                self.by_reason[name] = self.by_reason.get(name, 0) + 1
        return dec

    def line(self) -> str:
        """The one-line summary that extend and stream print."""
        return summary_line(self.hops, self.rejected, self.by_reason)


def summary_line(hops: int, rejected: int, by_reason: dict) -> str:
    """``guard: N of M hops (x%) fell back to the codebook (reason n, ...)`` or ``guard: all M hops passed; ...``."""
    if not rejected:
        return f"guard: {'the one hop' if hops == 1 else 'all ' + count(hops, 'hop')} passed; none fell back to the codebook"
    detail = ", ".join(f"{k} {v}" for k, v in by_reason.items())
    return f"guard: {rejected} of {count(hops, 'hop')} ({100 * rejected / max(hops, 1):.1f}%) fell back to the codebook ({detail})"


def _band_ratios(a_wb: np.ndarray, a_nb: np.ndarray) -> np.ndarray:
    """|A_nb|^2 / |A_wb|^2 on the 31.25 Hz bins of 300-3400 Hz (:func:`nenv.dsp.kernels.band_ratio`)."""
    # envelope power is 1/|A|^2, so wb_dB - nb_dB = 10 log10(|A_nb|^2 / |A_wb|^2) on the same
    # frequencies: the bins of a 512-point grid at 16 kHz are those of a 256-point grid at 8 kHz
    bins = cepstrum.band_bins(CHANNEL_LOW_HZ, BAND_EDGE_HZ, n_fft=MISMATCH_N_FFT_WB, sr=WB_SR)
    cos_wb, sin_wb = cepstrum.cosine_table(a_wb.shape[-1], MISMATCH_N_FFT_WB, *bins)
    cos_nb, sin_nb = cepstrum.cosine_table(a_nb.shape[-1], MISMATCH_N_FFT_NB, *bins)
    return kernels.band_ratio(np.ascontiguousarray(a_wb, dtype=np.float64), np.ascontiguousarray(a_nb, dtype=np.float64), cos_wb, sin_wb, cos_nb, sin_nb)


def telephone_band_mismatch(a_wb: np.ndarray, a_nb: np.ndarray) -> np.ndarray:
    """RMS difference (dB) of the mean-removed log envelopes over 300-3400 Hz (each log in single
    precision, ample for a threshold in dB; :func:`nenv.dsp.kernels.mismatch_db`).

    a_wb : np.ndarray [shape=(n, p+1)] at 16 kHz; a_nb : np.ndarray [shape=(n, q+1)] at 8 kHz
    """
    return kernels.mismatch_db(_band_ratios(a_wb, a_nb))


class Guard:
    """Applies :class:`GuardLimits` to predicted envelopes."""

    def __init__(self, limits: GuardLimits, *, low_band: bool = False):
        self.limits = limits
        self.low_band = low_band  # whether the low band is synthesised (and so checked)
        self._params = np.array([limits.level_min_db, limits.level_max_db, limits.mismatch_max_db, limits.novelty_max, limits.stability_margin, float(low_band),
                                 -np.inf if limits.low_min_db is None else limits.low_min_db, np.inf if limits.low_max_db is None else limits.low_max_db])

    def check(self, **kwargs) -> Decisions:
        """Verdict for each hop; see the module docstring for the checks (arguments: :meth:`assess`)."""
        return self.assess(**kwargs)[0]

    def assess(
        self,
        *,
        ceps: np.ndarray,
        level_db: np.ndarray,
        a: np.ndarray,
        gain: np.ndarray,
        a_nb: np.ndarray,
        novelty: np.ndarray,
        cell: np.ndarray,
        k: np.ndarray | None = None,
        low_db: np.ndarray | None = None,
    ) -> tuple[Decisions, np.ndarray]:
        """:meth:`check`, and the reflection coefficients of ``a`` its stability test used
        [shape=(n, p)] (the synthesis reuses them for the hops it accepts). ``k``: those
        coefficients if the caller has them (the recursion that built ``a``), else the
        step-down of ``a`` computes them. ``low_db``: the low-band level of each envelope
        (:func:`nenv.chain.features.low_band_level`), needed when the low band is on."""
        if self.low_band and low_db is None:
            raise ValueError("the guard checks the low band: pass low_db")
        a = np.ascontiguousarray(a, dtype=np.float64)
        a_ok = np.isfinite(a)
        a_fin = a if a_ok.all() else np.where(a_ok, a, 0.0)
        if k is None:
            k, stable = lpc.reflection(a_fin)
            stable = np.asarray(stable, dtype=np.float64)
        else:
            stable = np.ones(a.shape[0])
        low = np.asarray(low_db, dtype=np.float64) if self.low_band else np.full(a.shape[0], np.nan)
        f64 = kernels.f64
        reasons, max_k, mismatch, k = kernels.guard_rules(f64(ceps), f64(level_db), a, f64(gain), f64(k), stable, _band_ratios(a_fin, a_nb), f64(novelty), low, self._params)
        dec = Decisions(
            rejected=reasons != 0,
            reasons=reasons,
            max_k=max_k,
            level_db=np.asarray(level_db, dtype=float),
            mismatch_db=mismatch,
            novelty=np.asarray(novelty, dtype=float),
            cell=np.asarray(cell, dtype=int),
            low_db=low,
        )
        return dec, k
