"""Read guard records and say where and why the network's envelope was rejected.

Used by ``nenv audit``: a summary table (screen and CSV), a self-contained HTML
page with the figures embedded, and, given a model, a re-run of every recorded
decision with that model (to show a retrained model fixes the hops its
predecessor failed).
"""

from __future__ import annotations

import base64
import csv
import html
import io
from collections import Counter
from dataclasses import dataclass

import numpy as np

from nenv.chain.guard import CHECK_NAMES, Guard, reason_names
from nenv.report.records import Records

CHECKS = list(CHECK_NAMES.values())
VALUE_OF = {"unstable": "max_k", "level": "level_db", "mismatch": "mismatch_db", "novel": "novelty"}
# what each value is, in words, for figure titles and axes
VALUE_WORDS = {
    "max_k": ("largest |reflection coefficient|", "stable below the red line"),
    "level_db": ("predicted high-band level [dB re narrowband]", "the training range between the red lines"),
    "mismatch_db": ("telephone-band mismatch [dB RMS]", "accepted below the red line"),
    "novelty": ("distance to the nearest codebook cell", "accepted below the red line"),
}


@dataclass
class SourceRow:
    source: str
    group: str
    hops: int
    rejected: int
    by_reason: dict

    @property
    def rate(self) -> float:
        return self.rejected / self.hops if self.hops else float("nan")


def table(rec: Records) -> list[SourceRow]:
    """One row per source, from the summaries (sources without a summary: from their reject lines)."""
    rows: dict[str, SourceRow] = {}
    for s in rec.summaries:
        rows[s["source"]] = SourceRow(s["source"], s.get("group") or "", int(s["hops"]), int(s["rejected"]), dict(s["by_reason"]))
    counted = Counter(r["source"] for r in rec.rejects)
    for src, n in counted.items():
        if src not in rows:  # a session killed before its summary: hops unknown
            by = Counter(name for r in rec.rejects if r["source"] == src for name in r["reasons"])
            grp = next((r.get("group") or "" for r in rec.rejects if r["source"] == src), "")
            rows[src] = SourceRow(src, grp, 0, n, dict(by))
    return sorted(rows.values(), key=lambda r: (-r.rate if r.hops else 0, r.source))


def totals(rows: list[SourceRow], key=lambda r: "all") -> list[SourceRow]:
    agg: dict[str, SourceRow] = {}
    for r in rows:
        k = key(r)
        a = agg.setdefault(k, SourceRow(k, k, 0, 0, {}))
        a.hops += r.hops
        a.rejected += r.rejected
        for name, n in r.by_reason.items():
            a.by_reason[name] = a.by_reason.get(name, 0) + n
    return list(agg.values())


def to_csv(rows: list[SourceRow]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["source", "group", "hops", "rejected", "rate", *CHECKS])
    for r in rows:
        w.writerow([r.source, r.group, r.hops, r.rejected, f"{r.rate:.5f}" if r.hops else "", *(r.by_reason.get(c, 0) for c in CHECKS)])
    return buf.getvalue()


def to_text(rows: list[SourceRow]) -> str:
    head = f"{'source':<40} {'hops':>8} {'rejected':>9} {'rate':>7}  " + " ".join(f"{c:>9}" for c in CHECKS)
    lines = [head, "-" * len(head)]
    for r in rows:
        rate = f"{100 * r.rate:6.2f}%" if r.hops else "    n/a"
        lines.append(f"{r.source[-40:]:<40} {r.hops:>8} {r.rejected:>9} {rate}  " + " ".join(f"{r.by_reason.get(c, 0):>9}" for c in CHECKS))
    return "\n".join(lines)


def rerun(rec: Records, checkpoint) -> list[dict]:
    """Recompute every recorded rejection with ``checkpoint``'s network and guard.

    Returns one dict per reject line: source, hop, old reasons, new reasons. Records made with the
    low band on (they hold its level) are re-checked with the low band on.
    """
    from nenv.chain.features import ENERGY_COLUMN, envelope_from_prediction, low_band_level
    from nenv.settings import LOW_BAND_GAIN_DB

    if not rec.rejects:
        return []
    x = np.array([[np.nan if v is None else v for v in r["x"]] for r in rec.rejects])
    a_nb = np.array([[np.nan if v is None else v for v in r["a_nb"]] for r in rec.rejects])
    n_in = checkpoint.features.n_inputs
    if x.shape[1] != checkpoint.features.input_dim:
        from nenv.errors import ConfigError

        raise ConfigError(f"the records hold inputs of width {x.shape[1]}; the model takes {checkpoint.features.input_dim}")
    current = x[:, -n_in:]
    energy = current[:, ENERGY_COLUMN]
    ceps, level = checkpoint.predict(x)
    a, gain = envelope_from_prediction(ceps, level, energy, order=checkpoint.features.wb_order)
    cell, novelty = checkpoint.codebook.nearest(current)
    low_band = any(r.get("values", {}).get("low_db") is not None or "low_band" in r["reasons"] for r in rec.rejects)
    low_db = low_band_level(a, gain, energy) + LOW_BAND_GAIN_DB if low_band else None
    dec = Guard(checkpoint.limits, low_band=low_band).check(ceps=ceps, level_db=level, a=a, gain=gain, a_nb=a_nb, novelty=novelty, cell=cell, low_db=low_db)
    return [{"source": r["source"], "hop": r["hop"], "old": r["reasons"], "new": reason_names(int(m))} for r, m in zip(rec.rejects, dec.reasons)]


