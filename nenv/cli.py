"""The ``nenv`` command line: one function per command; each docstring is its help."""

from __future__ import annotations

import functools
import os
import sys
import time
from importlib import resources
from pathlib import Path
from typing import Annotated, Callable, Optional

import typer

from nenv import __version__
from nenv.errors import InputError, NenvError

app = typer.Typer(
    help="nenv: extend telephone speech (8 kHz, 300-3400 Hz) to wideband (16 kHz), on CPU.\n\n"
    "The added 3.4-8 kHz band is estimated, not recorded: never treat it as evidence of what was said or who said it.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

DEMO_CLIP = "order_confirmation_8k.wav"


def _say(msg: str) -> None:
    typer.echo(msg, err=True)


def _guarded(fn: Callable) -> Callable:
    """Turn nenv's own errors into one line on stderr and exit status 2; Ctrl-C into 130."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except NenvError as e:
            _say(f"nenv: error: {e}")
            raise typer.Exit(2) from None
        except KeyboardInterrupt:
            _say("nenv: interrupted; no partial output was left behind")
            raise typer.Exit(130) from None

    return wrapper


def _progress():
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(TextColumn("{task.description}"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"), TimeRemainingColumn(), transient=True, disable=not sys.stderr.isatty())


def _load_narrowband(path: Path, *, channel: Optional[int], mix: bool, resample: bool):
    from nenv import audio
    from nenv.settings import NB_SR

    a = audio.load(path, channel=channel, mix=mix)
    if audio.is_silent(a.y):
        raise InputError(f"'{path}' is digital silence (every sample is zero): there is nothing to extend")
    if a.sr == NB_SR:
        return a.y
    if resample:
        if a.sr > NB_SR:
            _say(f"nenv: note: resampling {a.sr} Hz to 8 kHz; this does not simulate a telephone channel (use 'nenv degrade' for that)")
        return audio.resample(a.y, orig_sr=a.sr, target_sr=NB_SR)
    if a.sr >= 16000:
        raise InputError(
            f"'{path}' is sampled at {a.sr} Hz, which looks like wideband audio; extend takes 8 kHz telephone speech. "
            f"Make a telephone version with 'nenv degrade {path} OUT.wav', or pass --resample to resample it to 8 kHz as it is"
        )
    raise InputError(f"sr={a.sr} Hz is not supported here: pass 8000 Hz narrowband input or add --resample")


ChannelOpt = Annotated[Optional[int], typer.Option("--channel", min=0, help="Channel of a multichannel file to use (0 = first).")]
MixOpt = Annotated[bool, typer.Option("--mix", help="Average all channels of a multichannel file.")]


@app.command()
@_guarded
def degrade(
    wideband: Annotated[Path, typer.Argument(help="Wideband speech (16 kHz or more; wav, flac, ogg).")],
    narrowband: Annotated[Path, typer.Argument(help="Where to write the 8 kHz telephone-band result (.wav, .flac).")],
    law: Annotated[str, typer.Option(help="G.711 companding: mulaw (PCMU), alaw (PCMA) or none.")] = "none",
    level_dbov: Annotated[float, typer.Option(help="Active speech level of the result in dBov (0 dBov = full-scale square wave).")] = -26.0,
    snr_db: Annotated[Optional[float], typer.Option(help="Add white noise at this SNR in dB before the channel.")] = None,
    seed: Annotated[int, typer.Option(help="Seed of the noise generator.")] = 0,
    channel: ChannelOpt = None,
    mix: MixOpt = False,
) -> None:
    """Simulate a telephone channel: 300-3400 Hz band-pass, 8 kHz, optional G.711 and noise."""
    from nenv import audio
    from nenv import channel as chan
    from nenv.files import check_output

    out = check_output(narrowband, suffixes=(".wav", ".flac"))
    a = audio.load(wideband, channel=channel, mix=mix)
    if audio.is_silent(a.y):
        raise InputError(f"'{wideband}' is digital silence (every sample is zero)")
    if a.sr < 16000:
        raise InputError(f"'{wideband}' is sampled at {a.sr} Hz: degrade needs wideband input (16 kHz or more)")
    nb = chan.telephone(a.y, sr=a.sr, law=law, level_dbov=level_dbov, snr_db=snr_db, seed=seed)
    audio.write(out, nb, sr=8000)
    _say(f"wrote {out} (8 kHz, {nb.size / 8000:.2f} s, law={law}, {level_dbov:g} dBov{'' if snr_db is None else f', SNR {snr_db:g} dB'})")


@app.command()
@_guarded
def extend(
    narrowband: Annotated[Path, typer.Argument(help="Telephone speech at 8 kHz (wav, flac, ogg).")],
    wideband: Annotated[Path, typer.Argument(help="Where to write the 16 kHz result (.wav, .flac).")],
    method: Annotated[Optional[str], typer.Option(help="System: neural (default when a model is available), codebook, imaging, unextended, or oracle (needs --reference).")] = None,
    model: Annotated[Optional[Path], typer.Option(help="Model folder made by 'nenv train' (default: $NENV_MODEL, else the shipped model).")] = None,
    excitation: Annotated[str, typer.Option(help="Excitation extension for source-filter systems: rectify, fold or modulate.")] = "rectify",
    reference: Annotated[Optional[Path], typer.Option(help="Wideband original, for --method oracle only.")] = None,
    figure: Annotated[Optional[Path], typer.Option(help="Also write a spectrogram figure (.png, .svg, .pdf): input vs output.")] = None,
    resample: Annotated[bool, typer.Option("--resample", help="Accept input at another rate and resample it to 8 kHz.")] = False,
    channel: ChannelOpt = None,
    mix: MixOpt = False,
    record: Annotated[Optional[Path], typer.Option(help="Append the guard's record (rejected hops, summary) to this JSON Lines file (neural only).")] = None,
    group: Annotated[Optional[str], typer.Option(help="Speaker group or codec label stored with the record.")] = None,
) -> None:
    """Extend 8 kHz telephone speech to 16 kHz wideband speech."""
    _extend(narrowband, wideband, method=method, model=model, excitation=excitation, reference=reference, figure=figure, resample=resample, channel=channel, mix=mix, record=record, group=group)


def _default_method(model: Optional[Path]) -> str:
    from nenv.checkpoint import default_path

    return "neural" if model is not None or default_path() is not None else "imaging"


def _attach_record(system, path: Optional[Path], *, source: str, group: Optional[str], n_hops: int):
    """Write the guard's rejected hops of ``system`` to ``path`` as they happen; returns the writer."""
    if path is None:
        return None
    from nenv.estimators.neural import NeuralEstimator

    est = getattr(system, "estimator", None)
    if not isinstance(est, NeuralEstimator) or est.guard is None:
        raise InputError("--record needs the neural method (only the guard's decisions are recorded)")
    from nenv.records import RecordWriter

    writer = RecordWriter(path, checkpoint=est.checkpoint, context=est.checkpoint.features.context)

    def listen(first_hop, dec, x, a_nb):
        keep = max(0, min(dec.rejected.size, n_hops - first_hop))
        if keep:
            writer.hops(source=source, group=group, first_hop=first_hop, dec=dec.head(keep), x=x[:keep], a_nb=a_nb[:keep])

    est.listener = listen
    return writer


def _close_record(writer, system, *, source: str, group: Optional[str], n_hops: int, seconds: float, output: Optional[str] = None) -> None:
    if writer is None:
        return
    dec = system.estimator.record().head(n_hops)
    writer.summary(source=source, group=group, dec=dec, seconds=seconds, output=output)
    writer.close()
    _say(f"appended the guard record to {writer.path}")


def _extend(narrowband, wideband, *, method, model, excitation, reference, figure, resample, channel, mix, record=None, group=None) -> None:
    from nenv import audio, pipeline
    from nenv.excitation import METHODS
    from nenv.figures import FIGURE_SUFFIXES, spectrogram_grid
    from nenv.files import check_output

    out = check_output(wideband, suffixes=(".wav", ".flac"))
    if figure is not None:
        check_output(figure, suffixes=FIGURE_SUFFIXES)
    method = method or _default_method(model)
    if method not in pipeline.SYSTEMS:
        raise InputError(f"--method {method} is not known: choose one of {', '.join(pipeline.SYSTEMS)}")
    if excitation not in METHODS:
        raise InputError(f"--excitation {excitation} is not known: choose one of {', '.join(METHODS)}")
    x = _load_narrowband(narrowband, channel=channel, mix=mix, resample=resample)
    ref = None
    if method == "oracle":
        if reference is None:
            raise InputError("--method oracle needs --reference WIDEBAND.wav (the original the narrowband input was made from)")
        from nenv.evaluate import prepare_reference

        ref = prepare_reference(reference)
        ref = ref * _match_gain(ref, x)
    system = pipeline.make_system(method, reference=ref, excitation=excitation, model=model)
    n_hops = -(-x.size // 80)
    writer = _attach_record(system, record, source=str(narrowband), group=group, n_hops=n_hops)
    t0 = time.perf_counter()
    with _progress() as bar:
        task = bar.add_task(f"extending {narrowband.name}", total=x.size)
        result = pipeline.extend(x, system=system, on_progress=lambda done, total: bar.update(task, completed=done))
    elapsed = time.perf_counter() - t0
    audio.write(out, result.y, sr=result.sr)
    _close_record(writer, system, source=str(narrowband), group=group, n_hops=n_hops, seconds=x.size / 8000, output=str(Path(out).resolve()))
    dur = x.size / 8000
    _say(f"wrote {out} (16 kHz, {dur:.2f} s, method={method}, {dur / max(elapsed, 1e-9):.0f}x real time)")
    if result.n_limited:
        _say(f"nenv: warning: {result.n_limited} sample(s) exceeded -0.1 dBFS and were limited; lower the input level")
    record = getattr(getattr(system, "estimator", None), "record", None)
    if record is not None:
        dec = record()
        if dec.rejected.size:
            from nenv.guard import reason_names

            counts: dict[str, int] = {}
            for mask in dec.reasons[dec.rejected]:
                for name in reason_names(int(mask)):
                    counts[name] = counts.get(name, 0) + 1
            if counts:
                detail = ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))
                _say(f"guard: {int(dec.rejected.sum())} of {dec.rejected.size} hops ({100 * dec.rejected.mean():.1f}%) fell back to the codebook ({detail})")
            else:
                _say(f"guard: all {dec.rejected.size} hops passed; none fell back to the codebook")
    if figure is not None:
        up = audio.resample(x, orig_sr=8000, target_sr=16000)
        spectrogram_grid([[("input (8 kHz, shown at 16 kHz)", up), (f"output: {method}", result.y)]], figure, title=narrowband.name)
        _say(f"wrote {figure}")


