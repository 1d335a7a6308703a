"""Spectrogram figures (matplotlib, no display needed)."""

from __future__ import annotations

import os
from typing import Sequence

import numpy as np

from nenv import measures
from nenv.files import atomic_output, check_output
from nenv.settings import BAND_EDGE_HZ, WB_SR

FIGURE_SUFFIXES = (".png", ".svg", ".pdf")
DYNAMIC_RANGE_DB = 80.0  # dB shown below each figure's loudest bin


def _db(y: np.ndarray) -> np.ndarray:
    return 10 * np.log10(np.maximum(measures.power_spectra(y), 1e-20)).T


def spectrogram_grid(panels: Sequence[Sequence[tuple[str, np.ndarray]]], path: str | os.PathLike, *, title: str = "", dpi: int = 110) -> None:
    """Write a grid of 16 kHz spectrograms: ``panels[col][row] = (label, y)``.

    Every panel shares one colour scale (``DYNAMIC_RANGE_DB`` below the loudest
    bin of the whole figure); a dashed line marks the 3.4 kHz band edge.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    p = check_output(path, suffixes=FIGURE_SUFFIXES)
    n_cols = len(panels)
    n_rows = max(len(c) for c in panels)
    specs = [[_db(y) for _, y in col] for col in panels]
    top = max(s.max() for col in specs for s in col)
    fig, axes = plt.subplots(n_rows, n_cols, figsize=(4.2 * n_cols if n_cols > 1 else 9.0, 1.9 * n_rows + 0.6), squeeze=False, sharey=True, layout="constrained")
    image = None
    for c, col in enumerate(panels):
        for r in range(n_rows):
            ax = axes[r][c]
            if r >= len(col):
                ax.axis("off")
                continue
            label, y = col[r]
            s = specs[c][r]
            t = np.arange(s.shape[1]) * measures.HOP / WB_SR
            f = np.fft.rfftfreq(measures.N_FFT, 1 / WB_SR) / 1000
            image = ax.pcolormesh(t, f, s, vmin=top - DYNAMIC_RANGE_DB, vmax=top, cmap="magma", shading="auto", rasterized=True)
            ax.axhline(BAND_EDGE_HZ / 1000, color="white", lw=0.6, ls="--", alpha=0.7)
            ax.set_title(label, fontsize=9, loc="left")
            if c == 0:
                ax.set_ylabel("kHz")
            if r == len(col) - 1:
                ax.set_xlabel("s")
    if title:
        fig.suptitle(title, fontsize=10)
    if image is not None:
        fig.colorbar(image, ax=axes, shrink=0.6, label="dB")
    with atomic_output(p) as tmp:
        fig.savefig(tmp, dpi=dpi, format=p.suffix[1:])
    plt.close(fig)
