"""Analysis of a comparison category rating panel (ITU-T P.800 Annex E), as ``nenv panel --design ccr`` prepares it.

Each rating is the quality of a pair's second sample against its first, -3 (much worse) to +3 (much
better). Every system met the unextended signal on every clip in both orders, so

1. a rating is turned to "system against unextended" (negated where the system came first), and a
   listener's two ratings of one clip are averaged: a preference for whichever sample came second
   (or first) cancels. That average is one unit; the **comparison mean opinion score** (CMOS) of a
   system is the mean over units, with its 95% interval (Student's t), and the one-sample t-test and
   the Wilcoxon signed-rank test (scipy.stats) of "no difference";
2. the order effect is shown beside it: the mean of the system-against-unextended ratings where the
   system came second, and where it came first;
3. **screening** (our rule; the standard has none for this design): each clip also paired the original
   with the unextended signal. A listener who did not rate the original better than the unextended
   signal in at least half of those pairs does not hear the upper band (headphones, room or hearing)
   and is excluded, and named.

Given the clips' speaker groups (``groups``, e.g. female/male), the CMOS is also reported per group.
"""

from __future__ import annotations

import csv
import io
import math
import os
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import stats

from nenv.errors import InputError
from nenv.report.verdicts import ANCHOR, HIDDEN_REFERENCE, Interval, collect, group_names, group_of_clip, load_key, number_field

SCALE = (-3, 3)
SCREEN_CONTROL_AT_LEAST = 0.5  # share of the control pairs in which the original must be rated better


@dataclass(frozen=True)
class PairRating:
    listener: str
    trial: str
    clip: str
    first: str  # system of the first sample
    second: str
    score: int  # the second's quality against the first's, -3..+3
    seconds: float

    def against_anchor(self) -> tuple[str, int] | None:
        """``(system, its score against the unextended signal)``, or None for a pair without the anchor."""
        if self.first == ANCHOR and self.second != ANCHOR:
            return self.second, self.score
        if self.second == ANCHOR and self.first != ANCHOR:
            return self.first, -self.score
        return None


@dataclass(frozen=True)
class Preference:
    """One system against the unextended signal."""

    system: str
    cmos: Interval  # over (listener, clip) units
    t_p: float
    wilcoxon_p: float
    second: float  # mean rating against unextended where the system came second
    first: float  # ... and where it came first
    per_clip: dict[str, Interval]
    per_group: dict[str, Interval]  # speaker group -> CMOS over its clips' units (empty without groups)


@dataclass
class PairAnalysis:
    ratings: list[PairRating]  # of the listeners kept
    listeners: list[str]
    excluded: dict[str, str]
    preferences: list[Preference]  # the original (the control) first, then the systems


def is_pairs_key(key_file: str | os.PathLike) -> bool:
    """Whether ``key_file`` is the key of a comparison category rating panel."""
    return load_key(key_file).get("design") == "ccr"


def read(result_files: Sequence[str | os.PathLike], key_file: str | os.PathLike) -> list[PairRating]:
    """Every rating in the results files, with the systems of its pair from the panel's key."""
    key = load_key(key_file)
    pairs = key.get("pairs")
    if not isinstance(pairs, dict):
        raise InputError(f"'{key_file}' is not the key of a pairs panel (no 'pairs')")
    seen: set[tuple[str, str]] = set()

    def make(listener: str, r: dict, path: str) -> PairRating:
        trial = str(r.get("trial"))
        p = pairs.get(trial)
        if p is None:
            raise InputError(f"'{path}': pair {trial!r} is not in the key")
        score = number_field(r, "score", path)
        if not (math.isfinite(score) and score == int(score) and SCALE[0] <= score <= SCALE[1]):
            raise InputError(f"'{path}': score {r['score']} is not one of the steps -3..+3")
        if (path, trial) in seen:
            raise InputError(f"'{path}': pair {trial!r} is rated twice")
        seen.add((path, trial))
        return PairRating(listener, trial, p["clip"], p["first"], p["second"], int(score), number_field(r, "seconds", path, math.nan))

    return collect(result_files, key, make)


