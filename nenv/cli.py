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
) -> None:
    """Extend 8 kHz telephone speech to 16 kHz wideband speech."""
    _extend(narrowband, wideband, method=method, model=model, excitation=excitation, reference=reference, figure=figure, resample=resample, channel=channel, mix=mix)


def _default_method(model: Optional[Path]) -> str:
    from nenv.checkpoint import default_path

    return "neural" if model is not None or default_path() is not None else "imaging"


def _extend(narrowband, wideband, *, method, model, excitation, reference, figure, resample, channel, mix) -> None:
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
    t0 = time.perf_counter()
    with _progress() as bar:
        task = bar.add_task(f"extending {narrowband.name}", total=x.size)
        result = pipeline.extend(x, system=system, on_progress=lambda done, total: bar.update(task, completed=done))
    elapsed = time.perf_counter() - t0
    audio.write(out, result.y, sr=result.sr)
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


class _Terminate(Exception):
    pass


@app.command()
@_guarded
def stream(
    input_format: Annotated[str, typer.Option("--input-format", help="stdin encoding at 8 kHz: s16le (16-bit little-endian PCM), mulaw (PCMU bytes) or alaw (PCMA bytes).")] = "s16le",
    method: Annotated[Optional[str], typer.Option(help="System: neural (default when a model is available), codebook, imaging, unextended.")] = None,
    model: Annotated[Optional[Path], typer.Option(help="Model folder (default: $NENV_MODEL, else the shipped model).")] = None,
    excitation: Annotated[str, typer.Option(help="Excitation extension: rectify, fold or modulate.")] = "rectify",
) -> None:
    """Extend a live call: 8 kHz audio on stdin, 16 kHz s16le on stdout, unbuffered.

    Ends cleanly at end of input or on SIGTERM/SIGINT, writing the last samples first.
    """
    import signal as sig

    import numpy as np

    from nenv import g711, pipeline
    from nenv.audio import to_int16
    from nenv.runtime import CallEngine

    if input_format not in ("s16le", "mulaw", "alaw"):
        raise InputError(f"--input-format {input_format} is not known: choose s16le, mulaw or alaw")
    method = method or _default_method(model)
    if method not in pipeline.SYSTEMS or method == "oracle":
        raise InputError(f"--method {method} cannot stream: choose neural, codebook, imaging or unextended")
    if method in pipeline.MODEL_SYSTEMS:
        from nenv import checkpoint

        path = model or checkpoint.default_path()
        if path is None:
            raise InputError("no model: pass --model FOLDER (made by 'nenv train'), or set NENV_MODEL")
        model = checkpoint.load(path, flush_denormals=True)  # this process is ours: flush denormals
    engine = CallEngine(pipeline.make_system(method, model=model, excitation=excitation))
    out = sys.stdout.buffer
    fd = sys.stdin.fileno()

    def stop(signum, frame):
        raise _Terminate()

    old = {s: sig.signal(s, stop) for s in (sig.SIGTERM, sig.SIGINT)}
    leftover = b""
    try:
        while True:
            try:
                data = os.read(fd, 4096)
            except _Terminate:
                break
            if not data:
                break
            if input_format == "s16le":
                data = leftover + data
                n = len(data) // 2 * 2
                leftover = data[n:]
                x = np.frombuffer(data[:n], dtype="<i2").astype(np.float64) / 32768.0
            else:
                x = g711.decode(np.frombuffer(data, dtype=np.uint8), law=input_format)
            y = engine.feed(x)
            if y.size:
                out.write(to_int16(y).astype("<i2").tobytes())
                out.flush()
    except _Terminate:
        pass
    finally:
        for s, h in old.items():
            sig.signal(s, h)
    y = engine.flush()
    if y.size:
        out.write(to_int16(y).astype("<i2").tobytes())
    out.flush()
    _say(f"stream ended: {engine.samples_in / 8000:.2f} s in, {engine.samples_out / 16000:.2f} s out, {engine.limited} samples limited, {engine.bad_samples} bad samples")


