"""Paired features: wideband speech -> telephone channel -> (narrowband inputs, wideband targets).

For each file and augmentation copy: the 16 kHz signal is set to a random
active level, passed through the telephone channel with a random G.711 law
and, sometimes, noise; the narrowband result is analysed exactly as the
runtime does it (:func:`nenv.chain.features.narrowband_features`, context stacked
per file), and each hop is paired with the targets of the clean, time-aligned
16 kHz frame. Hops more than ``active_range_db`` below the file's loudest hop
are dropped. Results are cached per file (keyed by the file's path, size and
modification time, the feature settings and the augmentation settings).
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from nenv.dsp import channel, lpc
from nenv.chain.estimators.base import NarrowbandAnalysis
from nenv.chain.features import ENERGY_COLUMN, ContextStacker, FeatureSettings, low_band_target, narrowband_features, wideband_targets
from nenv.settings import HOP_NB, HOP_WB, NB_SR, WB_SR
from nenv.media import audio
from nenv.train.corpus import load_native
from nenv.train.recipe import Recipe

CACHE_FIELDS = "with-low-band"  # what a cached file holds; a change makes older caches misses
AUGMENT_KEYS = ("copies", "warp_max", "laws", "level_min_dbov", "level_max_dbov", "noise_probability", "snr_min_db", "snr_max_db", "active_range_db", "seed")


@dataclass
class Pairs:
    """Training pairs of many hops.

    x : [shape=(n, input_dim)] stacked raw narrowband features (network input)
    current : [shape=(n, N_INPUTS)] the current hop's features (codebook input)
    ceps : [shape=(n, n_wb_ceps)] wideband shape cepstra; level : [shape=(n,)] dB
    a_nb : [shape=(n, NB_ORDER+1)] narrowband LPC (for guard calibration)
    group : [shape=(n,)] int index of the file the hop came from
    seconds : float, narrowband audio processed (all copies)
    low : [shape=(n,)] true low-band (50-300 Hz) level re the narrowband frame, dB (guard calibration)
    """

    x: np.ndarray
    current: np.ndarray
    ceps: np.ndarray
    level: np.ndarray
    a_nb: np.ndarray
    group: np.ndarray
    seconds: float
    low: np.ndarray | None = None

    @staticmethod
    def concat(parts: Sequence["Pairs"]) -> "Pairs":
        groups = [np.full(p.x.shape[0], i) for i, p in enumerate(parts)]
        return Pairs(
            *(np.concatenate([getattr(p, k) for p in parts]) for k in ("x", "current", "ceps", "level", "a_nb")),
            group=np.concatenate(groups) if groups else np.zeros(0, int),
            seconds=float(sum(p.seconds for p in parts)),
            low=np.concatenate([p.low for p in parts]) if parts and all(p.low is not None for p in parts) else None,
        )


def warp(y: np.ndarray, *, sr: int, factor: float) -> np.ndarray:
    """Vocal-tract-length perturbation: every frequency times ``factor``, returned at 16 kHz.

    Played at 16 kHz after resampling from ``sr`` to ``16000 / factor``, so the output's
    0-8 kHz comes from the source's 0-(8 kHz / factor): always there for factor >= 1,
    and for factor < 1 only when ``sr >= 16000 / factor``.
    """
    return audio.resample(y, orig_sr=sr, target_sr=int(round(WB_SR / factor)))


def pairs_from_signal(y: np.ndarray, *, recipe: Recipe, settings: FeatureSettings, rng: np.random.Generator, sr: int = WB_SR) -> Pairs:
    """All augmentation copies of one signal at rate ``sr`` (>= 16 kHz).

    With ``warp_max > 1`` each copy's frequencies are scaled by a random factor in
    [1/warp_max, warp_max], raised where needed so that the source still fills 0-8 kHz
    (``factor >= 16000 / sr``), which widens the range of vocal-tract lengths
    (Jaitly & Hinton 2013, "Vocal tract length perturbation improves speech recognition").
    """
    parts = []
    base = audio.resample(y, orig_sr=sr, target_sr=WB_SR)
    if base.size < HOP_WB or not np.any(base):
        return _empty(settings)
    bottom = max(1.0 / recipe.warp_max, WB_SR / sr)
    for _ in range(recipe.copies):
        wb_in = base
        if recipe.warp_max > 1.0:
            factor = float(np.exp(rng.uniform(np.log(min(bottom, 1.0)), np.log(recipe.warp_max))))
            if abs(factor - 1.0) > 1e-3:
                wb_in = warp(y, sr=sr, factor=factor)
        n_hops = wb_in.size // HOP_WB
        if n_hops == 0:
            continue
        wb_in = wb_in[: n_hops * HOP_WB]
        level = rng.uniform(recipe.level_min_dbov, recipe.level_max_dbov)
        law = recipe.laws[int(rng.integers(len(recipe.laws)))]
        snr = rng.uniform(recipe.snr_min_db, recipe.snr_max_db) if rng.random() < recipe.noise_probability else None
        wb = channel.set_level(wb_in, sr=WB_SR, level_dbov=level)
        nb = channel.telephone(wb, sr=WB_SR, law=law, level_dbov=None, snr_db=snr, seed=int(rng.integers(2**31)))
        nb = nb[: n_hops * HOP_NB]
        frames = lpc.frame(nb, frame_length=settings.win_nb, hop_length=HOP_NB)
        a, gain = lpc.analyse(frames, order=settings.nb_order, sr=NB_SR)
        feats = narrowband_features(NarrowbandAnalysis(frames, a, gain))
        stacked = ContextStacker(settings.context).push(feats)
        wb_frames = lpc.frame(wb, frame_length=settings.win_wb, hop_length=HOP_WB)
        energy = feats[:, ENERGY_COLUMN]
        ceps, lev = wideband_targets(wb_frames, energy, settings=settings)
        keep = energy > energy.max() - recipe.active_range_db
        low = low_band_target(wb_frames, energy)
        parts.append(Pairs(stacked[keep], feats[keep], ceps[keep], lev[keep], a[keep], np.zeros(int(keep.sum()), int), nb.size / NB_SR, low[keep]))
    if not parts:
        return _empty(settings)
    out = Pairs.concat(parts)
    out.group[:] = 0
    return out


def _empty(settings: FeatureSettings) -> Pairs:
    return Pairs(np.zeros((0, settings.input_dim)), np.zeros((0, settings.n_inputs)), np.zeros((0, settings.n_wb_ceps)), np.zeros(0), np.zeros((0, settings.nb_order + 1)), np.zeros(0, int), 0.0, np.zeros(0))


def _cache_key(path: str, recipe: Recipe, settings: FeatureSettings) -> str:
    st = os.stat(path)
    aug = {k: getattr(recipe, k) for k in AUGMENT_KEYS}
    blob = json.dumps([os.path.abspath(path), st.st_size, st.st_mtime_ns, settings.to_dict(), aug, CACHE_FIELDS], sort_keys=True)
    return hashlib.sha1(blob.encode()).hexdigest()


def _file_pairs(path: str, index: int, recipe: Recipe, settings: FeatureSettings, cache_dir: str | None) -> Pairs:
    key = _cache_key(path, recipe, settings)
    cached = Path(cache_dir) / f"{key}.npz" if cache_dir else None
    if cached is not None and cached.is_file():
        with np.load(cached, allow_pickle=False) as z:
            return Pairs(z["x"], z["current"], z["ceps"], z["level"], z["a_nb"], z["group"], float(z["seconds"]), z["low"])
    y, sr = load_native(path)
    # augmentation draws depend on the recording itself, not on where it lies or when it was copied there
    # (the cache key must, and seeding from it made the same corpus give another model in another folder)
    rng = np.random.default_rng([recipe.seed, int(hashlib.sha1(np.ascontiguousarray(y).tobytes() + str(sr).encode()).hexdigest()[:8], 16)])
    pairs = pairs_from_signal(y, sr=sr, recipe=recipe, settings=settings, rng=rng)
    if cached is not None:
        from nenv.media.files import atomic_output

        with atomic_output(cached) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, x=pairs.x, current=pairs.current, ceps=pairs.ceps, level=pairs.level, a_nb=pairs.a_nb, group=pairs.group, seconds=np.array(pairs.seconds), low=pairs.low)
    return pairs


def build(
    paths: Sequence[str],
    *,
    recipe: Recipe,
    settings: FeatureSettings,
    cache_dir: str | None = None,
    workers: int = 1,
    scheduler: str | None = None,
    on_done: Callable[[], None] | None = None,
) -> tuple[Pairs, dict]:
    """Pairs for every file (in parallel over processes), and throughput facts.

    Returns the concatenated pairs (``group`` = index into ``paths``) and
    ``{"seconds_audio", "wall_s", "x_real_time"}``.
    """
    if cache_dir:
        Path(cache_dir).mkdir(parents=True, exist_ok=True)
    from nenv.serve.parallel import in_order

    t0 = time.perf_counter()
    results = in_order(_file_pairs, [(p, i, recipe, settings, cache_dir) for i, p in enumerate(paths)], workers=workers, scheduler=scheduler, on_done=on_done)
    wall = time.perf_counter() - t0
    pairs = Pairs.concat(results) if results else _empty(settings)
    return pairs, {"seconds_audio": pairs.seconds, "wall_s": wall, "x_real_time": pairs.seconds / max(wall, 1e-9)}
