"""Spectrogram figures (matplotlib, no display needed)."""

from __future__ import annotations

import os
from typing import Sequence

import numpy as np

from nenv.report import measures
from nenv.media.files import atomic_output, check_output
from nenv.settings import BAND_EDGE_HZ, WB_SR

FIGURE_SUFFIXES = (".png", ".svg", ".pdf")
DYNAMIC_RANGE_DB = 80.0  # dB shown below each figure's loudest bin


MAX_COLUMNS = 2000  # time columns drawn per spectrogram: more than any figure's pixels, so a long signal is pooled
BLOCK_FRAMES = 4096  # frames analysed at a time (bounded memory for long signals)


def spectrogram_db(y: np.ndarray, *, max_columns: int = MAX_COLUMNS) -> tuple[np.ndarray, float]:
    """Power spectrogram of a 16 kHz signal in dB, on :func:`nenv.report.measures.power_spectra`'s grid,
    ready to draw: [shape=(N_FFT//2+1, columns)] and the seconds each column spans.

    A signal longer than ``max_columns`` frames is pooled: each column holds, per bin, the loudest
    of ``k`` consecutive frames (so short events stay visible). Frames are analysed in blocks, so
    memory stays bounded whatever the length.
    """
    frames = measures.frames(y)  # a view: only each block's windowed copy is made
    n_frames = frames.shape[0]
    k = max(1, -(-n_frames // max_columns))
    step = k * max(1, BLOCK_FRAMES // k)
    out = np.empty((-(-n_frames // k), measures.N_FFT // 2 + 1))
    for f0 in range(0, n_frames, step):
        n = min(step, n_frames - f0)
        p = measures.frame_power(frames[f0 : f0 + n])
        if n % k:
            p = np.concatenate([p, np.zeros((k - n % k, p.shape[1]))])
        out[f0 // k : f0 // k + p.shape[0] // k] = p.reshape(-1, k, p.shape[1]).max(axis=1)
    return 10 * np.log10(np.maximum(out, 1e-20)).T, k * measures.HOP / WB_SR


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
    specs = [[spectrogram_db(y) for _, y in col] for col in panels]
    top = max(s.max() for col in specs for s, _ in col)
    fig, axes = plt.subplots(n_rows, n_cols, figsize=(4.2 * n_cols if n_cols > 1 else 9.0, 1.9 * n_rows + 0.6), squeeze=False, sharey=True, layout="constrained")
    image = None
    for c, col in enumerate(panels):
        for r in range(n_rows):
            ax = axes[r][c]
            if r >= len(col):
                ax.axis("off")
                continue
            label, y = col[r]
            s, col_s = specs[c][r]
            image = ax.imshow(s, origin="lower", aspect="auto", extent=(0, s.shape[1] * col_s, 0, WB_SR / 2000), vmin=top - DYNAMIC_RANGE_DB, vmax=top, cmap="magma", interpolation="nearest")
            ax.axhline(BAND_EDGE_HZ / 1000, color="white", lw=0.6, ls="--", alpha=0.7)
            if r == 0 and c == 0:  # say once what the dashed line is
                ax.text(0.995, BAND_EDGE_HZ / 1000 + 0.12, f"{BAND_EDGE_HZ / 1000:g} kHz: telephone band below, added band above", color="white", fontsize=6, ha="right", va="bottom", transform=ax.get_yaxis_transform())
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