def _match_gain(ref, x) -> float:
    """Gain that brings a reference to the narrowband input's level (the oracle needs both alike)."""
    import numpy as np

    from nenv import channel as chan

    nb_of_ref = chan.telephone(ref, sr=16000, level_dbov=None)
    n = min(nb_of_ref.size, x.size)
    num = float(np.dot(nb_of_ref[:n], nb_of_ref[:n]))
    return float(np.sqrt(np.dot(x[:n], x[:n]) / num)) if num > 0 else 1.0


@app.command()
@_guarded
def evaluate(
    references: Annotated[list[Path], typer.Argument(help="Wideband reference recordings (16 kHz or more).")],
    out: Annotated[Path, typer.Option(help="Folder for table.csv, table.md and spectrograms.png (created if missing).")],
    law: Annotated[list[str], typer.Option(help="Channel G.711 law; repeat to compare several (none, mulaw, alaw).")] = ["none"],
    method: Annotated[list[str], typer.Option(help="Systems to compare; repeat. Default: every available system.")] = [],
    excitation: Annotated[str, typer.Option(help="Excitation extension for source-filter systems.")] = "rectify",
    model: Annotated[Optional[Path], typer.Option(help="Model folder for the neural and codebook systems (default: the shipped model, if any).")] = None,
) -> None:
    """Score every system against wideband references passed through the telephone channel."""
    from nenv import evaluate as ev
    from nenv.figures import spectrogram_grid
    from nenv.files import write_text
    from nenv.g711 import LAWS

    for lw in law:
        if lw not in LAWS:
            raise InputError(f"--law {lw} is not known: choose from {', '.join(LAWS)}")
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} exists and is not a folder")
    if method:
        systems = tuple(method)
    elif model is not None or _default_method(None) == "neural":
        systems = ev.ALL_SYSTEMS
    else:
        systems = ev.DEFAULT_SYSTEMS
    with _progress() as bar:
        task = bar.add_task("evaluating", total=len(references) * len(law) * len(systems))
        rows, clips = ev.run(references, systems=systems, laws=law, excitation=excitation, model=model, on_step=lambda s: bar.advance(task))
    table = rows + ev.means(rows)
    out.mkdir(parents=True, exist_ok=True)
    md = ev.to_markdown(table)
    write_text(out / "table.csv", ev.to_csv(table))
    write_text(out / "table.md", md + "\n" + ev.MEASURES_NOTE)
    panels = [[("reference", c.reference)] + [(s, c.outputs[s]) for s in systems] for c in clips[:4]]
    spectrogram_grid(panels, out / "spectrograms.png", title="  |  ".join(f"{c.name} ({c.law})" for c in clips[:4]))
    typer.echo(md)
    typer.echo(ev.MEASURES_NOTE)
    _say(f"wrote {out / 'table.csv'}, {out / 'table.md'}, {out / 'spectrograms.png'}")


