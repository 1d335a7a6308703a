"""The ``nenv`` command line's shared parts: the application, its options, one-line errors and progress bars."""

from __future__ import annotations

import enum
import functools
import sys
from pathlib import Path
from typing import Annotated, Callable, Literal, Optional, get_args

import typer

from nenv import __version__
from nenv.errors import NenvError

app = typer.Typer(
    help="nenv: extend telephone speech (8 kHz, 300-3400 Hz) to wideband (16 kHz), on CPU.\n\n"
    "The added bands (3.4-8 kHz, and 50-300 Hz with --low-band) are estimated, not recorded: never treat them as evidence of what was said or who said it.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,  # plain help: a switch reads as a switch (the rich panels labelled every flag "<bool>")
)

DEMO_CLIP = "order_confirmation_8k.wav"

# the fixed sets of values, checked by the command line library and listed in --help
Method = Literal["neural", "codebook", "imaging", "unextended", "oracle", "true-band"]
LiveMethod = Literal["neural", "codebook", "imaging", "unextended"]  # what can run on a live call (no reference)
Law = Literal["mulaw", "alaw", "none"]
Excitation = Literal["rectify", "fold", "modulate"]
InputFormat = Literal["s16le", "mulaw", "alaw"]
AudioFormat = Literal["wav", "flac"]
# the same sets for options that repeat (the library takes lists of enumerations, not of literals)
LawChoice = enum.Enum("LawChoice", [(v, v) for v in get_args(Law)], type=str)
MethodChoice = enum.Enum("MethodChoice", [(v.replace("-", "_"), v) for v in get_args(Method)], type=str)
SNR_RANGE_DB = (-10.0, 100.0)  # dB: degrade --snr-db accepts this range (below -10 dB the noise is all there is)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"nenv {__version__}")
        raise typer.Exit()


@app.callback()
def _top(
    version: Annotated[bool, typer.Option("--version", is_eager=True, callback=_version, help="Print nenv's version and exit.")] = False,
) -> None:
    """nenv: extend telephone speech (8 kHz, 300-3400 Hz) to wideband (16 kHz), on CPU.

    The added bands (3.4-8 kHz, and 50-300 Hz with --low-band) are estimated, not recorded: never treat them as evidence of what was said or who said it.
    """


def _say(msg: str) -> None:
    typer.echo(msg, err=True)


def _unknown_clips(clips: set[str], group_table: Optional[dict], groups: Optional[Path]) -> None:
    """Say which clips the groups table (``--groups``) does not name: they count under '(no group)'."""
    from nenv.report.evaluate import group_of
    from nenv.words import count

    unknown = sorted(c for c in clips if group_table is not None and group_of(c, group_table) is None)
    if unknown:
        _say(f"nenv: note: {count(len(unknown), 'clip')} not in {groups} (first: {unknown[0]}) {'counts' if len(unknown) == 1 else 'count'} under '(no group)'")


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


def _kernels_ready() -> None:
    """Compile (first run after an install) or load the signal kernels before the first hop, saying so when it takes long."""
    from nenv.dsp import kernels

    kernels.warm(notice=kernels.stderr_notice)


def _progress():
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(TextColumn("{task.description}"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"), TimeRemainingColumn(), transient=True, disable=not sys.stderr.isatty())


ChannelOpt = Annotated[Optional[int], typer.Option("--channel", min=0, help="Channel of a multichannel file to use (0 = first).")]
MixOpt = Annotated[bool, typer.Option("--mix", help="Average all channels of a multichannel file.")]
BandTrimOpt = Annotated[Optional[float], typer.Option("--band-trim", help="Level of the model's added high band in dB against its trained level (neural, codebook; negative is quieter). Default: the model folder's calibration, 0 dB when it has none.", show_default=False)]
LowBandOpt = Annotated[bool, typer.Option("--low-band", help="Also add an estimated 50-300 Hz band (neural, codebook, oracle, true-band). Off by default: it lowers WB-PESQ (docs/2026-12-03-low-band.md).")]


def _default_method(model: Optional[Path]) -> str:
    from nenv.chain.checkpoint import default_path

    return "neural" if model is not None or default_path() is not None else "imaging"
