"""Analysis of a listening panel's ratings (multi-stimulus test with hidden reference and anchor).

Reads the results files the panel page saves (one per listener session, JSON) and the panel's key
(``key.json``, written by :mod:`nenv.report.panel`: which anonymous stimulus is which system), then

1. **post-screening** (ITU-R BS.1534-3, section 4.1.2): a listener who rates the hidden reference
   below 90 for more than 15% of the trials, or the anchor (here: the unextended signal) above 90
   for more than 15% of the trials, is excluded, and named;
2. per system, the **mean score with its 95% confidence interval** (Student's t over the ratings
   of the listeners kept: mean +- t(0.975, n-1) * s / sqrt(n)), per clip and overall;
3. **paired differences** between systems on the same trials (every pair with the unextended
   signal, and the default model against each other system): mean difference with its 95%
   interval, the paired t-test and, as a check that does not assume normal differences, the
   Wilcoxon signed-rank test (both from scipy.stats);
4. given the clips' speaker groups (e.g. female/male), each system's mean per group as well.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
from scipy import stats

from nenv.errors import InputError

HIDDEN_REFERENCE = "reference"  # the key's name of the hidden reference among the stimuli
ANCHOR = "unextended"  # the low anchor: the telephone signal, interpolated
SCREEN_REFERENCE_BELOW = 90.0  # BS.1534-3 4.1.2: the hidden reference rated below this ...
SCREEN_ANCHOR_ABOVE = 90.0  # ... or the anchor above this (the standard's mid anchor rule, applied to our anchor)
SCREEN_FRACTION = 0.15  # ... for more than this fraction of the trials excludes the listener


@dataclass(frozen=True)
class Rating:
    listener: str
    trial: str  # the panel's trial id (one clip)
    clip: str
    system: str
    score: float  # 0..100
    seconds: float  # time the listener spent on the trial


@dataclass(frozen=True)
class Interval:
    """A mean with its 95% confidence interval (Student's t), over n values."""

    mean: float
    low: float
    high: float
    n: int

    @classmethod
    def of(cls, values: Sequence[float]) -> "Interval":
        v = np.asarray(values, dtype=float)
        n = v.size
        if n == 0:
            return cls(math.nan, math.nan, math.nan, 0)
        m = float(v.mean())
        if n == 1:
            return cls(m, math.nan, math.nan, 1)
        half = float(stats.t.ppf(0.975, n - 1) * v.std(ddof=1) / math.sqrt(n))
        return cls(m, m - half, m + half, n)

    def text(self, spec: str = ".1f") -> str:
        """``mean [low, high]`` in the format ``spec``; the mean alone without an interval; ``-`` for none."""
        if self.n == 0:
            return "-"
        if math.isnan(self.low):
            return format(self.mean, spec)
        return f"{self.mean:{spec}} [{self.low:{spec}}, {self.high:{spec}}]"


@dataclass(frozen=True)
class Paired:
    """System ``a`` minus system ``b`` on the same (listener, trial) pairs."""

    a: str
    b: str
    difference: Interval
    t_p: float  # paired t-test, two-sided
    wilcoxon_p: float  # Wilcoxon signed-rank test, two-sided


@dataclass
class Analysis:
    ratings: list[Rating]  # of the listeners kept
    listeners: list[str]  # kept
    excluded: dict[str, str]  # listener -> reason
    overall: dict[str, Interval]  # system -> interval
    per_clip: dict[str, dict[str, Interval]]  # clip -> system -> interval
    paired: list[Paired]
    per_group: dict[str, dict[str, Interval]] = field(default_factory=dict)  # speaker group -> system -> interval


def load_key(key_file: str | os.PathLike) -> dict:
    """A panel's key.json, read; InputError if it is not one."""
    try:
        key = json.loads(Path(key_file).read_text(encoding="utf-8"))
    except (OSError, ValueError) as e:
        raise InputError(f"cannot read the panel key '{key_file}': {e}") from e
    if not isinstance(key, dict) or not isinstance(key.get("stimuli"), dict):
        raise InputError(f"'{key_file}' is not a panel key (no 'stimuli')")
    return key


def load_results(path: str | os.PathLike, key: dict) -> dict:
    """One listener's results file, read; InputError if it is unreadable or of another panel."""
    try:
        res = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError) as e:
        raise InputError(f"cannot read the results file '{path}': {e}") from e
    if not isinstance(res, dict) or res.get("panel") != key.get("panel"):
        other = res.get("panel") if isinstance(res, dict) else None
        raise InputError(f"'{path}' holds results of another panel ({other!r}, the key is for {key.get('panel')!r})")
    return res


def ratings_in(res: dict, path) -> list[dict]:
    """The ratings of a results file (each a dict), after checking it names its listener."""
    ratings = res.get("ratings", [])
    if "listener" not in res or not isinstance(ratings, list) or not all(isinstance(r, dict) for r in ratings):
        raise InputError(f"'{path}' is not a panel's results file (no listener, or ratings that are not a list of records)")
    return ratings


