"""Wideband envelope estimators: what fills the high band's spectral shape.

An estimator maps the narrowband analysis of whole hops to one wideband
all-pole envelope per hop (see :class:`Envelope`). To add one, subclass
:class:`EnvelopeEstimator`, implement ``estimate`` (and ``reset`` if it keeps
state), and register a factory in :data:`nenv.chain.pipeline.SYSTEMS`.
"""

from nenv.chain.estimators.base import Envelope, EnvelopeEstimator, NarrowbandAnalysis
from nenv.chain.estimators.oracle import OracleEstimator

__all__ = ["Envelope", "EnvelopeEstimator", "NarrowbandAnalysis", "OracleEstimator"]
