"""Systems head to head on the same clips: does an extension beat no extension, and the simple methods?

A table of means hides how often a system wins. For each pair (a system against the unextended
input, and the default model against each other system present) and each measure that decides
(ViSQOL, WB-PESQ, high-band LSD), over the clips both were scored on, per speaker group as well:

- on how many clips ``a`` did better than ``b`` (higher ViSQOL or WB-PESQ, lower LSD);
- the mean difference ``a - b`` with its 95% confidence interval (Student's t, as for a listening
  panel's paired differences in :mod:`nenv.report.verdicts`);
- the Wilcoxon signed-rank test's two-sided p (scipy.stats), which does not assume normal differences.

A clip is a reference through one channel law (``evaluate``) or one recording (``measures``); a
measure that is blank (NaN) on either side leaves that clip out of that comparison.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from nenv.report.evaluate import group_of
from nenv.report.measures import Scores
from nenv.report.verdicts import Interval
from nenv.words import count

DECIDING = {"visqol": ("ViSQOL", +1), "pesq_wb": ("WB-PESQ", +1), "lsd_high": ("LSD 3.4-8k [dB]", -1)}  # measure -> label, +1: higher is better
BASELINE = "unextended"
DEFAULT = "neural"


@dataclass(frozen=True)
class HeadToHead:
    """System ``a`` against system ``b`` on one measure, over the clips of one group (None: all)."""

    a: str
    b: str
    measure: str
    group: str | None
    better: int  # clips where a did better than b
    difference: Interval  # a - b, over n clips
    wilcoxon_p: float
    channel: str = ""  # the channel law (evaluate with several), or empty

    @property
    def clips(self) -> int:
        return self.difference.n


def pairs_to_compare(systems: Sequence[str], *, baseline: str = BASELINE, default: str | None = DEFAULT) -> list[tuple[str, str]]:
    """Every system against the baseline, then the default system (each of its variants, e.g.
    "neural +low band") against every other one but the baseline and the ceilings (oracle, true band),
    each pair once."""
    from nenv.chain.systems import REFERENCE_SYSTEMS

    def base(s: str) -> str:
        return s.split(" ")[0]

    out = [(s, baseline) for s in systems if s != baseline] if baseline in systems else []
    seen = set()
    for d in (s for s in systems if default is not None and base(s) == default):
        for s in systems:
            if s in (d, baseline) or base(s) in REFERENCE_SYSTEMS or frozenset((d, s)) in seen:
                continue
            seen.add(frozenset((d, s)))
            out.append((d, s))
    return out


def differences(items: Sequence[tuple[str, str, Scores]], a: str, b: str, measure: str, groups: dict[str, str] | None = None) -> list[tuple[str, str | None, float]]:
    """``(clip, group, a's score minus b's)`` on ``measure`` for every clip of ``(system, clip, scores)``
    items that both systems were scored on and where both values are finite, in the clips' order;
    the group is None without ``groups`` (clip -> group), "(no group)" for a clip it does not name."""
    by = {(s, c): sc for s, c, sc in items}
    out = []
    for c in dict.fromkeys(c for _, c, _ in items):
        if (a, c) in by and (b, c) in by:
            d = getattr(by[a, c], measure) - getattr(by[b, c], measure)
            if np.isfinite(d):
                out.append((c, (group_of(c, groups) or "(no group)") if groups else None, float(d)))
    return out


def compare(items: Sequence[tuple[str, str, Scores]], pairs: Sequence[tuple[str, str]], groups: dict[str, str] | None = None, *, channel: str = "") -> list[HeadToHead]:
    """Head-to-head results from ``(system, clip, scores)`` items, for each pair, each deciding measure
    and (with ``groups``, clip -> group) each group after all clips; ``channel`` labels them."""
    names = sorted({(group_of(c, groups) or "(no group)") for _, c, _ in items}) if groups else []
    out = []
    for a, b in pairs:
        diffs = {m: differences(items, a, b, m, groups) for m in DECIDING}
        for group in [None, *names]:
            for m, (_, sign) in DECIDING.items():
                d = np.array([v for _, g, v in diffs[m] if group is None or g == group])
                out.append(HeadToHead(a, b, m, group, int(np.sum(sign * d > 0)), Interval.of(d), _wilcoxon(d), channel))
    return out


def _wilcoxon(d: np.ndarray) -> float:
    """Two-sided p of the Wilcoxon signed-rank test; NaN with fewer than two non-zero differences."""
    from scipy import stats

    if np.count_nonzero(d) < 2:
        return math.nan
    return float(stats.wilcoxon(d).pvalue)


def _fmt(h: HeadToHead) -> list[str]:
    iv = h.difference
    ci = f"{iv.mean:+.2f} [{iv.low:+.2f}, {iv.high:+.2f}]" if np.isfinite(iv.low) else (f"{iv.mean:+.2f}" if iv.n else "-")
    p = ("<0.001" if h.wilcoxon_p < 0.001 else f"{h.wilcoxon_p:.3f}") if np.isfinite(h.wilcoxon_p) else "-"
    return [f"{h.better} of {h.clips}" if h.clips else "-", ci, p]


def to_markdown(rows: Sequence[HeadToHead]) -> str:
    """One line per pair and group, each deciding measure's wins, mean difference [95% CI] and p."""
    laws = any(h.channel for h in rows)
    head = ["a", "against b", *(["channel"] if laws else []), "group"]
    for label, _ in DECIDING.values():
        head += [f"{label}: a better on", "mean a - b [95% CI]", "p"]
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join(["---"] * (len(head) - 3 * len(DECIDING)) + ["---:"] * (3 * len(DECIDING))) + "|"]
    for key in dict.fromkeys((h.a, h.b, h.channel, h.group) for h in rows):
        cells = [c for h in rows if (h.a, h.b, h.channel, h.group) == key for c in _fmt(h)]
        lines.append("| " + " | ".join([key[0], key[1], *([key[2]] if laws else []), key[3] or "all", *cells]) + " |")
    return "\n".join(lines) + "\n"


def to_csv(rows: Sequence[HeadToHead]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["a", "b", "channel", "group", "measure", "clips", "a_better", "mean_difference", "ci_low", "ci_high", "wilcoxon_p"])
    for h in rows:
        iv = h.difference
        w.writerow([h.a, h.b, h.channel, h.group or "", h.measure, h.clips, h.better, *(f"{v:.4f}" for v in (iv.mean, iv.low, iv.high, h.wilcoxon_p))])
    return buf.getvalue()


def summary(rows: Sequence[HeadToHead], *, baseline: str = BASELINE) -> list[str]:
    """One sentence per system against the baseline on ViSQOL (all clips): the question a gateway
    engineer asks first."""
    out = []
    for h in rows:
        if h.b == baseline and h.group is None and h.measure == "visqol" and h.clips:
            where = f" ({h.channel})" if h.channel else ""
            out.append(f"{h.a}{where}: ViSQOL above {baseline} on {h.better} of {count(h.clips, 'clip')} (mean {h.difference.mean:+.2f})")
    return out


NOTE = """\
Head to head (nenv.report.versus): on the same clips, how often system a did better than b (higher
ViSQOL or WB-PESQ, lower LSD), the mean difference a - b with its 95% confidence interval (Student's
t) and the two-sided p of the Wilcoxon signed-rank test (scipy.stats). A small p with few clips is
still few clips: judge by speaker group, and by ear.
"""