def segments(times: list[float], *, hop_s: float = 0.01, join_s: float = 0.1, pad_s: float = 0.2) -> list[tuple[float, float]]:
    """Merge rejected hop start times into (start, end) spans in seconds, padded and joined when close."""
    spans: list[list[float]] = []
    for t in sorted(times):
        if spans and t - spans[-1][1] <= join_s:
            spans[-1][1] = t + hop_s
        else:
            spans.append([t, t + hop_s])
    return [(max(0.0, a - pad_s), b + pad_s) for a, b in spans]


def manifest(rec: Records, *, top: int = 50) -> str:
    """CSV for the next training run: the sources behind the most rejections, with their spans.

    Columns ``path,speaker`` are what ``nenv train`` reads (``manifest = ...``); ``rejected``,
    ``main_reason`` and ``segments`` (``start-end;...`` in seconds) say where to look. Training needs
    wideband audio: for narrowband call recordings, put the wideband originals (or recordings of the
    same speakers) at these paths.
    """
    by_source: dict[str, list[dict]] = {}
    for x in rec.rejects:
        by_source.setdefault(x["source"], []).append(x)
    ranked = sorted(by_source.items(), key=lambda kv: -len(kv[1]))[:top]
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["path", "speaker", "rejected", "main_reason", "segments"])
    for src, xs in ranked:
        group = next((x.get("group") for x in xs if x.get("group")), None)
        speaker = group or (src.replace("\\", "/").rsplit("/", 2)[-2] if "/" in src else src)
        reason = Counter(n for x in xs for n in x["reasons"]).most_common(1)[0][0] if xs else ""
        spans = ";".join(f"{a:.2f}-{b:.2f}" for a, b in segments([x["t"] for x in xs]))
        w.writerow([src, speaker, len(xs), reason, spans])
    return buf.getvalue()


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90)
    import matplotlib.pyplot as plt

    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode()