def number_field(r: dict, field: str, path, default: float | None = None) -> float:
    """A rating's numeric field; InputError if it is missing (without a default) or not a number."""
    v = r.get(field, default)
    try:
        return float(v)
    except (TypeError, ValueError):
        raise InputError(f"'{path}': a rating's {field} is {v!r}, not a number") from None


def collect(result_files: Sequence[str | os.PathLike], key: dict, make: Callable[[str, dict, str], object]) -> list:
    """``make(listener, rating, path)`` for every rating of every results file (of the panel ``key``);
    InputError if there are none."""
    out = []
    for path in result_files:
        res = load_results(path, key)
        out += [make(str(res["listener"]), r, str(path)) for r in ratings_in(res, path)]
    if not out:
        raise InputError("no ratings in the results given")
    return out


def read(result_files: Sequence[str | os.PathLike], key_file: str | os.PathLike) -> list[Rating]:
    """Every rating in the results files, mapped to its system through the panel's key."""
    key = load_key(key_file)

    def make(listener: str, r: dict, path: str) -> Rating:
        s = key["stimuli"].get(r.get("stimulus"))
        if s is None:
            raise InputError(f"'{path}': stimulus {r.get('stimulus')!r} is not in the key (results of the other design?)")
        score = number_field(r, "score", path)
        if not 0.0 <= score <= 100.0:
            raise InputError(f"'{path}': score {score} is outside 0..100")
        return Rating(listener, str(r.get("trial")), s["clip"], s["system"], score, number_field(r, "seconds", path, math.nan))

    return collect(result_files, key, make)


def screen(ratings: Sequence[Rating]) -> dict[str, str]:
    """Listeners to exclude, with the reason (the post-screening rule in the module docstring)."""
    excluded = {}
    for listener in sorted({r.listener for r in ratings}):
        mine = [r for r in ratings if r.listener == listener]
        trials = sorted({r.trial for r in mine})
        ref_low = sum(1 for t in trials if any(r.trial == t and r.system == HIDDEN_REFERENCE and r.score < SCREEN_REFERENCE_BELOW for r in mine))
        anchor_high = sum(1 for t in trials if any(r.trial == t and r.system == ANCHOR and r.score > SCREEN_ANCHOR_ABOVE for r in mine))
        reasons = []
        if ref_low > SCREEN_FRACTION * len(trials):
            reasons.append(f"rated the hidden reference below {SCREEN_REFERENCE_BELOW:.0f} in {ref_low} of {len(trials)} trials")
        if anchor_high > SCREEN_FRACTION * len(trials):
            reasons.append(f"rated the anchor ({ANCHOR}) above {SCREEN_ANCHOR_ABOVE:.0f} in {anchor_high} of {len(trials)} trials")
        if reasons:
            excluded[listener] = "; ".join(reasons)
    return excluded


def analyse(ratings: Sequence[Rating], *, default_system: str = "neural", groups: dict[str, str] | None = None) -> Analysis:
    """``groups``: clip -> speaker group (e.g. female/male), for a mean per group as well."""
    excluded = screen(ratings)
    kept = [r for r in ratings if r.listener not in excluded]
    systems = sorted({r.system for r in kept}, key=lambda s: (s != HIDDEN_REFERENCE, s != ANCHOR, s))
    overall = {s: Interval.of([r.score for r in kept if r.system == s]) for s in systems}
    per_clip = {c: {s: Interval.of([r.score for r in kept if r.system == s and r.clip == c]) for s in systems} for c in sorted({r.clip for r in kept})}
    pairs = [(s, ANCHOR) for s in systems if s != ANCHOR]
    if default_system in systems:
        pairs += [(default_system, s) for s in systems if s not in (default_system, ANCHOR)]
    paired = [p for p in (_paired(kept, a, b) for a, b in pairs) if p is not None]
    per_group = {g: {s: Interval.of([r.score for r in kept if r.system == s and group_of_clip(r.clip, groups) == g]) for s in systems} for g in group_names(kept, groups)}
    return Analysis(kept, sorted({r.listener for r in kept}), excluded, overall, per_clip, paired, per_group)


NO_GROUP = "(no group)"


def group_of_clip(clip: str, groups: dict[str, str] | None) -> str:
    """The speaker group of a clip in ``groups`` (clip -> group), or NO_GROUP."""
    return (groups or {}).get(clip, NO_GROUP)


def group_names(ratings: Sequence, groups: dict[str, str] | None) -> list[str]:
    """The groups the rated clips fall in, sorted (none without ``groups``)."""
    return sorted({group_of_clip(r.clip, groups) for r in ratings}) if groups else []