@app.command()
@_guarded
def demo(
    out: Annotated[Path, typer.Option(help="Folder for the demo output (created if missing).")] = Path("nenv-demo"),
) -> None:
    """Extend the bundled demo call (an invented order confirmation) and draw input vs output."""
    out.mkdir(parents=True, exist_ok=True)
    with resources.as_file(resources.files("nenv") / "data" / "demo" / DEMO_CLIP) as clip:
        _say(f"demo input: {clip} (8 kHz, G.711 mu-law telephone speech; invented scenario)")
        _extend(clip, out / "order_confirmation_16k.wav", method=None, model=None, excitation="rectify", reference=None,
                figure=out / "order_confirmation.png", resample=False, channel=None, mix=False)
    _say("listen at a moderate level: the added high band is estimated, not recorded")


@app.command()
def version() -> None:
    """Print nenv's version."""
    typer.echo(__version__)


@app.command()
@_guarded
def audit(
    records: Annotated[list[Path], typer.Argument(help="Guard record files (JSON Lines) from extend/stream --record.")],
    out: Annotated[Path, typer.Option(help="Folder for audit.html, by_source.csv and by_group.csv (created if missing).")],
    model: Annotated[Optional[Path], typer.Option(help="Re-run every recorded decision with this model folder (e.g. a retrained one).")] = None,
    manifest: Annotated[Optional[Path], typer.Option(help="Also write a training manifest (CSV: path,speaker,... with the rejected spans) of the sources behind the most rejections.")] = None,
    top: Annotated[int, typer.Option(min=1, help="How many sources the manifest lists.")] = 50,
) -> None:
    """Summarise where and why the guard rejected the network's envelope; write an HTML report."""
    from nenv import audit as au
    from nenv import checkpoint, records as rc
    from nenv.files import write_text

    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} exists and is not a folder")
    rec = rc.read(records)
    rows = au.table(rec)
    reruns = au.rerun(rec, checkpoint.load(model)) if model is not None else None
    out.mkdir(parents=True, exist_ok=True)
    write_text(out / "by_source.csv", au.to_csv(rows))
    write_text(out / "by_group.csv", au.to_csv(au.totals(rows, key=lambda r: r.group or "(none)")))
    write_text(out / "audit.html", au.html_page(rec, rows, au.figures(rec, rows), reruns))
    typer.echo(au.to_text(rows + au.totals(rows)))
    groups = au.totals(rows, key=lambda r: r.group or "(none)")
    if any(r.group for r in rows):
        typer.echo("\nby group:\n" + au.to_text(groups))
    if reruns is not None:
        fixed = sum(1 for r in reruns if not r["new"])
        typer.echo(f"re-run with {model}: {fixed} of {len(reruns)} recorded rejections now pass the guard")
    if manifest is not None:
        from nenv.files import check_output

        write_text(check_output(manifest, suffixes=(".csv",)), au.manifest(rec, top=top))
        _say(f"wrote {manifest} (train with: nenv train --set manifest={manifest} ...; it needs wideband audio at those paths)")
    if rec.skipped_lines:
        _say(f"nenv: note: skipped {rec.skipped_lines} incomplete or unreadable line(s)")
    _say(f"wrote {out / 'audit.html'}, {out / 'by_source.csv'}, {out / 'by_group.csv'}")


# the other commands register themselves on `app`
from nenv import cli_live, cli_train  # noqa: E402,F401


def main() -> None:
    """Console entry point."""
    if os.environ.get("NENV_DEBUG"):
        app()
        return
    try:
        app()
    except SystemExit:
        raise
    except Exception as e:  # a defect in nenv, not a user error: one line, not a traceback
        _say(f"nenv: internal error ({type(e).__name__}: {e}); rerun with NENV_DEBUG=1 for details and please report it")
        sys.exit(70)
