"""The paired codebook: narrowband feature cells, each with a wideband envelope.

Built at training time by k-means (scipy.cluster.vq.kmeans2) on normalised
narrowband features of the current hop; each cell holds the mean wideband
shape cepstrum of its training hops, stored as a stable all-pole envelope
(always-stable route), and the median high-band level. It is the guard's
fallback and also a baseline of its own (``--method codebook``).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from nenv.dsp import kernels
from nenv.errors import ConfigError
from nenv.chain.estimators.base import Envelope, EnvelopeEstimator, NarrowbandAnalysis
from nenv.chain.features import ENERGY_COLUMN, ENERGY_FLOOR_DB, VOICING_COLUMN, envelope_from_prediction, narrowband_features
from nenv.settings import WB_ORDER



@dataclass(frozen=True)
class Codebook:
    """Cells in normalised feature space and their wideband envelopes.

    mean, std : np.ndarray [shape=(d,)], feature normalisation
    centroids : np.ndarray [shape=(K, d)], normalised
    ceps : np.ndarray [shape=(K, n_wb_ceps)], mean shape cepstrum per cell
    a : np.ndarray [shape=(K, WB_ORDER+1)], the same as stable predictor coefficients
    level_db : np.ndarray [shape=(K,)], median high-band level per cell
    novelty_limit : float, training 99.9th percentile of the nearest-cell distance
    """

    mean: np.ndarray
    std: np.ndarray
    centroids: np.ndarray
    ceps: np.ndarray
    a: np.ndarray
    level_db: np.ndarray
    novelty_limit: float

    @cached_property
    def _cells(self) -> tuple[np.ndarray, np.ndarray]:
        """The centroids one column per cell [shape=(d, K)] and their squared norms [shape=(K,)], computed once."""
        return np.ascontiguousarray(self.centroids.T, dtype=np.float64), np.ascontiguousarray(np.sum(self.centroids**2, axis=1), dtype=np.float64)

    def nearest(self, feats: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Nearest cell and its RMS distance per dimension, for raw features [shape=(n, d)]:
        z = (feats - mean) / std (non-finite values as +-1e6), squared distances |z|^2 - 2 z.c + |c|^2,
        the first smallest (compiled: :func:`nenv.dsp.feature_loops.nearest_cell`)."""
        f64 = kernels.f64
        return kernels.nearest_cell(f64(feats), f64(self.mean), f64(self.std), *self._cells)

    @classmethod
    def fit(cls, feats: np.ndarray, ceps: np.ndarray, level_db: np.ndarray, *, size: int, seed: int) -> "Codebook":
        """k-means on normalised features; per-cell mean cepstrum and median level."""
        from scipy.cluster.vq import kmeans2

        if feats.shape[0] < size:
            raise ConfigError(f"codebook size={size} needs at least that many training hops, got {feats.shape[0]}")
        mean = feats.mean(axis=0)
        std = np.maximum(feats.std(axis=0), 1e-6)
        z = (feats - mean) / std
        centroids, labels = kmeans2(z, size, minit="++", seed=np.random.default_rng(seed), iter=30)
        # a cell k-means left empty takes the global mean
        cell_ceps = np.tile(ceps.mean(axis=0), (size, 1))
        cell_level = np.full(size, float(np.median(level_db)))
        for c in range(size):
            sel = labels == c
            if np.any(sel):
                cell_ceps[c] = ceps[sel].mean(axis=0)
                cell_level[c] = float(np.median(level_db[sel]))
        a, _ = envelope_from_prediction(cell_ceps, cell_level, np.zeros(size), order=WB_ORDER)
        book = cls(mean, std, centroids, cell_ceps, a, cell_level, novelty_limit=np.inf)
        _, dist = book.nearest(feats)
        return cls(mean, std, centroids, cell_ceps, a, cell_level, novelty_limit=float(np.percentile(dist, 99.9)))

    def envelopes(self, cell: np.ndarray, nb_energy_db: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Stable envelopes and gains of the given cells for hops with the given energy."""
        _, gain = envelope_from_prediction(self.ceps[cell], self.level_db[cell], nb_energy_db, order=self.a.shape[1] - 1)
        return self.a[cell], gain

    def save(self, path: str | os.PathLike) -> None:
        np.savez(path, mean=self.mean, std=self.std, centroids=self.centroids, ceps=self.ceps, a=self.a, level_db=self.level_db, novelty_limit=np.array(self.novelty_limit))

    @classmethod
    def load(cls, path: str | os.PathLike) -> "Codebook":
        try:
            with np.load(path, allow_pickle=False) as z:
                book = cls(z["mean"], z["std"], z["centroids"], z["ceps"], z["a"], z["level_db"], float(z["novelty_limit"]))
        except (OSError, KeyError, ValueError) as e:
            raise ConfigError(f"cannot read the codebook '{path}': {e}") from e
        if not (book.centroids.shape[0] == book.ceps.shape[0] == book.a.shape[0] == book.level_db.shape[0]):
            raise ConfigError(f"the codebook '{path}' is inconsistent: its arrays disagree on the number of cells")
        return book


class CodebookEstimator(EnvelopeEstimator):
    """The codebook alone: each hop takes the envelope of its nearest cell."""

    name = "codebook"
    order = WB_ORDER

    def __init__(self, codebook: Codebook):
        self.codebook = codebook

    def estimate(self, analysis: NarrowbandAnalysis, sel=slice(None)) -> Envelope:
        feats = narrowband_features(analysis)
        cell, _ = self.codebook.nearest(feats)
        a, gain = self.codebook.envelopes(cell, feats[:, ENERGY_COLUMN])
        silent = feats[:, ENERGY_COLUMN] <= ENERGY_FLOOR_DB
        return Envelope(a=a, gain=np.where(silent, 0.0, gain), voicing=feats[:, VOICING_COLUMN])