def screen(ratings: Sequence[PairRating]) -> dict[str, str]:
    """Listeners to exclude, with the reason (the screening rule in the module docstring)."""
    excluded = {}
    for listener in sorted({r.listener for r in ratings}):
        control = [a[1] for r in ratings if r.listener == listener and (a := r.against_anchor()) and a[0] == HIDDEN_REFERENCE]
        better = sum(1 for s in control if s > 0)
        if control and better < SCREEN_CONTROL_AT_LEAST * len(control):
            excluded[listener] = f"rated the original better than the unextended signal in only {better} of {len(control)} control pairs"
    return excluded


def _units(ratings: Sequence[PairRating], system: str) -> dict[tuple[str, str], float]:
    """(listener, clip) -> the mean of that listener's ratings of ``system`` against unextended on the clip."""
    by: dict[tuple[str, str], list[int]] = {}
    for r in ratings:
        a = r.against_anchor()
        if a is not None and a[0] == system:
            by.setdefault((r.listener, r.clip), []).append(a[1])
    return {k: float(np.mean(v)) for k, v in by.items()}


def _tests(values: np.ndarray) -> tuple[float, float]:
    """Two-sided p of the one-sample t-test and of the Wilcoxon signed-rank test against 0."""
    if values.size < 2:
        return math.nan, math.nan
    t_p = float(stats.ttest_1samp(values, 0.0).pvalue) if np.any(values != values[0]) else (0.0 if values[0] else 1.0)
    w_p = float(stats.wilcoxon(values).pvalue) if np.any(values != 0) else 1.0
    return t_p, w_p


def analyse(ratings: Sequence[PairRating], *, groups: dict[str, str] | None = None) -> PairAnalysis:
    """``groups``: clip -> speaker group (e.g. female/male), for a CMOS per group as well."""
    excluded = screen(ratings)
    kept = [r for r in ratings if r.listener not in excluded]
    systems = sorted({a[0] for r in kept if (a := r.against_anchor())}, key=lambda s: (s != HIDDEN_REFERENCE, s))
    prefs = []
    for s in systems:
        units = _units(kept, s)
        v = np.array(list(units.values()))
        t_p, w_p = _tests(v)
        order = {place: [a[1] for r in kept if (a := r.against_anchor()) and a[0] == s and getattr(r, place) == s] for place in ("first", "second")}
        clips = sorted({c for _, c in units})
        per_clip = {c: Interval.of([u for (_, cc), u in units.items() if cc == c]) for c in clips}
        per_group = {g: Interval.of([u for (_, c), u in units.items() if group_of_clip(c, groups) == g]) for g in group_names(kept, groups)}
        prefs.append(Preference(s, Interval.of(v), t_p, w_p, _mean(order["second"]), _mean(order["first"]), per_clip, per_group))
    return PairAnalysis(kept, sorted({r.listener for r in kept}), excluded, prefs)


def _mean(values: Sequence[float]) -> float:
    return float(np.mean(values)) if len(values) else math.nan


# ---- tables and figure ---------------------------------------------------------------------


def _label(system: str) -> str:
    return "original (control)" if system == HIDDEN_REFERENCE else system


