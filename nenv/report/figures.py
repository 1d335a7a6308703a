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


ALIGNMENT_PAIRS = 12  # pairs drawn in one alignment figure at most


def alignment_grid(rows: Sequence, path: str | os.PathLike, *, dpi: int = 110) -> int:
    """Write a figure of how the outputs of ``rows`` (:class:`nenv.report.pairs.Scored`) were aligned
    with their references, one line of two panels per pair: each one-second segment's lag as first
    found, with the drift (the clock rate undone) and the jumps undone drawn through them; and the
    output's level per segment re the reference's, as scored, with the level the whole call got.

    Only pairs that needed more than one offset and one gain are drawn (``Scored.undone``), the first
    ALIGNMENT_PAIRS of them. Returns how many were drawn; nothing is written when none.
    """
    drawn = [r for r in rows if r.scores is not None and r.undone][:ALIGNMENT_PAIRS]
    if not drawn:
        return 0
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    p = check_output(path, suffixes=FIGURE_SUFFIXES)
    fig, axes = plt.subplots(len(drawn), 2, figsize=(10.0, 1.9 * len(drawn) + 0.7), squeeze=False, layout="constrained")
    for (ax_lag, ax_lvl), r in zip(axes, drawn):
        a, first = r.alignment, r.found
        t = np.array([s for s, _ in first.segments])
        lag = np.array([v for _, v in first.segments])
        ax_lag.plot(t, lag, "o", ms=3, color="0.2", label="segment lag, as found")
        if t.size:
            grid = np.linspace(0.0, t.max() + 0.5, 400)
            model = r.clock_ppm * 1e-3 * grid  # ms: the drift undone
            for at, d in a.jumps:
                model = model + np.where(grid >= at / WB_SR, 1000 * d / WB_SR, 0.0)
                ax_lag.axvline(at / WB_SR, color="tab:red", lw=0.8, ls="--")
            model += np.median(lag - np.interp(t, grid, model))
            ax_lag.plot(grid, model, color="tab:blue", lw=1.0, label=f"undone: {r.clock_ppm:+.0f} ppm, {len(a.jumps)} jump{'s' if len(a.jumps) != 1 else ''}")
        _min_span(ax_lag, 2.0)
        ax_lag.set_title(f"{r.pair.clip} | {r.pair.system}", fontsize=8, loc="left")
        ax_lag.set_ylabel("lag [ms]")
        ax_lag.legend(fontsize=6, loc="best")
        lt = np.array([s for s, _ in r.levels])
        lv = np.array([v for _, v in r.levels])
        ax_lvl.plot(lt, lv, "o-", ms=3, lw=0.8, color="0.2", label="level re reference, per segment")
        ax_lvl.axhline(a.gain_db, color="tab:blue", lw=1.0, label=f"one gain: {round(a.gain_db, 1) + 0.0:+.1f} dB" + (" (evened out instead)" if r.evened else ""))
        _min_span(ax_lvl, 6.0)
        ax_lvl.set_ylabel("dB")
        ax_lvl.legend(fontsize=6, loc="best")
    for ax in axes[-1]:
        ax.set_xlabel("s of the reference")
    n_all = sum(1 for r in rows if r.scores is not None and r.undone)
    more = f" (the first {len(drawn)} of {n_all})" if n_all > len(drawn) else ""
    fig.suptitle(f"Outputs that needed more than one offset and gain{more}", fontsize=10)
    with atomic_output(p) as tmp:
        fig.savefig(tmp, dpi=dpi, format=p.suffix[1:])
    plt.close(fig)
    return len(drawn)


def _min_span(ax, span: float) -> None:
    """Widen the y axis to at least ``span`` around its middle (a flat line is not drawn as a big change)."""
    lo, hi = ax.get_ylim()
    if hi - lo < span:
        mid = (lo + hi) / 2
        ax.set_ylim(mid - span / 2, mid + span / 2)


def versus_grid(items: Sequence, pairs: Sequence[tuple[str, str]], path: str | os.PathLike, *, groups: dict[str, str] | None = None, dpi: int = 110) -> bool:
    """Write a figure of systems head to head (:mod:`nenv.report.versus`): for each pair (a, b), one
    line per deciding measure's panel, a dot per clip at a's score minus b's (coloured by speaker
    group), so how often and by how much a system beats no band (or a simple method) shows at a glance.
    ``items``: ``(system, clip, scores)``. Returns whether anything was drawn (nothing is written when
    no pair has a clip on both sides)."""
    from nenv.report import versus

    shown = [(a, b) for a, b in pairs if any(versus.differences(items, a, b, m) for m in versus.DECIDING)]
    if not shown:
        return False
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    p = check_output(path, suffixes=FIGURE_SUFFIXES)
    colours = dict(zip(sorted(set(groups.values())) if groups else [], ["tab:red", "tab:blue", "tab:green", "tab:purple", "tab:orange", "tab:brown"] * 10))
    colours["(no group)"] = colours[None] = "0.45"
    fig, axes = plt.subplots(1, len(versus.DECIDING), figsize=(4.0 * len(versus.DECIDING), 0.42 * len(shown) + 1.3), sharey=True, squeeze=False, layout="constrained")
    for ax, (m, (label, sign)) in zip(axes[0], versus.DECIDING.items()):
        for y, (a, b) in enumerate(shown):
            for _, g, d in versus.differences(items, a, b, m, groups):
                ax.plot(d, -y, "o", ms=3.5, alpha=0.7, color=colours[g], label=g)
        ax.axvline(0.0, color="0.3", lw=0.8)
        ax.set_title(f"{label}: a - b ({'higher' if sign > 0 else 'lower'} is better for a)", fontsize=8)
        ax.grid(axis="x", alpha=0.3)
    axes[0][0].set_yticks([-y for y in range(len(shown))], [f"{a}  vs  {b}" for a, b in shown], fontsize=7)
    if groups:
        handles, labels = axes[0][0].get_legend_handles_labels()
        seen = dict(zip(labels, handles))
        axes[0][-1].legend(seen.values(), seen.keys(), fontsize=7, loc="best")
    fig.suptitle("Systems head to head: one dot per clip", fontsize=10)
    with atomic_output(p) as tmp:
        fig.savefig(tmp, dpi=dpi, format=p.suffix[1:])
    plt.close(fig)
    return True
