"""The systems a chain can run: what turns narrowband hops into a 16 kHz high-band candidate.

Every system works on rows (calls) like the chain (:mod:`nenv.chain.pipeline`): ``add_rows``,
``keep_rows`` and ``highband(x, analysis, sel)`` for the rows ``sel`` of its state.

A system made with ``low_band=True`` (source-filter systems and the true band) also weights its
candidate's 50-300 Hz part per hop (:attr:`low_weights`, set by each ``highband`` call): the chain
isolates that part and adds it too. Source-filter systems weight it by the narrowband voicing
(:func:`low_band_weights`), so nothing is added in unvoiced speech or silence.

* ``neural``, ``codebook``, ``oracle``: :class:`SourceFilterSystem` (residual -> extended
  excitation -> all-pole envelope from an estimator);
* ``imaging``: spectral folding, no model (:mod:`nenv.chain.estimators.imaging`);
* ``unextended``: no added band (the reference point);
* ``true-band``: the reference's own band (the ceiling; evaluation only).
"""

from __future__ import annotations

from typing import Callable, Protocol

import numpy as np

from nenv.dsp import kernels, lpc
from nenv.errors import InputError
from nenv.chain.estimators.base import EnvelopeEstimator, NarrowbandAnalysis, ReferenceReader
from nenv.chain.estimators.imaging import ImagingSystem
from nenv.chain.estimators.oracle import OracleEstimator
from nenv.dsp.excitation import ExcitationExtender, Method, residual
from nenv.dsp.rows import ALL
from nenv.chain import features
from nenv.settings import HOP_NB, HOP_WB, LOW_BAND_GAIN_DB
from nenv.dsp.synthesis import UPSAMPLER_DELAY, AllPoleSynthesizer

DEFAULT_EXCITATION: Method = "rectify"


class System(Protocol):
    """Anything that turns narrowband hops into a 16 kHz high-band candidate, one row per call."""

    name: str
    needs_analysis: bool  # whether highband reads the narrowband LPC analysis
    low_band: bool  # whether the chain adds the candidate's low band, weighted per hop by low_weights
    low_weights: np.ndarray | None  # [shape=(B, H)] amplitude weights of the latest highband call's hops

    def add_rows(self, n: int) -> None: ...

    def keep_rows(self, mask: np.ndarray) -> None: ...

    def reset(self) -> None:
        """Forget every call (rows and anything recorded about them)."""
        ...

    def highband(self, x: np.ndarray, analysis: NarrowbandAnalysis, sel=ALL) -> np.ndarray:
        """Candidate for the hops in ``x`` [shape=(B, n)] of the rows ``sel`` -> [shape=(B, 2n)], before band isolation."""
        ...


class Unextended:
    """No added band: the interpolated narrowband signal alone (the reference point)."""

    name = "unextended"
    needs_analysis = False
    low_band = False
    low_weights = None

    def add_rows(self, n: int) -> None:
        pass

    def keep_rows(self, mask: np.ndarray) -> None:
        pass

    def reset(self) -> None:
        pass

    def highband(self, x: np.ndarray, analysis: NarrowbandAnalysis, sel=ALL) -> np.ndarray:
        return np.zeros((x.shape[0], 2 * x.shape[1]))


