"""The source-filter extension pipeline and the systems that plug into it.

For every hop of 8 kHz input the :class:`Extender`

1. frames and analyses the narrowband signal (LPC, order NB_ORDER);
2. asks its *system* for a 16 kHz high-band candidate for the hop;
3. keeps only the band above 3.4 kHz of that candidate (elliptic high-pass);
4. adds it to the interpolated narrowband signal, which is never altered.

Source-filter systems (:class:`SourceFilterSystem`) build the candidate from
the inverse-filtered residual, extended to 16 kHz (:mod:`nenv.excitation`)
and shaped by an all-pole wideband envelope from an estimator
(:mod:`nenv.estimators`). The imaging baseline and the unextended reference
share steps 1, 3 and 4.

Every stage keeps its state, so :meth:`Extender.process` can be fed any whole
number of hops at a time with the same result. The output lags the input by
:data:`LATENCY` samples at 16 kHz (the interpolator's delay), which
:func:`extend` removes.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Protocol

import numpy as np

from nenv import heap, lpc
from nenv.audio import limit_peaks
from nenv.errors import InputError
from nenv.estimators.base import EnvelopeEstimator, NarrowbandAnalysis
from nenv.estimators.imaging import ImagingSystem
from nenv.estimators.oracle import OracleEstimator
from nenv.excitation import ExcitationExtender, Method, residual
from nenv.settings import HOP_NB, NB_ORDER, NB_SR, WIN_NB
from nenv.synthesis import UPSAMPLER_DELAY, AllPoleSynthesizer, SosStage, Upsampler, isolation_sos

LATENCY = UPSAMPLER_DELAY  # samples at 16 kHz of processing delay inside Extender.process
DEFAULT_EXCITATION: Method = "rectify"


class System(Protocol):
    """Anything that turns narrowband hops into a 16 kHz high-band candidate."""

    name: str

    def highband(self, x: np.ndarray, analysis: NarrowbandAnalysis) -> np.ndarray:
        """Candidate for the hops in ``x`` [shape=(2 * len(x),)], before band isolation."""
        ...

    def reset(self) -> None: ...


class Unextended:
    """No added band: the interpolated narrowband signal alone (the reference point)."""

    name = "unextended"

    def highband(self, x: np.ndarray, analysis: NarrowbandAnalysis) -> np.ndarray:
        return np.zeros(2 * x.size)

    def reset(self) -> None:
        pass


class TrueBand:
    """The reference's own band above 3.4 kHz added to the unextended signal: the ceiling of any extension.

    Evaluation only (it needs the time-aligned 16 kHz original). The candidate is the reference
    itself, delayed by :data:`LATENCY` like the interpolated narrowband signal, so after the same
    band isolation the true band lines up with the telephone band.
    """

    name = "true-band"

    def __init__(self, reference: np.ndarray):
        reference = np.asarray(reference, dtype=np.float64)
        if reference.ndim != 1 or reference.size == 0:
            raise InputError("the true-band system needs a non-empty mono 16 kHz reference signal")
        self.reference = np.concatenate([np.zeros(LATENCY), reference])
        self.reset()

    def highband(self, x: np.ndarray, analysis: NarrowbandAnalysis) -> np.ndarray:
        seg = self.reference[self._pos : self._pos + 2 * x.size]
        self._pos += 2 * x.size
        return np.pad(seg, (0, 2 * x.size - seg.size))

    def reset(self) -> None:
        self._pos = 0


class SourceFilterSystem:
    """Residual -> extended excitation -> wideband all-pole envelope from ``estimator``."""

    def __init__(self, estimator: EnvelopeEstimator, *, excitation: Method = DEFAULT_EXCITATION):
        self.estimator = estimator
        self.name = estimator.name
        self.excitation = excitation
        self.reset()

    def reset(self) -> None:
        self.estimator.reset()
        self._extender = ExcitationExtender(self.excitation)
        self._synth = AllPoleSynthesizer(order=self.estimator.order)

    def highband(self, x: np.ndarray, analysis: NarrowbandAnalysis) -> np.ndarray:
        env = self.estimator.estimate(analysis)
        e = residual(analysis.frames, analysis.a, hop_length=HOP_NB)
        u, rms = self._extender.process(e)
        return self._synth.process(u, a=env.a, gain=env.gain / rms, k=env.k)


class Extender:
    """Stateful narrowband -> wideband processor around one :class:`System`."""

    def __init__(self, system: System):
        heap.settle()  # per-hop temporaries reuse heap memory instead of faulting in fresh pages
        self.system = system
        self.reset()

    def reset(self) -> None:
        self.system.reset()
        self._frames = lpc.FrameBuffer(frame_length=WIN_NB, hop_length=HOP_NB)
        self._up = Upsampler()
        self._isolate = SosStage(isolation_sos())

    def process(self, x: np.ndarray) -> np.ndarray:
        """Extend whole hops of 8 kHz input.

        x : np.ndarray [shape=(n * HOP_NB,)] -> np.ndarray [shape=(2 * n * HOP_NB,)] at 16 kHz,
        delayed by LATENCY samples.
        """
        if x.size % HOP_NB:
            raise ValueError(f"Extender.process takes whole hops of {HOP_NB} samples, got {x.size}")
        frames = self._frames.push(x)
        a, gain = lpc.analyse(frames, order=NB_ORDER, sr=NB_SR)
        candidate = self.system.highband(x, NarrowbandAnalysis(frames=frames, a=a, gain=gain))
        return self._up.process(x) + self._isolate.process(candidate)


@dataclass(frozen=True)
class Extended:
    """Result of :func:`extend`.

    y : np.ndarray [shape=(2 * n,)], 16 kHz, |y| <= 0.99
    sr : int [Hz] = 16000
    n_limited : int, samples clipped by the peak limiter
    """

    y: np.ndarray
    sr: int
    n_limited: int


CHUNK_HOPS = 1000  # hops per processing step in extend() = 10 s of input


def tail_padding(pending: int) -> int:
    """Zeros to append after the last ``pending`` input samples of a signal or call.

    Enough to complete the last hop and push the interpolator's delay out, so the
    output reaches exactly twice the input length (offline and streaming alike).
    """
    total = pending + (LATENCY + 1) // 2
    return -(-total // HOP_NB) * HOP_NB - pending


def extend(x: np.ndarray, *, system: System, on_progress: Callable[[int, int], None] | None = None) -> Extended:
    """Extend a whole 8 kHz signal offline; output is time-aligned and exactly twice as long.

    The signal is processed in steps of CHUNK_HOPS hops through one
    :class:`Extender` (identical to processing it at once), which bounds the
    working memory and lets ``on_progress(done, total)`` report input samples done.

    Parameters
    ----------
    x : np.ndarray [shape=(n,)], 8 kHz, full scale 1.0
    system : a :class:`System` (see :func:`make_system`)
    """
    x = np.asarray(x, dtype=np.float64)
    if x.ndim != 1 or x.size == 0:
        raise InputError("extend needs a non-empty mono 8 kHz signal")
    xp = np.concatenate([x, np.zeros(tail_padding(x.size))])
    ext = Extender(system)
    step = CHUNK_HOPS * HOP_NB
    parts = []
    for start in range(0, xp.size, step):
        parts.append(ext.process(xp[start : start + step]))
        if on_progress:
            on_progress(min(start + step, x.size), x.size)
    y = np.concatenate(parts)[LATENCY : LATENCY + 2 * x.size]
    y, n_limited = limit_peaks(y)
    return Extended(y=y, sr=2 * NB_SR, n_limited=n_limited)


def _oracle(reference: np.ndarray | None, excitation: Method, model) -> System:
    if reference is None:
        raise InputError("the oracle system needs the wideband reference (it measures the true envelope)")
    return SourceFilterSystem(OracleEstimator(reference), excitation=excitation)


def _true_band(reference: np.ndarray | None, excitation: Method, model) -> System:
    if reference is None:
        raise InputError("the true-band system needs the wideband reference (it adds the reference's own band)")
    return TrueBand(reference)


def load_model(model=None, *, flush_denormals: bool = False):
    """A loaded checkpoint: ``model`` as given (Checkpoint), loaded from a folder, or the default model."""
    from nenv import checkpoint

    if isinstance(model, checkpoint.Checkpoint):
        return model
    if model is None:
        model = checkpoint.default_path()
        if model is None:
            raise InputError("no model: pass --model FOLDER (made by 'nenv train'), or set NENV_MODEL")
    return checkpoint.load(model, flush_denormals=flush_denormals)


def _neural(reference, excitation: Method, model) -> System:
    from nenv.estimators.neural import NeuralEstimator

    return SourceFilterSystem(NeuralEstimator(load_model(model)), excitation=excitation)


def _codebook(reference, excitation: Method, model) -> System:
    from nenv.estimators.codebook import CodebookEstimator

    return SourceFilterSystem(CodebookEstimator(load_model(model).codebook), excitation=excitation)


# name -> factory(reference, excitation, model). Model-based systems take a checkpoint folder or object.
SYSTEMS: dict[str, Callable[[np.ndarray | None, Method, object], System]] = {
    "unextended": lambda ref, exc, model: Unextended(),
    "imaging": lambda ref, exc, model: ImagingSystem(),
    "codebook": _codebook,
    "neural": _neural,
    "oracle": _oracle,
    "true-band": _true_band,
}
REFERENCE_SYSTEMS = ("oracle", "true-band")  # evaluation only: they read the wideband original
MODEL_SYSTEMS = ("codebook", "neural")


def make_system(name: str, *, reference: np.ndarray | None = None, excitation: Method = DEFAULT_EXCITATION, model=None) -> System:
    """Build a system by name.

    'unextended', 'imaging'; 'codebook' and 'neural' (need ``model``: a checkpoint
    folder or :class:`nenv.checkpoint.Checkpoint`, default the shipped model);
    'oracle' and 'true-band' (need ``reference``, the time-aligned 16 kHz original).
    """
    if name not in SYSTEMS:
        raise InputError(f"method={name!r} is not known: choose one of {', '.join(SYSTEMS)}")
    return SYSTEMS[name](reference, excitation, model)
