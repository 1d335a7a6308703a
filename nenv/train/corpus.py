"""Corpus ingestion: find audio files, name their speakers, survey them, split by speaker.

The survey checks every file and records why any file is excluded from
training; nothing is dropped silently. Measures, per file, at 16 kHz:

* ``active_fraction``: share of 20 ms frames above the noise floor (10th
  percentile of frame energy) + 10 dB and within 50 dB of the loudest frame;
* ``snr_db``: 95th minus 10th percentile of frame energy (a rough estimate,
  common practice for single recordings without a noise reference);
* ``hb_ratio_db``: 3.4-8 kHz power over 0.3-3.4 kHz power on active frames;
* ``cutoff_hz``: the frequency of a band-limit cliff (a drop of more than
  ``CLIFF_DB`` within 600 Hz in the long-term spectrum of the active frames,
  searched from 4 to 7.3 kHz), or 8000 when there is none. The search stops
  below 7.4 kHz because every 16 kHz signal rolls off there (soxr's
  resampler, measured: -0.4 dB at 7.5 kHz, -10 dB at 7.7 kHz; and the
  anti-alias filter of any 16 kHz recording). A file without such a cliff
  whose 6.4-7.0 kHz band is more than ``TOP_DROP_DB`` above its 7.3-7.6 kHz
  band is reported as cut at 7.2 kHz (measured on klettres-data: Spanish
  files, known to stop near 7 kHz, median 20 dB; other languages 6 dB or less);
* ``clipped_fraction``: the larger of the share of samples in runs of 3 or
  more equal values at 95% or more of the peak (clipped PCM), and, when the
  peak is at or beyond 95% of full scale, the share of samples within 90% of
  the peak (clipped, then lossy-coded: natural speech measured 0.01-0.1%).
"""

from __future__ import annotations

import csv
import io
import os
from dataclasses import asdict, dataclass, fields
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from nenv.media import audio
from nenv.errors import ConfigError, InputError
from nenv.settings import BAND_EDGE_HZ, CHANNEL_LOW_HZ, WB_SR
from nenv.train.recipe import Recipe

AUDIO_SUFFIXES = audio.READ_SUFFIXES
CLIFF_DB = 25.0  # dB: a drop this large within 600 Hz marks a band-limit cliff
CLIFF_SEARCH_TOP_HZ = 7300.0  # Hz: highest cliff frequency searched (see the module docstring)
TOP_DROP_DB = 12.0  # dB: 6.4-7.0 kHz over 7.3-7.6 kHz beyond this = rolled off near 7.2 kHz
TOP_ROLLOFF_HZ = 7200.0  # Hz: the cutoff reported for such a roll-off
FRAME = 320  # samples = 20 ms at 16 kHz


@dataclass(frozen=True)
class CorpusFile:
    path: str
    speaker: str


def _speaker(path: Path, root: Path, rule: str) -> str:
    rel = path.relative_to(root)
    if rule == "parent":
        return str(rel.parent) if str(rel.parent) != "." else path.stem
    depth = int(rule.split(":", 1)[1])
    parts = rel.parts[:-1]
    return parts[depth] if depth < len(parts) else (str(rel.parent) if parts else path.stem)