def figures(rec: Records, rows: list[SourceRow], *, max_sources: int = 30) -> dict[str, str]:
    """Base64 PNGs: rejection timeline per source, and each check's values against its threshold."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out = {}
    sources = [r.source for r in rows if r.rejected][:max_sources]
    by_source: dict[str, list[dict]] = {}
    for r in rec.rejects:
        by_source.setdefault(r["source"], []).append(r)
    fig, ax = plt.subplots(figsize=(10, 0.35 * max(len(sources), 3) + 1.2), layout="constrained")
    colours = dict(zip(CHECKS, plt.cm.tab10.colors))
    for i, src in enumerate(sources):  # one scatter per source and first reason: a long call may have many thousand rejected hops
        first: dict[str | None, list[float]] = {}
        for r in by_source.get(src, []):
            first.setdefault(r["reasons"][0] if r["reasons"] else None, []).append(r["t"])
        for reason, ts in first.items():
            ax.scatter(ts, [i] * len(ts), s=12, color=colours.get(reason, "k"), marker="|")
    ax.set_yticks(range(len(sources)), [s[-35:] for s in sources], fontsize=7)
    ax.set_xlabel("time in file or call [s]")
    ax.set_title("rejected hops (colour: first reason)", fontsize=9)
    for c in CHECKS:
        ax.scatter([], [], color=colours[c], label=c, marker="s")
    ax.legend(fontsize=7, ncol=len(CHECKS), loc="upper right")
    out["timeline"] = _png(fig)
    lim = rec.headers[0]["limits"] if rec.headers else {}
    hop_s = rec.headers[0].get("hop_s", 0.01) if rec.headers else 0.01
    fig, axes = plt.subplots(1, 4, figsize=(13, 3), layout="constrained")
    for ax, (check, key) in zip(axes, VALUE_OF.items()):
        vals = [r["values"][key] for r in rec.rejects if r["values"].get(key) is not None]
        if vals:
            ax.hist(np.clip(vals, -200, 200), bins=40, color="tab:gray")
        if check == "unstable" and lim:
            ax.axvline(1 - lim["stability_margin"], color="tab:red")
        elif check == "level" and lim:
            ax.axvline(lim["level_min_db"], color="tab:red")
            ax.axvline(lim["level_max_db"], color="tab:red")
        elif check == "mismatch" and lim:
            ax.axvline(lim["mismatch_max_db"], color="tab:red")
        elif check == "novel" and lim:
            ax.axvline(lim["novelty_max"], color="tab:red")
        words, rule = VALUE_WORDS[key]
        ax.set_title(f"rejected hops: {words}", fontsize=8)
        ax.set_xlabel(f"red: the guard's threshold ({rule})", fontsize=7)
        ax.set_ylabel("hops", fontsize=8)
    out["values"] = _png(fig)
    # the worst sources whose output file is at hand: spectrogram with the rejected hops marked
    outputs = {x["source"]: x.get("output") for x in rec.summaries if x.get("output")}
    worst = [r for r in rows if r.rejected and r.source in outputs][:3]
    if worst:
        import os

        import soundfile as sf

        from nenv.report.figures import spectrogram_db

        fig, axes = plt.subplots(len(worst), 1, figsize=(10, 2.4 * len(worst)), layout="constrained", squeeze=False)
        for ax, r in zip(axes[:, 0], worst):
            path = outputs[r.source]
            if not os.path.isfile(path):
                ax.set_title(f"{r.source[-60:]}: output {path} not found", fontsize=8)
                ax.axis("off")
                continue
            y, sr = sf.read(path, always_2d=True)
            spec, col_s = spectrogram_db(y[:, 0])  # a long call is pooled to the figure's width
            top = sr / 2000
            ax.imshow(spec, origin="lower", aspect="auto", extent=(0, spec.shape[1] * col_s, 0, top), vmin=spec.max() - 80, vmax=spec.max(), cmap="magma", interpolation="nearest")
            # runs of consecutive rejected hops as one bar each, along the top 4% of the frequency axis
            runs = segments([x["t"] for x in by_source.get(r.source, [])], hop_s=hop_s, join_s=hop_s / 2, pad_s=0.0)
            ax.broken_barh([(a, b - a) for a, b in runs], (0.96 * top, 0.04 * top), color="cyan")
            ax.set_title(f"{r.source[-70:]}: output, rejected hops marked in cyan ({r.rejected} of {r.hops})", fontsize=8)
            ax.set_ylabel("kHz")
        axes[-1, 0].set_xlabel("s")
        out["worst"] = _png(fig)
    return out


def _model_label(model: dict) -> str:
    """A session's model as the audit names it: its record id, and the band's level when it was not the
    trained one (headers written before the level was recorded say nothing of it)."""
    label = model.get("record_id") or "?"
    trim = model.get("band_trim_db") or 0.0
    return f"{label} (band at {trim:+g} dB)" if trim else label


def html_page(rec: Records, rows: list[SourceRow], figs: dict[str, str], reruns: list[dict] | None) -> str:
    tot = totals(rows)[0] if rows else SourceRow("all", "", 0, 0, {})
    groups = totals(rows, key=lambda r: r.group or "(none)")

    def tab(rs):
        head = "".join(f"<th>{h}</th>" for h in ["source", "group", "hops", "rejected", "rate", *CHECKS])
        body = "".join(
            "<tr>" + "".join(f"<td>{html.escape(str(v))}</td>" for v in [r.source, r.group, r.hops, r.rejected, f"{100 * r.rate:.2f}%" if r.hops else "n/a", *(r.by_reason.get(c, 0) for c in CHECKS)]) + "</tr>"
            for r in rs
        )
        return f"<table><tr>{head}</tr>{body}</table>"

    models = sorted({_model_label(h["model"]) for h in rec.headers})
    worst_html = f'<h2>Worst sources</h2><img alt="spectrograms of the worst outputs" src="data:image/png;base64,{figs["worst"]}">' if "worst" in figs else ""
    rerun_html = ""
    if reruns is not None:
        fixed = sum(1 for r in reruns if not r["new"])
        rerun_html = f"<h2>Re-run with the current model</h2><p>{fixed} of {len(reruns)} recorded rejections now pass the guard.</p>"
    return f"""<!doctype html><html><head><meta charset="utf-8"><title>nenv guard audit</title>
<style>body{{font-family:sans-serif;margin:2em;max-width:1200px}}table{{border-collapse:collapse;font-size:13px}}td,th{{border:1px solid #ccc;padding:3px 8px;text-align:right}}td:first-child{{text-align:left}}</style></head><body>
<h1>Guard audit</h1>
<p>{len(rec.headers)} session(s), model(s) {html.escape(', '.join(models))}. Hops seen: {tot.hops}; rejected: {tot.rejected}
({100 * tot.rejected / tot.hops if tot.hops else 0:.2f}%). {rec.skipped_lines} incomplete line(s) skipped.
A rejected hop used the codebook envelope instead of the network's. The added band is estimated, not recorded.</p>
<h2>By source</h2>{tab(rows)}
<h2>By group</h2>{tab(groups)}
<h2>When</h2><img alt="timeline of rejected hops" src="data:image/png;base64,{figs['timeline']}">
<h2>How far past the thresholds</h2><img alt="check values against thresholds" src="data:image/png;base64,{figs['values']}">
{worst_html}
{rerun_html}
</body></html>
"""