def _hostport(text: str, what: str) -> tuple[str, int]:
    host, sep, port = text.rpartition(":")
    if not sep or not port.isdigit() or not 0 <= int(port) <= 65535:
        raise InputError(f"{what} {text!r} must look like HOST:PORT, e.g. 127.0.0.1:5004")
    return host or "127.0.0.1", int(port)


@app.command()
@_guarded
def relay(
    to: Annotated[str, typer.Option("--to", help="Where to send the wideband RTP (L16/16000), HOST:PORT.")],
    listen: Annotated[str, typer.Option(help="Where to receive PCMU/PCMA RTP, HOST:PORT. Loopback unless you say otherwise.")] = "127.0.0.1:5004",
    allow: Annotated[list[str], typer.Option(help="Accept packets only from this source address (repeatable). Default: any.")] = [],
    payload_type: Annotated[int, typer.Option(help="Dynamic RTP payload type of the output (96-127).")] = 96,
    max_streams: Annotated[int, typer.Option(min=1, help="Most concurrent streams (SSRCs); packets of further streams are dropped and counted.")] = 64,
    idle_timeout: Annotated[float, typer.Option(help="Seconds without packets after which a stream is flushed and closed.")] = 2.0,
    method: Annotated[Optional[str], typer.Option(help="System: neural (default when a model is available), codebook, imaging, unextended.")] = None,
    model: Annotated[Optional[Path], typer.Option(help="Model folder (default: $NENV_MODEL, else the shipped model).")] = None,
) -> None:
    """Relay RTP: PCMU/PCMA in (RFC 3551 types 0 and 8), L16 16 kHz out, one engine per SSRC. Stops on SIGTERM/Ctrl-C."""
    import signal as sig

    from nenv import checkpoint, pipeline, rtp

    method = method or _default_method(model)
    if method not in pipeline.SYSTEMS or method == "oracle":
        raise InputError(f"--method {method} cannot stream: choose neural, codebook, imaging or unextended")
    if not 96 <= payload_type <= 127:
        raise InputError(f"--payload-type {payload_type}: dynamic payload types are 96-127 (RFC 3551)")
    ck = None
    if method in pipeline.MODEL_SYSTEMS:
        path = model or checkpoint.default_path()
        if path is None:
            raise InputError("no model: pass --model FOLDER (made by 'nenv train'), or set NENV_MODEL")
        ck = checkpoint.load(path, flush_denormals=True)
    try:
        r = rtp.Relay(lambda: pipeline.make_system(method, model=ck), listen=_hostport(listen, "--listen"), send_to=_hostport(to, "--to"),
                      payload_type_out=payload_type, allowed_sources=list(allow) or None, max_streams=max_streams, idle_timeout_s=idle_timeout)
    except OSError as e:
        raise InputError(f"cannot listen on {listen}: {e.strerror or e}") from e
    _say(f"relaying RTP from {r.address[0]}:{r.address[1]} to {to} (method={method}, output payload type {payload_type}); stop with Ctrl-C")

    def stop(signum, frame):
        raise _Terminate()

    old = {s_: sig.signal(s_, stop) for s_ in (sig.SIGTERM, sig.SIGINT)}
    try:
        r.serve()
    except _Terminate:
        r._shutdown()
    finally:
        for s_, h in old.items():
            sig.signal(s_, h)
    for ssrc, c in r.closed.items():
        _say(f"stream {ssrc:08x}: {c.packets} packets in, {c.packets_out} out, {c.lost_packets} lost ({c.filled_samples} samples filled), {c.late_or_duplicate} late or duplicate")
    _say(f"relay: {r.counters.malformed} malformed, {r.counters.wrong_payload_type} wrong payload type, {r.counters.not_allowed} not allowed, {r.counters.over_stream_limit} over the stream limit")


RecipeOpt = Annotated[Optional[Path], typer.Option("--config", help="Training recipe (flat TOML, see configs/).")]
SetOpt = Annotated[list[str], typer.Option("--set", help="Override a recipe key: --set epochs=20 (repeatable).")]