class TrueBand(ReferenceReader):
    """The reference's own band above 3.4 kHz added to the unextended signal: the ceiling of any extension.

    Evaluation only (it needs the time-aligned 16 kHz original). The candidate is the reference
    itself, delayed by the interpolator's delay like the narrowband signal, so after the same
    band isolation the true band lines up with the telephone band.
    """

    name = "true-band"
    needs_analysis = False
    low_weights = None

    def __init__(self, reference: np.ndarray, *, low_band: bool = False):
        super().__init__(reference)
        self.low_band = low_band  # the reference's own low band as well (the ceiling of the low band)
        self.reference = np.concatenate([np.zeros(UPSAMPLER_DELAY), self.reference])

    def highband(self, x: np.ndarray, analysis: NarrowbandAnalysis, sel=ALL) -> np.ndarray:
        if self.low_band:
            self.low_weights = np.ones((1, x.shape[1] // HOP_NB))
        return self.take(2 * x.shape[1])[None, :]


VOICING_GATE = (0.4, 0.7)  # narrowband voicing at which the low band starts and reaches full weight (our choice)


def low_band_weights(voicing: np.ndarray, gain: np.ndarray) -> np.ndarray:
    """Amplitude weight of each hop's low band: 0 below VOICING_GATE[0] (unvoiced speech, noise, silence),
    rising linearly to the LOW_BAND_GAIN_DB trim at VOICING_GATE[1]; 0 where the envelope's gain is 0
    (digital silence) or not finite."""
    lo, hi = VOICING_GATE
    return kernels.ramp_weights(kernels.f64(voicing), kernels.f64(gain), lo, hi, 10 ** (LOW_BAND_GAIN_DB / 20))


class SourceFilterSystem:
    """Residual -> extended excitation -> wideband all-pole envelope from ``estimator``, per row.

    ``band_trim_db``: level of the added high band in dB against the trained level (the chain applies
    it after isolating the band; the low band keeps its own level). 0 for the trained level; a model
    folder's calibration sets it for the model's systems (:func:`make_system`).
    """

    needs_analysis = True

    def __init__(self, estimator: EnvelopeEstimator, *, excitation: Method = DEFAULT_EXCITATION, low_band: bool = False):
        self.estimator = estimator
        self.band_trim_db = 0.0
        self.name = estimator.name
        self.excitation = excitation
        self.low_band = low_band
        self.low_weights: np.ndarray | None = None
        self._extender = ExcitationExtender(excitation, rows=0)
        self._synth = AllPoleSynthesizer(order=estimator.order, rows=0)

    def add_rows(self, n: int) -> None:
        self.estimator.add_rows(n)
        self._extender.add_rows(n)
        self._synth.add_rows(n)

    def keep_rows(self, mask: np.ndarray) -> None:
        self.estimator.keep_rows(mask)
        self._extender.keep_rows(mask)
        self._synth.keep_rows(mask)

    def reset(self) -> None:
        self.estimator.reset()
        self._extender = ExcitationExtender(self.excitation, rows=0)
        self._synth = AllPoleSynthesizer(order=self.estimator.order, rows=0)

    def highband(self, x: np.ndarray, analysis: NarrowbandAnalysis, sel=ALL) -> np.ndarray:
        B, H = x.shape[0], x.shape[1] // HOP_NB
        env = self.estimator.estimate(analysis, sel)
        e = residual(analysis.frames, analysis.a, hop_length=HOP_NB).reshape(B, H * HOP_NB)
        u, rms = self._extender.rows(e, sel)
        k = env.k if env.k is not None else lpc.reflection(env.a)[0]
        log_g = np.log(np.maximum(env.gain / rms, 1e-12)).reshape(B, H)
        if self.low_band:
            v = env.voicing if env.voicing is not None else features.voicing(analysis.frames)
            self.low_weights = low_band_weights(v, env.gain).reshape(B, H)
        return self._synth.rows(u.reshape(B, H * HOP_WB), k.reshape(B, H, -1), log_g, sel)


def load_model(model=None, *, flush_denormals: bool = False):
    """A loaded checkpoint: ``model`` as given (Checkpoint), loaded from a folder, or the default model."""
    from nenv.chain import checkpoint

    if isinstance(model, checkpoint.Checkpoint):
        return model
    if model is None:
        model = checkpoint.default_path()
        if model is None:
            raise InputError("no model: pass --model FOLDER (made by 'nenv train'), or set NENV_MODEL")
    return checkpoint.load(model, flush_denormals=flush_denormals)


def _oracle(reference: np.ndarray | None, excitation: Method, model, low_band: bool) -> System:
    if reference is None:
        raise InputError("the oracle system needs the wideband reference (it measures the true envelope)")
    return SourceFilterSystem(OracleEstimator(reference), excitation=excitation, low_band=low_band)


def _true_band(reference: np.ndarray | None, excitation: Method, model, low_band: bool) -> System:
    if reference is None:
        raise InputError("the true-band system needs the wideband reference (it adds the reference's own band)")
    return TrueBand(reference, low_band=low_band)


def _neural(reference, excitation: Method, model, low_band: bool) -> System:
    from nenv.chain.estimators.neural import NeuralEstimator

    return SourceFilterSystem(NeuralEstimator(load_model(model), low_band=low_band), excitation=excitation, low_band=low_band)


def _codebook(reference, excitation: Method, model, low_band: bool) -> System:
    from nenv.chain.estimators.codebook import CodebookEstimator

    return SourceFilterSystem(CodebookEstimator(load_model(model).codebook), excitation=excitation, low_band=low_band)


# name -> factory(reference, excitation, model, low_band). Model-based systems take a checkpoint folder or object.
# Imaging and unextended have no low band (there is nothing to shape one with).
SYSTEMS: dict[str, Callable[[np.ndarray | None, Method, object, bool], System]] = {
    "unextended": lambda ref, exc, model, low_band: Unextended(),
    "imaging": lambda ref, exc, model, low_band: ImagingSystem(),
    "codebook": _codebook,
    "neural": _neural,
    "oracle": _oracle,
    "true-band": _true_band,
}
REFERENCE_SYSTEMS = ("oracle", "true-band")  # evaluation only: they read the wideband original
MODEL_SYSTEMS = ("codebook", "neural")
LOW_BAND_SYSTEMS = ("neural", "codebook", "oracle", "true-band")  # the systems that can add the low band


def check_low_band(name: str, low_band: bool) -> None:
    """InputError when ``low_band`` is asked of a system that has nothing to shape one with."""
    name = getattr(name, "value", name)  # a command-line choice (an enum) or a plain name
    if low_band and name not in LOW_BAND_SYSTEMS:
        raise InputError(f"low_band (--low-band): the {name} method adds no low band ({', '.join(LOW_BAND_SYSTEMS)} do)")


def check_band_trim(name: str, band_trim_db: float | None) -> None:
    """InputError when a band trim is asked of a system that is not a model's (see :func:`make_system`)."""
    name = getattr(name, "value", name)
    if band_trim_db is not None and name not in MODEL_SYSTEMS:
        raise InputError(f"band_trim_db (--band-trim) calibrates a model's band: the {name} method has none ({', '.join(MODEL_SYSTEMS)} do)")


def make_system(name: str, *, reference: np.ndarray | None = None, excitation: Method = DEFAULT_EXCITATION, model=None, low_band: bool = False, band_trim_db: float | None = None) -> System:
    """Build a system by name.

    'unextended', 'imaging'; 'codebook' and 'neural' (need ``model``: a checkpoint
    folder or :class:`nenv.chain.checkpoint.Checkpoint`, default the shipped model);
    'oracle' and 'true-band' (need ``reference``, the time-aligned 16 kHz original).
    ``low_band``: add the 50-300 Hz band as well (LOW_BAND_SYSTEMS; asking it of unextended or
    imaging, which have nothing to shape one with, is an InputError).
    ``band_trim_db``: level of the model systems' added high band in dB against the trained level;
    None takes the model folder's calibration (0 dB when it has none). Asking it of any other
    system is an InputError.
    """
    if name not in SYSTEMS:
        raise InputError(f"method={name!r} is not known: choose one of {', '.join(SYSTEMS)}")
    check_low_band(name, low_band)
    check_band_trim(name, band_trim_db)
    if name not in MODEL_SYSTEMS:
        return SYSTEMS[name](reference, excitation, model, low_band)
    model = load_model(model)
    if band_trim_db is None:
        band_trim_db = model.band_trim_db
    else:
        from nenv.chain.checkpoint import check_trim

        band_trim_db = check_trim(band_trim_db, what="band_trim_db (--band-trim)", error=InputError)
    system = SYSTEMS[name](reference, excitation, model, low_band)
    system.band_trim_db = band_trim_db
    return system


def trim_source(given: bool) -> str:
    """Where a model's band level came from: ``given`` by ``--band-trim``, or the model folder's calibration."""
    return "--band-trim" if given else "the model folder's calibration"


def band_note(band_trim_db: float, *, given: bool) -> str:
    """What to tell the user when a model's band is not at its trained level (``given``: see :func:`trim_source`)."""
    return f"the added band is {band_trim_db:+g} dB against the model's trained level ({trim_source(given)})"


__all__ = ["DEFAULT_EXCITATION", "LOW_BAND_SYSTEMS", "MODEL_SYSTEMS", "REFERENCE_SYSTEMS", "SYSTEMS", "SourceFilterSystem", "System", "TrueBand", "Unextended", "band_note", "check_band_trim", "check_low_band", "load_model", "make_system", "trim_source"]