def scan(root: str | os.PathLike, *, speaker_rule: str = "parent", manifest: str = "") -> list[CorpusFile]:
    """Every audio file below ``root`` (sorted; ``AUDIO_SUFFIXES``, hidden files and folders skipped), with a speaker id.

    The id comes from the path (``parent``: the folder holding the file, relative to
    root; ``depth:N``: the N-th folder below root, counted from 0, or the folder holding the file
    when it lies less deep; a file right in root is its own speaker) or from a manifest CSV with the
    columns ``path,speaker`` (paths relative to root or absolute).
    """
    r = Path(root)
    if not r.is_dir():
        raise InputError(f"corpus folder '{r}' does not exist")
    if manifest:
        m = Path(manifest)
        if not m.is_file():
            raise InputError(f"manifest '{m}' does not exist")
        with open(m, newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
        if not rows or not {"path", "speaker"} <= set(rows[0]):
            raise ConfigError(f"manifest '{m}' needs a header with the columns path,speaker")
        out = []
        for row in rows:
            p = Path(row["path"])
            out.append(CorpusFile(str(p if p.is_absolute() else r / p), row["speaker"]))
        return out
    files = audio.find_audio(r)
    if not files:
        raise InputError(f"corpus folder '{r}' holds no audio files ({', '.join(AUDIO_SUFFIXES)})")
    return [CorpusFile(str(p), _speaker(p, r, speaker_rule)) for p in files]


@dataclass
class FileReport:
    path: str
    speaker: str
    sr: int = 0
    channels: int = 0
    duration_s: float = 0.0
    active_s: float = 0.0
    active_fraction: float = 0.0
    snr_db: float = float("nan")
    hb_ratio_db: float = float("nan")
    cutoff_hz: float = float("nan")
    clipped_fraction: float = float("nan")
    excluded: str = ""  # empty = kept; otherwise the reason


def load_native(path: str) -> tuple[np.ndarray, int]:
    """A corpus file as mono (channels averaged) at its own rate; InputError if below 16 kHz."""
    a = audio.load(path, mix=True)
    if a.sr < WB_SR:
        raise InputError(f"sampled at {a.sr} Hz, below 16 kHz")
    return a.y, a.sr


def load_wideband(path: str) -> np.ndarray:
    """A corpus file as mono (channels averaged) at 16 kHz; InputError if unusable."""
    y, sr = load_native(path)
    return audio.resample(y, orig_sr=sr, target_sr=WB_SR)


def _clipped_fraction(y: np.ndarray) -> float:
    """Share of samples that look clipped (see the module docstring)."""
    peak = np.max(np.abs(y))
    if peak == 0:
        return 0.0
    hot = np.abs(y) >= 0.95 * peak
    starts = np.concatenate([[True], (y[1:] != y[:-1]) | (hot[1:] != hot[:-1])])
    run_id = np.cumsum(starts) - 1
    run_len = np.bincount(run_id)[run_id]
    flat = np.count_nonzero(hot & (run_len >= 3)) / y.size
    # lossy coding (Ogg Vorbis) turns clipped plateaus into ripples around full scale:
    # count the pile-up of samples near a peak at or beyond full scale instead
    piled = np.count_nonzero(np.abs(y) >= 0.9 * peak) / y.size if peak >= 0.95 else 0.0
    return float(max(flat, piled))


def measure(y: np.ndarray) -> dict:
    """Survey measures of a 16 kHz mono signal (see the module docstring)."""
    n = y.size // FRAME
    if n < 3:
        return dict(active_fraction=0.0, active_s=0.0, snr_db=float("nan"), hb_ratio_db=float("nan"), cutoff_hz=float("nan"), clipped_fraction=_clipped_fraction(y))
    frames = y[: n * FRAME].reshape(n, FRAME)
    e_db = 10 * np.log10(np.maximum(np.mean(frames**2, axis=1), 1e-10))  # floor -100 dBFS: digital silence
    floor = np.percentile(e_db, 10)
    active = (e_db > floor + 10) & (e_db > e_db.max() - 50)
    snr = float(np.percentile(e_db, 95) - floor)
    out = dict(active_fraction=float(np.mean(active)), active_s=float(np.count_nonzero(active) * FRAME / WB_SR), snr_db=snr, clipped_fraction=_clipped_fraction(y))
    if not np.any(active):
        out.update(hb_ratio_db=float("nan"), cutoff_hz=float("nan"))
        return out
    win = np.hanning(FRAME)
    spec = np.abs(np.fft.rfft(frames[active] * win, axis=1)) ** 2
    ltas = spec.mean(axis=0)
    f = np.fft.rfftfreq(FRAME, 1 / WB_SR)  # 50 Hz bins
    hb = ltas[(f >= BAND_EDGE_HZ)].sum()
    nb = ltas[(f >= CHANNEL_LOW_HZ) & (f < BAND_EDGE_HZ)].sum()
    out["hb_ratio_db"] = float(10 * np.log10(max(hb, 1e-30) / max(nb, 1e-30)))
    ldb = 10 * np.log10(np.maximum(ltas, 1e-30))
    cutoff = float(WB_SR / 2)
    best = 0.0
    for fc in np.arange(4000.0, CLIFF_SEARCH_TOP_HZ, 50.0):
        below = ldb[(f > fc - 400) & (f <= fc)].mean()
        above_sel = (f > fc + 100) & (f <= min(fc + 600, CLIFF_SEARCH_TOP_HZ + 100))
        if not np.any(above_sel):
            continue
        drop = below - ldb[above_sel].mean()
        if drop > CLIFF_DB and drop > best:
            best, cutoff = drop, fc
    if cutoff >= WB_SR / 2:
        # a roll-off starting just below the searched range: compare 6.4-7.0 kHz with 7.3-7.6 kHz
        top_drop = ldb[(f >= 6400) & (f < 7000)].mean() - ldb[(f >= 7300) & (f < 7600)].mean()
        if top_drop > TOP_DROP_DB:
            cutoff = TOP_ROLLOFF_HZ
    out["cutoff_hz"] = cutoff
    return out


def survey_file(cf: CorpusFile, recipe: Recipe) -> FileReport:
    """Read and measure one file and decide whether training may use it."""
    rep = FileReport(path=cf.path, speaker=cf.speaker)
    try:
        import soundfile as sf

        info = sf.info(cf.path)
        rep.sr, rep.channels = int(info.samplerate), int(info.channels)
        if 0 < rep.sr < WB_SR:  # readable, but holds nothing above sr/2: not a wideband recording
            rep.duration_s = info.frames / rep.sr
            rep.excluded = f"narrowband: sampled at {rep.sr} Hz, below 16 kHz"
            return rep
        y = load_wideband(cf.path)
    except Exception as e:  # any reader failure becomes a recorded exclusion
        rep.excluded = f"unreadable: {str(e).splitlines()[0] if str(e) else type(e).__name__}"
        return rep
    rep.duration_s = y.size / WB_SR
    m = measure(y)
    for k, v in m.items():
        setattr(rep, k, v)
    rep.excluded = "; ".join(exclusions(m, recipe))
    return rep


def exclusions(m: dict, recipe: Recipe, *, min_active_s: float | None = None) -> list[str]:
    """Why a recording with survey measures ``m`` (:func:`measure`) may not be used, by ``recipe``'s
    thresholds (``min_active_s`` overrides the recipe's); empty when it may."""
    least = recipe.min_active_s if min_active_s is None else min_active_s
    reasons = []
    if m["active_s"] < least:
        reasons.append(f"too little active speech ({m['active_s']:.2f} s < {least} s)")
    if m["clipped_fraction"] > recipe.max_clipped_fraction:
        reasons.append(f"clipped ({100 * m['clipped_fraction']:.2f}% of samples)")
    if np.isfinite(m["snr_db"]) and m["snr_db"] < recipe.min_snr_db:
        reasons.append(f"noisy (SNR about {m['snr_db']:.0f} dB < {recipe.min_snr_db:g})")
    if recipe.exclude_bandlimited and np.isfinite(m["cutoff_hz"]) and m["cutoff_hz"] < recipe.min_cutoff_hz:
        reasons.append(f"band-limited (cliff at {m['cutoff_hz']:.0f} Hz)")
    return reasons


def survey(files: Sequence[CorpusFile], recipe: Recipe, *, workers: int = 1, scheduler: str | None = None, on_done: Callable[[], None] | None = None) -> list[FileReport]:
    """Survey every file, in parallel over ``workers`` processes (or a dask ``scheduler``); order is kept."""
    from nenv.serve.parallel import in_order

    return in_order(survey_file, [(cf, recipe) for cf in files], workers=workers, scheduler=scheduler, on_done=on_done)


def reports_csv(reports: Sequence[FileReport]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    names = [f.name for f in fields(FileReport)]
    w.writerow(names)
    for r in reports:
        d = asdict(r)
        w.writerow([f"{d[k]:.4g}" if isinstance(d[k], float) else d[k] for k in names])
    return buf.getvalue()


def summary(reports: Sequence[FileReport]) -> dict:
    """Counts and hours, kept and excluded, with the exclusion reasons tallied."""
    kept = [r for r in reports if not r.excluded]
    reasons: dict[str, int] = {}
    for r in reports:
        for part in filter(None, r.excluded.split("; ")):
            key = part.split(" (")[0].split(":")[0]
            reasons[key] = reasons.get(key, 0) + 1
    return {
        "files": len(reports),
        "kept_files": len(kept),
        "kept_hours": round(sum(r.duration_s for r in kept) / 3600, 4),
        "kept_active_hours": round(sum(r.active_s for r in kept) / 3600, 4),
        "speakers": len({r.speaker for r in kept}),
        "excluded_files": len(reports) - len(kept),
        "exclusion_reasons": reasons,
    }


def survey_figure(reports: Sequence[FileReport], path: str | os.PathLike) -> None:
    """Scatter of SNR vs high-band ratio and a histogram of cliff frequencies; excluded files in red."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from nenv.media.files import atomic_output

    kept = [r for r in reports if not r.excluded and np.isfinite(r.snr_db)]
    excl = [r for r in reports if r.excluded and np.isfinite(r.snr_db)]
    fig, ax = plt.subplots(1, 3, figsize=(12, 3.6), layout="constrained")
    # excluded files first, kept ones drawn over them (smaller, opaque): no kept file hides under a red one
    for group, colour, label, size, z in ((excl, "tab:red", "excluded", 10, 1), (kept, "tab:blue", "kept", 6, 2)):
        ax[0].scatter([r.snr_db for r in group], [r.hb_ratio_db for r in group], s=size, c=colour, label=f"{label} ({len(group)})", alpha=0.8, zorder=z, linewidths=0)
        ax[1].scatter([r.cutoff_hz / 1000 for r in group], [r.clipped_fraction * 100 for r in group], s=size, c=colour, alpha=0.8, zorder=z, linewidths=0)
    ax[0].set_xlabel("estimated SNR [dB]")
    ax[0].set_ylabel("3.4-8 kHz re 0.3-3.4 kHz [dB]")
    ax[0].legend(fontsize=8)
    ax[1].set_xlabel("band-limit cliff [kHz] (8 = none)")
    ax[1].set_ylabel("clipped samples [%]")
    tally = summary(reports)["exclusion_reasons"]
    ax[2].barh(list(tally) or ["none"], list(tally.values()) or [0], color="tab:red")
    ax[2].set_xlabel("files excluded, by reason")
    with atomic_output(path) as tmp:
        fig.savefig(tmp, dpi=110, format=Path(path).suffix[1:])
    plt.close(fig)


def split_speakers(reports: Sequence[FileReport], *, val_fraction: float, seed: int, val_speakers: Sequence[str] = (), train_speakers: Sequence[str] = ()) -> tuple[list[FileReport], list[FileReport]]:
    """Speaker-disjoint train/validation split of the kept files, reproducible from ``seed``.

    ``val_speakers`` always go to validation and ``train_speakers`` to training (for example the
    few speakers with long sentences, split by group so both sides hear both); of the others,
    ``val_fraction`` are drawn for validation.
    """
    kept = [r for r in reports if not r.excluded]
    speakers = sorted({r.speaker for r in kept})
    if len(speakers) < 2:
        raise ConfigError(f"a speaker-disjoint split needs at least 2 speakers among the kept files, found {len(speakers)}")
    for label, named in (("val_speakers", val_speakers), ("train_speakers", train_speakers)):
        unknown = sorted(set(named) - set(speakers))
        if unknown:
            raise ConfigError(f"recipe key '{label}' names speakers with no kept file: {', '.join(unknown[:5])}{' ...' if len(unknown) > 5 else ''}")
    both = sorted(set(val_speakers) & set(train_speakers))
    if both:
        raise ConfigError(f"speakers named in both val_speakers and train_speakers: {', '.join(both)}")
    rest = [s for s in speakers if s not in set(val_speakers) | set(train_speakers)]
    order = np.random.default_rng(seed).permutation(len(rest))
    n_val = min(len(rest) - (0 if train_speakers else 1), max(0 if val_speakers else 1, int(round(val_fraction * len(rest)))))
    val = set(val_speakers) | {rest[i] for i in order[:n_val]}
    if not val or val == set(speakers):
        raise ConfigError("the split leaves no speaker for training or none for validation: check val_speakers, train_speakers and val_fraction")
    return [r for r in kept if r.speaker not in val], [r for r in kept if r.speaker in val]