def _paired(ratings: Sequence[Rating], a: str, b: str) -> Paired | None:
    score = {(r.listener, r.trial, r.system): r.score for r in ratings}
    keys = sorted({(r.listener, r.trial) for r in ratings if (r.listener, r.trial, a) in score and (r.listener, r.trial, b) in score})
    if len(keys) < 2:
        return None
    d = np.array([score[(*k, a)] - score[(*k, b)] for k in keys])
    t_p = float(stats.ttest_rel([score[(*k, a)] for k in keys], [score[(*k, b)] for k in keys]).pvalue) if np.any(d != d[0]) else (0.0 if d[0] else 1.0)
    w_p = float(stats.wilcoxon(d).pvalue) if np.any(d != 0) else 1.0
    return Paired(a, b, Interval.of(d), t_p, w_p)


# ---- tables ----------------------------------------------------------------------------------


def to_markdown(a: Analysis) -> str:
    lines = [f"Listeners kept: {len(a.listeners)} ({', '.join(a.listeners) or 'none'}); excluded: {len(a.excluded)}"]
    lines += [f"- excluded {who}: {why}" for who, why in a.excluded.items()]
    if not a.listeners:
        return "\n".join(lines + ["", "No listener passed the post-screening: there is nothing to report."]) + "\n"
    lines += ["", "Mean score [95% confidence interval], 0-100 (ITU-R BS.1534 quality scale):", ""]
    clips = list(a.per_clip)
    lines.append("| system | all | " + " | ".join(clips) + " |")
    lines.append("|---|---:|" + "---:|" * len(clips))
    for s, iv in a.overall.items():
        lines.append(f"| {s} | {iv.text()} (n={iv.n}) | " + " | ".join(a.per_clip[c][s].text() for c in clips) + " |")
    if a.per_group:
        lines += ["", "Per speaker group (mean [95% confidence interval], n):", "", "| system | " + " | ".join(a.per_group) + " |", "|---|" + "---:|" * len(a.per_group)]
        lines += [f"| {s} | " + " | ".join(f"{by[s].text()} (n={by[s].n})" for by in a.per_group.values()) + " |" for s in a.overall]
    lines += ["", "Paired differences on the same trials (paired t-test; Wilcoxon signed-rank test as a check):", ""]
    lines.append("| a - b | mean difference [95% CI] | n | t-test p | Wilcoxon p |")
    lines.append("|---|---:|---:|---:|---:|")
    for p in a.paired:
        lines.append(f"| {p.a} - {p.b} | {p.difference.text()} | {p.difference.n} | {p.t_p:.3g} | {p.wilcoxon_p:.3g} |")
    return "\n".join(lines) + "\n"


def to_csv(a: Analysis) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["clip", "system", "mean", "ci_low", "ci_high", "n"])
    for s, iv in a.overall.items():
        w.writerow(["all", s, iv.mean, iv.low, iv.high, iv.n])
    for c, by in a.per_clip.items():
        for s, iv in by.items():
            w.writerow([c, s, iv.mean, iv.low, iv.high, iv.n])
    for g, by in a.per_group.items():
        for s, iv in by.items():
            w.writerow([f"group {g}", s, iv.mean, iv.low, iv.high, iv.n])
    return buf.getvalue()


def ratings_csv(ratings: Sequence[Rating]) -> str:
    """One row per rating, with the system the listener rated (the key applied): listener, trial, clip,
    system, score, seconds."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["listener", "trial", "clip", "system", "score", "seconds"])
    for r in ratings:
        w.writerow([r.listener, r.trial, r.clip, r.system, r.score, r.seconds])
    return buf.getvalue()


def figure(a: Analysis, path: str | os.PathLike) -> None:
    """Mean and 95% interval per system, overall and per clip (one marker per clip)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    systems = list(a.overall)
    fig, ax = plt.subplots(figsize=(1.6 + 1.1 * len(systems), 4.2))
    x = np.arange(len(systems))
    for i, s in enumerate(systems):
        iv = a.overall[s]
        if iv.n:
            lo, hi = (iv.mean - iv.low, iv.high - iv.mean) if not math.isnan(iv.low) else (0, 0)
            ax.errorbar(i, iv.mean, yerr=[[lo], [hi]], fmt="o", color="black", capsize=6, zorder=3)
        for j, c in enumerate(a.per_clip):
            v = a.per_clip[c][s]
            if v.n:
                ax.plot(i + 0.12 + 0.05 * j, v.mean, ".", color="tab:blue", alpha=0.7)
    for y, label in ((10, "bad"), (30, "poor"), (50, "fair"), (70, "good"), (90, "excellent")):
        ax.text(len(systems) - 0.45, y, label, fontsize=8, color="gray", va="center")
    for y in (20, 40, 60, 80):
        ax.axhline(y, color="gray", lw=0.5, ls=":")
    ax.set_xticks(x, systems, rotation=20)
    ax.set_xlim(-0.5, len(systems) - 0.1)
    ax.set_ylim(0, 100)
    ax.set_ylabel("score (0-100)")
    ax.set_title(f"Listening panel: mean and 95% interval ({len(a.listeners)} listeners; dots: per clip)", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