def to_markdown(a: PairAnalysis) -> str:
    lines = [f"Listeners kept: {len(a.listeners)} ({', '.join(a.listeners) or 'none'}); excluded: {len(a.excluded)}"]
    lines += [f"- excluded {who}: {why}" for who, why in a.excluded.items()]
    if not a.listeners:
        return "\n".join(lines + ["", "No listener passed the screening: there is nothing to report."]) + "\n"
    lines += ["", "Each system against the unextended signal: comparison mean opinion score (CMOS, ITU-T P.800 Annex E;",
              "-3 much worse .. +3 much better), mean [95% confidence interval] over listener x clip (both orders averaged):", ""]
    lines.append("| system | CMOS vs unextended | n | t-test p | Wilcoxon p | when second | when first |")
    lines.append("|---|---:|---:|---:|---:|---:|---:|")
    for p in a.preferences:
        lines.append(f"| {_label(p.system)} | {p.cmos.text('+.2f')} | {p.cmos.n} | {p.t_p:.3g} | {p.wilcoxon_p:.3g} | {p.second:+.2f} | {p.first:+.2f} |")
    group_list = sorted({g for p in a.preferences for g in p.per_group})
    if group_list:
        lines += ["", "Per speaker group (CMOS vs unextended [95% confidence interval], n):", "", "| system | " + " | ".join(group_list) + " |", "|---|" + "---:|" * len(group_list)]
        lines += [f"| {_label(p.system)} | " + " | ".join(f"{p.per_group[g].text('+.2f')} (n={p.per_group[g].n})" if g in p.per_group else "-" for g in group_list) + " |" for p in a.preferences]
    clips = sorted({c for p in a.preferences for c in p.per_clip})
    lines += ["", "Per clip (CMOS vs unextended, mean over listeners):", ""]
    lines.append("| system | " + " | ".join(clips) + " |")
    lines.append("|---|" + "---:|" * len(clips))
    for p in a.preferences:
        lines.append(f"| {_label(p.system)} | " + " | ".join(f"{p.per_clip[c].mean:+.2f}" if c in p.per_clip else "-" for c in clips) + " |")
    return "\n".join(lines) + "\n"


def to_csv(a: PairAnalysis) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["clip", "system", "cmos_vs_unextended", "ci_low", "ci_high", "n"])
    for p in a.preferences:
        w.writerow(["all", p.system, p.cmos.mean, p.cmos.low, p.cmos.high, p.cmos.n])
        for c, iv in p.per_clip.items():
            w.writerow([c, p.system, iv.mean, iv.low, iv.high, iv.n])
        for g, iv in p.per_group.items():
            w.writerow([f"group {g}", p.system, iv.mean, iv.low, iv.high, iv.n])
    return buf.getvalue()


def ratings_csv(ratings: Sequence[PairRating]) -> str:
    """One row per rating, the key applied: listener, trial, clip, first, second, score, seconds."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["listener", "trial", "clip", "first", "second", "score", "seconds"])
    for r in ratings:
        w.writerow([r.listener, r.trial, r.clip, r.first, r.second, r.score, r.seconds])
    return buf.getvalue()


def figure(a: PairAnalysis, path: str | os.PathLike) -> None:
    """CMOS and 95% interval per system (dots: per clip), on the -3..+3 scale."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(1.8 + 1.2 * len(a.preferences), 4.2))
    for i, p in enumerate(a.preferences):
        iv = p.cmos
        if iv.n:
            err = [[iv.mean - iv.low], [iv.high - iv.mean]] if not math.isnan(iv.low) else [[0], [0]]
            ax.errorbar(i, iv.mean, yerr=err, fmt="o", color="black", capsize=6, zorder=3)
        for j, c in enumerate(p.per_clip):
            ax.plot(i + 0.12 + 0.04 * j, p.per_clip[c].mean, ".", color="tab:blue", alpha=0.7)
    ax.axhline(0, color="gray", lw=0.8)
    ax.set_xticks(range(len(a.preferences)), [_label(p.system) for p in a.preferences], rotation=15)
    ax.set_xlim(-0.5, len(a.preferences) - 0.3)
    ax.set_ylim(-3.2, 3.2)
    ax.set_ylabel("against unextended (-3 much worse .. +3 much better)")
    ax.set_title(f"Pairs panel: CMOS and 95% interval ({len(a.listeners)} listeners; dots: per clip)", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