@app.command()
@_guarded
def survey(
    corpus: Annotated[Path, typer.Argument(help="Folder of wideband recordings (wav, flac, ogg; any rate; sub-folders = speakers).")],
    out: Annotated[Path, typer.Option(help="Folder for survey.csv and survey.png (created if missing).")],
    config: RecipeOpt = None,
    set_: SetOpt = [],
) -> None:
    """Check every file of a corpus and say which ones training would use, and why not."""
    from nenv.files import write_text
    from nenv.train import corpus as corp
    from nenv.train import recipe as rcp

    recipe = rcp.load(config, overrides=list(set_))
    files = corp.scan(corpus, speaker_rule=recipe.speaker_rule, manifest=recipe.manifest)
    out.mkdir(parents=True, exist_ok=True)
    with _progress() as bar:
        task = bar.add_task(f"surveying {len(files)} files", total=len(files))
        reports = corp.survey(files, recipe, workers=recipe.workers, on_done=lambda: bar.advance(task))
    write_text(out / "survey.csv", corp.reports_csv(reports))
    corp.survey_figure(reports, out / "survey.png")
    summ = corp.summary(reports)
    typer.echo(f"files: {summ['files']}  kept: {summ['kept_files']} ({summ['kept_hours'] * 60:.1f} min, {summ['kept_active_hours'] * 60:.1f} min active, {summ['speakers']} speakers)")
    for reason, n in sorted(summ["exclusion_reasons"].items(), key=lambda kv: -kv[1]):
        typer.echo(f"  excluded, {reason}: {n}")
    _say(f"wrote {out / 'survey.csv'}, {out / 'survey.png'}")


class _RichReporter:
    def __init__(self, bar):
        self.bar = bar
        self.task = None

    def stage(self, name, total=None):
        if self.task is not None:
            self.bar.remove_task(self.task)
        self.task = self.bar.add_task(name, total=total)
        return lambda: self.bar.advance(self.task)

    def log(self, msg):
        self.bar.console.print(msg) if self.bar.console.is_terminal else _say(msg)


@app.command()
@_guarded
def train(
    out: Annotated[Path, typer.Option(help="Model folder to create (replaced only with --force, and only once training succeeded).")],
    config: RecipeOpt = None,
    set_: SetOpt = [],
    cache: Annotated[Optional[Path], typer.Option(help="Feature cache folder (reused across runs). Default: none.")] = None,
    force: Annotated[bool, typer.Option("--force", help="Replace an existing model folder.")] = False,
) -> None:
    """Train an envelope network and its codebook on a wideband corpus, on CPU, and export it to ONNX."""
    from nenv.train import recipe as rcp

    recipe = rcp.load(config, overrides=list(set_))
    try:
        from nenv.train.loop import train as run
    except ImportError as e:
        raise InputError(f"training needs the train extra: pip install 'nenv[train]' ({e})") from e
    with _progress() as bar:
        res = run(recipe, out, cache_dir=str(cache) if cache else None, force=force, reporter=_RichReporter(bar))
    m = res.record["metrics"]
    typer.echo(
        f"model {res.record['record_id']} written to {out} in {res.record['wall_s']:.0f} s\n"
        f"held-out speakers: envelope LSD 3.4-8 kHz neural {m['val_envelope_lsd_high_db']['neural']:.2f} dB vs codebook "
        f"{m['val_envelope_lsd_high_db']['codebook']:.2f} dB; median level error {m['val_median_level_error_db']['neural']:+.2f} dB; "
        f"guard rejects {100 * m['val_guard_rejection_rate']:.2f}% of hops"
    )


@app.command()
@_guarded
def export(
    model: Annotated[Path, typer.Argument(help="Model folder made by 'nenv train' (needs model.pt and nenv.json).")],
) -> None:
    """Re-export a model folder's torch weights to model.onnx and check it against torch."""
    try:
        from nenv.train.export import export_checkpoint
    except ImportError as e:
        raise InputError(f"export needs the train extra: pip install 'nenv[train]' ({e})") from e
    diff = export_checkpoint(model)
    typer.echo(f"wrote {model / 'model.onnx'} (onnx.checker passed; onnxruntime vs torch max difference {diff:.1e})")


@app.command()
def version() -> None:
    """Print nenv's version."""
    typer.echo(__version__)


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
